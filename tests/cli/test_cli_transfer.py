"""The transfer-function round trip through the commands: `validate --harmonic-filter` writes transfer.csv,
`spectrum --transfer` divides it out (MASTER's treatment of filtering, Hivon et al. 2002, ApJ 567, 2)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from cmbtools import maps
from cmbtools._core import sht as _sht
from cmbtools._core.tables import write_text_table
from cmbtools.cli import main
from cmbtools.simulate import fiducial_cl, gaussian_alm
from cmbtools.spectrum import Bandpowers, BandpowerTransfer, gaussian_beam, pixel_window, read_covariance

NSIDE, LMAX, FWHM = 16, 40, 120.0


def _high_pass(lmax, ell_cut=12.0):
    ell = np.arange(lmax + 1, dtype=float)
    f = np.zeros(lmax + 1)
    f[1:] = 1.0 / np.sqrt(1.0 + (ell_cut / ell[1:]) ** 4)
    return f


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("filtered")
    mask = maps.apodize_mask(maps.cap_mask(NSIDE, 250.0, -55.0, 60.0), 10.0, nthreads=1)
    maps.write_mask(d / "mask.fits", mask)
    band = 4 * NSIDE - 1
    f = _high_pass(band)
    write_text_table(d / "high_pass.csv", ("ell", "factor"), [(str(i), repr(float(v))) for i, v in enumerate(f)])
    cl = fiducial_cl(band)
    amplitude = gaussian_beam(FWHM, LMAX) * pixel_window(NSIDE, LMAX) * f[: LMAX + 1]
    alm = _sht.almxfl(gaussian_alm(cl[: LMAX + 1], LMAX, rng=4), amplitude, LMAX)
    maps.write_sky_map(d / "map.fits", _sht.alm2map(alm, NSIDE, LMAX, nthreads=1))
    return d


def _spectrum_args(d, out, *extra):
    return ["spectrum", str(d / "map.fits"), "--mask", str(d / "mask.fits"), "--lmax", str(LMAX), "--bin-width", "8",
            "--beam-fwhm", str(FWHM), "--threads", "1", "-o", str(out), *extra]


def test_validate_writes_the_transfer_and_spectrum_divides_it_out(files, tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    run = tmp_path / "run"
    assert main(["validate", str(files / "mask.fits"), "--lmax", str(LMAX), "--bin-width", "8", "--beam-fwhm",
                 str(FWHM), "--harmonic-filter", str(files / "high_pass.csv"), "--sky-lmax", str(4 * NSIDE - 1),
                 "--sims", "6", "--seed", "2", "--workers", "1", "--no-progress", "--run-dir", str(run)]) == 0
    out = capsys.readouterr().out
    assert f"(harmonic filter {files / 'high_pass.csv'})" in out and str(run / "transfer.csv") in out
    doc = json.loads((run / "summary.json").read_text())
    transfer = BandpowerTransfer.read_csv(run / "transfer.csv")
    np.testing.assert_array_equal(transfer.ell_min, doc["bins"]["ell_min"])
    np.testing.assert_allclose(transfer.transfer, doc["bins"]["transfer"], rtol=1e-12)
    # standard error of mean / expected over 6 simulations
    np.testing.assert_allclose(transfer.transfer_error,
                               np.array(doc["bins"]["std"]) / (np.sqrt(6) * np.array(doc["bins"]["expected"])),
                               rtol=1e-9)
    assert transfer.transfer[0] < 0.5  # the high-pass removes most of the first bin (ell 2-9)
    assert transfer.metadata["harmonic_filter_file"] == str(files / "high_pass.csv")

    plain, corrected = tmp_path / "plain.csv", tmp_path / "corrected.csv"
    assert main(_spectrum_args(files, plain, "--covariance", str(tmp_path / "plain.npz"))) == 0
    capsys.readouterr()
    assert main(_spectrum_args(files, corrected, "--transfer", str(run / "transfer.csv"),
                               "--covariance", str(tmp_path / "corrected.npz"))) == 0
    assert "divided by F_b of" in capsys.readouterr().out
    a, b = Bandpowers.read_csv(plain), Bandpowers.read_csv(corrected)
    f = transfer.transfer
    np.testing.assert_allclose(b.cl, a.cl / f, rtol=1e-12)
    np.testing.assert_allclose(b.cl_err, a.cl_err / f, rtol=1e-12)
    np.testing.assert_allclose(b.dl_err, a.dl_err / f, rtol=1e-12)
    assert b.metadata["transfer_file"] == str(run / "transfer.csv")
    ca, cb = read_covariance(tmp_path / "plain.npz"), read_covariance(tmp_path / "corrected.npz")
    np.testing.assert_allclose(cb.matrix, ca.matrix / np.outer(f, f), rtol=1e-12)
    np.testing.assert_array_equal(cb.windows, ca.windows)  # the corrected bandpowers see the unfiltered sky


@pytest.mark.parametrize(
    "table, extra, message",
    [
        ("ell_min,ell_max,transfer\n2,9,0.5\n10,17,0.9\n", [],
         "other bins than the bandpowers (2 bins, ell 2-17 against 5 bins, ell 2-40)"),
        ("ell_min,ell_max,transfer\n2,9,-0.5\n", [], "line 2: transfer = '-0.5' is not positive"),
        ("ell,cl\n2,1\n", [], "no 'ell_min', 'ell_max', 'transfer' column"),
    ],
)
def test_a_bad_transfer_table_is_one_line_and_exit_2(files, tmp_path, capsys, table, extra, message):
    t = tmp_path / "transfer.csv"
    t.write_text(table)
    out = tmp_path / "out.csv"
    assert main(_spectrum_args(files, out, "--transfer", str(t), *extra)) == 2
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1 and str(t) in err
    assert not out.exists()


def test_a_filter_table_short_of_the_band_limit_is_refused(files, tmp_path, capsys):
    short = tmp_path / "short.csv"
    write_text_table(short, ("ell", "factor"), [(str(i), "1") for i in range(30)])
    run = tmp_path / "run"
    assert main(["validate", str(files / "mask.fits"), "--lmax", str(LMAX), "--harmonic-filter", str(short),
                 "--sims", "4", "--no-progress", "--run-dir", str(run)]) == 2
    err = capsys.readouterr().err
    assert "stops at ell=29; the skies go to ell=" in err and err.count("\n") == 1
    assert not (run / "summary.csv").exists()


def test_validate_checks_the_corrected_pipeline_and_its_covariance_is_not_divided_twice(files, tmp_path, capsys,
                                                                                        monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    common = ["validate", str(files / "mask.fits"), "--lmax", str(LMAX), "--bin-width", "8", "--beam-fwhm", str(FWHM),
              "--harmonic-filter", str(files / "high_pass.csv"), "--sky-lmax", str(4 * NSIDE - 1), "--sims", "6",
              "--workers", "1", "--no-progress"]
    assert main(common + ["--seed", "2", "--run-dir", str(tmp_path / "measure")]) == 0
    first = BandpowerTransfer.read_csv(tmp_path / "measure" / "transfer.csv")
    capsys.readouterr()
    check = tmp_path / "check"
    assert main(common + ["--seed", "3", "--run-dir", str(check), "--transfer",
                          str(tmp_path / "measure" / "transfer.csv")]) == 0
    assert "bandpowers and errors divided by F_b of" in capsys.readouterr().out
    # the run's own transfer table as its input: refused (it would be rewritten)
    assert main(common + ["--seed", "3", "--run-dir", str(tmp_path / "measure"), "--transfer",
                          str(tmp_path / "measure" / "transfer.csv")]) == 2
    err = capsys.readouterr().err
    assert "is an input, but this run would write its transfer table there" in err and err.count("\n") == 1
    assert BandpowerTransfer.read_csv(tmp_path / "measure" / "transfer.csv").key == first.key
    doc = json.loads((check / "summary.json").read_text())
    # the summary describes what is left; transfer.csv holds the whole F_b again (a second measurement of it)
    second = BandpowerTransfer.read_csv(check / "transfer.csv")
    np.testing.assert_allclose(np.array(doc["bins"]["transfer"]) * first.transfer, second.transfer, rtol=1e-9)
    assert doc["settings"]["bandpower_transfer_key"] == first.key
    cov = read_covariance(check / "covariance.npz")
    assert cov.settings["bandpower_transfer_key"] == first.key
    np.testing.assert_allclose(np.sqrt(np.diag(cov.matrix)), doc["bins"]["std"], rtol=1e-9)  # corrected scatter

    # spectrum with that covariance: the errors are the covariance's, not divided again; without --transfer: refused
    out = tmp_path / "corrected.csv"
    assert main(_spectrum_args(files, out, "--transfer", str(tmp_path / "measure" / "transfer.csv"),
                               "--covariance-from", str(check / "covariance.npz"))) == 0
    np.testing.assert_allclose(Bandpowers.read_csv(out).cl_err, np.sqrt(np.diag(cov.matrix)), rtol=1e-12)
    capsys.readouterr()
    refused = tmp_path / "refused.csv"
    assert main(_spectrum_args(files, refused, "--covariance-from", str(check / "covariance.npz"))) == 2
    err = capsys.readouterr().err
    assert "the covariance is of bandpowers divided by a transfer function" in err and err.count("\n") == 1
    assert not refused.exists()


@pytest.mark.parametrize("suffix", [".npz", ".fits"])
def test_a_corrected_covariance_file_keeps_its_transfer_key_and_needs_that_table(files, tmp_path, capsys, suffix):
    # `spectrum --transfer --covariance` writes the covariance of corrected bandpowers; read back (npz or FITS)
    # it is used with the same table only (the FITS reader once dropped the key, and with it this guard)
    bins = dict(ell_min=[2, 10, 18, 26, 34], ell_max=[9, 17, 25, 33, 40], ell_eff=[5.5, 13.5, 21.5, 29.5, 37.0])
    table = BandpowerTransfer(**bins, transfer=[0.4, 0.8, 0.9, 0.95, 1.0]).write_csv(tmp_path / "t.csv")
    other = BandpowerTransfer(**bins, transfer=[0.5, 0.8, 0.9, 0.95, 1.0]).write_csv(tmp_path / "t2.csv")
    cov_path = tmp_path / f"cov{suffix}"
    assert main(_spectrum_args(files, tmp_path / "a.csv", "--transfer", str(table), "--covariance", str(cov_path))) == 0
    cov = read_covariance(cov_path)
    assert cov.settings["bandpower_transfer_key"] == BandpowerTransfer.read_csv(table).key
    capsys.readouterr()
    out = tmp_path / "b.csv"
    for extra in ((), ("--transfer", str(other))):
        assert main(_spectrum_args(files, out, "--covariance-from", str(cov_path), *extra)) == 2
        err = capsys.readouterr().err
        assert "the covariance is of bandpowers divided by a transfer function" in err and err.count("\n") == 1
        assert str(cov_path) in err and not out.exists()
    assert main(_spectrum_args(files, out, "--covariance-from", str(cov_path), "--transfer", str(table))) == 0
    np.testing.assert_allclose(Bandpowers.read_csv(out).cl_err, np.sqrt(np.diag(cov.matrix)), rtol=1e-12)
