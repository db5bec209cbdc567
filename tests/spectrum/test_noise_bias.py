"""The noise bias of an auto-spectrum, including the white tail of pixel noise above lmax (fast, nside 16).

A fast version of the slow Monte Carlo check in test_estimator_montecarlo.py.  Pixel noise is not
band-limited: white noise of per-pixel variance sigma^2 has N_l = sigma^2 Omega_pix at every
multipole, and the pseudo-spectrum of the masked noise is mean(w^2) N_l on any pixel grid (the
addition theorem of spherical harmonics; Hivon et al. 2002, ApJ 567, 2, eq. 5 with a flat N_l).
With lmax = 2 nside - 1 the rows of the mode-coupling matrix carry a good part of their weight
above lmax, so an estimator that forgot that tail would leave a bias of several standard errors.
"""

from __future__ import annotations

import numpy as np
import pytest

from cmbtools import maps
from cmbtools.spectrum import Binning, SpectrumEstimator

NSIDE = 16
LMAX = 2 * NSIDE - 1
NPIX = 12 * NSIDE**2
SIGMA = 1e-5  # K per pixel
N_WHITE = SIGMA**2 * 4.0 * np.pi / NPIX  # K^2 (common practice: N_l = sigma^2 Omega_pix)
N_SIMS = 400


@pytest.fixture(scope="module")
def noise_runs():
    mask = maps.apodize_mask(maps.cap_mask(NSIDE, 40.0, 20.0, 70.0), 15.0, nthreads=1)
    est = SpectrumEstimator(mask, Binning.uniform(2, LMAX, 6, weighting="cl"), lmax=LMAX, pixel_window=False,
                            remove_monopole_dipole=False, nthreads=1)
    rng = np.random.default_rng(20261202)
    noise_cl = np.full(LMAX + 1, N_WHITE)
    raw, subtracted = [], []
    for _ in range(N_SIMS):
        m = rng.standard_normal(NPIX) * SIGMA
        raw.append(est.estimate(m).cl)
        subtracted.append(est.estimate(m, noise_cl=noise_cl).cl)
    return est, mask, np.array(raw), np.array(subtracted)


def test_noise_only_maps_give_zero_after_the_noise_bias_is_subtracted(noise_runs):
    est, _, _, subtracted = noise_runs
    sem = subtracted.std(axis=0, ddof=1) / np.sqrt(N_SIMS)
    pull = subtracted.mean(axis=0) / sem
    # every bin within 4 standard errors of zero (for 5 bins a false alarm has probability ~3e-4)
    assert np.all(np.abs(pull) < 4.0), pull


def test_the_subtracted_noise_bias_is_the_whole_noise_power(noise_runs):
    # The bias the estimator subtracts is the same for every map: (raw - subtracted) of any simulation.
    est, mask, raw, subtracted = noise_runs
    bias = raw[0] - subtracted[0]
    np.testing.assert_allclose(raw[1] - subtracted[1], bias, rtol=1e-12)
    # the raw auto-spectra of noise-only maps scatter around it (4 standard errors in every bin)
    sem = raw.std(axis=0, ddof=1) / np.sqrt(N_SIMS)
    assert np.all(np.abs(raw.mean(axis=0) - bias) < 4.0 * sem), (raw.mean(axis=0) - bias) / sem
    # The check has teeth: with bins flat in C_l, a noise bias built from the coupling up to lmax only
    # would be exactly N in every bin; the white tail above lmax moves it by far more than the standard
    # error somewhere, so forgetting the tail fails the test above.
    assert np.max(np.abs(bias - N_WHITE) / sem) > 6.0, (bias - N_WHITE) / sem
    # the pseudo-spectrum of the masked noise (no coupling inverse), independent of the estimator's
    # binning: mean(w^2) N at every multipole, here checked against numpy's mean of the mask squared
    w2 = float(np.mean(mask**2))
    rng = np.random.default_rng(7)
    pseudo = np.mean([est.pseudo_spectrum(rng.standard_normal(NPIX) * SIGMA) for _ in range(200)], axis=0)
    ell = np.arange(LMAX + 1)
    # scatter of one pseudo-C_l is about sqrt(2/(f_sky (2l+1))) of its mean; of the mean of 200, /sqrt(200)
    tol = 4.0 * np.sqrt(2.0 / ((2 * ell[2:] + 1) * est.f_sky_eff * 200))
    assert np.all(np.abs(pseudo[2:] / (w2 * N_WHITE) - 1.0) < tol), pseudo[2:] / (w2 * N_WHITE)
