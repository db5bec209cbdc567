"""The cross-spectrum validation on skies as real maps are: power above lmax, averaged into pixels, two masks and
two beams (fast, nside 16)."""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import healpy as hp
import numpy as np
import pytest

from cmbtools import maps
from cmbtools.simulate import Dipole, NoiseModel, validate_estimator
from cmbtools.spectrum import Binning, SpectrumEstimator

NSIDE = 16
LMAX = 3 * NSIDE - 1
SKY_LMAX = 4 * NSIDE - 1
N_SIMS = 150
FWHM1 = 2.2 * hp.nside2resol(NSIDE, arcmin=True)  # a beam of 2.2 pixels (common practice: two or more)
FWHM2 = 1.3 * FWHM1


def _spectrum(lmax):
    ell = np.arange(lmax + 1.0)
    return np.where(ell >= 2, 1e-10 * 1000.0 / (ell + 10.0) ** 2, 0.0)


def _masks():
    hole = maps.disc_mask(NSIDE, [(50.0, 35.0)], radius_deg=8.0)
    m1 = maps.apodize_mask(maps.cap_mask(NSIDE, 40.0, 30.0, 65.0) * hole, 12.0, nthreads=1)
    m2 = maps.apodize_mask(maps.cap_mask(NSIDE, 30.0, 40.0, 60.0) * hole, 10.0, nthreads=1)
    return m1, m2


@pytest.fixture(scope="module")
def runs():
    m1, m2 = _masks()
    cl = _spectrum(SKY_LMAX)
    est = SpectrumEstimator(m1, Binning.uniform(2, 40, 8), lmax=LMAX, mask2=m2, beam=FWHM1, beam2=FWHM2,
                            guess_cl=cl, sky_lmax=SKY_LMAX, nthreads=1)
    z = hp.pix2vec(NSIDE, np.arange(12 * NSIDE**2))[2]
    kw = dict(n_sims=N_SIMS, seed=5, noise=NoiseModel(40.0, hits=1.5 + 0.6 * z), monopole=1e-4,
              dipole=Dipole(3e-3, 60.0, 30.0), cross=True, progress=False)
    with ThreadPoolExecutor(1) as pool:
        real = validate_estimator(est, cl, executor=pool, pixelise=True, **kw)  # sky_lmax: the estimator's
    return est, real


def test_cross_validation_simulates_power_above_lmax_averaged_into_pixels(runs):
    est, real = runs
    assert real.metadata["sky_lmax"] == SKY_LMAX and real.metadata["pixelised"].startswith("yes")
    assert real.metadata["spectrum_kind"] == "cross"
    # both splits (each through its own beam and mask) carry the power to 4 nside - 1, which the estimator
    # models: every bin within 3 standard errors of the mean of the binned input.  The second split's own beam
    # matters: B2 / B1 is 0.2 at ell 36, so a second sky drawn through the first beam would put the top bin at
    # several times its expectation
    assert est.beam2[36] / est.beam[36] == pytest.approx(0.2, abs=0.03)
    assert np.all(np.abs(real.bias_sigma) < 3.0), real.bias_sigma
    # the error bars (Gaussian covariance of the cross-spectrum) match the scatter within the ratio's own
    # uncertainty, about 1/sqrt(2 N) = 5.8 % here: 0.8-1.2
    assert np.all((real.error_ratio > 0.8) & (real.error_ratio < 1.2)), real.error_ratio

