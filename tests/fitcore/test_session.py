"""Tests for fitcore.session: versioned JSON sessions, atomic saving, recovery files.

The data below are invented for the tests. Exact float round-trips rely on JSON
numbers written with Python's shortest round-trip repr (common practice; Python's
float repr is documented to round-trip).
"""
from __future__ import annotations

import json
import math
import os
import random
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

import fitcore
from fitcore import session as S
from fitcore.session import (
    Exclusion,
    Method,
    Session,
    SessionError,
    load_session,
    save_session,
)

ROOT = Path(__file__).resolve().parents[2]


def _fit():
    return fitcore.fit


def demo_session(n=12, seed=1):
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 5.0, n)
    # awkward floats on purpose: their decimal form is long
    y = 3.0 * np.exp(-x / 1.7) + 0.25 + rng.normal(0, 0.02, n)
    y[4] += 0.8  # a gross outlier
    sigma = np.full(n, 0.02) + x * 1e-3
    s = Session(
        x=x, y=y, sigma=sigma,
        names={"x": "Time", "y": "Signal", "sigma": "u(Signal)"},
        units={"x": "s", "y": "mV"}, source_file="run3.csv", source_sha256="ab" * 32,
        columns={"x": "Time", "y": "Signal", "sigma": "u(Signal)", "sheet": None},
        method=Method(model="A*exp(-x/tau) + C", model_kind="formula", loss="huber",
                      fixed={}, p0={"A": 3.0, "tau": 1.5, "C": 0.2}, sigma_mode="absolute"),
    )
    s.exclude(4, "air bubble seen in the cell", time="2025-01-31T10:14:02+00:00")
    return s


# ============================================================================ round trip
def test_round_trip_is_exact(tmp_path):
    s = demo_session()
    s.x[1] = 0.1 + 0.2
    s.y[2] = math.nan
    s.sigma[3] = math.inf
    s.y[5] = -math.inf
    s.y[6] = 5e-324  # smallest subnormal
    s.y[7] = 1.7976931348623157e308
    p = save_session(tmp_path / "a.ballast", s)
    t = load_session(p)
    for a, b in ((s.x, t.x), (s.y, t.y), (s.sigma, t.sigma)):
        assert a.tobytes() == b.tobytes() or np.array_equal(a, b, equal_nan=True)
        assert np.array_equal(a, b, equal_nan=True)
    assert t.exclusions == [Exclusion(4, "air bubble seen in the cell",
                                      "2025-01-31T10:14:02+00:00")]
    assert t.method == s.method
    assert t.names == s.names and t.units == s.units and t.columns == s.columns
    assert t.source_file == "run3.csv" and t.source_sha256 == "ab" * 32
    assert t.ballast_version == fitcore.__version__
    # the file is standard JSON: no NaN/Infinity literals, non-finite values as strings
    doc = json.loads(p.read_text(), parse_constant=lambda c: pytest.fail(f"literal {c}"))
    assert doc["format"] == "ballast-session" and doc["version"] == 1
    assert doc["data"]["y"][2] == "nan" and doc["data"]["sigma"][3] == "inf"
    assert doc["data"]["y"][5] == "-inf"
    assert doc["exclusions"][0]["index"] == 4


def test_created_time_is_iso8601(tmp_path):
    p = save_session(tmp_path / "a.ballast", demo_session())
    t = load_session(p)
    from datetime import datetime

    assert datetime.fromisoformat(t.created).tzinfo is not None


def test_builtin_model_with_options_round_trips(tmp_path):
    s = demo_session()
    s.method = Method(model="polynomial", model_options={"degree": 3}, loss="cauchy",
                      scale=0.05, alpha=None, tuning=2.3849, fixed={"c0": 0.0},
                      p0=[0.0, 1.0, 0.0, 0.0], sigma_mode="relative")
    t = load_session(save_session(tmp_path / "b.ballast", s))
    assert t.method == s.method


def test_python_model_cannot_be_saved(tmp_path):
    s = demo_session()
    s.method = s.method.with_(model_kind="python")
    with pytest.raises(SessionError, match="cannot be saved"):
        save_session(tmp_path / "c.ballast", s)
    assert not (tmp_path / "c.ballast").exists()


def test_mismatched_lengths():
    with pytest.raises(SessionError, match="must match"):
        Session(x=[1, 2, 3], y=[1, 2])


def test_exclude_and_restore():
    s = demo_session()
    s.exclude(2, "first")
    s.exclude(2, "second")  # replaces, no duplicates
    assert [e.index for e in s.exclusions].count(2) == 1
    assert s.reasons()[2] == "second"
    assert s.excluded.sum() == 2
    s.restore(2)
    assert s.excluded.sum() == 1
    with pytest.raises(IndexError):
        s.exclude(99)


# ============================================================================ bad files
def _write(tmp_path, text, name="bad.ballast"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def _good_doc():
    return S.session_to_dict(demo_session(n=6))


def test_not_json(tmp_path):
    with pytest.raises(SessionError, match="not valid JSON"):
        load_session(_write(tmp_path, "this is not json"))


def test_truncated_file(tmp_path):
    text = json.dumps(_good_doc())
    with pytest.raises(SessionError, match="cut short"):
        load_session(_write(tmp_path, text[: len(text) // 2]))


def test_binary_garbage(tmp_path):
    p = tmp_path / "bin.ballast"
    p.write_bytes(bytes(range(256)) * 4)
    with pytest.raises(SessionError, match="not UTF-8|not valid JSON"):
        load_session(p)


def test_missing_file(tmp_path):
    with pytest.raises(SessionError, match="does not exist"):
        load_session(tmp_path / "nope.ballast")


def test_wrong_format_tag(tmp_path):
    doc = _good_doc()
    doc["format"] = "some-other-program"
    with pytest.raises(SessionError, match="not a Ballast session.*format tag"):
        load_session(_write(tmp_path, json.dumps(doc)))
    del doc["format"]
    with pytest.raises(SessionError, match="no 'format' tag"):
        load_session(_write(tmp_path, json.dumps(doc)))
    with pytest.raises(SessionError, match="not an object"):
        load_session(_write(tmp_path, "[1, 2, 3]"))


def test_newer_version(tmp_path):
    doc = _good_doc()
    doc["version"] = 3
    with pytest.raises(SessionError) as err:
        load_session(_write(tmp_path, json.dumps(doc)))
    assert "made by a newer Ballast (format 3); this version reads up to 1" in str(err.value)


@pytest.mark.parametrize("mutate, match", [
    (lambda d: d.pop("data"), "lacks the field 'data'"),
    (lambda d: d["data"].pop("y"), "lacks the field 'data.y'"),
    (lambda d: d["method"].pop("loss"), "lacks the field 'method.loss'"),
    (lambda d: d["data"].__setitem__("x", "1,2,3"), "'data.x' should be a list"),
    (lambda d: d["data"]["x"].__setitem__(1, "12abc"), r"'data.x\[1\]' should be a number"),
    (lambda d: d["data"]["x"].__setitem__(1, True), r"'data.x\[1\]' should be a number"),
    (lambda d: d["data"]["y"].pop(), "data.x has 6 values but data.y has 5"),
    (lambda d: d.__setitem__("version", "1"), "version should be a whole number"),
    (lambda d: d["method"].__setitem__("scale", -2), "'method.scale' should be 'auto'"),
    (lambda d: d["method"].__setitem__("model", {"formula": "x", "builtin": "line"}),
     "either a 'builtin' model or a 'formula'"),
    (lambda d: d["exclusions"].append({"index": 99}), "only 6 points"),
    (lambda d: d["exclusions"].append({"index": 1.5}), "should be a whole number"),
    (lambda d: d.__setitem__("exclusions", [{"index": 1}, {"index": 1}]), "excluded twice"),
    (lambda d: d["method"].__setitem__("sigma_mode", "sometimes"), "sigma_mode"),
    (lambda d: d.__setitem__("result", {"param_names": ["a"], "values": [1, 2],
                                        "stderr": [1], "covariance": [[1]]}),
     "'result.values' has 2 entries"),
])
def test_bad_fields_have_plain_messages(tmp_path, mutate, match):
    doc = _good_doc()
    mutate(doc)
    with pytest.raises(SessionError, match=match) as err:
        load_session(_write(tmp_path, json.dumps(doc)))
    assert str(err.value).startswith("bad.ballast:")  # names the file


def test_deep_nesting_is_an_error_not_a_crash(tmp_path):
    text = '{"format": "ballast-session", "version": 1, "data": ' + "[" * 100000 + "]" * 100000 + "}"
    with pytest.raises(SessionError):
        load_session(_write(tmp_path, text))


def test_malicious_content_is_only_data(tmp_path):
    # strings that would run code if anything evaluated them; the loader treats them
    # as text. A marker file proves nothing ran.
    marker = tmp_path / "pwned"
    payload = f"__import__('os').system('touch {marker}')"
    doc = _good_doc()
    doc["method"]["model"] = {"formula": payload}
    doc["data"]["names"]["x"] = payload
    doc["data"]["source_file"] = "!!python/object/apply:os.system ['touch x']"
    doc["data"]["columns"] = {"x": {"__reduce__": ["os.system", [f"touch {marker}"]]}}
    doc["py/object"] = "builtins.eval"
    doc["__class__"] = "subprocess.Popen"
    t = load_session(_write(tmp_path, json.dumps(doc)))
    assert t.method.model == payload and t.method.model_kind == "formula"
    assert t.names["x"] == payload
    assert t.columns["x"] == {"__reduce__": ["os.system", [f"touch {marker}"]]}
    assert not marker.exists()
    # a refit sends the text to the safe formula parser, which refuses it
    fit = _fit()
    assert fit
    with pytest.raises(ValueError):
        t.refit()
    assert not marker.exists()


def test_source_hash(tmp_path):
    import hashlib

    f = tmp_path / "data.csv"
    f.write_bytes(b"t,y\n0,1\n1,2\n")
    assert S.file_sha256(f) == hashlib.sha256(b"t,y\n0,1\n1,2\n").hexdigest()


# ============================================================================ atomic save
def test_failed_replace_leaves_old_file_and_no_temp(tmp_path, monkeypatch):
    p = tmp_path / "keep.ballast"
    old = demo_session()
    save_session(p, old)
    before = p.read_bytes()

    def boom(src, dst):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(S.os, "replace", boom)
    new = demo_session(seed=2)
    with pytest.raises(SessionError, match="could not save.*No space left"):
        save_session(p, new)
    assert p.read_bytes() == before
    assert [q.name for q in tmp_path.iterdir()] == ["keep.ballast"]


def test_save_fsyncs_file_and_folder(tmp_path, monkeypatch):
    synced = []
    real = os.fsync

    def spy(fd):
        synced.append(os.path.realpath(f"/proc/self/fd/{fd}") if sys.platform.startswith("linux")
                      else fd)
        return real(fd)

    monkeypatch.setattr(S.os, "fsync", spy)
    save_session(tmp_path / "s.ballast", demo_session())
    assert len(synced) >= 2
    if sys.platform.startswith("linux"):
        assert synced[-1] == os.path.realpath(tmp_path)  # the folder, after the replace


WRITER = textwrap.dedent("""
    import sys
    import numpy as np
    from fitcore.session import Session, Method, save_session, session_to_json
    path, n = sys.argv[1], int(sys.argv[2])
    x = np.arange(n) / 7.0
    versions = [Session(x=x, y=np.full(n, float(v)) + x * 1e-9, method=Method(loss="huber"))
                for v in (1, 2)]
    print("ready", flush=True)
    i = 0
    while True:
        save_session(path, versions[i % 2])
        print("saved", flush=True)
        i += 1
""")


@pytest.mark.skipif(not hasattr(signal, "SIGKILL"), reason="needs POSIX SIGKILL")
def test_kill_during_write_leaves_a_complete_file(tmp_path):
    # A writer saving a large session in a loop is killed at a random moment; the file
    # on disk must load and be one complete version (old or new), never a mixture. The
    # kill comes after the writer reported its first complete save, so the check does
    # not depend on how fast this machine writes.
    n = 150_000
    path = tmp_path / "big.ballast"
    x = np.arange(n) / 7.0
    save_session(path, Session(x=x, y=np.full(n, 0.0) + x * 1e-9))
    script = tmp_path / "writer.py"
    script.write_text(WRITER)
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    rng = random.Random(20250131)
    seen = set()
    for _ in range(4):
        proc = subprocess.Popen([sys.executable, str(script), str(path), str(n)],
                                stdout=subprocess.PIPE, env=env, cwd=str(tmp_path))
        try:
            assert proc.stdout.readline().strip() == b"ready"
            assert proc.stdout.readline().strip() == b"saved"
            time.sleep(rng.uniform(0.0, 0.3))
        finally:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait(timeout=30)
            proc.stdout.close()
        s = load_session(path)
        assert s.x.size == n and np.array_equal(s.x, x)
        # one whole version, built by the same arithmetic as in the writer
        match = [v for v in (0, 1, 2) if np.array_equal(s.y, np.full(n, float(v)) + x * 1e-9)]
        assert len(match) == 1
        seen.add(match[0])
    assert seen & {1, 2}, "the writer never finished a save; the test proved nothing"


# ============================================================================ recovery
def test_recovery_files(tmp_path):
    folder = tmp_path / "recovery"
    doc_a = tmp_path / "one" / "run.ballast"
    doc_b = tmp_path / "two" / "run.ballast"
    ra = S.recovery_path(doc_a, folder)
    rb = S.recovery_path(doc_b, folder)
    assert ra != rb and ra.name.startswith("run-") and ra.name.endswith(".ballast.recovery")
    assert S.recovery_path(None, folder).name == "untitled.ballast.recovery"
    assert S.find_recovery(folder) == []
    s = demo_session()
    w = S.write_recovery(s, folder, doc_a)
    assert w == ra and s.saved_as == ""  # the session object is left as it was
    time.sleep(0.01)
    S.write_recovery(s, folder)
    found = S.find_recovery(folder)
    assert set(found) == {ra, S.recovery_path(None, folder)}
    rec = load_session(ra)
    assert rec.saved_as == str(doc_a.absolute())
    assert np.array_equal(rec.y, s.y)
    assert S.recovery_for(folder, doc_a) == ra  # the document was never saved
    doc_a.parent.mkdir()
    save_session(doc_a, s)
    os.utime(ra, (time.time() - 100, time.time() - 100))
    assert S.recovery_for(folder, doc_a) is None  # saved after the autosave
    S.discard_recovery(ra)
    S.discard_recovery(ra)  # twice is fine
    assert not ra.exists()


def test_recovery_folder_that_cannot_be_made_and_a_writer_of_ones_own(tmp_path):
    blocked = tmp_path / "taken"
    blocked.write_text("a file where the folder should be")
    with pytest.raises(S.SessionError, match="^could not create the recovery folder"):
        S.write_recovery(demo_session(), blocked / "recovery")
    # the window writes its recovery file with its own writer and target (its view kept)
    seen = []

    def writer(path, session):
        seen.append((path, session.saved_as))
        return save_session(path, session)

    s = demo_session()
    own = tmp_path / "rec" / "mine.ballast.recovery"
    got = S.write_recovery(s, tmp_path / "rec", tmp_path / "doc.ballast", target=own, write=writer)
    assert got == own and seen == [(own, str((tmp_path / "doc.ballast").absolute()))]
    assert s.saved_as == ""  # the session object is left as it was


# ============================================================================ refit
def test_refit_reproduces_bit_for_bit(tmp_path):
    fit = _fit()
    s = demo_session()
    res = s.refit()
    assert res.converged, res.message
    s.store_result(res)
    p = save_session(tmp_path / "fit.ballast", s)
    t = load_session(p)
    again = t.refit()
    # bit for bit: exact float equality, no tolerance
    assert np.all(again.values == res.values)
    assert np.all(again.stderr == res.stderr)
    assert np.all(again.covariance == res.covariance)
    assert again.scale == res.scale
    assert t.reproduces(again)
    assert np.all(t.stored_values() == res.values)
    # and the refit is the same call as a direct fit on the original arrays
    direct = fit("A*exp(-x/tau) + C", s.x, s.y, loss="huber", sigma=s.sigma,
                 excluded=s.excluded, p0={"A": 3.0, "tau": 1.5, "C": 0.2},
                 sigma_mode="absolute")
    assert np.all(direct.values == again.values)


def test_refit_with_builtin_and_held_parameter(tmp_path):
    _fit()
    x = np.array([0.0, 1, 2, 3, 4, 5, 6, 7, 8, 9])
    y = np.array([1.02, 2.98, 5.05, 6.96, 9.1, 10.97, 13.02, 25.0, 17.01, 18.95])
    s = Session(x=x, y=y, method=Method(model="line", loss="tukey"))
    s.exclude(7, "pipetting error noted in the lab book")
    res = s.refit()
    s.store_result(res)
    t = load_session(save_session(tmp_path / "l.ballast", s))
    assert t.result["loss"] == "tukey" and t.result["n_excluded"] == 1
    assert t.reproduces(t.refit())
    # changing one datum in its ninth digit changes the estimates: the check can fail
    t.y[0] = t.y[0] * (1 + 1e-9)
    assert not t.reproduces(t.refit())


def test_json_text_equals_plain_json_dumps_with_the_array_cache():
    """session_to_json splices cached array text into the document; the text must be
    exactly what json.dumps of session_to_dict gives (the standard library's encoder is
    the reference), also for NaN, infinities, -0.0, subnormals and after the arrays change."""
    rng = np.random.default_rng(5)
    n = 500  # above the cache threshold
    x = np.sort(rng.uniform(0, 10, n))
    y = 1.0 + 2.0 * x + rng.normal(0, 0.1, n)
    sigma = rng.uniform(0.05, 0.2, n)
    y[[3, 4, 5, 6]] = [np.nan, np.inf, -np.inf, -0.0]
    x[7] = 5e-324
    res = fitcore.fit("line", x[8:], y[8:], loss="huber")
    s = Session(x=x, y=y, sigma=sigma, method=Method(model="line", loss="huber"))
    s.store_result(res)

    def plain():
        return json.dumps(S.session_to_dict(s), allow_nan=False, ensure_ascii=False,
                          separators=(",", ":"))

    first = S.session_to_json(s)
    assert first == plain()
    assert S.session_to_json(s) == first  # from the cache
    s.x = x.copy()
    s.x[0] += 1e-9  # a changed array is encoded anew, not taken from the cache
    assert S.session_to_json(s) == plain() != first
    assert S.session_from_json(S.session_to_json(s)).x[0] == s.x[0]
