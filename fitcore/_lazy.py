"""Third-party modules imported on their first use.

scipy costs 0.3-1 s to import, and much of what uses fitcore needs none of it before
its first fit: ``import fitcore``, reading a table, the window opening a file and
showing the fit its analysis process made (issue 12, window start). A module that
uses scipy binds a :class:`LazyModule` in place of the import::

    optimize = LazyModule("scipy.optimize", globals())  # lazy: why

The first attribute looked up on it imports the real module and puts it in the
stand-in's place in that module's namespace, so later uses cost nothing extra.
"""
from __future__ import annotations

import importlib


class LazyModule:
    """Stand-in for the module ``name``, bound as ``binding`` (default: the name's last
    part) in ``namespace`` (the using module's ``globals()``)."""

    __slots__ = ("_name", "_namespace", "_binding")

    def __init__(self, name: str, namespace: dict, binding: str | None = None):
        self._name = name
        self._namespace = namespace
        self._binding = binding or name.rpartition(".")[2]

    def _load(self):
        module = importlib.import_module(self._name)
        if self._namespace.get(self._binding) is self:
            self._namespace[self._binding] = module
        return module

    def __getattr__(self, attr):
        return getattr(self._load(), attr)

    def __repr__(self) -> str:
        return f"<module {self._name!r}, imported on first use>"
