"""The default top of the bins and the narrow-beam warning (cmbtools.spectrum.sampling), the one-call errors."""

from __future__ import annotations

import math
import healpy as hp
import numpy as np
import pytest

from cmbtools.exceptions import CmbtoolsWarning
from cmbtools.spectrum import Binning, SpectrumEstimator, default_binning, default_bins_lmax, estimate_spectrum
from cmbtools.spectrum.sampling import narrow_beam_message, pixel_size_arcmin


def _gaussian_b2(fwhm_arcmin, ell):
    # B_l^2 = exp(-l(l+1) sigma^2), sigma = FWHM / sqrt(8 ln 2) (common practice); healpy's gauss_beam is the reference
    return hp.gauss_beam(math.radians(fwhm_arcmin / 60.0), lmax=ell)[ell] ** 2


def test_pixel_size_is_the_square_root_of_the_pixel_area():
    # healpy.nside2resol: the square root of the pixel area
    assert pixel_size_arcmin(128) == pytest.approx(hp.nside2resol(128, arcmin=True), rel=1e-12)


def test_default_top_is_two_and_a_half_nside_for_a_well_sampled_beam():
    assert default_bins_lmax(128, 60.0) == 320  # 2.5 * 128; B_320^2 = 3.6e-3 is above the 1e-3 floor
    assert _gaussian_b2(60.0, 320) > 1e-3
    assert default_bins_lmax(128, 60.0, lmax=300) == 300  # never above the transforms' lmax


def test_default_top_follows_a_wide_beam_down_to_where_it_keeps_1e3_of_the_power():
    top = default_bins_lmax(128, 90.0)
    assert _gaussian_b2(90.0, top) >= 1e-3 > _gaussian_b2(90.0, top + 1)
    assert top == 235
    # the same beam as a table gives the same top
    table = hp.gauss_beam(math.radians(1.5), lmax=383)
    assert default_bins_lmax(128, table) == top


def test_a_beam_narrower_than_two_pixels_shortens_the_range_to_two_nside_and_says_by_how_much_it_aliases():
    assert 25.0 < 2 * pixel_size_arcmin(128)
    assert default_bins_lmax(128, 25.0) == 256 and default_bins_lmax(128, None) == 256
    kept = _gaussian_b2(25.0, 384)  # the fraction of the sky's power the beam keeps at l = 3 nside: 0.24
    message = narrow_beam_message(128, 25.0)
    assert f"keeps {kept:.2g} of the sky's power at l = 3*nside" in message and "2*nside = 256" in message
    assert f"keeps {_gaussian_b2(2 * pixel_size_arcmin(128), 384):.1g})" in message  # a beam of two pixels: 1e-3
    assert narrow_beam_message(128, 60.0) is None and narrow_beam_message(128, 56.0) is None
    with pytest.warns(CmbtoolsWarning, match="narrower than two pixels"):
        b = default_binning(128, 25.0, width=24)
    assert (b.lmin, b.lmax) == (2, 256)
    with pytest.warns(CmbtoolsWarning, match="no beam"):
        default_binning(64)


def _demo_like(nside=32):
    from cmbtools import maps, simulate

    mask = maps.apodize_mask(maps.cap_mask(nside, 0.0, 60.0, 50.0), 8.0, nthreads=1)
    cl = simulate.fiducial_cl(3 * nside - 1)
    sky = simulate.gaussian_sky(cl, nside, beam=240.0, rng=5, nthreads=1)
    return mask, cl, sky


def test_the_one_call_reports_the_gaussian_covariance_errors_by_default_and_knox_on_request():
    from cmbtools.spectrum import GaussianCovariance

    mask, cl, sky = _demo_like()
    bins = Binning.uniform(2, 79, 13)
    bp = estimate_spectrum(sky, mask, bins, beam=240.0, nthreads=1)
    est = SpectrumEstimator(mask, bins, beam=240.0, nthreads=1)
    cov = GaussianCovariance(est, nthreads=1).covariance(est.estimate(sky))
    np.testing.assert_allclose(bp.cl_err, cov.errors, rtol=1e-10)
    np.testing.assert_allclose(bp.covariance, cov.matrix, rtol=1e-10)
    knox = estimate_spectrum(sky, mask, bins, beam=240.0, nthreads=1, errors="knox")
    np.testing.assert_allclose(knox.cl_err, est.estimate(sky).cl_err, rtol=1e-12)
    assert bp.metadata["errors"].startswith("Gaussian covariance") and knox.metadata["errors"].startswith("Knox")
    # without bins: the default range (4 degrees at nside 32, pixels of 110 arcmin: 2.5 nside = 80 caps the range)
    auto = estimate_spectrum(sky, mask, beam=240.0, nthreads=1, errors="knox")
    assert auto.ell_max[-1] == min(80, default_bins_lmax(32, 240.0))


def test_the_noise_bias_under_a_mask_is_the_flat_pseudo_spectrum_of_the_inhomogeneous_noise():
    from cmbtools import simulate

    nside = 32
    mask, _cl, _sky = _demo_like(nside)
    theta, _ = hp.pix2ang(nside, np.arange(12 * nside * nside))
    hits = 0.2 + np.cos(theta) ** 2
    model = simulate.NoiseModel(50.0, hits=hits)
    plain = simulate.noise_spectrum(model, 95, nside)
    under = simulate.noise_spectrum(model, 95, nside, weights=mask)
    # the pseudo-spectrum of white pixel noise is Omega mean(w^2 sigma^2) at every l (common practice);
    # the reference pseudo-spectra are healpy's anafast of the masked noise maps
    pseudo = np.mean([hp.anafast(mask * simulate.noise_map(model, nside, rng=i), lmax=95, iter=0)
                      for i in range(40)], axis=0)
    w2 = np.mean(mask**2)
    # 40 maps x (2l+1) modes averaged over l = 2..95: relative standard error ~ 0.2 %
    assert np.mean(pseudo[2:]) / w2 == pytest.approx(under[0], rel=0.01)
    assert abs(under[0] / plain[0] - 1.0) > 0.03  # the uniform-weight level is measurably off on this mask
