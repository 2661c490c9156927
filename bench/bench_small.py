"""Everyday-size speed (10-200 points): Ballast beside scipy / statsmodels, same run.

Prints one line per goal of the small-data speed issue: the median times, the ratio
and the goal. Never a pass/fail exit code: these machines are noisy, so read the
ratios over a few runs. All data are invented (seeded).

Sections (``--only NAME[,NAME]`` runs some of them):

* ``fit``       25-point 4PL under Huber / Tukey / adaptive, each with automatic start
                values, automatic scale and covariance, against scipy
                ``least_squares(method="trf", loss="huber")`` with a fixed ``f_scale``
                (Ballast's final threshold), the analytic Jacobian and Ballast's own start
                values given for free; goals <= 2x / 3x / 5x. The adaptive fit is timed
                twice: repeated on one data set (its log Z(alpha) cache warm) and with
                that cache cleared before each fit, as new data find it.
* ``line``      25-point straight line, Huber with automatic scale, against statsmodels
                ``RLM(HuberT)``; goal <= 0.5x.
* ``cold``      a fresh process importing fitcore and fitting a 25-point 4PL, against a
                fresh ``python -c "import numpy, scipy.optimize"``; goal <= 1.5x.
* ``analyses``  comparison of every loss on a 25-point 4PL (goal <= 0.3 s), exact-refit
                point diagnostics on 100 points (<= 1 s), residual and case bootstrap
                B = 999 of a 25-point 4PL Huber fit (<= 5 s on 2 cores).
* ``threads``   300 least-squares line fits and 5 case bootstraps (B = 199, 30 points)
                in a fresh process with the environment's BLAS thread settings removed
                (numpy's default thread count), against the same with one BLAS thread;
                goal: the default costs no more than one thread (ratio ~1).
* ``window``    ``ballast FILE`` to a fitted window (fresh process, offscreen), against a
                fresh process showing a bare PySide6 main window with one pyqtgraph
                plot; goal <= 2x.

Run: python bench/bench_small.py [--repeat N] [--only fit,line,...] [--clock cpu]

``--clock cpu`` times the in-process figures (fit, line, the loss comparison and the
diagnostics) by the process's CPU time instead of the wall clock: on a shared machine under load the wall clock charges
a fit of several milliseconds with the time other processes run, far more than a
1-ms reference, and the ratio says more about the load than about the code. The
bootstrap (worker processes) and the fresh-process sections always use the wall clock.
"""
from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))  # this checkout's fitcore, not an installed one


CLOCK = time.perf_counter  # (main() switches to time.process_time for --clock cpu)


def median_time(fn, repeat, warm=1):
    for _ in range(warm):
        fn()
    times = []
    for _ in range(repeat):
        t = CLOCK()
        fn()
        times.append(CLOCK() - t)
    return statistics.median(times)


def one_blas_thread():
    """The references' condition in the issue: one BLAS thread. ``fit()`` sets that for
    itself; scipy and statsmodels would otherwise run numpy's default (two threads here),
    which on a 25-point problem costs them time (and, by the CPU clock, the spinning
    second thread's time too: 1.6 ms instead of 0.85 ms for the 4PL reference), a ratio
    that flatters Ballast."""
    from threadpoolctl import threadpool_limits
    return threadpool_limits(limits=1, user_api="blas")


def line(label, ours, ref, goal, ref_label=""):
    ratio = ours / ref
    ok = "met" if ratio <= goal else "NOT met"
    print(f"  {label:<34s} {ours * 1e3:9.1f} ms  {ref_label:<22s} {ref * 1e3:9.1f} ms"
          f"  ratio {ratio:6.2f}  (goal <= {goal:g}: {ok})")


def absolute(label, t, goal_s):
    ok = "met" if t <= goal_s else "NOT met"
    print(f"  {label:<58s} {t * 1e3:9.1f} ms  (goal <= {goal_s:g} s: {ok})")


# --------------------------------------------------------------------------- data
def logistic_data(n=25, seed=3):
    """An invented inhibition curve: doses 0.01-100, two gross outliers."""
    rng = np.random.default_rng(seed)
    x = np.geomspace(0.01, 100, n)
    y = 2.0 + (100.0 - 2.0) / (1 + (x / 1.3) ** 1.1) + rng.normal(0, 2.0, n)
    y[n // 3] -= 35.0
    y[(2 * n) // 3] += 25.0
    return x, y


def line_data(n=25, seed=5):
    rng = np.random.default_rng(seed)
    x = np.linspace(0, 10, n)
    y = 1.0 + 0.8 * x + rng.normal(0, 0.2, n)
    y[n // 2] += 3.0
    return x, y


# --------------------------------------------------------------------------- sections
def bench_fit(repeat):
    import fitcore
    from scipy.optimize import least_squares

    x, y = logistic_data()
    model = fitcore.get_model("logistic4")
    res = fitcore.fit(model, x, y, loss="huber")
    f_scale = res.scale * res.tuning
    p0 = np.asarray(model.guess(x, y), float)

    def scipy_fit():
        return least_squares(lambda p: model.f(x, p) - y, p0, jac=lambda p: model.jac(x, p),
                             method="trf", loss="huber", f_scale=f_scale)

    with one_blas_thread():
        t_sp = median_time(scipy_fit, repeat)
    sp = scipy_fit()
    print(f"25-point 4PL (scipy: nfev {sp.nfev}, top {sp.x[1]:.3f}; Ballast Huber top "
          f"{res['top']:.3f}, converged {res.converged})")
    for loss, goal in (("huber", 2), ("tukey", 3), ("adaptive", 5)):
        t = median_time(lambda loss=loss: fitcore.fit(model, x, y, loss=loss), repeat)
        line(f"Ballast 4PL {loss}", t, t_sp, goal, "scipy trf huber")
    # log Z(alpha) comes from a table for alpha in [0, 2 - 2**-30], else from a quadrature
    # cached per exact alpha (~0.1-0.2 ms each); repeating one data set hits that cache
    # every time, new data do not
    from fitcore.partition import _cached

    def adaptive_new_data():
        _cached.cache_clear()
        fitcore.fit(model, x, y, loss="adaptive")

    t = median_time(adaptive_new_data, max(3, repeat // 3))
    line("Ballast 4PL adaptive, cold log Z", t, t_sp, 5, "scipy trf huber")


def bench_line(repeat):
    import fitcore
    import statsmodels.api as sm

    x, y = line_data()
    A = np.column_stack([np.ones_like(x), x])
    fitcore.fit("line", x, y, loss="huber")
    t = median_time(lambda: fitcore.fit("line", x, y, loss="huber"), repeat * 4)
    with one_blas_thread():
        t_sm = median_time(lambda: sm.RLM(y, A, M=sm.robust.norms.HuberT()).fit(), repeat * 4)
    print("25-point straight line, Huber, automatic scale")
    line("Ballast line huber", t, t_sm, 0.5, "statsmodels RLM")


def _fresh(code, env=None, repeat=5):
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        subprocess.run([sys.executable, "-c", code], check=True, cwd=ROOT, env=env)
        times.append(time.perf_counter() - t)
    return statistics.median(times)


def bench_cold(repeat):
    x, y = logistic_data()
    code = ("import numpy as np, fitcore\n"
            f"x = np.array({x.tolist()!r}); y = np.array({y.tolist()!r})\n"
            "r = fitcore.fit('logistic4', x, y, loss='huber')\n"
            "assert r.converged\n")
    reps = max(3, repeat)
    t_ref = _fresh("import numpy, scipy.optimize", repeat=reps)
    t_ours = _fresh(code, repeat=reps)
    print("cold start (fresh processes)")
    line("import fitcore + 4PL Huber fit", t_ours, t_ref, 1.5, "import numpy,scipy.opt")


def bench_analyses(repeat):
    import fitcore
    from fitcore.bootstrap import bootstrap
    from fitcore.losses import LOSS_NAMES

    x, y = logistic_data()
    model = fitcore.get_model("logistic4")
    print("analyses")
    losses = list(LOSS_NAMES)
    t = median_time(lambda: fitcore.compare_losses(model, x, y, losses, alpha=0.5), repeat)
    absolute(f"loss comparison, all {len(losses)} losses, 25-point 4PL", t, 0.3)

    x100, y100 = logistic_data(100, seed=11)
    r100 = fitcore.fit(model, x100, y100, loss="huber")
    t = median_time(lambda: fitcore.point_diagnostics(r100), max(1, repeat // 2))
    absolute("exact-refit point diagnostics, 100-point 4PL Huber", t, 1.0)

    res = fitcore.fit(model, x, y, loss="huber")
    for kind in ("residual", "case"):
        t0 = time.perf_counter()
        b = bootstrap(res, kind, B=999, seed=1)
        t = time.perf_counter() - t0
        absolute(f"bootstrap {kind}, B = 999, 25-point 4PL Huber "
                 f"({b.processes} process{'es' if b.processes > 1 else ''}, "
                 f"{b.n_failed} failed)", t, 5.0)


THREAD_CODE = r"""
import time, numpy as np, fitcore
from fitcore.bootstrap import bootstrap
rng = np.random.default_rng(2)
x = np.linspace(0, 10, 30); y = 1 + 0.5 * x + rng.normal(0, 0.3, 30)
fitcore.fit('line', x, y)
t = time.perf_counter()
for i in range(300):
    fitcore.fit('line', x, y + 0.01 * i)
t1 = time.perf_counter() - t
r = fitcore.fit('line', x, y, loss='huber')
t = time.perf_counter()
for s in range(5):
    bootstrap(r, 'case', B=199, seed=s, processes=1)
t2 = time.perf_counter() - t
print(t1, t2)
"""


def bench_threads(repeat):
    base = {k: v for k, v in os.environ.items()
            if k not in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")}
    one = dict(base, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1", MKL_NUM_THREADS="1")
    res = {"default": [], "one": []}
    for _ in range(max(2, repeat // 2)):
        for key, env in (("default", base), ("one", one)):
            out = subprocess.run([sys.executable, "-c", THREAD_CODE], check=True, cwd=ROOT,
                                 env=env, capture_output=True, text=True).stdout.split()
            res[key].append((float(out[0]), float(out[1])))
    d = [statistics.median(v[i] for v in res["default"]) for i in (0, 1)]
    o = [statistics.median(v[i] for v in res["one"]) for i in (0, 1)]
    print("BLAS threads: environment at defaults vs one thread (fresh processes)")
    line("300 least-squares line fits", d[0], o[0], 1.3, "one BLAS thread")
    line("5 case bootstraps B=199, 30 points", d[1], o[1], 1.3, "one BLAS thread")


def bench_window(repeat):
    """The window start, timed as bench/bench_start.py does it (the real ``ballast FILE``
    path with its exit hook, fresh processes, alternating with the bare window, bytecode
    compiled in an untimed first round)."""
    sys.path.insert(0, str(ROOT / "bench"))
    import bench_start

    sample = str(ROOT / "sample_sets" / "02_tracer_decay.csv")
    bare, ours = [], []
    with tempfile.TemporaryDirectory() as tmp:
        pyc = os.path.join(tmp, "pycache")  # one .pyc cache, filled by the untimed round -1
        for i in range(-1, max(3, repeat)):
            env = bench_start._env(os.path.join(tmp, f"{i}a"), pycache=pyc)
            t = bench_start.time_to_line([sys.executable, "-c", bench_start.BARE_CODE], env, "bare:")
            if i >= 0:
                bare.append(t)
            env = dict(bench_start._env(os.path.join(tmp, f"{i}b"), pycache=pyc), BALLAST_EXIT_AFTER_FIRST_FIT="1")
            t = bench_start.time_to_line([sys.executable, "-m", "desktop", sample], env, "ballast: first fit")
            if i >= 0:
                ours.append(t)
    print("window start (fresh processes, offscreen)")
    line("ballast 02_tracer_decay.csv", statistics.median(ours), statistics.median(bare), 2.0,
         "bare window + plot")


SECTIONS = {"fit": bench_fit, "line": bench_line, "cold": bench_cold,
            "analyses": bench_analyses, "threads": bench_threads, "window": bench_window}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=9, help="timed repetitions per figure")
    ap.add_argument("--only", default="", help="comma-separated sections: " + ", ".join(SECTIONS))
    ap.add_argument("--clock", choices=("wall", "cpu"), default="wall",
                    help="in-process timings by wall clock (default) or process CPU time")
    a = ap.parse_args(argv)
    global CLOCK
    CLOCK = time.process_time if a.clock == "cpu" else time.perf_counter
    print(f"clock for in-process timings: {a.clock}")
    names = [s for s in a.only.split(",") if s] or list(SECTIONS)
    print(f"BLAS threads from the environment: OPENBLAS_NUM_THREADS="
          f"{os.environ.get('OPENBLAS_NUM_THREADS', '(default)')}; the fit and line "
          f"references run with one (as fit() does)")
    for name in names:
        SECTIONS[name](a.repeat)


if __name__ == "__main__":
    main()
