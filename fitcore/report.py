"""Values ready for a lab report, and report text built from a :class:`FitResult`.

This module gathers the public names of the two modules that do the work:

* :mod:`fitcore.numbers`: :func:`format_value`, :func:`format_uncertainty`,
  :func:`interval_limits`, :func:`format_interval`, :func:`format_correlation` (GUM
  rounding of numbers);
* :mod:`fitcore.report_text`: :func:`estimates_text`, :func:`correlation_text`,
  :func:`method_lines`, :func:`points_csv`, :func:`curve_csv` and the one
  :data:`CAUTION` text.

Nothing here imports Qt; every function returns a ``str``.
"""
from __future__ import annotations

from .numbers import (
    format_correlation,
    format_interval,
    format_uncertainty,
    format_value,
    full_precision,
    held_value_text,
    interval_limits,
)
from .report_text import (
    CAUTION,
    FORMATS,
    MAX_LISTED_EXCLUSIONS,
    NO_REASON,
    DataRecord,
    data_lines,
    point_label,
    loss_title,
    convergence_text,
    correlation_text,
    curve_csv,
    estimate_cells,
    estimates_text,
    excluded_points_text,
    alpha_text,
    loss_label,
    scale_text,
    method_lines,
    method_statement,
    point_status,
    points_csv,
    resolve_unit,
)

__all__ = [
    "CAUTION",
    "FORMATS",
    "format_value",
    "format_uncertainty",
    "interval_limits",
    "format_interval",
    "format_correlation",
    "full_precision",
    "held_value_text",
    "estimates_text",
    "estimate_cells",
    "DataRecord",
    "data_lines",
    "point_label",
    "NO_REASON",
    "correlation_text",
    "method_lines",
    "method_statement",
    "loss_label",
    "alpha_text",
    "scale_text",
    "convergence_text",
    "excluded_points_text",
    "resolve_unit",
    "point_status",
    "points_csv",
    "curve_csv",
    "loss_title",
    "MAX_LISTED_EXCLUSIONS",
]
