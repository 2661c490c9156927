"""L1 (least absolute deviations) speed against scipy and statsmodels, side by side.

Prints medians and ratios (no pass/fail thresholds: these machines are noisy).

* Linear models (line, quadratic): ``fitcore.fit(..., loss="l1")`` (covariance
  included) against scipy.optimize.linprog (HiGHS) on the dual LP over all points,
  ``max b^T d, A^T d = 0, |d| <= 1`` (the fastest plain LP formulation; the primal with
  2n slack columns is far slower), and statsmodels QuantReg(q=0.5) (IRLS; not exact).
* Exponential decay (nonlinear: sequential LP): against one plain HiGHS dual LP of the
  linearised problem at the solution (a lower bound for any SLP iteration) and
  fitcore's own Huber fit (the speed a user compares with in the window).

Figures before the L1 rework (same machine, OPENBLAS_NUM_THREADS=1): line 20 000
points 1.9 s, 100 000 11.7 s, 300 000 40-80 s (line / quadratic); exp_decay 1000
0.6-0.8 s, 4000 2.0 s, 10 000 9.7 s, 25 000 50 s.

Run: OPENBLAS_NUM_THREADS=1 python bench/bench_l1.py [--quick]
"""
from __future__ import annotations

import sys
import warnings

import numpy as np
from scipy import optimize

import fitcore
from bench_engine import median_time  # (the same timing rule as the engine bench)




def dual_lp(A, b):
    sb = float(np.median(np.abs(b - np.median(b)))) or 1.0
    res = optimize.linprog(-b / sb, A_eq=A.T, b_eq=np.zeros(A.shape[1]), bounds=(-1, 1),
                           method="highs")
    return -np.asarray(res.eqlin.marginals) * sb


def main(quick: bool) -> None:
    warnings.simplefilter("ignore")
    try:
        import statsmodels.api as sm
    except ImportError:  # pragma: no cover - optional
        sm = None
    rng = np.random.default_rng(1)
    sizes = [1000, 10000, 100000] if quick else [1000, 10000, 100000, 300000]
    print(f"{'model':10s} {'n':>7s} {'ballast':>9s} {'linprog':>9s} {'ratio':>6s} "
          f"{'QuantReg':>9s} {'ratio':>6s}")
    for model in ("line", "poly2"):
        for n in sizes:
            x = rng.uniform(0, 10, n)
            y = 1 + 2 * x + 0.05 * x * x + rng.normal(0, 0.3, n)
            y[rng.choice(n, n // 50, replace=False)] += 20
            A = np.c_[np.ones(n), x] if model == "line" else np.c_[np.ones(n), x, x * x]
            rep = 3 if n <= 10000 else 1
            t_ours = median_time(lambda model=model, x=x, y=y: fitcore.fit(model, x, y, loss="l1"), rep)
            t_lp = median_time(lambda A=A, y=y: dual_lp(A, y), rep) if n <= 100000 or not quick else float("nan")
            t_qr = (median_time(lambda A=A, y=y: sm.QuantReg(y, A).fit(q=0.5, max_iter=2000), rep)
                    if sm is not None else float("nan"))
            print(f"{model:10s} {n:7d} {t_ours:9.3f} {t_lp:9.3f} {t_lp / t_ours:6.1f} "
                  f"{t_qr:9.3f} {t_qr / t_ours:6.1f}")
    print()
    print(f"{'model':10s} {'n':>7s} {'ballast':>9s} {'1 dual LP':>9s} {'ratio':>6s} "
          f"{'Huber':>9s} {'ratio':>6s} {'SLP it':>6s}")
    m = fitcore.get_model("exp_decay")
    for n in ([1000, 10000, 25000] if quick else [1000, 10000, 25000, 100000]):
        x = rng.uniform(0, 10, n)
        y = m.f(x, [10, 2, 1]) + rng.normal(0, 0.1, n)
        y[rng.choice(n, n // 50, replace=False)] += 3
        rep = 3 if n <= 10000 else 1
        res = fitcore.fit("exp_decay", x, y, loss="l1")
        t_ours = median_time(lambda x=x, y=y: fitcore.fit("exp_decay", x, y, loss="l1"), rep)
        J = m.jac(x, res.values)
        t_lp = median_time(lambda J=J, res=res: dual_lp(J, res.residuals), rep)
        t_h = median_time(lambda x=x, y=y: fitcore.fit("exp_decay", x, y, loss="huber"), rep)
        print(f"{'exp_decay':10s} {n:7d} {t_ours:9.3f} {t_lp:9.3f} {t_lp / t_ours:6.2f} "
              f"{t_h:9.3f} {t_h / t_ours:6.2f} {res.n_iter:6d}")


if __name__ == "__main__":
    main("--quick" in sys.argv)
