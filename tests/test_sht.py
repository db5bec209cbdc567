"""The ducc0 transforms in cmbtools._sht against healpy (a general-purpose reference)."""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest

from cmbtools import _sht


@pytest.fixture(scope="module")
def band_limited_map():
    nside, lmax = 32, 95
    rng = np.random.default_rng(7)
    n = _sht.alm_size(lmax)
    alm = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) / np.sqrt(2)
    alm[: lmax + 1] = rng.standard_normal(lmax + 1)  # m = 0 coefficients are real
    ell = _sht.alm_ell(lmax)
    alm *= 1.0 / (ell + 5.0)
    return nside, lmax, alm, _sht.alm2map(alm, nside, lmax, nthreads=1)


def test_layout_matches_healpy():
    for lmax in (0, 1, 7, 30):
        assert _sht.alm_size(lmax) == hp.Alm.getsize(lmax)
        ell, m = hp.Alm.getlm(lmax)
        np.testing.assert_array_equal(_sht.alm_ell(lmax), ell)


def test_synthesis_matches_healpy(band_limited_map):
    nside, lmax, alm, m = band_limited_map
    ref = hp.alm2map(alm, nside, lmax=lmax)
    np.testing.assert_allclose(m, ref, rtol=0, atol=1e-12 * np.abs(ref).max())


@pytest.mark.parametrize("n_iter", [0, 1, 3])
def test_analysis_matches_healpy_for_same_iterations(band_limited_map, n_iter):
    nside, lmax, _, m = band_limited_map
    ours = _sht.map2alm(m, lmax, n_iter=n_iter, nthreads=1)
    ref = hp.map2alm(m, lmax=lmax, iter=n_iter)
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-11 * np.abs(ref).max())


def test_iterations_converge_to_the_input():
    # Below lmax = 2 nside the HEALPix grid determines a band-limited map, so the
    # Jacobi refinement converges to the input coefficients (common practice).
    nside, lmax = 32, 47
    rng = np.random.default_rng(7)
    n = _sht.alm_size(lmax)
    alm = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) / np.sqrt(2)
    alm[: lmax + 1] = rng.standard_normal(lmax + 1)
    m = _sht.alm2map(alm, nside, lmax, nthreads=1)
    err = [np.abs(_sht.map2alm(m, lmax, n_iter=k, nthreads=1) - alm).max() for k in (0, 3, 10)]
    assert err[0] < 0.05  # plain quadrature: percent-level error
    assert err[1] < 1e-3 * err[0]
    assert err[2] < 1e-12


def test_spectrum_matches_anafast(band_limited_map):
    nside, lmax, _, m = band_limited_map
    alm = _sht.map2alm(m, lmax, n_iter=3, nthreads=1)
    np.testing.assert_allclose(_sht.alm2cl(alm), hp.anafast(m, lmax=lmax, iter=3), rtol=1e-10)
    m2 = np.roll(m, 5)
    alm2 = _sht.map2alm(m2, lmax, n_iter=3, nthreads=1)
    np.testing.assert_allclose(
        _sht.alm2cl(alm, alm2), hp.anafast(m, m2, lmax=lmax, iter=3), rtol=1e-9, atol=1e-14
    )


def test_almxfl_matches_healpy(band_limited_map):
    _, lmax, alm, _ = band_limited_map
    fl = np.linspace(1.0, 0.2, lmax + 1)
    np.testing.assert_allclose(_sht.almxfl(alm, fl, lmax), hp.almxfl(alm, fl), rtol=1e-14)
