"""Shared fixtures. The reference data live under tests/reference/data/ (sources in
tests/README.md and tests/reference/data/README.md); BALLAST_REFERENCE may point at
another copy of the same layout."""
from __future__ import annotations

import os
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
REFERENCE = Path(os.environ.get("BALLAST_REFERENCE") or Path(__file__).resolve().parent / "reference" / "data")


@pytest.fixture(scope="session")
def reference_dir() -> Path:
    # The data ship with the tests: an absent folder is a broken checkout, not a reason to skip.
    if not (REFERENCE / "nist-strd").is_dir() or not (REFERENCE / "robust").is_dir():
        pytest.fail(f"reference data folder {REFERENCE} is incomplete (expected nist-strd/ and robust/ "
                    "inside it; the copy in the project is tests/reference/data/)", pytrace=False)
    return REFERENCE
