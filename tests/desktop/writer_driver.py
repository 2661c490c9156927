"""Writer processes for tests/desktop/test_writer_kills.py (issue 16).

``python writer_driver.py fork`` is a fork server: it imports the writers once (no
QApplication, one thread, so forking is safe), prints ``{"imported": true}``, reads a
line ``FOLDER<tab>PAYLOADS<tab>REGISTRY``, writes each kind's payload A to
``FOLDER/target.<suffix>``, prints ``{"ready": ..., "write_s": {kind: s}}``
and then, for each ``go KIND`` line on stdin, forks a writer process that writes the
kind's two payloads over the target in turn, for ever, through the project's write path
(the same calls the window's writers make after rendering: ``save_session_text``,
``ReportExporter._write_text``, ``write_atomically`` with ``check_png``/``check_svg``,
and for the PDF the printer's temporary file then ``install_printed_pdf``). It prints
``{"pid": n}``, waits until the test has killed that process and prints how it ended.
PAYLOADS is a folder holding ``<kind>.a`` and ``<kind>.b`` (files made by the window's
own writers); REGISTRY is the list of written folders (note_written_folders_in).

``python writer_driver.py full FOLDER MODE DATA RECOVERY`` opens DATA in a real window and,
for each writer, writes a good file into FOLDER, makes the disk full (MODE ``tmpfs``:
FOLDER is a small tmpfs, filled up with a filler file; ``rlimit``: RLIMIT_FSIZE 0, so
every write to a file fails with EFBIG), writes again through the window's writer and
prints one JSON line: what the writer returned, the error messages it showed, whether
the old file is unchanged and what temporary files were left.
"""
from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

SUFFIX = {"session": ".ballast", "html": ".html", "pdf": ".pdf", "png": ".png", "svg": ".svg", "csv": ".csv"}


def say(**kw) -> None:
    sys.stdout.write(json.dumps(kw) + "\n")
    sys.stdout.flush()


def window_writers(win, png=(400, 300), svg=(400, 300)) -> dict:
    """The window's own writer of each kind: ``write[kind](path) -> truthy on success``."""
    return {
        "session": lambda p: win.sessions.save_to(p),
        "html": lambda p: win.reports.write_html(p),
        "pdf": lambda p: win.reports.write_pdf(p),
        "png": lambda p: win.reports.write_plot(p, png),
        "svg": lambda p: win.reports.write_plot(p, svg),
        "csv": lambda p: win.reports.write_points_csv(p),
    }


def writer(kind: str, target: Path):
    """The project's write call for ``kind`` (what the window runs once the bytes exist)."""
    from types import SimpleNamespace

    from desktop import report_export as rx
    from fitcore import session as fs

    if kind == "session":
        return lambda data: fs.save_session_text(target, data.decode("utf-8"))
    if kind in ("html", "csv"):
        quiet = SimpleNamespace(window=None, _status=lambda text: None)

        def text(data):
            if not rx.ReportExporter._write_text(quiet, str(target), data.decode("utf-8"), kind):
                os._exit(3)
        return text
    if kind in ("png", "svg"):
        check = rx.check_png if kind == "png" else rx.check_svg
        return lambda data: fs.write_atomically(target, data, verify=check)
    if kind == "pdf":
        def pdf(data):
            fd, tmp = fs.temporary_beside(os.path.abspath(target))
            try:
                with os.fdopen(fd, "wb") as fh:  # what Qt's printer writes, page by page
                    for i in range(0, len(data), 16384):
                        fh.write(data[i:i + 16384])
                rx.install_printed_pdf(tmp, str(target))
            finally:
                try:
                    os.unlink(tmp)
                except OSError:
                    pass
        return pdf
    raise ValueError(kind)


def fork_server() -> int:
    import threading

    from desktop import report_export  # noqa: F401 - imported before the payloads arrive
    from fitcore import session as fs

    say(imported=True)
    folder, payloads, registry = (Path(p) for p in sys.stdin.readline().rstrip("\n").split("\t"))
    fs.note_written_folders_in(registry)
    kinds = sorted(SUFFIX)
    data = {k: ((payloads / f"{k}.a").read_bytes(), (payloads / f"{k}.b").read_bytes()) for k in kinds}
    targets = {k: folder / f"target{SUFFIX[k]}" for k in kinds}
    writes = {k: writer(k, targets[k]) for k in kinds}
    times = {}
    for k in kinds:
        a, b = data[k]
        t0 = time.perf_counter()
        for payload in (b, a, b, a):
            writes[k](payload)
        times[k] = (time.perf_counter() - t0) / 4
    threads = len(os.listdir("/proc/self/task")) if os.path.isdir("/proc/self/task") else threading.active_count()
    say(ready=True, write_s=times, threads=threads)
    for line in sys.stdin:
        cmd = line.split()
        if not cmd or cmd[0] == "quit":
            break
        k = cmd[1]
        now = targets[k].read_bytes()
        a, b = data[k]
        order = (a, b) if now == b else (b, a)  # first the other one, then back
        pid = os.fork()
        if pid == 0:
            try:
                i = 0
                while True:
                    writes[k](order[i % 2])
                    i += 1
            finally:
                os._exit(4)
        say(pid=pid)
        _, status = os.waitpid(pid, 0)
        say(reaped=pid, signal=os.WTERMSIG(status) if os.WIFSIGNALED(status) else 0,
            code=os.WEXITSTATUS(status) if os.WIFEXITED(status) else None)
    return 0


def _fill(folder: Path) -> Path:
    """Fill the file system of ``folder`` to the last byte."""
    filler = folder / "filler"
    with open(filler, "wb", buffering=0) as fh:
        for size in (1 << 16, 4096, 512, 1):
            block = b"\0" * size
            try:
                while True:
                    fh.write(block)
            except OSError:
                pass
    return filler


def full_disk(folder: Path, mode: str, data: str, recovery: str) -> int:
    import resource

    from PySide6.QtCore import QSettings
    from PySide6.QtWidgets import QApplication

    app = QApplication([])
    from desktop import dialogs
    from desktop.main_window import MainWindow

    shown = []
    dialogs.error_box = lambda parent, title, text: shown.append(f"{title}: {text}")
    dialogs.ask_text = lambda parent, title, label: ""
    win = MainWindow(QSettings(str(Path(recovery) / "full.ini"), QSettings.IniFormat), recovery_dir=recovery)
    assert win.open_path(data)
    win.runner.wait(60000)
    write = window_writers(win)
    for kind in sorted(SUFFIX):
        out = folder / f"out{SUFFIX[kind]}"
        first = bool(write[kind](str(out)))
        before = out.read_bytes() if out.exists() else b""
        shown.clear()
        filler = None
        if mode == "tmpfs":
            filler = _fill(folder)
            free = os.statvfs(folder).f_bavail
        else:
            soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
            resource.setrlimit(resource.RLIMIT_FSIZE, (0, hard))
            free = None
        try:
            second = bool(write[kind](str(out)))
        finally:
            if filler is not None:
                filler.unlink()
            else:
                resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
        left = sorted(p.name for p in folder.iterdir() if p.name.endswith(".tmp"))
        say(kind=kind, first=first, second=second, errors=list(shown), same=out.read_bytes() == before,
            size=len(before), free_blocks=free, debris=left)
    win.close()
    app.processEvents()
    return 0


def main() -> int:
    mode = sys.argv[1]
    if mode == "fork":
        return fork_server()
    if mode == "full":
        return full_disk(Path(sys.argv[2]), sys.argv[3], sys.argv[4], sys.argv[5])
    raise SystemExit(f"unknown mode {mode}")


if __name__ == "__main__":
    sys.exit(main())
