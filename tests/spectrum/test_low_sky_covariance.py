"""The exact part of the lowest sky multipoles in the Gaussian covariance, against a brute-force exact covariance."""

from __future__ import annotations

import math

import healpy as hp
import numpy as np

from cmbtools._core import sht
from cmbtools.maps import apodize_mask, cap_mask
from cmbtools.simulate import fiducial_cl
from cmbtools.spectrum import Binning, GaussianCovariance, SpectrumEstimator, gaussian_beam
from cmbtools.spectrum.low_ell_covariance import _coords, _to_real, _unit


def _columns(est, mask, cl_seen, lsky):
    """The pseudo-coefficients (real coordinates to lmax) of every real sky mode to ``lsky`` of amplitude sqrt(C_l B_l^2).

    Each mode is synthesized at the pixels, its weighted monopole/dipole fit subtracted (plain linear algebra, not
    the estimator's code), masked and analysed.
    """
    sky_i, sky_p, sky_l = _coords(lsky, 2, lsky)
    out_i, out_p, _ = _coords(est.lmax, 0, est.lmax)
    t = np.vstack([np.ones(mask.size), np.array(hp.pix2vec(est.nside, np.arange(mask.size)))]).T
    wt = mask[:, None] * t
    amp = np.sqrt(cl_seen)
    maps = np.empty((mask.size, sky_i.size))
    for j, (i, p) in enumerate(zip(sky_i, sky_p)):
        maps[:, j] = sht.alm2map(_unit(lsky, i, p), est.nside, lsky, nthreads=1) * amp[sky_l[j]]
    masked = mask[:, None] * (maps - t @ np.linalg.solve(t.T @ wt, (maps.T @ wt).T))
    cols = np.empty((out_i.size, sky_i.size))
    for j in range(sky_i.size):
        cols[:, j] = _to_real(sht.map2alm(np.ascontiguousarray(masked[:, j]), est.lmax, nthreads=1), out_i, out_p)
    return cols


def _exact_binned(est, cl_seen, lsky, cross=False):
    """Cov(C~^12_b, C~^12_b') with ``Sigma^xy`` from every sky mode to ``lsky`` through removal, mask and analysis.

    The Gaussian pseudo-spectrum covariance by Isserlis' theorem (Efstathiou 2004, MNRAS 349, 603), without any
    approximation: ``C~^12_b = sum_i q_i a_i c_i`` over the real coordinates of the bin, so
    ``Cov = sum q_i q_k (Sigma^11_ik Sigma^22_ik + Sigma^12_ik Sigma^12_ki)``.
    """
    x1 = _columns(est, est.mask, cl_seen, lsky)
    x2 = _columns(est, est.mask2, cl_seen, lsky) if cross else x1
    s11, s22, s12 = x1 @ x1.T, x2 @ x2.T, x1 @ x2.T
    bins = est.binning
    _, _, out_l = _coords(est.lmax, 0, est.lmax)
    q = bins.averaging_weights(est.lmax)[out_l] / (2.0 * out_l + 1.0)
    which = np.searchsorted(bins.ell_min, out_l, side="right") - 1
    inside = (which >= 0) & (out_l <= np.asarray(bins.ell_max)[np.clip(which, 0, None)])
    onehot = np.zeros((bins.n_bins, out_l.size))
    onehot[which[inside], np.nonzero(inside)[0]] = q[inside]
    return onehot @ (s11 * s22 + s12 * s12.T) @ onehot.T


def _cap_with_hole(nside):
    w = cap_mask(nside, 30.0, 40.0, 50.0)
    w[hp.query_disc(nside, hp.ang2vec(25.0, 45.0, lonlat=True), math.radians(8.0))] = 0.0
    return apodize_mask(w, 8.0, nthreads=1)


def _neighbours(m):
    k = np.arange(m.shape[0] - 1)
    return (m / np.sqrt(np.outer(np.diag(m), np.diag(m))))[k, k + 1]


def test_neighbour_correlations_match_a_brute_force_exact_covariance():
    # nside 16, a tapered cap with a hole, beam of two pixels, power to 4 nside, monopole/dipole removed, bins of 8:
    # the beam makes the spectrum steep, so that the mask leaks much more power from low multipoles into the
    # upper bins than the sky has there.  Measured (signal only): model minus exact neighbour correlations
    # narrow-kernel alone 0.016, -0.017, -0.013, -0.058, -0.254; with the exact low sky part (L = 33) 0.000,
    # 0.000, 0.001, 0.037, -0.045.  Bin errors / exact: 0.92-1.10 -> 1.00-1.09.
    nside = 16
    lmax, lsky = 3 * nside - 1, 4 * nside - 1
    w = _cap_with_hole(nside)
    fwhm = 2 * hp.nside2resol(nside, arcmin=True)
    bins = Binning.uniform(2, lmax, 8)
    est = SpectrumEstimator(w, bins, beam=fwhm, lmax=lmax, pixel_window=False, averaged_pixels=False,
                            correct_deprojection_bias=False, nthreads=1)
    cl = fiducial_cl(lsky)
    cl[:2] = 0.0
    gauss = GaussianCovariance(est, beam=fwhm, sky_lmax=lsky, nthreads=1)
    assert gauss._low_sky is not None and gauss._low_sky.l_low == 33  # the end of the bin with ell 32
    exact = gauss._ainv @ _exact_binned(est, cl * gaussian_beam(fwhm, lsky) ** 2, lsky) @ gauss._ainv.T
    model = gauss.covariance(cl).matrix
    diff = _neighbours(model) - _neighbours(exact)
    below = np.asarray(bins.ell_max)[1:] <= 33  # both bins of the pair in the exact low part
    assert np.all(np.abs(diff[below]) < 3e-3), diff
    assert np.all(np.abs(diff) < 0.06), diff
    np.testing.assert_allclose(np.diag(model)[:3], np.diag(exact)[:3], rtol=1e-3)  # bins below L: exact
    gauss._low_sky = None  # the narrow-kernel covariance alone fails both checks
    old = _neighbours(gauss.covariance(cl).matrix) - _neighbours(exact)
    assert np.max(np.abs(old[below])) > 0.01 and np.max(np.abs(old)) > 0.2, old


def test_cross_spectrum_of_two_masks_below_the_split_is_exact():
    # the cross-spectrum's low part, tr(G12 S22 G12^T S11) + tr(G12 S12 G12 S12), against the brute force: two
    # masks (a cap with a hole, another cap), removal on, beam of two pixels.  Measured: neighbour correlations
    # minus exact 0.000, 0.000, 0.000, 0.010, -0.071 (narrow kernel alone -0.007, 0.007, 0.006, 0.018, -0.077);
    # errors / exact 1.0000 in the three bins below L = 33 (narrow kernel 1.013-1.022)
    nside = 16
    lmax, lsky = 3 * nside - 1, 4 * nside - 1
    w2 = apodize_mask(cap_mask(nside, 50.0, 30.0, 45.0), 8.0, nthreads=1)
    fwhm = 2 * hp.nside2resol(nside, arcmin=True)
    bins = Binning.uniform(2, lmax, 8)
    est = SpectrumEstimator(_cap_with_hole(nside), bins, mask2=w2, beam=fwhm, lmax=lmax, pixel_window=False,
                            averaged_pixels=False, correct_deprojection_bias=False, nthreads=1)
    cl = fiducial_cl(lsky)
    cl[:2] = 0.0
    gauss = GaussianCovariance(est, cross=True, beam=fwhm, sky_lmax=lsky, nthreads=1)
    exact = gauss._ainv @ _exact_binned(est, cl * gaussian_beam(fwhm, lsky) ** 2, lsky, cross=True) @ gauss._ainv.T
    model = gauss.covariance(cl).matrix
    below = np.asarray(bins.ell_max)[1:] <= gauss._low_sky.l_low
    assert np.count_nonzero(below) == 3
    np.testing.assert_allclose(np.diag(model)[:3], np.diag(exact)[:3], rtol=1e-3)
    assert np.all(np.abs((_neighbours(model) - _neighbours(exact))[below]) < 1e-3)
    assert np.all(np.abs(_neighbours(model) - _neighbours(exact)) < 0.1)
    gauss._low_sky = None
    assert np.max(np.abs(np.diag(gauss.covariance(cl).matrix)[:3] / np.diag(exact)[:3] - 1)) > 0.02
