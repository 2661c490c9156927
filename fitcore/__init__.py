"""fitcore: outlier-aware curve fitting of lab measurements (no Qt here).

Public API (kept stable; outside checks call it)::

    fitcore.fit(model, x, y, loss="l2", *, scale="auto", alpha=None,
                sigma=None, excluded=None, p0=None, ...)  -> FitResult
    fitcore.builtin_models()                               -> list of names
    fitcore.read_table(path, sheet=None)                   -> Table
    fitcore.format_value(value, u, style="paren" | "pm")   -> str
    fitcore.fit_many(datasets, model, loss=..., jobs=None, **fit_options)
                                                           -> [FitResult | FailedFit]

Submodules are imported lazily, so ``import fitcore`` stays cheap.
"""
from __future__ import annotations

import importlib

__version__ = "0.1.0"

_LAZY = {
    "fit": ("solve", "fit"),
    "FitError": ("solve", "FitError"),
    "alpha_profile": ("solve", "alpha_profile"),
    "FitResult": ("result", "FitResult"),
    "Model": ("model", "Model"),
    "Derived": ("model", "Derived"),
    "linear_model": ("model", "linear_model"),
    "design_model": ("model", "design_model"),
    "LOSS_NAMES": ("losses", "LOSS_NAMES"),
    "get_loss": ("losses", "get_loss"),
    "log_partition": ("partition", "log_partition"),
    "builtin_models": ("models", "builtin_models"),
    "get_model": ("models", "get_model"),
    "resolve_model": ("models", "resolve_model"),
    "parse_formula": ("formula", "parse_formula"),
    "validate_formula": ("formula", "validate_formula"),
    "load_session": ("session", "load_session"),
    "save_session": ("session", "save_session"),
    "Session": ("session", "Session"),
    "SessionError": ("session", "SessionError"),
    "format_correlation": ("report", "format_correlation"),
    "FormulaError": ("formula", "FormulaError"),
    "read_table": ("io", "read_table"),
    "Table": ("io", "Table"),
    "ReadError": ("io", "ReadError"),
    "format_value": ("report", "format_value"),
    "read_clipboard_text": ("io", "read_clipboard_text"),
    "model_info": ("models", "model_info"),
    "GAS_CONSTANT": ("models", "GAS_CONSTANT"),
    "compare_losses": ("compare", "compare_losses"),
    "adaptive_reading": ("compare", "adaptive_reading"),
    "point_diagnostics": ("diagnostics", "point_diagnostics"),
    "inverse_predict": ("calibration", "inverse_predict"),
    "detection_limits": ("calibration", "detection_limits"),
    "lack_of_fit": ("calibration", "lack_of_fit"),
    "CalibrationError": ("calibration", "CalibrationError"),
    "fit_many": ("batch", "fit_many"),
    "iter_fit_many": ("batch", "iter_fit_many"),
    "fit_sources": ("batch", "fit_sources"),
    "FailedFit": ("batch", "FailedFit"),
    "Dataset": ("batch", "Dataset"),
    "BatchSpec": ("batch", "BatchSpec"),
    "BatchError": ("batch", "BatchError"),
}

__all__ = sorted(_LAZY) + ["__version__"]


def __getattr__(name):
    try:
        module, attr = _LAZY[name]
    except KeyError:
        raise AttributeError(f"module 'fitcore' has no attribute {name!r}") from None
    value = getattr(importlib.import_module(f".{module}", __name__), attr)
    globals()[name] = value
    return value


def __dir__():
    return __all__
