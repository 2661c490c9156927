"""Times and peak memory of the hostile-input corpus (tests/hostile/runner.py), one
forked child per case; tests assert outcomes and memory, this prints the times.

    python bench/bench_hostile.py [CASE or KIND ...]

Issue 16's goal: each case under 2 s and 500 MB. The peak includes the libraries the
child shares with its parent (~90-150 MB).
"""
from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def main(argv=None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    with tempfile.TemporaryDirectory() as d:
        out = subprocess.run([sys.executable, str(ROOT / "tests" / "hostile" / "runner.py"), d, *argv],
                             capture_output=True, text=True, check=False)
    print(f"{'case':32} {'outcome':14} {'s':>7} {'MB':>7}  goal (<2 s, <500 MB)")
    for line in out.stdout.splitlines():
        r = json.loads(line)
        ok = r["seconds"] < 2 and r["peak_mb"] < 500
        print(f"{r['case']:32} {r['outcome']:14} {r['seconds']:7.3f} {r['peak_mb']:7.1f}  {'met' if ok else 'NOT met'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
