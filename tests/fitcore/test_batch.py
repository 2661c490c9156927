"""Batch fitting: fit_many and the ballast-fit command.

Every number is checked against :func:`fitcore.fit` on the same data (the reference
is our own single fit; the batch must only spread it over processes, never change
it). All data are invented here.
"""
from __future__ import annotations

import csv
import math
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest

import fitcore
from fitcore import batch
from fitcore.cli import main

MODEL = "exp_decay"
LOSS = "huber"
X = np.linspace(0.0, 10.0, 18)


def _curve(rng, a, tau, c, outlier=True):
    y = a * np.exp(-X / tau) + c + rng.normal(0.0, 0.03, X.size)
    if outlier:
        y[int(rng.integers(2, X.size - 2))] += 1.5
    return y


def _datasets(n, seed=1):
    rng = np.random.default_rng(seed)
    return [(X.copy(), _curve(rng, 2 + 0.1 * i, 1.5 + 0.05 * i, 0.5)) for i in range(n)]


def _same(a, b):
    """Bit for bit, NaN equal to NaN."""
    return np.array_equal(np.asarray(a), np.asarray(b), equal_nan=True)


# --------------------------------------------------------------------------- fit_many


def test_fit_many_serial_and_pool_equal_single_fits_bit_for_bit(monkeypatch):
    pools = []
    real = batch._LocalPool.__init__

    def spy(self, jobs):
        pools.append(jobs)
        real(self, jobs)

    monkeypatch.setattr(batch._LocalPool, "__init__", spy)
    data = _datasets(10)
    data[3] = (X, [1.0, 2.0])                      # lengths differ: the fit refuses it
    data[6] = "not a data set"
    data[8] = {"x": X, "y": data[8][1], "sigma": np.full(X.size, 0.03)}
    serial = fitcore.fit_many(data, MODEL, LOSS, jobs=1)
    pooled = fitcore.fit_many(iter(data), MODEL, LOSS, jobs=2)  # a generator is fine
    assert pools == [2]  # the second run really went through two worker processes
    assert len(serial) == len(pooled) == len(data)
    for i, d in enumerate(data):
        if i in (3, 6):
            for out in (serial[i], pooled[i]):
                assert isinstance(out, fitcore.FailedFit) and out.index == i and not out.converged
            assert "y has 2 values but x has 18" in serial[3].error
            assert serial[6].kind == "input" and "(x, y)" in serial[6].error
            continue
        if isinstance(d, dict):
            ref = fitcore.fit(MODEL, d["x"], d["y"], LOSS, sigma=d["sigma"])
        else:
            ref = fitcore.fit(MODEL, *d, LOSS)
        for out in (serial[i], pooled[i]):
            assert isinstance(out, fitcore.FitResult)
            for attr in ("values", "stderr", "covariance", "weights", "residuals"):
                assert _same(getattr(out, attr), getattr(ref, attr)), (i, attr)
            assert out.scale == ref.scale and out.converged == ref.converged
            assert out.message == ref.message and out.n_used == ref.n_used
            # the model travels back as the same model: predictions agree
            assert _same(out.predict(X), ref.predict(X))


def test_fit_many_options_progress_and_errors():
    data = _datasets(3)
    seen = []
    out = fitcore.fit_many(data, "a*exp(-x/tau) + c", "general", jobs=1, alpha=0.5,
                           p0={"a": 2, "tau": 1.5, "c": 0.5}, progress=seen.append)
    assert sum(seen) == 3
    for d, res in zip(data, out):
        ref = fitcore.fit("a*exp(-x/tau) + c", *d, "general", alpha=0.5, p0={"a": 2, "tau": 1.5, "c": 0.5})
        assert _same(res.values, ref.values) and res.alpha == 0.5
    with pytest.raises(TypeError, match="unknown option"):
        fitcore.fit_many(data, "line", "l2", sigmas=1)
    with pytest.raises(fitcore.FitError, match="unknown loss"):
        fitcore.fit_many(data, "line", "lsq")
    with pytest.raises(fitcore.FitError, match="alpha is the shape of the general loss"):
        fitcore.fit_many(data, "line", "huber", alpha=0.5)  # refused once, not per curve
    for kw, message in ((dict(scale=0.5), "a fixed scale has no effect"),
                        (dict(tuning=2.0), "a tuning constant has no effect"),
                        (dict(max_iter=0), "max_iter must be a whole number"),
                        (dict(fixed={"b": float("nan")}), "the held value of b")):
        with pytest.raises(fitcore.FitError, match=message):  # once, not per curve
            fitcore.fit_many(data, "line", "l2", **kw)
    with pytest.raises(fitcore.FitError):
        fitcore.fit_many(data, "a*exp(-x/", "l2")
    with pytest.raises(fitcore.BatchError, match="jobs"):
        fitcore.fit_many(data, "line", "l2", jobs=0)
    with pytest.raises(fitcore.BatchError, match="engine"):
        fitcore.fit_many(data, "line", "l2", engine="spark")
    # a Model object cannot travel to other processes: fitted here, with a warning
    model = fitcore.get_model("line")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        out = fitcore.fit_many(data[:2], model, "l2", jobs=2)
    assert any("in this process" in str(w.message) for w in caught)
    assert _same(out[1].values, fitcore.fit(model, *data[1], "l2").values)


def test_ordered_runner_keeps_order_and_bounds_what_is_in_flight():
    """Chunks finishing out of order still come back in order, and no more than
    _AHEAD * jobs chunks are ever taken from the input before the first is yielded."""
    from concurrent.futures import Future

    class Shuffled:
        jobs = 2

        def __init__(self):
            self.pending = []

        def submit(self, func, job, chunk):
            f = Future()
            self.pending.append((f, func(job, chunk)))
            return f

        def wait_any(self, futures):
            f, value = self.pending.pop()  # the newest finishes first
            f.set_result(value)
            return {f}

    taken = []

    def chunks():
        for i in range(40):
            taken.append(i)
            yield [i]

    out = []
    for res in batch._ordered(lambda job, c: [v * 10 for v in c], None, chunks(), Shuffled()):
        out.extend(res)
        assert len(taken) - len(out) <= batch._AHEAD * 2
    assert out == [10 * i for i in range(40)]


def test_a_task_that_fails_as_a_whole_becomes_failures_of_its_items():
    from concurrent.futures import Future

    class Broken:
        jobs = 1

        def submit(self, func, job, chunk):
            f = Future()
            if 3 in chunk:
                f.set_exception(RuntimeError("worker killed"))
            else:
                f.set_result(func(job, chunk))
            return f

        def wait_any(self, futures):
            return set(futures)

    chunks = [[0, 1], [2, 3], [4]]
    out = list(batch._ordered(lambda job, c: [("ok", v) for v in c], None, iter(chunks), Broken(),
                              on_error=lambda chunk, exc: [("failed", v, str(exc)) for v in chunk]))
    assert out == [[("ok", 0), ("ok", 1)], [("failed", 2, "worker killed"), ("failed", 3, "worker killed")],
                   [("ok", 4)]]


# --------------------------------------------------------------------------- ballast-fit


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    """Invented files in several formats, a junk file and a long table with groups."""
    import pandas as pd

    root = tmp_path_factory.mktemp("plates")
    rng = np.random.default_rng(7)
    pd.DataFrame({"Time (s)": X, "Signal (mV)": _curve(rng, 3, 2, 1),
                  "Signal2": _curve(rng, 2, 3, 0.5)}).to_csv(root / "a.csv", index=False)
    # decimal comma and semicolons, as a European spreadsheet export
    b = pd.DataFrame({"Time": X, "Signal": _curve(rng, 4, 1.5, 0)})
    (root / "b.txt").write_text(b.to_csv(sep=";", index=False, decimal=","), encoding="utf-8")
    sub = root / "sub"
    sub.mkdir()
    pd.DataFrame({"Time": X, "Signal": _curve(rng, 5, 2.5, 1)}).to_excel(sub / "c.xlsx", index=False)
    pd.DataFrame({"Time": X, "Signal": _curve(rng, 1, 2, 2)}).to_excel(sub / "d.ods", index=False,
                                                                      engine="odf")
    (root / "junk.csv").write_bytes(b"\x00\x01garbage\xff" * 20)
    rows = []
    for well in ["A1", "A2", "B1", "7"]:
        y = _curve(rng, 3, 2, 1)
        rows += [(well, xi, yi, int(i == 1)) for i, (xi, yi) in enumerate(zip(X, y))]
    rows.append(("B2", 1.0, 2.0, 0))  # a group of one point: this curve fails
    long = pd.DataFrame(rows, columns=["Well", "Time", "Signal", "Flag"])
    long.to_csv(root / "long.tsv", sep="\t", index=False)
    (root / "notes.md").write_text("not a table and not searched for\n")
    return root


def _read_out(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _check_row(row, x, y, excluded=None, loss=LOSS, model=MODEL, **opts):
    ref = fitcore.fit(model, x, y, loss, excluded=excluded, **opts)
    assert row["error"] == ""
    assert int(row["n_used"]) == ref.n_used and int(row["n_excluded"]) == ref.n_excluded
    assert row["converged"] == ("true" if ref.converged else "false")
    for name, v, u in zip(ref.param_names, ref.values, ref.stderr):
        assert math.isclose(float(row[name]), v, rel_tol=1e-9, abs_tol=1e-300), name
        assert math.isclose(float(row[f"u({name})"]), u, rel_tol=1e-9), name
    assert math.isclose(float(row["scale"]), ref.scale, rel_tol=1e-9)
    return ref


def test_cli_folder_every_row_equals_single_fit_and_junk_gives_error_row(folder, tmp_path, capsys):
    out = tmp_path / "results.csv"
    code = main([str(folder), "--x", "Time", "--y", "Signal", "--model", MODEL, "--loss", LOSS,
                 "--out", str(out), "--jobs", "2"])
    assert code == 1  # the junk file failed, the rest was fitted
    rows = _read_out(out)
    assert list(rows[0]) == ["source", "sheet", "group", "y", "n_used", "n_excluded", "converged",
                             "A", "u(A)", "tau", "u(tau)", "C", "u(C)", "scale", "alpha", "warnings",
                             "error"]
    by_name = {Path(r["source"]).name: r for r in rows}
    assert sorted(by_name) == ["a.csv", "b.txt", "c.xlsx", "d.ods", "junk.csv", "long.tsv"]
    assert "binary" in by_name["junk.csv"]["error"] and by_name["junk.csv"]["A"] == ""
    assert [r["error"] != "" for r in rows].count(True) == 1
    for name in ("a.csv", "b.txt", "c.xlsx", "d.ods", "long.tsv"):
        path = folder / "sub" / name if name in ("c.xlsx", "d.ods") else folder / name
        sel = fitcore.read_table(path).choose("Time", "Signal")
        _check_row(by_name[name], sel.x, sel.y)
    assert by_name["c.xlsx"]["sheet"] == "Sheet1"
    err = capsys.readouterr().err
    assert "junk.csv" in err and "fitted; wrote" in err


def test_cli_group_exclude_and_several_y(folder, tmp_path):
    out = tmp_path / "groups.csv"
    code = main([str(folder / "long.tsv"), "--x", "Time", "--y", "Signal", "--group", "Well",
                 "--exclude", "Flag", "--model", MODEL, "--loss", LOSS, "--out", str(out), "--jobs", "1",
                 "--quiet"])
    assert code == 1
    rows = _read_out(out)
    assert [r["group"] for r in rows] == ["A1", "A2", "B1", "7", "B2"]
    table = fitcore.read_table(folder / "long.tsv")
    codes, labels = table.groups("Well")
    for row in rows[:4]:
        keep = codes == labels.index(row["group"])
        flag = table.column("Flag")[keep] != 0
        ref = _check_row(row, table.column("Time")[keep], table.column("Signal")[keep], excluded=flag)
        assert ref.n_excluded == 1
    assert rows[4]["error"] and rows[4]["converged"] == ""

    out2 = tmp_path / "two.xlsx"
    code = main([str(folder / "a.csv"), "--x", "Time", "--y", "Signal", "--y", "Signal2",
                 "--model", MODEL, "--loss", "l2", "--out", str(out2), "--jobs", "1", "--quiet"])
    assert code == 0
    from openpyxl import load_workbook

    ws = load_workbook(out2, read_only=True)["results"]
    got = [dict(zip(next(ws.iter_rows(values_only=True)), r)) for r in ws.iter_rows(min_row=2, values_only=True)]
    assert [r["y"] for r in got] == ["Signal", "Signal2"]
    sel = fitcore.read_table(folder / "a.csv")
    for r in got:
        ref = fitcore.fit(MODEL, sel.column("Time"), sel.column(r["y"]), "l2")
        assert math.isclose(r["tau"], ref["tau"], rel_tol=1e-9) and r["error"] is None


def test_large_long_table_is_split_here_with_the_same_rows(folder, tmp_path, monkeypatch):
    """A long table above the size limit is read by this process and its curves handed
    out one by one; the rows are the same as when a worker reads the whole file."""
    args = [str(folder / "long.tsv"), "--x", "Time", "--y", "Signal", "--group", "Well", "--model", MODEL,
            "--loss", LOSS, "--jobs", "1", "--quiet"]
    assert main([*args, "--out", str(tmp_path / "whole.csv")]) == 1
    spec = batch.BatchSpec(x="Time", ys=("Signal",), model=MODEL, loss=LOSS, group="Well")
    items = list(batch._source_items([folder / "long.tsv"], spec))
    assert len(items) == 1 and isinstance(items[0], batch._FileItem)  # a worker reads it
    monkeypatch.setattr(batch, "LARGE_GROUPED_BYTES", 10)
    items = list(batch._source_items([folder / "long.tsv"], spec))
    assert [it[0][2] for it in items] == ["A1", "A2", "B1", "7", "B2"]  # read here, one item a curve
    assert main([*args, "--out", str(tmp_path / "split.csv")]) == 1
    assert (tmp_path / "whole.csv").read_bytes() == (tmp_path / "split.csv").read_bytes()


def test_cli_usage_errors_exit_2_and_write_nothing(folder, tmp_path, capsys):
    out = tmp_path / "never.csv"
    base = ["--x", "Time", "--y", "Signal", "--out", str(out)]
    cases = [
        [str(folder), "--model", "a*exp(-x/", *base],               # formula that cannot be read
        [str(folder), "--model", "line", "--loss", "lsq", *base],    # unknown loss
        [str(tmp_path / "missing"), "--model", "line", *base],       # no such path
        [str(folder), "--model", "line", "--scheduler", "tcp://127.0.0.1:1", *base],
        [str(folder), "--model", "line", "--start", "zz=1", *base],  # no such parameter
        [str(folder), "--model", "line", "--jobs", "0", *base],
        [str(folder), "--model", "line", "--x", "Time", "--y", "Signal"],  # no --out
    ]
    for argv in cases:
        with pytest.raises(SystemExit) as exc_info:
            raise SystemExit(main(argv))
        assert exc_info.value.code == 2, argv
        assert "error:" in capsys.readouterr().err
    assert not out.exists()


def test_cli_help_shows_an_example():
    done = subprocess.run([sys.executable, "-m", "fitcore.cli", "--help"], capture_output=True,
                          text=True, timeout=60, cwd=Path(__file__).resolve().parents[2])
    assert done.returncode == 0
    assert "example:" in done.stdout and "ballast-fit plates/" in done.stdout
    assert "--engine dask" in done.stdout and "exit status" in done.stdout


def test_cli_report_dir_one_page_per_curve(folder, tmp_path):
    reports = tmp_path / "reports"
    code = main([str(folder / "long.tsv"), "--x", "Time", "--y", "Signal", "--group", "Well",
                 "--model", MODEL, "--loss", LOSS, "--out", str(tmp_path / "r.csv"), "--jobs", "1",
                 "--report-dir", str(reports), "--quiet"])
    assert code == 1
    pages = sorted(p.name for p in reports.iterdir())
    assert pages == ["long_7_Signal.html", "long_A1_Signal.html", "long_A2_Signal.html",
                     "long_B1_Signal.html"]
    text = (reports / "long_A1_Signal.html").read_text(encoding="utf-8")
    assert "<html" in text.lower() and "<svg" in text and "Robust weights are not a licence" in text
    assert "file rows 2 to 19" in text  # well A1's own rows, as the window's data record names them
    # the estimates in the page are those of the single fit of well A1, rounded per GUM
    table = fitcore.read_table(folder / "long.tsv")
    codes, labels = table.groups("Well")
    keep = codes == labels.index("A1")
    ref = fitcore.fit(MODEL, table.column("Time")[keep], table.column("Signal")[keep], LOSS)
    assert f"<td>tau</td><td>{fitcore.format_value(ref['tau'], ref.stderr[1])}</td>" in text


# --------------------------------------------------------------------------- Dask


def test_dask_engine_equals_local(folder, tmp_path):
    pytest.importorskip("distributed", reason="the 'cluster' extra (dask[distributed]) is not installed")
    args = [str(folder / "long.tsv"), str(folder / "sub"), "--x", "Time", "--y", "Signal", "--group", "Well",
            "--model", MODEL, "--loss", LOSS, "--quiet"]
    local, dask = tmp_path / "local.csv", tmp_path / "dask.csv"
    assert main([*args, "--out", str(local), "--jobs", "1"]) == 1
    assert main([*args, "--out", str(dask), "--engine", "dask", "--jobs", "1"]) == 1
    assert local.read_bytes() == dask.read_bytes()


def test_dask_missing_gives_a_clear_message(monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed -> ImportError
    with pytest.raises(fitcore.BatchError, match=r"cluster.*extra"):
        fitcore.fit_many(_datasets(2), "line", "l2", engine="dask")
