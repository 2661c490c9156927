"""The HTML report of one fit: one function for the window, the batch and the library.

:func:`report_html` builds the whole report document (a self-contained HTML page)
from a :class:`~fitcore.result.FitResult` and what surrounds it: the data set
(:class:`fitcore.work.DataSet`: file, SHA-256, columns, units, file rows, reading
notes), the exclusion record (:class:`fitcore.work.Exclusion` entries), the analyses
done on that fit (bootstrap, point-diagnostics note, loss comparison, unknowns read
back off a calibration), the sign-off names and the time of writing. The plot is the
SVG of :func:`fitcore.report_plot.plot_svg`, drawn from the data (no window state).

The window's HTML and PDF report (``desktop.report_export``), the per-curve reports
of :func:`fitcore.batch.fit_sources` (``ballast-fit --report-dir``) and
:func:`fitcore.calibration.report_html` all call :func:`report_html`; the desktop only
gathers the inputs from its widgets and does the Qt parts (PDF printing, clipboard).

Every sentence comes from :mod:`fitcore.report_text` (method statement and block,
:data:`~fitcore.report_text.CAUTION`, sign-off), every number from
:mod:`fitcore.numbers`. Nothing here imports Qt.
"""
from __future__ import annotations

import datetime as _dt
import html
import math
import os
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from . import __version__
from .calibration import unknowns_text
from .numbers import format_interval, format_value
from .report_plot import LEGEND_TEXT, plot_svg
from .report_text import (
    CAUTION,
    DataRecord,
    correlation_text,
    estimates_text,
    method_lines,
    method_statement,
    point_status,
    signoff_html,
)
from .work import DataSet, Exclusion

__all__ = ["report_html", "estimates_copy", "report_plot", "Unknowns", "written_now",
           "REPORT_MAX_ROWS", "REPORT_PLOT_SIZE"]

#: rows of the points table printed in a report (a points CSV always has all of them)
REPORT_MAX_ROWS = 2000
#: pixel size of the report's plot
REPORT_PLOT_SIZE = (900, 620)

_STYLE = (
    "<style>",
    "body{font-family:'DejaVu Sans',Helvetica,Arial,sans-serif;font-size:10pt;"
    "color:#1a1a1a;max-width:960px;margin:1.5em auto;padding:0 1em}",
    "h1{font-size:17pt;margin-bottom:0.2em} h2{font-size:12.5pt;margin-top:1.4em;"
    "border-bottom:1px solid #999;padding-bottom:2px}",
    "table{border-collapse:collapse;margin:0.4em 0} td,th{border:1px solid #aaa;"
    "padding:2px 6px;text-align:left} th{background:#eef1f5}",
    "td.num{text-align:right;font-variant-numeric:tabular-nums}",
    ".meta td{border:none;padding:1px 8px 1px 0;vertical-align:top}",
    ".caution{background:#fff6d6;border:1px solid #d9b44a;padding:6px 9px}",
    ".small{font-size:8.5pt;color:#444} tr.excluded td{background:#ffece6}",
    "tr.down td{background:#fff8dc}",
    "</style></head><body>",
)


@dataclass(frozen=True)
class Unknowns:
    """Samples read back off a calibration, for the report's own section.

    ``items``: ``(name, InversePrediction or error text)`` pairs (as
    :func:`fitcore.calibration.unknowns_text` takes them); ``limits``: a
    :class:`~fitcore.calibration.DetectionLimits` or the text saying why there are
    none; ``lof``: a :class:`~fitcore.calibration.LackOfFit` or None.
    """

    items: tuple = ()
    limits: object = None
    lof: object = None


def written_now() -> str:
    """The time of writing as the report prints it (local time, ISO 8601, seconds)."""
    return _dt.datetime.now().astimezone().isoformat(timespec="seconds")


def _h(s) -> str:
    return html.escape(str(s), quote=True)


def _g(x, digits: int = 6) -> str:
    x = float(x)
    if not math.isfinite(x):
        return ""
    return f"{x:.{digits}g}"


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" + ("" if n == 1 else "s")


def _table_part(estimates_html: str) -> str:
    """The ``<table>`` of :func:`estimates_text`'s html output (without its method
    block and caution: the report states both in their own sections)."""
    end = estimates_html.find("</table>")
    if end < 0:
        raise ValueError("the estimates text holds no table")
    return estimates_html[: end + len("</table>")]


def _bordered(table_html: str, cls: str = "") -> str:
    attr = ' border="1" cellspacing="0" cellpadding="4"'
    if cls:
        attr += f' class="{cls}"'
    return table_html.replace("<table>", f"<table{attr}>", 1)


def _data_set(res, data) -> DataSet:
    if data is None:  # the fit's own arrays, no names or origin
        return DataSet(res.x, res.y, res.sigma)
    if not isinstance(data, DataSet):
        raise TypeError(f"the report's data must be a fitcore.work.DataSet, not {type(data).__name__}")
    if data.n != len(res.x):
        raise ValueError(f"the data set has {data.n} points but the fit has {len(res.x)}; "
                         "the report needs the data the fit was made from")
    return data


def report_plot(res, data: DataSet | None = None, *, level: float = 0.95,
                log_x: bool = False) -> str:
    """The report's plot (data over residuals) as SVG text, at :data:`REPORT_PLOT_SIZE`."""
    m = _data_set(res, data)
    return plot_svg(res, x_label=m.label("x"), y_label=m.label("y"), level=level,
                    log_x=bool(log_x), width=REPORT_PLOT_SIZE[0], height=REPORT_PLOT_SIZE[1])


def _unknowns_text(unknowns: Unknowns | None, fmt: str, level: float, x_unit: str,
                   full_precision: bool = False) -> str:
    """The unknowns' section text ("" when there are no samples and no lack-of-fit test)."""
    if unknowns is None or not (unknowns.items or unknowns.lof is not None):
        return ""
    return unknowns_text(list(unknowns.items), fmt, level=level, limits=unknowns.limits,
                         lof=unknowns.lof, x_unit=x_unit, full_precision=full_precision)


def estimates_copy(res, fmt: str = "plain", data: DataSet | None = None, *,
                   exclusions: Sequence[Exclusion] | None = None, sha256: str = "",
                   level: float = 0.95, full_precision: bool = False,
                   unknowns: Unknowns | None = None) -> str:
    """The estimates as copied from the window, in one of
    :data:`fitcore.report_text.FORMATS`: :func:`estimates_text` (estimates, method
    block with the data record and the exclusion reasons, caution), a bordered table
    in ``"html"``, then the unknowns read back off the calibration when there are any.
    Arguments as for :func:`report_html`.
    """
    m = _data_set(res, data)
    if exclusions is None:
        exclusions = [Exclusion(int(i)) for i in np.flatnonzero(np.asarray(res.excluded, bool))]
    text = estimates_text(res, fmt, level=level, full_precision=full_precision, x_unit=m.x_unit,
                          y_unit=m.y_unit, reasons={e.index: e.reason for e in exclusions},
                          data=DataRecord.from_data(m, sha256=sha256))
    if fmt == "html":
        text = _bordered(text)
    extra = _unknowns_text(unknowns, fmt, level, m.x_unit, full_precision)
    return text + ("\n" + extra if extra else "")


def report_html(
    res,
    data: DataSet | None = None,
    *,
    exclusions: Sequence[Exclusion] | None = None,
    sha256: str = "",
    level: float = 0.95,
    log_x: bool = False,
    title: str = "",
    session_path: str = "",
    signoff: dict | None = None,
    bootstrap=None,
    diagnostics_note: str = "",
    comparison: Sequence[Sequence[str]] | None = None,
    unknowns: Unknowns | None = None,
    stale: bool = False,
    fit_failure: str = "",
    written: str | None = None,
    max_rows: int = REPORT_MAX_ROWS,
    plot_placeholder: str | None = None,
) -> str:
    """The report of ``res`` as one self-contained HTML document (text).

    Parameters
    ----------
    res
        The :class:`~fitcore.result.FitResult` reported.
    data
        The :class:`~fitcore.work.DataSet` the fit was made from (names, units,
        source, file rows, reading notes); None: the fit's own x, y, sigma, unnamed.
    exclusions
        The exclusion record (:class:`~fitcore.work.Exclusion`: point, reason, time);
        None: every point ``res`` excludes, without reason or time.
    sha256
        SHA-256 of the data file (overrides ``data.source_sha256``).
    level
        Confidence level of every interval and of the plot's band.
    log_x
        Draw the plot's x axis logarithmic.
    title
        What the heading names (default: the data file's name).
    session_path
        The session the work is saved in ("" when none).
    signoff
        ``analyst``, ``reviewer``, ``review_date`` (blank lines when not given).
    bootstrap
        A :class:`fitcore.bootstrap.BootstrapResult` of ``res`` (its own level and
        seed are printed), or None.
    diagnostics_note
        The point-diagnostics note (plain text, one paragraph a line), or "".
    comparison
        The loss comparison as rows of text cells, the first row the column heads and
        the first cell of each further row its name; None or one row: no section.
    unknowns
        Samples read back off the calibration (:class:`Unknowns`), or None.
    stale, fit_failure
        The estimates no longer belong to the inputs (the report then says so in
        capitals), and the last fit's failure message if that is why.
    written
        The time of writing as printed (default :func:`written_now`; give it to make
        two reports of one fit comparable byte for byte).
    max_rows
        Rows of the points table printed (the rest are counted).
    plot_placeholder
        Put this text where the plot goes instead of the SVG (a printer that paints
        :func:`report_plot` itself, e.g. the window's PDF).
    """
    m = _data_set(res, data)
    record = DataRecord.from_data(m, sha256=sha256)
    if exclusions is None:
        exclusions = [Exclusion(int(i)) for i in np.flatnonzero(np.asarray(res.excluded, bool))]
    exclusions = list(exclusions)
    reasons = {e.index: e.reason for e in exclusions}
    y_unit = m.y_unit
    pct = f"{100 * level:.6g} %"
    now = written_now() if written is None else str(written)
    src = m.source or "(not from a file)"
    title = title or os.path.basename(src)
    version = _h(__version__)
    plot_html = report_plot(res, m, level=level, log_x=log_x) if plot_placeholder is None \
        else plot_placeholder

    out = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        f"<title>Ballast report: {_h(title)}</title>",
        *_STYLE,
        f"<h1>Fit report: {_h(title)}</h1>",
        '<table class="meta" cellpadding="1">',
        f"<tr><td><b>Data</b></td><td>{_h(src)} ({_plural(m.n, 'point')}; "
        f"x = {_h(m.label('x'))}, "
        f"y = {_h(m.label('y'))}"
        + (f", standard uncertainty of y = {_h(m.sigma_name)}" if m.sigma is not None else "")
        + ")</td></tr>",
    ]
    if record.sha256:
        out.append(f"<tr><td><b>SHA-256</b></td><td><tt>{_h(record.sha256)}</tt></td></tr>")
    if session_path:
        out.append(f"<tr><td><b>Session</b></td><td>{_h(session_path)}</td></tr>")
    out += [f"<tr><td><b>Written</b></td><td>{_h(now)} by Ballast {version}</td></tr>", "</table>"]
    if stale:
        out.append('<p class="caution"><b>NOT CURRENT (STALE).</b> These estimates do not '
                   "belong to the data, exclusions and method now in the window"
                   + (f" (the last fit failed: {_h(fit_failure)})" if fit_failure else "")
                   + ".</p>")
    out.append(f'<p class="caution"><b>Caution.</b> {_h(CAUTION)}</p>')

    out += ["<h2>Plot</h2>", f"<p>{plot_html}</p>",
            f'<p class="small">{_h(LEGEND_TEXT.format(pct=pct))}</p>']

    est = estimates_text(res, "html", level=level, x_unit=m.x_unit, y_unit=y_unit,
                         reasons=reasons, data=record)
    out += ["<h2>Estimates</h2>",
            f"<p class=\"small\">Value with its standard uncertainty in parentheses, in units "
            f"of the last digit (GUM 7.2.2); {pct} confidence intervals.</p>",
            _bordered(_table_part(est))]

    text = _unknowns_text(unknowns, "html", level, m.x_unit)
    if text:  # their own section, the read-back method named in it
        out += [f"<h2>{'Unknown samples' if unknowns.items else 'Calibration checks'}</h2>",
                "\n" + text]

    out += ["<h2>Method</h2>",
            f"<p>{_h(method_statement(res, level, y_unit=y_unit, data=record))}</p>",
            '<table border="1" cellspacing="0" cellpadding="3">']
    out += [f"<tr><th>{_h(k)}</th><td>{_h(v)}</td></tr>" for k, v in method_lines(
        res, level, y_unit=y_unit, reasons=reasons, data=record)]
    out.append("</table>")

    free = [n for n in res.param_names if n not in res.fixed]
    out.append("<h2>Correlation of the estimates</h2>")
    if len(free) > 1:
        out.append(_bordered(correlation_text(res, "html").replace("<td>", '<td class="num">')))
    else:
        out.append("<p>Only one free parameter: no correlations.</p>")

    out += _bootstrap_section(res, bootstrap)
    out += _diagnostics_section(diagnostics_note)
    out += _comparison_section(comparison)
    out += _exclusion_section(m, exclusions)
    out += _points_section(res, m, reasons, max_rows)
    out += ["<h2>Sign-off</h2>", signoff_html(**(signoff or {})),
            f'<p class="small">Written by Ballast {version} on {_h(now)}.</p>',
            "</body></html>"]
    return "\n".join(out) + "\n"


def _bootstrap_section(res, b) -> list[str]:
    if b is None:
        return []
    level = float(b.level)
    iv = np.asarray(b.intervals, float)
    ci = res.intervals(level)
    pct = f"{100 * level:.6g} %"
    text = b.method_text or f"{b.kind} bootstrap, B = {b.B}"
    seed = "" if "seed" in text else f" (seed {b.seed})"
    nf = int(b.n_failed or 0)
    if "failed" in text:  # fitcore's method text counts them already: say it once
        nf = 0
    out = ["<h2>Bootstrap intervals</h2>",
           f"<p>{_h(text)}{_h(seed)}."
           + (f" {_plural(nf, 'resample')} failed to fit and "
              f"{'was' if nf == 1 else 'were'} left out." if nf else "")
           + f" Analytic intervals: {_h(str(res.covariance_recipe))}, Student t.</p>",
           '<table border="1" cellspacing="0" cellpadding="3">',
           f"<tr><th>parameter</th><th>estimate</th><th>analytic {pct} interval</th>"
           f"<th>bootstrap {pct} percentile interval</th></tr>"]
    for k, name in enumerate(res.param_names):
        held = name in res.fixed
        v, u = float(res.values[k]), float(res.stderr[k])
        # both intervals by the one rule: the last decimal of the estimate
        boot = ("-" if held or not np.all(np.isfinite(iv[k]))
                else format_interval(iv[k, 0], iv[k, 1], v, u, rich="html"))
        ana = ("-" if held or not np.all(np.isfinite(ci[k]))
               else format_interval(ci[k, 0], ci[k, 1], v, u, rich="html"))
        out.append(f"<tr><td>{_h(name)}{' (held)' if held else ''}</td>"
                   f'<td class="num">{format_value(v, u, style="paren", held=held, rich="html")}</td>'
                   f'<td class="num">{ana}</td>'
                   f'<td class="num">{boot}</td></tr>')
    out.append("</table>")
    out += [f"<p><b>Warning</b>: {_h(w)}.</p>" for w in (b.warnings or [])]
    return out


def _diagnostics_section(note: str) -> list[str]:
    lines = [line for line in str(note or "").splitlines() if line.strip()]
    if not lines:
        return []
    return ["<h2>Point diagnostics</h2>"] + [f"<p>{_h(line)}</p>" for line in lines]


def _comparison_section(rows) -> list[str]:
    rows = [list(r) for r in (rows or [])]
    if len(rows) < 2:
        return []
    out = ["<h2>Loss comparison</h2>",
           '<p class="small">The same data and exclusions fitted with each loss; '
           "values with standard uncertainty.</p>",
           '<table border="1" cellspacing="0" cellpadding="3">',
           "<tr>" + "".join(f"<th>{_h(c)}</th>" for c in rows[0]) + "</tr>"]
    for r in rows[1:]:
        out.append("<tr>" + (f"<th>{_h(r[0])}</th>" if r else "")
                   + "".join(f'<td class="num">{_h(c)}</td>' for c in r[1:]) + "</tr>")
    out.append("</table>")
    return out


def _exclusion_section(m: DataSet, exclusions: list) -> list[str]:
    out = ["<h2>Exclusion record</h2>"]
    if not exclusions:
        return out + ["<p>No point was excluded.</p>"]
    # one identifier, as in the points table and every copy: the file row when the file
    # rows are known, else the place in the data (1-based)
    rows_known = m.source_rows is not None
    out += ['<table border="1" cellspacing="0" cellpadding="3">',
            f"<tr><th>{'row' if rows_known else 'point'}</th><th>{_h(m.label('x'))}</th>"
            f"<th>{_h(m.label('y'))}</th><th>reason</th><th>when</th></tr>"]
    for e in exclusions:
        i = e.index
        fr = m.file_row(i) if rows_known else None
        out.append(f'<tr><td class="num">{i + 1 if fr is None else fr}</td>'
                   f'<td class="num">{_g(m.x[i], 10)}</td>'
                   f'<td class="num">{_g(m.y[i], 10)}</td>'
                   f"<td>{_h(e.reason) if e.reason else '<i>no reason given</i>'}</td>"
                   f"<td>{_h(e.time)}</td></tr>")
    out.append("</table>")
    return out


def _points_section(res, m: DataSet, reasons: dict, max_rows: int) -> list[str]:
    out = ["<h2>Points</h2>"]
    status = point_status(res)
    n = m.n
    shown = min(n, int(max_rows))
    if shown < n:
        out.append(f"<p class=\"small\">The first {shown} of {n} points; the points CSV "
                   "export holds all of them.</p>")
    sig_head = "<th>u(y)</th>" if m.sigma is not None else ""
    out += ['<table border="1" cellspacing="0" cellpadding="2" class="points">',
            f"<tr><th>{'row' if m.source_rows is not None else '#'}</th>"
            f"<th>{_h(m.label('x'))}</th><th>{_h(m.label('y'))}</th>{sig_head}"
            "<th>fitted</th><th>residual</th><th>std. residual</th><th>weight</th>"
            "<th>status</th><th>reason</th></tr>"]
    for i in range(shown):
        cls = {"excluded": ' class="excluded" bgcolor="#ffece6"',
               "down-weighted": ' class="down" bgcolor="#fff8dc"'}.get(status[i], "")
        sig = f'<td class="num">{_g(m.sigma[i])}</td>' if m.sigma is not None else ""
        fr = m.file_row(i)
        out.append(
            f'<tr{cls}><td class="num">{fr if fr is not None else i + 1}</td>'
            f'<td class="num">{_g(m.x[i])}</td>'
            f'<td class="num">{_g(m.y[i])}</td>{sig}<td class="num">{_g(res.fitted[i])}</td>'
            f'<td class="num">{_g(res.residuals[i], 4)}</td>'
            f'<td class="num">{_g(res.std_residuals[i], 3)}</td>'
            f'<td class="num">{float(res.weights[i]):.3f}</td><td>{status[i]}</td>'
            f"<td>{_h(reasons.get(i, '')) if status[i] == 'excluded' else ''}</td></tr>")
    out.append("</table>")
    return out
