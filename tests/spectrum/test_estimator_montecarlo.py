"""Monte Carlo checks of the spectrum estimator: bias, error bars, noise bias of auto- and cross-spectra.

One set of 200 seeded Gaussian skies (nside 64) with a 60' Gaussian beam, observed twice with
independent white noise, masked by an apodized cap keeping about 40% of the sky.  The skies are
drawn from our own complex Gaussian alm (numpy's default_rng) and synthesized with
cmbtools._core.sht.alm2map.
"""

from __future__ import annotations

import numpy as np
import pytest

from cmbtools import maps
from cmbtools._core import sht as _sht
from cmbtools.spectrum import Binning, SpectrumEstimator, gaussian_beam

pytestmark = pytest.mark.slow

NSIDE = 64
LMAX = 3 * NSIDE - 1
LAST = 177  # bins end one bin width below lmax: the top bin's scatter runs ~15% above Knox
WIDTH = 16
N_SIMS = 200  # the scatter of a standard deviation over 200 sims is ~5%, well inside the 20% check
FWHM = 60.0
SIGMA_PIX = 5e-5  # white noise per pixel, K


def _spectrum():
    ell = np.arange(LMAX + 1)
    return np.where(ell >= 2, 2e-10 * (20.0 / (ell + 20.0)) ** 1.5, 0.0)


@pytest.fixture(scope="module")
def runs():
    rng = np.random.default_rng(20260301)
    cl = _spectrum()
    beam = gaussian_beam(FWHM, LMAX)
    mask = maps.apodize_mask(maps.cap_mask(NSIDE, 100.0, -30.0, 85.0), 10.0, nthreads=2)
    est = SpectrumEstimator(mask, Binning.uniform(2, LAST, WIDTH), beam=FWHM, pixel_window=False,
                            covariance=True, nthreads=2)
    npix = 12 * NSIDE**2
    noise_cl = np.full(LMAX + 1, SIGMA_PIX**2 * 4 * np.pi / npix)  # white noise: N_l = sigma^2 Omega_pix
    out = {k: [] for k in ("auto", "auto_sub", "cross", "err", "cross_err", "cov_err")}
    n = _sht.alm_size(LMAX)
    scale = np.sqrt(cl[_sht.alm_ell(LMAX)] / 2.0)
    for _ in range(N_SIMS):
        alm = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * scale
        alm[: LMAX + 1] = alm[: LMAX + 1].real * np.sqrt(2.0)
        sky = _sht.alm2map(_sht.almxfl(alm, beam, LMAX), NSIDE, LMAX, nthreads=2)
        m1 = sky + rng.standard_normal(npix) * SIGMA_PIX
        m2 = sky + rng.standard_normal(npix) * SIGMA_PIX
        auto = est.estimate(m1)
        sub = est.estimate(m1, noise_cl=noise_cl)
        cross = est.estimate(m1, m2)
        out["auto"].append(auto.cl)
        out["auto_sub"].append(sub.cl)
        out["cross"].append(cross.cl)
        out["err"].append(sub.cl_err)
        out["cross_err"].append(cross.cl_err)
        out["cov_err"].append(np.sqrt(np.diag(sub.covariance)))
    res = {k: np.array(v) for k, v in out.items()}
    res["expected"] = est.expected_bandpowers(cl)
    res["est"] = est
    res["mask"] = mask
    return res


def _checked_bins(est):
    """Bins above l = 2 x bin width (the lowest ones feel the monopole/dipole removal most)."""
    return est.binning.ell_min >= 2 * WIDTH


def test_sky_fraction_is_in_range(runs):
    assert 0.3 <= runs["est"].f_sky <= 0.7


def test_mean_bandpowers_are_unbiased(runs):
    # mean of 100 noise-subtracted auto-spectra vs the binned input: within 3 standard errors
    # of the mean in every checked bin
    est = runs["est"]
    sel = _checked_bins(est)
    sims = runs["auto_sub"]
    mean = sims.mean(axis=0)
    sem = sims.std(axis=0, ddof=1) / np.sqrt(N_SIMS)
    pull = (mean - runs["expected"]) / sem
    assert np.all(np.abs(pull[sel]) < 3.0), pull
    # and the expectation (through the bandpower windows) is the plain bin average of the input
    # to 1% there, the last bin included: the power leaking in from the unbinned multipoles
    # 178..191 is modelled from the guess spectrum (measured -0.09 % in the last bin; 4 % high
    # before the multipoles outside the bins were modelled)
    flat = est.binning.bin_spectrum(_spectrum())
    np.testing.assert_allclose(runs["expected"][sel], flat[sel], rtol=0.01)


def test_scatter_matches_the_knox_errors(runs):
    # Knox 1995, PRD 52, 4307 with f_sky_eff = w2^2/w4 (Hivon et al. 2002): within 20% in every checked bin
    sel = _checked_bins(runs["est"])
    scatter = runs["auto_sub"].std(axis=0, ddof=1)
    ratio = scatter / runs["err"].mean(axis=0)
    assert np.all(np.abs(ratio[sel] - 1) < 0.2), ratio
    cross_ratio = runs["cross"].std(axis=0, ddof=1) / runs["cross_err"].mean(axis=0)
    assert np.all(np.abs(cross_ratio[sel] - 1) < 0.2), cross_ratio


def test_scatter_matches_the_narrow_kernel_covariance(runs):
    sel = _checked_bins(runs["est"])
    ratio = runs["auto_sub"].std(axis=0, ddof=1) / runs["cov_err"].mean(axis=0)
    assert np.all(np.abs(ratio[sel] - 1) < 0.2), ratio


def test_cross_spectrum_has_no_noise_bias_and_auto_has(runs):
    sel = _checked_bins(runs["est"])
    exp = runs["expected"]
    for key in ("cross", "auto_sub"):
        sims = runs[key]
        pull = (sims.mean(axis=0) - exp) / (sims.std(axis=0, ddof=1) / np.sqrt(N_SIMS))
        assert np.all(np.abs(pull[sel]) < 3.0), (key, pull)
    # without the noise subtraction the auto-spectrum is biased high, clearly so where the
    # deconvolved noise N_l / B_l^2 is comparable to the signal
    auto = runs["auto"]
    sem = auto.std(axis=0, ddof=1) / np.sqrt(N_SIMS)
    bias = auto.mean(axis=0) - exp
    high = runs["est"].binning.ell_min >= 100
    assert np.all(bias[high] > 10 * sem[high]), bias / sem
