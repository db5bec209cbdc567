"""Monopole and dipole fit and removal (cmbtools.maps.fit_monopole_dipole / remove_monopole_dipole)."""

from __future__ import annotations

import healpy as hp
import numpy as np
import pytest

from cmbtools._core import sht as _sht
from cmbtools.exceptions import IllConditionedError, ResolutionMismatchError
from cmbtools.maps import (
    UNSEEN,
    apodize_mask,
    cap_mask,
    combine_masks,
    fit_monopole_dipole,
    latitude_cut_mask,
    missing_pixels,
    remove_monopole_dipole,
)

# an injected sky: 2.7 mK-like dipole towards an invented direction, plus a 30 uK monopole
MONOPOLE = 3.0e-5
AMPLITUDE = 3.36e-3
LON, LAT = 264.0, 48.3


def dipole_map(nside, monopole=MONOPOLE, amplitude=AMPLITUDE, lon=LON, lat=LAT):
    vec = np.stack(hp.pix2vec(nside, np.arange(12 * nside**2)), axis=-1)
    return monopole + amplitude * vec @ hp.ang2vec(lon, lat, lonlat=True)


def test_full_sky_noiseless_recovery():
    fit = fit_monopole_dipole(dipole_map(32))
    assert fit.monopole == pytest.approx(MONOPOLE, rel=1e-10)
    assert fit.amplitude == pytest.approx(AMPLITUDE, rel=1e-10)
    assert fit.lon_deg == pytest.approx(LON, abs=1e-8)
    assert fit.lat_deg == pytest.approx(LAT, abs=1e-8)
    np.testing.assert_allclose(fit.dipole_vector, AMPLITUDE * hp.ang2vec(LON, LAT, lonlat=True), rtol=1e-10)
    assert fit.n_pixels_used == 12 * 32**2


@pytest.mark.parametrize(
    "mask_kind", ["cap", "latitude cut", "apodized cap"],
)
def test_masked_noiseless_recovery_to_numerical_precision(mask_kind):
    nside = 64
    if mask_kind == "cap":
        mask = cap_mask(nside, 250.0, -55.0, 50.0)
    elif mask_kind == "latitude cut":
        mask = latitude_cut_mask(nside, 30.0)
    else:
        mask = apodize_mask(cap_mask(nside, 250.0, -55.0, 50.0), 3.0)
    m = dipole_map(nside)
    m[mask == 0] = 1.0  # garbage where the mask removes the sky must not matter
    fit = fit_monopole_dipole(m, mask)
    assert fit.monopole == pytest.approx(MONOPOLE, rel=1e-10)
    assert fit.amplitude == pytest.approx(AMPLITUDE, rel=1e-10)
    assert fit.lon_deg == pytest.approx(LON, abs=1e-7)
    assert fit.lat_deg == pytest.approx(LAT, abs=1e-7)
    assert fit.n_pixels_used == int(np.count_nonzero(mask))


@pytest.mark.parametrize("bad", [UNSEEN, np.nan, np.inf], ids=["UNSEEN", "NaN", "inf"])
def test_missing_pixels_are_left_out(rng, bad):
    nside = 32
    m = dipole_map(nside)
    holes = rng.choice(m.size, 500, replace=False)
    m[holes] = bad
    fit = fit_monopole_dipole(m, cap_mask(nside, 250.0, -55.0, 60.0))
    assert fit.monopole == pytest.approx(MONOPOLE, rel=1e-10)
    assert fit.amplitude == pytest.approx(AMPLITUDE, rel=1e-10)


def test_agrees_with_healpy_on_a_binary_mask(rng):
    # healpy's fit_dipole is unweighted least squares over the pixels that are not UNSEEN (reference)
    nside = 32
    m = dipole_map(nside) + 1e-4 * rng.standard_normal(12 * nside**2)
    mask = combine_masks(latitude_cut_mask(nside, 20.0), cap_mask(nside, 0.0, 0.0, 100.0))
    fit = fit_monopole_dipole(m, mask)
    ref_mono, ref_dip = hp.fit_dipole(np.where(mask > 0, m, UNSEEN), gal_cut=0)
    assert fit.monopole == pytest.approx(ref_mono, rel=1e-9)
    np.testing.assert_allclose(fit.dipole_vector, ref_dip, rtol=1e-9)


def test_weights_change_the_fit_when_the_model_is_wrong():
    # with a quadrupole present, weighting by the mask must give the weighted least-squares answer
    nside = 16
    vec = np.stack(hp.pix2vec(nside, np.arange(12 * nside**2)), axis=-1)
    m = 1e-5 * (3 * vec[:, 2] ** 2 - 1) + dipole_map(nside)
    w = 0.25 + 0.75 * (vec[:, 0] > 0)
    design = np.column_stack([np.ones(m.size), vec])
    sw = np.sqrt(w)
    ref, *_ = np.linalg.lstsq(design * sw[:, None], m * sw, rcond=None)  # numpy reference solution
    fit = fit_monopole_dipole(m, w)
    np.testing.assert_allclose([fit.monopole, *fit.dipole_vector], ref, rtol=1e-10, atol=1e-18)


def test_remove_returns_a_new_map_and_keeps_missing():
    nside = 32
    mask = cap_mask(nside, 250.0, -55.0, 50.0)
    signal = np.zeros(12 * nside**2)
    signal[:10] = 1e-6 * np.arange(1, 11)  # something that is not a dipole, outside the cap
    m = dipole_map(nside) + signal
    m[20:30] = UNSEEN
    original = m.copy()
    clean, fit = remove_monopole_dipole(m, mask)
    np.testing.assert_array_equal(m, original)  # input untouched
    assert clean is not m
    assert np.all(clean[20:30] == UNSEEN) and missing_pixels(clean).sum() == 10
    good = ~missing_pixels(clean)
    # what is left is the non-dipole part (removed everywhere, fitted inside the cap only)
    np.testing.assert_allclose(clean[good], signal[good], rtol=0, atol=1e-12 * AMPLITUDE)
    assert fit.amplitude == pytest.approx(AMPLITUDE, rel=1e-10)


def _gaussian_sky(nside, lmax, cl, rng):
    """A Gaussian random sky with spectrum cl, from a seeded generator, synthesized with _sht."""
    ell = _sht.alm_ell(lmax)
    m_index = np.concatenate([np.full(lmax + 1 - m, m) for m in range(lmax + 1)])
    sigma = np.sqrt(cl[ell])
    alm = (rng.standard_normal(ell.size) + 1j * rng.standard_normal(ell.size)) * sigma / np.sqrt(2)
    alm[m_index == 0] = rng.standard_normal(lmax + 1) * np.sqrt(cl)
    return _sht.alm2map(alm, nside, lmax, nthreads=1)


def test_unbiased_on_fluctuating_masked_skies():
    # an ensemble of skies with a red spectrum (C_l ~ 1/l^2 above l = 2) plus the injected terms:
    # the mean fitted parameters must agree with the injection within 4 standard errors
    nside, lmax, n_sims = 16, 40, 150
    rng = np.random.default_rng(20260417)
    ell = np.arange(lmax + 1)
    cl = np.where(ell >= 2, 1e-10 / np.maximum(ell, 1) ** 2, 0.0)
    mask = cap_mask(nside, 250.0, -55.0, 70.0)
    truth = np.array([MONOPOLE, *(AMPLITUDE * hp.ang2vec(LON, LAT, lonlat=True))])
    base = dipole_map(nside)
    est = np.array([
        [f.monopole, *f.dipole_vector]
        for f in (fit_monopole_dipole(base + _gaussian_sky(nside, lmax, cl, rng), mask) for _ in range(n_sims))
    ])
    err = est - truth
    std_err = err.std(axis=0, ddof=1) / np.sqrt(n_sims)
    assert np.all(err.std(axis=0) > 0)  # the fluctuations do leak into the fit on a cut sky
    assert np.all(np.abs(err.mean(axis=0)) < 4 * std_err)


def test_too_little_sky_is_refused():
    nside = 64
    m = dipole_map(nside)
    with pytest.raises(IllConditionedError, match="Only 1 pixels are unmasked and valid"):
        tiny = np.zeros(m.size)
        tiny[5] = 1.0
        fit_monopole_dipole(m, tiny)
    # pixels all on the equator (z = 0 exactly for the middle HEALPix ring) say nothing about d_z
    equator = np.zeros(m.size)
    equator[np.abs(hp.pix2vec(nside, np.arange(m.size))[2]) < 1e-15] = 1.0
    assert equator.sum() == 4 * nside
    with pytest.raises(IllConditionedError, match="cannot separate the monopole from the dipole") as info:
        fit_monopole_dipole(m, equator)
    assert info.value.condition_number > 1e12
    allbad = np.full(m.size, UNSEEN)
    with pytest.raises(IllConditionedError, match="Only 0 pixels"):
        fit_monopole_dipole(allbad)


def test_small_patch_keeps_precision():
    # a 2-degree patch (15 pixels at nside 64) is nearly degenerate, yet the noiseless fit is exact
    fit = fit_monopole_dipole(dipole_map(64), cap_mask(64, 10.0, 10.0, 2.0))
    assert fit.condition_number > 1e8
    assert fit.monopole == pytest.approx(MONOPOLE, rel=1e-9)
    assert fit.amplitude == pytest.approx(AMPLITUDE, rel=1e-12)
    assert fit.lon_deg == pytest.approx(LON, abs=1e-9)


def test_mask_of_another_resolution_is_refused():
    with pytest.raises(ResolutionMismatchError, match="nside 16 but the 'mask' has nside 32"):
        fit_monopole_dipole(dipole_map(16), np.ones(12 * 32**2))


def test_zero_dipole_has_no_direction():
    fit = fit_monopole_dipole(np.full(768, 2.0))
    assert fit.monopole == pytest.approx(2.0, rel=1e-14)
    assert fit.amplitude < 1e-14


# ----------------------------------------------------------------------------- the estimator's harmonic path

from cmbtools.maps.monopole_dipole import _SMALL_PATCH_SPREAD, masked_without_monopole_dipole  # noqa: E402


@pytest.mark.parametrize(
    "make_mask",
    [
        lambda n: apodize_mask(latitude_cut_mask(n, 20.0), 3.0),   # wide sky: harmonic sums
        lambda n: cap_mask(n, 30.0, 50.0, 30.0),                    # a 30 degree cap: harmonic sums
        lambda n: cap_mask(n, 30.0, 50.0, 2.0),                     # a 2 degree cap: pixel sums
        lambda n: np.ones(12 * n * n),                              # full sky
    ],
    ids=["cut", "cap30", "cap2", "full"],
)
@pytest.mark.parametrize("monopole", [MONOPOLE, 2.7255])
def test_harmonic_path_equals_the_pixel_fit(make_mask, monopole):
    # the harmonic sums are exact pixel sums (adjoint transform), so the two paths agree to rounding
    nside = 64
    w = make_mask(nside)
    rng = np.random.default_rng(11)
    m = dipole_map(nside, monopole=monopole) + 1e-4 * rng.standard_normal(w.size)
    reference = remove_monopole_dipole(m, w)[0] * w
    fast = masked_without_monopole_dipole(m, w, nthreads=1)
    scale = np.max(np.abs(reference))
    np.testing.assert_allclose(fast, reference, rtol=0, atol=1e-10 * scale)
    # what is left carries no monopole or dipole over the kept sky
    refit = fit_monopole_dipole(np.where(w > 0, fast / np.where(w > 0, w, 1.0), 0.0), w)
    # to rounding amplified by the fit's condition number (~2e8 on the 14 pixels of the 2 degree cap)
    tol = 10 * refit.condition_number * np.finfo(float).eps * (AMPLITUDE + monopole + 1e-4)
    assert abs(refit.monopole) < tol
    assert refit.amplitude < tol


def test_harmonic_path_threshold_is_where_the_pixel_path_takes_over():
    # a 30 degree cap is far above the threshold, a 2 degree cap far below (measured spreads
    # 1.5e-3 and 3e-8); the threshold sits between them
    from cmbtools.maps.monopole_dipole import _first_moments, _harmonic_sums, _second_moments

    def spread(w):
        a = _harmonic_sums(w, 2, 1)
        f = _first_moments(a)
        mean = f[1:] / f[0]
        return np.linalg.eigvalsh(_second_moments(a) / f[0] - np.outer(mean, mean))[0]

    wide, narrow = spread(cap_mask(128, 30.0, 50.0, 30.0)), spread(cap_mask(128, 30.0, 50.0, 2.0))
    assert wide > 100 * _SMALL_PATCH_SPREAD
    assert narrow < _SMALL_PATCH_SPREAD / 10


def test_harmonic_sums_are_the_pixel_sums():
    # sum_p g_p (1, x, y, z) and sum_p g_p n n^T from the lmax-2 adjoint transform
    from cmbtools.maps.monopole_dipole import _first_moments, _harmonic_sums, _second_moments

    nside = 32
    g = np.random.default_rng(5).uniform(0, 1, 12 * nside**2)
    n = np.stack(hp.pix2vec(nside, np.arange(g.size)), axis=-1)
    a = _harmonic_sums(g, 2, 1)
    np.testing.assert_allclose(_first_moments(a), [g.sum(), *(g @ n)], rtol=1e-12)
    np.testing.assert_allclose(_second_moments(a), (n * g[:, None]).T @ n, rtol=1e-12)


def test_harmonic_path_refuses_too_few_pixels():
    w = np.zeros(12 * 16**2)
    w[:3] = 1.0
    with pytest.raises(IllConditionedError):
        masked_without_monopole_dipole(np.ones(w.size), w, nthreads=1)


def test_harmonic_path_in_ring_blocks_equals_one_block(monkeypatch):
    # the model is synthesized ring block by ring block; blocks of ~1000 pixels give the same map
    import cmbtools.maps.monopole_dipole as dipole

    nside = 32
    w = apodize_mask(latitude_cut_mask(nside, 20.0), 3.0)
    m = dipole_map(nside) + 1e-4 * np.random.default_rng(2).standard_normal(w.size)
    whole = masked_without_monopole_dipole(m, w, nthreads=1)
    monkeypatch.setattr(dipole, "_MODEL_BLOCK", 1000)
    blocks = masked_without_monopole_dipole(m, w, nthreads=1)
    np.testing.assert_allclose(blocks, whole, rtol=0, atol=1e-15 * AMPLITUDE)  # rounding of the model


@pytest.mark.parametrize("block", [None, 1000])
def test_harmonic_path_on_occupied_rings_equals_all_rings(monkeypatch, block):
    # the rings where the weights are zero add nothing to the sums and get nothing of the model: skipping
    # them (in ring blocks or not) gives the same map
    import cmbtools.maps.monopole_dipole as dipole
    from cmbtools._core import sht as _sht

    nside = 32
    w = apodize_mask(latitude_cut_mask(nside, 20.0), 3.0)
    rings = _sht.occupied_rings(w)
    assert 0 < rings.sum() < rings.size
    m = dipole_map(nside, monopole=MONOPOLE) + 1e-4 * np.random.default_rng(3).standard_normal(w.size)
    whole = masked_without_monopole_dipole(m, w, nthreads=1)
    if block:
        monkeypatch.setattr(dipole, "_MODEL_BLOCK", block)
    sums = dipole.weight_sums(w, nthreads=1, rings=rings)
    np.testing.assert_allclose(sums, dipole.weight_sums(w, nthreads=1), rtol=0, atol=1e-12 * np.abs(sums).max())
    skipped = masked_without_monopole_dipole(m, w, nthreads=1, sums_of_weights=sums, rings=rings)
    np.testing.assert_allclose(skipped, whole, rtol=0, atol=1e-12 * np.abs(whole).max())
    assert np.all(skipped[w == 0] == 0)
