"""Shared test configuration: the environment every run gets, and the reference data.

The environment is set here, before any test module imports numpy or Qt, so that
``python -m pytest`` runs the same way from a shell, from the README and from ``.ci/run``:
one BLAS/OpenMP thread (small robust fits are slower with two threads on 2-core machines,
and child processes inherit the setting) and Qt's offscreen platform (no window appears).

The reference data live under tests/reference/data/ (sources in tests/README.md and
tests/reference/data/README.md); BALLAST_REFERENCE may point at another copy of the same
layout.
"""
from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"
os.environ["QT_QPA_PLATFORM"] = "offscreen"

from pathlib import Path  # noqa: E402 - after the environment above

import pytest  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
REFERENCE = Path(os.environ.get("BALLAST_REFERENCE") or Path(__file__).resolve().parent / "reference" / "data")

# Also limit a BLAS that a plugin loaded before this file was read.
_THREAD_LIMIT = threadpool_limits(limits=1)


@pytest.fixture(scope="session")
def reference_dir() -> Path:
    # The data ship with the tests: an absent folder is a broken checkout, not a reason to skip.
    if not (REFERENCE / "nist-strd").is_dir() or not (REFERENCE / "robust").is_dir():
        pytest.fail(f"reference data folder {REFERENCE} is incomplete (expected nist-strd/ and robust/ "
                    "inside it; the copy in the project is tests/reference/data/)", pytrace=False)
    return REFERENCE


@pytest.fixture(scope="session")
def work_strategies():
    """The hypothesis strategies of tests/work_strategies.py (methods, option values),
    shared by the library's and the window's round-trip tests."""
    import importlib.util

    spec = importlib.util.spec_from_file_location(
        "ballast_work_strategies", Path(__file__).with_name("work_strategies.py"))
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(autouse=True)
def automatic_garbage_collection_outside_windows(request):
    """A window (desktop.gui_gc) switches Python's automatic garbage collector off for the
    process and collects from a GUI-thread timer; tests that run no event loop (the
    library's, after window tests in the same run) get the automatic collector back."""
    import sys

    gui_gc = sys.modules.get("desktop.gui_gc")
    try:
        area = Path(str(request.node.fspath)).resolve().relative_to(ROOT / "tests").parts[0]
    except (ValueError, IndexError):
        area = ""
    if gui_gc is not None and area != "desktop":
        gui_gc.uninstall()
    yield
