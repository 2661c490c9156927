"""Analysis jobs in a child process, so the window never waits for the GIL.

Why a process: a worker *thread* running many short fits (the adaptive profile, the
exact refits of the point diagnostics, a bootstrap) releases and re-takes the GIL
inside every numpy call; the GUI thread then loses the race for the GIL again and
again and stalls for the whole run (measured: 0.6 s without a single event during
a 0.9 s profile). A child process has its own interpreter, and Cancel simply ends it.

Protocol (no pickle): the parent writes one JSON request line to the child's stdin;
the child answers with JSON lines ``{"progress": [done, total]}`` and finally
``{"result": ...}`` or ``{"error": "..."}``, then exits. Arrays travel as lists
(floats round-trip exactly through ``repr``); result objects travel as their
dataclass fields and are rebuilt only from the whitelist in :func:`decode`. A
FitResult's model (Python functions) never travels: each side builds it from a plain
description (a built-in name, a formula text, or a design matrix).

The child is ``python -m desktop.analysis_worker``; it imports fitcore before reading
its request, and the parent keeps one spare child warm, so a job starts at once.
This module must not import Qt.
"""
from __future__ import annotations

import dataclasses
import inspect
import json
import os
import queue
import subprocess
import sys
import threading

import numpy as np

from fitcore.bootstrap import BootstrapResult, bootstrap, model_spec
from fitcore.bootstrap import build_model as _rebuild_model
from fitcore.compare import AdaptiveReading, LossComparison, adaptive_reading, compare_losses
from fitcore.diagnostics import PointDiagnostics, point_diagnostics
from fitcore.models import resolve_model
from fitcore.result import FitResult

#: above this many points a job runs in a thread instead: such fits are long numpy
#: calls that leave the GIL free for long stretches (measured: 12 ms longest event gap
#: for a comparison at n = 1000 and 20000 in a thread), while the JSON transfer of
#: large results would itself hold the GIL (167 ms at n = 20000 through the child)
CHILD_MAX_POINTS = 2000


class ChildError(RuntimeError):
    """The child process failed to start or died without an answer."""


# ---------------------------------------------------------------------------- jobs
class _Flag:
    """A cancel flag both callable (``flag()``) and event-like (``flag.is_set()``)."""

    def __init__(self, fn):
        self._fn = fn

    def __call__(self) -> bool:
        return bool(self._fn())

    def is_set(self) -> bool:
        return bool(self._fn())


def _accepts(fn, name: str) -> bool:
    try:
        sig = inspect.signature(fn)
    except (TypeError, ValueError):
        return False
    return name in sig.parameters or any(p.kind == p.VAR_KEYWORD for p in sig.parameters.values())


def run_comparison_core(model, x, y, kwargs: dict, losses, progress=None, cancel=None,
                        with_adaptive: bool = True):
    """``(cmp, reading or None, reading error or None, leverage note)``: the comparison job.

    The leverage note (``fitcore.diagnostics`` on the least-squares fit, or the first
    fit that worked; "" when no point has high leverage) warns that all the losses can
    agree because a point far out in x pulls every one of them.
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
            note = point_diagnostics(base, exact_limit=0).note
        except ValueError:
            note = ""
    return cmp, reading, err, note


# ---------------------------------------------------------------------------- encoding
def encode(o):
    """A JSON-able form of ``o`` (arrays, numpy scalars, dataclasses, tuples, dicts)."""
    if isinstance(o, np.ndarray):
        if o.dtype.kind not in "biuf":
            raise TypeError(f"cannot send an array of dtype {o.dtype}")
        return {"__nd__": o.dtype.str, "shape": list(o.shape), "data": o.ravel().tolist()}
    if isinstance(o, np.generic):
        return o.item()
    if dataclasses.is_dataclass(o) and not isinstance(o, type):
        return {"__dc__": type(o).__name__,
                "fields": {f.name: encode(getattr(o, f.name)) for f in dataclasses.fields(o)
                           if f.name != "model"}}
    if isinstance(o, tuple):
        return {"__tuple__": [encode(v) for v in o]}
    if isinstance(o, list):
        return [encode(v) for v in o]
    if isinstance(o, dict):
        return {"__map__": [[encode(k), encode(v)] for k, v in o.items()]}
    if o is None or isinstance(o, (bool, int, float, str)):
        return o
    raise TypeError(f"cannot send a {type(o).__name__}")


def _classes():

    return {c.__name__: c for c in (FitResult, LossComparison, AdaptiveReading,
                                    PointDiagnostics, BootstrapResult)}


def decode(o, model=None, _classes_cache={}):  # noqa: B006 - a cache kept across calls on purpose
    """Inverse of :func:`encode`; FitResults get ``model`` (only whitelisted classes)."""
    if isinstance(o, list):
        return [decode(v, model) for v in o]
    if not isinstance(o, dict):
        return o
    if "__nd__" in o:
        return np.array(o["data"], dtype=np.dtype(o["__nd__"])).reshape(o["shape"])
    if "__tuple__" in o:
        return tuple(decode(v, model) for v in o["__tuple__"])
    if "__map__" in o:
        return {_hashable(decode(k, model)): decode(v, model) for k, v in o["__map__"]}
    if "__dc__" in o:
        if not _classes_cache:
            _classes_cache.update(_classes())
        cls = _classes_cache.get(o["__dc__"])
        if cls is None:
            raise ChildError(f"unexpected object {o['__dc__']!r} from the analysis process")
        kw = {k: decode(v, model) for k, v in o["fields"].items()}
        if "model" in {f.name for f in dataclasses.fields(cls)}:
            kw["model"] = model
        return cls(**kw)
    raise ChildError("unexpected data from the analysis process")


def _hashable(k):
    return tuple(k) if isinstance(k, list) else k


def model_description(model, x, values):
    """A plain description that rebuilds ``model`` exactly in another process, or None."""

    spec = model_spec(model, np.asarray(x, float), np.asarray(values, float))
    return None if spec is None else list(spec)


def build_model(desc):
    """The model of a job: a built-in name or formula, or a description from
    :func:`model_description` (rebuilt by :func:`fitcore.bootstrap.build_model`)."""
    if isinstance(desc, str):
        return resolve_model(desc)
    desc = [decode(d) for d in desc]
    return _rebuild_model(tuple(desc))


# ---------------------------------------------------------------------------- child side
def _run(request: dict, progress, cancel):
    kind = request["kind"]
    model = build_model(request["model"])
    if kind == "compare":
        return run_comparison_core(model, decode(request["x"]), decode(request["y"]),
                                   decode(request["kwargs"]), tuple(request["losses"]),
                                   progress, cancel, request.get("with_adaptive", True))
    res = decode(request["result"], model)
    if kind == "diagnostics":

        return point_diagnostics(res, exact_limit=int(request["exact_limit"]), progress=progress,
                                 cancel=cancel)
    if kind == "bootstrap":

        return bootstrap(res, kind=request["boot_kind"], B=int(request["B"]),
                         seed=int(request["seed"]), level=float(request["level"]),
                         progress=progress, cancel=cancel)
    raise ValueError(f"unknown job {kind!r}")


def serve(stdin=None, stdout=None) -> int:
    """Child main: one request from stdin, answers on stdout."""
    stdin = stdin or sys.stdin
    stdout = stdout or sys.stdout
    # warm up before the request arrives
    import fitcore.bootstrap
    import fitcore.compare
    import fitcore.diagnostics
    import fitcore.formula
    import fitcore.models  # noqa: F401

    line = stdin.readline()
    if not line:
        return 0

    def send(obj):
        stdout.write(json.dumps(obj) + "\n")
        stdout.flush()

    def progress(done, total=0):
        send({"progress": [int(done), int(total)]})

    try:
        out = _run(json.loads(line), progress, None)
        send({"result": encode(out)})
    except ValueError as err:
        send({"error": str(err)})
    except Exception as err:  # noqa: BLE001 - report, never hang the parent
        send({"error": f"{type(err).__name__}: {err}"})
    return 0


# ---------------------------------------------------------------------------- parent side
_lock = threading.Lock()
_spare: subprocess.Popen | None = None


_atexit_set = False


def _spawn() -> subprocess.Popen:
    global _atexit_set
    if not _atexit_set:
        import atexit

        atexit.register(shutdown)
        _atexit_set = True
    env = dict(os.environ)
    env.setdefault("OPENBLAS_NUM_THREADS", "1")
    env.pop("QT_QPA_PLATFORM", None)
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    env["PYTHONPATH"] = root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    return subprocess.Popen([sys.executable, "-m", "desktop.analysis_worker"], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, env=env, cwd=root,
                            text=True, encoding="utf-8", bufsize=1)


def _take_child() -> subprocess.Popen:
    """A warm child (the spare if alive), and a new spare started behind it."""
    global _spare
    with _lock:
        child = _spare if _spare is not None and _spare.poll() is None else None
        _spare = None
        if child is None:
            child = _spawn()
        try:
            _spare = _spawn()
        except OSError:
            _spare = None
    return child


def warm_up() -> None:
    """Start the spare child now (e.g. when the window opens its analysis menu)."""
    global _spare
    with _lock:
        if _spare is None or _spare.poll() is not None:
            try:
                _spare = _spawn()
            except OSError:
                _spare = None


def shutdown() -> None:
    """End the spare child (window closing)."""
    global _spare
    with _lock:
        if _spare is not None and _spare.poll() is None:
            _spare.kill()
            _spare.wait(2)
        _spare = None


def _reader(stream, q: queue.Queue):
    try:
        for line in stream:
            q.put(line)
    except (OSError, ValueError):
        pass
    q.put(None)


def run_in_child(request: dict, progress=None, cancel=None, model=None, poll_s: float = 0.05):
    """Send ``request`` to a child, forward its progress, return the decoded result.

    ``cancel()`` is checked every ``poll_s`` seconds; when it says True the child is
    ended at once and :class:`desktop.jobs.Cancelled` is raised.
    """
    from .jobs import Cancelled

    child = _take_child()
    lines: queue.Queue = queue.Queue()
    reader = threading.Thread(target=_reader, args=(child.stdout, lines), daemon=True)
    reader.start()
    try:
        try:
            child.stdin.write(json.dumps(request) + "\n")
            child.stdin.flush()
        except OSError as err:
            raise ChildError(f"the analysis process did not start ({err})") from None
        while True:
            if cancel is not None and cancel():
                raise Cancelled()
            try:
                line = lines.get(timeout=poll_s)
            except queue.Empty:
                continue
            if line is None:
                raise ChildError("the analysis process ended without an answer")
            msg = json.loads(line)
            if "progress" in msg:
                if progress is not None:
                    progress(*msg["progress"])
            elif "error" in msg:
                raise ValueError(msg["error"])
            else:
                return decode(msg["result"], model)
    finally:
        if child.poll() is None:
            child.kill()
        child.wait(5)
        reader.join(1.0)
        for f in (child.stdin, child.stdout):
            try:
                f.close()
            except OSError:
                pass


if __name__ == "__main__":
    sys.exit(serve())
