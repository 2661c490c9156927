"""Python's own ``__import__`` back in place after PySide6 loads (for this process).

Importing PySide6 replaces ``builtins.__import__`` by shiboken's C function
``__feature_import__`` (the machinery behind ``from __feature__ import snake_case``).
After each import of a module it has not seen, the hook calls
``shibokensupport.feature._mod_uses_pyside(module)``, i.e. ``inspect.getsource``: a walk
over ``sys.modules``, inspect's and linecache's shared caches, the whole source read and
split. The window imports on several threads at once (scipy after the first paint in
``app._import_fitting_later``; sympy for formula models inside fits on the jobs' worker
thread; fitcore's lazy modules wherever first used). The hook is not made for that: with
four threads importing 80 fresh modules through it, it recorded 13 of them (all 20 when
one thread imports), so it keeps process-wide state that the threads overwrite.
(The desktop tests' rare segfault during a sympy import on a worker thread was NOT this hook: its trace shows the
GUI thread crashing while garbage-collecting left-over windows, and it happened as often
with this module in place; tests/desktop/conftest.py's per-test gc.collect is that fix.
This module is hardening: foreign, thread-unsafe code off every import path.)

Ballast never uses ``from __feature__``: without the hook a module simply has no feature
entry, which shiboken treats like its "ignore this module" (-1) or "no feature" (0).
Star imports, pyqtgraph and every window test work without it, and a cached
``import`` statement costs ~0.1 us instead of ~1 us. shiboken keeps the original function
only in C; it is found among the interpreter's objects (gc) unless it was remembered
here first (this module imported before PySide6).
"""
from __future__ import annotations

import builtins
import sys

_BUILTIN_IMPORT = builtins.__import__ if "shiboken6" not in sys.modules else None


def _python_import():
    """Python's built-in ``__import__`` function object, or None if it cannot be found."""
    if _BUILTIN_IMPORT is not None and getattr(_BUILTIN_IMPORT, "__self__", None) is builtins:
        return _BUILTIN_IMPORT
    import gc

    for obj in gc.get_objects():
        if (type(obj) is type(len) and getattr(obj, "__name__", None) == "__import__"
                and getattr(obj, "__self__", None) is builtins):
            return obj
    return None


def restore_python_import() -> bool:
    """Load PySide6 (if not yet) and put Python's ``__import__`` back; idempotent.

    Returns False, changing nothing, when the original cannot be found (the program
    works either way, with the hook's per-import check).
    """
    import PySide6.QtCore  # noqa: F401 - installs the hook, so that it is replaced now

    current = builtins.__import__
    if getattr(current, "__self__", None) is builtins and current.__name__ == "__import__":
        return True  # no hook (another PySide6) or already restored
    original = _python_import()
    if original is None:
        return False
    builtins.__import__ = original
    return True
