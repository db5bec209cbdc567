"""Shared fixtures.

Every test run uses a private on-disk cache directory so that tests never read
a user's cache and never depend on each other through it.
"""

from __future__ import annotations

import os

import numpy as np
import pytest


@pytest.fixture(autouse=True, scope="session")
def _private_cache_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("cmbtools-cache")
    old = os.environ.get("CMBTOOLS_CACHE_DIR")
    os.environ["CMBTOOLS_CACHE_DIR"] = str(d)
    yield d
    if old is None:
        os.environ.pop("CMBTOOLS_CACHE_DIR", None)
    else:
        os.environ["CMBTOOLS_CACHE_DIR"] = old


@pytest.fixture
def rng():
    """A fresh, seeded generator (tests never touch numpy's global state)."""
    return np.random.default_rng(20261202)
