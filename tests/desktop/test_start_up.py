"""Start-up from a terminal: ``python -m desktop``, ``--version``, Ctrl+C, and the
check that names a missing display or missing Qt system libraries instead of letting
Qt abort with exit code 134 (issue: start-up and command line)."""
from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from desktop import app

ROOT = Path(__file__).resolve().parents[2]


def _env(**extra):
    env = dict(os.environ)
    env.update(extra)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    return env


def test_version_flag_prints_the_package_version():
    import fitcore

    out = subprocess.run([sys.executable, "-m", "desktop", "--version"], cwd=ROOT, check=False,
                         capture_output=True, text=True, env=_env(), timeout=60)
    assert out.returncode == 0
    assert out.stdout.strip() == f"ballast {fitcore.__version__}"


def test_no_display_is_named_not_aborted():
    env = {k: v for k, v in _env().items() if k not in ("QT_QPA_PLATFORM", "DISPLAY", "WAYLAND_DISPLAY")}
    if not sys.platform.startswith("linux"):
        pytest.skip("the xcb check applies to Linux only")
    out = subprocess.run([sys.executable, "-m", "desktop", "nothing.csv"], cwd=ROOT, check=False,
                         capture_output=True, text=True, env=env, timeout=60)
    assert out.returncode == 3  # not 134 (SIGABRT from Qt)
    assert "no display" in out.stderr and "QT_QPA_PLATFORM=offscreen" in out.stderr


def test_missing_xcb_libraries_are_named_with_their_packages(tmp_path, monkeypatch):
    plugin_dir = tmp_path / "platforms"
    plugin_dir.mkdir()
    (plugin_dir / "libqxcb.so").write_bytes(b"")
    monkeypatch.setattr(app, "_missing_libraries",
                        lambda plugin: ["libxcb-cursor.so.0", "libxkbcommon-x11.so.0"])
    text = app.display_problem({"DISPLAY": ":0"}, plugin_dir=plugin_dir)
    assert "libxcb-cursor.so.0" in text
    assert "sudo apt install libxcb-cursor0 libxkbcommon-x11-0" in text


def test_offscreen_and_wayland_skip_the_xcb_check():
    assert app.display_problem({"QT_QPA_PLATFORM": "offscreen"}) == ""
    if sys.platform.startswith("linux"):
        assert app._platform_name({"WAYLAND_DISPLAY": "wayland-0", "XDG_SESSION_TYPE": "wayland"}) == "wayland"


def test_ctrl_c_in_the_terminal_closes_the_window(tmp_path):
    env = _env(QT_QPA_PLATFORM="offscreen", HOME=str(tmp_path), XDG_CONFIG_HOME=str(tmp_path / "cfg"),
               XDG_DATA_HOME=str(tmp_path / "data"), XDG_RUNTIME_DIR=str(tmp_path / "run"))
    (tmp_path / "run").mkdir(mode=0o700)
    sample = ROOT / "sample_sets" / "01_photometric_calibration.csv"
    proc = subprocess.Popen([sys.executable, "-m", "desktop", str(sample)],
                            cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        # wait until the QApplication exists (its platform plugin is loaded): the handler is
        # installed right after it
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and proc.poll() is None:
            time.sleep(1.0)
            status = Path(f"/proc/{proc.pid}/status")
            if status.exists() and "State:\tS" in status.read_text() and _loaded_qt(proc.pid):
                break
        assert proc.poll() is None, proc.stderr.read()
        time.sleep(1.0)
        proc.send_signal(signal.SIGINT)
        code = proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert code == 0


def _loaded_qt(pid: int) -> bool:
    try:
        return "libqoffscreen" in Path(f"/proc/{pid}/maps").read_text()
    except OSError:
        return False


def test_exit_after_first_fit_hook_reports_the_fitted_window(tmp_path):
    """``BALLAST_EXIT_AFTER_FIRST_FIT=1 ballast FILE`` (bench/bench_start.py's hook): the
    window opens the file through the real start path (the early job child, the read and
    the trial fit in it, a four-column table's column dialog answered with its own
    choice), says so once the first fit is on screen, and closes."""
    env = _env(QT_QPA_PLATFORM="offscreen", HOME=str(tmp_path), XDG_CONFIG_HOME=str(tmp_path / "cfg"),
               XDG_DATA_HOME=str(tmp_path / "data"), XDG_RUNTIME_DIR=str(tmp_path / "run"),
               BALLAST_EXIT_AFTER_FIRST_FIT="1")
    (tmp_path / "run").mkdir(mode=0o700)
    sample = ROOT / "sample_sets" / "02_tracer_decay.csv"
    out = subprocess.run([sys.executable, "-m", "desktop", str(sample)], cwd=ROOT, check=False,
                         capture_output=True, text=True, env=env, timeout=180)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.splitlines() == ["ballast: first fit on screen"]
