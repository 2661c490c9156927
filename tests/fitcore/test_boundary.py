"""House rules that keep fitcore and the window's pure modules free of Qt (common practice, cf.
napari's import contracts), and the library free of code execution."""
from __future__ import annotations

import ast
import pkgutil
import subprocess
import sys
from pathlib import Path

import pytest

import fitcore

FITCORE = Path(fitcore.__file__).parent


QT = ("PySide6", "pyqtgraph", "shiboken6")


def _fitcore_modules() -> list[str]:
    """Every module of fitcore, subpackages (fitcore.solvers) included."""
    return sorted(m.name for m in pkgutil.walk_packages([str(FITCORE)], prefix="fitcore."))


def _loaded_after_import(module: str, prefixes) -> list[str]:
    """The modules under ``prefixes`` that importing ``module`` alone, in a fresh
    interpreter, leaves in sys.modules."""
    code = (
        "import importlib, sys\n"
        f"importlib.import_module({module!r})\n"
        f"print(','.join(m for m in sys.modules if m.split('.')[0] in {tuple(prefixes)!r}))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         cwd=str(FITCORE.parent))
    assert out.returncode == 0, f"import {module} failed: {out.stderr[-800:]}"
    return [m for m in out.stdout.strip().split(",") if m]


def test_fitcore_imports_no_qt():
    mods = _fitcore_modules()
    assert "fitcore.solvers.setup" in mods  # the walk reaches the subpackage
    code = (
        "import importlib, sys\n"
        f"for m in {mods!r}: importlib.import_module(m)\n"
        f"bad = [m for m in sys.modules if m.split('.')[0] in {QT!r}]\n"
        "print(','.join(bad)); sys.exit(1 if bad else 0)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, f"fitcore pulled in Qt modules: {out.stdout} {out.stderr[-500:]}"


def test_no_code_execution_primitives_in_the_library():
    # formulas and sessions must never execute code: no eval/exec/compile calls, no pickle
    for path in FITCORE.rglob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
                assert node.func.id not in ("eval", "exec"), f"{path.name}:{node.lineno} calls {node.func.id}"
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                names = [a.name for a in node.names] + [getattr(node, "module", "") or ""]
                assert not any(n.split(".")[0] in ("pickle", "dill", "marshal") for n in names), \
                    f"{path.name}:{node.lineno} imports a pickle-like module"


# The window's modules meant to be pure (checked one by one: only these have no Qt):
# its document (data set, method, exclusion record) and the job kinds that run in the
# analysis child process. desktop.commands is not among them: its undo commands are
# QUndoCommands.
PURE_DESKTOP = ("desktop", "desktop.document", "desktop.job_kinds")


@pytest.mark.parametrize("module", PURE_DESKTOP)
def test_the_windows_pure_modules_import_no_qt(module):
    # imported alone in a fresh interpreter, so a failure names the module that did it
    assert _loaded_after_import(module, QT) == []


@pytest.mark.parametrize("module", PURE_DESKTOP[1:])
def test_the_windows_pure_modules_name_no_qt_anywhere(module):
    # not even inside a function (where the import test above cannot see it)
    path = FITCORE.parent / (module.replace(".", "/") + ".py")
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            names = [a.name for a in node.names] + [getattr(node, "module", "") or ""]
            assert not any(n.split(".")[0] in QT for n in names), f"{path.name}:{node.lineno} imports Qt"


def test_the_launcher_loads_neither_qt_nor_numpy_on_import():
    # desktop.app (the `ballast` command) sets one BLAS thread before numpy loads and
    # looks for a display before Qt loads (else a missing display would be an abort in
    # Qt's own words): importing it must load neither
    loaded = _loaded_after_import("desktop.app", QT + ("numpy",))
    assert loaded == []


def test_importing_fitcore_loads_no_scipy_until_a_fit_runs():
    # scipy costs 0.3-1 s to import; the window shows a fit made in its analysis process
    # without it (issue 12, window start), so no fitcore module may import it at module
    # level (fitcore._lazy.LazyModule stands in until first use). A fit then loads it.
    mods = [m for m in _fitcore_modules() if m != "fitcore.formula"]  # the formula parser loads sympy only
    code = (
        "import importlib, sys\n"
        f"for m in {mods!r}: importlib.import_module(m)\n"
        "before = [m for m in sys.modules if m.split('.')[0] == 'scipy']\n"
        "import fitcore\n"
        "res = fitcore.fit('line', [0.0, 1.0, 2.0, 3.0, 4.0], [0.1, 1.0, 2.1, 2.9, 4.2], loss='huber')\n"
        "print(','.join(before)); print(type(sys.modules['fitcore.solvers.lm'].lapack).__name__)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         cwd=str(FITCORE.parent))
    assert out.returncode == 0, out.stderr[-800:]
    before, lapack_type = out.stdout.splitlines()
    assert before == ""
    assert lapack_type == "module"  # the stand-in replaced itself with the real module
