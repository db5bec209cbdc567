"""An estimator applied to many maps: monopole/dipole removed in harmonic space, same results as in map space."""

import pickle

import numpy as np
import pytest

from cmbtools import maps, simulate, spectrum
from cmbtools.maps.monopole_dipole import fit_monopole_dipole, removal_coefficients


def _setup(nside, cut, apod, seed=1):
    lmax = 3 * nside - 1
    mask = maps.apodize_mask(maps.latitude_cut_mask(nside, cut), apod)
    binning = spectrum.Binning.uniform(2, lmax, 10)
    cl = 1e-10 * 1000.0 / (np.arange(lmax + 1) + 10.0) ** 2
    # a large monopole and dipole on top of the sky (the estimator must remove them either way)
    sky = simulate.gaussian_sky(cl, nside, rng=seed, monopole=3e-3, dipole=[1e-3, -2e-3, 5e-4], pixel_window=False)
    sky += simulate.white_noise_map(nside, 40.0, rng=seed + 1)
    return mask, binning, sky


@pytest.mark.parametrize("nside, cut, apod", [(32, 20.0, 5.0), (64, 10.0, 3.0)])
def test_harmonic_removal_equals_removal_in_map_space(nside, cut, apod):
    mask, binning, sky = _setup(nside, cut, apod)
    plain = spectrum.SpectrumEstimator(mask, binning, pixel_window=False, nthreads=1)
    many = spectrum.SpectrumEstimator(mask, binning, pixel_window=False, nthreads=1)
    assert many._keep_removal_coefficients()
    noise_cl = np.full(3 * nside, 1e-15)
    a, b = plain.estimate(sky, noise_cl=noise_cl), many.estimate(sky, noise_cl=noise_cl)
    np.testing.assert_allclose(b.cl, a.cl, rtol=1e-10, atol=1e-12 * np.abs(a.cl).max())
    np.testing.assert_allclose(many.pseudo_spectrum(sky), plain.pseudo_spectrum(sky), rtol=1e-10, atol=1e-25)
    noise = [simulate.white_noise_map(nside, 40.0, rng=k) for k in (5, 6)]
    np.testing.assert_allclose(many.estimate(sky, noise_maps=noise).cl, plain.estimate(sky, noise_maps=noise).cl,
                               rtol=1e-10, atol=1e-12 * np.abs(a.cl).max())


def test_stored_coefficients_are_the_transforms_of_the_weighted_directions():
    # w, w x, w y, w z built by hand from healpy's pixel centres (healpy.pix2vec), transformed by map2alm
    import healpy as hp

    from cmbtools._core import sht as _sht

    nside, lmax = 16, 47
    w = maps.apodize_mask(maps.latitude_cut_mask(nside, 15.0), 10.0)
    x, y, z = hp.pix2vec(nside, np.arange(w.size))
    got = removal_coefficients(w, lmax, nthreads=1)
    for k, g in enumerate([w, w * x, w * y, w * z]):
        np.testing.assert_allclose(got[k], _sht.map2alm(g, lmax, nthreads=1), rtol=0, atol=1e-15)


def test_the_fit_removed_is_the_least_squares_fit():
    # after the harmonic removal nothing of the fitted monopole/dipole is left: removing the pixel-space fit
    # of fit_monopole_dipole by hand gives the same pseudo-spectrum
    from cmbtools._core import sht as _sht

    nside = 32
    mask, binning, sky = _setup(nside, 20.0, 5.0)
    est = spectrum.SpectrumEstimator(mask, binning, pixel_window=False, nthreads=1)
    assert est._keep_removal_coefficients()
    fit = fit_monopole_dipole(sky, mask)
    by_hand = (sky - fit.evaluate(nside)) * mask
    want = _sht.alm2cl(_sht.map2alm(by_hand, est.lmax, nthreads=1))
    np.testing.assert_allclose(est.pseudo_spectrum(sky), want, rtol=1e-9, atol=1e-12 * want.max())


def test_not_for_small_patches_cross_spectra_or_without_removal():
    nside = 32
    b = spectrum.Binning.uniform(2, 3 * nside - 1, 12)
    cap = maps.cap_mask(256, 0.0, 90.0, 3.0)  # a 3-degree cap: the centred pixel sums are needed
    b_cap = spectrum.Binning.uniform(2, 400, 100)
    est_cap = spectrum.SpectrumEstimator(cap, b_cap, lmax=400, pixel_window=False, nthreads=1, coupling="fast")
    assert not est_cap._keep_removal_coefficients()
    mask = maps.apodize_mask(maps.latitude_cut_mask(nside, 20.0), 5.0)
    kept = spectrum.SpectrumEstimator(mask, b, pixel_window=False, remove_monopole_dipole=False, nthreads=1)
    assert not kept._keep_removal_coefficients()
    two = spectrum.SpectrumEstimator(mask, b, mask2=mask**2, pixel_window=False, nthreads=1)
    assert not two._keep_removal_coefficients()


def test_stored_coefficients_are_not_pickled():
    mask, binning, _ = _setup(16, 20.0, 10.0)
    est = spectrum.SpectrumEstimator(mask, binning, pixel_window=False, nthreads=1)
    small = len(pickle.dumps(est))
    assert est._keep_removal_coefficients()
    assert len(pickle.dumps(est)) < small + 1000
    assert "_removal_coefficients" not in pickle.loads(pickle.dumps(est)).__dict__
