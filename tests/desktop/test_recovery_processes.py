"""Recovery with real processes (issue 16): two and three windows at once, SIGKILL at
random moments during steady work (a change every 120 ms, so a restarting quiet-time
timer would never fire). Checks: no window reads, offers or deletes a running window's
recovery file; after a kill, the orphaned file holds the state after some change made
no earlier than the last change older than the autosave bound (plus scheduling slack
on a loaded 2-core machine); a window started later offers exactly the orphans.
"""
from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from fitcore import session as fs

DRIVER = Path(__file__).with_name("recovery_driver.py")
DATA = Path(__file__).resolve().parents[2] / "sample_sets" / "01_photometric_calibration.csv"
AUTOSAVE_MS = 600
SLACK_S = 2.5  # scheduling slack on a loaded machine (the bound itself is AUTOSAVE_MS)

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="uses SIGKILL and /proc")


class Window:
    def __init__(self, rec: Path, mode="work"):
        env = dict(os.environ, QT_QPA_PLATFORM="offscreen", OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
        self.proc = subprocess.Popen([sys.executable, str(DRIVER), mode, str(rec), str(DATA), str(AUTOSAVE_MS)],
                                     stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True, env=env)
        self.lines: list[dict] = []
        self.reader = threading.Thread(target=self._read, daemon=True)
        self.reader.start()

    def _read(self):
        for line in self.proc.stdout:
            try:
                self.lines.append(json.loads(line))
            except ValueError:
                pass

    def changes(self):
        return [r for r in self.lines if "i" in r]

    def own(self) -> Path | None:
        for r in self.lines:
            if "own" in r:
                return Path(r["own"])
        return None

    def wait_for(self, pred, timeout=90):
        end = time.time() + timeout
        while time.time() < end:
            if pred():
                return True
            if self.proc.poll() is not None and not pred():
                return False
            time.sleep(0.05)
        return False

    def kill(self) -> float:
        t = time.time()
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(30)
        self.reader.join(5)
        return t


def probe(rec: Path) -> list[str]:
    w = Window(rec, "probe")
    w.proc.wait(120)
    w.reader.join(5)
    offers = [r["offers"] for r in w.lines if "offers" in r]
    assert offers, w.lines
    return offers[0]


def state_of(path: Path):
    s = fs.load_session(path)
    return sorted([e.index, e.reason] for e in s.exclusions)


def check_recovered(w: Window, kill_t: float, path: Path):
    changes = w.changes()
    assert len(changes) >= 5
    recovered = state_of(path)
    old = [j for j, c in enumerate(changes) if c["t"] < kill_t - AUTOSAVE_MS / 1000 - SLACK_S]
    j0 = old[-1] if old else 0
    matches = [j for j, c in enumerate(changes) if [list(x) for x in c["state"]] == recovered]
    assert matches and max(matches) >= j0, (
        f"recovered state matches changes {matches}, but change {j0} is older than the bound")


def test_three_windows_kills_and_probes(tmp_path):
    rec = tmp_path / "recovery"
    rng = random.Random(16)
    wins = [Window(rec) for _ in range(3)]
    try:
        for w in wins:
            assert w.wait_for(lambda w=w: w.own() is not None and w.own().exists() and len(w.changes()) >= 6), \
                w.lines[-3:]
        owns = [w.own() for w in wins]
        assert len(set(owns)) == 3
        # a window started now offers nothing and deletes nothing: all owners run
        assert probe(rec) == []
        assert all(p.exists() for p in owns)
        assert fs.orphaned_recovery(rec) == []
        # kill the first at a random moment of steady work
        time.sleep(rng.uniform(0.5, 2.5))
        kill_t = wins[0].kill()
        assert fs.orphaned_recovery(rec) == [owns[0]]
        check_recovered(wins[0], kill_t, owns[0])
        # the others are untouched and keep working
        assert owns[1].exists() and owns[2].exists()
        n1 = len(wins[1].changes())
        assert wins[1].wait_for(lambda: len(wins[1].changes()) > n1 + 3)
        # kill a second one; a new window offers exactly the two orphans, declines them,
        # and deletes only those
        time.sleep(rng.uniform(0.3, 2.0))
        kill_t2 = wins[1].kill()
        check_recovered(wins[1], kill_t2, owns[1])
        offers = probe(rec)
        assert len(offers) == 2 and all("crash" in o for o in offers)
        assert not owns[0].exists() and not owns[1].exists()
        assert owns[2].exists()  # the running window's file survived every start and close
    finally:
        for w in wins:
            if w.proc.poll() is None:
                w.kill()


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_random_kill_during_steady_work(tmp_path, seed):
    rec = tmp_path / "recovery"
    rng = random.Random(seed)
    w = Window(rec)
    try:
        assert w.wait_for(lambda: len(w.changes()) >= 3), w.lines[-3:]
        time.sleep(rng.uniform(0.0, 3.0))
        kill_t = w.kill()
        own = w.own()
        changes = w.changes()
        if changes[0]["t"] > kill_t - AUTOSAVE_MS / 1000 - SLACK_S:
            return  # nothing older than the bound: no claim to check
        assert own.exists(), "work older than the autosave bound was lost"
        check_recovered(w, kill_t, own)
    finally:
        if w.proc.poll() is None:
            w.kill()


def test_two_windows_starting_at_once_offer_an_orphan_once(tmp_path):
    # two real windows run offer_recovery at the same instant, 20 times, on one orphan
    # (a dead owner: its lock names this process with another start time); each offer is
    # declined after 50 ms. Exactly one of them may offer it, the other skips it without a
    # word, and nothing is left behind (the declined orphan deleted, no stray lock).
    # Before: both listed it, both offered it (or the slower one reported it unreadable)
    rec = tmp_path / "recovery"
    rec.mkdir()
    template = tmp_path / "crashed.ballast"
    s = fs.Session(x=[1.0, 2.0, 3.0, 4.0, 5.0], y=[2.9, 5.1, 7.0, 9.2, 10.9],
                   names={"x": "t", "y": "v", "sigma": ""}, method=fs.Method(model="line", loss="l2"))
    s.exclude(2, "smudged cuvette", "2025-03-01T10:00:00+00:00")
    fs.save_session(template, s)
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen", OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    procs = [subprocess.Popen([sys.executable, str(DRIVER), "race", str(rec), str(DATA), "0"],
                              stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                              text=True, env=env) for _ in range(2)]
    try:
        for p in procs:
            line = p.stdout.readline()
            assert json.loads(line).get("ready"), line
        for k in range(20):
            orphan = fs.window_recovery_path(rec, f"{os.getpid()}-dead{k:04d}")
            orphan.write_bytes(template.read_bytes())
            fs.recovery_lock_path(orphan).write_text(json.dumps(
                {"pid": os.getpid(), "start": "1", "host": fs._host()}))  # a reused pid: dead owner
            assert fs.orphaned_recovery(rec) == [orphan]
            for p in procs:
                p.stdin.write("go\n")
            for p in procs:
                p.stdin.flush()
            answers = [json.loads(p.stdout.readline()) for p in procs]
            assert sorted(a["offers"] for a in answers) == [0, 1], (k, answers)
            assert all(a["errors"] == [] for a in answers), (k, answers)
            assert sorted(x.name for x in rec.iterdir() if not x.name.startswith("written")) == [], k
    finally:
        for p in procs:
            p.stdin.close()
            try:
                p.wait(30)
            except subprocess.TimeoutExpired:
                p.kill()
