"""studies.imaging and studies.analysis import no Django (design.md, "Rules of the house")."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def test_the_core_packages_import_without_django() -> None:
    modules = sorted(
        f"studies.{package}.{path.stem}"
        for package in ("imaging", "analysis")
        for path in (ROOT / "studies" / package).glob("*.py")
        if path.stem not in {"__init__", "__main__"}
    )
    code = (
        "import importlib, sys\n"
        f"for name in {modules!r}:\n"
        "    importlib.import_module(name)\n"
        "print(sorted(m for m in sys.modules if m == 'django' or m.startswith('django.')))\n"
    )
    result = subprocess.run(
        [sys.executable, "-c", code],
        cwd=ROOT,
        capture_output=True,
        text=True,
        env={"PATH": "/usr/bin:/bin", "PYTHONPATH": str(ROOT)},
        timeout=120,
    )
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "[]"
    assert len(modules) >= 4
