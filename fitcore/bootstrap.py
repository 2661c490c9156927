r"""Bootstrap intervals for the parameters of a finished fit.

Two resampling schemes (Efron & Tibshirani 1993, ch. 9; Davison & Hinkley 1997,
section 6.2):

* **case** bootstrap: draw ``n`` of the used points with replacement (x, y and sigma
  together) and refit. Makes no assumption about the error model; points the
  analyst excluded stay out.
* **residual** bootstrap: keep x, draw from the fit's whitened residuals and refit
  ``y* = f(x, theta) + sigma_i e*_i``. The residuals are the modified residuals
  ``r_i / sqrt(1 - h_ii)`` (h from the Jacobian of the fit), centred to mean zero
  (Davison & Hinkley 1997, algorithm 6.3). Assumes exchangeable errors.

Every refit repeats the original method: same model, loss, tuning constant, shape,
held parameters, sigma mode and scale rule (an automatic scale is re-estimated per
resample, a fixed one is kept; the adaptive loss re-fits its shape), warm-started from
the original estimates. Intervals are percentile intervals of the refitted values.
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
from dataclasses import dataclass
from typing import Callable

import numpy as np

from .diagnostics import hat_values, refit_settings, used_mask, whitened
from .model import Model, design_model
from .result import FitResult
from .solve import FitError, fit

CHUNK = 25  # resamples per chunk (fixed: it defines the random streams)
POOL_MIN_SECONDS = 4.0  # use the pool (processes=None) when the rest would take longer
KINDS = ("case", "residual")


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


# --------------------------------------------------------------------------- worker
_MODEL_CACHE: dict = {}


def _build_model(spec):
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
            from .models import get_model
            _MODEL_CACHE[key] = get_model(spec[1])
        elif kind == "formula":
            from .formula import parse_formula
            _MODEL_CACHE[key] = parse_formula(spec[1])
        else:
            raise ValueError(f"unknown model description {kind!r}")
    return _MODEL_CACHE[key]


def _run_chunk(job: dict, seed_seq, count: int) -> np.ndarray:
    """Refit ``count`` resamples drawn with ``default_rng(seed_seq)``.

    Top-level so that a spawned worker can import it. Returns ``(count, n_params)``
    values with a NaN row for each failed resample.
    """
    model = _build_model(job["model"])
    rng = np.random.default_rng(seed_seq)
    x, y, sig = job["x"], job["y"], job["sigma"]
    n = x.size
    p = len(model.param_names)
    out = np.full((count, p), np.nan)
    for b in range(count):
        if job["kind"] == "case":
            pick = rng.integers(0, n, n)
            xb, yb = x[pick], y[pick]
            sb = None if sig is None else sig[pick]
        else:
            e = job["resid"][rng.integers(0, n, n)]
            xb, sb = x, sig
            yb = job["fitted"] + (e if sig is None else sig * e)
        try:
            r = fit(model, xb, yb, sigma=sb, p0=job["p0"], **job["settings"])
        except (FitError, ValueError, ArithmeticError, np.linalg.LinAlgError):
            continue
        if r.converged and np.all(np.isfinite(r.values)):
            out[b] = r.values
    return out


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
            built = _build_model(spec)
        except Exception:  # noqa: BLE001 - not that kind of model
            continue
        if _same_model(model, built, x, p):
            return spec
    return None


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
           "settings": settings, "model": res.model}
    if kind == "residual":
        h = hat_values(J)
        with np.errstate(all="ignore"):
            e = r / np.sqrt(np.where(h < 1 - 1e-12, 1.0 - h, np.nan))
        e = e[np.isfinite(e)]
        if e.size == 0:
            raise FitError("no residuals to resample")
        job["resid"] = e - e.mean()
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
        chunks[0] = _run_chunk(job, seeds[0], counts[0])
        done += counts[0]
        report()
        per = (time.perf_counter() - t1) / counts[0]

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
        if cancel is not None and cancel():
            cancelled = True
            break
        chunks[j] = _run_chunk(job, seeds[j], counts[j])
        done += counts[j]
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
    text = f"{kind} bootstrap, B = {B}, percentile intervals, seed {seed}"
    if cancelled:
        text += f" (cancelled after {allv.shape[0]} resamples)"
    if n_failed:
        text += f"; {n_failed} resample{'s' if n_failed != 1 else ''} failed and " \
                f"{'were' if n_failed != 1 else 'was'} dropped"
    return BootstrapResult(intervals=intervals, samples=samples, stderr=stderr,
                           param_names=tuple(res.param_names), B=B, n_done=int(allv.shape[0]),
                           n_failed=n_failed, kind=kind, seed=int(seed), level=float(level),
                           cancelled=cancelled, processes=n_proc, method_text=text,
                           elapsed=time.perf_counter() - t0)


def _run_pool(job, rest, seeds, counts, chunks, n_proc, done, B, progress, cancel):
    import multiprocessing

    ctx = multiprocessing.get_context("spawn")
    cancelled = False
    ex = futures.ProcessPoolExecutor(max_workers=n_proc, mp_context=ctx)
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


__all__ = ["bootstrap", "BootstrapResult", "model_spec", "CHUNK"]
