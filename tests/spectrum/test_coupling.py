"""The mode-coupling matrix (cmbtools.spectrum.coupling) against independent computations."""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest
from sympy.physics.wigner import wigner_3j

from cmbtools import maps
from cmbtools.spectrum import coupling as _coupling
from cmbtools.exceptions import InvalidInputError


def _master_reference(w_l, lmax):
    """MASTER coupling from exact Wigner 3j symbols (sympy).

    Hivon et al. 2002, ApJ 567, 2, eq. A31:
    M_{l1 l2} = (2 l2 + 1)/(4 pi) sum_l3 (2 l3 + 1) W_l3 (l1 l2 l3; 0 0 0)^2.
    """
    m = np.zeros((lmax + 1, lmax + 1))
    for l1 in range(lmax + 1):
        for l2 in range(lmax + 1):
            s = 0.0
            for l3 in range(abs(l1 - l2), l1 + l2 + 1):
                if (l1 + l2 + l3) % 2:
                    continue  # (l1 l2 l3; 0 0 0) vanishes for odd l1+l2+l3
                s += (2 * l3 + 1) * w_l[l3] * float(wigner_3j(l1, l2, l3, 0, 0, 0)) ** 2
            m[l1, l2] = (2 * l2 + 1) / (4 * np.pi) * s
    return m


def test_coupling_matches_sympy_wigner_3j():
    lmax = 12
    rng = np.random.default_rng(11)
    w_l = rng.uniform(0.1, 1.0, 2 * lmax + 1) / (1.0 + np.arange(2 * lmax + 1)) ** 2
    ref = _master_reference(w_l, lmax)
    got = _coupling.coupling_matrix(w_l, lmax, nthreads=1)
    assert got.shape == (lmax + 1, lmax + 1)
    # exact 3j symbols vs ducc0's recursion: agreement to rounding
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-14 * np.abs(ref).max())


def test_unscaled_form_is_symmetric():
    # M_ll'/(2l'+1) = (1/4pi) sum (2l''+1) W (3j)^2 is symmetric in l, l' (Hivon et al. 2002, eq. A31)
    lmax = 20
    w_l = 1.0 / (1.0 + np.arange(2 * lmax + 1)) ** 1.5
    m = _coupling.coupling_matrix(w_l, lmax, nthreads=1, scale_columns=False)
    np.testing.assert_allclose(m, m.T, rtol=1e-13, atol=0)
    full = _coupling.coupling_matrix(w_l, lmax, nthreads=1)
    np.testing.assert_allclose(full, m * (2 * np.arange(lmax + 1) + 1)[None, :], rtol=1e-14)


def test_monopole_only_mask_spectrum_gives_identity():
    # A full-sky unit weight has W_l = 4 pi delta_l0, and then M = identity exactly
    # ((l l' 0; 0 0 0)^2 = delta_ll' / (2l+1), a standard 3j identity; common practice).
    lmax = 40
    w_l = np.zeros(2 * lmax + 1)
    w_l[0] = 4 * np.pi
    m = _coupling.coupling_matrix(w_l, lmax, nthreads=1)
    np.testing.assert_allclose(m, np.eye(lmax + 1), rtol=0, atol=1e-13)


def test_white_spectrum_row_sums_equal_mean_squared_weight():
    # For a white spectrum C_l = 1 (all l), <C~_l> = sum_l' M_ll' = mean(w^2) when the mask's own
    # spectrum is band-limited (Hivon et al. 2002, eq. 9 with sum_l (2l+1) W_l / 4pi = mean(w^2)).
    # Row l needs l' up to l + lw, so only rows l <= lmax - lw are complete.
    lw = 8
    lmax = 40
    rng = np.random.default_rng(5)
    w_l = np.zeros(2 * lmax + 1)
    w_l[: lw + 1] = rng.uniform(0.0, 1.0, lw + 1)
    m = _coupling.coupling_matrix(w_l, lmax, nthreads=1)
    w2 = np.sum((2 * np.arange(2 * lmax + 1) + 1) * w_l) / (4 * np.pi)
    np.testing.assert_allclose(m.sum(axis=1)[: lmax - lw + 1], w2, rtol=1e-12)


def test_mask_spectrum_equals_healpy_anafast():
    # the mask's spectrum is the plain quadrature spectrum: healpy.anafast with iter=0 is a reference
    nside, lmax = 16, 20
    mask = maps.apodize_mask(maps.cap_mask(nside, 30.0, 20.0, 50.0), 15.0, nthreads=1)
    got = _coupling.mask_spectrum(mask, lmax=lmax, nthreads=1)
    ref = hp.anafast(mask, lmax=2 * lmax, iter=0)
    np.testing.assert_allclose(got, ref, rtol=1e-11, atol=1e-15 * ref[0])
    cross = _coupling.mask_spectrum(mask, np.ones_like(mask), lmax=lmax, nthreads=1)
    np.testing.assert_allclose(cross, hp.anafast(mask, np.ones_like(mask), lmax=2 * lmax, iter=0),
                               rtol=1e-10, atol=1e-14 * ref[0])


def test_mask_spectrum_with_refinement_stops_at_3_nside():
    nside, lmax = 16, 40
    mask = np.ones(12 * nside**2)
    assert _coupling.mask_lmax(lmax, nside, 0) == 80
    assert _coupling.mask_lmax(lmax, nside, 3) == 47
    w = _coupling.mask_spectrum(mask, lmax=lmax, n_iter=3, nthreads=1)
    assert w.size == 48


def test_fast_coupling_close_to_exact_for_a_smooth_mask_spectrum():
    # Louis et al. 2020, PRD 102, 123538: exact below l_exact, banded, Toeplitz above.
    nside, lmax = 128, 383
    mask = maps.apodize_mask(maps.cap_mask(nside, 0.0, 30.0, 50.0), 5.0, nthreads=2)
    w = _coupling.mask_spectrum(mask, lmax=lmax, nthreads=2)
    w[3 * nside:] = 0.0  # drop the pixel-scale aliasing tail (see the estimator tests for its role)
    exact = _coupling.coupling_matrix(w, lmax, nthreads=2)
    fast = _coupling.coupling_matrix(w, lmax, fast=(100, 200, 100), nthreads=2)
    np.testing.assert_array_equal(fast[:100], exact[:100])  # rows below l_exact are exact
    rel = np.abs(fast - exact).max(axis=1) / np.abs(exact).max(axis=1)
    assert rel.max() < 1e-4, rel.max()


def test_bad_fast_settings_and_spectra_raise():
    w = np.ones(41)
    with pytest.raises(InvalidInputError, match="l_exact <= l_toeplitz"):
        _coupling.coupling_matrix(w, 20, fast=(15, 10, 5), nthreads=1)
    with pytest.raises(InvalidInputError, match="finite"):
        _coupling.coupling_matrix(np.array([1.0, np.nan]), 20, nthreads=1)


def test_default_fast_settings_are_ordered():
    for lmax in (50, 767, 3071, 6143):
        le, lt, band = _coupling.default_fast_settings(lmax)
        assert 0 <= le <= lt <= lmax and band >= 1
