"""Test-wide fixtures: a private kernel cache and user folder per session."""

from __future__ import annotations

import os
import tempfile

import pytest

_CACHE = tempfile.mkdtemp(prefix="sheafsynth-test-cache-")
os.environ.setdefault("SHEAFSYNTH_CACHE_DIR", _CACHE)


@pytest.fixture
def user_dir(tmp_path, monkeypatch):
    """A private user preset folder."""
    d = tmp_path / "user-presets"
    monkeypatch.setenv("SHEAFSYNTH_USER_DIR", str(d))
    return d
