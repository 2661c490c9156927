"""Batch: many data sets fitted with one method, in parallel, with the same results.

Two front doors share one engine:

* :func:`fit_many` fits data sets already in memory (arrays) and returns one result
  per data set, in order: a :class:`~fitcore.result.FitResult`, or a
  :class:`FailedFit` that says why that one data set could not be fitted.
* :func:`fit_sources` reads files (every format :func:`fitcore.read_table` reads),
  splits them into curves (several ``y`` columns, a group column of a long table,
  every sheet of a workbook) and yields one :class:`BatchRow` per curve, in order.
  The ``ballast-fit`` command and the window's "Fit many files" run on it.

How the work is spread
----------------------
``jobs=1`` fits in this process. ``jobs=N`` (default: the cores this process may
use) sends the work to N worker processes (:class:`concurrent.futures.
ProcessPoolExecutor`, started by the ``forkserver`` method where the system has it,
so a window's threads are never forked). ``engine="dask"`` sends the same tasks to a
Dask distributed cluster (``scheduler="tcp://host:8786"``, or a local cluster of
``jobs`` worker processes started for the run); Dask is an optional extra
(``pip install "ballast[cluster]"``).

* **Same results**: a worker runs exactly :func:`fitcore.fit` on the same arrays, so
  results are bit for bit those of fitting one data set after another here (with
  BLAS limited to one thread in workers; the 25-point fits of a plate never thread).
* **Order**: results come back in input order whatever finishes first.
* **Bounded memory**: the input is read lazily (a generator is fine) and cut into
  chunks of a few data sets; at most ``4 * jobs`` chunks are on their way at any
  time, so neither the inputs nor the finished results pile up. Files are read by the
  workers themselves; only a file too large to be one task (a long table of many
  groups) is read here and its curves handed out chunk by chunk.
* **Failures stay per data set**: an unusable data set gives a :class:`FailedFit`
  (or a row with ``error`` filled); the others are fitted all the same.

Nothing here imports Qt.
"""
from __future__ import annotations

import dataclasses
import os
from collections.abc import Callable, Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from . import __version__
from .io import ReadError, _rows_text, read_table
from .losses import LOSS_NAMES
from .model import Model
from .models import resolve_model
from .session import write_atomically
from .solve import FitError, fit
from .solvers.setup import _check_alpha, _check_scale_tuning, _held_values, _iteration_limit
from .work import DataSet, Exclusion

__all__ = [
    "TABLE_SUFFIXES",
    "BatchError",
    "BatchRow",
    "BatchSpec",
    "Dataset",
    "FailedFit",
    "default_jobs",
    "find_files",
    "fit_many",
    "fit_sources",
    "iter_fit_many",
    "result_columns",
    "row_cells",
    "rows_table",
    "write_rows",
]

#: File name endings searched for in folders (what :func:`fitcore.read_table` reads).
TABLE_SUFFIXES = (".csv", ".tsv", ".txt", ".dat", ".xlsx", ".xlsm", ".ods")

#: A file larger than this (with a group column: than ``LARGE_GROUPED_BYTES``) is read
#: here and its curves handed out in chunks, so a long table of many groups is spread
#: over the workers; smaller files are read by the workers themselves.
LARGE_FILE_BYTES = 2_000_000
LARGE_GROUPED_BYTES = 200_000

_CHUNK_CURVES = 8           # data sets per task, at most
_CHUNK_POINTS = 50_000      # points per task, at most (a few large curves go alone)
_CHUNK_FILES = 4            # small files per task
_AHEAD = 4                  # chunks on their way per worker


class BatchError(ValueError):
    """A batch cannot run at all (bad method, missing extra, no cluster): one sentence."""


@dataclass(frozen=True)
class Dataset:
    """One data set for :func:`fit_many`: ``x``, ``y``, optional ``sigma`` and
    ``excluded`` (True = left out), as :func:`fitcore.fit` takes them."""

    x: Any
    y: Any
    sigma: Any = None
    excluded: Any = None


@dataclass(frozen=True)
class FailedFit:
    """Why one data set of a batch could not be fitted.

    ``index`` is its position in the input, ``error`` a plain sentence, ``kind`` the
    kind of problem (``"FitError"`` for data the fit refuses, ``"ReadError"`` for a
    file that cannot be read, ``"input"`` for something that is not a data set, else
    the name of an unexpected error). ``converged`` is always False.
    """

    index: int
    error: str
    kind: str = "FitError"

    converged = False

    @property
    def message(self) -> str:
        return self.error

    def __str__(self) -> str:
        return f"data set {self.index + 1}: {self.error}"


def default_jobs() -> int:
    """The number of cores this process may run on (at least 1)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


# =========================================================================== workers

_MODELS: dict[str, Any] = {}


def _model(spec):
    """The Model of a name or formula, built once per process (formulas cost sympy)."""
    if not isinstance(spec, str):
        return spec
    m = _MODELS.get(spec)
    if m is None:
        m = _MODELS[spec] = resolve_model(spec)
    return m


def _worker_init() -> None:
    """Worker processes: one BLAS thread each (the parallelism is the processes), and
    Ctrl+C is the parent's to handle."""
    import signal

    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)
    except (ValueError, OSError):
        pass
    try:
        from threadpoolctl import threadpool_limits

        threadpool_limits(1)
    except Exception:  # noqa: BLE001 - threadpoolctl absent or no BLAS found: nothing to limit
        pass


def _problem_text(exc: BaseException) -> tuple[str, str]:
    if isinstance(exc, (FitError, ReadError)):
        return str(exc), type(exc).__name__
    if isinstance(exc, (ValueError, TypeError, ArithmeticError)):
        return f"{str(exc) or type(exc).__name__}", type(exc).__name__
    return f"unexpected {type(exc).__name__}: {exc}", type(exc).__name__


def _fit_one(model_spec, loss, options, x, y, sigma, excluded):
    return fit(_model(model_spec), x, y, loss, sigma=sigma, excluded=excluded, **options)


def _fit_chunk(job: tuple, items: list, strip_model: bool = True) -> list:
    """Fit a chunk of ``(index, x, y, sigma, excluded)``; return results or failures.

    Results crossing a process boundary leave their Model behind (a model made from a
    formula holds functions that do not travel); the caller puts its own back.
    """
    model_spec, loss, options = job
    out = []
    for item in items:
        index = item[0]
        if isinstance(item[1], FailedFit):
            out.append(item[1])
            continue
        try:
            res = _fit_one(model_spec, loss, options, *item[1:])
        except Exception as exc:  # noqa: BLE001 - one data set's problem never stops the batch
            text, kind = _problem_text(exc)
            out.append(FailedFit(index, text, kind))
            continue
        out.append(dataclasses.replace(res, model=None) if strip_model else res)
    return out


# =========================================================================== engines

class _Serial:
    """Runs each task here, when it is asked for (nothing runs ahead)."""

    jobs = 1

    def submit(self, func, *args):
        from concurrent.futures import Future

        fut: Future = Future()
        try:
            fut.set_result(func(*args))
        except BaseException as exc:  # noqa: BLE001 - handed to the caller through the future
            fut.set_exception(exc)
        return fut

    @staticmethod
    def wait_any(futures):
        return set(futures)

    def close(self, cancel=False):
        pass


class _LocalPool:
    def __init__(self, jobs: int):
        import multiprocessing as mp
        from concurrent.futures import ProcessPoolExecutor

        methods = mp.get_all_start_methods()
        ctx = mp.get_context("forkserver" if "forkserver" in methods else "spawn")
        if ctx.get_start_method() == "forkserver":
            # imported once in the server, not once per worker
            ctx.set_forkserver_preload(["fitcore.batch", "fitcore.solve", "fitcore.models", "fitcore.io"])
        self.jobs = jobs
        self._pool = ProcessPoolExecutor(max_workers=jobs, mp_context=ctx, initializer=_worker_init)

    def submit(self, func, *args):
        return self._pool.submit(func, *args)

    @staticmethod
    def wait_any(futures):
        from concurrent.futures import FIRST_COMPLETED, wait

        return wait(futures, return_when=FIRST_COMPLETED).done

    def close(self, cancel=False):
        self._pool.shutdown(wait=True, cancel_futures=cancel)


DASK_MISSING = ("the Dask engine needs the optional 'cluster' extra, which is not installed: "
                "pip install \"ballast[cluster]\" (or pip install -e \".[cluster]\" in a checkout), "
                "which brings dask[distributed]")


def _import_distributed():
    try:
        import distributed
    except ImportError:
        raise BatchError(DASK_MISSING) from None
    return distributed


class _DaskPool:
    """The same tasks on a Dask distributed cluster (an address, or a local one)."""

    def __init__(self, jobs: int, scheduler: str | None = None):
        distributed = _import_distributed()
        self._distributed = distributed
        self._cluster = None
        try:
            if scheduler:
                self._client = distributed.Client(scheduler, timeout="20s")
            else:
                self._cluster = distributed.LocalCluster(
                    n_workers=jobs, threads_per_worker=1, processes=True,
                    dashboard_address=":0", silence_logs=40)
                self._client = distributed.Client(self._cluster)
        except (OSError, TimeoutError) as exc:
            where = f"the Dask scheduler at {scheduler}" if scheduler else "a local Dask cluster"
            raise BatchError(f"could not connect to {where}: {exc}") from None
        except ValueError as exc:
            raise BatchError(f"not a Dask scheduler address: {scheduler!r} ({exc})") from None
        workers = self._client.scheduler_info().get("workers", {})
        self.jobs = max(1, sum(int(w.get("nthreads", 1)) for w in workers.values()) or jobs)
        try:
            versions = set(self._client.run(_fitcore_version).values())
            self._client.run(_worker_init)
        except Exception as exc:  # noqa: BLE001 - any failure there: Ballast is not usable on them
            self.close()
            raise BatchError(f"the Dask workers could not run Ballast's code ({type(exc).__name__}: "
                             f"{exc}); install the same Ballast on every worker") from None
        if versions and versions != {__version__}:
            self.close()
            raise BatchError(f"the Dask workers run fitcore {', '.join(sorted(versions))}, this "
                             f"process {__version__}: install the same Ballast on every worker")
        self._client.run(_worker_init)

    def submit(self, func, *args):
        return self._client.submit(func, *args, pure=False)

    def wait_any(self, futures):
        return set(self._distributed.wait(list(futures), return_when="FIRST_COMPLETED").done)

    def close(self, cancel=False):
        try:
            self._client.close()
        finally:
            if self._cluster is not None:
                self._cluster.close()


def _fitcore_version() -> str:
    return __version__


def _check_run(engine: str, jobs, scheduler) -> None:
    if engine not in ("local", "dask"):
        raise BatchError(f"unknown engine {engine!r}: choose 'local' or 'dask'")
    if jobs is not None and (not isinstance(jobs, (int, np.integer)) or isinstance(jobs, bool) or jobs < 1):
        raise BatchError(f"jobs must be a whole number of at least 1, not {jobs!r}")
    if scheduler and engine != "dask":
        raise BatchError("a scheduler address needs engine='dask'")


def _engine(engine: str, jobs: int | None, scheduler: str | None):
    _check_run(engine, jobs, scheduler)
    n = int(jobs) if jobs is not None else default_jobs()
    if engine == "dask":
        return _DaskPool(n, scheduler)
    return _Serial() if n == 1 else _LocalPool(n)


def _ordered(func: Callable, job, chunks: Iterator[list], engine, *,
             on_done: Callable[[list], None] | None = None,
             on_error: Callable[[list, BaseException], list] | None = None) -> Iterator[list]:
    """Run ``func(job, chunk)`` for every chunk on ``engine``; yield the results of
    each chunk in input order. At most ``_AHEAD * engine.jobs`` chunks are submitted
    and not yet yielded. ``on_done(results)`` is called as each chunk finishes (in
    any order), for a progress display; ``on_error(chunk, exc)`` gives the results of
    a chunk whose task failed as a whole (a worker process killed, say)."""
    limit = max(2, _AHEAD * engine.jobs) if not isinstance(engine, _Serial) else 1
    running: dict[int, Any] = {}
    finished: dict[int, list] = {}
    sent = nxt = 0
    chunks = iter(chunks)
    more = True
    while True:
        while more and sent - nxt < limit:
            try:
                chunk = next(chunks)
            except StopIteration:
                more = False
                break
            running[sent] = (engine.submit(func, job, chunk), chunk)
            sent += 1
        if nxt == sent:
            return
        if nxt not in finished:
            done = engine.wait_any([f for f, _ in running.values()])
            for seq in [s for s, (f, _) in running.items() if f in done]:
                fut, chunk = running.pop(seq)
                try:
                    finished[seq] = fut.result()
                except Exception as exc:  # the worker itself failed (killed, broken pool)
                    if on_error is None:
                        raise
                    finished[seq] = on_error(chunk, exc)
                if on_done is not None:
                    on_done(finished[seq])
            continue
        yield finished.pop(nxt)
        nxt += 1


def _run(func, job, chunks, *, jobs, engine, scheduler, on_done, on_error) -> Iterator[list]:
    """Start the engine (a local run of one chunk stays in this process), run, close."""
    chunks = iter(chunks)
    if engine == "local" and (jobs is None or jobs > 1):
        first = list(_take(chunks, 2))
        if len(first) < 2:  # one task: a pool would only cost its start-up
            jobs = 1
        chunks = _chain(first, chunks)
    eng = _engine(engine, jobs, scheduler)
    cancel = True
    try:
        yield from _ordered(func, job, chunks, eng, on_done=on_done, on_error=on_error)
        cancel = False
    finally:
        eng.close(cancel=cancel)


def _take(it, n):
    for _ in range(n):
        try:
            yield next(it)
        except StopIteration:
            return


def _chain(first, rest):
    yield from first
    yield from rest


def _chunked(items: Iterable, size_of: Callable[[Any], int], max_items: int, max_size: int):
    """Chunks of 1, 2, 4, ... up to ``max_items`` items (a short batch is still spread
    over the workers; a long one pays little per task) and ``max_size`` in all."""
    chunk: list = []
    size = 0
    limit = 1
    for item in items:
        s = size_of(item)
        if chunk and (len(chunk) >= limit or size + s > max_size):
            yield chunk
            chunk, size = [], 0
            limit = min(2 * limit, max_items)
        chunk.append(item)
        size += s
    if chunk:
        yield chunk


# =========================================================================== fit_many

def _fit_options() -> tuple[str, ...]:
    """The keyword options of :func:`fitcore.fit` that apply to every data set alike
    (read from its signature, so a new option works in a batch at once)."""
    import inspect

    per_set = {"model", "x", "y", "loss", "sigma", "excluded"}
    return tuple(n for n, p in inspect.signature(fit).parameters.items()
                 if n not in per_set and p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD))


def _check_method(model, loss, options) -> Any:
    """Fail once, before any work, on what would fail for every data set."""
    allowed = _fit_options()
    unknown = sorted(set(options) - set(allowed))
    if unknown:
        raise TypeError(f"fit_many got unknown option(s) {', '.join(unknown)}; fit options are "
                        f"{', '.join(allowed)} (sigma and excluded go with each data set)")
    if loss not in LOSS_NAMES:
        raise FitError(f"unknown loss {loss!r}; choose one of {', '.join(LOSS_NAMES)}")
    _check_alpha(loss, options.get("alpha"))
    _check_scale_tuning(loss, options.get("scale", "auto"), options.get("tuning"))
    _iteration_limit(options.get("max_iter", 2000))
    _held_values(dict(options.get("fixed") or {}))
    if isinstance(model, Model):
        return model
    if not isinstance(model, str):
        raise FitError(f"a model must be a built-in name, a formula text or a fitcore.Model, "
                       f"got {type(model).__name__}")
    try:
        return _model(model)
    except ValueError as exc:
        raise FitError(str(exc)) from exc


def _as_item(index: int, d) -> tuple:
    """``(index, x, y, sigma, excluded)`` as float arrays, or ``(index, FailedFit)``."""
    try:
        if isinstance(d, Dataset):
            parts = (d.x, d.y, d.sigma, d.excluded)
        elif isinstance(d, Mapping):
            if "x" not in d or "y" not in d:
                raise TypeError("a data set given as a mapping needs the keys 'x' and 'y'")
            parts = (d["x"], d["y"], d.get("sigma"), d.get("excluded"))
        elif hasattr(d, "x") and hasattr(d, "y"):  # a fitcore.io Selection and the like
            parts = (d.x, d.y, getattr(d, "sigma", None), getattr(d, "excluded", None))
        elif isinstance(d, (tuple, list)) and len(d) in (2, 3, 4):
            parts = tuple(d) + (None,) * (4 - len(d))
        else:
            raise TypeError(f"a data set must be (x, y), (x, y, sigma), a mapping with x and y, "
                            f"or a fitcore.Dataset, not {type(d).__name__}")
        x, y = np.asarray(parts[0], dtype=float), np.asarray(parts[1], dtype=float)
        sigma = None if parts[2] is None else np.asarray(parts[2], dtype=float)
        excluded = None if parts[3] is None else np.asarray(parts[3], dtype=bool)
    except (TypeError, ValueError) as exc:
        return (index, FailedFit(index, str(exc) if isinstance(exc, TypeError)
                                 else "x, y and sigma must be numbers", "input"))
    return (index, x, y, sigma, excluded)


def iter_fit_many(datasets: Iterable, model, loss: str = "l2", *, jobs: int | None = None,
                  engine: str = "local", scheduler: str | None = None,
                  progress: Callable[[int], None] | None = None, **fit_options) -> Iterator:
    """Like :func:`fit_many`, but yields the results one by one, in input order, as they
    are ready (the input may be a generator: it is read a few chunks ahead only)."""
    mdl = _check_method(model, loss, fit_options)
    _check_run(engine, jobs, scheduler)
    model_spec = model
    if isinstance(model, Model):
        # a Model built in Python holds functions that do not travel to other processes
        if engine == "dask" or (jobs or default_jobs()) > 1:
            import warnings

            warnings.warn("fit_many: a fitcore.Model object is fitted in this process only; "
                          "give the model as a built-in name or a formula text to use several "
                          "processes", RuntimeWarning, stacklevel=2)
        engine, jobs, scheduler = "local", 1, None
    job = (model_spec, loss, dict(fit_options))
    items = (_as_item(i, d) for i, d in enumerate(datasets))
    chunks = _chunked(items, lambda it: 1 if isinstance(it[1], FailedFit) else int(np.size(it[1])),
                      _CHUNK_CURVES, _CHUNK_POINTS)
    on_done = (lambda results: progress(len(results))) if progress is not None else None
    serial = engine == "local" and jobs == 1
    func = _fit_chunk if not serial else _fit_chunk_here
    def on_error(chunk, exc):
        text = f"the worker process failed ({type(exc).__name__}: {exc})"
        return [FailedFit(item[0], text, type(exc).__name__) for item in chunk]

    for results in _run(func, job, chunks, jobs=jobs, engine=engine, scheduler=scheduler,
                        on_done=on_done, on_error=on_error):
        for res in results:
            if isinstance(res, FailedFit) or res.model is not None:
                yield res
            else:
                yield dataclasses.replace(res, model=mdl)


def _fit_chunk_here(job, items):
    return _fit_chunk(job, items, strip_model=False)


def fit_many(datasets: Iterable, model, loss: str = "l2", *, jobs: int | None = None,
             engine: str = "local", scheduler: str | None = None,
             progress: Callable[[int], None] | None = None, **fit_options) -> list:
    """Fit many data sets with one method; one result per data set, in input order.

    Parameters
    ----------
    datasets : iterable
        Each item ``(x, y)``, ``(x, y, sigma)``, ``(x, y, sigma, excluded)``, a mapping
        with keys ``x``, ``y`` (and optionally ``sigma``, ``excluded``), a
        :class:`Dataset`, or a selection from :meth:`fitcore.Table.choose`. A
        generator is read a few chunks ahead only.
    model, loss, **fit_options
        As for :func:`fitcore.fit` (``scale``, ``alpha``, ``p0``, ``fixed``,
        ``tuning``, ``sigma_mode``, ``max_iter``, ...), the same for every data set.
    jobs : int, optional
        Worker processes (default: the cores this process may use); 1 fits here.
    engine : {"local", "dask"}
        ``"dask"`` runs the same tasks on a Dask distributed cluster: ``scheduler``
        (``"tcp://host:8786"``) or, without one, a local cluster of ``jobs`` workers.
    progress : callable, optional
        Called with the number of data sets just finished, as chunks finish.

    Returns
    -------
    list
        A :class:`~fitcore.result.FitResult` per data set, bit for bit what
        :func:`fitcore.fit` returns for it, or a :class:`FailedFit` with the reason
        when that data set could not be fitted (the others are fitted all the same).

    Raises
    ------
    FitError
        Unknown loss or a model that cannot be built: nothing could be fitted.
    TypeError
        An option :func:`fitcore.fit` does not take.
    BatchError
        A bad ``jobs`` or ``engine``, or Dask requested but not installed or not
        reachable.

    Examples
    --------
    >>> import numpy as np, fitcore
    >>> x = np.arange(10.0)
    >>> out = fitcore.fit_many([(x, 2 * x + 1), (x, [1.0] * 3)], "line", "huber", jobs=1)
    >>> round(out[0]["slope"], 6), type(out[1]).__name__
    (2.0, 'FailedFit')
    """
    return list(iter_fit_many(datasets, model, loss, jobs=jobs, engine=engine,
                              scheduler=scheduler, progress=progress, **fit_options))


# =========================================================================== files

@dataclass(frozen=True)
class BatchSpec:
    """What to fit in every file: columns, method, and whether to build reports.

    ``ys`` holds one or more y columns (one curve each); ``group`` a column whose
    cells split a long table into curves; ``exclude`` a column whose non-zero cells
    mark points left out. ``sheet`` picks one workbook sheet; by default every sheet
    holding the x column is a curve (or several).
    """

    x: str
    ys: tuple[str, ...]
    model: str
    loss: str = "l2"
    sigma: str | None = None
    group: str | None = None
    exclude: str | None = None
    sheet: str | None = None
    options: Mapping[str, Any] = field(default_factory=dict)
    report: bool = False


@dataclass(frozen=True)
class BatchRow:
    """One curve's line of the results table (plain values; ``values`` and ``stderr``
    in the model's parameter order, empty when ``error`` is set). ``report`` holds
    the curve's HTML report when one was asked for."""

    source: str
    sheet: str
    group: str
    y: str
    n_used: int | None = None
    n_excluded: int | None = None
    converged: bool | None = None
    values: tuple = ()
    stderr: tuple = ()
    scale: float | None = None
    alpha: float | None = None
    warnings: str = ""
    error: str = ""
    report: str = ""

    @property
    def failed(self) -> bool:
        return bool(self.error)


def find_files(paths: Iterable) -> tuple[list[Path], list[str]]:
    """The files to fit: each path as given, folders searched (with their subfolders)
    for :data:`TABLE_SUFFIXES`, in sorted order. Returns ``(files, problems)``; a
    path that does not exist is a problem, not an exception."""
    files: list[Path] = []
    problems: list[str] = []
    seen: set = set()
    for raw in paths:
        p = Path(os.fspath(raw))
        if p.is_dir():
            found = sorted(q for q in p.rglob("*") if q.is_file() and q.suffix.lower() in TABLE_SUFFIXES
                           and not q.name.startswith((".", "~$")))
            if not found:
                problems.append(f"folder '{p}' holds no table files ({', '.join(TABLE_SUFFIXES)})")
        elif p.exists():
            found = [p]
        else:
            problems.append(f"'{p}' does not exist")
            found = []
        for q in found:
            key = os.path.realpath(q)
            if key not in seen:
                seen.add(key)
                files.append(q)
    return files, problems


def _read_sheets(path: Path, spec: BatchSpec):
    """Yield ``(sheet_label, table or ReadError)`` for the sheets to fit in ``path``."""
    try:
        first = read_table(path, sheet=spec.sheet)
    except ReadError as exc:
        yield "" if spec.sheet is None else str(spec.sheet), exc
        return
    if not first.sheet_names or spec.sheet is not None:
        yield (first.dialect.sheet or "") if first.sheet_names else "", first
        return
    with_x = 0
    for i, name in enumerate(first.sheet_names):
        try:
            table = first if name == first.dialect.sheet else read_table(path, sheet=i)
        except ReadError:
            continue
        try:
            table.column(spec.x)
        except KeyError:
            continue
        with_x += 1
        yield name, table
    if with_x == 0:  # no sheet has the x column: say so on the first one
        yield first.dialect.sheet or "", first


def _curves(table, sheet: str, spec: BatchSpec, source: str | None = None):
    """Yield ``(meta, x, y, sigma, excluded, info)`` per curve of a table (``info``:
    a note on rows left out, the column names and units, for the row and the report), or
    ``(meta, ReadError)`` for a curve that cannot be taken from it."""
    source = table.source if source is None else source
    for ycol in spec.ys:
        meta = (source, sheet, "", ycol)
        try:
            sel = table.choose(spec.x, ycol, spec.sigma)
            rows = np.searchsorted(table.source_rows, sel.source_rows)
            excl = None
            if spec.exclude is not None:
                flag = table.column(spec.exclude)[rows]
                excl = np.isfinite(flag) & (flag != 0)
            codes = labels = None
            if spec.group is not None:
                codes, labels = table.groups(spec.group)
                codes = codes[rows]
        except (ReadError, KeyError) as exc:
            yield (meta, ReadError(str(exc)))
            continue
        note = ""
        if sel.dropped_rows:
            note = (f"{_rows_text(np.asarray(sel.dropped_rows))}: left out, no usable number in "
                    f"{sel.x_name}, {sel.y_name}" + (f" or {sel.sigma_name}" if sel.sigma_name else ""))
        if codes is None:
            yield (meta, sel.x, sel.y, sel.sigma, excl, _info(sel, note, spec, sel.source_rows))
            continue
        empty = ""
        if (codes < 0).any():
            empty = f"{int((codes < 0).sum())} row(s) with an empty {spec.group} cell belong to no curve"
            note = f"{note}; {empty}" if note else empty
        order = np.argsort(codes, kind="stable")
        bounds = np.searchsorted(codes[order], np.arange(len(labels) + 1))
        for g, label in enumerate(labels):
            idx = order[bounds[g]:bounds[g + 1]]
            if idx.size == 0:
                yield ((source, sheet, label, ycol), ReadError(
                    f"group {label!r} has no row with numbers in {sel.x_name} and {sel.y_name}"))
                continue
            yield ((source, sheet, label, ycol), sel.x[idx], sel.y[idx],
                   None if sel.sigma is None else sel.sigma[idx],
                   None if excl is None else excl[idx],
                   _info(sel, note, spec, sel.source_rows[idx], group_note=empty))


def _row(spec: BatchSpec, curve: tuple) -> BatchRow:
    source, sheet, group, ycol = curve[0]
    if len(curve) == 2:
        text, _ = _problem_text(curve[1])
        return BatchRow(source, sheet, group, ycol, error=text)
    _, x, y, sigma, excluded, info = curve
    note = info.get("note", "")
    try:
        res = _fit_one(spec.model, spec.loss, dict(spec.options), x, y, sigma, excluded)
    except Exception as exc:  # noqa: BLE001 - one curve's problem never stops the batch
        text, _ = _problem_text(exc)
        return BatchRow(source, sheet, group, ycol, n_used=int(np.sum(np.isfinite(x) & np.isfinite(y))),
                        error=text)
    warn = list(res.warnings)
    if not res.converged:
        warn.insert(0, res.message)
    if note:
        warn.append(note)
    report = ""
    if spec.report:
        report = _report_html(res, curve, spec)
    return BatchRow(
        source, sheet, group, ycol, n_used=res.n_used, n_excluded=res.n_excluded,
        converged=bool(res.converged), values=tuple(float(v) for v in res.values),
        stderr=tuple(float(v) for v in res.stderr), scale=float(res.scale),
        alpha=None if res.alpha is None else float(res.alpha),
        warnings="; ".join(w.replace("\n", " ") for w in warn), report=report)


def _info(sel, note: str, spec: BatchSpec, rows, group_note: str = "") -> dict:
    info = {"note": note, "x_name": sel.x_name, "y_name": sel.y_name, "x_unit": sel.x_unit,
            "y_unit": sel.y_unit}
    if spec.report:  # what the report's data record needs
        notes = tuple(sel.notes) + tuple(n for n in (group_note,) if n)
        info.update(sigma_name=sel.sigma_name or "", sha256=sel.sha256, rows=np.asarray(rows),
                    notes=notes)
    return info


def _report_html(res, curve: tuple, spec: BatchSpec) -> str:
    """One curve's report: :func:`fitcore.report_html.report_html`, the document the
    window writes, of this curve's data set (its own file rows and reading notes) and
    the points its exclude column marks."""
    from .report_html import report_html  # here: only runs with reports load the report modules

    meta, x, y, sigma, _excluded, info = curve
    source, sheet, group, ycol = meta
    title = " / ".join(t for t in (os.path.basename(source), sheet, group, ycol) if t)
    data = DataSet(x, y, sigma, x_name=info.get("x_name", "x"),
                   y_name=info.get("y_name", ycol), sigma_name=info.get("sigma_name", ""),
                   x_unit=info.get("x_unit", ""), y_unit=info.get("y_unit", ""), source=source,
                   notes=info.get("notes", ()), source_rows=info.get("rows"),
                   source_sha256=info.get("sha256", ""),
                   columns={"x": info.get("x_name", "x"), "y": info.get("y_name", ycol),
                            "sigma": info.get("sigma_name") or None, "sheet": sheet})
    marked = f"marked in column {spec.exclude!r} of the file"
    exclusions = [Exclusion(int(i), marked) for i in np.flatnonzero(np.asarray(res.excluded, bool))]
    return report_html(res, data, exclusions=exclusions, title=title)


@dataclass(frozen=True)
class _FileItem:
    """A file for a worker to read: its absolute path (the worker's working folder may
    differ) and the path as given (what the results table shows)."""

    path: str
    shown: str


def _source_chunk(spec: BatchSpec, items: list) -> list[list[BatchRow]]:
    """Worker task: each item a file path (read and fitted here) or one curve; the
    rows of each item, in order."""
    out = []
    for item in items:
        if isinstance(item, _FileItem):
            rows = []
            for sheet, table in _read_sheets(Path(item.path), spec):
                if isinstance(table, Exception):
                    text, _ = _problem_text(table)
                    rows.append(BatchRow(item.shown, sheet, "", ", ".join(spec.ys), error=text))
                    continue
                rows.extend(_row(spec, c) for c in _curves(table, sheet, spec, item.shown))
            out.append(rows)
        else:
            out.append([_row(spec, item)])
    return out


def _source_items(files: list[Path], spec: BatchSpec):
    """Small files go to the workers whole; a large file is read here and handed out
    curve by curve (so one long table of many groups is spread over the workers)."""
    for path in files:
        try:
            size = path.stat().st_size
            large = size > (LARGE_GROUPED_BYTES if spec.group is not None else LARGE_FILE_BYTES)
        except OSError:
            large = False
        if not large:
            yield _FileItem(os.path.abspath(path), str(path))
            continue
        for sheet, table in _read_sheets(path, spec):
            if isinstance(table, Exception):
                yield ((str(path), sheet, "", ", ".join(spec.ys)), table)
                continue
            yield from _curves(table, sheet, spec, str(path))


def _item_size(item) -> int:
    if isinstance(item, _FileItem):
        return _CHUNK_POINTS // _CHUNK_FILES
    return 1 if len(item) == 2 else int(np.size(item[1]))


def fit_sources(paths: Iterable, spec: BatchSpec, *, jobs: int | None = None, engine: str = "local",
                scheduler: str | None = None,
                progress: Callable[[int], None] | None = None) -> Iterator[BatchRow]:
    """Fit every curve of every file in ``paths`` (files or folders) with ``spec``'s
    method; yield one :class:`BatchRow` per curve, in file order (then sheet, y column,
    group in order of first appearance). Problems of a file or a curve become rows
    with ``error`` filled. A path that does not exist raises :class:`BatchError`
    before anything is fitted, as do a bad method and an unreachable engine."""
    _check_method(spec.model, spec.loss, spec.options)
    _check_run(engine, jobs, scheduler)
    if not isinstance(spec.model, str):
        raise BatchError("fit_sources takes the model as a built-in name or a formula text")
    files, problems = find_files(paths)
    if problems:
        raise BatchError("; ".join(problems))
    if not files:
        raise BatchError("no files to fit")
    items = _source_items(files, spec)
    chunks = _chunked(items, _item_size, _CHUNK_CURVES, _CHUNK_POINTS)
    on_done = None
    if progress is not None:
        def on_done(results):
            progress(sum(len(rows) for rows in results))
    def on_error(chunk, exc):
        text = f"the worker process failed ({type(exc).__name__}: {exc})"
        return [[BatchRow(item.shown, "", "", ", ".join(spec.ys), error=text)] if isinstance(item, _FileItem)
                else [BatchRow(*item[0], error=text)] for item in chunk]

    for results in _run(_source_chunk, spec, chunks, jobs=jobs, engine=engine, scheduler=scheduler,
                        on_done=on_done, on_error=on_error):
        for rows in results:
            yield from rows


# =========================================================================== output

def result_columns(param_names: Iterable[str]) -> list[str]:
    """Column names of the results table for a model with ``param_names``."""
    cols = ["source", "sheet", "group", "y", "n_used", "n_excluded", "converged"]
    for name in param_names:
        cols += [name, f"u({name})"]
    return cols + ["scale", "alpha", "warnings", "error"]


def row_cells(row: BatchRow, k: int) -> list:
    """One row's cells in the order of :func:`result_columns` for ``k`` parameters (None
    for an empty cell; a failed curve has None for every value and uncertainty)."""
    cells: list = [row.source, row.sheet, row.group, row.y, row.n_used, row.n_excluded,
                   None if row.converged is None else bool(row.converged)]
    if row.values:
        for v, u in zip(row.values, row.stderr):
            cells += [v, u]
    else:
        cells += [None] * (2 * k)
    return cells + [row.scale, row.alpha, row.warnings, row.error]


def rows_table(rows: Iterable[BatchRow], param_names) -> Iterator[list]:
    """The header, then one list of cells per row (None for an empty cell)."""
    names = list(param_names)
    yield result_columns(names)
    for row in rows:
        yield row_cells(row, len(names))


def _text_cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return repr(v)  # shortest text that reads back to the same double
    return str(v)


def write_rows(path, rows: Iterable[BatchRow], param_names, *,
               on_row: Callable[[BatchRow], None] | None = None) -> int:
    """Write the results table to ``path`` atomically (the old file stays until the new
    one is complete): CSV (UTF-8, full-precision numbers) unless the name ends in
    ``.xlsx``. ``rows`` may be a generator (it is consumed here; ``on_row`` sees each
    row). Returns the number of rows written."""
    import csv
    import io as _io

    path = Path(os.fspath(path))
    count = 0

    def counted():
        nonlocal count
        for row in rows:
            count += 1
            if on_row is not None:
                on_row(row)
            yield row

    table = rows_table(counted(), param_names)
    if path.suffix.lower() == ".xlsx":
        from openpyxl import Workbook
        from openpyxl.cell import WriteOnlyCell

        wb = Workbook(write_only=True)
        ws = wb.create_sheet("results")
        for cells in table:
            out = []
            for v in cells:
                if isinstance(v, float) and not np.isfinite(v):
                    v = repr(v)  # a workbook cell holds no NaN or infinity
                if isinstance(v, str) and v.startswith("="):
                    cell = WriteOnlyCell(ws, value=v)
                    cell.data_type = "s"  # text, never a formula
                    v = cell
                out.append(v)
            ws.append(out)
        buf = _io.BytesIO()
        wb.save(buf)
        write_atomically(path, buf.getbuffer())
        return count
    buf = _io.BytesIO()
    text = _io.TextIOWrapper(buf, encoding="utf-8", newline="", write_through=True)
    writer = csv.writer(text, lineterminator="\n")
    for cells in table:
        writer.writerow([_text_cell(v) for v in cells])
    text.flush()
    text.detach()
    write_atomically(path, buf.getbuffer())
    return count
