"""The installable package: a wheel built from the checkout holds both packages, the
``ballast`` command and the sample sets, and an installed copy finds its sample sets.

The wheel is built offline (no build isolation, no dependencies) from a copy of the
files a source build reads, so the checkout gets no build/ or egg-info folders.
"""
from __future__ import annotations

import os
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
SAMPLE_SUFFIXES = (".csv", ".tsv", ".txt", ".xlsx", ".ods")


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    src = tmp_path_factory.mktemp("src")
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(ROOT / name, src / name)
    ignore = shutil.ignore_patterns("__pycache__", "*.pyc", "*.ballast.recovery")
    for folder in ("fitcore", "desktop", "sample_sets"):
        shutil.copytree(ROOT / folder, src / folder, ignore=ignore)
    dist = tmp_path_factory.mktemp("dist")
    out = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
                          "--no-index", "-q", "-w", str(dist), str(src)],
                         capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stdout + out.stderr
    wheels = list(dist.glob("ballast-*.whl"))
    assert len(wheels) == 1, wheels
    return wheels[0]


def _names(wheel: Path) -> set[str]:
    with zipfile.ZipFile(wheel) as zf:
        return set(zf.namelist())


def test_wheel_holds_every_module_of_both_packages(wheel):
    names = _names(wheel)
    for package in ("fitcore", "desktop"):
        for module in (ROOT / package).rglob("*.py"):
            assert module.relative_to(ROOT).as_posix() in names, module
    # only the two packages and their metadata: no tests, benchmarks or reference data
    tops = {n.split("/", 1)[0] for n in names}
    rest = tops - {"fitcore", "desktop"}
    assert len(rest) == 1 and rest.pop().endswith(".dist-info"), tops


def test_wheel_ships_the_sample_sets_and_their_readme(wheel):
    names = _names(wheel)
    samples = sorted(p.name for p in (ROOT / "sample_sets").iterdir() if p.suffix.lower() in SAMPLE_SUFFIXES)
    assert len(samples) >= 7
    for name in samples + ["README.md"]:
        assert f"desktop/sample_sets/{name}" in names, name
    assert not any(n.endswith(".qss") for n in names)


def test_wheel_declares_the_ballast_command(wheel):
    with zipfile.ZipFile(wheel) as zf:
        entry = next(n for n in zf.namelist() if n.endswith(".dist-info/entry_points.txt"))
        text = zf.read(entry).decode()
    assert "[console_scripts]" in text
    assert "ballast = desktop.app:main" in text
    # every command the project declares (read by hand: tomllib is Python 3.11+)
    section = (ROOT / "pyproject.toml").read_text().split("[project.scripts]", 1)[1].split("\n[", 1)[0]
    scripts = [ln.replace('"', "").split("=") for ln in section.splitlines() if "=" in ln]
    assert scripts
    for name, target in scripts:
        assert f"{name.strip()} = {target.strip()}" in text


def test_installed_copy_finds_its_sample_sets(wheel, tmp_path):
    target = tmp_path / "site"
    out = subprocess.run([sys.executable, "-m", "pip", "install", "--no-deps", "--no-index", "-q",
                          "--target", str(target), str(wheel)], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stdout + out.stderr
    env = dict(os.environ, PYTHONPATH=str(target))
    probe = ("import desktop, desktop.dialogs as d, desktop.main_window as w; "
             "print(desktop.__file__); print(d.SAMPLE_DIR); print(len(d.sample_sets())); "
             "print(w.first_sample_set()); print(len(d.readme_descriptions()))")
    out = subprocess.run([sys.executable, "-c", probe], cwd=tmp_path, env=env,
                         capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    module, sample_dir, n, first, n_described = out.stdout.split("\n")[:5]
    assert Path(module).is_relative_to(target)          # the installed copy, not the checkout
    assert Path(sample_dir) == target / "desktop" / "sample_sets"
    assert int(n) >= 7 and Path(first).name.startswith("01_") and Path(first).is_file()
    assert int(n_described) == int(n)                   # the README ships too
