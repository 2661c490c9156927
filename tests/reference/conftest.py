"""Readers for the NIST StRD files in tests/reference/data/nist-strd/ (NIST/ITL StRD)."""
from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest

_NUM = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"


@dataclass
class StrdProblem:
    name: str
    kind: str  # "nonlinear" or "linear"
    start1: np.ndarray | None
    start2: np.ndarray | None
    certified: np.ndarray
    certified_sd: np.ndarray
    rss: float
    rsd: float
    dof: int
    data: np.ndarray  # columns: y, x1, x2, ...


def read_strd(path: Path) -> StrdProblem:
    lines = path.read_text().splitlines()
    nonlinear = any("Nonlinear Least Squares" in ln for ln in lines[:20])
    params, start1, start2, cert, sd = [], [], [], [], []
    rss = rsd = float("nan")
    dof = -1
    data_start = None
    for i, ln in enumerate(lines):
        m = re.match(rf"\s*(b\d+|B\d+)\s*=?\s*({_NUM})\s+({_NUM})(?:\s+({_NUM})\s+({_NUM}))?\s*$", ln)
        if m and data_start is None:
            if nonlinear and m.group(4) is not None:
                params.append(m.group(1))
                start1.append(float(m.group(2)))
                start2.append(float(m.group(3)))
                cert.append(float(m.group(4)))
                sd.append(float(m.group(5)))
            elif not nonlinear:
                params.append(m.group(1))
                cert.append(float(m.group(2)))
                sd.append(float(m.group(3)))
            continue
        if "Residual Sum of Squares" in ln:
            rss = float(re.findall(_NUM, ln.split(":")[-1])[0])
        elif "Residual Standard Deviation" in ln:
            rsd = float(re.findall(_NUM, ln.split(":")[-1])[0])
        elif "Degrees of Freedom" in ln and ":" in ln:
            nums = re.findall(r"\d+", ln.split(":")[-1])
            if nums and dof < 0:
                dof = int(nums[0])
        m2 = re.match(rf"\s*Standard Deviation\s+({_NUM})\s*$", ln)
        if m2:
            rsd = float(m2.group(1))
        m3 = re.match(rf"\s*Residual\s+(\d+)\s+({_NUM})\s+({_NUM})", ln)
        if m3:
            dof, rss = int(m3.group(1)), float(m3.group(2))
        if re.match(r"\s*Data:\s+[yY]\s", ln):
            data_start = i + 1
    rows = []
    for ln in lines[data_start:]:
        nums = re.findall(_NUM, ln)
        if nums:
            rows.append([float(v) for v in nums])
    data = np.array(rows)
    return StrdProblem(path.stem, "nonlinear" if nonlinear else "linear",
                       np.array(start1) if nonlinear else None,
                       np.array(start2) if nonlinear else None,
                       np.array(cert), np.array(sd), rss, rsd, dof, data)


@pytest.fixture(scope="session")
def strd(reference_dir):
    folder = reference_dir / "nist-strd"

    def load(name: str) -> StrdProblem:
        return read_strd(folder / f"{name}.dat")

    return load


def log_relative_error(value, certified):
    """Log relative error (number of correct significant digits), as NIST uses it."""
    value = np.asarray(value, dtype=float)
    certified = np.asarray(certified, dtype=float)
    with np.errstate(divide="ignore"):
        err = np.abs(value - certified)
        rel = np.where(certified != 0, err / np.abs(certified), err)
        out = -np.log10(rel)
    return np.where(err == 0, 15.0, np.minimum(out, 15.0))


@pytest.fixture(scope="session")
def lre():
    return log_relative_error
