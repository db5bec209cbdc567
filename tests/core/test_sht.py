"""The ducc0 transforms in cmbtools._core.sht against healpy (a general-purpose reference)."""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest

from cmbtools._core import sht as _sht


@pytest.fixture(scope="module")
def band_limited_map():
    nside, lmax = 32, 95
    rng = np.random.default_rng(7)
    n = _sht.alm_size(lmax)
    alm = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) / np.sqrt(2)
    alm[: lmax + 1] = rng.standard_normal(lmax + 1)  # m = 0 coefficients are real
    ell = _sht.alm_ell(lmax)
    alm *= 1.0 / (ell + 5.0)
    return nside, lmax, alm, _sht.alm2map(alm, nside, lmax, nthreads=1)


def test_layout_matches_healpy():
    for lmax in (0, 1, 7, 30):
        assert _sht.alm_size(lmax) == hp.Alm.getsize(lmax)
        ell, m = hp.Alm.getlm(lmax)
        np.testing.assert_array_equal(_sht.alm_ell(lmax), ell)


def test_synthesis_matches_healpy(band_limited_map):
    nside, lmax, alm, m = band_limited_map
    ref = hp.alm2map(alm, nside, lmax=lmax)
    np.testing.assert_allclose(m, ref, rtol=0, atol=1e-12 * np.abs(ref).max())


@pytest.mark.parametrize("n_iter", [0, 1, 3])
def test_analysis_matches_healpy_for_same_iterations(band_limited_map, n_iter):
    nside, lmax, _, m = band_limited_map
    ours = _sht.map2alm(m, lmax, n_iter=n_iter, nthreads=1)
    ref = hp.map2alm(m, lmax=lmax, iter=n_iter)
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-11 * np.abs(ref).max())


def test_iterations_converge_to_the_input():
    # Below lmax = 2 nside the HEALPix grid determines a band-limited map, so the
    # Jacobi refinement converges to the input coefficients (common practice).
    nside, lmax = 32, 47
    rng = np.random.default_rng(7)
    n = _sht.alm_size(lmax)
    alm = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) / np.sqrt(2)
    alm[: lmax + 1] = rng.standard_normal(lmax + 1)
    m = _sht.alm2map(alm, nside, lmax, nthreads=1)
    err = [np.abs(_sht.map2alm(m, lmax, n_iter=k, nthreads=1) - alm).max() for k in (0, 3, 10)]
    assert err[0] < 0.05  # plain quadrature: percent-level error
    assert err[1] < 1e-3 * err[0]
    assert err[2] < 1e-12


def test_spectrum_matches_anafast(band_limited_map):
    nside, lmax, _, m = band_limited_map
    alm = _sht.map2alm(m, lmax, n_iter=3, nthreads=1)
    np.testing.assert_allclose(_sht.alm2cl(alm), hp.anafast(m, lmax=lmax, iter=3), rtol=1e-10)
    m2 = np.roll(m, 5)
    alm2 = _sht.map2alm(m2, lmax, n_iter=3, nthreads=1)
    np.testing.assert_allclose(
        _sht.alm2cl(alm, alm2), hp.anafast(m, m2, lmax=lmax, iter=3), rtol=1e-9, atol=1e-14
    )


def test_almxfl_matches_healpy(band_limited_map):
    _, lmax, alm, _ = band_limited_map
    fl = np.linspace(1.0, 0.2, lmax + 1)
    np.testing.assert_allclose(_sht.almxfl(alm, fl, lmax), hp.almxfl(alm, fl), rtol=1e-14)


# ----------------------------------------------------------------------------- transforms split to save memory


@pytest.mark.parametrize("nside", [8, 32])
def test_split_transforms_equal_the_one_call_transform(monkeypatch, nside):
    # the split adjoint transform adds the same pixel sums in another order: equal to rounding
    rng = np.random.default_rng(nside)
    a, b = rng.uniform(size=(2, 12 * nside**2))
    lmax = 6 * nside - 2  # a mask spectrum's 2 lmax
    direct = [_sht.map2alm(x, lmax, nthreads=1) for x in (a, b)]
    spectra = [_sht.alm2cl(direct[0]), _sht.alm2cl(direct[1]), _sht.alm2cl(direct[0], direct[1])]
    monkeypatch.setattr(_sht, "ONE_CALL_BYTES", 16_000)  # split ...
    monkeypatch.setattr(_sht, "LEG_BUFFER_BYTES", 8_000)  # ... into a few rings and m per piece
    assert len(list(_sht._ring_groups(nside, lmax + 1))) >= 3
    assert len(list(_sht._m_groups(lmax, lmax + 1))) >= 3
    split = _sht.map2alm(a, lmax, nthreads=1)
    np.testing.assert_allclose(split, direct[0], rtol=0, atol=1e-14 * np.abs(direct[0]).max())
    for got, want in zip(_sht.map_spectra([a, b], lmax, nthreads=1), spectra):
        np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-15 * np.abs(want).max())
    (auto,) = _sht.map_spectra([a], lmax, nthreads=1)
    np.testing.assert_allclose(auto, spectra[0], rtol=1e-12)


def test_a_map_made_ring_block_by_ring_block_gives_the_same_spectrum(monkeypatch):
    # the estimator's large-map path: the monopole/dipole-removed masked map is made a run of rings at a time
    # inside the split transform; healpy's anafast (iter=0) of the whole map is the reference
    from cmbtools.maps.monopole_dipole import masked_without_monopole_dipole

    nside, lmax = 32, 95
    theta = hp.pix2ang(nside, np.arange(12 * nside**2))[0]
    w = np.clip((np.abs(np.cos(theta)) - 0.3) / 0.2, 0.0, 1.0)  # a tapered latitude cut: whole rings are zero
    m = 3.0 + np.random.default_rng(4).standard_normal(w.size)
    rings = _sht.occupied_rings(w)
    whole = masked_without_monopole_dipole(m, w, nthreads=1, rings=rings)
    lazy = masked_without_monopole_dipole(m, w, nthreads=1, rings=rings, by_rings=True)
    np.testing.assert_allclose(lazy.full(), whole, rtol=0, atol=1e-14 * np.abs(whole).max())
    want = hp.anafast(whole, lmax=lmax, iter=0)
    monkeypatch.setattr(_sht, "ONE_CALL_BYTES", 16_000)
    monkeypatch.setattr(_sht, "LEG_BUFFER_BYTES", 8_000)
    assert _sht.runs_in_pieces(nside, lmax)
    (got,) = _sht.map_spectra([lazy], lmax, nthreads=1, rings=rings)
    np.testing.assert_allclose(got[2:], want[2:], rtol=1e-11)


def test_split_pieces_cover_every_ring_and_every_m_once():
    nside, lmax = 16, 95
    rings = np.concatenate(list(_sht._ring_groups(nside, lmax + 1)))
    np.testing.assert_array_equal(np.sort(rings), np.arange(4 * nside - 1))
    groups = list(_sht._m_groups(lmax, lmax + 1, budget=16 * 200))
    assert groups[0][0] == 0 and groups[-1][1] == lmax + 1
    assert all(g[1] == h[0] for g, h in zip(groups, groups[1:]))
    blocks = [_sht._m_block(lmax, m0, m1) for m0, m1 in groups]
    assert blocks[0][0] == 0 and blocks[-1][1] == _sht.alm_size(lmax)
    assert all(x[1] == y[0] for x, y in zip(blocks, blocks[1:]))
    assert all((stop - start) * 16 <= 16 * 200 or m1 - m0 == 1 for (start, stop), (m0, m1) in zip(blocks, groups))


def test_alm2cl_and_almxfl_match_healpy():
    # healpy's own alm2cl/almxfl are the reference (same layout)
    lmax = 40
    rng = np.random.default_rng(2)
    n = _sht.alm_size(lmax)
    a = rng.normal(size=n) + 1j * rng.normal(size=n)
    b = rng.normal(size=n) + 1j * rng.normal(size=n)
    a[: lmax + 1] = a[: lmax + 1].real
    b[: lmax + 1] = b[: lmax + 1].real
    np.testing.assert_allclose(_sht.alm2cl(a), hp.alm2cl(a), rtol=1e-13)
    np.testing.assert_allclose(_sht.alm2cl(a, b), hp.alm2cl(a, b), rtol=1e-12, atol=1e-14)
    fl = rng.uniform(size=lmax + 1)
    np.testing.assert_allclose(_sht.almxfl(a, fl, lmax), hp.almxfl(a, fl), rtol=1e-15)


def test_transforms_that_skip_empty_rings_equal_the_full_transform(monkeypatch):
    # rings where the masked map is zero add nothing to the pixel sums: skipping them is exact
    nside, lmax = 32, 95
    theta = hp.pix2ang(nside, np.arange(12 * nside**2))[0]
    w = (np.abs(np.cos(theta)) > 0.4).astype(float)  # a latitude cut: whole rings are zero
    m = np.random.default_rng(1).standard_normal(w.size) * w
    occupied = _sht.occupied_rings(w)
    geom = _sht.ring_geometry(nside)
    by_hand = np.array([np.any(w[s:s + n] != 0) for s, n in zip(geom["ringstart"], geom["nphi"])])
    np.testing.assert_array_equal(occupied, by_hand)
    assert 0 < occupied.sum() < occupied.size
    full = _sht.map2alm(m, lmax, nthreads=1)
    np.testing.assert_allclose(_sht.map2alm(m, lmax, nthreads=1, rings=occupied), full, rtol=0,
                               atol=1e-14 * np.abs(full).max())
    monkeypatch.setattr(_sht, "ONE_CALL_BYTES", 16_000)  # and through the split transform
    monkeypatch.setattr(_sht, "LEG_BUFFER_BYTES", 8_000)
    np.testing.assert_allclose(_sht.map2alm(m, lmax, nthreads=1, rings=occupied), full, rtol=0,
                               atol=1e-14 * np.abs(full).max())
    with pytest.raises(ValueError, match="n_iter=0"):
        _sht.map2alm(m, lmax, n_iter=1, rings=occupied)


def test_synthesis_on_occupied_rings_only():
    # the rings asked for get the full synthesis' pixels exactly; every other pixel is 0
    nside, lmax = 16, 47
    theta = hp.pix2ang(nside, np.arange(12 * nside**2))[0]
    w = (np.abs(np.cos(theta)) > 0.3).astype(float)
    rings = _sht.occupied_rings(w)
    rng = np.random.default_rng(3)
    n = _sht.alm_size(lmax)
    alm = rng.standard_normal(n) + 1j * rng.standard_normal(n)
    alm[: lmax + 1] = alm[: lmax + 1].real
    full = _sht.alm2map(alm, nside, lmax, nthreads=1)
    part = _sht.alm2map(alm, nside, lmax, nthreads=1, rings=rings)
    starts, stops = _sht.ring_pixel_ranges(nside, rings)
    inside = np.zeros(w.size, dtype=bool)
    for a, b in zip(starts, stops):
        inside[a:b] = True
    np.testing.assert_array_equal(inside, w > 0)  # a latitude cut: the occupied rings are its pixels
    np.testing.assert_allclose(part[inside], full[inside], rtol=0, atol=1e-13 * np.abs(full).max())
    assert np.all(part[~inside] == 0)
    assert np.all(_sht.alm2map(alm, nside, lmax, rings=np.zeros_like(rings)) == 0)
