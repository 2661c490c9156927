"""Every export goes through fitcore.session.write_atomically (issue 16): on a full disk
(simulated here: the write fails with ENOSPC half way, as a small tmpfs would) the old file
stays and the user is told; what is written is checked before it replaces the old file
(a PDF ends with its trailer, a PNG decodes); new files honour the umask; a symlink is
written through; debris of dead writers is removed."""
from __future__ import annotations

import errno
import os
import subprocess
import sys
import time

import pytest

from desktop import report_export
from fitcore import session as fs

pytest.importorskip("PySide6")


@pytest.fixture
def win(open_window, tmp_path, write_demo_csv):
    w = open_window(1300, 820, recovery_dir=tmp_path / "recovery")
    assert w.open_path(str(write_demo_csv(tmp_path / "line.csv")))
    assert w.runner.wait()
    return w


WRITERS = {
    "session": (".ballast", lambda w, p: w.sessions.save_to(p)),
    "html": (".html", lambda w, p: w.reports.write_html(p)),
    "pdf": (".pdf", lambda w, p: w.reports.write_pdf(p)),
    "png": (".png", lambda w, p: w.reports.write_plot(p, (300, 200))),
    "svg": (".svg", lambda w, p: w.reports.write_plot(p, (300, 200))),
    "csv": (".csv", lambda w, p: w.reports.write_points_csv(p)),
}


class _HalfThenFull:
    """A file object whose write stores half the bytes, then fails as a full disk does."""

    def __init__(self, fh):
        self.fh = fh

    def write(self, data):
        self.fh.write(data[: len(data) // 2])
        self.fh.flush()
        raise OSError(errno.ENOSPC, "No space left on device")

    def __getattr__(self, name):
        return getattr(self.fh, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.fh.close()


@pytest.mark.parametrize("kind", sorted(WRITERS))
def test_full_disk_keeps_the_old_file_and_says_so(win, tmp_path, monkeypatch, errors, kind):
    suffix, write = WRITERS[kind]
    out = tmp_path / f"out{suffix}"
    assert write(win, str(out))
    before = out.read_bytes()
    errors.clear()
    real_fdopen = os.fdopen
    monkeypatch.setattr(fs.os, "fdopen", lambda fd, *a, **k: _HalfThenFull(real_fdopen(fd, *a, **k)))
    assert not write(win, str(out))
    monkeypatch.undo()
    assert out.read_bytes() == before  # the old, complete file
    assert errors and "No space left" in errors[-1][1]
    assert not [p for p in tmp_path.iterdir() if p.name.endswith((".tmp", ".part"))]


class _HalfSilently(_HalfThenFull):
    """A file object that stores half the bytes and reports success (a lying device)."""

    def write(self, data):
        self.fh.write(data[: len(data) // 2])
        return len(data)


def test_a_short_write_that_reports_success_is_caught(tmp_path, monkeypatch):
    target = tmp_path / "keep.ballast"
    target.write_bytes(b"the old, complete file")
    real_fdopen = os.fdopen
    monkeypatch.setattr(fs.os, "fdopen", lambda fd, *a, **k: _HalfSilently(real_fdopen(fd, *a, **k)))
    with pytest.raises(OSError, match="only 50 of 100 bytes were written"):
        fs.write_atomically(target, b"n" * 100)
    monkeypatch.undo()
    assert target.read_bytes() == b"the old, complete file"
    assert [p.name for p in tmp_path.iterdir()] == ["keep.ballast"]


def test_a_truncated_pdf_or_png_is_not_accepted(tmp_path):
    good_pdf = b"%PDF-1.4\n1 0 obj\n<<>>\nendobj\nstartxref\n123\n%%EOF\n"
    p = tmp_path / "a.pdf"
    p.write_bytes(good_pdf)
    report_export.check_pdf(p)
    p.write_bytes(good_pdf[: len(good_pdf) // 2])  # the issue: a cut PDF was reported as written
    with pytest.raises(ValueError, match="trailer"):
        report_export.check_pdf(p)
    q = tmp_path / "a.png"
    q.write_bytes(b"\x89PNG\r\n\x1a\n" + b"\0" * 40)
    with pytest.raises(ValueError):
        report_export.check_png(q)
    target = tmp_path / "keep.pdf"
    target.write_bytes(good_pdf)
    with pytest.raises(OSError, match="did not check out"):
        fs.write_atomically(target, good_pdf[:20], verify=report_export.check_pdf)
    assert target.read_bytes() == good_pdf


@pytest.mark.parametrize("kind", sorted(WRITERS))
def test_umask_and_symlink_for_every_writer(win, tmp_path, kind):
    suffix, write = WRITERS[kind]
    old = os.umask(0o077)
    try:
        out = tmp_path / f"private{suffix}"
        assert write(win, str(out))
        assert out.stat().st_mode & 0o777 == 0o600  # was 0644 whatever the umask
    finally:
        os.umask(old)
    os.chmod(out, 0o640)
    assert write(win, str(out))
    assert out.stat().st_mode & 0o777 == 0o640  # a replaced file keeps its mode
    real = tmp_path / "real" / f"target{suffix}"
    real.parent.mkdir()
    link = tmp_path / f"link{suffix}"
    assert write(win, str(real))
    link.symlink_to(real)
    real.write_bytes(b"old")
    assert write(win, str(link))
    assert link.is_symlink() and os.readlink(link) == str(real)  # the link stays, its target is new
    assert real.read_bytes() != b"old" and real.stat().st_size > 100
    assert not [p for p in tmp_path.rglob("*") if p.name.endswith(".tmp")]


def test_debris_of_dead_writers_goes_and_nothing_else(win, tmp_path):
    real = tmp_path / "real.ballast"
    assert win.sessions.save_to(str(real))
    # debris of a writer that died (its pid no longer runs) goes at the next write once
    # it is older than DEBRIS_MIN_AGE_S; young debris, live writers' files and other names stay
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True, check=True).stdout.strip()
    old_t = time.time() - fs.DEBRIS_MIN_AGE_S - 5
    debris = tmp_path / f".real.ballast.{dead}.abc12_yz.tmp"
    young = tmp_path / f".real.ballast.{dead}.young123.tmp"
    alive = tmp_path / f".real.ballast.{os.getppid()}.alive123.tmp"  # pytest's parent runs
    other = [tmp_path / n for n in (f".real.ballast.{dead}.ABCDEFGH.tmp", "real.ballast.tmp", ".real.ballast.part",
                                    f".other.ballast.{dead}.abc12_yz.tmp")]
    for p in [debris, young, alive, *other]:
        p.write_bytes(b"half")
    for p in [debris, alive, *other]:
        os.utime(p, (old_t, old_t))
    assert win.sessions.save_to(str(real))
    assert not debris.exists()
    assert young.exists() and alive.exists() and all(p.exists() for p in other)
