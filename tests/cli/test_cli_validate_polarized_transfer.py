"""The polarized transfer-function round trip through the commands (MASTER's treatment of filtering, Hivon et
al. 2002, ApJ 567, 2): `validate --polarized --harmonic-filter` measures F_b per spectrum and bin,
`validate --polarized --transfer` divides it out of independent simulations, and the covariance of corrected
bandpowers (npz or FITS, temperature or I, Q, U) is used only with the same transfer table."""

from __future__ import annotations

import json

import numpy as np
import pytest

from cmbtools.cli import main
from cmbtools.maps import apodize_mask, cap_mask, write_mask
from cmbtools._core.tables import write_text_table
from cmbtools.simulate import write_spectrum_table
from cmbtools.spectrum import SPECTRA, PolarizedBandpowers, PolarizedBandpowerTransfer, read_covariance

NSIDE, LMAX, N_SIMS = 16, 40, 10
AUTO = ("TT", "EE", "BB")


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    d = tmp_path_factory.mktemp("polfilter")
    write_mask(d / "mask.fits", apodize_mask(cap_mask(NSIDE, 0.0, 90.0, 70.0), 10.0, nthreads=1))
    ell = np.arange(4 * NSIDE, dtype=float)
    base = np.where(ell >= 2, 1e-10 * 100.0 / (ell + 10.0) ** 2, 0.0)
    write_spectrum_table(d / "pol.csv", {"TT": base, "EE": 0.2 * base, "BB": 0.05 * base, "TE": 0.25 * base})
    high_pass = np.zeros(ell.size)
    high_pass[1:] = 1.0 / np.sqrt(1.0 + (12.0 / ell[1:]) ** 4)
    write_text_table(d / "high_pass.csv", ("ell", "factor"), [(str(i), repr(float(v))) for i, v in enumerate(high_pass)])
    common = ["validate", str(d / "mask.fits"), "--polarized", "--lmax", str(LMAX), "--bin-width", "8",
              "--beam-fwhm", "90", "--spectrum", str(d / "pol.csv"), "--sky-lmax", str(4 * NSIDE - 1),
              "--harmonic-filter", str(d / "high_pass.csv"), "--sims", str(N_SIMS), "--workers", "1", "--no-progress"]
    mp = pytest.MonkeyPatch()
    mp.setenv("CMBTOOLS_NUM_THREADS", "1")
    try:
        assert main(common + ["--seed", "2", "--run-dir", str(d / "measure")]) == 0
        assert main(common + ["--seed", "3", "--run-dir", str(d / "check"), "--transfer",
                              str(d / "measure" / "transfer.csv")]) == 0
    finally:
        mp.undo()
    return d, common


def test_the_filter_is_measured_per_spectrum_and_undone_on_independent_skies(runs, capsys):
    d, _ = runs
    first = PolarizedBandpowerTransfer.read_csv(d / "measure" / "transfer.csv")
    assert first.metadata["harmonic_filter_file"] == str(d / "high_pass.csv")
    for s in AUTO:  # the high-pass removes most of the first bin (ell 2-9) of every field's power
        assert first.transfer[SPECTRA.index(s), 0] < 0.5, s
    doc = json.loads((d / "check" / "summary.json").read_text())
    assert doc["settings"]["bandpower_transfer_key"] == first.key
    second = PolarizedBandpowerTransfer.read_csv(d / "check" / "transfer.csv")
    for i, s in enumerate(SPECTRA):
        left = np.array(doc["bins"][s]["transfer"], dtype=float)
        if s in ("TB", "EB"):  # their expectation is zero: not measured
            assert np.all(np.isnan(second.transfer[i])) and np.all(np.isnan(first.transfer[i]))
            continue
        # transfer.csv of the corrected run holds the whole F_b again: what is left times what was divided out
        np.testing.assert_allclose(second.transfer[i], left * first.factors[i], rtol=1e-9)
        # what is left is 1 within the Monte Carlo errors of both runs (4 standard errors, every bin)
        err = np.hypot(second.transfer_error[i] / second.transfer[i], first.transfer_error[i] / first.transfer[i])
        assert np.all(np.abs(left - 1.0) < 4.0 * err * left), (s, left, err)
        # the check is not empty: without the correction (what is left = F_b) the first bin would fail it
        f0 = first.transfer[i, 0]
        assert abs(f0 - 1.0) > 4.0 * err[0] * f0, (s, f0, err[0])
    cov = read_covariance(d / "check" / "covariance.npz")
    assert cov.settings["bandpower_transfer_key"] == first.key and cov.spectra == SPECTRA


def _spectrum(d, out, *extra):
    return main(["spectrum", str(d / "iqu.fits"), "--mask", str(d / "mask.fits"), "--lmax", str(LMAX),
                 "--bin-width", "8", "--beam-fwhm", "90", "--threads", "1", "-o", str(out), *extra])


def test_a_corrected_covariance_needs_its_transfer_table_npz_and_fits(runs, tmp_path, capsys, monkeypatch):
    d, _ = runs
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    assert main(["simulate", "--nside", str(NSIDE), "--polarized", "--spectrum", str(d / "pol.csv"), "--seed",
                 "4", "--beam-fwhm", "90", "--noise-depth", "30", "--output-dir", str(tmp_path), "--prefix", "iqu",
                 "--threads", "1"]) == 0
    (tmp_path / "iqu_0000.fits").rename(d / "iqu.fits")
    measure, check = d / "measure" / "transfer.csv", d / "check" / "covariance.npz"
    # the covariance of `validate --transfer`: taken as it is with the same table, and written back as FITS
    out = tmp_path / "with.csv"
    assert _spectrum(d, out, "--transfer", str(measure), "--covariance-from", str(check),
                     "--covariance", str(tmp_path / "corrected.fits")) == 0
    bp, cov = PolarizedBandpowers.read_csv(out), read_covariance(check)
    np.testing.assert_allclose(bp.cl_err.ravel(), np.sqrt(np.diag(cov.matrix)), rtol=1e-12)
    key = PolarizedBandpowerTransfer.read_csv(measure).key
    back = read_covariance(tmp_path / "corrected.fits")
    assert back.settings == cov.settings and back.settings["bandpower_transfer_key"] == key
    np.testing.assert_array_equal(back.matrix, cov.matrix)
    # another table (the check run's whole F_b: other factors) or none: one line, exit 2, nothing written
    capsys.readouterr()
    refused = tmp_path / "refused.csv"
    for cov_file in (check, tmp_path / "corrected.fits"):
        for extra in ((), ("--transfer", str(d / "check" / "transfer.csv"))):
            assert _spectrum(d, refused, "--covariance-from", str(cov_file), *extra) == 2
            err = capsys.readouterr().err.strip().splitlines()
            assert len(err) == 1 and "the covariance is of bandpowers divided by a transfer function" in err[0], err
            assert f"(key {key})" in err[0] and str(cov_file) in err[0]
            assert not refused.exists()


def test_polarized_validate_refuses_a_temperature_transfer_table_and_a_short_filter(runs, tmp_path, capsys):
    d, common = runs
    t_table = tmp_path / "t.csv"
    t_table.write_text("ell_min,ell_max,transfer\n2,9,0.5\n10,17,0.9\n18,25,1\n26,33,1\n34,40,1\n")
    short = tmp_path / "short.csv"
    write_text_table(short, ("ell", "factor"), [(str(i), "1") for i in range(50)])
    other_bins = tmp_path / "other.csv"
    f = PolarizedBandpowerTransfer.read_csv(d / "measure" / "transfer.csv")
    PolarizedBandpowerTransfer(f.ell_min[:3], f.ell_max[:3], f.ell_eff[:3], f.transfer[:, :3],
                               f.transfer_error[:, :3]).write_csv(other_bins)
    base = [a for a in common if a not in ("--harmonic-filter", str(d / "high_pass.csv"))]
    for extra, message in ((("--transfer", str(t_table)), "has no 'spectrum' column: it is a temperature transfer"),
                           (("--harmonic-filter", str(short)), "stops at ell=49; the skies go to ell=63"),
                           (("--transfer", str(other_bins)), "other bins than the validation")):
        run = tmp_path / "run"
        assert main(base + ["--run-dir", str(run), *extra]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and message in err[0], err
        assert not run.exists()
