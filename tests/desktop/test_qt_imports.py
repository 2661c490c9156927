"""desktop/qt_imports.py: Python's own ``__import__`` back after PySide6 loads.

Hardening, not a crash fix (the rare segfault of tests/desktop was a collection in the GUI
thread, see desktop/qt_imports.py; the hook race is not deterministic). What this test checks
every time, in a fresh interpreter (the hook is process-wide): after the call, four threads
and the main thread import 200 fresh modules at once and the process exits cleanly with
all of them loaded, without shiboken's per-import check (``inspect.getsource``, which the
hook runs for each new module, is made to count its calls), and PySide6 still works
(star import, a widget). Common practice: the hook comes from shiboken's feature.py.
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]

SCRIPT = textwrap.dedent('''
    import builtins, inspect, json, sys, threading
    sys.path.insert(0, sys.argv[1])
    calls = []
    real_getsource = inspect.getsource
    def counting(obj):
        calls.append(getattr(obj, "__name__", "?"))
        return real_getsource(obj)
    inspect.getsource = counting

    from desktop.qt_imports import restore_python_import
    restored = restore_python_import()
    before = len(calls)

    def load(names):
        for name in names:
            builtins.__import__(name)  # an import statement's path (import_module skips the hook)
    names = [f"throwaway_{i}" for i in range(int(sys.argv[2]))]
    threads = [threading.Thread(target=load, args=(names[k::4],)) for k in range(4)]
    for t in threads:
        t.start()
    load(["email.mime.text", "xml.dom.minidom", "unittest.mock", "json.tool"])
    for t in threads:
        t.join()
    from PySide6.QtWidgets import *  # noqa: F403 - the case shiboken's hook once handled
    app = QApplication([])  # noqa: F405
    box = QCheckBox("x")  # noqa: F405
    print(json.dumps({"restored": restored, "checks": calls[before:], "loaded": sum(n in sys.modules for n in names),
                      "text": box.text()}))
''')


def test_threads_import_without_shibokens_hook(tmp_path):
    n = 200
    for i in range(n):
        mention = "from PySide6 import QtCore  # noqa\n" if i % 2 else ""
        body = "".join(f"def f{j}(x):\n    return x + {j}\n" for j in range(30))
        (tmp_path / f"throwaway_{i}.py").write_text(mention + body, encoding="utf-8")
    script = tmp_path / "run.py"
    script.write_text(SCRIPT, encoding="utf-8")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(tmp_path), str(ROOT)]), QT_QPA_PLATFORM="offscreen")
    run = subprocess.run([sys.executable, "-X", "faulthandler", str(script), str(ROOT), str(n)],
                         capture_output=True, text=True, env=env, timeout=120, cwd=tmp_path)
    assert run.returncode == 0, run.stderr[-3000:]
    seen = json.loads(run.stdout.strip().splitlines()[-1])
    assert seen["restored"] is True
    assert seen["checks"] == []  # the hook would have read the source of each new module
    assert seen["loaded"] == n
    assert seen["text"] == "x"
