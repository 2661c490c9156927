"""The report's plot drawn from the data as SVG text (no Qt, no window state).

:func:`plot_svg` draws the data with the fitted curve and its pointwise confidence
band, and underneath, on the same x axis, the residuals; both panels carry axis
titles. Points used are filled circles whose diameter grows with the robust weight,
down-weighted points (weight < 0.5) are orange, points excluded by the analyst are
slate-grey crossed rings (:data:`POINT_COLOURS`, shared with the window's plot).
Everything is vector (paths, circles, text), so the HTML report, an SVG file and a
PDF printed from it stay sharp.
"""
from __future__ import annotations

import html
import math

import numpy as np

__all__ = ["POINT_COLOURS", "plot_svg", "LEGEND_TEXT"]

#: (fill, edge) per point state; None = no fill
POINT_COLOURS = {
    "used": ("#1f5caa", "#0c2d5f"),
    "down-weighted": ("#e8961e", "#8c5000"),
    "excluded": (None, "#5a5a6e"),
}
CURVE_COLOUR = "#b0302a"
BAND_COLOUR = "#b0302a"
MIN_D, MAX_D = 4.5, 10.0  # symbol diameter (px) at weight 0 and 1

LEGEND_TEXT = ("Filled circles: points used, their size growing with the robust weight; "
               "orange: down-weighted (weight below 0.5); grey crossed rings: excluded by the "
               "analyst. Line: fitted curve; shaded: {pct} pointwise confidence band. Lower "
               "panel: residuals over the fit's scale (y − fitted when the scale is zero); "
               "beyond ±6 drawn at the edge with an arrow.")
#: standardised residuals beyond this many scales are drawn at the panel's edge (as in
#: the window's residual plot) so one gross outlier does not squash the others to a line
RESID_CLIP = 6.0


def _nice_ticks(lo: float, hi: float, n: int = 6) -> list[float]:
    """Round tick values covering [lo, hi] (steps 1, 2, 2.5 or 5 times a power of ten)."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [lo]
    raw = (hi - lo) / max(n - 1, 1)
    p = 10.0 ** math.floor(math.log10(raw))
    step = next(m * p for m in (1, 2, 2.5, 5, 10) if m * p >= raw)
    start = math.ceil(lo / step - 1e-9) * step
    ticks = []
    t = start
    while t <= hi + 1e-9 * step:
        ticks.append(0.0 if abs(t) < 1e-12 * step else t)
        t += step
    return ticks


def _tick_text(t: float) -> str:
    return f"{t:.6g}"


def _range(values, pad=0.05):
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 0.0, 1.0
    lo, hi = float(v.min()), float(v.max())
    if hi <= lo:
        d = abs(lo) * 0.1 or 1.0
        return lo - d, hi + d
    d = (hi - lo) * pad
    return lo - d, hi + d


def _esc(s) -> str:
    return html.escape(str(s), quote=True)


def plot_svg(res, *, x_label: str = "x", y_label: str = "y", width: int = 900,
             height: int = 620, level: float = 0.95, log_x: bool = False,
             n_grid: int = 400, residuals: str = "standardised") -> str:
    """The data panel and the residual panel of a fit as one SVG document (text).

    ``res`` is a :class:`FitResult`; ``x_label``/``y_label`` are the axis titles
    (name and unit). With ``log_x`` (and all x > 0) the x axis is logarithmic. The
    band is the pointwise ``level`` confidence band of :meth:`FitResult.band`.
    ``residuals="standardised"`` (default): the lower panel shows residual / scale
    (``res.std_residuals``), values beyond +-:data:`RESID_CLIP` at the edge with an
    arrow; ``"raw"``, or a fit with no usable scale: y - fitted in units of y.
    """
    if residuals not in ("standardised", "raw"):
        raise ValueError(f"residuals must be 'standardised' or 'raw', not {residuals!r}")
    x = np.asarray(res.x, float)
    y = np.asarray(res.y, float)
    ok = np.isfinite(x) & np.isfinite(y)
    log_x = bool(log_x) and bool(ok.any()) and bool(np.all(x[ok] > 0))
    tx = np.log10 if log_x else (lambda v: np.asarray(v, float))
    xs = x[ok]
    if xs.size == 0:
        raise ValueError("no finite points to draw")
    lo, hi = float(xs.min()), float(xs.max())
    if hi <= lo:
        lo, hi = (lo * 0.9, lo * 1.1) if log_x else (lo - 1.0, hi + 1.0)
    grid = np.geomspace(lo, hi, n_grid) if log_x else np.linspace(lo, hi, n_grid)
    with np.errstate(all="ignore"):
        curve = np.asarray(res.predict(grid), float)
        band_lo, band_hi = (np.asarray(b, float) for b in res.band(grid, level=level))
    resid = np.asarray(res.residuals, float)
    resid_title = "residual y − fitted"
    std = np.asarray(getattr(res, "std_residuals", np.full(resid.shape, np.nan)), float)
    scale = float(getattr(res, "scale", np.nan))
    beyond = np.zeros(resid.shape, bool)
    if residuals == "standardised" and math.isfinite(scale) and scale > 0 \
            and std.shape == resid.shape and np.isfinite(std[ok]).any():
        beyond = np.isfinite(std) & (np.abs(std) > RESID_CLIP)
        resid = np.clip(std, -RESID_CLIP, RESID_CLIP)
        resid_title = "residual / scale"
    weights = np.asarray(res.weights, float)
    excl = np.asarray(res.excluded, bool)

    left, right, top, gap, bottom = 78, 18, 14, 56, 48
    plot_w = width - left - right
    avail = height - top - gap - bottom
    h1 = int(avail * 0.7)
    h2 = avail - h1
    y1_top, y2_top = top, top + h1 + gap

    tlo, thi = tx([lo, hi])
    xpad = 0.03 * (thi - tlo)
    tlo, thi = tlo - xpad, thi + xpad
    ya, yb = _range(np.concatenate([y[ok], curve, band_lo, band_hi]))
    ra, rb = _range(np.concatenate([resid[ok], [0.0]]), 0.08)
    if (beyond & ok & (resid > 0)).any():  # room for the edge arrows
        rb = max(rb, RESID_CLIP + 1.2)
    if (beyond & ok & (resid < 0)).any():
        ra = min(ra, -RESID_CLIP - 1.2)

    def px(v):
        return left + (tx(v) - tlo) / (thi - tlo) * plot_w

    def py(v, a, b, t, h):
        return t + h - (v - a) / (b - a) * h

    out = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
           f'viewBox="0 0 {width} {height}" font-family="DejaVu Sans, Helvetica, Arial, sans-serif" '
           'font-size="12">',
           f'<rect x="0" y="0" width="{width}" height="{height}" fill="#ffffff"/>']

    def panel(t, h, a, b, title):
        out.append(f'<rect x="{left}" y="{t}" width="{plot_w}" height="{h}" fill="none" '
                   'stroke="#444" stroke-width="1"/>')
        for v in _nice_ticks(a, b, 6 if h > 200 else 4):
            yy = py(v, a, b, t, h)
            out.append(f'<line x1="{left}" y1="{yy:.2f}" x2="{left + plot_w}" y2="{yy:.2f}" '
                       'stroke="#e4e4e4" stroke-width="1"/>')
            out.append(f'<text x="{left - 6}" y="{yy + 4:.2f}" text-anchor="end">{_tick_text(v)}</text>')
        if log_x:
            xt = [10.0 ** k for k in range(math.floor(tlo), math.ceil(thi) + 1)
                  if tlo <= k <= thi]
        else:
            xt = _nice_ticks(tlo, thi, 8)
        for v in xt:
            xx = px(v)
            out.append(f'<line x1="{xx:.2f}" y1="{t + h}" x2="{xx:.2f}" y2="{t + h + 5}" stroke="#444"/>')
            out.append(f'<text x="{xx:.2f}" y="{t + h + 18}" text-anchor="middle">{_tick_text(v)}</text>')
        out.append(f'<text x="{left + plot_w / 2:.1f}" y="{t + h + 36}" text-anchor="middle">'
                   f'{_esc(x_label)}</text>')
        cy = t + h / 2
        out.append(f'<text x="16" y="{cy:.1f}" text-anchor="middle" '
                   f'transform="rotate(-90 16 {cy:.1f})">{_esc(title)}</text>')

    panel(y1_top, h1, ya, yb, y_label)
    panel(y2_top, h2, ra, rb, resid_title)
    # no clip paths (SVG Tiny renderers such as Qt's draw them as shapes): every
    # range above already holds what is drawn in it

    def P(v):
        return py(v, ya, yb, y1_top, h1)

    fin = np.isfinite(band_lo) & np.isfinite(band_hi)
    if fin.sum() > 1:
        up = [f"{px(a):.2f},{P(b):.2f}" for a, b in zip(grid[fin], band_hi[fin])]
        dn = [f"{px(a):.2f},{P(b):.2f}" for a, b in zip(grid[fin][::-1], band_lo[fin][::-1])]
        out.append(f'<polygon points="{" ".join(up + dn)}" '
                   f'fill="{BAND_COLOUR}" fill-opacity="0.18" stroke="none"/>')
    fin = np.isfinite(curve)
    if fin.sum() > 1:
        pts = " ".join(f"{px(a):.2f},{P(b):.2f}" for a, b in zip(grid[fin], curve[fin]))
        out.append(f'<polyline points="{pts}" fill="none" '
                   f'stroke="{CURVE_COLOUR}" stroke-width="1.8"/>')
    zero = py(0.0, ra, rb, y2_top, h2)
    out.append(f'<line x1="{left}" y1="{zero:.2f}" x2="{left + plot_w}" y2="{zero:.2f}" '
               'stroke="#888" stroke-width="1" stroke-dasharray="4 3"/>')

    def symbols(yvals, yfun):
        # used and down-weighted first (larger first), excluded on top
        order = sorted(np.flatnonzero(ok & np.isfinite(yvals)),
                       key=lambda i: (bool(excl[i]), -(weights[i] if np.isfinite(weights[i]) else 0)))
        for i in order:
            cx, cy = px(x[i]), yfun(yvals[i])
            if excl[i]:
                r = MAX_D / 2
                q = r * 0.7
                edge = POINT_COLOURS["excluded"][1]
                out.append(f'<g stroke="{edge}" stroke-width="1.6" fill="none">'
                           f'<circle cx="{cx:.2f}" cy="{cy:.2f}" r="{r:.2f}"/>'
                           f'<path d="M{cx - q:.2f},{cy - q:.2f}L{cx + q:.2f},{cy + q:.2f}'
                           f'M{cx - q:.2f},{cy + q:.2f}L{cx + q:.2f},{cy - q:.2f}"/></g>')
                continue
            w = float(weights[i]) if np.isfinite(weights[i]) else 1.0
            w = min(max(w, 0.0), 1.0)
            fill, edge = POINT_COLOURS["used" if w >= 0.5 else "down-weighted"]
            r = (MIN_D + (MAX_D - MIN_D) * w) / 2
            out.append(f'<circle cx="{cx:.2f}" cy="{cy:.2f}" r="{r:.2f}" '
                       f'fill="{fill}" stroke="{edge}" stroke-width="1"/>')

    symbols(y, P)
    symbols(resid, lambda v: py(v, ra, rb, y2_top, h2))
    for i in np.flatnonzero(beyond & ok):  # an arrow past the edge value, pointing out
        up = resid[i] > 0
        cx = px(x[i])
        tip = py((RESID_CLIP + 1.0) * (1 if up else -1), ra, rb, y2_top, h2)
        base = tip + (7.0 if up else -7.0)
        out.append(f'<path d="M{cx:.2f},{tip:.2f}L{cx - 4.5:.2f},{base:.2f}L{cx + 4.5:.2f},{base:.2f}Z" '
                   'fill="#3c3c3c" stroke="none"/>')
    out.append("</svg>")
    return "\n".join(out) + "\n"
