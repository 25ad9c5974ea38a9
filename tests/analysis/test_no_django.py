"""studies.analysis and studies.imaging import without Django (design.md, house rule)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def test_it_imports_the_analysis_and_imaging_packages_without_django():
    """Every module of both packages is imported in a fresh interpreter; no django module loads."""
    code = (
        "import sys, importlib, pkgutil\n"
        "import studies.analysis, studies.imaging\n"
        "for pkg in (studies.analysis, studies.imaging):\n"
        "    for m in pkgutil.iter_modules(pkg.__path__):\n"
        "        if m.name != '__main__':\n"
        "            importlib.import_module(pkg.__name__ + '.' + m.name)\n"
        "print('django' in sys.modules, any(k.startswith('django') for k in sys.modules))\n"
    )
    proc = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                          text=True, timeout=180)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.split() == ["False", "False"]
