"""fitcore._lazy.LazyModule: a module imported on its first use (issue 12, window start).
Reference: Python's import system (importlib), common practice."""
from __future__ import annotations

import os
import sys

import pytest

from fitcore._lazy import LazyModule


def test_stand_in_imports_on_first_use_and_replaces_itself():
    ns = {}
    ns["json"] = LazyModule("json", ns)
    assert "<module 'json', imported on first use>" == repr(ns["json"])
    assert ns["json"].dumps([1, 2]) == "[1, 2]"  # the real module's function
    assert ns["json"] is sys.modules["json"]  # and from now on the module itself


def test_binding_name_and_a_missing_name():
    ns = {}
    ns["pp"] = LazyModule("os.path", ns, "pp")
    assert ns["pp"].join("a", "b") == os.path.join("a", "b")
    assert ns["pp"] is sys.modules[ns["pp"].__name__]
    ns2 = {}
    ns2["mod"] = LazyModule("json", ns2)  # bound under another name than its own: left as it is
    ns2["mod"].loads("1")
    assert isinstance(ns2["mod"], LazyModule)


def test_an_unknown_module_fails_on_use_with_the_import_error():
    ns = {}
    ns["nothing_here"] = LazyModule("no_such_module_xyz", ns)
    with pytest.raises(ModuleNotFoundError, match="no_such_module_xyz"):
        ns["nothing_here"].dumps([])
