"""Coordinate rotation, resolution change and smoothing of maps (cmbtools.maps)."""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord

from cmbtools._core import sht as _sht
from cmbtools.exceptions import InvalidInputError
from cmbtools.spectrum import gaussian_beam
from cmbtools.maps import (
    UNSEEN,
    cap_mask,
    change_resolution,
    fit_monopole_dipole,
    missing_pixels,
    rotate_map,
    rotate_mask,
    smooth_map,
)


def band_limited_sky(nside, lmax, rng):
    """A random sky with power falling as 1/l^2, exactly band-limited at lmax."""
    ell = _sht.alm_ell(lmax)
    alm = (rng.standard_normal(ell.size) + 1j * rng.standard_normal(ell.size)) / np.maximum(ell, 1)
    alm[: lmax + 1] = alm[: lmax + 1].real
    return 1e-4 * _sht.alm2map(alm, nside, lmax, nthreads=1)


def dipole_towards(nside, lon, lat):
    vec = np.stack(hp.pix2vec(nside, np.arange(12 * nside**2)), axis=-1)
    return vec @ hp.ang2vec(lon, lat, lonlat=True)


# ---------------------------------------------------------------- rotation

@pytest.mark.parametrize(
    "coord_out, frame",
    [("C", "fk5"), ("E", "barycentricmeanecliptic")],
)
def test_rotated_dipole_points_where_astropy_says(coord_out, frame):
    # reference: astropy's frame transformation of the direction (FK5 J2000 for healpy's 'C',
    # the J2000 mean ecliptic for 'E'); the tolerance allows for the band-limited fit only
    nside = 16
    m = 1e-3 * dipole_towards(nside, 264.0, 48.3)
    rotated = rotate_map(m, "G", coord_out, lmax=8, nthreads=1)
    fit = fit_monopole_dipole(rotated)
    ref = SkyCoord(264.0 * u.deg, 48.3 * u.deg, frame="galactic").transform_to(frame)
    lon_ref, lat_ref = ref.spherical.lon.deg, ref.spherical.lat.deg
    assert fit.lat_deg == pytest.approx(lat_ref, abs=1e-4)
    assert fit.lon_deg == pytest.approx(lon_ref, abs=1e-4)
    assert fit.amplitude == pytest.approx(1e-3, rel=1e-9)


def test_rotation_round_trip_and_healpy_reference(rng):
    nside, lmax = 32, 64
    m = band_limited_sky(nside, lmax, rng)
    there = rotate_map(m, "G", "E", lmax=lmax, nthreads=1)
    back = rotate_map(there, "E", "G", lmax=lmax, nthreads=1)
    # the rotation is exact for band-limited maps; the HEALPix quadrature at lmax = 2 nside
    # (3 refinement steps) limits the round trip to ~1e-4 of the map's rms (measured; common practice)
    assert np.max(np.abs(back - m)) < 1e-3 * m.std()
    # healpy's own harmonic map rotation, without downloaded weights (reference)
    ref = hp.Rotator(coord=["G", "E"]).rotate_map_alms(m, lmax=lmax, use_pixel_weights=False)
    np.testing.assert_allclose(there, ref, rtol=0, atol=1e-10 * m.std())
    np.testing.assert_array_equal(rotate_map(m, "G", "galactic"), m)


def test_rotate_map_refuses_missing_pixels(rng):
    m = band_limited_sky(16, 20, rng)
    m[3] = UNSEEN
    with pytest.raises(InvalidInputError, match="1 missing .*fill the holes first, or rotate it in pixel space"):
        rotate_map(m, "G", "C")
    with pytest.raises(InvalidInputError, match="'coord_out' parameter must be one of"):
        rotate_map(np.zeros(768), "G", "Z")


def test_rotate_mask_matches_a_mask_built_in_the_other_system():
    nside = 64
    mask_g = cap_mask(nside, 250.0, -55.0, 30.0)
    rotated = rotate_mask(mask_g, "G", "C")
    # the same patch, built directly on an equatorial grid
    direct = cap_mask(nside, 250.0, -55.0, 30.0, coord="G", map_coord="C")
    assert set(np.unique(rotated)) == {0.0, 1.0}  # nearest-pixel resampling keeps it binary
    differ = np.count_nonzero(rotated != direct)
    # only pixels along the boundary can differ: at most the ~1-pixel band around it
    boundary_pixels = 2 * np.pi * np.sin(np.radians(30.0)) / hp.nside2resol(nside)
    assert differ < 1.5 * boundary_pixels
    assert abs(rotated.sum() - direct.sum()) < 0.5 * boundary_pixels


def test_rotate_mask_keeps_missing_pixels_of_maps(rng):
    m = band_limited_sky(16, 20, rng)
    m[:100] = UNSEEN
    out = rotate_mask(m, "G", "E")
    assert 0 < missing_pixels(out).sum() < 200
    back = rotate_mask(out, "E", "G")
    assert np.count_nonzero(back == m) > 0.8 * m.size  # nearest-pixel resampling is not exactly invertible


# ---------------------------------------------------------------- resolution

def test_change_resolution_down_averages_valid_subpixels(rng):
    nside = 32
    m = rng.standard_normal(12 * nside**2)
    m[:200] = UNSEEN
    # reference: healpy's ud_grade averages the valid sub-pixels; pess=True needs them all valid
    loose = change_resolution(m, 8, min_valid_fraction=1 / 16)
    np.testing.assert_allclose(loose, hp.ud_grade(m, 8, pess=False), rtol=1e-13, atol=0)
    strict = change_resolution(m, 8, min_valid_fraction=1.0)
    np.testing.assert_allclose(strict, hp.ud_grade(m, 8, pess=True), rtol=1e-13, atol=0)
    assert missing_pixels(strict).sum() > missing_pixels(loose).sum()
    # NaN and inf count as missing too
    m2 = m.copy()
    m2[1000] = np.nan
    m2[1001] = np.inf
    out = change_resolution(m2, 8, min_valid_fraction=1.0)
    assert np.all(np.isfinite(out))
    assert missing_pixels(out).sum() >= missing_pixels(strict).sum() + 1


def test_change_resolution_half_threshold():
    nside = 4
    m = np.arange(12 * nside**2, dtype=float)
    nest = hp.reorder(m, r2n=True)
    nest[:16] = UNSEEN  # the first coarse pixel (nside 1, nested 0) fully missing
    nest[16:23] = UNSEEN  # the second: 7 of 16 missing -> 9 valid >= 8 kept
    nest[32:41] = UNSEEN  # the third: 9 of 16 missing -> 7 valid < 8 -> missing
    m = hp.reorder(nest, n2r=True)
    out_nest = hp.reorder(change_resolution(m, 1), r2n=True)
    assert out_nest[0] == UNSEEN and out_nest[2] == UNSEEN
    assert out_nest[1] == pytest.approx(np.mean(nest[23:32]), rel=1e-15)
    assert out_nest[3] == pytest.approx(np.mean(nest[48:64]), rel=1e-15)


def test_change_resolution_up_repeats(rng):
    m = rng.standard_normal(768)
    m[5] = UNSEEN
    up = change_resolution(m, 32)
    np.testing.assert_array_equal(up, hp.ud_grade(m, 32))  # healpy reference
    np.testing.assert_allclose(change_resolution(up, 8), m, rtol=1e-14)
    with pytest.raises(InvalidInputError, match=r"'min_valid_fraction' parameter must be in \(0, 1\]"):
        change_resolution(m, 4, min_valid_fraction=2.0)


# ---------------------------------------------------------------- smoothing

def test_gaussian_beam_matches_healpy():
    # reference: healpy.gauss_beam, B_l = exp(-l(l+1) sigma^2 / 2)
    np.testing.assert_allclose(gaussian_beam(25.0, 500), hp.gauss_beam(np.radians(25.0 / 60), 500), rtol=1e-13)


def test_smooth_map_matches_healpy(rng):
    nside = 32
    m = band_limited_sky(nside, 3 * nside - 1, rng)
    out = smooth_map(m, fwhm_arcmin=120.0, nthreads=1)
    ref = hp.smoothing(m, fwhm=np.radians(2.0), iter=3, use_pixel_weights=False)  # reference
    np.testing.assert_allclose(out, ref, rtol=0, atol=1e-10 * out.std())
    bl = gaussian_beam(120.0, 3 * nside - 1)
    np.testing.assert_allclose(smooth_map(m, beam=bl, nthreads=1), out, rtol=0, atol=1e-14 * out.std())
    # a tabulated beam that is 1 up to l = 10 and 0 beyond keeps only the large scales
    top = np.where(np.arange(3 * nside) <= 10, 1.0, 0.0)
    low = smooth_map(m, beam=top, nthreads=1)
    cl = _sht.alm2cl(_sht.map2alm(low, 3 * nside - 1, n_iter=3, nthreads=1))
    assert cl[20:].max() < 1e-8 * cl[2:11].max()


def test_smooth_map_missing_pixel_policies(rng):
    nside = 16
    m = band_limited_sky(nside, 40, rng)
    m[:30] = UNSEEN
    with pytest.raises(InvalidInputError, match="30 missing pixels; smoothing would spread them"):
        smooth_map(m, fwhm_arcmin=60.0)
    for fill in ("zero", "mean"):
        out = smooth_map(m, fwhm_arcmin=60.0, fill_missing=fill, nthreads=1)
        np.testing.assert_array_equal(missing_pixels(out), missing_pixels(m))
        assert np.all(np.isfinite(out[30:]))
    filled = np.where(missing_pixels(m), 0.0, m)
    np.testing.assert_allclose(
        smooth_map(m, fwhm_arcmin=60.0, fill_missing="zero", nthreads=1)[30:],
        smooth_map(filled, fwhm_arcmin=60.0, nthreads=1)[30:], rtol=0, atol=1e-15,
    )


def test_smooth_map_argument_errors():
    m = np.zeros(768)
    with pytest.raises(InvalidInputError, match="exactly one of 'fwhm_arcmin'"):
        smooth_map(m)
    with pytest.raises(InvalidInputError, match="exactly one of 'fwhm_arcmin'"):
        smooth_map(m, fwhm_arcmin=10.0, beam=np.ones(30))
    with pytest.raises(InvalidInputError, match="'beam' must extend to ell=23"):
        smooth_map(m, beam=np.ones(10))
    with pytest.raises(InvalidInputError, match="'fill_missing' parameter must be None, 'zero' or 'mean'"):
        smooth_map(m, fwhm_arcmin=10.0, fill_missing="nearest")
    with pytest.raises(InvalidInputError, match="'fwhm_arcmin' parameter must be a finite number > 0"):
        smooth_map(m, fwhm_arcmin=-1.0)
