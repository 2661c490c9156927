"""Batch speed and memory: ballast-fit's engine against bare fitcore.fit, in one run.

Prints same-run ratios (never pass/fail on absolute times: these machines are shared
and noisy). Goals from the batch issue:

* 1,000 curves of 25 points (files of invented data), Huber: ``jobs=2`` on 2 cores
  >= 1.7x the serial throughput;
* overhead per curve (file read + fit + results row) <= 2x the bare fitcore.fit time;
* Dask, local cluster of 2 workers: >= 1.5x serial on the same 1,000 curves;
* 100,000 curves in one long table: peak memory <= 2x the table's size + a constant.

Run: python bench/bench_batch.py [--quick] [--skip-dask] [--skip-big]
"""
from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402

import fitcore  # noqa: E402
from fitcore.batch import BatchSpec, fit_sources, write_rows  # noqa: E402

MODEL, LOSS, POINTS = "line", "huber", 25


def make_files(folder: Path, n: int, seed: int = 0) -> list[tuple[np.ndarray, np.ndarray]]:
    rng = np.random.default_rng(seed)
    data = []
    x = np.linspace(0.0, 12.0, POINTS)
    for i in range(n):
        y = 1.0 + 0.5 * (i % 7) + 2.0 * x + rng.normal(0, 0.3, POINTS)
        y[rng.integers(0, POINTS)] += rng.uniform(5, 15)
        lines = ["Time (s),Signal (mV)"] + [f"{a:.6f},{b:.6f}" for a, b in zip(x, y)]
        (folder / f"curve_{i:04d}.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
        data.append((np.round(x, 6), np.round(y, 6)))
    return data


def timed(fn):
    t = time.perf_counter()
    out = fn()
    return time.perf_counter() - t, out


class CpuMeter:
    """CPU seconds used by this process and all its descendants (worker processes,
    forkserver children, a Dask cluster's workers) while the block runs. The
    descendants are sampled every 0.1 s (psutil), so a worker's last 0.1 s before it
    exits may be missed. Unlike wall time, CPU time hardly depends on how busy the
    machine is: it tells whether the parallel run does more work than the serial one."""

    def __enter__(self):
        import threading

        import psutil

        self._psutil = psutil
        self._me = psutil.Process()
        self._start = {}
        self._last = {}
        self._stop = threading.Event()
        self._sample(first=True)
        self._cpu0 = time.process_time()
        self._thread = threading.Thread(target=self._loop, daemon=True)
        self._thread.start()
        return self

    def _sample(self, first=False):
        for p in self._me.children(recursive=True):
            try:
                t = p.cpu_times()
            except self._psutil.Error:
                continue
            used = t.user + t.system
            if first:
                self._start[p.pid] = used
            self._start.setdefault(p.pid, 0.0)
            self._last[p.pid] = used

    def _loop(self):
        while not self._stop.wait(0.1):
            self._sample()

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self._sample()
        own = time.process_time() - self._cpu0
        kids = sum(self._last[pid] - self._start[pid] for pid in self._last)
        self.seconds = own + kids
        return False


def metered(fn):
    """``(wall seconds, CPU seconds, result)``; CPU is None without psutil."""
    try:
        import psutil  # noqa: F401
    except ImportError:
        t, out = timed(fn)
        return t, None, out
    with CpuMeter() as m:
        t, out = timed(fn)
    return t, m.seconds, out


def _cpu(c, n):
    return "" if c is None else f"; CPU {c / n * 1e3:.1f} ms a curve"


def run_files(folder, out, **kw) -> tuple[float, float | None]:
    spec = BatchSpec(x="Time", ys=("Signal",), model=MODEL, loss=LOSS)
    failed = []
    t, c, n = metered(lambda: write_rows(out, fit_sources([folder], spec, **kw), ["a", "b"],
                                         on_row=lambda r: r.error and failed.append(r.error)))
    if failed:
        print(f"  !! {len(failed)} of {n} curves failed, e.g. {failed[0]}")
    return t, c


def throughput(n_curves: int, skip_dask: bool):
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "curves"
        folder.mkdir()
        data = make_files(folder, n_curves)
        out = Path(tmp) / "results.csv"
        fitcore.fit(MODEL, *data[0], LOSS)  # warm imports and caches
        n = n_curves
        t_bare, c_bare, _ = metered(lambda: [fitcore.fit(MODEL, x, y, LOSS) for x, y in data])
        t_serial, c_serial = run_files(folder, out, jobs=1)
        serial_bytes = out.read_bytes()
        t_many1, c_many1, _ = metered(lambda: fitcore.fit_many(data, MODEL, LOSS, jobs=1))
        t_many2, c_many2, _ = metered(lambda: fitcore.fit_many(data, MODEL, LOSS, jobs=2))
        t_pool_cold, c_pool_cold = run_files(folder, out, jobs=2)
        same_pool = out.read_bytes() == serial_bytes
        t_pool, c_pool = run_files(folder, out, jobs=2)  # the forkserver is up: worker start-up only
        print(f"{n} files of {POINTS} points, model {MODEL}, loss {LOSS}")
        print(f"  bare fitcore.fit, one after another      {t_bare:8.2f} s{_cpu(c_bare, n)}")
        print(f"  files, jobs=1 (read + fit + row)         {t_serial:8.2f} s{_cpu(c_serial, n)}"
              f"  -> overhead {t_serial / t_bare:.2f}x bare by wall time"
              + ("" if c_bare is None else f", {c_serial / c_bare:.2f}x by CPU") + " (goal <= 2)")
        print(f"  files, jobs=2, first run (server start)  {t_pool_cold:8.2f} s{_cpu(c_pool_cold, n)}"
              f"  -> {t_serial / t_pool_cold:.2f}x serial; results identical: {same_pool}")
        print(f"  files, jobs=2                            {t_pool:8.2f} s{_cpu(c_pool, n)}"
              f"  -> {t_serial / t_pool:.2f}x serial (goal >= 1.7)")
        if c_pool is not None:
            print(f"     CPU of the 2-process run / serial run: {c_pool / c_serial:.2f} (1.00 = no extra work; "
                  f"on an idle 2-core machine the speed-up would be about 2 / this = "
                  f"{2 * c_serial / c_pool:.2f}x, a projection, not a measurement)")
        print(f"  fit_many in memory, jobs=1 / jobs=2      {t_many1:8.2f} s / {t_many2:.2f} s"
              f"  -> {t_many1 / t_many2:.2f}x"
              + ("" if c_many1 is None else f"; CPU {c_many1:.1f} s / {c_many2:.1f} s"))
        if skip_dask:
            return
        try:
            import distributed
        except ImportError:
            print("  Dask: not installed (pip install -e '.[cluster]'); skipped")
            return
        t_start, cluster = timed(lambda: distributed.LocalCluster(
            n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0", silence_logs=40))
        try:
            address = cluster.scheduler_address
            t_dask_cold, c_dask_cold = run_files(folder, out, engine="dask", scheduler=address)
            same_dask = out.read_bytes() == serial_bytes
            t_dask, c_dask = run_files(folder, out, engine="dask", scheduler=address)
        finally:
            cluster.close()
        print(f"  Dask local cluster, 2 workers: start     {t_start:8.2f} s")
        print(f"  files, Dask, first run                   {t_dask_cold:8.2f} s{_cpu(c_dask_cold, n)}"
              f"  -> {t_serial / t_dask_cold:.2f}x serial; results identical: {same_dask}")
        print(f"  files, Dask                              {t_dask:8.2f} s{_cpu(c_dask, n)}"
              f"  -> {t_serial / t_dask:.2f}x serial (goal >= 1.5)")
        if c_dask is not None:
            print(f"     CPU of the Dask run / serial run: {c_dask / c_serial:.2f} (idle-machine projection "
                  f"about {2 * c_serial / c_dask:.2f}x, not a measurement)")


BIG_CHILD = r"""
import os, resource, sys, threading, time
from fitcore.cli import main
path, out, jobs = sys.argv[1], sys.argv[2], sys.argv[3]
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
workers = [0]
stop = threading.Event()
def sample():  # resident memory of all worker processes together (forkserver children too)
    try:
        import psutil
    except ImportError:
        return
    me = psutil.Process()
    while not stop.wait(0.2):
        total = 0
        for p in me.children(recursive=True):
            try:
                total += p.memory_info().rss
            except psutil.Error:
                pass
        workers[0] = max(workers[0], total // 1024)
threading.Thread(target=sample, daemon=True).start()
t = time.perf_counter()
code = main([path, "--x", "x", "--y", "y", "--group", "curve", "--model", "line", "--loss", "l2",
             "--out", out, "--jobs", jobs, "--quiet"])
stop.set()
print(code, time.perf_counter() - t, base, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss, workers[0])
"""


def big_table(n_curves: int, points: int, jobs: int):
    """One long table of ``n_curves`` groups, fitted by ballast-fit in a fresh process;
    its peak resident memory against the table's size."""
    with tempfile.TemporaryDirectory() as tmp:
        rng = np.random.default_rng(1)
        n = n_curves * points
        path = Path(tmp) / "long.csv"
        curve = np.repeat(np.arange(1, n_curves + 1), points)
        x = np.tile(np.arange(points, dtype=float), n_curves)
        y = 2.0 * x + 1.0 + rng.normal(0, 0.1, n)
        with open(path, "w", encoding="utf-8") as fh:
            fh.write("curve,x,y\n")
            np.savetxt(fh, np.column_stack([curve, x, y]), fmt=["%d", "%.1f", "%.5f"], delimiter=",")
        file_mb = path.stat().st_size / 2**20
        table_mb = n * (3 * 8 + 8) / 2**20  # three float columns and the file-row numbers
        tiny = Path(tmp) / "tiny.csv"
        tiny.write_text("curve,x,y\n1,0,1\n1,1,3\n1,2,5\n2,0,1\n2,1,2\n2,2,3.5\n", encoding="utf-8")
        env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))

        def child(p):
            done = subprocess.run([sys.executable, "-c", BIG_CHILD, str(p), str(Path(tmp) / "out.csv"),
                                   str(jobs)], capture_output=True, text=True, env=env, check=False)
            if done.returncode != 0:
                raise RuntimeError(done.stderr[-2000:])
            code, secs, base, peak, kids = done.stdout.split()
            return int(code), float(secs), int(base) / 1024, int(peak) / 1024, int(kids) / 1024

        _, _, _, const_peak, const_kids = child(tiny)
        code, secs, base, peak, kids = child(path)
        rows = sum(1 for _ in open(Path(tmp) / "out.csv", encoding="utf-8")) - 1
        print(f"{n_curves} curves of {points} points in one long table ({n} rows), line, l2, jobs={jobs}")
        print(f"  file {file_mb:.1f} MiB; table in memory {table_mb:.1f} MiB (3 float columns + row numbers)")
        print(f"  ballast-fit: exit {code}, {rows} result rows, {secs:.1f} s")
        print(f"  resident memory after the imports, before reading: {base:.0f} MiB")
        print(f"  peak resident memory of the command: {peak:.0f} MiB; the same on a 6-row table "
              f"(the constant): {const_peak:.0f} MiB")
        extra = peak - const_peak
        print(f"  -> growth {extra:.0f} MiB = {extra / table_mb:.2f}x the table in memory, "
              f"{extra / file_mb:.2f}x the file (goal <= 2x + constant)")
        print(f"  all worker processes together (forkserver included), sampled: {kids:.0f} MiB "
              f"(6-row table: {const_kids:.0f} MiB)")


def _spin(n):
    s = 0
    for i in range(n):
        s += i * i
    return s


def machine_check() -> float:
    """How much faster 2 processes run a pure-Python toy loop than 1, right now: the
    most any 2-process speed-up can be on this (shared) machine at this moment."""
    from concurrent.futures import ProcessPoolExecutor

    n = 2_000_000
    t_one, _ = timed(lambda: [_spin(n) for _ in range(4)])
    with ProcessPoolExecutor(2) as ex:
        list(ex.map(_spin, [10, 10]))
        t_two, _ = timed(lambda: list(ex.map(_spin, [n] * 4)))
    return t_one / t_two


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="200 files and 10,000 curves")
    ap.add_argument("--skip-dask", action="store_true")
    ap.add_argument("--skip-big", action="store_true")
    ap.add_argument("--curves", type=int, help="files in the throughput part (default 1000; --quick 200)")
    ap.add_argument("--big", type=int, help="curves in the long table (default 100000; --quick 10000)")
    args = ap.parse_args()
    print(f"cores: {fitcore.batch.default_jobs()}; load average at start: "
          f"{', '.join(f'{v:.1f}' for v in os.getloadavg())} (a shared machine: figures are noisy)")
    print(f"machine check: a toy CPU loop runs {machine_check():.2f}x faster on 2 processes than on 1 "
          "right now (2.0 on an idle 2-core machine; the ceiling for the ratios below)")
    throughput(args.curves or (200 if args.quick else 1000), args.skip_dask)
    print(f"machine check again: {machine_check():.2f}x")
    if not args.skip_big:
        big_table(args.big or (10_000 if args.quick else 100_000), 5, jobs=2)
    print(f"load average at the end: {', '.join(f'{v:.1f}' for v in os.getloadavg())}")


if __name__ == "__main__":
    main()
