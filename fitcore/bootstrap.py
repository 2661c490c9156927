r"""Bootstrap intervals for the parameters of a finished fit.

Two resampling schemes (Efron & Tibshirani 1993, ch. 9; Davison & Hinkley 1997,
section 6.2):

* **case** bootstrap: draw ``n`` of the used points with replacement (x, y and sigma
  together) and refit. Makes no assumption about the error model; points the
  analyst excluded stay out.
* **residual** bootstrap: keep x, draw from the fit's whitened residuals and refit
  ``y* = f(x, theta) + sigma_i e*_i``. The residuals are the modified residuals
  ``r_i / sqrt(1 - h_ii)`` (h from the Jacobian of the fit), centred to mean zero
  (Davison & Hinkley 1997, algorithm 6.3); for a robust fit, leverages from the
  weighted Jacobian and centring where the fit's own loss puts the residuals (see
  :func:`modified_residuals`). Assumes exchangeable errors.

Every refit repeats the original method: same model, loss, tuning constant, shape,
held parameters, sigma mode and scale rule (an automatic scale is re-estimated per
resample, a fixed one is kept; the adaptive loss re-fits its shape), warm-started from
the original estimates. The refits of a chunk run together: Newton's method on each
resample's estimating equations from the full fit, stacked over the chunk
(:class:`fitcore.refits.BatchRefit`; the same root as a full ``fit``, to 1e-8 standard
errors), with ``fit``'s first attempt for the few resamples where it does not settle
(see ``FALLBACK_MAX_ITER``); the adaptive loss and L1 use the full ``fit``. Where a
resample's equations have two roots (about 3 % of the case resamples of a 25-point 4PL
with two gross outliers) the two routes may pick different ones (bench/bench_analysis.py
prints the agreement). Intervals are percentile intervals of the refitted values.
A resample whose fit fails or does not converge is dropped and counted in
``n_failed``.

Reproducibility: the resamples are cut into chunks of fixed size, each with its own
random generator seeded from ``numpy.random.SeedSequence(seed).spawn``; the result
for a given seed is the same whether the chunks run in this process or in a pool of
worker processes. The pool (``concurrent.futures`` with the ``spawn`` start method,
safe beside a running Qt application) is used when the work is large and
``processes != 1``; the model is rebuilt in the workers from its built-in name,
formula text or design matrix, so models built from Python callables run in this
process only. A program that calls :func:`bootstrap` with a pool from a script must
guard its entry point with ``if __name__ == "__main__":`` (spawn re-imports it).
"""
from __future__ import annotations

import math
import os
import time
from concurrent import futures
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from .diagnostics import hat_values, loss_of, refit_settings, used_mask, whitened
from .model import Model, design_model
from .models import get_model
from .refits import BatchRefit, Cancelled, WarmRefit, first_attempt
from .result import FitResult
from .solve import FitError, fit
from .threads import limit_process, small_problem

CHUNK = 25  # resamples per chunk (fixed: it defines the random streams)
#: use the pool (processes=None) when the rest would take longer than this here. A worker
#: costs 1-1.5 s to start (numpy, scipy and fitcore imported afresh) and the pool gains at
#: most 2x on 2 cores, nothing when the other core is busy: measured with the batched
#: refits, B = 999 case resamples of a 25-point 4PL took 5.5 s in this process and 9.1 s
#: with 2 workers on a loaded 2-core machine (bench/bench_small.py --only analyses)
POOL_MIN_SECONDS = 12.0
KINDS = ("case", "residual")
#: steps per inner solve of a resample's fallback refit (where the batched Newton refit
#: did not settle): a few case resamples of a 4PL (e.g. one holding too few points of a
#: plateau) otherwise run tens of thousands of steps, and ``fit`` then searches other
#: starts, for up to a minute, towards a curve that is no curve (EC50 = 1e33); such a
#: resample counts as failed instead. Measured on bench_small's 25-point 4PL Huber fit,
#: case B = 999, seed 1: 19 resamples go to the fallback, 15 pass it (the same 15 with
#: 10, 20 or 50 steps), 4 fail
FALLBACK_MAX_ITER = 10


@dataclass
class BootstrapResult:
    """Bootstrap of one fit.

    Attributes
    ----------
    intervals
        ``(n_params, 2)`` percentile intervals at ``level``; held parameters get
        their held value at both ends; NaN when fewer than 10 resamples succeeded.
    samples
        ``(B', n_params)`` refitted values of the successful resamples.
    stderr
        Standard deviation of the samples per parameter.
    B, n_done, n_failed
        Resamples asked for, resamples attempted, and failed (dropped) resamples.
    kind, seed, level
        As given.
    cancelled
        True when ``cancel()`` stopped the run early.
    processes
        Worker processes used (1 = this process).
    method_text
        e.g. ``"case bootstrap, B = 999, percentile intervals, seed 0"``.
    bias
        ``mean(samples) - estimate`` per parameter (0 for held parameters).
    warnings
        One text per parameter whose bootstrap distribution is shifted from the
        estimate by more than its own spread (see :func:`shift_warnings`).
    """

    intervals: np.ndarray
    samples: np.ndarray
    stderr: np.ndarray
    param_names: tuple[str, ...]
    B: int
    n_done: int
    n_failed: int
    kind: str
    seed: int
    level: float
    cancelled: bool
    processes: int
    method_text: str
    elapsed: float = 0.0
    bias: np.ndarray | None = None
    warnings: list = field(default_factory=list)


# --------------------------------------------------------------------------- worker
_MODEL_CACHE: dict = {}


def build_model(spec):
    """Rebuild a model in a worker from ``("builtin", name) | ("formula", text) |
    ("design", A, names, name)``; the model objects hold Python functions that do not
    travel between processes."""
    if isinstance(spec, Model):
        return spec
    kind = spec[0]
    if kind == "design":
        return design_model(spec[1], spec[2], spec[3])
    key = spec
    if key not in _MODEL_CACHE:
        if kind == "builtin":
            _MODEL_CACHE[key] = get_model(spec[1])
        elif kind == "formula":
            from .formula import parse_formula  # here: the formula parser loads sympy
            _MODEL_CACHE[key] = parse_formula(spec[1])
        else:
            raise ValueError(f"unknown model description {kind!r}")
    return _MODEL_CACHE[key]


def _run_chunk(job: dict, seed_seq, count: int, cancel: Callable[[], bool] | None = None
               ) -> np.ndarray:
    """Refit ``count`` resamples drawn with ``default_rng(seed_seq)``.

    Top-level so that a spawned worker can import it. Returns ``(count, n_params)``
    values with a NaN row for each failed resample; fewer rows when ``cancel()`` said
    True: it is asked before the chunk, at every iteration of the batched refits (a
    cancel there drops the chunk's resamples: no row) and before each fallback refit,
    so it is answered within one iteration or one refit. The refits are small problems:
    they run with one BLAS thread.

    The chunk's resamples are refitted together (:class:`fitcore.refits.BatchRefit`:
    Newton's method from the full fit, stacked over the resamples). A resample whose
    iteration does not settle gets ``fit``'s first attempt from the full fit's values
    with at most ``FALLBACK_MAX_ITER`` steps per inner solve
    (:func:`fitcore.refits.first_attempt`); if that does not pass the fit's verdict the
    resample counts as failed. The adaptive loss and L1 take the full ``fit``.
    """
    model = build_model(job["model"])
    rng = np.random.default_rng(seed_seq)
    x, y, sig = job["x"], job["y"], job["sigma"]
    n = x.size
    p = len(model.param_names)
    out = np.full((count, p), np.nan)
    # the draws, in the order the resamples were always drawn
    X = np.empty((count, n))
    Y = np.empty((count, n))
    S = None if sig is None else np.empty((count, n))
    for b in range(count):
        if job["kind"] == "case":
            pick = rng.integers(0, n, n)
            X[b], Y[b] = x[pick], y[pick]
            if S is not None:
                S[b] = sig[pick]
        else:
            e = job["resid"][rng.integers(0, n, n)]
            X[b] = x
            Y[b] = job["fitted"] + (e if sig is None else sig * e)
            if S is not None:
                S[b] = sig
    if cancel is not None and cancel():
        return out[:0]
    warm = WarmRefit(model, job["values"], job["free"], job["scale"], job["settings"],
                     usable=job["converged"])
    with small_problem(n * p):
        ok = np.zeros(count, bool)
        if warm.enabled:
            batch = BatchRefit(warm, x, y, sig)
            try:
                vals, ok = batch.solve(X, Y, S, cancel=cancel)
            except Cancelled:
                return out[:0]
            ok &= np.all(np.isfinite(vals), axis=1)
            out[ok] = vals[ok]
        settings = dict(job["settings"], max_iter=FALLBACK_MAX_ITER)
        for b in np.flatnonzero(~ok):
            if cancel is not None and cancel():
                return out[:b]
            sb = None if S is None else S[b]
            if warm.enabled:
                got = first_attempt(model, X[b], Y[b], sb, job["p0"], settings)
                if got is not None and np.all(np.isfinite(got)):
                    out[b] = got
                continue
            try:  # the adaptive loss and L1: the full refit
                r = fit(model, X[b], Y[b], sigma=sb, p0=job["p0"], **job["settings"])
            except (FitError, ValueError, ArithmeticError, np.linalg.LinAlgError):
                continue
            if r.converged and np.all(np.isfinite(r.values)):
                out[b] = r.values
    return out


def _worker_start():
    """Pool worker set-up: one BLAS thread (every refit is a small problem)."""
    limit_process(1)


# --------------------------------------------------------------------------- helpers
def _same_model(a: Model, b: Model, x: np.ndarray, p: np.ndarray) -> bool:
    if a.param_names != b.param_names or a.is_linear != b.is_linear:
        return False
    try:
        with np.errstate(all="ignore"):
            for q in (p, p * (1 + 1e-3) + 1e-3):
                fa, fb = np.asarray(a.f(x, q), float), np.asarray(b.f(x, q), float)
                ja, jb = np.asarray(a.jac(x, q), float), np.asarray(b.jac(x, q), float)
                if not (np.array_equal(fa, fb, equal_nan=True)
                        and np.array_equal(ja, jb, equal_nan=True)):
                    return False
    except Exception:  # noqa: BLE001 - any failure means "not the same model"
        return False
    return True


def model_spec(model: Model, x: np.ndarray, p: np.ndarray):
    """A picklable description that rebuilds ``model`` exactly, or None."""
    cands = []
    if model.name == "design" and model.is_linear:
        try:
            m = int(np.nanmax(x)) + 1 if x.size else 0
            A = np.asarray(model.basis(np.arange(m, dtype=float)), dtype=float)
            cands.append(("design", A, tuple(model.param_names), model.name))
        except Exception:  # noqa: BLE001
            pass
    cands.append(("builtin", model.name))
    text = model.formula[4:] if model.formula.startswith("y = ") else model.formula
    for t in (model.name, text):
        if t:
            cands.append(("formula", t))
    for spec in cands:
        try:
            built = build_model(spec)
        except Exception:  # noqa: BLE001 - not that kind of model
            continue
        if _same_model(model, built, x, p):
            return spec
    return None


def modified_residuals(res: FitResult, J: np.ndarray, r: np.ndarray, used: np.ndarray
                       ) -> np.ndarray:
    """Residuals to resample: ``r_i / sqrt(1 - h_ii)``, centred by the fit's own loss.

    Davison & Hinkley (1997, algorithm 6.3) centre the modified residuals of a
    least-squares fit by their mean, which is where the least-squares equations put
    them. A robust fit puts its residuals where ``sum psi(r_i / s) = 0`` instead; one
    gross outlier moves their *mean* far from there (a well at 3 % among responses
    near 100 % moves it by several units), so mean-centred resamples are all shifted
    by that amount and the whole bootstrap distribution with them (issue 17 item 8:
    a 4PL top of 97.4 got the interval [98.4, 103.8]). Here the residuals are centred
    by the M-estimate of location under the fit's loss and scale (the mean for least
    squares, the median for L1). Leverages use the fit's robust weights
    (``sqrt(w) J``), as the point diagnostics do.
    """
    if res.loss == "l2":
        w = np.ones(r.size)
    else:
        w = np.clip(np.asarray(res.weights, float)[used], 0.0, None)
    h = hat_values(J * np.sqrt(w)[:, None])
    with np.errstate(all="ignore"):
        e = r / np.sqrt(np.where(h < 1 - 1e-12, 1.0 - h, np.nan))
    e = e[np.isfinite(e)]
    if e.size == 0:
        return e
    return e - residual_centre(e, res.loss, None if res.loss in ("l2", "l1") else loss_of(res),
                               float(res.scale))


def residual_centre(e: np.ndarray, loss_name: str, loss=None, scale: float = 1.0) -> float:
    """Location of ``e`` under a loss: the root of ``sum psi((e - c) / scale) = 0``.

    Least squares: the mean; L1: the median; other losses: reweighted means from the
    median (psi(u)/u as weights) until the location stops moving. Falls back to the
    median when the scale or the weights are unusable.
    """
    e = np.asarray(e, dtype=float)
    if loss_name == "l2":
        return float(np.mean(e))
    c = float(np.median(e))
    if loss_name == "l1" or loss is None or not (scale > 0 and math.isfinite(scale)):
        return c
    for _ in range(100):
        u = (e - c) / scale
        with np.errstate(all="ignore"):
            w = np.asarray(loss.weight(u), dtype=float)
        sw = float(np.sum(w))
        if not (sw > 0 and np.all(np.isfinite(w))):
            return float(np.median(e))
        c_new = float(np.sum(w * e) / sw)
        if abs(c_new - c) <= 1e-12 * (scale + abs(c)):
            return c_new
        c = c_new
    return c


def shift_warnings(names, values, samples, stderr, free) -> tuple[np.ndarray, list[str]]:
    """Bootstrap bias ``mean(samples) - estimate`` per parameter, and a warning for each
    parameter whose bootstrap distribution sits further from the estimate than its own
    spread (|bias| > standard deviation of the samples): its percentile interval is
    then not centred on the estimate and may not contain it."""
    p = len(names)
    bias = np.full(p, np.nan)
    warns: list[str] = []
    if samples.shape[0] < 2:
        return bias, warns
    bias = np.mean(samples, axis=0) - np.asarray(values, float)
    bias[~free] = 0.0
    for j, name in enumerate(names):
        b, sd = float(bias[j]), float(stderr[j])
        if free[j] and math.isfinite(b) and math.isfinite(sd) and abs(b) > sd:
            warns.append(f"{name}: the bootstrap distribution is shifted from the estimate by "
                         f"{b:+.3g} (bias), more than its own spread ({sd:.3g}); its "
                         f"percentile interval is not centred on the estimate: do not use "
                         f"it as the uncertainty of {name}")
    return bias, warns


def _percentile(samples: np.ndarray, level: float, values: np.ndarray, free: np.ndarray):
    p = values.size
    iv = np.full((p, 2), np.nan)
    if samples.shape[0] >= 10:
        q = np.quantile(samples, [(1 - level) / 2, (1 + level) / 2], axis=0).T
        iv[:] = q
    iv[~free] = values[~free, None]
    return iv


def bootstrap(res: FitResult, kind: str = "case", B: int = 999, seed: int = 0,
              level: float = 0.95, *, progress: Callable[[int, int], None] | None = None,
              cancel: Callable[[], bool] | None = None, processes: int | None = None
              ) -> BootstrapResult:
    """Case or residual bootstrap of a fit, with percentile intervals.

    Parameters
    ----------
    res
        The fit to bootstrap.
    kind
        ``"case"`` or ``"residual"`` (see the module docstring).
    B
        Number of resamples (default 999).
    seed
        Seed of the random streams (a non-negative whole number).
    level
        Interval level, e.g. 0.95.
    progress
        ``progress(done, B)`` after each chunk of resamples.
    cancel
        ``cancel() -> True`` stops early; the resamples done so far are used and
        ``cancelled`` is True.
    processes
        1 = this process only; None = a pool of up to 2 workers (or the CPU count if
        smaller) when the run would take more than a couple of seconds; k > 1 = a pool
        of k workers.
    """
    t0 = time.perf_counter()
    if not isinstance(res, FitResult):
        raise FitError("the bootstrap needs a finished fit (a FitResult)")
    if kind not in KINDS:
        raise FitError(f"the bootstrap kind must be 'case' or 'residual', not {kind!r}")
    try:
        B = int(B)
    except (TypeError, ValueError):
        raise FitError(f"the number of resamples B must be a whole number, not {B!r}") from None
    if B < 10:
        raise FitError("the bootstrap needs at least B = 10 resamples (999 is usual)")
    if not (isinstance(level, (int, float)) and 0 < level < 1):
        raise FitError(f"the interval level must be between 0 and 1, not {level!r}")
    if not (isinstance(seed, (int, np.integer)) and seed >= 0):
        raise FitError(f"the seed must be a non-negative whole number, not {seed!r}")
    if processes is not None and (not isinstance(processes, (int, np.integer)) or processes < 1):
        raise FitError("processes must be None or a whole number of at least 1")
    if res.dof <= 0:
        raise FitError("the fit has no degrees of freedom left; a bootstrap would only "
                       "reproduce it")

    used = used_mask(res)
    idx, J, r, sig = whitened(res)
    n = idx.size
    settings = refit_settings(res)
    job = {"kind": kind, "x": res.x[used].copy(), "y": res.y[used].copy(),
           "sigma": None if res.sigma is None else res.sigma[used].copy(),
           "p0": dict(zip(res.param_names, (float(v) for v in res.values))),
           "settings": settings, "model": res.model, "values": np.asarray(res.values, float),
           "free": np.asarray(res.free, bool), "scale": res.scale,
           "converged": bool(res.converged)}
    if kind == "residual":
        e = modified_residuals(res, J, r, used)
        if e.size == 0:
            raise FitError("no residuals to resample")
        job["resid"] = e
        job["fitted"] = res.fitted[used].copy()
        # keep the number of points: draw n residuals from the usable ones
        if e.size != n:
            job["resid"] = np.resize(job["resid"], n)

    n_chunks = math.ceil(B / CHUNK)
    counts = [min(CHUNK, B - j * CHUNK) for j in range(n_chunks)]
    seeds = np.random.SeedSequence(int(seed)).spawn(n_chunks)
    chunks: dict[int, np.ndarray] = {}
    done = 0
    cancelled = False

    def report():
        if progress is not None:
            progress(done, B)

    # first chunk here: it also times the work
    if cancel is not None and cancel():
        cancelled = True
    else:
        t1 = time.perf_counter()
        chunks[0] = _run_chunk(job, seeds[0], counts[0], cancel)
        done += chunks[0].shape[0]
        report()
        per = (time.perf_counter() - t1) / max(1, chunks[0].shape[0])
        cancelled = chunks[0].shape[0] < counts[0]

    n_proc = 1
    rest = list(range(1, n_chunks))
    if not cancelled and rest and processes != 1:
        want = processes if processes is not None else min(2, os.cpu_count() or 1)
        big = processes is not None or per * (B - done) > POOL_MIN_SECONDS
        spec = model_spec(res.model, job["x"], res.values) if (want > 1 and big) else None
        if spec is not None:
            n_proc = int(want)
            pjob = dict(job, model=spec)
            try:
                cancelled, done = _run_pool(pjob, rest, seeds, counts, chunks, n_proc,
                                            done, B, progress, cancel)
            except (OSError, RuntimeError, futures.BrokenExecutor):
                n_proc = 1  # no pool on this system: finish here, same streams
            rest = [] if cancelled else [j for j in rest if j not in chunks]
    for j in rest:
        if cancelled or (cancel is not None and cancel()):
            cancelled = True
            break
        chunks[j] = _run_chunk(job, seeds[j], counts[j], cancel)
        done += chunks[j].shape[0]
        cancelled = chunks[j].shape[0] < counts[j]
        report()

    p = len(res.param_names)
    allv = (np.vstack([chunks[j] for j in sorted(chunks)]) if chunks
            else np.zeros((0, p)))
    ok = np.all(np.isfinite(allv), axis=1)
    samples = allv[ok]
    n_failed = int(allv.shape[0] - samples.shape[0])
    free = res.free
    intervals = _percentile(samples, level, res.values, free)
    stderr = (np.std(samples, axis=0, ddof=1) if samples.shape[0] > 1
              else np.full(p, np.nan))
    stderr[~free] = 0.0
    bias, warns = shift_warnings(res.param_names, res.values, samples, stderr, free)
    text = f"{kind} bootstrap, B = {B}, percentile intervals, seed {seed}"
    if kind == "residual":
        text += (", modified residuals centred under the loss of the fit"
                 if res.loss != "l2" else ", modified residuals centred to mean zero")
    if cancelled:
        text += f" (cancelled after {allv.shape[0]} resamples)"
    if n_failed:
        text += f"; {n_failed} resample{'s' if n_failed != 1 else ''} failed and " \
                f"{'were' if n_failed != 1 else 'was'} dropped"
    return BootstrapResult(intervals=intervals, samples=samples, stderr=stderr,
                           param_names=tuple(res.param_names), B=B, n_done=int(allv.shape[0]),
                           n_failed=n_failed, kind=kind, seed=int(seed), level=float(level),
                           cancelled=cancelled, processes=n_proc, method_text=text,
                           elapsed=time.perf_counter() - t0, bias=bias, warnings=warns)


def _run_pool(job, rest, seeds, counts, chunks, n_proc, done, B, progress, cancel):
    import multiprocessing

    ctx = multiprocessing.get_context("spawn")
    cancelled = False
    ex = futures.ProcessPoolExecutor(max_workers=n_proc, mp_context=ctx,
                                     initializer=_worker_start)
    try:
        pending = {ex.submit(_run_chunk, job, seeds[j], counts[j]): j for j in rest}
        while pending:
            if cancel is not None and cancel():
                cancelled = True
                break
            finished, _ = futures.wait(list(pending), timeout=0.2,
                                       return_when=futures.FIRST_COMPLETED)
            for f in finished:
                j = pending.pop(f)
                chunks[j] = f.result()
                done += counts[j]
                if progress is not None:
                    progress(done, B)
    finally:
        ex.shutdown(wait=not cancelled, cancel_futures=True)
    return cancelled, done


__all__ = ["bootstrap", "BootstrapResult", "model_spec", "modified_residuals", "residual_centre",
           "shift_warnings", "CHUNK"]
