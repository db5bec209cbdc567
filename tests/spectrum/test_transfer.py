"""The per-bin transfer function (MASTER's treatment of filtering, Hivon et al. 2002, ApJ 567, 2): measured by a
validation run on filtered skies, written to a table, read back and divided out of the bandpowers of other maps."""

from concurrent.futures import ThreadPoolExecutor

import healpy as hp
import numpy as np
import pytest

from _masks import cap_with_holes

from cmbtools._core import sht as _sht
from cmbtools._core.binned_tables import read_filter_table, read_transfer_table
from cmbtools._core.tables import write_text_table
from cmbtools.exceptions import InputFileError, InvalidInputError
from cmbtools.simulate import Dipole, NoiseModel, fiducial_cl, gaussian_alm, noise_map, noise_spectrum, validate_estimator
from cmbtools.simulate.pixel_averaging import pixel_averaged_map
from cmbtools.spectrum import (
    BandpowerCovariance, BandpowerTransfer, Binning, SpectrumEstimator, gaussian_beam,
)


def _high_pass(lmax, ell_cut=20.0):
    """f_l with f_l^2 = 1 / (1 + (ell_cut / l)^4): a smooth high-pass, what a time-stream filter does to large scales."""
    ell = np.arange(lmax + 1, dtype=float)
    f = np.zeros(lmax + 1)
    f[1:] = 1.0 / np.sqrt(1.0 + (ell_cut / ell[1:]) ** 4)
    return f


@pytest.fixture
def one_thread(monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")


def test_measured_transfer_undoes_a_high_pass_on_independent_realistic_maps(one_thread):
    # Skies as real maps are: power to 4 nside - 1, a beam of two pixels, averaged over each pixel's area
    # (simulate.pixel_averaging, checked against healpy in tests/simulate/test_pixel_averaging.py), a 100 uK monopole and a 3 mK dipole, noise shaped by a hits map, a tapered
    # cap with holes; a harmonic high-pass multiplies every a_lm (monopole and dipole too) before the noise.
    # 1. validate_estimator measures F_b on 300 filtered skies; 2. 300 independent skies made here (public
    # simulation functions, another seed) go through the estimator and BandpowerTransfer.apply.  Every reported
    # bin (10 to 2 nside) of the corrected mean is within 3 standard errors of the binned input (the standard
    # error combines the scatter of the 300 maps and the Monte Carlo error of F_b); without the correction the
    # filtered bins are low by many standard errors.
    nside, n_sims = 32, 300
    lmax, sky_lmax = 3 * nside - 1, 4 * nside - 1
    w, vec = cap_with_holes(nside)  # tests/_masks.py: a 50-degree cap with 15 holes, edges tapered by 3 degrees
    centre = hp.ang2vec(250.0, -55.0, lonlat=True)  # the cap's centre: the noise is lowest there
    fwhm = 2 * np.degrees(np.sqrt(4 * np.pi / w.size)) * 60
    cl = fiducial_cl(sky_lmax)
    f = _high_pass(sky_lmax)
    bins = Binning.uniform(10, 2 * nside, 9)
    est = SpectrumEstimator(w, bins, beam=fwhm, guess_cl=cl, sky_lmax=sky_lmax, nthreads=1)
    noise = NoiseModel(20.0, hits=0.25 + 0.75 * np.clip(vec @ centre, 0, 1))
    with ThreadPoolExecutor(2) as pool:
        run = validate_estimator(est, cl, n_sims=n_sims, seed=3, noise=noise, monopole=100e-6,
                                 dipole=Dipole(3e-3, 60.0, 30.0), harmonic_filter=f, sky_lmax=sky_lmax,
                                 pixelise=True, executor=pool, progress=False)
    transfer = BandpowerTransfer.from_validation(run)
    binned_f2 = bins.bin_spectrum(f**2 * cl) / bins.bin_spectrum(cl)
    # F_b follows the binned filter power; the mask's coupling moves it (measured: -7.6 % in the first bin, 0.199
    # against 0.216, +1.8 to +7.2 % in the others), the Monte Carlo error is 0.8-1.4 % (measured)
    np.testing.assert_allclose(transfer.transfer, binned_f2, rtol=0.1)
    assert np.all(transfer.transfer_error / transfer.transfer < 0.02)

    noise_cl = noise_spectrum(noise, lmax, nside)
    amplitude = gaussian_beam(fwhm, sky_lmax) * f
    dipole = 3e-3 * hp.ang2vec(30.0, 40.0, lonlat=True) * f[1]
    corrected, measured = [], []
    for i in range(n_sims):
        rng = np.random.default_rng([17, i])
        alm = _sht.almxfl(gaussian_alm(cl, sky_lmax, rng=rng), amplitude, sky_lmax)
        m = pixel_averaged_map(alm, nside, sky_lmax, nthreads=1)
        m += 100e-6 * f[0] + vec @ dipole + noise_map(noise, nside, rng=rng)
        bp = est.estimate(m, noise_cl=noise_cl)
        out = transfer.apply(bp)
        np.testing.assert_allclose(out.cl_err, bp.cl_err / transfer.transfer, rtol=1e-14)
        measured.append(bp.cl)
        corrected.append(out.cl)
    truth = bins.bin_spectrum(cl)
    corrected, measured = np.array(corrected), np.array(measured)
    error = np.sqrt(corrected.var(0, ddof=1) / n_sims + (truth * transfer.transfer_error / transfer.transfer) ** 2)
    z = (corrected.mean(0) - truth) / error
    assert np.all(np.abs(z) < 3.0), z
    z_measured = (measured.mean(0) - truth) / (measured.std(0, ddof=1) / np.sqrt(n_sims))
    filtered = binned_f2 < 0.9  # the three lowest bins
    assert filtered.sum() == 3
    assert np.all(z_measured[filtered] < -10.0), z_measured

    # 3. the corrected pipeline checked by validate_estimator itself (other seed): what is left is within the
    # same combined standard error of the binned input, and the errors it compares with are divided by F_b too
    with ThreadPoolExecutor(2) as pool:
        check = validate_estimator(est, cl, n_sims=n_sims, seed=4, noise=noise, monopole=100e-6,
                                   dipole=Dipole(3e-3, 60.0, 30.0), harmonic_filter=f, bandpower_transfer=transfer,
                                   sky_lmax=sky_lmax, pixelise=True, executor=pool, progress=False)
    error = np.sqrt(check.std**2 / n_sims + (truth * transfer.transfer_error / transfer.transfer) ** 2)
    assert np.all(np.abs(check.mean - truth) / error < 3.0), (check.mean - truth) / error
    assert np.all(np.abs(check.error_ratio - 1.0) < 0.2), check.error_ratio  # 300 sims: 4 % standard error
    assert check.metadata["bandpower_transfer_key"] == transfer.key


def test_table_round_trip_and_what_apply_scales(tmp_path):
    t = BandpowerTransfer([2, 10, 20], [9, 19, 29], [5.5, 14.5, 24.5], [0.25, 0.8, 1.0], [0.01, 0.02, 0.0],
                          {"n_sims": 40})
    path = t.write_csv(tmp_path / "transfer.csv")
    lines = path.read_text().splitlines()
    assert "ell_min,ell_max,ell_eff,transfer,transfer_error" in lines
    assert "# n_sims: 40" in lines
    back = BandpowerTransfer.read_csv(path)
    for name in ("ell_min", "ell_max", "ell_eff", "transfer", "transfer_error"):
        np.testing.assert_array_equal(getattr(back, name), getattr(t, name))
    assert back.metadata["n_sims"] == "40"

    from cmbtools.spectrum import Bandpowers

    cov = np.array([[4.0, 1.0, 0.0], [1.0, 9.0, 2.0], [0.0, 2.0, 16.0]]) * 1e-24
    bp = Bandpowers([2, 10, 20], [9, 19, 29], [5.5, 14.5, 24.5], [1e-11, 2e-11, 3e-11], [2e-12, 3e-12, 4e-12],
                    [1e-10, 2e-10, 3e-10], [2e-11, 3e-11, 4e-11], covariance=cov)
    out = t.apply(bp)
    f = np.array([0.25, 0.8, 1.0])
    np.testing.assert_allclose(out.cl, bp.cl / f, rtol=1e-15)
    np.testing.assert_allclose(out.cl_err, bp.cl_err / f, rtol=1e-15)
    np.testing.assert_allclose(out.dl, bp.dl / f, rtol=1e-15)
    np.testing.assert_allclose(out.dl_err, bp.dl_err / f, rtol=1e-15)
    np.testing.assert_allclose(out.covariance, cov / np.outer(f, f), rtol=1e-15)
    assert out.metadata["bandpower_transfer_max_relative_error"] == pytest.approx(0.04)
    c = t.apply_to_covariance(BandpowerCovariance([2, 10, 20], [9, 19, 29], [5.5, 14.5, 24.5], cov))
    np.testing.assert_allclose(c.matrix, cov / np.outer(f, f), rtol=1e-15)
    # another binning: one clear error
    with pytest.raises(InvalidInputError, match=r"other bins than the bandpowers \(3 bins, ell 2-29 against 2 bins"):
        t.apply(Bandpowers([2, 10], [9, 19], [5.5, 14.5], [1.0, 1.0], [1.0, 1.0], [1.0, 1.0], [1.0, 1.0]))
    # a per-bin transfer is not a per-multipole T_l of the estimator
    with pytest.raises(InvalidInputError, match="per-bin transfer"):
        SpectrumEstimator(np.ones(12 * 4**2), Binning.uniform(2, 11, 5), transfer=t, pixel_window=False, nthreads=1)


def test_the_validation_summary_table_is_a_transfer_table(tmp_path, one_thread):
    nside = 16
    w, _vec = cap_with_holes(nside)
    est = SpectrumEstimator(w, Binning.uniform(4, 40, 9), lmax=40, pixel_window=False, nthreads=1)
    cl = fiducial_cl(40)
    with ThreadPoolExecutor(2) as pool:
        run = validate_estimator(est, cl, n_sims=4, seed=1, harmonic_filter=_high_pass(40), executor=pool,
                                 progress=False)
    summary = BandpowerTransfer.read_csv(run.write_csv(tmp_path / "summary.csv"))
    np.testing.assert_allclose(summary.transfer, run.transfer, rtol=1e-9)  # 10 digits in that table
    assert np.all(summary.transfer_error == 0.0)  # that table has no error column
    own = BandpowerTransfer.read_csv(BandpowerTransfer.from_validation(run).write_csv(tmp_path / "transfer.csv"))
    np.testing.assert_array_equal(own.transfer, run.transfer)  # repr: exact
    np.testing.assert_allclose(own.transfer_error, run.std / (2.0 * run.expected), rtol=1e-12)
    assert "f_l table sha256=" in run.metadata["harmonic_filter"]
    # a cross-spectrum run filters both splits alike: without noise its splits are one sky, so it sees the
    # auto-spectrum's bandpowers (same masks, same draws)
    with ThreadPoolExecutor(2) as pool:
        cross = validate_estimator(est, cl, n_sims=4, seed=1, harmonic_filter=_high_pass(40), cross=True,
                                   executor=pool, progress=False)
    np.testing.assert_allclose(cross.samples, run.samples, rtol=1e-10)
    assert run.transfer[0] < 0.5  # the first bin (4-12) keeps a small part of its power


@pytest.mark.parametrize(
    "text, message",
    [
        ("ell_min,ell_max,transfer\n2,9,0.5\n", None),
        ("ell_min,ell_max,cl\n2,9,0.5\n", r"no 'transfer' column"),
        ("ell_min,ell_max,transfer\n2,9,0\n", r"line 2: transfer = '0' is not positive"),
        ("ell_min,ell_max,transfer\n2,9,nan\n", r"line 2: transfer = 'nan' is not finite"),
        ("ell_min,ell_max,transfer\n2,9,0.5\n8,12,0.7\n", r"line 3: the bin 8-12 starts inside"),
        ("ell_min,ell_max,transfer\n2.5,9,0.5\n", r"ell_min = '2.5' is not a whole number"),
        ("ell_min,ell_max,transfer,transfer_error\n2,9,0.5,-1\n", r"transfer_error = '-1' is negative"),
        ("ell_min,ell_max,transfer\n", r"no data rows"),
    ],
)
def test_transfer_table_reader_refuses_bad_tables(tmp_path, text, message):
    p = tmp_path / "t.csv"
    p.write_text(text)
    if message is None:
        _, cols, _ = read_transfer_table(p)
        assert cols["ell_eff"][0] == 5.5 and cols["transfer_error"][0] == 0.0
    else:
        with pytest.raises(InputFileError, match=message):
            read_transfer_table(p)


def test_filter_table_reader(tmp_path):
    p = write_text_table(tmp_path / "f.csv", ("ell", "factor"), [(str(i), repr(float(v))) for i, v in
                                                                  enumerate(_high_pass(30))])
    np.testing.assert_array_equal(read_filter_table(p), _high_pass(30))
    for text, message in (("ell,factor\n1,0.5\n", r"ell = '1' where 0 was expected"),
                          ("ell,gain\n0,0.5\n", r"one 'ell' and one 'factor' column"),
                          ("ell,factor\n0,inf\n", r"factor = 'inf' is not finite")):
        p.write_text(text)
        with pytest.raises(InputFileError, match=message):
            read_filter_table(p)
