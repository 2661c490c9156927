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
from fitcore.io import read_table


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
    frame = pd.DataFrame({"Time (s)": x, "Signal (mV)": y, "u(Signal) (mV)": s})
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "big.csv"
        t0 = time.perf_counter()
        frame.to_csv(path, index=False)
        size_mb = path.stat().st_size / 1e6
        print(f"wrote {args.rows} rows x 3 columns ({size_mb:.1f} MB) in {time.perf_counter() - t0:.2f} s")

        table = read_table(path)
        assert table.n_rows == args.rows and table.columns == ["Time", "Signal", "u(Signal)"], table
        assert np.array_equal(table.column("Signal"), y)  # exact round trip
        t_ours = best_of(lambda: read_table(path), args.repeat)
        t_pd = best_of(lambda: pd.read_csv(path), args.repeat)
        print(f"plain comma CSV    fitcore.read_table: {t_ours:.3f} s   pandas.read_csv: {t_pd:.3f} s   "
              f"ratio {t_ours / t_pd:.2f}   (best of {args.repeat})")
        print("target: read_table under 2 s for 1e6 rows:", "met" if t_ours < 2.0 else "NOT met")

        # the same numbers exported with decimal comma and semicolons
        path_dc = Path(tmp) / "big_dc.csv"
        frame.to_csv(path_dc, index=False, sep=";", decimal=",")
        t_ours = best_of(lambda: read_table(path_dc), args.repeat)
        t_pd = best_of(lambda: pd.read_csv(path_dc, sep=";", decimal=","), args.repeat)
        print(f"semicolon, decimal comma  read_table: {t_ours:.3f} s   pandas.read_csv: {t_pd:.3f} s   "
              f"ratio {t_ours / t_pd:.2f}")

        # one cell in a thousand holds text: that column is converted cell by cell where needed
        text_col = frame["Signal (mV)"].map(repr).to_numpy(dtype=object)
        text_col[::1000] = "n.d."
        path_nd = Path(tmp) / "big_nd.csv"
        frame.assign(**{"Signal (mV)": text_col}).to_csv(path_nd, index=False)
        t_ours = best_of(lambda: read_table(path_nd), args.repeat)
        t_pd = best_of(lambda: pd.read_csv(path_nd), args.repeat)
        print(f"0.1 % 'n.d.' cells        read_table: {t_ours:.3f} s   pandas.read_csv: {t_pd:.3f} s   "
              f"ratio {t_ours / t_pd:.2f}  (pandas leaves that column as text)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
