"""Large data: seeded subsamples for the warm start and the staged Newton passes."""
from __future__ import annotations

from .mscale import _m_estimate, _newton_with_mad
from .problem import _Problem, _sample_rows


_LARGE = 20000  # above this many used points, robust fits start from a subsample fit
_SUBSAMPLE = 4000


def _stage_sizes(n: int, first: int, factor: int = 12, margin: int = 6) -> list[int]:
    """Subsample sizes for the large-data warm start: ``first``, then ``factor`` times
    larger while a stage stays ``margin`` times smaller than the data."""
    sizes = [first]
    while sizes[-1] * factor * margin <= n:
        sizes.append(sizes[-1] * factor)
    return sizes


def _subproblem(prob: _Problem, m: int = _SUBSAMPLE) -> _Problem:
    """A deterministic random subsample of the used points (seeded, reproducible)."""
    idx = _sample_rows(prob.n, min(m, prob.n), 20190611)
    return _Problem(prob.model, prob.x[idx], prob.y[idx], prob.sig[idx], prob.free, prob.p_fixed,
                    unit=prob.unit)


def _staged_start(prob: _Problem, theta, loss, fixed_scale, *, linear: bool, max_iter: int):
    """The large-data warm start of an M-estimate, or None below ``_LARGE`` points.

    The whole procedure on a seeded subsample gives a robust start and scale, so the
    full data need only a few iterations; then Newton passes on larger subsamples in
    turn (each costs a fraction of one over all the points, and each stage starts the
    next one closer). Returns ``(theta, scale, n_iter)``.
    """
    if prob.n <= _LARGE:
        return None
    auto = fixed_scale is None
    sizes = _stage_sizes(prob.n, 2000 if linear else 1000)
    w_inner, w_s, n_iter = _m_estimate(_subproblem(prob, sizes[0]), theta, loss, fixed_scale,
                                       linear=linear, max_iter=max_iter, quick=True)
    theta = w_inner.theta
    s = w_s if auto else fixed_scale
    for m in sizes[1:]:
        # (a stage needs no more than a fraction of its own standard errors: the next
        # stage's start error is several of them)
        staged = _newton_with_mad(_subproblem(prob, m), theta, s, loss, with_mad=auto,
                                  tol=1e-2)
        if staged is None:
            break
        theta, n_iter = staged[0].theta, n_iter + staged[2]
        if auto:
            s = staged[1]
    return theta, s, n_iter
