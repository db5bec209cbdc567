"""The pixel averages of simulated skies (cmbtools.simulate.pixel_averaging) against outside references.

References:
* healpy: pixel-centre synthesis (alm2map) on a grid 32 times finer and the mean of its sub-pixels
  (ud_grade), an independent midpoint rule over the same pixels whose own error is ~1e-4 of the rms at
  l = 4 nside (it shrinks as (l / 32 nside)^2);
* the definition of the pixel window (Gorski et al. 2005, ApJ 622, 759, section 4.1):
  w_l^2 = (1/Npix) sum_p (4 pi / (2l+1)) sum_m |<Y_lm>_p|^2, with the window of healpy's tables
  quoted from memory at nside 16 (w_32 = 0.8225...; cmbtools computes the same to 1e-7, see
  tests/spectrum/test_pixel_windows.py).
"""

from __future__ import annotations

import healpy as hp
import numpy as np

from cmbtools._core import sht as _sht
from cmbtools.simulate.pixel_averaging import pixel_averaged_map
from cmbtools.spectrum.pixel_windows import pixel_quadrature

NSIDE = 8
LMAX = 4 * NSIDE - 1


def _random_alm(seed, lmax, slope=1.0):
    rng = np.random.default_rng(seed)
    ell = _sht.alm_ell(lmax)
    amp = (1.0 + ell) ** -slope
    alm = (rng.standard_normal(ell.size) + 1j * rng.standard_normal(ell.size)) * amp
    alm[: lmax + 1] = alm[: lmax + 1].real  # m = 0 coefficients are real
    return alm


def test_every_pixel_rule_covers_its_pixel_with_unit_weight():
    owner, theta_phi, weight = pixel_quadrature(NSIDE)
    np.testing.assert_allclose(np.bincount(owner, weights=weight), 1.0, rtol=0, atol=1e-13)
    # healpy's pixel lookup (ang2pix) places every node inside its own pixel (nodes on an edge excepted:
    # the Gauss-Legendre nodes are strictly inside each pixel's face coordinates)
    assert np.array_equal(hp.ang2pix(NSIDE, theta_phi[:, 0], theta_phi[:, 1]), owner)


def test_temperature_averages_match_a_finely_subsampled_healpy_map():
    alm = _random_alm(1, LMAX)
    ours = pixel_averaged_map(alm, NSIDE, LMAX)
    fine = hp.ud_grade(hp.alm2map(alm, 32 * NSIDE, lmax=LMAX), NSIDE)
    rms = np.std(fine)
    # measured: 1.0e-4 of the rms, the midpoint reference's own error (it falls as 1/(fine nside)^2)
    assert np.std(ours - fine) < 2.5e-4 * rms
    assert np.max(np.abs(ours - fine)) < 1.5e-3 * rms
    # and far from the pixel-centre values: the averaging is really done (differences ~10 % of the rms)
    centres = hp.alm2map(alm, NSIDE, lmax=LMAX)
    assert np.std(ours - centres) > 0.03 * rms


def test_polarization_averages_match_a_finely_subsampled_healpy_map():
    e, b = _random_alm(2, LMAX), 0.5 * _random_alm(3, LMAX)
    e[:2], b[:2] = 0.0, 0.0  # l = 0, 1 (m = 0) have no spin-2 part
    e[LMAX + 1], b[LMAX + 1] = 0.0, 0.0  # l = 1, m = 1
    ours = pixel_averaged_map(np.stack([e, b]), NSIDE, LMAX, spin=2)
    t = np.zeros_like(e)
    fine = hp.ud_grade(hp.alm2map([t, e, b], 32 * NSIDE, lmax=LMAX, pol=True)[1:], NSIDE)
    rms = np.std(fine)
    assert np.std(ours - fine) < 2.5e-4 * rms


def test_averages_of_harmonics_reproduce_the_pixel_window():
    # Gorski et al. 2005, sec. 4.1: w_l^2 is the pixel mean of (4 pi/(2l+1)) sum_m |<Y_lm>_p|^2; healpy's
    # table at nside 16 holds w_32 = 0.82252 (from memory, the docstring example of pixel_window)
    nside, ell = 16, 32
    lmax = ell
    total = 0.0
    for m in range(ell + 1):
        alm = np.zeros(_sht.alm_size(lmax), dtype=np.complex128)
        idx = hp.Alm.getidx(lmax, ell, m)
        for part in ((1.0,) if m == 0 else (1.0, 1j)):
            alm[idx] = part
            # a real map of one (l, m) pair: Y_l0, or 2 Re / -2 Im of Y_lm for m > 0 (the m < 0 half implied),
            # whose squares add up to 4 |<Y_lm>|^2 = 2 (|<Y_lm>|^2 + |<Y_l-m>|^2)
            avg = pixel_averaged_map(alm, nside, lmax) * (1.0 if m == 0 else np.sqrt(0.5))
            total += np.sum(avg**2)
    w2 = total * (4 * np.pi / (2 * ell + 1)) / (12 * nside * nside)
    assert abs(np.sqrt(w2) - 0.822523) < 2e-6
