"""Time fitcore.read_table against a bare pandas.read_csv on a large CSV.

Writes a CSV of ``--rows`` rows x 3 float columns (default 1e6) into a temporary
folder, then reads it ``--repeat`` times with each reader and prints the best time
of each and their ratio. Run from the project root::

    python bench/bench_read_table.py [--rows 1000000] [--repeat 3]
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from fitcore.io import read_table  # noqa: E402


def best_of(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    rng = np.random.default_rng(20240611)
    x = np.linspace(0.0, 100.0, args.rows)
    y = 3.0 * np.exp(-x / 20.0) + rng.normal(0.0, 0.05, args.rows)
    s = np.full(args.rows, 0.05)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "big.csv"
        t0 = time.perf_counter()
        pd.DataFrame({"Time (s)": x, "Signal (mV)": y, "u(Signal) (mV)": s}).to_csv(path, index=False)
        size_mb = path.stat().st_size / 1e6
        print(f"wrote {args.rows} rows x 3 columns ({size_mb:.1f} MB) in {time.perf_counter() - t0:.2f} s")

        table = read_table(path)
        assert table.n_rows == args.rows and table.columns == ["Time", "Signal", "u(Signal)"], table
        t_ours = best_of(lambda: read_table(path), args.repeat)
        t_pd = best_of(lambda: pd.read_csv(path), args.repeat)
    print(f"fitcore.read_table: {t_ours:.3f} s (best of {args.repeat})")
    print(f"pandas.read_csv   : {t_pd:.3f} s")
    print(f"ratio read_table / read_csv: {t_ours / t_pd:.2f}")
    print("target: read_table under 2 s for 1e6 rows:", "met" if t_ours < 2.0 else "NOT met")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
