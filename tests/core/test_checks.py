"""Boundary checks in cmbtools._core.checks."""

from __future__ import annotations

import numpy as np
import pytest

from cmbtools._core import checks as v
from cmbtools.exceptions import InvalidInputError, ResolutionMismatchError


def test_nside_must_be_a_power_of_two():
    assert v.check_nside(64) == 64
    for bad in (0, 3, 48, -2, 2.5, "16", True):
        with pytest.raises(InvalidInputError, match="'nside'"):
            v.check_nside(bad)


def test_nside_from_npix():
    assert v.nside_from_npix(12 * 128**2) == 128
    with pytest.raises(InvalidInputError, match="not 12\\*nside\\*\\*2"):
        v.nside_from_npix(1000)
    with pytest.raises(InvalidInputError):
        v.nside_from_npix(12 * 48**2)  # 48 is not a power of two


def test_lmax_message_follows_the_template():
    with pytest.raises(InvalidInputError, match=r"The 'lmax' parameter must be an int in \[0, 63\]\. Got 4096 instead\."):
        v.check_lmax(4096, nside=16)


def test_missing_pixels():
    m = np.array([1.0, v.UNSEEN, np.nan, np.inf, -np.inf, 0.0, np.float32(v.UNSEEN)])
    np.testing.assert_array_equal(v.missing_pixels(m), [False, True, True, True, True, False, True])


def test_mask_checks():
    npix = 12 * 4**2
    w = np.ones(npix)
    assert v.check_mask(w).dtype == np.float64
    with pytest.raises(InvalidInputError, match=r"values in \[0, 1\]"):
        v.check_mask(np.full(npix, 1.5))
    with pytest.raises(InvalidInputError, match="zero everywhere"):
        v.check_mask(np.zeros(npix))
    bad = w.copy()
    bad[3] = np.nan
    with pytest.raises(InvalidInputError, match="NaN"):
        v.check_mask(bad)


def test_same_nside():
    with pytest.raises(ResolutionMismatchError, match="nside 8 but the 'mask' has nside 4") as info:
        v.check_same_nside(np.zeros(12 * 64), np.zeros(12 * 16))
    assert (info.value.nside_a, info.value.nside_b) == (8, 4)


def test_cl_checks():
    with pytest.raises(InvalidInputError, match="negative"):
        v.check_cl([1.0, -1.0])
    with pytest.raises(InvalidInputError, match="non-finite"):
        v.check_cl([1.0, np.nan])
    with pytest.raises(InvalidInputError, match="extend to ell=5"):
        v.check_cl([1.0, 1.0], lmax=5)


def test_threads(monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "3")
    assert v.resolve_nthreads(None) == 3
    assert v.resolve_nthreads(2) == 2
    with pytest.raises(InvalidInputError):
        v.resolve_nthreads(-1)
