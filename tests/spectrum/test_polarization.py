"""Polarized spectra: spin-2 transforms, E/B coupling matrices, MASTER for TT..BB, B-mode purification.

References outside the project: healpy's full-sky polarized transforms and spectra (map2alm/alm2map/
anafast with pol=True), sympy's exact Wigner 3j symbols.
"""

from __future__ import annotations

import math

import healpy as hp
import numpy as np
import pytest
from sympy.physics.wigner import wigner_3j

from cmbtools._core import sht
from cmbtools.maps.masks import apodize_mask, cap_mask, disc_mask
from cmbtools.spectrum import Binning, PolarizedBandpowers, PolarizedSpectrumEstimator, SPECTRA
from cmbtools.spectrum import coupling, purification


def _iqu_alm(lmax, rng, amp=(1.0, 0.3, 0.1, 0.1), pure_e=False):
    """T, E, B coefficients with TT, EE, BB, TE ~ amp / (l + 5)^2 (K^2 scale 1e-10), healpy's layout."""
    ell = np.arange(lmax + 1.0)
    shape = 1e-10 / (ell + 5.0) ** 2
    tt, ee, bb, te = (a * shape for a in amp)
    n = sht.alm_size(lmax)
    lidx = sht.alm_ell(lmax)

    def gauss():
        z = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) / np.sqrt(2.0)
        z[: lmax + 1] = rng.standard_normal(lmax + 1)
        return z

    z1, z2, z3 = gauss(), gauss(), gauss()
    a_t = np.sqrt(tt[lidx]) * z1
    a_e = (te / np.sqrt(tt))[lidx] * z1 + np.sqrt(ee - te**2 / tt)[lidx] * z2
    a_b = np.zeros(n, complex) if pure_e else np.sqrt(bb[lidx]) * z3
    for a in (a_t, a_e, a_b):
        a[lidx < 2] = 0.0
    return np.array([a_t, a_e, a_b]), {"TT": tt, "EE": ee, "BB": 0 * bb if pure_e else bb, "TE": te}


def test_spin2_transforms_match_healpy():
    nside, lmax = 32, 95
    alm, _ = _iqu_alm(lmax, np.random.default_rng(1))
    ref = hp.alm2map(alm, nside, lmax=lmax, pol=True)  # healpy: the reference convention
    q, u = sht.alm2map_spin2(alm[1], alm[2], nside, lmax, nthreads=1)
    scale = np.abs(ref[1:]).max()
    np.testing.assert_allclose(q, ref[1], rtol=0, atol=1e-12 * scale)
    np.testing.assert_allclose(u, ref[2], rtol=0, atol=1e-12 * scale)
    for n_iter in (0, 3):
        ours = sht.map2alm_spin2(ref[1], ref[2], lmax, n_iter=n_iter, nthreads=1)
        theirs = hp.map2alm(ref, lmax=lmax, iter=n_iter, pol=True)[1:]
        for a, b in zip(ours, theirs):
            np.testing.assert_allclose(a, b, rtol=0, atol=1e-11 * np.abs(b).max())


def test_split_spin_transform_equals_one_call(monkeypatch):
    nside, lmax = 32, 95
    alm, _ = _iqu_alm(lmax, np.random.default_rng(2))
    q, u = sht.alm2map_spin2(alm[1], alm[2], nside, lmax, nthreads=1)
    whole = sht.map2alm_spin(np.stack([q, u]), 2, lmax, nthreads=1)
    monkeypatch.setattr(sht, "ONE_CALL_BYTES", 1000)
    monkeypatch.setattr(sht, "LEG_BUFFER_BYTES", 40000)
    rings = sht.occupied_rings(q)
    pieces = sht.map2alm_spin(np.stack([q, u]), 2, lmax, nthreads=1, rings=rings)
    np.testing.assert_allclose(pieces, whole, rtol=0, atol=1e-13 * np.abs(whole).max())


def test_coupling_kernels_match_exact_3j_sums():
    # Defining sums (Kogut et al. 2003, ApJS 148, 161; Hivon et al. 2002, ApJ 567, 2, eq. A31 extended
    # to spin 2), evaluated with sympy's exact Wigner 3j symbols.
    lmax = 6
    rng = np.random.default_rng(3)
    w = rng.uniform(0.1, 1.0, 2 * lmax + 1)
    m00, m02, mpp, mmm, mpp_alone = coupling.coupling_matrices([("00", w), ("02", w), ("+-", w), ("++", w)], lmax,
                                                               nthreads=1)
    ref = np.zeros((4, lmax + 1, lmax + 1))
    for l1 in range(lmax + 1):
        for l2 in range(lmax + 1):
            for l3 in range(abs(l1 - l2), l1 + l2 + 1):
                a = float(wigner_3j(l1, l2, l3, 0, 0, 0))
                b = float(wigner_3j(l1, l2, l3, -2, 2, 0)) if min(l1, l2) >= 2 else 0.0
                f = (2 * l2 + 1) * (2 * l3 + 1) / (4 * np.pi) * w[l3]
                even = (l1 + l2 + l3) % 2 == 0
                ref[0, l1, l2] += f * a * a
                ref[1, l1, l2] += f * a * b
                ref[2, l1, l2] += f * b * b * even
                ref[3, l1, l2] += f * b * b * (not even)
    for ours, exact in zip((m00, m02, mpp, mmm, mpp_alone), (*ref, ref[2])):
        np.testing.assert_allclose(ours, exact, rtol=0, atol=1e-14 * np.abs(ref).max())
    assert np.abs(ref[3]).max() > 0.01 * np.abs(ref[2]).max()  # the E/B mixing block is not empty


def test_pure_b_ratio_is_the_factorial_ratio():
    # N_l = sqrt((l-2)!/(l+2)!) (Smith 2006, PRD 74, 083002)
    r = coupling.pure_b_ratio(9)
    n = [math.sqrt(math.factorial(l - 2) / math.factorial(l + 2)) if l >= 2 else 0.0 for l in range(10)]
    for l1 in range(10):
        for l2 in range(10):
            expected = n[l1] / n[l2] if (l1 >= 2 and l2 >= 2) else 0.0
            assert r[l1, l2] == pytest.approx(expected, rel=1e-13, abs=0)


@pytest.fixture(scope="module")
def full_sky():
    nside, lmax = 32, 64
    alm, cl = _iqu_alm(lmax, np.random.default_rng(5))
    return nside, lmax, hp.alm2map(alm, nside, lmax=lmax, pol=True), cl


def test_full_sky_pseudo_spectra_equal_healpy(full_sky):
    nside, lmax, maps, _ = full_sky
    est = PolarizedSpectrumEstimator(np.ones(maps.shape[1]), Binning.uniform(2, lmax, 1, weighting="cl"),
                                     lmax=lmax, pixel_window=False, remove_monopole_dipole=False, nthreads=1)
    ref = hp.anafast(maps, lmax=lmax, iter=0, pol=True)  # healpy order: TT EE BB TE EB TB
    ref = dict(zip(("TT", "EE", "BB", "TE", "EB", "TB"), ref))
    pseudo = est.pseudo_spectra(maps)
    bp = est.estimate(maps)
    for i, s in enumerate(SPECTRA):
        scale = np.abs(ref[s]).max()
        np.testing.assert_allclose(pseudo[s], ref[s], rtol=0, atol=1e-13 * scale)
        # the decoupled bandpowers: the full-sky coupling is the identity up to the grid's quadrature
        np.testing.assert_allclose(bp.cl[i], ref[s][2:], rtol=0, atol=2e-6 * scale)


def test_pure_e_sky_has_no_bb_on_the_full_sky():
    nside, lmax = 32, 48
    alm, _ = _iqu_alm(lmax, np.random.default_rng(6), pure_e=True)
    maps = hp.alm2map(alm, nside, lmax=lmax, pol=True)
    est = PolarizedSpectrumEstimator(np.ones(maps.shape[1]), Binning.uniform(2, lmax, 6), lmax=lmax,
                                     pixel_window=False, nthreads=1)
    bp = est.estimate(maps)
    ee, bb, eb = (bp.cl[SPECTRA.index(s)] for s in ("EE", "BB", "EB"))
    assert np.abs(bb).max() < 1e-5 * ee.min()  # HEALPix quadrature error only (common practice)
    assert np.abs(eb).max() < 1e-3 * ee.min()


def _patch(nside):
    mask = cap_mask(nside, 30.0, 50.0, 35.0)
    holes = disc_mask(nside, [(40.0, 55.0), (20.0, 40.0)], radius_deg=3.0)
    return apodize_mask(mask * holes, 8.0, nthreads=1)


def test_purification_removes_e_to_b_leakage():
    # A pure-E sky through an apodized patch: the standard pseudo-B is E leakage; the pure B is not
    # (Smith 2006; the window's spin-1 and spin-2 derivatives from its harmonic coefficients).
    nside, lmax = 64, 96
    alm, _ = _iqu_alm(lmax, np.random.default_rng(7), pure_e=True)
    q, u = hp.alm2map(alm, nside, lmax=lmax, pol=True)[1:]
    w = _patch(nside)
    _, b_std = sht.map2alm_spin2(w * q, w * u, lmax, nthreads=1)
    d1, d2 = purification.window_derivatives(w, lmax, nthreads=1)
    e_pure, b_pure = purification.pure_eb_alm(q, u, w, d1, d2, lmax, nthreads=1)
    std, pure = sht.alm2cl(b_std, lmax=lmax), sht.alm2cl(b_pure, lmax=lmax)
    ee = sht.alm2cl(e_pure, lmax=lmax)
    # the residual is the pixel grid's quadrature of the window's derivatives, largest at the lowest l
    # (measured: 7e-2 of the standard leakage at l = 2, 1e-2 at l = 5-8, 4e-3 at l = 10, 2e-4 to 2e-3 above l = 12)
    assert np.all(pure[2:12] < 0.1 * std[2:12])
    assert np.all(pure[12:64] < 3e-3 * std[12:64])
    assert np.all(pure[12:64] < 1e-3 * ee[12:64])  # (measured 1e-5 to 5e-4)


def test_table_round_trip_and_figure(full_sky, tmp_path):
    nside, lmax, maps, cl = full_sky
    mask = _patch(nside)
    est = PolarizedSpectrumEstimator(mask, Binning.uniform(2, lmax, 16), lmax=lmax, beam=30.0, nthreads=1)
    bp = est.estimate(maps)
    back = PolarizedBandpowers.read_csv(bp.write_csv(tmp_path / "pol.csv"))
    np.testing.assert_allclose(back.cl, bp.cl, rtol=1e-15, atol=0)
    np.testing.assert_allclose(back.dl_err, bp.dl_err, rtol=1e-15, atol=0)
    assert back.metadata["pol_beam"] == "gaussian spin-2 fwhm_arcmin=30"
    text = (tmp_path / "pol.csv").read_text().splitlines()
    assert "spectrum,ell_min,ell_max,ell_eff,cl,cl_err,dl,dl_err" in text
    from astropy.io import fits

    with fits.open(bp.write_fits(tmp_path / "pol.fits")) as h:
        assert list(h[1].data["spectrum"][:: bp.n_bins]) == list(SPECTRA)
        np.testing.assert_allclose(h[1].data["cl"], bp.cl.ravel() * 1e12, rtol=1e-15)
        assert h["COVARIANCE"].data.shape == (6 * bp.n_bins, 6 * bp.n_bins)
    assert bp["EE"].cl.tolist() == bp.cl[3].tolist()
    out = bp.plot(tmp_path / "pol.png", theory=cl)
    assert out.stat().st_size > 10000
    with pytest.raises(Exception, match="exists"):
        bp.write_csv(tmp_path / "pol.csv")


def test_bad_inputs_are_refused():
    from cmbtools.exceptions import InvalidInputError

    nside = 16
    mask = np.ones(12 * nside**2)
    with pytest.raises(InvalidInputError, match="ell >= 2"):
        PolarizedSpectrumEstimator(mask, Binning.uniform(0, 40, 8, weighting="cl"), nthreads=1)
    est = PolarizedSpectrumEstimator(mask, Binning.uniform(2, 40, 8), lmax=40, pixel_window=False, nthreads=1)
    with pytest.raises(InvalidInputError, match=r"shape \(3, npix\)"):
        est.estimate(np.zeros(12 * nside**2))
    with pytest.raises(InvalidInputError, match="auto-spectra only"):
        est.estimate(np.zeros((3, mask.size)), np.zeros((3, mask.size)), noise_cl={"TT": np.ones(41)})
    with pytest.raises(InvalidInputError, match="unknown spectra"):
        est.estimate(np.zeros((3, mask.size)), noise_cl={"XX": np.ones(41)})


def test_memory_estimate_refuses_before_allocating(monkeypatch):
    from cmbtools.exceptions import CmbtoolsWarning, MemoryLimitError

    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "1MB")
    mask = np.ones(12 * 64**2)  # six dense 191 x 191 kernels alone exceed 1 MB
    with pytest.raises(MemoryLimitError, match="polarized spectrum estimator at nside 64"):
        PolarizedSpectrumEstimator(mask, Binning.uniform(2, 190, 20), pixel_window=False, nthreads=1)
    with pytest.warns(CmbtoolsWarning):
        PolarizedSpectrumEstimator(mask, Binning.uniform(2, 190, 20), pixel_window=False, nthreads=1, force=True)
