"""One BLAS thread for small problems.

numpy's BLAS starts as many threads as there are cores. On a 25-point fit the threads
cost more than they save: each small matrix product or factorisation wakes them, and on
a busy 2-core machine a woken thread waits for a core. Measured on this machine class
(issue 12): 300 least-squares line fits took 3.4-8.9 s with the default two threads
against 1.0-1.1 s with one.

:func:`small_problem` is a context manager that sets the loaded BLAS libraries to one
thread while its body runs and restores the previous count afterwards. Nesting and
concurrent use from several Python threads are counted, so the count is restored only
when the last user leaves. It is cheap (a couple of microseconds per use: the libraries
are found once, with threadpoolctl, and the thread count is then set directly).
Without threadpoolctl, or without a BLAS it knows, it does nothing. OpenBLAS takes
the setting from the main thread only (a call from another Python thread was seen to
leave the count unchanged), so a program that fits in worker threads should set the
count for the process before numpy loads (``OPENBLAS_NUM_THREADS=1``), as the window
does.

:func:`limit_process` sets one BLAS thread for the whole process (the window, whose
problems are small, and the bootstrap's worker processes).
"""
from __future__ import annotations

import threading
from contextlib import contextmanager

SMALL = 200_000  # problems with at most this many Jacobian entries (n * p) are small

_lock = threading.Lock()
_depth = 0
_saved: list = []
_libs: list | None = None


def _blas_libraries() -> list:
    global _libs
    if _libs is None:
        try:
            import scipy.linalg  # noqa: F401 - load scipy's own BLAS before looking
            from threadpoolctl import ThreadpoolController
            _libs = [c for c in ThreadpoolController().lib_controllers
                     if c.user_api == "blas"]
        except Exception:  # noqa: BLE001 - threadpoolctl absent or no BLAS found: nothing to limit
            _libs = []
    return _libs


@contextmanager
def small_problem(size: int = 0):
    """Run the body with one BLAS thread when ``size`` (Jacobian entries) is small."""
    if size > SMALL:
        yield
        return
    global _depth
    with _lock:
        if _depth == 0:
            _saved.clear()
            for lib in _blas_libraries():
                try:
                    n = lib.get_num_threads()
                    if n is not None and n > 1:
                        lib.set_num_threads(1)
                        _saved.append((lib, n))
                except Exception:  # noqa: BLE001 - a library that refuses keeps its count
                    pass
        _depth += 1
    try:
        yield
    finally:
        with _lock:
            _depth -= 1
            if _depth == 0:
                for lib, n in _saved:
                    try:
                        lib.set_num_threads(n)
                    except Exception:  # noqa: BLE001
                        pass
                _saved.clear()


def limit_process(threads: int = 1) -> None:
    """Set every loaded BLAS library of this process to ``threads`` threads."""
    for lib in _blas_libraries():
        try:
            lib.set_num_threads(threads)
        except Exception:  # noqa: BLE001 - a library that refuses keeps its count
            pass


__all__ = ["small_problem", "limit_process", "SMALL"]
