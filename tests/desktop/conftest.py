"""Desktop tests run offscreen, with settings written to a temporary folder."""
from __future__ import annotations

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

import pytest  # noqa: E402


@pytest.fixture
def settings_file(tmp_path):
    """Path of a throw-away QSettings ini file (the user's own settings stay untouched)."""
    return str(tmp_path / "ballast-test.ini")
