"""The masked-sky spectrum estimator, its outputs and its cache (cmbtools.spectrum)."""

from __future__ import annotations

import pickle
import warnings

import healpy as hp
import numpy as np
import pytest

from cmbtools import maps
from cmbtools._core import sht as _sht
from cmbtools.exceptions import (
    CacheError,
    CmbtoolsWarning,
    IllConditionedError,
    InputFileError,
    InvalidInputError,
    OutputExistsError,
    ResolutionMismatchError,
)
from cmbtools.spectrum import (
    Bandpowers,
    Binning,
    SpectrumEstimator,
    estimate_spectrum,
    gaussian_beam,
    pixel_window,
)


def _alm(cl, lmax, rng):
    """Seeded complex Gaussian alm with spectrum cl (healpy layout; m = 0 real)."""
    n = _sht.alm_size(lmax)
    alm = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * np.sqrt(cl[_sht.alm_ell(lmax)] / 2.0)
    alm[: lmax + 1] = alm[: lmax + 1].real * np.sqrt(2.0)
    return alm


def _red_spectrum(lmax, amplitude=1e-9):
    ell = np.arange(lmax + 1)
    return np.where(ell >= 2, amplitude * (20.0 / (ell + 20.0)) ** 2, 0.0)


@pytest.fixture(scope="module")
def cap_mask32():
    """An apodized cap of nside 32 keeping about 40% of the sky."""
    return maps.apodize_mask(maps.cap_mask(32, 40.0, 20.0, 80.0), 10.0, nthreads=1)


@pytest.fixture(scope="module")
def sky32():
    rng = np.random.default_rng(314)
    cl = _red_spectrum(95)
    return _sht.alm2map(_alm(cl, 95, rng), 32, 95, nthreads=1), cl


# ----------------------------------------------------------------------------- full sky


def test_full_sky_equals_healpy_anafast():
    # mask of ones, no monopole/dipole removal, no beam, no pixel window, bins one multipole wide:
    # the bandpowers are the full-sky spectrum, here against healpy.anafast with the same iter.
    nside, lmax, n_iter = 32, 32, 10
    rng = np.random.default_rng(1)
    m = _sht.alm2map(_alm(_red_spectrum(lmax) + 1e-12, lmax, rng), nside, lmax, nthreads=1)
    est = SpectrumEstimator(
        np.ones(m.size), Binning.uniform(0, lmax, 1, weighting="cl"), lmax=lmax,
        remove_monopole_dipole=False, pixel_window=False, n_iter=n_iter, nthreads=1,
    )
    bp = est.estimate(m)
    ref = hp.anafast(m, lmax=lmax, iter=n_iter)
    np.testing.assert_allclose(bp.cl, ref, rtol=1e-10)
    np.testing.assert_allclose(bp.dl, ref * bp.ell_eff * (bp.ell_eff + 1) / (2 * np.pi), rtol=1e-10)


def test_pseudo_spectrum_equals_healpy_anafast_without_refinement(sky32):
    m, _ = sky32
    est = SpectrumEstimator(np.ones(m.size), Binning.uniform(2, 95, 8), remove_monopole_dipole=False,
                            pixel_window=False, nthreads=1)
    np.testing.assert_allclose(est.pseudo_spectrum(m), hp.anafast(m, lmax=95, iter=0), rtol=1e-11)


def test_full_sky_knox_errors():
    # Knox 1995, PRD 52, 4307: sigma(C_b) = sqrt(2 / ((2l+1) dl f_sky)) C_b, with f_sky = 1 on the full sky
    nside, lmax = 16, 47
    m = _sht.alm2map(_alm(_red_spectrum(lmax), lmax, np.random.default_rng(2)), nside, lmax, nthreads=1)
    b = Binning.uniform(2, lmax, 6, weighting="cl")
    est = SpectrumEstimator(np.ones(m.size), b, remove_monopole_dipole=False, pixel_window=False, nthreads=1)
    bp = est.estimate(m)
    nu = np.array([np.sum(2 * np.arange(lo, hi + 1) + 1) for lo, hi in zip(b.ell_min, b.ell_max)])
    assert est.f_sky_eff == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_allclose(bp.cl_err, np.sqrt(2.0 / nu) * np.abs(bp.cl), rtol=1e-12)
    np.testing.assert_allclose(bp.dl_err, bp.cl_err * b.dl_factor, rtol=1e-14)


# ----------------------------------------------------------------------------- beams, pixel window, transfer


def test_beam_smoothed_pixel_averaged_map_recovers_the_sky_spectrum():
    # A sky synthesized at nside 256 (point samples), smoothed by a 90' Gaussian beam and averaged
    # into nside-64 pixels by healpy.ud_grade (the mean of the 16 sub-pixels), recovers the sky's
    # own spectrum once the beam and the pixel window are deconvolved.  The window of a mean of
    # 16 point samples is p_64(l) / p_256(l) (the area average over a pixel is the average over
    # its sub-pixels of their area averages; common practice), so that is the window deconvolved
    # here.  The reference is the realization's own C_l through the bandpower windows.
    rng = np.random.default_rng(7)
    lhi = 767
    alm = _alm(_red_spectrum(lhi, 1e-9), lhi, rng)
    fwhm = 90.0
    hi = _sht.alm2map(_sht.almxfl(alm, gaussian_beam(fwhm, lhi), lhi), 256, lhi, nthreads=2)
    lo = hp.ud_grade(hi, 64)
    lmax = 191
    sample = _sht.alm2cl(alm)[: lmax + 1]
    b = Binning.uniform(2, 160, 14)
    window = pixel_window(64, lmax) / pixel_window(256, lmax)
    est = SpectrumEstimator(np.ones(lo.size), b, beam=fwhm, pixel_window=window,
                            remove_monopole_dipole=False, nthreads=2)
    ref = est.bandpower_windows @ sample
    # power above lmax, aliased by the nside-64 grid, is damped by B_l^2 < 1e-2: 0.3% is ample
    np.testing.assert_allclose(est.estimate(lo).cl, ref, rtol=3e-3)
    # with cmbtools' exact pixel window of nside 64 the bins come out high by the missing 1/p_256^2
    default = SpectrumEstimator(np.ones(lo.size), b, beam=fwhm, remove_monopole_dipole=False, nthreads=2)
    p256 = pixel_window(256, lmax)
    excess = np.array([np.mean(1 / p256[lo_:hi_ + 1] ** 2) for lo_, hi_ in zip(b.ell_min, b.ell_max)])
    np.testing.assert_allclose(default.estimate(lo).cl / ref, excess, rtol=3e-3)
    # without the pixel window the highest bin comes out low by about the bin's mean window^2
    # (~0.6 at l ~ 155; 1% allows for the flat-bandpower weighting inside the bin)
    est_nopw = SpectrumEstimator(np.ones(lo.size), b, beam=fwhm, pixel_window=False,
                                 remove_monopole_dipole=False, nthreads=2)
    low = est_nopw.estimate(lo).cl[-1] / ref[-1]
    np.testing.assert_allclose(low, np.mean(window[b.ell_min[-1]:b.ell_max[-1] + 1] ** 2), rtol=1e-2)
    assert low < 0.7


def test_transfer_function_is_deconvolved():
    nside, lmax = 32, 63  # sky band-limited at 2 nside, where the quadrature is accurate
    rng = np.random.default_rng(9)
    cl = _red_spectrum(lmax)
    alm = _alm(cl, lmax, rng)
    ell = np.arange(lmax + 1)
    transfer = 1.0 / (1.0 + (ell / 40.0) ** 4)  # a power-spectrum transfer function T_l
    plain = _sht.alm2map(alm, nside, lmax, nthreads=1)
    filtered = _sht.alm2map(_sht.almxfl(alm, np.sqrt(transfer), lmax), nside, lmax, nthreads=1)
    b = Binning.uniform(2, 63, 8)
    kw = dict(lmax=lmax, remove_monopole_dipole=False, pixel_window=False, n_iter=3, nthreads=1)
    full = np.ones(12 * nside**2)
    sample = _sht.alm2cl(alm)
    est_t = SpectrumEstimator(full, b, transfer=transfer, **kw)
    got = est_t.estimate(filtered).cl
    # the filtered map's own spectrum through the bandpower windows (which weight each bin by T_l);
    # with 3 refinement steps the transform of one realization is accurate to ~1e-6 at l <= 2 nside
    np.testing.assert_allclose(got, est_t.bandpower_windows @ sample, rtol=3e-5)
    plain_est = SpectrumEstimator(full, b, **kw)
    np.testing.assert_allclose(plain_est.estimate(plain).cl, plain_est.bandpower_windows @ sample, rtol=3e-5)
    # without deconvolving it, the filtered map reads low by the bin average of T_l
    low = plain_est.estimate(filtered).cl / got
    assert low[-1] < 0.3


def test_expected_bandpowers_of_the_binned_model_are_exact(cap_mask32):
    # E[bp] = (P K Q)^-1 P K C; for C = Q d (flat D_l inside each bin, bins covering 2..lmax)
    # this is d exactly (Hivon et al. 2002, eq. 17-18).  The in-bin model follows the guess spectrum's
    # shape (flat D_l for this guess) and the deprojection-bias rows are exact for the guess itself.  Maps at
    # the pixel centres (averaged_pixels=False): the default adds the averaged maps' pixel-shape term.
    lmax = 95
    b = Binning.uniform(2, lmax, 8)
    d = np.linspace(1e-10, 3e-10, b.n_bins)
    cl = b.model_matrix(lmax) @ d
    est = SpectrumEstimator(cap_mask32, b, beam=60.0, guess_cl=cl, averaged_pixels=False, nthreads=1)
    np.testing.assert_allclose(est.expected_bandpowers(cl, kind="dl"), d, rtol=1e-10)
    np.testing.assert_allclose(est.expected_bandpowers(cl), d / b.dl_factor, rtol=1e-10)
    assert est.bandpower_windows.shape == (b.n_bins, lmax + 1)


# ----------------------------------------------------------------------------- noise


def test_noise_spectrum_subtraction_on_the_full_sky():
    nside, lmax = 32, 63
    rng = np.random.default_rng(12)
    m = _sht.alm2map(_alm(_red_spectrum(lmax), lmax, rng), nside, lmax, nthreads=1)
    b = Binning.uniform(2, lmax, 8, weighting="cl")
    est = SpectrumEstimator(np.ones(m.size), b, lmax=lmax, remove_monopole_dipole=False, pixel_window=False, nthreads=1)
    n_l = np.full(lmax + 1, 3e-12)
    plain = est.estimate(m)
    sub = est.estimate(m, noise_cl=n_l)
    # full sky: white noise has the pseudo-spectrum N_l exactly on any pixel grid (mean(w^2) = 1),
    # and the coupling is the identity up to the quadrature's ~2e-5 at l <= 2 nside, so the shift is N_l
    np.testing.assert_allclose(plain.cl - sub.cl, 3e-12, rtol=5e-5)
    np.testing.assert_array_equal(sub.cl_err, plain.cl_err)  # errors use the total (signal + noise)
    assert sub.metadata["noise_bias_subtracted"] == "spectrum"


def test_noise_maps_give_the_mean_pseudo_spectrum_bias(cap_mask32, sky32):
    m, _ = sky32
    rng = np.random.default_rng(4)
    noise = [rng.standard_normal(m.size) * 2e-6 for _ in range(3)]
    est = SpectrumEstimator(cap_mask32, Binning.uniform(2, 95, 12), nthreads=1)
    got = est.estimate(m + noise[0], noise_maps=noise)
    # the same arithmetic by hand: pseudo spectra averaged, then through the same binned inverse
    pseudo = np.mean([est.pseudo_spectrum(n) for n in noise], axis=0)
    total = est.estimate(m + noise[0])
    expected_noise = total.cl - got.cl
    b = est.binning
    manual = est._ainv11 @ np.add.reduceat(b.averaging_weights(est.lmax) * pseudo, b.ell_min) / b.dl_factor
    np.testing.assert_allclose(expected_noise, manual, rtol=1e-10)
    assert got.metadata["noise_bias_subtracted"] == "3 noise maps"


def test_noise_options_are_for_auto_spectra_only(cap_mask32, sky32):
    m, _ = sky32
    est = SpectrumEstimator(cap_mask32, Binning.uniform(2, 95, 12), nthreads=1)
    with pytest.raises(InvalidInputError, match="auto-spectra only"):
        est.estimate(m, m, noise_cl=np.zeros(96))
    with pytest.raises(InvalidInputError, match="not both"):
        est.estimate(m, noise_cl=np.zeros(96), noise_maps=[m])
    with pytest.raises(InvalidInputError, match="list of maps"):
        est.estimate(m, noise_maps=m)


# ----------------------------------------------------------------------------- cross-spectra


def test_cross_spectrum_of_a_map_with_itself_is_its_auto_spectrum(cap_mask32, sky32):
    m, _ = sky32
    est = SpectrumEstimator(cap_mask32, Binning.uniform(2, 95, 12), beam=30.0, nthreads=1)
    auto = est.estimate(m)
    cross = est.estimate(m, m)
    np.testing.assert_allclose(cross.cl, auto.cl, rtol=1e-12)
    # (C12^2 + C11 C22) with C11 = C22 = C12 is 2 C^2: the Knox errors agree too (Knox 1995)
    np.testing.assert_allclose(cross.cl_err, auto.cl_err, rtol=1e-12)
    assert cross.metadata["spectrum"] == "cross"


def test_cross_spectrum_with_two_masks_and_beams(cap_mask32):
    nside, lmax = 32, 95
    rng = np.random.default_rng(21)
    cl = _red_spectrum(lmax)
    alm = _alm(cl, lmax, rng)
    mask2 = maps.apodize_mask(maps.cap_mask(nside, 60.0, 10.0, 70.0), 10.0, nthreads=1)
    b = Binning.uniform(2, lmax, 12)
    m1 = _sht.alm2map(_sht.almxfl(alm, gaussian_beam(40.0, lmax), lmax), nside, lmax, nthreads=1)
    m2 = _sht.alm2map(_sht.almxfl(alm, gaussian_beam(80.0, lmax), lmax), nside, lmax, nthreads=1)
    est = SpectrumEstimator(cap_mask32, b, mask2=mask2, beam=40.0, beam2=80.0, pixel_window=False, nthreads=1)
    bp = est.estimate(m1, m2)
    exp = est.expected_bandpowers(cl, cross=True)
    # one realization on ~35% of the sky: within 4 of its own Knox errors of the expectation
    assert np.all(np.abs(bp.cl - exp) < 4 * bp.cl_err)
    # cross-spectrum errors use w2^2/w4 of sqrt(mask1 mask2) (Hivon et al. 2002 moments of the product)
    prod = cap_mask32 * mask2
    assert est.f_sky_eff_cross == pytest.approx(np.mean(prod) ** 2 / np.mean(prod**2), rel=1e-12)
    # the binned model is recovered exactly through the cross windows (as for auto-spectra) when it is the
    # guess spectrum (whose shape the in-bin model follows)
    d = np.linspace(1e-10, 2e-10, b.n_bins)
    flat = b.model_matrix(lmax) @ d
    est = SpectrumEstimator(cap_mask32, b, mask2=mask2, beam=40.0, beam2=80.0, pixel_window=False, guess_cl=flat,
                            nthreads=1)
    np.testing.assert_allclose(est.expected_bandpowers(flat, cross=True, kind="dl"), d, rtol=1e-10)


# ----------------------------------------------------------------------------- fast coupling


def test_fast_coupling_matches_exact_bandpowers_at_nside_256():
    # Louis et al. 2020, PRD 102, 123538 approximation vs the exact matrix; target <= 1e-3 relative.
    nside = 256
    mask = maps.apodize_mask(maps.cap_mask(nside, 0.0, 30.0, 50.0), 3.0, nthreads=2)
    rng = np.random.default_rng(3)
    lmax = 2 * nside  # the largest lmax at which the banded form is used by default
    m = _sht.alm2map(_alm(_red_spectrum(lmax, 1e-10), lmax, rng), nside, lmax, nthreads=2)
    b = Binning.uniform(2, lmax, 16)
    exact = SpectrumEstimator(mask, b, lmax=lmax, pixel_window=False, nthreads=2)
    fast = SpectrumEstimator(mask, b, lmax=lmax, pixel_window=False, coupling="fast", nthreads=2)
    rel = np.abs(fast.estimate(m).cl / exact.estimate(m).cl - 1)
    assert 0 < rel.max() < 1e-3, rel.max()  # > 0: the approximation was really used
    assert fast.cache_key != exact.cache_key
    assert fast.estimate(m).metadata["coupling"] == "fast l_exact=200 l_toeplitz=400 band=128"


def test_fast_coupling_is_exact_above_2_nside_unless_settings_are_given():
    # above 2 nside the HEALPix aliasing dominates the coupling of the highest multipoles and the
    # banded form misses it (measured: 14% at 3 nside); the default is then the exact matrix
    nside = 64
    mask = maps.apodize_mask(maps.latitude_cut_mask(nside, 20.0), 5.0, nthreads=1)
    lmax = 3 * nside - 1
    m = _sht.alm2map(_alm(_red_spectrum(lmax, 1e-10), lmax, np.random.default_rng(4)), nside, lmax, nthreads=1)
    b = Binning.uniform(2, lmax, 12)
    exact = SpectrumEstimator(mask, b, pixel_window=False, nthreads=1)
    fast = SpectrumEstimator(mask, b, pixel_window=False, coupling="fast", nthreads=1)
    np.testing.assert_array_equal(fast.estimate(m).cl, exact.estimate(m).cl)
    assert fast.estimate(m).metadata["coupling"] == "fast (exact matrix: lmax above 2 nside)"
    assert fast.cache_key != exact.cache_key
    with pytest.warns(CmbtoolsWarning, match="above 2\\*nside"):
        banded = SpectrumEstimator(
            mask, b, pixel_window=False, coupling="fast", fast_exact_below=40, fast_banded_below=80, fast_band_half_width=40, nthreads=1
        )
    rel = np.abs(banded.estimate(m).cl / exact.estimate(m).cl - 1)
    assert rel.max() > 1e-3  # the aliasing the banded form misses, at the highest bins
    assert rel[b.ell_max < 2 * nside].max() < 1e-3


# ----------------------------------------------------------------------------- validation


def test_lmax_limits(cap_mask32):
    b = Binning.uniform(2, 60, 8)
    with pytest.warns(CmbtoolsWarning, match="above 3\\*nside-1"):
        SpectrumEstimator(cap_mask32, b, lmax=100, pixel_window=False, nthreads=1)
    with pytest.raises(InvalidInputError, match="lmax"):
        SpectrumEstimator(cap_mask32, b, lmax=128, pixel_window=False, nthreads=1)
    with pytest.raises(InvalidInputError, match="binning reaches"):
        SpectrumEstimator(cap_mask32, Binning.uniform(2, 90, 8), lmax=80, pixel_window=False, nthreads=1)
    est = SpectrumEstimator(cap_mask32, b, pixel_window=False, nthreads=1)
    assert est.lmax == 95 and est.nside == 32


def test_resolution_mismatch_is_an_error(cap_mask32):
    est = SpectrumEstimator(cap_mask32, Binning.uniform(2, 60, 8), pixel_window=False, nthreads=1)
    with pytest.raises(ResolutionMismatchError):
        est.estimate(np.zeros(12 * 16**2))
    with pytest.raises(ResolutionMismatchError):
        SpectrumEstimator(cap_mask32, Binning.uniform(2, 40, 8), mask2=np.ones(12 * 16**2), nthreads=1)


def test_missing_pixels(cap_mask32, sky32):
    m, _ = sky32
    bad = m.copy()
    inside = np.flatnonzero(cap_mask32 > 0.5)[:5]
    outside = np.flatnonzero(cap_mask32 == 0)[:7]
    bad[inside] = hp.UNSEEN
    bad[outside] = np.nan
    b = Binning.uniform(2, 95, 12)
    est = SpectrumEstimator(cap_mask32, b, nthreads=1)
    with pytest.raises(InvalidInputError, match="5 missing"):
        est.estimate(bad)
    # missing pixels outside the mask do not matter
    only_outside = m.copy()
    only_outside[outside] = np.nan
    np.testing.assert_allclose(est.estimate(only_outside).cl, est.estimate(m).cl, rtol=1e-12)
    # the one-call function drops them from the mask and says so
    with pytest.warns(CmbtoolsWarning, match="5 missing pixels"):
        bp = estimate_spectrum(bad, cap_mask32, b, nthreads=1)
    eff = cap_mask32.copy()
    eff[inside] = 0.0
    np.testing.assert_allclose(bp.cl, SpectrumEstimator(eff, b, nthreads=1).estimate(m).cl, rtol=1e-12)


def test_monopole_dipole_removal(cap_mask32, sky32):
    m, _ = sky32
    vec = np.array(hp.pix2vec(32, np.arange(m.size)))
    offset = 3e-3 + 2e-3 * vec[0] - 1e-3 * vec[2]
    b = Binning.uniform(2, 95, 12)
    est = SpectrumEstimator(cap_mask32, b, nthreads=1)
    # the removal is exact for a pure monopole + dipole (weighted least squares on the mask)
    np.testing.assert_allclose(est.estimate(m + offset).cl, est.estimate(m).cl, rtol=1e-8)
    keep = SpectrumEstimator(cap_mask32, b, remove_monopole_dipole=False, nthreads=1)
    assert abs(keep.estimate(m + offset).cl[0] / keep.estimate(m).cl[0]) > 10
    with pytest.warns(CmbtoolsWarning, match="ell < 2"):
        SpectrumEstimator(cap_mask32, Binning.uniform(0, 95, 12, weighting="cl"), nthreads=1)


def test_ill_conditioned_bins_raise(tmp_path):
    small = maps.cap_mask(64, 0.0, 0.0, 10.0)  # 0.8% of the sky, sharp edge
    with pytest.raises(IllConditionedError, match="condition number") as info:
        SpectrumEstimator(small, Binning.uniform(2, 191, 8), pixel_window=False, nthreads=2)
    assert info.value.condition_number > 1e3
    assert "wider bins" in str(info.value) and "apodize" in str(info.value)
    # wider bins on the same mask are fine
    ok = SpectrumEstimator(small, Binning.uniform(2, 191, 16), pixel_window=False, nthreads=2)
    assert 1.0 <= ok.condition_number < 1e3


def test_bad_settings_raise(cap_mask32):
    b = Binning.uniform(2, 60, 8)
    with pytest.raises(InvalidInputError, match="coupling"):
        SpectrumEstimator(cap_mask32, b, coupling="quick", nthreads=1)
    with pytest.raises(InvalidInputError, match="only apply with coupling='fast'"):
        SpectrumEstimator(cap_mask32, b, fast_exact_below=20, nthreads=1)
    with pytest.raises(InvalidInputError, match="Binning"):
        SpectrumEstimator(cap_mask32, [2, 10], nthreads=1)
    with pytest.raises(InvalidInputError, match="beam"):
        SpectrumEstimator(cap_mask32, b, beam=np.ones(10), nthreads=1)
    with pytest.raises(InvalidInputError, match="mask"):
        SpectrumEstimator(cap_mask32 * 2, b, nthreads=1)


# ----------------------------------------------------------------------------- immutability, pickling, cache


def test_estimator_is_immutable_and_picklable(cap_mask32, sky32):
    m, _ = sky32
    est = SpectrumEstimator(cap_mask32, Binning.uniform(2, 95, 12), beam=20.0, nthreads=1, covariance=True)
    with pytest.raises(AttributeError):
        est.lmax = 10
    with pytest.raises(ValueError):
        est.mask[0] = 0.5
    clone = pickle.loads(pickle.dumps(est))
    assert clone.cache_key == est.cache_key
    a, c = est.estimate(m), clone.estimate(m)
    np.testing.assert_array_equal(a.cl, c.cl)
    np.testing.assert_array_equal(a.covariance, c.covariance)


def test_a_pickled_estimator_takes_the_thread_budget_of_its_new_process(cap_mask32, monkeypatch):
    # the Monte Carlo engine gives every worker process a budget in $CMBTOOLS_NUM_THREADS; an
    # estimator built with nthreads=2 in the parent must not carry its 2 threads into 2 workers
    from cmbtools._core.checks import resolve_nthreads

    est = SpectrumEstimator(cap_mask32, Binning.uniform(2, 60, 8), pixel_window=False, nthreads=2)
    assert est._nthreads == 2
    clone = pickle.loads(pickle.dumps(est))
    assert clone._nthreads is None
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    assert resolve_nthreads(clone._nthreads) == 1


def test_cache_key_tracks_every_input(cap_mask32):
    b = Binning.uniform(2, 60, 8)
    base = dict(pixel_window=False, nthreads=1)
    k0 = SpectrumEstimator(cap_mask32, b, **base).cache_key
    assert SpectrumEstimator(cap_mask32, b, **base).cache_key == k0
    others = [
        SpectrumEstimator(cap_mask32, b, beam=10.0, **base),
        SpectrumEstimator(cap_mask32, b, pixel_window=True, nthreads=1),
        SpectrumEstimator(cap_mask32, b, lmax=80, **base),
        SpectrumEstimator(cap_mask32, Binning.uniform(2, 60, 10), **base),
        SpectrumEstimator(cap_mask32 * 0.5, b, **base),
        SpectrumEstimator(cap_mask32, b, remove_monopole_dipole=False, **base),
        SpectrumEstimator(cap_mask32, b, transfer=np.full(96, 0.9), **base),
    ]
    keys = {e.cache_key for e in others}
    assert k0 not in keys and len(keys) == len(others)


def test_save_load_round_trip(tmp_path, cap_mask32, sky32):
    m, _ = sky32
    mask2 = maps.apodize_mask(maps.cap_mask(32, 60.0, 10.0, 70.0), 10.0, nthreads=1)
    est = SpectrumEstimator(cap_mask32, Binning.uniform(2, 95, 12), mask2=mask2, beam=20.0, beam2=30.0,
                            covariance=True, nthreads=1)
    path = est.save(tmp_path / "op.npz")
    with pytest.raises(OutputExistsError):
        est.save(path)
    back = SpectrumEstimator.load(path, nthreads=1)
    assert back.cache_key == est.cache_key and back.binning == est.binning
    for a, c in ((est.estimate(m), back.estimate(m)), (est.estimate(m, m), back.estimate(m, m))):
        np.testing.assert_array_equal(a.cl, c.cl)
        np.testing.assert_array_equal(a.cl_err, c.cl_err)
        np.testing.assert_array_equal(a.covariance, c.covariance)
    with np.load(path, allow_pickle=False) as z:  # no pickled objects inside
        assert "checksum" in z.files and "settings" in z.files


def test_load_or_build_detects_stale_and_corrupt_files(tmp_path, cap_mask32):
    path = tmp_path / "cache.npz"
    b = Binning.uniform(2, 95, 12)
    first = SpectrumEstimator.load_or_build(path, cap_mask32, b, beam=20.0, nthreads=1)
    assert path.exists()
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a matching file loads silently
        again = SpectrumEstimator.load_or_build(path, cap_mask32, b, beam=20.0, nthreads=1)
    assert again.cache_key == first.cache_key
    # other inputs: the file is stale, reported and rebuilt
    with pytest.warns(CmbtoolsWarning, match="stale"):
        other = SpectrumEstimator.load_or_build(path, cap_mask32, b, beam=25.0, nthreads=1)
    assert other.cache_key != first.cache_key
    assert SpectrumEstimator.load(path).cache_key == other.cache_key
    # corrupt the file (a byte in the middle of the stored coupling rows; a byte of a zip header that readers
    # ignore would prove nothing): load says so, load_or_build reports and rebuilds
    import struct
    import zipfile

    data = bytearray(path.read_bytes())
    with zipfile.ZipFile(path) as z:
        info = z.getinfo("pm11.npy")
    name_len, extra_len = struct.unpack("<HH", data[info.header_offset + 26:info.header_offset + 30])
    data[info.header_offset + 30 + name_len + extra_len + info.compress_size // 2] ^= 0xFF
    path.write_bytes(bytes(data))
    with pytest.raises(CacheError):
        SpectrumEstimator.load(path)
    with pytest.warns(CmbtoolsWarning, match="rebuilding"):
        rebuilt = SpectrumEstimator.load_or_build(path, cap_mask32, b, beam=25.0, nthreads=1)
    assert rebuilt.cache_key == other.cache_key
    assert SpectrumEstimator.load(path).cache_key == other.cache_key


def test_checksum_catches_edited_arrays(tmp_path, cap_mask32):
    est = SpectrumEstimator(cap_mask32, Binning.uniform(2, 95, 12), nthreads=1)
    path = est.save(tmp_path / "op.npz")
    with np.load(path, allow_pickle=False) as z:
        data = {k: z[k] for k in z.files}
    data["ainv11"] = data["ainv11"] * (1 + 1e-9)
    np.savez(tmp_path / "edited.npz", **data)
    with pytest.raises(CacheError, match="checksum"):
        SpectrumEstimator.load(tmp_path / "edited.npz")


# ----------------------------------------------------------------------------- outputs


@pytest.fixture(scope="module")
def bandpowers(cap_mask32, sky32):
    m, _ = sky32
    est = SpectrumEstimator(cap_mask32, Binning.uniform(2, 95, 12), beam=20.0, covariance=True, nthreads=1)
    return est.estimate(m).with_metadata(map="tern_sim.fits")


def test_csv_round_trip(tmp_path, bandpowers):
    path = bandpowers.write_csv(tmp_path / "bp.csv")
    lines = path.read_text().splitlines()
    assert lines[0] == "# cmbtools bandpowers"
    assert "# unit: uK^2" in lines
    assert "# map: tern_sim.fits" in lines
    header = [ln for ln in lines if not ln.startswith("#")][0]
    assert header == "ell_min,ell_max,ell_eff,cl,cl_err,dl,dl_err"
    back = Bandpowers.read_csv(path)
    for name in ("ell_min", "ell_max", "ell_eff", "cl", "cl_err", "dl", "dl_err"):
        np.testing.assert_allclose(getattr(back, name), getattr(bandpowers, name), rtol=1e-15)
    assert back.metadata["lmax"] == 95 and back.metadata["map"] == "tern_sim.fits"
    kpath = bandpowers.write_csv(tmp_path / "bp_k.csv", unit="K")
    np.testing.assert_allclose(Bandpowers.read_csv(kpath).cl, bandpowers.cl, rtol=1e-15)
    with pytest.raises(OutputExistsError):
        bandpowers.write_csv(path)


def test_read_csv_rejects_bad_tables(tmp_path):
    p = tmp_path / "bad.csv"
    p.write_text("ell,cl\n2,1.0\n")
    with pytest.raises(InputFileError, match="expected the columns"):
        Bandpowers.read_csv(p)
    p.write_text("ell_min,ell_max,ell_eff,cl,cl_err,dl,dl_err\n2,3,2.5,x,1,1,1\n")
    with pytest.raises(InputFileError, match="not a number"):
        Bandpowers.read_csv(p)


def test_fits_table(tmp_path, bandpowers):
    from astropy.io import fits

    path = bandpowers.write_fits(tmp_path / "bp.fits")
    with fits.open(path) as hdul:
        t = hdul["BANDPOWERS"]
        np.testing.assert_allclose(t.data["cl"], bandpowers.cl * 1e12, rtol=1e-15)
        np.testing.assert_array_equal(t.data["ell_min"], bandpowers.ell_min)
        assert t.header["HIERARCH CMBTOOLS LMAX"] == 95
        assert t.header["HIERARCH CMBTOOLS ESTIMATOR_KEY"] == bandpowers.metadata["estimator_key"]
        assert t.columns["cl"].unit == "uK^2"
        np.testing.assert_allclose(hdul["COVARIANCE"].data, bandpowers.covariance * 1e24, rtol=1e-15)


def test_figures(tmp_path, bandpowers, sky32):
    _, cl = sky32
    png = bandpowers.plot(tmp_path / "bp.png", theory_cl=cl)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    pdf = bandpowers.plot(tmp_path / "bp.pdf")
    assert pdf.read_bytes()[:5] == b"%PDF-"
    with pytest.raises(InvalidInputError, match=".png or .pdf"):
        bandpowers.plot(tmp_path / "bp.jpg")
    with pytest.raises(OutputExistsError):
        bandpowers.plot(png)


def test_bandpowers_validate(bandpowers):
    with pytest.raises(InvalidInputError, match="one per bin"):
        Bandpowers([2], [3], [2.5], [1.0, 2.0], [1], [1], [1])
    with pytest.raises(InvalidInputError, match="string or a number"):
        bandpowers.with_metadata(bad=[1, 2])
    with pytest.raises(AttributeError):
        bandpowers.cl = None
