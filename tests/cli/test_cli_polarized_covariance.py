"""Covariance and transfer files of I, Q, U measurements on the command line: `spectrum --covariance`,
`validate --polarized` (covariance.npz, transfer.csv), `spectrum --covariance-from` / `--transfer` reading them
back, and a file of the other kind of map refused (exit 2, one line, nothing written)."""

from __future__ import annotations

import csv

import healpy as hp
import numpy as np
import pytest
from astropy.io import fits

from cmbtools.cli import main
from cmbtools.maps import apodize_mask, cap_mask, write_map, write_mask
from cmbtools.simulate import write_spectrum_table
from cmbtools.spectrum import SPECTRA, PolarizedBandpowers, PolarizedBandpowerTransfer, read_covariance

NSIDE, LMAX = 16, 40
NB = 5  # bins of 8 from ell 2 to 40
UK2 = 1e12


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("polcov")
    mask = apodize_mask(cap_mask(NSIDE, 0.0, 90.0, 70.0), 10.0, nthreads=1)
    write_mask(d / "mask.fits", mask)
    ell = np.arange(80.0)
    base = np.where(ell >= 2, 1e-10 * 100.0 / (ell + 10.0) ** 2, 0.0)
    spectra = {"TT": base, "EE": 0.2 * base, "BB": 0.01 * base, "TE": 0.25 * base}
    write_spectrum_table(d / "pol.csv", spectra)
    rng = np.random.default_rng(21)
    sky = hp.synfast([spectra[k][:64] for k in ("TT", "EE", "BB", "TE")], NSIDE, lmax=63, new=True)
    for k in (1, 2):
        hp.write_map(d / f"half{k}.fits", sky + rng.standard_normal(sky.shape) * 3e-6, dtype=np.float64,
                     column_units="K_CMB")
    write_map(d / "temperature.fits", sky[0])
    return d


def _spectrum(d, out, *extra, maps=("half1.fits", "half2.fits")):
    return main(["spectrum", *(str(d / m) for m in maps), "--mask", str(d / "mask.fits"), "--lmax", str(LMAX),
                 "--bin-width", "8", "--beam-fwhm", "90", "--threads", "1", "-o", str(out), *extra])


@pytest.mark.parametrize("suffix", [".npz", ".fits"])
def test_spectrum_writes_the_covariance_of_the_six_spectra(files, tmp_path, suffix):
    out, cov_path, table_fits = tmp_path / "pol.csv", tmp_path / f"cov{suffix}", tmp_path / "pol.fits"
    assert _spectrum(files, out, "--covariance", str(cov_path), "--fits", str(table_fits)) == 0
    cov = read_covariance(cov_path)
    assert cov.spectra == SPECTRA and cov.kind == "gaussian" and cov.blocks.all()
    assert cov.matrix.shape == (6 * NB, 6 * NB) and cov.windows.shape == (6 * NB, 6 * (LMAX + 1))
    np.testing.assert_allclose(cov.matrix, cov.matrix.T, rtol=0, atol=1e-14 * np.abs(cov.matrix).max())
    assert np.all(np.diag(cov.matrix) > 0)
    # the analytic model computes every block: each off-diagonal spectrum block has non-zero entries
    for i in range(6):
        for j in range(6):
            assert np.any(cov.matrix[i * NB:(i + 1) * NB, j * NB:(j + 1) * NB] != 0), (SPECTRA[i], SPECTRA[j])
    # the table's errors (read back in K^2) are the square roots of the file's diagonal, and the FITS table holds the matrix
    bp = PolarizedBandpowers.read_csv(out)
    np.testing.assert_allclose(bp.cl_err.ravel(), np.sqrt(np.diag(cov.matrix)), rtol=1e-12)
    with fits.open(table_fits) as hdul:
        np.testing.assert_allclose(hdul["COVARIANCE"].data / UK2**2, cov.matrix, rtol=1e-12)
    # the windows are the estimator's (W @ C equals expected_bandpowers: tests/spectrum): TB and EB have no
    # correction factors, so a flat D_l = 1 in their own block gives D_l bandpowers of 1 (to rounding)
    ell = np.arange(LMAX + 1.0)
    flat_dl = np.where(ell >= 2, 2 * np.pi / np.maximum(ell * (ell + 1), 1.0), 0.0)
    dl_factor = bp.dl[0] / bp.cl[0]
    for s in ("TB", "EB"):
        i = SPECTRA.index(s)
        w = cov.windows[i * NB:(i + 1) * NB, i * (LMAX + 1):(i + 1) * (LMAX + 1)]
        np.testing.assert_allclose(w @ flat_dl * dl_factor, 1.0, rtol=1e-10)


def test_validate_polarized_writes_covariance_and_transfer_that_spectrum_reads_back(files, tmp_path, capsys,
                                                                                    monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    run = tmp_path / "run"
    n_sims = 40  # >= 6 x 5 bins + 3, so that the simulated covariance can be inverted
    assert main(["validate", str(files / "mask.fits"), "--polarized", "--lmax", str(LMAX), "--bin-width", "8",
                 "--beam-fwhm", "90", "--noise-depth", "30", "--no-progress", "--spectrum", str(files / "pol.csv"),
                 "--sky-lmax", "63", "--sims", str(n_sims), "--seed", "5", "--workers", "1",
                 "--run-dir", str(run)]) == 0
    assert "transfer.csv, " in capsys.readouterr().out
    cov = read_covariance(run / "covariance.npz")
    assert cov.spectra == SPECTRA and cov.kind == "simulation" and cov.n_sims == n_sims
    assert cov.matrix.shape == (6 * NB, 6 * NB) and cov.windows.shape == (6 * NB, 6 * (LMAX + 1))
    assert np.array_equal(cov.matrix, cov.matrix.T) and np.linalg.eigvalsh(cov.matrix).min() > 0
    # its diagonal is the scatter the summary reports (std with ddof = 1), spectrum by spectrum
    rows = list(csv.DictReader(ln for ln in (run / "summary.csv").read_text().splitlines() if not ln.startswith("#")))
    std = np.array([float(r["std"]) for r in rows]) / UK2  # the summary's powers are in uK^2
    assert [r["spectrum"] for r in rows] == [s for s in SPECTRA for _ in range(NB)]
    np.testing.assert_allclose(np.sqrt(np.diag(cov.matrix)), std, rtol=2e-9)  # the summary holds 10 digits
    transfer = PolarizedBandpowerTransfer.read_csv(run / "transfer.csv")
    summary_transfer = np.array([float(r["transfer"]) for r in rows]).reshape(6, NB)
    for s in ("TT", "TE", "EE", "BB"):
        i = SPECTRA.index(s)
        np.testing.assert_allclose(transfer.transfer[i], summary_transfer[i], rtol=2e-9)  # the summary: 10 digits
        assert np.all(np.abs(transfer.transfer[i] - 1) < 0.3)  # no filter: F_b = 1 within the Monte Carlo noise
    assert np.all(np.isnan(transfer.transfer[[SPECTRA.index("TB"), SPECTRA.index("EB")]]))  # expectation zero

    # spectrum --covariance-from: the errors are sqrt(diag) of the simulated covariance (its inverse takes the
    # Hartlap et al. 2007 factor, (n - p - 2) / (n - 1) with p = 30), written back unchanged with --covariance
    out, back = tmp_path / "pol.csv", tmp_path / "back.npz"
    assert _spectrum(files, out, "--covariance-from", str(run / "covariance.npz"), "--covariance", str(back)) == 0
    assert "errors: simulation covariance from" in capsys.readouterr().out
    bp = PolarizedBandpowers.read_csv(out)
    np.testing.assert_allclose(bp.cl_err.ravel(), np.sqrt(np.diag(cov.matrix)), rtol=1e-12)
    again = read_covariance(back)
    np.testing.assert_array_equal(again.matrix, cov.matrix)
    assert (again.kind, again.n_sims) == ("simulation", n_sims)
    np.testing.assert_allclose(again.inverse(), np.linalg.inv(cov.matrix) * (n_sims - 30 - 2) / (n_sims - 1),
                               rtol=1e-8)
    # the transfer table: every spectrum over its factor (TE, TB, EB over sqrt(F_XX F_YY))
    corrected = tmp_path / "corrected.csv"
    assert _spectrum(files, corrected, "--covariance-from", str(run / "covariance.npz"),
                     "--transfer", str(run / "transfer.csv")) == 0
    fixed = PolarizedBandpowers.read_csv(corrected)
    np.testing.assert_allclose(fixed.cl, bp.cl / transfer.factors, rtol=1e-9)
    np.testing.assert_allclose(fixed.cl_err, bp.cl_err / transfer.factors, rtol=1e-9)

    # the other kind of map: one line, exit 2, nothing written
    capsys.readouterr()
    t_out = tmp_path / "t.csv"
    for extra in (("--covariance-from", str(run / "covariance.npz")), ("--transfer", str(run / "transfer.csv"))):
        assert _spectrum(files, t_out, *extra, maps=("temperature.fits",)) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and ("six polarized spectra" in err[0] or "'spectrum' column" in err[0]), err
        assert not t_out.exists()


def test_a_temperature_covariance_or_transfer_is_refused_for_iqu_maps(files, tmp_path, capsys):
    t_cov = tmp_path / "t_cov.npz"
    t_tab = tmp_path / "t.csv"
    assert _spectrum(files, t_tab, "--covariance", str(t_cov), maps=("temperature.fits",)) == 0
    assert read_covariance(t_cov).spectra == ("TT",)
    from cmbtools.spectrum import BandpowerTransfer

    t_transfer = BandpowerTransfer(*(read_covariance(t_cov).ell_min, read_covariance(t_cov).ell_max,
                                     read_covariance(t_cov).ell_eff), np.ones(NB)).write_csv(tmp_path / "tf.csv")
    capsys.readouterr()
    out = tmp_path / "pol.csv"
    for extra, message in ((("--covariance-from", str(t_cov)), "is of temperature bandpowers (TT only)"),
                           (("--transfer", str(t_transfer)), "it is a temperature transfer table"),
                           (("--errors", "knox"), "--errors knox applies to temperature maps only"),
                           (("--noise-depth", "30"), "--noise-depth applies to temperature maps only"),
                           (("--covariance", str(tmp_path / "c.npz"), "--bin-width", "16"), None)):
        code = _spectrum(files, out, *extra)
        if message is None:  # a later --bin-width wins: two bins (ell 2-17, 18-40), six spectra
            assert code == 0 and read_covariance(tmp_path / "c.npz").matrix.shape == (6 * 2, 6 * 2)
            out.unlink()
            continue
        assert code == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and message in err[0], err
        assert not out.exists()


def test_covariance_of_other_bins_is_refused_before_any_work(files, tmp_path, capsys, monkeypatch):
    cov_path = tmp_path / "cov.npz"
    assert _spectrum(files, tmp_path / "a.csv", "--covariance", str(cov_path)) == 0
    import cmbtools.spectrum as sp

    def never(*args, **kwargs):
        raise AssertionError("the estimator was built before the covariance file was checked")

    monkeypatch.setattr(sp, "PolarizedSpectrumEstimator", never)
    capsys.readouterr()
    out = tmp_path / "b.csv"
    assert _spectrum(files, out, "--covariance-from", str(cov_path), "--bin-width", "16") == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "the covariance has other bins than the bandpowers" in err[0]
    assert not out.exists()
