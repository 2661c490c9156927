"""House rules that keep fitcore a pure library (common practice, cf. napari's import contracts)."""
from __future__ import annotations

import ast
import pkgutil
import subprocess
import sys
from pathlib import Path

import fitcore

FITCORE = Path(fitcore.__file__).parent


def test_fitcore_imports_no_qt():
    mods = [m.name for m in pkgutil.iter_modules([str(FITCORE)])]
    code = (
        "import importlib, sys\n"
        f"for m in {mods!r}: importlib.import_module('fitcore.' + m)\n"
        "bad = [m for m in sys.modules if m.split('.')[0] in ('PySide6', 'pyqtgraph', 'shiboken6')]\n"
        "print(','.join(bad)); sys.exit(1 if bad else 0)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, f"fitcore pulled in Qt modules: {out.stdout} {out.stderr[-500:]}"


def test_no_code_execution_primitives_in_the_library():
    # formulas and sessions must never execute code: no eval/exec/compile calls, no pickle
    for path in FITCORE.glob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
                assert node.func.id not in ("eval", "exec"), f"{path.name}:{node.lineno} calls {node.func.id}"
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                names = [a.name for a in node.names] + [getattr(node, "module", "") or ""]
                assert not any(n.split(".")[0] in ("pickle", "dill", "marshal") for n in names), \
                    f"{path.name}:{node.lineno} imports a pickle-like module"


def test_the_windows_pure_modules_import_no_qt():
    # the window's document (its state: data set, method, exclusion record) and the
    # analysis child process's module stay free of Qt, like fitcore
    code = (
        "import importlib, sys\n"
        "for m in ('desktop.document', 'desktop.job_kinds', 'fitcore.work'):\n"
        "    importlib.import_module(m)\n"
        "bad = [m for m in sys.modules if m.split('.')[0] in ('PySide6', 'pyqtgraph', 'shiboken6')]\n"
        "print(','.join(bad)); sys.exit(1 if bad else 0)\n"
    )
    root = FITCORE.parent
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         cwd=str(root))
    assert out.returncode == 0, f"a pure module pulled in Qt: {out.stdout} {out.stderr[-500:]}"
