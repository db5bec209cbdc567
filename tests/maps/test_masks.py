"""Masks: moments, geometric masks, combination, resolution change, apodization."""

from __future__ import annotations

import math

import healpy as hp
import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import SkyCoord

from cmbtools.exceptions import InputFileError, InvalidInputError, ResolutionMismatchError
from cmbtools.maps import (
    UNSEEN,
    apodize_mask,
    cap_mask,
    change_mask_resolution,
    combine_masks,
    disc_mask,
    latitude_cut_mask,
    mask_moments,
    read_positions_csv,
    taper_profile,
    threshold_mask,
)


def cap_fraction(radius_deg):
    """Area of a spherical cap over the sphere: 2 pi (1 - cos r) / 4 pi
    (Archimedes' hat-box theorem; common practice)."""
    return (1.0 - math.cos(math.radians(radius_deg))) / 2.0


def boundary_tolerance(nside, boundary_length_rad):
    """Pixelization error of an area: one pixel width along the boundary (common practice)."""
    return boundary_length_rad * math.sqrt(4 * math.pi / (12 * nside**2)) / (4 * math.pi)


def angular_distance_deg(vec_a, vec_b):
    """Angle between unit vectors, via atan2(|a x b|, a.b) (accurate at all angles; common practice)."""
    cross = np.linalg.norm(np.cross(vec_a, vec_b), axis=-1)
    return np.degrees(np.arctan2(cross, np.sum(vec_a * vec_b, axis=-1)))


def pixel_vectors(nside):
    return np.stack(hp.pix2vec(nside, np.arange(12 * nside**2)), axis=-1)


# ---------------------------------------------------------------- moments

@pytest.mark.parametrize("nside", [32, 64])
@pytest.mark.parametrize("lon, lat, radius", [(250.0, -55.0, 50.0), (0.0, 90.0, 30.0), (10.0, 5.0, 90.0), (120.0, 40.0, 12.0)])
def test_cap_sky_fraction_matches_cap_area(nside, lon, lat, radius):
    mom = mask_moments(cap_mask(nside, lon, lat, radius))
    expected = cap_fraction(radius)
    tol = boundary_tolerance(nside, 2 * math.pi * math.sin(math.radians(radius)))
    assert abs(mom.f_sky - expected) < tol
    # a binary mask has every moment equal to its sky fraction
    assert mom.w2 == pytest.approx(mom.f_sky, rel=1e-14)
    assert mom.w4 == pytest.approx(mom.f_sky, rel=1e-14)
    assert mom.f_sky_eff == pytest.approx(mom.f_sky, rel=1e-14)
    assert mom.n_pixels_used == round(mom.f_sky * 12 * nside**2)


def test_moments_of_a_weighted_mask():
    w = np.zeros(12 * 16**2)
    w[:1536] = 1.0
    w[1536:2304] = 0.5
    mom = mask_moments(w)
    # f_sky = mean(w), w2 = mean(w^2), w4 = mean(w^4), f_sky_eff = w2^2/w4 (Hivon et al. 2002, ApJ 567, 2)
    assert mom.f_sky == pytest.approx((1536 + 0.5 * 768) / 3072, rel=1e-15)
    assert mom.w2 == pytest.approx((1536 + 0.25 * 768) / 3072, rel=1e-15)
    assert mom.w4 == pytest.approx((1536 + 0.0625 * 768) / 3072, rel=1e-15)
    assert mom.f_sky_eff == pytest.approx(mom.w2**2 / mom.w4, rel=1e-15)
    # by hand: w2 = 9/16, w4 = 33/64, so f_sky_eff = (81/256) / (33/64) = 27/44
    assert mom.f_sky_eff == pytest.approx(27 / 44, rel=1e-14)
    assert (mom.n_pixels_used, mom.nside, mom.n_pixels) == (2304, 16, 3072)


def test_moments_reject_bad_masks():
    with pytest.raises(InvalidInputError, match=r"values in \[0, 1\]"):
        mask_moments(np.full(768, 1.5))
    with pytest.raises(InvalidInputError, match="zero everywhere"):
        mask_moments(np.zeros(768))
    with pytest.raises(InvalidInputError, match="not 12\\*nside\\*\\*2"):
        mask_moments(np.ones(700))


# ---------------------------------------------------------------- latitude cut

@pytest.mark.parametrize("cut", [10.0, 20.0, 45.0])
def test_latitude_cut_area(cut):
    nside = 64
    w = latitude_cut_mask(nside, cut)
    # the band |b| < cut covers sin(cut) of the sphere (Archimedes' hat-box theorem; common practice)
    expected = 1.0 - math.sin(math.radians(cut))
    tol = boundary_tolerance(nside, 2 * 2 * math.pi * math.cos(math.radians(cut)))
    assert abs(w.mean() - expected) < tol
    lat = 90.0 - np.degrees(hp.pix2ang(nside, np.arange(w.size))[0])
    np.testing.assert_array_equal(w, (np.abs(lat) >= cut).astype(float))


def test_latitude_cut_in_another_system_matches_astropy():
    # an ecliptic-latitude cut on a galactic map: compare with astropy's frame transformations
    nside, cut = 32, 15.0
    w = latitude_cut_mask(nside, cut, coord="E", map_coord="G")
    lon, lat = hp.pix2ang(nside, np.arange(12 * nside**2), lonlat=True)
    ecl = SkyCoord(lon * u.deg, lat * u.deg, frame="galactic").transform_to("barycentricmeanecliptic")
    beta = ecl.lat.deg
    clear = np.abs(np.abs(beta) - cut) > 0.01  # frame definitions differ by far less than 0.01 deg
    np.testing.assert_array_equal(w[clear], (np.abs(beta[clear]) >= cut).astype(float))
    assert clear.mean() > 0.99
    assert abs(w.mean() - (1 - math.sin(math.radians(cut)))) < boundary_tolerance(nside, 4 * math.pi)


def test_latitude_cut_errors():
    with pytest.raises(InvalidInputError, match=r"'cut_deg' parameter must be in \[0, 90\)"):
        latitude_cut_mask(16, 90)
    with pytest.raises(InvalidInputError, match="power of two"):
        latitude_cut_mask(12, 10)
    with pytest.raises(InvalidInputError, match="'coord' parameter must be one of"):
        latitude_cut_mask(16, 10, coord="X")


# ---------------------------------------------------------------- caps and discs

def test_cap_contains_exactly_the_pixels_within_radius():
    nside = 32
    w = cap_mask(nside, 250.0, -55.0, 20.0)
    centre = hp.ang2vec(250.0, -55.0, lonlat=True)
    d = angular_distance_deg(pixel_vectors(nside), centre[None, :])
    np.testing.assert_array_equal(w, (d <= 20.0).astype(float))


def test_cap_given_in_equatorial_coordinates_on_galactic_map():
    nside = 32
    # the galactic north pole is at (RA, Dec) = (192.85948, 27.12825) deg, J2000 (Hipparcos/ICRS convention)
    w_eq = cap_mask(nside, 192.85948, 27.12825, 30.0, coord="C", map_coord="G")
    w_gal = cap_mask(nside, 0.0, 90.0, 30.0)
    assert np.mean(w_eq != w_gal) < 0.005
    assert w_eq.sum() == pytest.approx(w_gal.sum(), rel=0.01)


def test_cap_errors():
    with pytest.raises(InvalidInputError, match=r"latitude in \[-90, 90\]"):
        cap_mask(16, 0.0, 95.0, 10.0)
    with pytest.raises(InvalidInputError, match=r"'radius_deg' parameter must be in \(0, 180\]"):
        cap_mask(16, 0.0, 0.0, 200.0)
    with pytest.raises(InvalidInputError, match="contains no pixel centre"):
        cap_mask(4, 1.0, 1.0, 0.01)


def _write_csv(path, text):
    path.write_text(text)
    return path


def test_disc_mask_from_csv(tmp_path):
    nside = 64
    csv = _write_csv(tmp_path / "src.csv", (
        "# invented point sources of the Tern Field\n"
        "name,lon_deg,lat_deg,radius_deg\n"
        "tern-01,250.0,-55.0,\n"
        "tern-02,230.0,-40.0,2.0\n"
        "\n"
        "tern-03,270.0,-70.0,1.5\n"
    ))
    table = read_positions_csv(csv)
    np.testing.assert_array_equal(table[:, :2], [[250, -55], [230, -40], [270, -70]])
    assert np.isnan(table[0, 2]) and table[1, 2] == 2.0 and table[2, 2] == 1.5
    w = disc_mask(nside, csv, radius_deg=1.0)
    removed = (1 - w).sum() / w.size
    expected = cap_fraction(1.0) + cap_fraction(2.0) + cap_fraction(1.5)
    tol = boundary_tolerance(nside, 2 * math.pi * sum(math.sin(math.radians(r)) for r in (1.0, 2.0, 1.5)))
    assert abs(removed - expected) < tol
    # the pixel under each position is removed; same result from an array
    assert np.all(w[hp.ang2pix(nside, table[:, 0], table[:, 1], lonlat=True)] == 0)
    np.testing.assert_array_equal(disc_mask(nside, [[250, -55, 1.0], [230, -40, 2.0], [270, -70, 1.5]]), w)


@pytest.mark.parametrize(
    "text, match",
    [
        ("lon,lat\n1,2\n", "lacks the column\\(s\\) lon_deg, lat_deg"),
        ("lon_deg,radius_deg\n1,2\n", "lacks the column\\(s\\) lat_deg"),
        ("lon_deg,lat_deg\n1,abc\n", "row 2, column lat_deg: 'abc' is not a number"),
        ("lon_deg,lat_deg\n1,2\n3,nan\n", "row 3, column lat_deg: 'nan' is not a finite number"),
        ("lon_deg,lat_deg\n1,95\n", "row 2: latitude 95.0 is outside"),
        ("lon_deg,lat_deg,radius_deg\n1,2,-1\n", "row 2: radius -1.0 is not in"),
        ("lon_deg,lat_deg\n1\n", "row 2 has 1 cells but the header has 2"),
        ("lon_deg,lat_deg\n", "has a header but no positions"),
        ("# only a comment\n", "is empty"),
    ],
)
def test_positions_csv_errors(tmp_path, text, match):
    csv = _write_csv(tmp_path / "bad.csv", text)
    with pytest.raises(InputFileError, match=r"bad\.csv: " + match):
        read_positions_csv(csv)


def test_disc_mask_needs_a_radius(tmp_path):
    csv = _write_csv(tmp_path / "r.csv", "lon_deg,lat_deg\n10,10\n")
    with pytest.raises(InvalidInputError, match="1 position\\(s\\) have no radius"):
        disc_mask(16, csv)
    with pytest.raises(InvalidInputError, match="shape \\(n, 2\\) or \\(n, 3\\)"):
        disc_mask(16, np.zeros((2, 4)), 1.0)
    with pytest.raises(InputFileError, match="no such file"):
        disc_mask(16, tmp_path / "none.csv", 1.0)


# ---------------------------------------------------------------- threshold, combination, resolution

def test_threshold_mask(rng):
    m = rng.standard_normal(12 * 16**2)
    m[:10] = UNSEEN
    m[10:12] = np.nan
    below = threshold_mask(m, 0.5)
    above = threshold_mask(m, 0.5, keep="above")
    valid = np.isfinite(m) & (m != UNSEEN)
    np.testing.assert_array_equal(below, (valid & (m < 0.5)).astype(float))
    np.testing.assert_array_equal(above, (valid & (m > 0.5)).astype(float))
    assert below[:12].sum() == 0 and above[:12].sum() == 0  # missing pixels never kept
    with pytest.raises(InvalidInputError, match="No valid pixel is above the threshold 100"):
        threshold_mask(m, 100.0, keep="above")
    with pytest.raises(InvalidInputError, match="'keep' parameter must be 'below' or 'above'"):
        threshold_mask(m, 0.0, keep="inside")


def test_combine_masks_is_the_product(rng):
    a = rng.random(768)
    b = (rng.random(768) > 0.5).astype(float)
    np.testing.assert_array_equal(combine_masks(a, b), a * b)
    with pytest.raises(ResolutionMismatchError, match="nside 8 but the 'mask 1' has nside 16"):
        combine_masks(a, np.ones(3072))
    with pytest.raises(InvalidInputError, match="do not overlap"):
        combine_masks(b, 1 - b)


def test_change_mask_resolution():
    w = cap_mask(64, 250.0, -55.0, 30.0)
    down = change_mask_resolution(w, 16)
    assert down.mean() == pytest.approx(w.mean(), rel=1e-14)  # averaging keeps the sky fraction
    assert set(np.unique(down)) <= {k / 16 for k in range(17)}  # 16 sub-pixels per coarse pixel
    # reference: healpy's ud_grade averages the same way when nothing is missing
    np.testing.assert_allclose(down, hp.ud_grade(w, 16), rtol=0, atol=1e-15)
    up = change_mask_resolution(down, 64)
    assert up.mean() == pytest.approx(w.mean(), rel=1e-14)
    np.testing.assert_array_equal(change_mask_resolution(up, 16), down)
    strict = change_mask_resolution(w, 16, threshold=1.0)
    np.testing.assert_array_equal(strict, (down == 1).astype(float))
    half = change_mask_resolution(w, 16, threshold=0.5)
    np.testing.assert_array_equal(half, (down >= 0.5).astype(float))
    with pytest.raises(InvalidInputError, match=r"'threshold' parameter must be in \(0, 1\]"):
        change_mask_resolution(w, 16, threshold=1.5)


# ---------------------------------------------------------------- apodization

def test_taper_formula():
    width = 3.0
    # w = x - sin(2 pi x)/(2 pi), x = sqrt((1 - cos d)/(1 - cos width)) (Grain, Tristram & Stompor 2009,
    # Phys. Rev. D 79, 123515; from memory): w(0) = 0, w(x = 1/2) = 1/2, w(width) = 1
    d_half = math.degrees(math.acos(1 - 0.25 * (1 - math.cos(math.radians(width)))))
    np.testing.assert_allclose(taper_profile([0.0, d_half, width, 10.0], width), [0.0, 0.5, 1.0, 1.0], atol=1e-15)
    x = 0.3
    d = math.degrees(math.acos(1 - x**2 * (1 - math.cos(math.radians(width)))))
    assert taper_profile(d, width) == pytest.approx(x - math.sin(2 * math.pi * x) / (2 * math.pi), rel=1e-13)
    dd = np.linspace(0, width, 200)
    assert np.all(np.diff(taper_profile(dd, width)) > 0)


def test_cosine_apodization_matches_brute_force_distance():
    # at nside 16 the distance of every kept pixel to every masked pixel can be computed directly
    nside, width = 16, 15.0
    w = combine_masks(cap_mask(nside, 40.0, 30.0, 50.0), disc_mask(nside, [[50.0, 35.0]], 8.0))
    apo = apodize_mask(w, width)
    vec = pixel_vectors(nside)
    kept, masked = np.flatnonzero(w > 0), np.flatnonzero(w == 0)
    dist = np.array([angular_distance_deg(vec[masked], vec[p][None, :]).min() for p in kept])
    np.testing.assert_allclose(apo[kept], taper_profile(dist, width), rtol=0, atol=1e-12)
    assert np.all(apo[masked] == 0)
    assert np.any(dist > width) and np.all(apo[kept][dist > width] == 1.0)


def test_cosine_apodization_profile_of_a_cap():
    nside, radius, width = 64, 40.0, 5.0
    w = cap_mask(nside, 250.0, -55.0, radius)
    apo = apodize_mask(w, width)
    assert apo.min() >= 0 and apo.max() <= 1
    assert np.all(apo[w == 0] == 0)
    theta = angular_distance_deg(pixel_vectors(nside), hp.ang2vec(250.0, -55.0, lonlat=True)[None, :])
    deep = theta < radius - width - 1.0
    assert np.all(apo[deep] == 1.0)
    # the distance to the edge is radius - theta up to about a pixel: bound the error by the
    # taper's largest slope, 2/width per degree, times the pixel size
    ring = (w > 0) & ~deep
    pix_deg = math.degrees(math.sqrt(4 * math.pi / (12 * nside**2)))
    expected = taper_profile(np.clip(radius - theta[ring], 0, None), width)
    assert np.max(np.abs(apo[ring] - expected)) < 2.0 / width * 1.5 * pix_deg
    # the mean of the taper over the cap: f_sky decreases, moments ordered w4 < w2 < f_sky
    mom = mask_moments(apo)
    assert mom.w4 < mom.w2 < mom.f_sky < w.mean()


def test_gaussian_apodization():
    nside, width = 32, 8.0
    w = cap_mask(nside, 0.0, 0.0, 50.0)
    apo = apodize_mask(w, width, taper="gaussian", nthreads=1)
    assert apo.min() >= 0 and apo.max() <= 1
    assert np.all(apo[w == 0] == 0)
    theta = angular_distance_deg(pixel_vectors(nside), hp.ang2vec(0.0, 0.0, lonlat=True)[None, :])
    # a step smoothed by a Gaussian is 1/2 at the edge and 1 - 6e-5 at 2 FWHM inside
    # (erf of 2 sqrt(8 ln 2)/sqrt(2) = 3.33; common practice)
    assert np.all(apo[theta < 50.0 - 2 * width] > 0.999)
    edge = (w > 0) & (theta > 50.0 - 1.0)
    assert np.all(np.abs(apo[edge] - 0.5) < 0.15)


def test_apodization_keeps_weights_and_errors():
    w = cap_mask(16, 0.0, 0.0, 60.0) * 0.5
    apo = apodize_mask(w, 10.0)
    assert apo.max() == 0.5  # weights are multiplied by the taper
    np.testing.assert_array_equal(apodize_mask(np.ones(3072), 5.0), np.ones(3072))  # nothing to taper
    with pytest.raises(InvalidInputError, match="'taper' parameter must be 'cosine' or 'gaussian'"):
        apodize_mask(w, 5.0, taper="box")
    with pytest.raises(InvalidInputError, match="'width_deg' parameter must be a finite number > 0"):
        apodize_mask(w, 0.0)
