"""``ballast-fit``: fit every curve of many files with one method, without a window.

Exit status: 0 when every curve was fitted, 1 when some could not be (the results
table is still written, with the ``error`` column filled), 2 for a usage error
(nothing fitted, nothing written).
"""
from __future__ import annotations

import argparse
import os
import re
import sys
from pathlib import Path

from .losses import LOSS_NAMES
from .weighting import normalise_rule

EXAMPLE = """\
example:
  ballast-fit plates/ --x "Dose" --y "Signal" --group Well \\
      --model "bottom + (top - bottom)/(1 + (x/ec50)**hill)" --loss huber \\
      --start top=100 --start bottom=0 --start ec50=1 --start hill=1 \\
      --out results.csv --report-dir reports/

  Every CSV/TSV/text/XLSX/ODS file under plates/ is read; each well of each file
  is one curve; results.csv gets one row per curve: source, sheet, group, y,
  n_used, n_excluded, converged, each parameter and u(parameter) (its standard
  uncertainty), scale, alpha, warnings, error.

  On a Dask cluster (pip install "ballast[cluster]" on this machine and on the
  workers):  ... --engine dask --scheduler tcp://scheduler-host:8786

exit status: 0 every curve fitted; 1 some curves failed (the table is still
written, their error column says why); 2 usage error (nothing written).
"""


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse's own usage errors: exit status 2
        self.print_usage(sys.stderr)
        self.exit(2, f"{self.prog}: error: {message}\n")


def _positive_int(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if n < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {n}")
    return n


def _scale(text: str):
    if text.strip().lower() == "auto":
        return "auto"
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected 'auto' or a positive number, got {text!r}") from None
    if not (v > 0 and v < float("inf")):
        raise argparse.ArgumentTypeError(f"a fixed scale must be a positive number, got {text!r}")
    return v


def _number(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if v != v or v in (float("inf"), float("-inf")):
        raise argparse.ArgumentTypeError(f"expected a finite number, got {text!r}")
    return v


def _assignment(text: str) -> tuple[str, float]:
    m = re.fullmatch(r"\s*([A-Za-z_]\w*)\s*=\s*(\S+)\s*", text)
    if not m:
        raise argparse.ArgumentTypeError(f"expected NAME=VALUE, got {text!r}")
    return m.group(1), _number(m.group(2))


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(
        prog="ballast-fit",
        description="Fit many curves with one method: every file (and every y column, "
                    "group and workbook sheet in it) is fitted the way the Ballast window "
                    "fits one data set, and the estimates go to one results table.",
        epilog=EXAMPLE, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("paths", nargs="+", metavar="PATH",
                   help="files or folders (folders are searched, with their subfolders, for "
                        "CSV, TSV, TXT, DAT, XLSX, XLSM and ODS files)")
    cols = p.add_argument_group("columns (a header name, or a 0-based position)")
    cols.add_argument("--x", required=True, metavar="COL", help="column of x")
    cols.add_argument("--y", required=True, action="append", metavar="COL",
                      help="column of y; give it several times for several curves per file")
    cols.add_argument("--sigma", metavar="COL", help="column of the standard uncertainties of y")
    cols.add_argument("--group", metavar="COL",
                      help="column whose cells (numbers or text: wells, batches) split a long "
                           "table into one curve per value")
    cols.add_argument("--exclude", metavar="COL",
                      help="column whose non-zero cells mark points left out of the fit")
    cols.add_argument("--sheet", metavar="NAME",
                      help="workbook sheet to read (default: every sheet that has the x column)")
    meth = p.add_argument_group("method (as in the window's method panel)")
    meth.add_argument("--model", required=True, metavar="NAME|FORMULA",
                      help="a built-in model name (e.g. line, exp_decay) or a formula in x, "
                           "e.g. \"a*exp(-x/tau) + c\"")
    meth.add_argument("--loss", default="l2", choices=LOSS_NAMES, metavar="NAME",
                      help=f"one of {', '.join(LOSS_NAMES)} (default: l2, least squares)")
    meth.add_argument("--scale", type=_scale, default="auto",
                      help="'auto' (robust estimate, default) or a fixed positive scale in units of y")
    meth.add_argument("--alpha", type=_number, help="shape of the general loss")
    meth.add_argument("--sigma-mode", choices=("absolute", "relative"), default="absolute",
                      help="sigma are known standard uncertainties (absolute, default) or "
                           "relative weights")
    meth.add_argument("--weighting", metavar="RULE",
                      help="calibration weighting rule (1/x, 1/x^2, 1/y, 1/y^2, power; default none)")
    meth.add_argument("--start", type=_assignment, action="append", default=[], metavar="NAME=VALUE",
                      help="start value of a parameter (repeatable)")
    meth.add_argument("--hold", type=_assignment, action="append", default=[], metavar="NAME=VALUE",
                      help="hold a parameter at a value (repeatable)")
    out = p.add_argument_group("output and running")
    out.add_argument("--out", required=True, metavar="FILE",
                     help="results table: CSV, or an Excel workbook when FILE ends in .xlsx")
    out.add_argument("--report-dir", metavar="DIR", help="write one HTML report per curve here")
    out.add_argument("--jobs", type=_positive_int, metavar="N",
                     help="worker processes (default: the number of cores); 1 fits in this process")
    out.add_argument("--engine", choices=("local", "dask"), default="local",
                     help="local processes (default) or a Dask distributed cluster "
                          "(needs pip install \"ballast[cluster]\")")
    out.add_argument("--scheduler", metavar="ADDRESS",
                     help="Dask scheduler, e.g. tcp://host:8786 (default with --engine dask: "
                          "a local cluster of --jobs workers started for this run)")
    out.add_argument("--quiet", action="store_true", help="no progress bar and no summary")
    return p


def _usage_error(parser, message: str) -> int:
    parser.print_usage(sys.stderr)
    print(f"{parser.prog}: error: {message}", file=sys.stderr)
    return 2


_UNSAFE = re.compile(r"[^\w.\-]+")


def _report_name(row, taken: set) -> str:
    parts = [Path(row.source).stem, row.sheet, row.group, row.y]
    stem = "_".join(_UNSAFE.sub("-", p).strip("-") for p in parts if p) or "curve"
    stem = stem[:120]
    name, k = f"{stem}.html", 2
    while name.lower() in taken:
        name, k = f"{stem}_{k}.html", k + 1
    taken.add(name.lower())
    return name


def main(argv=None) -> int:
    # one BLAS thread per process: the parallelism is the processes (set before numpy loads)
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(var, "1")
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.scheduler and args.engine != "dask":
        return _usage_error(parser, "--scheduler needs --engine dask")
    if args.alpha is not None and args.loss != "general":
        return _usage_error(parser, "--alpha is the shape of the general loss: use it with --loss general")
    out = Path(args.out)
    if out.suffix.lower() not in (".csv", ".xlsx", ".txt", ""):
        return _usage_error(parser, f"--out must end in .csv or .xlsx, not {out.suffix!r}")
    if out.is_dir():
        return _usage_error(parser, f"--out {str(out)!r} is a folder; give a file name")
    if not out.parent.is_dir():
        return _usage_error(parser, f"the folder of --out ({out.parent}) does not exist")

    # here, not at the top: usage errors above answer before the fitting engine loads
    from .batch import BatchError, BatchSpec, _check_method, find_files, fit_sources, write_rows
    from .session import write_atomically
    from .solve import FitError

    options = {"scale": args.scale, "sigma_mode": args.sigma_mode}
    if args.alpha is not None:
        options["alpha"] = args.alpha
    if args.weighting:
        try:
            options["weighting"] = normalise_rule(args.weighting)
        except ValueError as exc:
            return _usage_error(parser, f"--weighting: {exc}")
    if args.start:
        options["p0"] = dict(args.start)
    if args.hold:
        options["fixed"] = dict(args.hold)
    spec = BatchSpec(x=args.x, ys=tuple(args.y), model=args.model, loss=args.loss, sigma=args.sigma,
                     group=args.group, exclude=args.exclude, sheet=args.sheet, options=options,
                     report=bool(args.report_dir))
    try:
        model = _check_method(spec.model, spec.loss, spec.options)
    except FitError as exc:
        return _usage_error(parser, f"--model/--loss: {exc}")
    names = list(model.param_names)
    for opt, given in (("--start", args.start), ("--hold", args.hold)):
        bad = sorted({n for n, _ in given} - set(names))
        if bad:
            return _usage_error(parser, f"{opt}: the model has no parameter {', '.join(bad)} "
                                        f"(its parameters: {', '.join(names)})")
    files, problems = find_files(args.paths)
    if problems:
        return _usage_error(parser, "; ".join(problems))
    report_dir = None
    if args.report_dir:
        report_dir = Path(args.report_dir)
        try:
            report_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            return _usage_error(parser, f"--report-dir {str(report_dir)!r} cannot be made: "
                                        f"{exc.strerror or exc}")

    bar = None
    if not args.quiet:
        try:
            from tqdm import tqdm

            bar = tqdm(total=None, unit=" curve", file=sys.stderr, desc="fitting",
                       disable=not sys.stderr.isatty())
        except ImportError:  # the bar is a comfort, not a need
            bar = None
    failed: list = []
    taken: set = set()
    report_problems: list[str] = []

    def on_row(row):
        if row.error:
            failed.append(row)
        if report_dir is not None and row.report:
            try:
                write_atomically(report_dir / _report_name(row, taken), row.report.encode("utf-8"))
            except OSError as exc:
                report_problems.append(f"{row.source}: {exc.strerror or exc}")

    def strip(rows):
        for row in rows:
            on_row(row)
            yield row

    progress = bar.update if bar is not None else None
    try:
        rows = fit_sources(files, spec, jobs=args.jobs, engine=args.engine, scheduler=args.scheduler,
                           progress=progress)
        n = write_rows(out, strip(rows), names)
    except BatchError as exc:
        if bar is not None:
            bar.close()
        return _usage_error(parser, str(exc))
    except OSError as exc:
        if bar is not None:
            bar.close()
        print(f"{parser.prog}: error: could not write {out}: {exc.strerror or exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        if bar is not None:
            bar.close()
        print(f"{parser.prog}: interrupted; {out} was not written", file=sys.stderr)
        return 130
    if bar is not None:
        bar.close()
    if not args.quiet:
        print(f"{n - len(failed)} of {n} curve(s) fitted; wrote {out}", file=sys.stderr)
        for row in failed[:10]:
            where = " / ".join(t for t in (row.source, row.sheet, row.group, row.y) if t)
            print(f"  failed: {where}: {row.error}", file=sys.stderr)
        if len(failed) > 10:
            print(f"  ... and {len(failed) - 10} more (see the error column)", file=sys.stderr)
        if report_dir is not None:
            print(f"reports in {report_dir}", file=sys.stderr)
    for text in report_problems[:5]:
        print(f"{parser.prog}: a report could not be written: {text}", file=sys.stderr)
    return 1 if failed or report_problems else 0


if __name__ == "__main__":  # python -m fitcore.cli
    sys.exit(main())
