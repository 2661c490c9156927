"""What the window runs in the background, and how it travels to a child process.

The one background-job mechanism of the window is :mod:`desktop.jobs` (Qt side:
channels, jobs, signals). This module is its pure half (no Qt): the table of job
**kinds** and the child process that runs them.

A kind (:class:`Kind`) is one row of :data:`KINDS`: the function that does the work,
``run(payload, progress, cancel)``, where it runs (a worker thread, or a child
process), and how its payload goes to a child and its answer comes back. Adding a
kind is one entry here.

Why a child process: a worker *thread* running many short fits (the adaptive
profile, the exact refits of the point diagnostics, a bootstrap) releases and
re-takes the GIL inside every numpy call; the GUI thread then loses the race for the
GIL again and again and stalls for the whole run (measured: 0.6 s without a single
event during a 0.9 s profile). A reader or formula check that meets a hostile input
can hold the GIL inside one C call. A child process has its own interpreter, and
Cancel (or a time limit) simply ends it.

Protocol (no pickle): the parent writes one JSON request line to the child's stdin;
the child answers with JSON lines ``{"progress": [done, total]}`` and finally
``{"result": ...}`` or ``{"error": "..."}``, then waits for the next request (a child
that finished cleanly is kept for the next job; one that was cancelled is ended).
Arrays travel as their raw bytes in base64 (exact); result objects travel as their
fields and are rebuilt only from the whitelist in :func:`decode`. A FitResult's model
(Python functions) never travels: each side builds it from a plain description (a
built-in name, a formula text, or a design matrix).

The child is ``python -m desktop.job_kinds``; it imports fitcore before reading its
first request, and the parent keeps one idle child warm, so a job starts at once.
"""
from __future__ import annotations

import logging
import base64
import dataclasses
import inspect
import json
import queue
import sys
import threading
import time
import traceback
from typing import Callable

import numpy as np

import fitcore
from fitcore.bootstrap import BootstrapResult, bootstrap, model_spec
from fitcore.bootstrap import build_model as _rebuild_model
from fitcore.compare import AdaptiveReading, LossComparison, adaptive_reading, compare_losses
from fitcore.diagnostics import PointDiagnostics, point_diagnostics
from fitcore.io import Dialect, Table, read_clipboard_text, read_table
from fitcore.model_choice import ModelChoice, ModelScore, choose_model
from fitcore.models import resolve_model
from fitcore.result import FitResult
from fitcore.session import load_session

from . import child_process

log = logging.getLogger(__name__)

#: above this many points an analysis runs in a thread instead: such fits are long numpy
#: calls that leave the GIL free for long stretches (measured: 12 ms longest event gap
#: for a comparison at n = 1000 and 20000 in a thread), while the transfer of large
#: results would itself hold the GIL
CHILD_MAX_POINTS = 2000
#: how often the parent looks at the cancel flag and the time limit of a child job (s)
POLL_S = 0.02
#: idle children kept warm for the next job
MAX_IDLE = 2
#: the confidence level of the window's intervals and band, and of its detection limits
#: (desktop.estimates_view.LEVEL, desktop.unknowns_view.LEVEL, FitResult.band's default)
WINDOW_LEVEL = 0.95


class Cancelled(Exception):
    """Raised inside a job (by its ``cancel`` check) to stop it early."""


class ChildError(RuntimeError):
    """The child process failed to start or died without an answer."""


class TimeLimit(ValueError):
    """A job ran longer than its time limit and was ended."""


# ---------------------------------------------------------------------------- helpers
class _Flag:
    """A cancel flag both callable (``flag()``) and event-like (``flag.is_set()``)."""

    def __init__(self, fn):
        self._fn = fn

    def __call__(self) -> bool:
        return bool(self._fn())

    def is_set(self) -> bool:
        return bool(self._fn())


def flag(cancel):
    """``cancel`` wrapped for fitcore (callable and ``is_set()``), or None."""
    return None if cancel is None else _Flag(cancel)


def _accepts(fn, name: str) -> bool:
    try:
        sig = inspect.signature(fn)
    except (TypeError, ValueError):
        return False
    return name in sig.parameters or any(p.kind == p.VAR_KEYWORD for p in sig.parameters.values())


def raise_child_error(msg: dict):
    """Raise the child's refusal as the ValueError the job reports; an internal error's
    traceback (sent along, since the child's stderr goes nowhere) goes to the log."""
    if msg.get("traceback"):
        log.warning("a job failed in the child process:\n%s", msg["traceback"])
    raise ValueError(msg["error"])


def internal_error(err: BaseException) -> str:
    """The last line of a traceback, for a message about an unexpected error."""
    return traceback.format_exception_only(type(err), err)[-1].strip()


# ---------------------------------------------------------------------------- the work
def run_fit(request: dict):
    """Fit one request (a dict from :meth:`Document.fit_request`).

    Returns ``(result, None)`` or ``(None, message)`` for input the engine refuses.
    """
    kw = dict(request["kwargs"])
    try:
        res = fitcore.fit(request["model"], request["x"], request["y"],
                          sigma=request["sigma"], excluded=request["excluded"], **kw)
        # the t quantiles the window shows this result with (intervals and band; the
        # unknowns' detection limits), here where scipy is loaded: they travel with the
        # result (FitResult.t_quantiles), so the window's process shows a fit made in a
        # child without importing scipy.special (issue 12)
        if res.dof > 0:
            res.t_quantile(WINDOW_LEVEL)
            res.t_ppf(WINDOW_LEVEL)
        return res, None
    except ValueError as err:  # FitError and formula/model errors are ValueErrors
        return None, str(err)
    except Exception as err:  # an engine bug must not take the window down: told in the status bar, logged
        log.warning("the fit stopped with an internal error", exc_info=True)
        return None, f"the fit stopped with an internal error ({internal_error(err)})"


def run_comparison_core(model, x, y, kwargs: dict, losses, progress=None, cancel=None,
                        with_adaptive: bool = True, rows=None):
    """``(cmp, reading or None, reading error or None, leverage note)``: the comparison job.

    The leverage note (``fitcore.diagnostics`` on the least-squares fit, or the first
    fit that worked; "" when no point has high leverage) warns that all the losses can
    agree because a point far out in x pulls every one of them; ``rows`` (the points'
    file rows) name the points in it.
    """

    kw = dict(kwargs)
    flag = _Flag(cancel) if cancel is not None else None
    cmp = compare_losses(model, x, y, losses=losses, progress=progress, cancel=flag, **kw)
    reading, err = None, None
    if with_adaptive and not getattr(cmp, "cancelled", False) and not (flag and flag()):
        akw = {k: v for k, v in kw.items() if k != "alpha"}
        extra = {}
        if flag is not None and _accepts(adaptive_reading, "cancel"):
            extra["cancel"] = flag
        n_loss = len(losses)
        if progress is not None and _accepts(adaptive_reading, "progress"):
            extra["progress"] = lambda i, t: progress(n_loss + i, n_loss + t)
        done = {k: cmp.results.get(k) for k in ("l2", "adaptive") if cmp.results.get(k) is not None}
        if done:
            extra["fits"] = done
        try:
            reading = adaptive_reading(model, x, y, **akw, **extra)
        except ValueError as e:  # FitError and friends: the comparison still stands
            err = str(e)
    note = ""
    base = cmp.results.get("l2") or next((r for r in cmp.results.values() if r is not None), None)
    if base is not None and not getattr(cmp, "cancelled", False):

        try:
            note = point_diagnostics(base, exact_limit=0).leverage_note(rows)
        except ValueError:
            note = ""
    return cmp, reading, err, note


# ---------------------------------------------------------------------------- encoding
def encode(o):
    """A JSON-able form of ``o`` (arrays, numpy scalars, dataclasses, tables, tuples, dicts)."""
    if isinstance(o, np.ndarray):
        if o.dtype.kind not in "biuf":
            raise TypeError(f"cannot send an array of dtype {o.dtype}")
        return {"__nd__": o.dtype.str, "shape": list(o.shape),
                "b64": base64.b64encode(np.ascontiguousarray(o).tobytes()).decode("ascii")}
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, Table):
        return {"__table__": {
            "columns": o.columns, "units": encode(o.units), "headers": encode(o.headers),
            # one block (a row per column): a wide table travels as one string, which the
            # parent parses in milliseconds (12,000 separate arrays held the GIL for 0.4 s)
            "data": encode(np.vstack([o.column(c) for c in o.columns]) if o.columns
                           else np.zeros((0, o.n_rows))), "notes": o.notes,
            "source": o.source, "sha256": o.sha256, "source_rows": encode(o.source_rows),
            "dialect": encode(o.dialect), "title_lines": o.title_lines,
            "sheet_names": o.sheet_names, "texts": encode(o.texts_by_column())}}
    if dataclasses.is_dataclass(o) and not isinstance(o, type):
        return {"__dc__": type(o).__name__,
                "fields": {f.name: encode(getattr(o, f.name)) for f in dataclasses.fields(o)
                           if f.name != "model" or isinstance(getattr(o, f.name), str)}}
    if isinstance(o, tuple):
        return {"__tuple__": [encode(v) for v in o]}
    if isinstance(o, list):
        return [encode(v) for v in o]
    if isinstance(o, dict):
        return {"__map__": [[encode(k), encode(v)] for k, v in o.items()]}
    if o is None or isinstance(o, (bool, int, float, str)):
        return o
    raise TypeError(f"cannot send a {type(o).__name__}")


_CLASSES = {c.__name__: c for c in (FitResult, LossComparison, AdaptiveReading,
                                    PointDiagnostics, BootstrapResult, Dialect, ModelChoice, ModelScore)}


def decode(o, model=None):
    """Inverse of :func:`encode`; FitResults get ``model`` (only whitelisted classes)."""
    if isinstance(o, list):
        return [decode(v, model) for v in o]
    if not isinstance(o, dict):
        return o
    if "__nd__" in o:
        dtype = np.dtype(o["__nd__"])
        if dtype.kind not in "biuf":
            raise ChildError("unexpected data from the analysis process")
        if "b64" in o:
            flat = np.frombuffer(base64.b64decode(o["b64"]), dtype=dtype).copy()
        else:
            flat = np.array(o["data"], dtype=dtype)
        return flat.reshape(o["shape"])
    if "__tuple__" in o:
        return tuple(decode(v, model) for v in o["__tuple__"])
    if "__map__" in o:
        return {_hashable(decode(k, model)): decode(v, model) for k, v in o["__map__"]}
    if "__table__" in o:
        t = o["__table__"]
        block = decode(t["data"])
        return Table(t["columns"], decode(t["units"]), decode(t["headers"]),
                     {c: block[i] for i, c in enumerate(t["columns"])},
                     t["notes"], t["source"], t["sha256"], decode(t["source_rows"]),
                     decode(t["dialect"]), t["title_lines"], t["sheet_names"], decode(t["texts"]))
    if "__dc__" in o:
        cls = _CLASSES.get(o["__dc__"])
        if cls is None:
            raise ChildError(f"unexpected object {o['__dc__']!r} from the analysis process")
        kw = {k: decode(v, model) for k, v in o["fields"].items()}
        if "model" not in kw and "model" in {f.name for f in dataclasses.fields(cls)}:
            kw["model"] = model  # a FitResult's model (functions) never travels
        return cls(**kw)
    raise ChildError("unexpected data from the analysis process")


def _hashable(k):
    return tuple(k) if isinstance(k, list) else k


def model_description(model, x, values):
    """A plain description that rebuilds ``model`` exactly in another process, or None."""

    spec = model_spec(model, np.asarray(x, float), np.asarray(values, float))
    return None if spec is None else encode(list(spec))


def build_model(desc):
    """The model of a job: a built-in name or formula, or a description from
    :func:`model_description` (rebuilt by :func:`fitcore.bootstrap.build_model`)."""
    if isinstance(desc, str):
        return resolve_model(desc)
    return _rebuild_model(tuple(decode(desc)))


# ---------------------------------------------------------------------------- kinds
@dataclasses.dataclass(frozen=True)
class Kind:
    """One kind of background job.

    Attributes
    ----------
    run
        ``run(payload, progress, cancel) -> result``, in this process (a thread).
    where
        ``where(payload) -> "thread" | "process"``: where a job of this kind runs.
    to_wire, from_wire
        The payload as a JSON-able request for a child, or None when it cannot
        travel (the job then runs in a thread); and back, on the child's side.
    model_of
        The model given to the FitResults of the answer (they travel without it).
    title
        What the job does, for messages ("reading the file").
    time_limit
        Seconds after which a child job is ended with :class:`TimeLimit` (None: none).
    """

    run: Callable
    where: Callable = lambda payload: "thread"
    to_wire: Callable | None = None
    from_wire: Callable | None = None
    model_of: Callable = lambda payload: None
    title: str = "the job"
    time_limit: float | None = None


def _small(n) -> bool:
    return int(n) <= CHILD_MAX_POINTS


# -- fit: the window's own fit (the fit runner decides inline or thread; the trial fits
#    of new data run in a child, see MainWindow.method_for)
def _fit_run(p, progress, cancel):
    return run_fit(p)


def _fit_wire(p):
    if not isinstance(p["model"], str):  # a model with options travels as a built object: stays here
        return None
    return {k: (v if k == "model" else encode(v)) for k, v in p.items()}


def _fit_unwire(w):
    return {k: (v if k == "model" else decode(v)) for k, v in w.items()}


# -- compare
def _compare_run(p, progress, cancel):
    return run_comparison_core(p["model"], p["x"], p["y"], p["kwargs"], tuple(p["losses"]),
                               progress, cancel, p.get("with_adaptive", True), p.get("rows"))


def _compare_wire(p):
    if not isinstance(p["model"], str):  # a model with options travels as a built object: stays here
        return None
    return {"model": p["model"], "x": encode(p["x"]), "y": encode(p["y"]), "kwargs": encode(p["kwargs"]),
            "losses": list(p["losses"]), "with_adaptive": bool(p.get("with_adaptive", True)),
            "rows": encode(p.get("rows"))}


def _compare_unwire(w):
    return {"model": build_model(w["model"]), "x": decode(w["x"]), "y": decode(w["y"]),
            "kwargs": decode(w["kwargs"]), "losses": tuple(w["losses"]), "with_adaptive": w["with_adaptive"],
            "rows": decode(w.get("rows"))}


# -- diagnostics and bootstrap of a FitResult
def _result_wire(p):
    res = p["result"]
    desc = model_description(res.model, res.x, res.values)
    if desc is None:
        return None
    return {**{k: v for k, v in p.items() if k != "result"}, "model": desc, "result": encode(res)}


def _result_unwire(w):
    model = build_model(w["model"])
    return {**{k: v for k, v in w.items() if k not in ("model", "result")},
            "result": decode(w["result"], model)}


def _diagnostics_run(p, progress, cancel):
    return point_diagnostics(p["result"], exact_limit=int(p["exact_limit"]), progress=progress,
                             cancel=flag(cancel))


def _bootstrap_run(p, progress, cancel):
    return bootstrap(p["result"], kind=p["kind"], B=int(p["B"]), seed=int(p["seed"]),
                     level=float(p["level"]), progress=progress, cancel=flag(cancel))


# -- model check of new data (many short fits: in a thread they starved the window of the
#    GIL for seconds, measured 6 s on a 12,000-column spectrum export)
def _model_check_run(p, progress, cancel):
    return choose_model(p["x"], p["y"], p["sigma"], p["current"], progress=progress, cancel=cancel)


def _arrays_wire(p):
    return {k: encode(v) for k, v in p.items()}


def _arrays_unwire(w):
    return {k: decode(v) for k, v in w.items()}


# -- reading a file
def _read_run(p, progress, cancel):
    return read_table(p["path"], p.get("sheet"))


def _paste_run(p, progress, cancel):
    return read_clipboard_text(p["text"])


def _plain(p):
    return dict(p)


# -- checking a session before the window opens it
def _session_run(p, progress, cancel):
    """Read the session and check its formula: ``{"points": n, "formula": (ok, message) or
    None}``. The window opens the session itself only after this check has ended (a
    damaged file, or a formula whose check runs past the time limit, never reaches it)."""
    session = load_session(p["path"])
    method = session.method
    formula = None
    if method is not None and method.model_kind == "formula":
        from fitcore.formula import validate_formula  # lazy: loads sympy (0.4 s), for formulas only

        ok, msg, _names = validate_formula(str(method.model))
        formula = (ok, msg)
    return {"points": int(session.n_points), "formula": formula}


# -- checking a formula
def _formula_run(p, progress, cancel):
    from fitcore.formula import validate_formula  # lazy: loads sympy (0.4 s), for formulas only

    return validate_formula(p["text"], x_name=p.get("x_name", "x"))


# -- fitting many files (File > Fit many files)
BATCH_ROWS_EVERY_S = 0.1  # rows are handed to the window at most this often


def _batch_run(p, progress, cancel):
    """Every curve of ``p["paths"]`` by ``p["spec"]`` (fitcore.batch.fit_sources, with
    its own pool of ``p["jobs"]`` processes). The rows go to the window as they come,
    through ``progress(done, 0, rows)``; a cancel ends the pool after the curves in
    progress. Returns ``{"n": rows made, "rows": rows not handed over}`` (all of them
    when there is no progress callback)."""
    # here: only the batch window runs it; fitcore.batch stays out of the window's start
    from fitcore.batch import fit_sources

    rows = fit_sources(p["paths"], p["spec"], jobs=p["jobs"])
    kept, buf, n, last = [], [], 0, time.monotonic()
    try:
        for row in rows:
            n += 1
            (buf if progress is not None else kept).append(row)
            if buf and time.monotonic() - last > BATCH_ROWS_EVERY_S:
                progress(n, 0, buf)
                buf, last = [], time.monotonic()
            if cancel is not None and cancel():
                break
    finally:
        rows.close()  # a cancel ends the worker processes too
        if buf:
            progress(n, 0, buf)
    return {"n": n, "rows": kept}


#: every kind of background job the window runs
KINDS: dict[str, Kind] = {
    "fit": Kind(run=_fit_run, title="the fit", to_wire=_fit_wire, from_wire=_fit_unwire,
                model_of=lambda p: resolve_model(p["model"]) if isinstance(p["model"], str) else p["model"]),
    "compare": Kind(
        run=_compare_run, title="the loss comparison",
        where=lambda p: "process" if _small(np.size(p["x"])) and isinstance(p["model"], str) else "thread",
        to_wire=_compare_wire, from_wire=_compare_unwire,
        model_of=lambda p: resolve_model(p["model"]) if isinstance(p["model"], str) else p["model"]),
    "diagnostics": Kind(
        run=_diagnostics_run, title="the point diagnostics",
        where=lambda p: "process" if int(p["result"].n_used) <= int(p["exact_limit"]) else "thread",
        to_wire=_result_wire, from_wire=_result_unwire, model_of=lambda p: p["result"].model),
    "bootstrap": Kind(
        run=_bootstrap_run, title="the bootstrap",
        where=lambda p: "process" if _small(p["result"].n_used) else "thread",
        to_wire=_result_wire, from_wire=_result_unwire, model_of=lambda p: p["result"].model),
    "model_check": Kind(run=_model_check_run, title="the model check", where=lambda p: "process",
                        to_wire=_arrays_wire, from_wire=_arrays_unwire),
    "read": Kind(run=_read_run, title="reading the file", where=lambda p: "process",
                 to_wire=_plain, from_wire=_plain),
    "paste": Kind(run=_paste_run, title="reading the pasted table", where=lambda p: "process",
                  to_wire=_plain, from_wire=_plain),
    "session": Kind(run=_session_run, title="checking the session", where=lambda p: "process",
                    to_wire=_plain, from_wire=_plain, time_limit=20.0),
    "formula": Kind(run=_formula_run, title="checking the formula", where=lambda p: "process",
                    to_wire=_plain, from_wire=_plain, time_limit=5.0),
    "batch": Kind(run=_batch_run, title="fitting many files"),  # a thread: it has its own pool
}


def run_here(kind: str, payload: dict, progress=None, cancel=None, where: str | None = None,
             time_limit: float | None = None):
    """Run one job in the calling thread, or in a child process that this thread waits
    for (``where``: "thread" or "process"; default the kind's choice). Blocking: the
    window calls it from a worker thread (:mod:`desktop.jobs`), tests and scripts
    directly. A child that cannot be started falls back to this thread."""
    k = KINDS[kind]
    if where is None:
        where = k.where(payload)
    if where == "process" and k.to_wire is not None:
        wire = k.to_wire(payload)
        if wire is not None:
            limit = k.time_limit if time_limit is None else time_limit
            try:
                return run_in_child({"kind": kind, "payload": wire}, progress, cancel,
                                    model=k.model_of(payload), time_limit=limit, title=k.title)
            except ChildError:
                pass  # no child process here: run in this thread instead
    return k.run(payload, progress, cancel)


# ---------------------------------------------------------------------------- child side
def serve(stdin=None, stdout=None) -> int:
    """Child main: requests from stdin, one at a time, answers on stdout."""
    stdin = stdin or sys.stdin
    stdout = stdout or sys.stdout

    def send(obj):
        stdout.write(json.dumps(obj) + "\n")
        stdout.flush()

    def progress(done, total=0):
        send({"progress": [int(done), int(total)]})

    for line in stdin:
        try:
            request = json.loads(line)
            k = KINDS[request["kind"]]
            out = k.run(k.from_wire(request["payload"]), progress, None)
            send({"result": encode(out)})
        except (ValueError, OSError) as err:  # the project's errors are ValueErrors: their text is the message
            send({"error": str(err) or type(err).__name__})
        except RecursionError:
            send({"error": "the input is nested too deeply to process"})
        except Exception as err:  # noqa: BLE001 - reported to the parent as the job's failure, never hang it
            # the child's stderr goes nowhere: the traceback travels to the parent's log
            send({"error": f"an internal error ({internal_error(err)})",
                  "traceback": traceback.format_exc()})
    return 0


# ---------------------------------------------------------------------------- parent side
_Child = child_process.Child


_lock = threading.Lock()
_idle: list[_Child] = []
_atexit_set = False


def _spawn() -> _Child:
    _end_at_exit()
    return _Child()


def _end_at_exit() -> None:
    global _atexit_set
    if not _atexit_set:
        import atexit

        atexit.register(shutdown)
        _atexit_set = True


def _adopt_early() -> None:
    """The child ``ballast`` started before its imports joins the idle pool (``_lock`` held)."""
    early = child_process.take_early()
    if early:
        _end_at_exit()
        _idle.extend(early)


def _take_child() -> _Child:
    """An idle warm child, or a new one."""
    with _lock:
        _adopt_early()
        while _idle:
            child = _idle.pop()
            if child.alive():
                return child
            child.end()
    try:
        return _spawn()
    except OSError as err:
        raise ChildError(f"the analysis process did not start ({err})") from None


def _give_back(child: _Child) -> None:
    with _lock:
        if child.alive() and len(_idle) < MAX_IDLE:
            _idle.append(child)
            return
    child.end()


def warm_up() -> None:
    """Start an idle child now (e.g. when the window opens its analysis menu)."""
    with _lock:
        _adopt_early()
        if any(c.alive() for c in _idle):
            return
    try:
        child = _spawn()
    except OSError:
        return  # jobs will run in threads
    _give_back(child)


def shutdown() -> None:
    """End the idle children (window closing)."""
    with _lock:
        children = list(_idle)
        _idle.clear()
    for c in children:
        c.end()


def run_in_child(request: dict, progress=None, cancel=None, model=None, poll_s: float | None = None,
                 time_limit: float | None = None, title: str = "the job"):
    """Send ``request`` to a child, forward its progress, return the decoded result.

    ``cancel()`` is checked every ``poll_s`` seconds; when it says True the child is
    ended at once and :class:`Cancelled` is raised. A job running longer than
    ``time_limit`` seconds ends the child and raises :class:`TimeLimit`.
    """
    poll_s = POLL_S if poll_s is None else poll_s
    child = _take_child()
    clean = False
    t0 = time.perf_counter()
    try:
        try:
            child.proc.stdin.write(json.dumps(request) + "\n")
            child.proc.stdin.flush()
        except OSError as err:
            raise ChildError(f"the analysis process did not start ({err})") from None
        while True:
            if cancel is not None and cancel():
                raise Cancelled()
            if time_limit is not None and time.perf_counter() - t0 > time_limit:
                raise TimeLimit(f"{title[0].upper()}{title[1:]} did not finish within {time_limit:g} s "
                                "and was stopped; the input is too large or too complex.")
            try:
                line = child.lines.get(timeout=poll_s)
            except queue.Empty:
                continue
            if line is None:
                raise ChildError("the analysis process ended without an answer")
            msg = json.loads(line)
            if "progress" in msg:
                if progress is not None:
                    progress(*msg["progress"])
            elif "error" in msg:
                clean = True
                raise_child_error(msg)
            else:
                clean = True
                return decode(msg["result"], model)
    finally:
        if clean:
            _give_back(child)
        else:
            child.end()
            warm_up()  # the next job (after a Cancel: usually another try) finds a warm child


if __name__ == "__main__":
    # the child reads files and fits: pandas (0.4-0.7 s to import, loaded by fitcore.io only
    # when a table is parsed) and the scipy modules every fit uses (LAPACK, the t and normal
    # quantiles; fitcore loads them on first use) are loaded before the first request,
    # while the child waits anyway
    import pandas  # noqa: F401
    import scipy.linalg  # lazy: see above
    import scipy.special  # noqa: F401 - lazy: see above

    sys.exit(serve())
