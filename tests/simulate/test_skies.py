"""Gaussian skies, noise and per-simulation random streams (cmbtools.simulate)."""

from __future__ import annotations

import concurrent.futures as cf
import math
import multiprocessing

import healpy as hp
import numpy as np
import pytest
from astropy import units as u

from cmbtools._core import sht as _sht
from cmbtools.spectrum.pixel_windows import pixel_window
from cmbtools.spectrum.beams import gaussian_beam
from cmbtools._core.checks import UNSEEN, missing_pixels
from cmbtools.exceptions import InvalidInputError, ResolutionMismatchError
from cmbtools.simulate import (
    Dipole,
    NoiseModel,
    depth_to_white_noise,
    gaussian_alm,
    gaussian_sky,
    noise_map,
    noise_spectrum,
    simulation_rng,
    simulation_rngs,
    simulation_seed_sequence,
    white_noise_map,
)


def _power_law_cl(lmax, amplitude=1e-10):
    ell = np.arange(lmax + 1, dtype=float)
    cl = np.zeros(lmax + 1)
    cl[2:] = amplitude * 1000.0 / (ell[2:] * (ell[2:] + 1.0))
    return cl


# --------------------------------------------------------------------------- harmonic coefficients


def test_gaussian_alm_variances_and_layout():
    lmax = 300
    cl = np.ones(lmax + 1)
    alm = gaussian_alm(cl, lmax, rng=1)
    assert alm.shape == (_sht.alm_size(lmax),)
    m0 = alm[: lmax + 1]
    assert np.all(m0.imag == 0.0)  # a_l0 is real
    # a_l0 ~ N(0, C_l): 301 values, variance 1 +- sqrt(2/301) = 0.08 (4 sigma: 0.33)
    assert abs(np.var(m0.real) - 1.0) < 0.33
    rest = alm[lmax + 1 :]
    # real and imaginary parts of a_lm (m > 0) each have variance C_l / 2; ~45000 draws, sigma 0.0067*0.5
    for part in (rest.real, rest.imag):
        assert abs(np.var(part) - 0.5) < 4 * 0.5 * math.sqrt(2.0 / part.size)
    assert abs(np.mean(rest.real * rest.imag)) < 4 * 0.5 / math.sqrt(rest.size)


def test_gaussian_alm_zero_spectrum_and_errors():
    assert not np.any(gaussian_alm(np.zeros(11), 10, rng=3))
    with pytest.raises(InvalidInputError, match="negative"):
        gaussian_alm(-np.ones(11), 10)
    with pytest.raises(InvalidInputError, match="extend to ell=10"):
        gaussian_alm(np.ones(5), 10)
    with pytest.raises(InvalidInputError, match="'rng' parameter"):
        gaussian_alm(np.ones(11), 10, rng="seed")


# --------------------------------------------------------------------------- full-sky spectrum


def test_full_sky_spectrum_within_cosmic_variance():
    # Knox (1995, PRD 52, 4307): the full-sky estimate of C_l scatters by sqrt(2/(2l+1)) C_l.
    nside, lmax = 64, 128
    cl = _power_law_cl(lmax)
    m = gaussian_sky(cl, nside, lmax=lmax, pixel_window=False, rng=simulation_rng(11, 0), nthreads=1)
    # healpy's full-sky spectrum is the outside reference
    cl_hat = hp.anafast(m, lmax=lmax, iter=3)
    ell = np.arange(2, lmax + 1)
    x = (cl_hat[2:] / cl[2:] - 1.0) / np.sqrt(2.0 / (2.0 * ell + 1.0))
    assert abs(np.mean(x)) < 4.0 / math.sqrt(x.size)
    assert abs(np.sqrt(np.mean(x**2)) - 1.0) < 0.10 + 4.0 / math.sqrt(2.0 * x.size)


def test_beam_and_pixel_window_are_applied_in_harmonic_space():
    nside, lmax = 32, 64
    cl = _power_law_cl(lmax)
    m = gaussian_sky(cl, nside, lmax=lmax, beam=90.0, pixel_window=True, rng=5, nthreads=1)
    alm_in = gaussian_alm(cl, lmax, rng=5)
    transfer = gaussian_beam(90.0, lmax) * pixel_window(nside, lmax)
    alm_map = _sht.map2alm(m, lmax, n_iter=3, nthreads=1)
    expected = _sht.almxfl(alm_in, transfer, lmax)
    # HEALPix quadrature with 3 refinements at lmax = 2 nside: relative error << 1e-4
    np.testing.assert_allclose(alm_map, expected, rtol=0, atol=1e-4 * np.abs(expected).max())
    # the pixel window is cmbtools' own; compared to the beam alone the map differs
    m_nowin = gaussian_sky(cl, nside, lmax=lmax, beam=90.0, pixel_window=False, rng=5, nthreads=1)
    assert np.max(np.abs(m - m_nowin)) > 1e-3 * np.max(np.abs(m))


def test_beam_as_array_equals_fwhm():
    cl = _power_law_cl(40)
    a = gaussian_sky(cl, 16, lmax=40, beam=120.0, pixel_window=False, rng=2, nthreads=1)
    b = gaussian_sky(cl, 16, lmax=40, beam=gaussian_beam(120.0, 40), pixel_window=False, rng=2, nthreads=1)
    np.testing.assert_array_equal(a, b)
    with pytest.raises(InvalidInputError, match="extend to ell=40"):
        gaussian_sky(cl, 16, lmax=40, beam=np.ones(10), rng=2)


def test_sky_errors():
    cl = _power_law_cl(40)
    with pytest.raises(InvalidInputError, match="'lmax' parameter"):
        gaussian_sky(np.ones(200), 16, lmax=64)  # above 4*nside - 1
    with pytest.raises(InvalidInputError, match="extend to ell=40"):
        gaussian_sky(cl[:20], 16, lmax=40)
    with pytest.raises(InvalidInputError, match="power of two"):
        gaussian_sky(cl, 12)
    with pytest.raises(InvalidInputError, match="'pixel_window'"):
        gaussian_sky(cl, 16, pixel_window="yes")
    with pytest.raises(InvalidInputError, match="'dipole'"):
        gaussian_sky(cl, 16, dipole=(1.0, 2.0))
    with pytest.raises(InvalidInputError, match="'monopole'"):
        gaussian_sky(cl, 16, monopole=float("nan"))
    with pytest.raises(InvalidInputError, match="lat_deg"):
        Dipole(1e-3, 0.0, 95.0)


def test_monopole_and_dipole_injection_against_healpy_fit():
    nside = 32
    cl = np.zeros(10)
    d = Dipole(3.0e-3, 264.0, 48.0)
    m = gaussian_sky(cl, nside, lmax=9, monopole=2.0e-4, dipole=d, rng=1, nthreads=1)
    mono, dip = hp.fit_dipole(m)  # healpy as the outside reference
    assert mono == pytest.approx(2.0e-4, rel=1e-9)
    np.testing.assert_allclose(dip, d.vector, rtol=1e-9, atol=1e-15)
    lon, lat = hp.vec2ang(dip, lonlat=True)
    assert (float(lon[0]), float(lat[0])) == pytest.approx((264.0, 48.0), abs=1e-6)
    # a Cartesian vector works the same
    m2 = gaussian_sky(cl, nside, lmax=9, monopole=2.0e-4, dipole=d.vector, rng=1, nthreads=1)
    np.testing.assert_array_equal(m, m2)


# --------------------------------------------------------------------------- reproducibility


def test_simulation_streams_random_access_and_spawn():
    # simulation i is the i-th child of SeedSequence(seed).spawn(n) (numpy's documented spawning)
    children = np.random.SeedSequence(2024).spawn(5)
    for i in (0, 3, 4):
        a = simulation_rng(2024, i).standard_normal(8)
        b = np.random.default_rng(children[i]).standard_normal(8)
        np.testing.assert_array_equal(a, b)
    seqs = simulation_rngs(2024, 5)
    np.testing.assert_array_equal(seqs[2].standard_normal(4), simulation_rng(2024, 2).standard_normal(4))
    assert simulation_seed_sequence(2024, 1).spawn_key == (1,)
    assert not np.array_equal(simulation_rng(2024, 0).standard_normal(4), simulation_rng(2024, 1).standard_normal(4))
    with pytest.raises(InvalidInputError, match="'seed'"):
        simulation_rng(-1, 0)
    with pytest.raises(InvalidInputError, match="'index'"):
        simulation_rng(1, -2)


def _one_map(index):
    cl = _power_law_cl(47)
    model = NoiseModel(50.0, ell_knee=20.0, alpha=1.5)
    rng = simulation_rng(99, index)
    m = gaussian_sky(cl, 16, beam=60.0, rng=rng, nthreads=1)
    return index, m + noise_map(model, 16, rng=rng, nthreads=1)


def test_same_maps_whatever_the_order_and_number_of_workers():
    serial = {i: m for i, m in map(_one_map, [3, 0, 2, 1])}
    ctx = multiprocessing.get_context("spawn")
    for workers in (1, 2):
        with cf.ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
            got = dict(pool.map(_one_map, range(4)))
        for i in range(4):
            assert np.array_equal(got[i], serial[i])  # bit for bit


# --------------------------------------------------------------------------- noise


def test_depth_conversion_against_astropy_units():
    # N_white = (depth in K rad)^2 (common practice); the arcminute from astropy.units
    depth = 35.0
    expected = ((depth * u.uK * u.arcmin).to_value(u.K * u.rad)) ** 2
    assert depth_to_white_noise(depth) == pytest.approx(expected, rel=1e-14)
    nl = noise_spectrum(NoiseModel(depth), 100)
    np.testing.assert_allclose(nl, expected, rtol=1e-14)


def test_white_noise_level_matches_depth():
    nside = 128
    model = NoiseModel(35.0)
    n = noise_map(model, nside, rng=7)
    npix = 12 * nside**2
    sigma = math.sqrt(model.white_noise / hp.nside2pixarea(nside))  # healpy's pixel area
    assert np.std(n) == pytest.approx(sigma, rel=4.0 / math.sqrt(2.0 * npix))
    nl_hat = hp.anafast(n, lmax=2 * nside, iter=1)
    ell = np.arange(2, 2 * nside + 1)
    # mean over l of the measured/expected power: error ~ sqrt(2 / sum(2l+1)) ~ 0.5 %
    ratio = np.sum((2 * ell + 1) * nl_hat[2:]) / np.sum((2 * ell + 1)) / model.white_noise
    assert ratio == pytest.approx(1.0, abs=0.02)
    np.testing.assert_array_equal(white_noise_map(nside, 35.0, rng=7), n)


def test_inhomogeneous_noise_follows_hits_and_normalisation():
    nside = 64
    npix = 12 * nside**2
    hits = np.zeros(npix)
    hits[: npix // 3] = 1.0
    hits[npix // 3 : 2 * npix // 3] = 4.0  # the last third is unobserved
    model = NoiseModel(20.0, hits=hits)
    n = noise_map(model, nside, rng=3)
    assert np.all(missing_pixels(n[2 * npix // 3 :]))
    assert np.all(n[2 * npix // 3 :] == UNSEEN)
    v1 = np.var(n[: npix // 3])
    v4 = np.var(n[npix // 3 : 2 * npix // 3])
    # variance ~ 1/hits: ratio 4 (each variance known to sqrt(2/16384) = 1.1 %)
    assert v1 / v4 == pytest.approx(4.0, rel=0.05)
    # the depth is the rms pixel depth over observed pixels
    sigma2 = model.white_noise / hp.nside2pixarea(nside)
    assert 0.5 * (v1 + v4) == pytest.approx(sigma2, rel=0.03)
    np.testing.assert_allclose(model.relative_sigma[: npix // 3] ** 2, 1.6)  # (1/1) / mean(1, 1/4)
    with pytest.raises(ResolutionMismatchError):
        noise_map(model, 32)


def test_correlated_noise_follows_knee_model():
    nside, lmax = 64, 128
    model = NoiseModel(40.0, ell_knee=40.0, alpha=2.0)
    nl = noise_spectrum(model, lmax)
    assert nl[0] == 0.0  # N_0 = 0 convention with a knee
    assert nl[40] == pytest.approx(2.0 * model.white_noise)  # N(l_knee) = 2 N_white
    spectra = [hp.anafast(noise_map(model, nside, rng=simulation_rng(5, i), nthreads=1), lmax=lmax, iter=1)
               for i in range(4)]
    mean = np.mean(spectra, axis=0)
    edges = [5, 15, 30, 60, 90, 128]
    for lo, hi in zip(edges[:-1], edges[1:]):
        ell = np.arange(lo, hi)
        w = 2 * ell + 1
        measured = np.sum(w * mean[lo:hi]) / np.sum(w)
        expected = np.sum(w * nl[lo:hi]) / np.sum(w)
        n_modes = 4 * np.sum(w)
        # cosmic variance of the binned mean plus a 2 % allowance for the pixel-space white part
        assert measured == pytest.approx(expected, rel=4.0 * math.sqrt(2.0 / n_modes) + 0.02)


def test_noise_model_validation():
    with pytest.raises(InvalidInputError, match="depth_uk_arcmin"):
        NoiseModel(0.0)
    with pytest.raises(InvalidInputError, match="together"):
        NoiseModel(10.0, ell_knee=30.0)
    with pytest.raises(InvalidInputError, match="negative"):
        NoiseModel(10.0, hits=-np.ones(12 * 16**2))
    with pytest.raises(InvalidInputError, match="zero everywhere"):
        NoiseModel(10.0, hits=np.zeros(12 * 16**2))
    with pytest.raises(InvalidInputError, match="12\\*nside\\*\\*2"):
        NoiseModel(10.0, hits=np.ones(100))
    with pytest.raises(InvalidInputError, match="NoiseModel"):
        noise_map("white", 16)
    hits = np.ones(12 * 16**2)
    hits[:10] = UNSEEN  # missing hits count as unobserved
    model = NoiseModel(10.0, hits=hits)
    assert model.nside == 16
    assert np.all(noise_map(model, 16, rng=1)[:10] == UNSEEN)
    assert "nside 16" in repr(model)


def test_pixelised_sky_is_the_pixel_average_of_the_same_draws():
    # pixelise: the beam-convolved sky of the same coefficients averaged over each pixel (pixel_averaged_map, checked
    # against healpy in test_pixel_averaging.py), then the monopole and dipole; the pixel window is not applied twice
    from cmbtools.simulate.pixel_averaging import pixel_averaged_map
    from cmbtools.simulate.polarized_skies import gaussian_iqu_sky

    nside, lmax = 16, 63
    cl = _power_law_cl(lmax)
    dip = Dipole(3e-3, 30.0, 40.0)
    m = gaussian_sky(cl, nside, lmax=lmax, beam=120.0, pixelise=True, monopole=1e-4, dipole=dip, rng=5, nthreads=1)
    alm = _sht.almxfl(gaussian_alm(cl, lmax, rng=5), gaussian_beam(120.0, lmax), lmax)
    x, y, z = hp.pix2vec(nside, np.arange(12 * nside**2))
    v = hp.ang2vec(30.0, 40.0, lonlat=True) * 3e-3
    expected = pixel_averaged_map(alm, nside, lmax, nthreads=1) + 1e-4 + v[0] * x + v[1] * y + v[2] * z
    np.testing.assert_allclose(m, expected, rtol=0, atol=1e-12 * np.max(np.abs(expected)))
    # against the pixel-centre map of the same draws: the same sky up to the pixel shapes (full-sky spectra within
    # 4 % of each other to 1.5 nside, measured 2.2 % at most; the window applied twice would make the ratio 0.80 at
    # 1.5 nside)
    centre = gaussian_sky(cl, nside, lmax=lmax, beam=120.0, monopole=1e-4, dipole=dip, rng=5, nthreads=1)
    ratio = hp.anafast(m, lmax=3 * nside // 2)[2:] / hp.anafast(centre, lmax=3 * nside // 2)[2:]
    assert np.all(np.abs(ratio - 1.0) < 0.04), ratio
    assert np.max(np.abs(m - centre)) > 1e-3 * np.std(centre)  # but not the same map
    # I, Q, U: I is the temperature map of the same draws
    spectra = {"TT": cl, "EE": 0.1 * cl, "BB": 0.01 * cl, "TE": 0.2 * cl}
    iqu = gaussian_iqu_sky(spectra, nside, lmax=lmax, beam=120.0, pixelise=True, rng=5, nthreads=1)
    plain = gaussian_iqu_sky(spectra, nside, lmax=lmax, beam=120.0, rng=5, nthreads=1)
    np.testing.assert_allclose(iqu[0], expected - 1e-4 - (v[0] * x + v[1] * y + v[2] * z), rtol=0,
                               atol=1e-12 * np.max(np.abs(expected)))
    for k in (1, 2):  # Q and U: close to the pixel-centre maps, not equal
        assert 1e-4 < np.std(iqu[k] - plain[k]) / np.std(plain[k]) < 0.05
    with pytest.raises(InvalidInputError, match="'pixelise'.*pixel_window"):
        gaussian_sky(cl, nside, lmax=lmax, pixelise=True, pixel_window=False)
    with pytest.raises(InvalidInputError, match="'pixelise' parameter must be True or False"):
        gaussian_iqu_sky(spectra, nside, lmax=lmax, pixelise="yes")
