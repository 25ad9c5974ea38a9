"""Run every benchmark script and print one JSON object per figure per line.

Scripts are tests/benchmarks/bench_<prefix>.py; each prints lines of
{"name": ..., "value": ..., "unit": ..., "target": ...} whose names start with
"<prefix>." (bench_viewer.py may also print "api." figures). With --only PREFIX, only
scripts that can produce matching figures run, and only matching lines are printed.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
EXTRA_PREFIXES = {"viewer": ("api.",)}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--only", default="", help="figure name prefix, e.g. analysis. or viewer")
    only = parser.parse_args().only
    failed = 0
    for script in sorted(HERE.glob("bench_*.py")):
        prefix = script.stem.removeprefix("bench_")
        prefixes = (prefix + ".", *EXTRA_PREFIXES.get(prefix, ()))
        if only and not any(p.startswith(only) or only.startswith(p) for p in prefixes):
            continue
        # ONLY=<script prefix> keeps all of that script's figures (viewer: also api.*).
        wanted = prefixes if only.rstrip(".") == prefix else (only,)
        env = {**os.environ, "PYTHONPATH": str(ROOT), "CAIRN_BENCH_ONLY": only}
        result = subprocess.run(
            [sys.executable, str(script)], cwd=ROOT, env=env, capture_output=True, text=True
        )
        for line in result.stdout.splitlines():
            try:
                figure = json.loads(line)
            except json.JSONDecodeError:
                continue
            if isinstance(figure, dict) and str(figure.get("name", "")).startswith(wanted):
                print(json.dumps(figure), flush=True)
        if result.returncode != 0:
            failed += 1
            print(f"{script.name} failed:\n{result.stderr[-2000:]}", file=sys.stderr)
    return 1 if failed else 0


if __name__ == "__main__":
    raise SystemExit(main())
