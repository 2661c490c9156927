"""Time fitcore.read_table against a bare pandas.read_csv on a wide spectrum export.

Writes a CSV the way a spectrometer exports a series of spectra: a time column and
``--cols`` intensity columns (default 12,000, headed by their wavelength, e.g.
``"412.345 nm"``), ``--rows`` spectra (default 200), six decimals per value, so each
line is about 110,000 characters long. Reads it ``--repeat`` times with each reader
in the same run, prints the best time of each and their ratio, and the goal
(read_table under 2 s). Run from the project root::

    python bench/bench_io.py [--rows 200] [--cols 12000] [--repeat 3]
"""
from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench_read_table import best_of

from fitcore.io import read_table


def write_spectra(path: Path, rows: int, cols: int, seed: int = 16) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    wl = np.linspace(200.0, 1100.0, cols)
    t = np.arange(rows) * 0.5
    peak = np.exp(-0.5 * ((wl - 550.0) / 40.0) ** 2)
    y = 0.05 + np.outer(np.exp(-t / 30.0), peak) + rng.normal(0.0, 0.002, (rows, cols))
    with open(path, "w", encoding="utf-8", newline="\n") as fh:
        fh.write("Time (s)," + ",".join(f"{w:.3f} nm" for w in wl) + "\n")
        for r in range(rows):
            fh.write(f"{t[r]:.1f}," + ",".join(f"{v:.6f}" for v in y[r]) + "\n")
    return t, np.round(y, 6)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=200)
    ap.add_argument("--cols", type=int, default=12_000)
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "spectra.csv"
        t, y = write_spectra(path, args.rows, args.cols)
        with open(path, encoding="utf-8") as fh:
            longest = max(len(line) for line in fh)
        print(f"wrote {args.rows} spectra x {args.cols} wavelengths ({path.stat().st_size / 1e6:.1f} MB, "
              f"lines up to {longest:,} characters)")
        table = read_table(path)
        assert table.n_rows == args.rows and len(table.columns) == args.cols + 1, table
        mid = table.columns[1 + args.cols // 2]
        sel = table.choose(x="Time", y=mid)
        assert np.array_equal(sel.x, t) and np.allclose(sel.y, y[:, args.cols // 2], rtol=0, atol=5e-7)
        t_ours = best_of(lambda: read_table(path), args.repeat)
        t_pd = best_of(lambda: pd.read_csv(path), args.repeat)
        print(f"wide spectrum CSV  fitcore.read_table: {t_ours:.3f} s   pandas.read_csv: {t_pd:.3f} s   "
              f"ratio {t_ours / t_pd:.2f}   (best of {args.repeat})")
        print("target: read_table under 2 s:", "met" if t_ours < 2.0 else "NOT met")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
