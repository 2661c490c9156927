"""Shared fixtures. The reference data live in ../shared/reference beside the project."""
from __future__ import annotations

import os
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
REFERENCE = Path(os.environ.get("BALLAST_REFERENCE", ROOT.parent / "shared" / "reference"))


@pytest.fixture(scope="session")
def reference_dir() -> Path:
    if not REFERENCE.is_dir():
        pytest.skip(f"reference folder {REFERENCE} is absent (../shared/reference beside the project)")
    return REFERENCE
