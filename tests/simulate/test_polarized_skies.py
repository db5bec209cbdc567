"""Correlated Gaussian I, Q, U skies and polarized noise (cmbtools.simulate).

External references: ``healpy.anafast(pol=True)`` (full-sky spectra of the simulated maps) and
``healpy.alm2map(pol=True)`` (synthesis of the same coefficients); the cosmic variance of a measured
full-sky cross-spectrum, var(C^XY_l) = (C^XX_l C^YY_l + (C^XY_l)^2) / (2l+1) (Knox 1995, PRD 52, 4307;
common practice).
"""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest

from cmbtools import simulate
from cmbtools._core.checks import UNSEEN
from cmbtools.exceptions import InvalidInputError

# anafast's order: TT, EE, BB, TE, EB, TB
HP_ORDER = ("TT", "EE", "BB", "TE", "EB", "TB")


def _toy_spectra(lmax, *, tb=0.0, eb=0.0):
    ell = np.arange(lmax + 1)
    base = np.where(ell >= 2, 1e-9 * 20.0 / (ell + 20.0) ** 2, 0.0)
    s = {"TT": 50 * base, "EE": 2 * base, "BB": 0.5 * base, "TE": 5 * base}
    if tb or eb:
        s["TB"] = tb * base
        s["EB"] = eb * base
    return s


@pytest.mark.parametrize("tb, eb", [(0.0, 0.0), (2.0, 0.4)])
def test_sky_spectra_match_the_input_within_cosmic_variance(tb, eb):
    nside, lmax, n_sims, width = 32, 64, 24, 8
    s = _toy_spectra(lmax, tb=tb, eb=eb)
    full = simulate.check_spectra(s, lmax)
    acc = {k: np.zeros(lmax + 1) for k in HP_ORDER}
    for i in range(n_sims):
        m = simulate.gaussian_iqu_sky(s, nside, lmax=lmax, pixel_window=False, rng=simulate.simulation_rng(11, i),
                                      nthreads=1)
        cl = hp.anafast(m, lmax=lmax, pol=True, iter=3)
        for k, c in zip(HP_ORDER, cl):
            acc[k] += c / n_sims
    ell = np.arange(lmax + 1)
    pairs = {"TT": ("TT", "TT"), "EE": ("EE", "EE"), "BB": ("BB", "BB"), "TE": ("TT", "EE"),
             "EB": ("EE", "BB"), "TB": ("TT", "BB")}
    worst = 0.0
    for k, (a, b) in pairs.items():
        var = (full[a] * full[b] + full[k] ** 2) / (2 * ell + 1)
        for lo in range(2, lmax - width + 2, width):
            sl = slice(lo, lo + width)
            sigma = np.sqrt(var[sl].sum()) / width / np.sqrt(n_sims)
            z = abs(acc[k][sl].mean() - full[k][sl].mean()) / sigma
            worst = max(worst, z)
            assert z < 4.0, (k, lo, z)  # 4 sigma over 7 bins x 6 spectra: a false alarm has probability ~3e-3
    assert worst > 0.3  # the scatter is real (not a copy of the input)


def test_sky_is_the_synthesis_of_its_coefficients_with_beams_and_pixel_windows():
    nside, lmax = 16, 40
    s = _toy_spectra(lmax)
    m = simulate.gaussian_iqu_sky(s, nside, lmax=lmax, beam=30.0, rng=5, nthreads=1)
    alm = simulate.gaussian_iqu_alm(s, lmax, rng=5)
    from cmbtools.spectrum import gaussian_beam, gaussian_polarized_beam, pixel_window, polarization_pixel_window

    ft = gaussian_beam(30.0, lmax) * pixel_window(nside, lmax)
    fp = gaussian_polarized_beam(30.0, lmax) * polarization_pixel_window(nside, lmax)
    ref = hp.alm2map([hp.almxfl(alm[0], ft), hp.almxfl(alm[1], fp), hp.almxfl(alm[2], fp)], nside, lmax=lmax, pol=True)
    np.testing.assert_allclose(m, ref, rtol=0, atol=1e-12 * np.abs(ref).max())
    # same seed, same sky; the draws are three unit-variance gaussian_alm sets combined by the Cholesky factor
    np.testing.assert_array_equal(simulate.gaussian_iqu_alm(s, lmax, rng=5), alm)
    seq = np.random.SeedSequence(5)
    g_t = simulate.gaussian_alm(np.ones(lmax + 1), lmax, rng=seq)
    np.testing.assert_allclose(alm[0], np.sqrt(s["TT"])[hp.Alm.getlm(lmax)[0]] * g_t, rtol=1e-14)
    # the monopole and dipole go into I only
    with_md = simulate.gaussian_iqu_sky(s, nside, lmax=lmax, beam=30.0, rng=5, nthreads=1, monopole=2.7,
                                        dipole=simulate.Dipole(3e-3, 264.0, 48.0))
    np.testing.assert_array_equal(with_md[1:], m[1:])
    assert abs(np.mean(with_md[0] - m[0]) - 2.7) < 1e-12


def test_bad_spectra_are_refused():
    s = _toy_spectra(20)
    with pytest.raises(InvalidInputError, match="lack the spectrum.*'TE'"):
        simulate.gaussian_iqu_alm({k: v for k, v in s.items() if k != "TE"}, 20)
    bad = dict(s, TE=10 * s["TE"])  # TE^2 = 4 TT EE
    with pytest.raises(InvalidInputError, match="not a valid covariance at ell 2: TE\\^2 > TT EE"):
        simulate.gaussian_iqu_alm(bad, 20)
    with pytest.raises(InvalidInputError, match="negative at ell 3"):
        simulate.gaussian_iqu_alm(dict(s, BB=np.where(np.arange(21) == 3, -1.0, s["BB"])), 20)
    with pytest.raises(InvalidInputError, match="unknown key"):
        simulate.gaussian_iqu_alm(dict(s, XX=s["TT"]), 20)
    with pytest.raises(InvalidInputError, match="must extend to ell=30"):
        simulate.gaussian_iqu_alm(s, 30)


def test_polarized_noise_levels():
    nside = 64
    model = simulate.NoiseModel(40.0)
    n = simulate.iqu_noise_map(model, nside, rng=3)
    npix = 12 * nside**2
    sigma_t = np.sqrt(model.white_noise * npix / (4 * np.pi))
    # per-pixel standard deviations: I at the depth, Q and U sqrt(2) times it (common practice);
    # the standard error of a sample standard deviation of 49152 draws is 0.32 %
    for i, factor in enumerate((1.0, np.sqrt(2.0), np.sqrt(2.0))):
        assert abs(n[i].std() / (factor * sigma_t) - 1.0) < 0.013
    assert abs(np.corrcoef(n[1], n[2])[0, 1]) < 0.02 and abs(np.corrcoef(n[0], n[1])[0, 1]) < 0.02
    # the E and B noise power is twice the temperature one (healpy.anafast of the maps)
    cl = hp.anafast(n, lmax=2 * nside, pol=True, iter=1)
    nl = simulate.polarized_noise_spectra(model, 2 * nside)
    w = 2 * np.arange(2, 2 * nside + 1) + 1.0
    for k, idx in (("TT", 0), ("EE", 1), ("BB", 2)):
        ratio = np.sum(w * cl[idx][2:]) / np.sum(w * nl[k][2:])
        assert abs(ratio - 1.0) < 0.04, (k, ratio)  # ~16600 modes: standard error 1.1 %
    assert nl["EE"][5] == 2 * nl["TT"][5] and np.all(nl["TE"] == 0)
    # a hits map shapes all three and leaves unobserved pixels UNSEEN in all three
    hits = np.ones(npix)
    hits[: npix // 2] = 4.0
    hits[:100] = 0.0
    nh = simulate.iqu_noise_map(simulate.NoiseModel(40.0, hits=hits), nside, rng=4)
    assert np.all(nh[:, :100] == UNSEEN)
    deep, shallow = slice(100, npix // 2), slice(npix // 2, npix)
    for i in range(3):
        assert abs(nh[i, shallow].std() / nh[i, deep].std() - 2.0) < 0.04
    assert abs(nh[1, shallow].std() / nh[0, shallow].std() - np.sqrt(2.0)) < 0.04
