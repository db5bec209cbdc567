"""Tests of the HEALPix pixel window computed from its definition (cmbtools.spectrum.pixel_windows).

Outside references used here:
* healpy's pixel centres (pix2vec), corners (boundaries) and NESTED hierarchy;
* scipy.special.sph_harm_y for a direct integration of Y_lm over pixels;
* the definition of the window and the equal-area property of HEALPix
  (Gorski et al. 2005, ApJ 622, 759, sections 4 and 4.1);
* Legendre polynomials as a hypergeometric series, P_l(x) = 2F1(-l, l+1; 1; (1-x)/2)
  (Abramowitz & Stegun 1964, chapter 15);
* healpy-layout transforms (ducc0) for the Monte Carlo check.
"""

from __future__ import annotations

import math

import healpy as hp
import numpy as np
import pytest
from scipy.special import sph_harm_y

from cmbtools.spectrum import pixel_windows as _pixwin
from cmbtools._core import sht as _sht
from cmbtools.spectrum.pixel_windows import ALGORITHM_VERSION, cache_path, face_to_vectors, pixel_window
from cmbtools.exceptions import CmbtoolsWarning, InvalidInputError


@pytest.fixture
def own_cache(tmp_path, monkeypatch):
    """A fresh, empty cache directory for one test."""
    d = tmp_path / "cache"
    monkeypatch.setenv("CMBTOOLS_CACHE_DIR", str(d))
    return d


def _subpixel_vectors(nside, k):
    """Unit vectors of the k*k sub-pixel centres of every pixel (NESTED): shape (npix, k*k, 3).

    healpy's NESTED hierarchy: pixel p at nside is the union of pixels
    p*k^2 .. (p+1)*k^2 - 1 at nside*k (Gorski et al. 2005, section 4).
    """
    nh = nside * k
    v = np.array(hp.pix2vec(nh, np.arange(12 * nh * nh), nest=True)).T
    return v.reshape(12 * nside * nside, k * k, 3)


# --------------------------------------------------------------------------- geometry


@pytest.mark.parametrize("nside", [1, 4, 8])
def test_face_coordinates_reproduce_healpy_centres_and_corners(nside):
    pix = np.arange(12 * nside * nside)
    ix, iy, face = hp.pix2xyf(nside, pix, nest=True)
    centres = face_to_vectors((ix + 0.5) / nside, (iy + 0.5) / nside, face)
    np.testing.assert_allclose(centres, np.array(hp.pix2vec(nside, pix, nest=True)).T, rtol=0, atol=2e-15)
    corners = hp.boundaries(nside, pix, step=1, nest=True)  # (npix, 3, 4), healpy's corner vectors
    for a, b in [(1, 1), (0, 1), (0, 0), (1, 0)]:
        mine = face_to_vectors((ix + a) / nside, (iy + b) / nside, face)
        dist = np.min([np.abs(mine - corners[:, :, j]).max(axis=1) for j in range(4)], axis=0)
        assert dist.max() < 2e-15


def test_face_map_is_equal_area(rng):
    # HEALPix is equal area (Gorski et al. 2005): each face covers 4 pi / 12 of the
    # sphere, so |dn/dx x dn/dy| = pi/3 everywhere in face coordinates.
    for face in (0, 5, 9):
        x = rng.uniform(0.02, 0.98, 400)
        y = rng.uniform(0.02, 0.98, 400)
        h = 1e-6
        dx = (face_to_vectors(x + h, y, face) - face_to_vectors(x - h, y, face)) / (2 * h)
        dy = (face_to_vectors(x, y + h, face) - face_to_vectors(x, y - h, face)) / (2 * h)
        jac = np.linalg.norm(np.cross(dx, dy), axis=-1)
        np.testing.assert_allclose(jac, np.pi / 3, rtol=2e-6)


@pytest.mark.parametrize("nside", [1, 2, 4, 8, 64, 1024])
def test_representatives_cover_every_pixel_once(nside):
    total = sum(group[3] * group[1].size for group in _pixwin._representatives(nside))
    assert total == 12 * nside * nside


# --------------------------------------------------------------------------- basic properties


@pytest.mark.parametrize("nside", [1, 2, 8, 32])
def test_monopole_shape_and_monotonic_decrease(nside, own_cache):
    w = pixel_window(nside)
    assert w.shape == (4 * nside + 1,) and w.dtype == np.float64
    assert w[0] == 1.0  # the average of a constant is the constant (exact)
    assert np.all(np.diff(w) < 0) and w[-1] > 0.3


def test_window_at_fixed_l_over_nside_approaches_a_limit(own_cache):
    # For small pixels the window depends on l/nside only (pixels become flat, common
    # practice); at l = 1, 2, 3, 4 x nside the values settle as nside grows, the step
    # shrinking by about half per doubling of nside (measured: 1/nside convergence).
    w = {n: pixel_window(n)[[n, 2 * n, 3 * n, 4 * n]] for n in (32, 64, 128)}
    step_1 = np.abs(w[64] - w[32])
    step_2 = np.abs(w[128] - w[64])
    assert np.all(step_2 < 0.6 * step_1)
    np.testing.assert_allclose(w[128], w[64], rtol=2e-3)


# --------------------------------------------------------------------------- independent paths


def _direct_window_squared(nside, k, lmax):
    """w_l^2 from the definition with <Y_lm>_p the mean over k^2 sub-pixel centres (scipy Y_lm)."""
    nh = nside * k
    theta, phi = hp.pix2ang(nh, np.arange(12 * nh * nh), nest=True)
    out = np.zeros(lmax + 1)
    for ell in range(lmax + 1):
        total = 0.0
        for m in range(ell + 1):
            avg = sph_harm_y(ell, m, theta, phi).reshape(-1, k * k).mean(axis=1)
            # |<Y_l,-m>| = |<Y_lm>|, so m > 0 counts twice
            total += (1.0 if m == 0 else 2.0) * np.sum(np.abs(avg) ** 2)
        out[ell] = 4.0 * np.pi / (2 * ell + 1) * total / (12 * nside * nside)
    return out


@pytest.mark.parametrize("nside,lmax,k", [(1, 8, 32), (2, 8, 16)])
def test_matches_direct_integration_of_spherical_harmonics(nside, lmax, k):
    # Independent path: the definition (Gorski et al. 2005, sec. 4.1) integrated by the
    # midpoint rule on healpy sub-pixel centres with scipy's Y_lm; the midpoint error
    # falls as 1/k^2, so a Richardson step (4 W_2k - W_k)/3 leaves about 2e-6 (measured).
    coarse = _direct_window_squared(nside, k, lmax)
    fine = _direct_window_squared(nside, 2 * k, lmax)
    direct = (4.0 * fine - coarse) / 3.0
    mine = _pixwin._compute_window_squared(nside, lmax)
    np.testing.assert_allclose(mine, direct, rtol=1.5e-5, atol=0)
    # the un-extrapolated midpoint values are visibly worse, so the check has teeth
    assert np.max(np.abs(fine / mine - 1)) > 1e-4


@pytest.mark.parametrize("nside", [4, 8])
def test_dipole_and_quadrupole_from_pixel_moments(nside):
    # Exact identities from the addition theorem:  P_1(n.n') = n.n' gives
    # w_1^2 = mean_p |<n>_p|^2, and P_2 = (3 (n.n')^2 - 1)/2 gives
    # w_2^2 = (3 mean_p ||<n n^T>_p||_F^2 - 1)/2.  The moments come from healpy
    # sub-pixel centres (midpoint rule, Richardson-extrapolated in k).
    def moments(k):
        v = _subpixel_vectors(nside, k)
        mean = v.mean(axis=1)
        outer = np.einsum("pqi,pqj->pij", v, v) / (k * k)
        return np.mean(np.sum(mean**2, axis=1)), (3.0 * np.mean(np.sum(outer**2, axis=(1, 2))) - 1.0) / 2.0

    m16, m32 = np.array(moments(16)), np.array(moments(32))
    w1sq, w2sq = (4.0 * m32 - m16) / 3.0
    mine = _pixwin._compute_window_squared(nside, 4 * nside)
    assert mine[1] == pytest.approx(w1sq, rel=2e-7)
    assert mine[2] == pytest.approx(w2sq, rel=5e-7)


def test_small_l_expansion_and_pixel_second_moment():
    nside = 32
    w2 = _pixwin._compute_window_squared(nside, 4 * nside)
    # Mean squared chord between two points of one pixel, <|n - n'|^2> = 2 (1 - |<n>|^2),
    # from healpy sub-pixel centres (Richardson-extrapolated midpoint rule).
    c2 = []
    for k in (8, 16):
        v = _subpixel_vectors(nside, k)
        c2.append(2.0 * (1.0 - np.mean(np.sum(v.mean(axis=1) ** 2, axis=1))))
    chord2 = (4.0 * c2[1] - c2[0]) / 3.0
    # P_l(1 - u) = sum_k (-l)_k (l+1)_k / (k!)^2 (u/2)^k, the hypergeometric form of P_l
    # (Abramowitz & Stegun 1964, chapter 15; equation number 15.4.6 from memory), with
    # u = 1 - cos g = chord^2/2: to first order w_l^2 = 1 - l(l+1)/4 <chord^2>; the second
    # term l(l-1)(l+1)(l+2)/4 <chord^4>/16 is positive and, with <chord^4> < 3 <chord^2>^2
    # (derived by hand: 5/3 for a uniform disc, 17/10 for a square), bounded.
    for ell in range(1, 8):
        first_order = 1.0 - ell * (ell + 1) / 4.0 * chord2
        bound = ell * (ell - 1) * (ell + 1) * (ell + 2) / 4.0 * 3.0 * chord2**2 / 16.0
        resid = w2[ell] - first_order
        assert -1e-9 <= resid <= bound + 1e-9, ell
    assert w2[1] == pytest.approx(1.0 - chord2 / 2.0, rel=1e-8)
    # The rough estimate for a square pixel of area Omega = 4 pi / Npix: two random points in a
    # square of side a are a^2/3 apart in mean square (from memory), so <g^2> ~ Omega/3.
    # HEALPix pixels are distorted diamonds: their second moment is a few per cent larger.
    omega = 4.0 * np.pi / (12 * nside * nside)
    slope = 4.0 * (1.0 - w2[2]) / 6.0  # <g^2> estimated from the window at l = 2
    assert 1.0 < slope / (omega / 3.0) < 1.10
    assert slope == pytest.approx(chord2, rel=1e-3)


@pytest.mark.slow
def test_spectrum_of_a_map_averaged_into_pixels(rng, own_cache):
    # Monte Carlo (Gorski et al. 2005, sec. 4.1: the pixelised map's spectrum is w_l^2 C_l at
    # l well below the Nyquist scale).  A band-limited Gaussian sky (red spectrum, l <= 2 nside)
    # is sampled at nside_hi = 8 nside, averaged down in the NESTED hierarchy, and analysed at
    # nside; the ratio to the input realisation's own spectrum cancels cosmic variance.  Point
    # samples at nside_hi stand for an average over sub-pixels, so the prediction is
    # (w_l(nside)/w_l(nside_hi))^2.  What remains is the coupling between multipoles caused
    # by the non-circular pixels: a scatter of 0.18% per multipole (measured over seeds).
    nside, k, lmax, nreal = 32, 8, 64, 6
    nh = nside * k
    ell = _sht.alm_ell(lmax)
    cl_in = (1.0 + np.arange(lmax + 1)) ** -2.0
    w = pixel_window(nside)[: lmax + 1]
    w_hi = pixel_window(nh, lmax)
    predicted = (w / w_hi) ** 2
    auto, cross = [], []
    for _ in range(nreal):
        alm = (rng.standard_normal(ell.size) + 1j * rng.standard_normal(ell.size)) / np.sqrt(2.0)
        alm[: lmax + 1] = alm[: lmax + 1].real * np.sqrt(2.0)
        alm *= np.sqrt(cl_in[ell])
        fine = _sht.alm2map(alm, nh, lmax, nthreads=2)
        averaged = hp.reorder(hp.reorder(fine, r2n=True).reshape(-1, k * k).mean(axis=1), n2r=True)
        out = _sht.map2alm(averaged, lmax, n_iter=3, nthreads=2)
        c_in = _sht.alm2cl(alm)
        auto.append(_sht.alm2cl(out) / c_in / predicted - 1.0)
        cross.append(_sht.alm2cl(out, alm) / c_in / (w / w_hi) - 1.0)
    auto, cross = np.array(auto), np.array(cross)
    band = slice(nside // 4, nside + 1)
    # 1 - w_l^2 is 2% to 9% over this band; the checks below resolve it to about 1%.
    assert np.mean(1.0 - w[band] ** 2) > 0.04
    # per multipole, the mean over realisations: scatter 0.18%/sqrt(6) = 7e-4; 4.5 sigma
    assert np.max(np.abs(auto[:, band].mean(axis=0))) < 3.2e-3
    # band averages: scatter 1.2e-4 (auto) and 6e-5 (cross) per set of 6 realisations; 5 sigma
    assert abs(auto[:, band].mean()) < 6e-4
    assert abs(cross[:, band].mean()) < 3e-4


# --------------------------------------------------------------------------- accuracy of the rule


def test_quadrature_and_binning_are_converged():
    # Refining the Gauss-Legendre order (5 -> 8), the histogram (x2 bins) and the pole
    # refinement changes w_l by less than the accuracy stated in the docstring.
    nside = 8
    base = _pixwin._compute_window_squared(nside, 4 * nside)
    fine = _pixwin._compute_window_squared(
        nside, 4 * nside, order=8, bins_per_unit=2 * _pixwin._bins_per_unit(4 * nside, nside), pole_depth=16
    )
    rel = np.abs(np.sqrt(base / fine) - 1.0)
    assert rel[: 3 * nside + 1].max() < 1e-7
    assert rel.max() < 2e-6
    coarse = _pixwin._compute_window_squared(nside, 4 * nside, order=3)
    assert np.abs(np.sqrt(coarse / fine) - 1.0).max() > 1e-5  # a worse rule is detectably worse


def test_beyond_four_nside_uses_a_higher_order(own_cache):
    nside = 4
    w = pixel_window(nside, 8 * nside)
    ref = np.sqrt(_pixwin._compute_window_squared(nside, 8 * nside, order=12, bins_per_unit=16384))
    np.testing.assert_allclose(w, ref, rtol=1e-6)
    np.testing.assert_allclose(w[: 4 * nside + 1], pixel_window(nside, use_cache=False), rtol=2e-6)


def test_threads_give_the_same_result():
    a = pixel_window(16, use_cache=False, nthreads=1)
    b = pixel_window(16, use_cache=False, nthreads=2)
    np.testing.assert_allclose(a, b, rtol=1e-13, atol=0)


# --------------------------------------------------------------------------- validation


@pytest.mark.parametrize("nside", [0, 3, 12, 2.5, "8"])
def test_bad_nside(nside):
    with pytest.raises(InvalidInputError, match="'nside'"):
        pixel_window(nside, use_cache=False)


@pytest.mark.parametrize("lmax", [-1, 65, 1.5])
def test_bad_lmax(lmax):
    with pytest.raises(InvalidInputError, match="'lmax'"):
        pixel_window(8, lmax, use_cache=False)


# --------------------------------------------------------------------------- cache


def test_cache_is_written_then_read(own_cache, monkeypatch):
    first = pixel_window(8)
    path = cache_path(8)
    assert path == own_cache / f"pixel_window_nside8_v{ALGORITHM_VERSION}.npz"
    with np.load(path, allow_pickle=False) as data:
        assert int(data["nside"]) == 8 and int(data["lmax"]) == 32
        assert int(data["version"]) == ALGORITHM_VERSION
        np.testing.assert_array_equal(data["window"], first)

    def forbidden(*args, **kwargs):
        raise AssertionError("recomputed although a valid cache exists")

    monkeypatch.setattr(_pixwin, "_compute_window_squared", forbidden)
    second = pixel_window(8)
    np.testing.assert_array_equal(second, first)
    np.testing.assert_array_equal(pixel_window(8, 10), first[:11])  # a shorter lmax is sliced
    second[3] = 0.0  # callers get their own copy
    assert pixel_window(8)[3] == first[3]


def test_cache_with_too_small_lmax_is_extended(own_cache):
    w32 = pixel_window(8)
    w48 = pixel_window(8, 48)
    with np.load(cache_path(8), allow_pickle=False) as data:
        assert int(data["lmax"]) == 48
    np.testing.assert_allclose(w48[:33], w32, rtol=2e-6)


def test_corrupt_cache_is_recomputed(own_cache):
    good = pixel_window(4, use_cache=False)
    path = cache_path(4)
    path.write_bytes(b"PK\x03\x04 this is not a valid archive")
    with pytest.warns(CmbtoolsWarning, match="corrupt"):
        w = pixel_window(4)
    np.testing.assert_array_equal(w, good)
    with np.load(path, allow_pickle=False) as data:  # rewritten and valid again
        np.testing.assert_array_equal(data["window"], good)


def test_tampered_cache_contents_are_detected(own_cache):
    good = pixel_window(4)
    path = cache_path(4)
    with np.load(path, allow_pickle=False) as data:
        fields = {key: data[key] for key in data.files}
    fields["window"] = fields["window"] * 1.01
    np.savez(path, **fields)
    with pytest.warns(CmbtoolsWarning, match="checksum"):
        w = pixel_window(4)
    np.testing.assert_array_equal(w, good)


def test_stale_cache_version_is_recomputed(own_cache):
    good = pixel_window(4)
    path = cache_path(4)
    with np.load(path, allow_pickle=False) as data:
        fields = {key: data[key] for key in data.files}
    fields["version"] = np.int64(ALGORITHM_VERSION - 1)
    np.savez(path, **fields)
    with pytest.warns(CmbtoolsWarning, match="version"):
        w = pixel_window(4)
    np.testing.assert_array_equal(w, good)
    with np.load(path, allow_pickle=False) as data:
        assert int(data["version"]) == ALGORITHM_VERSION


def test_use_cache_false_writes_nothing(own_cache):
    pixel_window(4, use_cache=False)
    assert not own_cache.exists() or not any(own_cache.iterdir())


def test_unusable_cache_directory_only_warns(tmp_path, monkeypatch):
    blocker = tmp_path / "a_file"
    blocker.write_text("not a directory")
    monkeypatch.setenv("CMBTOOLS_CACHE_DIR", str(blocker / "cache"))
    with pytest.warns(CmbtoolsWarning, match="cache"):
        w = pixel_window(2)
    assert w[0] == 1.0 and w.shape == (9,)
    assert math.isclose(w[8], pixel_window(2, use_cache=False)[8], rel_tol=0, abs_tol=0)
