"""The polarized estimator on I, Q, U skies as real maps are, with its default model of the pixels.

Skies: correlated Gaussian I, Q, U coefficients from the built-in fiducial spectra (TT, TE, EE, lensing-like BB)
with power to 4 nside - 1, a Gaussian beam of two pixels, averaged over each pixel's area (I as a scalar, Q and U
as components in each point's own frame: simulate.pixel_averaging, checked against healpy in
tests/simulate/test_pixel_averaging.py), a 100 uK monopole and a 3 mK dipole in I, white noise shaped by a
hits-like map (Q, U sqrt(2) times the I noise per pixel, common practice), on a cap tapered by 3 degrees with 15
tapered holes (the survey of tests/spectrum/test_averaged_pixels_default.py).  Through the DEFAULT settings
(default bins, built-in guess spectra, ``sky_lmax`` 4 nside - 1, ``averaged_pixels=None`` -> averaged: TT's
and the spin-2 model of the pixel averages) every reported bin of TT, TE, EE and BB is judged against the binned
input, and TB, EB against zero.
"""

import healpy as hp
import numpy as np
import pytest

from _masks import cap_with_holes
from cmbtools._core import sht as _sht
from cmbtools.simulate.pixel_averaging import pixel_averaged_map
from cmbtools.simulate.polarized_skies import gaussian_iqu_alm
from cmbtools.simulate.polarized_theory import fiducial_spectra
from cmbtools.spectrum import PolarizedSpectrumEstimator, SPECTRA
from cmbtools.spectrum.beams import gaussian_beam, gaussian_polarized_beam
from cmbtools.spectrum.sampling import default_binning, pixel_size_arcmin

NSIDE = 32


def _survey(nside):
    """The tapered cap with holes of tests/_masks.py, and its noise per pixel."""
    w, vec = cap_with_holes(nside)
    centre = hp.ang2vec(250.0, -55.0, lonlat=True)
    hits = 0.25 + 0.75 * np.clip(vec @ centre, 0, 1)  # deeper towards the centre
    sigma = 2e-7 / np.sqrt(hits)  # K per pixel in I: E modes dominate EE up to the top bin
    return w, vec, sigma


def run(nside, n_sims, seed, *, n_paired=None):
    """z of every bin (default model on averaged skies), and on the first ``n_paired`` skies (default all) the
    paired relative bias of the pixel-centre model and of the default model on averaged skies against the
    pixel-centre model on pixel-centre maps of the same coefficients (with the same noise)."""
    n_paired = n_sims if n_paired is None else n_paired
    sky_lmax = 4 * nside - 1
    w, vec, sigma = _survey(nside)
    fwhm = 2.0 * pixel_size_arcmin(nside)
    bins = default_binning(nside, fwhm)
    cl = fiducial_spectra(sky_lmax, lensing_bb=True)
    default = PolarizedSpectrumEstimator(w, bins, beam=fwhm, sky_lmax=sky_lmax, nthreads=1)
    centres = PolarizedSpectrumEstimator(w, bins, beam=fwhm, sky_lmax=sky_lmax, averaged_pixels=False, nthreads=1)
    b_t, b_p = gaussian_beam(fwhm, sky_lmax), gaussian_polarized_beam(fwhm, sky_lmax)
    from cmbtools.spectrum.pixel_windows import pixel_window, polarization_pixel_window

    w_t, w_p = pixel_window(nside, sky_lmax)[: sky_lmax + 1], polarization_pixel_window(nside, sky_lmax)[: sky_lmax + 1]
    dipole = 3e-3 * hp.ang2vec(30.0, 40.0, lonlat=True)
    # white noise shaped by the hits, as the mask sees it (the weights' mean of sigma^2)
    n_white = np.sum(w**2 * sigma**2) / np.sum(w**2) * 4 * np.pi / w.size
    noise_cl = {"TT": np.full(3 * nside, n_white), "EE": np.full(3 * nside, 2 * n_white),
                "BB": np.full(3 * nside, 2 * n_white)}
    out, diff, resid = [], [], []
    for i in range(n_sims):
        rng = np.random.default_rng([seed, i])
        t, e, b = gaussian_iqu_alm(cl, sky_lmax, rng=rng)
        noise = sigma * rng.standard_normal((3, w.size))
        noise[1:] *= np.sqrt(2.0)
        noise[0] += 100e-6 + vec @ dipole
        t1, e1, b1 = (_sht.almxfl(x, f, sky_lmax) for x, f in ((t, b_t), (e, b_p), (b, b_p)))
        averaged = np.empty((3, w.size))
        averaged[0] = pixel_averaged_map(t1, nside, sky_lmax, nthreads=1)
        averaged[1:] = pixel_averaged_map(np.stack([e1, b1]), nside, sky_lmax, spin=2, nthreads=1)
        averaged += noise
        bp = default.estimate(averaged, noise_cl=noise_cl)
        out.append(np.asarray(bp.cl))
        if i < n_paired:
            centre = np.empty((3, w.size))
            centre[0] = _sht.alm2map(_sht.almxfl(t1, w_t, sky_lmax), nside, sky_lmax, nthreads=1)
            centre[1], centre[2] = _sht.alm2map_spin2(_sht.almxfl(e1, w_p, sky_lmax), _sht.almxfl(b1, w_p, sky_lmax),
                                                      nside, sky_lmax, nthreads=1)
            centre += noise
            reference = np.asarray(centres.estimate(centre, noise_cl=noise_cl).cl)
            diff.append(np.asarray(centres.estimate(averaged, noise_cl=noise_cl).cl) - reference)
            resid.append(out[-1] - reference)
    values = np.array(out)
    truth = np.array([bins.bin_spectrum(cl[s]) for s in SPECTRA])
    sem = values.std(0, ddof=1) / np.sqrt(n_sims)
    z = (values.mean(0) - truth) / sem
    if not n_paired:
        return bins, z, None, None
    diff, resid = np.array(diff), np.array(resid)
    with np.errstate(divide="ignore", invalid="ignore"):
        z_bias = diff.mean(0) / (diff.std(0, ddof=1) / np.sqrt(n_paired))
        z_resid = resid.mean(0) / (resid.std(0, ddof=1) / np.sqrt(n_paired))
    # relative to the binned input; TB and EB (zero input) relative to TE and EE
    scale = truth.copy()
    scale[SPECTRA.index("TB")] = truth[SPECTRA.index("TE")]
    scale[SPECTRA.index("EB")] = truth[SPECTRA.index("EE")]
    return bins, z, (z_bias, diff.mean(0) / scale), (z_resid, resid.mean(0) / scale)


@pytest.mark.slow
def test_polarized_default_model_on_averaged_iqu_skies():
    """300 skies at nside 32, the first 100 paired with pixel-centre maps (about 75 s at load 9 on the 2-core
    machine, 100 s with another heavy job)."""
    bins, z, (z_bias, rel), (z_resid, resid) = run(NSIDE, 300, 3, n_paired=100)
    # every reported bin of the six spectra within 3 standard errors of the binned input (TB, EB: of zero);
    # measured: |z| <= 2.47 (TB at ell 2-17), every TT, TE, EE, BB bin within 2.1
    assert np.all(np.abs(z) < 3.0), z
    near = bins.ell_min >= 1.5 * NSIDE
    assert np.any(near)
    tt, ee = SPECTRA.index("TT"), SPECTRA.index("EE")
    # the pixel-centre model on the same averaged maps (paired with pixel-centre maps of the same coefficients)
    # is low from 1.5 nside: TT measured -1.12 and -1.27 % (13 and 6 standard errors), EE -1.13 and -1.95 %
    # (7.6 and 4.3), TE -1.14 % at ell 34-49 (2.6)
    assert np.all(z_bias[tt][near] < -5.0), z_bias[tt]
    assert np.all(rel[tt][near] < -0.005), rel[tt]
    assert np.all(z_bias[ee][near] < -3.0), z_bias[ee]
    assert np.all(rel[ee][near] < -0.005), rel[ee]
    assert np.all(rel[ee] < -0.001), rel[ee]  # -0.17 .. -1.95 % in every bin
    # the default model on the averaged maps against the pixel-centre model on the pixel-centre maps: what is left
    # is within 3 paired standard errors in every bin of every spectrum (measured |z| <= 2.14, TE at ell 2-17;
    # EE within 0.2 %, TT within 0.1 %)
    assert np.all(np.abs(z_resid) < 3.0), z_resid
    assert np.all(np.abs(resid[ee]) < 0.004), resid[ee]
    assert np.all(np.abs(resid[tt]) < 0.002), resid[tt]
