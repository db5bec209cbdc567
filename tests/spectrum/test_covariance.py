"""The analytic Gaussian covariance, the simulated covariance and the covariance files."""

from __future__ import annotations

import math
import types

import healpy as hp
import numpy as np
import pytest

from cmbtools.exceptions import CmbtoolsError, InputFileError, InvalidInputError
from cmbtools.maps import apodize_mask, cap_mask
from cmbtools.spectrum import (
    Binning,
    GaussianCovariance,
    PixelNoise,
    SpectrumEstimator,
    coupling,
    gaussian_beam,
    hartlap_factor,
    read_covariance,
    simulated_covariance,
)
from cmbtools.spectrum.bandpower_covariance import BandpowerCovariance
from cmbtools.spectrum.covariance import coupled_spectrum
from cmbtools._core import sht


def test_coupled_spectrum_is_the_coupling_matrix_times_the_spectrum():
    # the correlation-function route must equal M @ C with M from ducc0's kernel (Hivon et al. 2002, eq. A31)
    w = apodize_mask(cap_mask(16, 10.0, 30.0, 40.0), 8.0, nthreads=1)
    lmax = 40
    wl = sht.map_spectra([w], 2 * lmax, nthreads=1)[0]
    cl = 1.0 / (np.arange(lmax + 1) + 2.0) ** 2
    m = coupling.coupling_matrix(wl, lmax, nthreads=1)
    np.testing.assert_allclose(coupled_spectrum(wl, cl, lmax), m @ cl, rtol=1e-10)


def _full_sky_estimator(nside=16, lmax=32):
    bins = Binning(np.arange(2, lmax + 1), np.arange(2, lmax + 1), weighting="cl")
    return SpectrumEstimator(np.ones(12 * nside**2), bins, lmax=lmax, pixel_window=False,
                             remove_monopole_dipole=False, nthreads=1)


def test_full_sky_uniform_noise_is_the_knox_formula():
    # Knox 1995, PRD 52, 4307: Var(C_l) = 2 (C_l + N_l)^2 / (2l + 1) on the full sky with uniform white noise
    est = _full_sky_estimator()
    ell = np.arange(33)
    cl = np.where(ell >= 2, 1e-10 * 100.0 / (ell + 10.0) ** 2, 0.0)
    noise = PixelNoise.uniform(16, 200.0)
    n = noise.white_noise
    cov = GaussianCovariance(est, noise=noise, nthreads=1).covariance(cl)
    expected = 2.0 * (cl[2:] + n) ** 2 / (2 * ell[2:] + 1)
    np.testing.assert_allclose(np.diag(cov.matrix), expected, rtol=2e-3)
    off = cov.matrix - np.diag(np.diag(cov.matrix))
    assert np.max(np.abs(off)) < 1e-3 * np.max(expected)


def test_full_sky_cross_spectrum_of_two_noisy_maps():
    # the cross-spectrum variance (C^2 + (C + N1)(C + N2)) / (2l + 1), the Knox formula for cross-spectra (common practice)
    est = _full_sky_estimator()
    ell = np.arange(33)
    cl = np.where(ell >= 2, 1e-10 * 100.0 / (ell + 10.0) ** 2, 0.0)
    n1, n2 = PixelNoise.uniform(16, 150.0), PixelNoise.uniform(16, 300.0)
    cov = GaussianCovariance(est, noise=n1, noise2=n2, cross=True, nthreads=1).covariance(cl)
    c = cl[2:]
    expected = (c**2 + (c + n1.white_noise) * (c + n2.white_noise)) / (2 * ell[2:] + 1)
    np.testing.assert_allclose(np.diag(cov.matrix), expected, rtol=2e-3)


def test_covariance_from_the_estimators_kept_mask_spectra_equals_fresh_transforms(monkeypatch, tmp_path):
    # the covariance reuses the masks' spectra of the estimator's first call (also after a save and load);
    # transformed afresh they give the same matrix to rounding (cross-spectrum: two masks, two noises)
    from cmbtools.spectrum import covariance as cov_module

    nside, lmax = 16, 47
    w1 = apodize_mask(cap_mask(nside, 30.0, 40.0, 60.0), 10.0, nthreads=1)
    w2 = apodize_mask(cap_mask(nside, 50.0, 30.0, 60.0), 10.0, nthreads=1)
    bins = Binning.uniform(2, lmax, 8)
    est = SpectrumEstimator(w1, bins, lmax=lmax, mask2=w2, pixel_window=False, nthreads=1)
    n1 = PixelNoise.from_hits(np.linspace(0.5, 2.0, w1.size), 30.0)
    n2 = PixelNoise.from_hits(np.linspace(2.0, 0.5, w1.size), 40.0)
    cl = 1e-10 * 100.0 / (np.arange(lmax + 1) + 10.0) ** 2
    loaded = SpectrumEstimator.load(est.save(tmp_path / "est.npz"))
    kept = [GaussianCovariance(e, noise=n1, noise2=n2, cross=True, nthreads=1).covariance(cl).matrix
            for e in (est, loaded)]
    assert cov_module._estimator_mask_spectra(loaded, True, lmax + lmax) is not None
    monkeypatch.setattr(cov_module, "_estimator_mask_spectra", lambda *args: None)
    fresh = GaussianCovariance(est, noise=n1, noise2=n2, cross=True, nthreads=1).covariance(cl).matrix
    for m in kept:
        np.testing.assert_allclose(m, fresh, rtol=1e-10, atol=1e-12 * np.abs(fresh).max())


def test_coupling_bin_sums_by_quadrature_equal_the_kernels_matrices():
    # the covariance's bin sums of u_l M_ll' u_l' come from Gauss-Legendre quadrature of Legendre series, not from
    # ducc0's coupling matrices: they must agree to rounding (cross-spectrum: two masks, two noises, 5 weight spectra),
    # and the per-multipole covariance (the kernel's matrices) must bin-sum to the binned one
    nside, lmax = 16, 47
    w1 = apodize_mask(cap_mask(nside, 30.0, 40.0, 60.0), 10.0, nthreads=1)
    w2 = apodize_mask(cap_mask(nside, 50.0, 30.0, 60.0), 10.0, nthreads=1)
    w1[hp.query_disc(nside, hp.ang2vec(35.0, 45.0, lonlat=True), math.radians(8.0))] = 0.0
    bins = Binning.uniform(2, lmax, 7)
    est = SpectrumEstimator(w1, bins, lmax=lmax, mask2=w2, pixel_window=False, remove_monopole_dipole=False,
                            nthreads=1)
    n1 = PixelNoise.from_hits(np.linspace(0.5, 2.0, w1.size), 30.0)
    n2 = PixelNoise.from_hits(np.linspace(2.0, 0.5, w1.size), 40.0)
    gauss = GaussianCovariance(est, noise=n1, noise2=n2, cross=True, nthreads=1)
    cl = 1e-10 * 100.0 / (np.arange(lmax + 1) + 10.0) ** 2
    c = gauss._coupled(cl)
    mats = gauss._matrices()
    assert len(mats) == 5
    starts = bins.ell_min
    for key, u in gauss._grouped_terms(c):
        pu = gauss._p[:, None] * u
        kernel = np.add.reduceat(np.add.reduceat(mats[key] * (pu @ pu.T), starts, axis=0), starts, axis=1)
        quad = gauss._quadrature.binned(key, pu, starts)
        np.testing.assert_allclose(quad, kernel, rtol=1e-9, atol=1e-12 * np.abs(kernel).max())
    pseudo = gauss.pseudo_covariance(cl)
    # the per-multipole covariance is the narrow-kernel one: the exact part of the lowest sky multipoles exists only
    # bin-summed (spectrum.low_sky_covariance), so the comparison is made without it
    assert gauss._low_sky is not None
    gauss._low_sky = None
    p = gauss._p
    binned = np.add.reduceat(np.add.reduceat(p[:, None] * pseudo * p[None, :], starts, axis=0), starts, axis=1)
    expected = gauss._ainv @ binned @ gauss._ainv.T
    np.testing.assert_allclose(gauss.covariance(cl).matrix, expected, rtol=1e-9, atol=1e-12 * np.abs(expected).max())


def test_noise_from_hits_keeps_the_depth_as_the_mean_noise_power():
    hits = np.linspace(0.5, 2.0, 12 * 8**2)
    noise = PixelNoise.from_hits(hits, 40.0)
    # N_white = (depth in K rad)^2 (common practice); the depth is the rms over the observed pixels
    assert noise.white_noise == pytest.approx((40e-6 * math.pi / 10800) ** 2, rel=1e-12)
    ratio = noise.variance / noise.variance.mean()
    np.testing.assert_allclose(ratio, (1 / hits) / np.mean(1 / hits), rtol=1e-12)


def test_noise_from_noise_maps_recovers_variance_and_white_shape(rng):
    nside = 8
    sigma = np.linspace(1.0, 3.0, 12 * nside**2) * 1e-6
    maps = [rng.standard_normal(sigma.size) * sigma for _ in range(800)]
    noise = PixelNoise.from_noise_maps(maps, nthreads=1)
    # 400 draws: the variance of each pixel within 5 of its standard errors sqrt(2/400)
    assert np.max(np.abs(noise.variance / sigma**2 - 1)) < 5 * math.sqrt(2 / 400)
    shape = noise.shape_to(3 * nside - 1)
    assert np.max(np.abs(shape[2:] - 1)) < 0.1


def test_hartlap_factor_and_the_inverse_of_a_simulated_covariance(rng):
    # Hartlap, Simon & Schneider 2007, A&A 464, 399, eq. 17: (n - p - 2) / (n - 1)
    assert hartlap_factor(400, 16) == pytest.approx(382 / 399)
    with pytest.raises(InvalidInputError, match="at least 19 simulations"):
        hartlap_factor(18, 16)
    x = rng.standard_normal((50, 4))
    cov = simulated_covariance(x, ell_min=[2, 10, 20, 30], ell_max=[9, 19, 29, 39], ell_eff=[5.5, 14.5, 24.5, 34.5])
    np.testing.assert_allclose(cov.matrix, np.cov(x, rowvar=False))
    np.testing.assert_allclose(cov.inverse(), np.linalg.inv(np.cov(x, rowvar=False)) * (50 - 4 - 2) / 49, rtol=1e-10)


@pytest.mark.parametrize("suffix", [".npz", ".fits"])
def test_covariance_files_round_trip(tmp_path, suffix, rng):
    a = rng.standard_normal((3, 3))
    c = BandpowerCovariance([2, 10, 20], [9, 19, 29], [5.5, 14.5, 24.5], a @ a.T, rng.random((3, 30)),
                            kind="simulation", n_sims=77, settings={"spectrum": "auto"})
    path = c.write(tmp_path / f"cov{suffix}")
    back = read_covariance(path)
    np.testing.assert_array_equal(back.matrix, c.matrix)
    np.testing.assert_array_equal(back.windows, c.windows)
    np.testing.assert_array_equal(back.ell_max, c.ell_max)
    assert (back.kind, back.n_sims) == ("simulation", 77)
    with pytest.raises(CmbtoolsError, match="exists"):
        c.write(path)
    bad = tmp_path / f"bad{suffix}"
    bad.write_bytes(b"not a covariance")
    with pytest.raises(InputFileError):
        read_covariance(bad)


# ----------------------------------------------------------------------------- Monte Carlo

NSIDE, NSIDE_FINE = 32, 64


def _survey():
    w1 = cap_mask(NSIDE, 30.0, 40.0, 60.0)
    w2 = cap_mask(NSIDE, 50.0, 30.0, 55.0)
    for w, centres in ((w1, [(20, 45), (40, 30), (35, 60)]), (w2, [(60, 20), (45, 40)])):
        for lon, lat in centres:
            w[hp.query_disc(NSIDE, hp.ang2vec(lon, lat, lonlat=True), math.radians(4.0))] = 0.0
    w1 = apodize_mask(w1, 6.0, nthreads=1)
    w2 = apodize_mask(w2, 5.0, nthreads=1)
    vec = np.array(hp.pix2vec(NSIDE, np.arange(12 * NSIDE**2))).T
    dist = np.degrees(np.arccos(np.clip(vec @ hp.ang2vec(30.0, 40.0, lonlat=True), -1, 1)))
    phi = hp.pix2ang(NSIDE, np.arange(12 * NSIDE**2))[1]
    hits = 0.15 + np.exp(-0.5 * (dist / 25.0) ** 2) * (1 + 0.3 * np.cos(8 * phi))
    return w1, w2, hits


@pytest.mark.slow
def test_gaussian_errors_match_the_scatter_of_simulations():
    """800 skies with power to 4 nside, pixelised by averaging a finer map, beam of two pixels, hits noise.

    The finer map (nside 64) carries its own pixel window, so that the mean of its four pixels is the sky averaged
    over the coarse pixel: point values there would add 1/p_l(64)^2 of power, which biased the bandpowers by 4, 7,
    11 and 19 % in bins 2-5 and the covariance's comparison with them (measured at this seed; within 1.7 % with the
    window, 3 % in the cross-spectrum's last bin).

    Every reported bin must have simulated scatter / error in [0.9, 1.1] (the ratio's own standard
    error is 1/sqrt(2 * 799) = 2.5 %), for the auto-spectrum and for the cross-spectrum of two maps with
    different masks and noises, for the plain MASTER estimator (``correct_deprojection_bias=False``) and
    for the default one (deprojection-bias correction folded into its operator rows); neighbouring-bin
    correlations within 3 standard errors (1/sqrt(800)) of the simulated ones.  The first bin (ell 2-17)
    holds because the covariance models the monopole/dipole removal (spectrum.deprojection_covariance):
    without it the first bin's ratio is 0.86 for the cross-spectrum (4000 skies, standard error 1.1 %).
    """
    from cmbtools.simulate import fiducial_cl, gaussian_alm, simulation_rng
    from cmbtools.spectrum.pixel_windows import pixel_window

    w1, w2, hits = _survey()
    fwhm = 2 * hp.nside2resol(NSIDE, arcmin=True)
    lmax = 3 * NSIDE - 1
    bins = Binning.uniform(2, lmax, 16)
    plain = dict(beam=fwhm, lmax=lmax, nthreads=1, correct_deprojection_bias=False)
    est_a = SpectrumEstimator(w1, bins, **plain)
    est_x = SpectrumEstimator(w1, bins, mask2=w2, **plain)
    est_a_default = SpectrumEstimator(w1, bins, beam=fwhm, lmax=lmax, nthreads=1)
    est_x_default = SpectrumEstimator(w1, bins, mask2=w2, beam=fwhm, lmax=lmax, nthreads=1)
    n1 = PixelNoise.from_hits(hits, 600.0)
    n2 = PixelNoise.from_hits(np.roll(hits, 700), 800.0)
    l_fine = 4 * NSIDE - 1
    cl = fiducial_cl(l_fine)
    cl[:2] = 0.0
    # the beam and the finer grid's pixel window: the mean of the finer pixels is then the coarse pixel's average
    bl = gaussian_beam(fwhm, l_fine) * np.asarray(pixel_window(NSIDE_FINE, l_fine), dtype=np.float64)
    vec = np.array(hp.pix2vec(NSIDE, np.arange(12 * NSIDE**2)))
    dipole = 1e-4 + 3e-3 * (np.array([0.3, -0.5, 0.81]) @ vec)  # 100 uK monopole, 3 mK dipole (common practice)
    auto, cross, auto_default, cross_default = [], [], [], []
    for i in range(800):
        rng = simulation_rng(11, i)
        alm = sht.almxfl(gaussian_alm(cl, l_fine, rng=rng), bl, l_fine)
        sky = hp.ud_grade(sht.alm2map(alm, NSIDE_FINE, l_fine, nthreads=1), NSIDE)
        sky += dipole  # a large monopole and dipole, removed by every estimator
        m1 = sky + rng.standard_normal(sky.size) * np.sqrt(n1.variance)
        m2 = sky + rng.standard_normal(sky.size) * np.sqrt(n2.variance)
        auto.append(est_a.estimate(m1).cl)
        cross.append(est_x.estimate(m1, m2).cl)
        auto_default.append(est_a_default.estimate(m1).cl)
        cross_default.append(est_x_default.estimate(m1, m2).cl)
    cases = (
        (auto, GaussianCovariance(est_a, noise=n1, beam=fwhm, nthreads=1)),
        (cross, GaussianCovariance(est_x, noise=n1, noise2=n2, cross=True, beam=fwhm, nthreads=1)),
        (auto_default, GaussianCovariance(est_a_default, noise=n1, beam=fwhm, nthreads=1)),
        (cross_default, GaussianCovariance(est_x_default, noise=n1, noise2=n2, cross=True, beam=fwhm, nthreads=1)),
    )
    for samples, gauss in cases:
        samples = np.array(samples)
        cov = gauss.covariance(cl)  # the input spectrum to 4 nside - 1
        # the errors from measured bandpowers (what is reported for a map), here the mean of the simulations':
        # the errors are linear in the bandpowers, and one simulation's first bin scatters by 20 %
        bias = gauss.noise_bandpowers()
        measured = gauss.covariance(types.SimpleNamespace(cl=samples.mean(axis=0) - bias, ell_eff=bins.ell_eff))
        for errors in (cov.errors, measured.errors):
            ratio = samples.std(axis=0, ddof=1) / errors
            assert np.all((ratio > 0.9) & (ratio < 1.1)), ratio
        sim = np.corrcoef(samples, rowvar=False)
        th = cov.correlation
        k = np.arange(bins.n_bins - 1)
        off = np.abs(sim[k, k + 1] - th[k, k + 1]) * math.sqrt(800)
        # every pair within 3 standard errors of 800.  At this seed the largest offsets are 1.92 (auto-spectrum, bins
        # 1-2) and 1.48 (cross-spectrum, bins 4-5), measured; with the narrow-kernel covariance alone the auto-spectrum's
        # pair 1-2 was off by 3.07: the mask leaks the beam-convolved sky's much larger power from lower multipoles
        # into the upper bins, and only the exact part of the lowest sky multipoles (spectrum.low_sky_covariance)
        # correlates that leaked power across bins as the sky does.
        limit = np.full(k.size, 3.0)
        assert np.all(off < limit), off


# ----------------------------------------------------------------------------- the removal of monopole, dipole, templates


def _removal_setup(nside=16, cross=False, templates=None):
    w1 = apodize_mask(cap_mask(nside, 30.0, 40.0, 50.0), 10.0, nthreads=1)
    w1[hp.query_disc(nside, hp.ang2vec(25.0, 45.0, lonlat=True), math.radians(8.0))] = 0.0
    lmax = 3 * nside - 1
    bins = Binning.uniform(2, lmax, 8)
    kw = dict(lmax=lmax, nthreads=1, pixel_window=False, correct_deprojection_bias=False)
    if templates is not None:
        kw["templates"] = templates
    if cross:
        w2 = apodize_mask(cap_mask(nside, 50.0, 30.0, 45.0), 8.0, nthreads=1)
        return SpectrumEstimator(w1, bins, mask2=w2, **kw), w1, w2
    return SpectrumEstimator(w1, bins, **kw), w1, None


@pytest.mark.parametrize("cross", [False, True])
def test_removal_term_reproduces_the_exact_deprojection_bias(cross):
    # the trace over m of the removal's change of the pseudo-coefficient covariance is the deprojection bias of
    # Elsner, Leistedt & Peiris 2016 (MNRAS 456, 2095), computed independently by spectrum.deprojection
    from cmbtools.spectrum.deprojection import TemplateDeprojection, deprojection_bias

    nside = 16
    theta, phi = hp.pix2ang(nside, np.arange(12 * nside**2))
    t = np.sin(theta) ** 2 * np.cos(3 * phi)  # a template besides the monopole and dipole
    est, w1, w2 = _removal_setup(nside, cross, templates=[t])
    gauss = GaussianCovariance(est, cross=cross, nthreads=1)
    cl = 1e-10 / (np.arange(3 * nside) + 5.0) ** 2
    signal = {k: gauss._sky_factors[k][: cl.size] * cl for k in gauss._mask_cl}
    pair = ("1", "2") if cross else ("1", "1")
    ours = gauss._deprojection.pseudo_bias(signal, pair)
    d1 = TemplateDeprojection(w1, [t], nthreads=1)
    d2 = None if w2 is None else TemplateDeprojection(w2, [t], nthreads=1)
    exact = deprojection_bias(d1, signal[pair], est.lmax, deprojection2=d2, nthreads=1)
    np.testing.assert_allclose(ours, exact, rtol=1e-9, atol=1e-9 * np.max(np.abs(exact)))


def test_removal_term_on_the_coarse_grid_matches_the_full_grid(monkeypatch):
    # finer maps get the removal's term from masks averaged to COARSE_NSIDE: here 64 -> 32 (the test's own scale)
    import cmbtools.spectrum.deprojection as dep

    nside = 64
    w = apodize_mask(cap_mask(nside, 30.0, 40.0, 35.0), 6.0, nthreads=1)
    w[hp.query_disc(nside, hp.ang2vec(25.0, 45.0, lonlat=True), math.radians(4.0))] = 0.0
    w = apodize_mask(w, 3.0, nthreads=1)
    bins = Binning.uniform(2, 3 * nside - 1, 12)
    est = SpectrumEstimator(w, bins, lmax=3 * nside - 1, nthreads=1)
    noise = PixelNoise.from_hits(np.linspace(0.5, 1.5, w.size), 30.0)
    from cmbtools.simulate import fiducial_cl

    cl = fiducial_cl(3 * nside - 1)
    full = GaussianCovariance(est, noise=noise, nthreads=1)
    monkeypatch.setattr(dep, "COARSE_NSIDE", 32)
    coarse = GaussianCovariance(est, noise=noise, nthreads=1)
    # at this nside the exact part of the lowest sky multipoles (spectrum.low_sky_covariance) holds the removal of
    # the sky below ell 33 and the removal's term sees only the sky above it (then below its threshold: no change);
    # finer maps, which this grid stands in for, have the narrow-kernel term alone and the whole removal's term
    full._low_sky = coarse._low_sky = None
    assert coarse._deprojection._grid == 32 and full._deprojection._grid == 64
    a, b = full.covariance(cl), coarse.covariance(cl)
    plain = full.covariance(cl).matrix.copy()
    full._deprojection = None
    without = full.covariance(cl)
    # the removal changes the first bin's error by several per cent; the grids agree to 0.21 % of the error here
    # (measured; 1e-4 for nside 512 against the default COARSE_NSIDE 256, a cap with holes, bins of 30)
    assert np.max(np.abs(a.errors / without.errors - 1)) > 0.02
    np.testing.assert_allclose(b.errors, a.errors, rtol=5e-3)
    np.testing.assert_allclose(plain, a.matrix)


def test_no_removal_no_term():
    est, _, _ = _removal_setup(16)
    assert GaussianCovariance(est, nthreads=1)._deprojection is not None
    bins = est.binning
    bare = SpectrumEstimator(est.mask, bins, lmax=est.lmax, nthreads=1, pixel_window=False, remove_monopole_dipole=False)
    assert GaussianCovariance(bare, nthreads=1)._deprojection is None
