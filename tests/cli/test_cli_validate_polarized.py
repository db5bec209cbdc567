"""``cmbtools validate --polarized``, run in-process through cmbtools.cli.main on nside-16 files."""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from cmbtools.cli import main
from cmbtools.maps import apodize_mask, cap_mask, write_mask
from cmbtools.simulate import write_spectrum_table

NSIDE = 16
SIX = ("TT", "TE", "TB", "EE", "EB", "BB")


@pytest.fixture
def files(tmp_path):
    mask = apodize_mask(cap_mask(NSIDE, 0.0, 90.0, 70.0), 10.0, nthreads=1)
    write_mask(tmp_path / "mask.fits", mask)
    write_mask(tmp_path / "pol_mask.fits", apodize_mask(cap_mask(NSIDE, 0.0, 90.0, 55.0), 10.0, nthreads=1))
    ell = np.arange(80.0)
    base = np.where(ell >= 2, 1e-10 * 100.0 / (ell + 10.0) ** 2, 0.0)
    write_spectrum_table(tmp_path / "pol.csv", {"TT": base, "EE": 0.2 * base, "BB": 0.01 * base, "TE": 0.25 * base})
    write_spectrum_table(tmp_path / "short.csv", {k: v[:30] for k, v in
                                                  {"TT": base, "EE": 0.2 * base, "BB": 0.01 * base,
                                                   "TE": 0.25 * base}.items()})
    return tmp_path


def _args(tmp, *extra):
    return ["validate", str(tmp / "mask.fits"), "--polarized", "--lmax", "40", "--bin-width", "8",
            "--beam-fwhm", "90", "--noise-depth", "30", "--no-progress", *extra]


def test_polarized_validate_writes_six_spectra(files, capsys, monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    run_dir = files / "run"
    code = main(_args(files, "--pol-mask", str(files / "pol_mask.fits"), "--spectrum", str(files / "pol.csv"),
                      "--sky-lmax", "63", "--sims", "5", "--seed", "3", "--workers", "1", "--run-dir", str(run_dir)))
    assert code == 0
    out = capsys.readouterr().out
    assert "validated the polarized spectrum estimator on 5 simulations (seed 3)" in out
    for s in SIX:
        assert f"    {s}: max |bias|" in out
    for name in ("summary.csv", "summary.json", "validation.png"):
        assert (run_dir / name).is_file()
    doc = json.loads((run_dir / "summary.json").read_text())
    assert doc["n_sims"] == 5 and doc["seed"] == 3 and set(doc["spectra"]) == set(SIX)
    worst = max(doc["spectra"][s]["max_abs_bias_sigma"] for s in SIX)
    assert doc["max_abs_bias_sigma"] == pytest.approx(worst, rel=1e-12)
    for s in SIX:
        ratios = np.array(doc["bins"][s]["error_ratio"])
        assert doc["spectra"][s]["min_error_ratio"] == pytest.approx(ratios.min(), rel=1e-12)
        assert doc["spectra"][s]["max_error_ratio"] == pytest.approx(ratios.max(), rel=1e-12)
    assert doc["settings"]["pol_mask_file"].endswith("pol_mask.fits") and doc["settings"]["sky_lmax"] == 63
    lines = [ln for ln in (run_dir / "summary.csv").read_text().splitlines() if not ln.startswith("#")]
    rows = list(csv.DictReader(lines))
    assert rows[0].keys() >= {"spectrum", "ell_min", "bias_sigma", "error_ratio"}
    assert sorted({r["spectrum"] for r in rows}) == sorted(SIX) and len(rows) == 6 * 5
    # the same command again resumes the five records
    assert main(_args(files, "--pol-mask", str(files / "pol_mask.fits"), "--spectrum", str(files / "pol.csv"),
                      "--sky-lmax", "63", "--sims", "5", "--workers", "1", "--run-dir", str(run_dir))) == 0
    assert "resumed 5 finished simulations" in capsys.readouterr().out


@pytest.mark.parametrize("extra, message", [
    (("--pol-mask", "{tmp}/pol_mask.fits"), "--pol-mask needs --polarized"),
    (("--purify-b",), "--purify-b needs --polarized"),
    (("--polarized", "--fast-coupling"), "--fast-coupling is not available with --polarized"),
    (("--polarized", "--harmonic-filter", "{tmp}/pol.csv"), "one 'factor' column (found ell,cl_tt_k2"),
    (("--polarized", "--tensor-ratio", "0.1", "--spectrum", "{tmp}/pol.csv"), "cannot be combined with --spectrum"),
    (("--polarized", "--tensor-ratio", "-1"), "--tensor-ratio must be in [0, 10]"),
    (("--polarized", "--spectrum", "{tmp}/short.csv"), "stops at ell=29"),
    (("--polarized", "--lmin", "0"), "polarized spectra need bins from ell >= 2"),
])
def test_polarized_validate_bad_inputs_exit_2_and_write_nothing(files, capsys, extra, message):
    run_dir = files / "run"
    args = ["validate", str(files / "mask.fits"), "--lmax", "40", "--bin-width", "8", "--no-progress",
            "--sims", "3", "--run-dir", str(run_dir)] + [e.format(tmp=files) for e in extra]
    assert main(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0], err
    assert not run_dir.exists()


@pytest.mark.parametrize("extra, skies, model", [
    ((), "sampled at the pixel centres", "pixel centres"),
    (("--pixelise",), "averaged over each pixel", "averaged pixels"),
    (("--pixelise", "--pixel-centre-maps"), "averaged over each pixel", "pixel centres"),
])
def test_polarized_validate_models_the_pixels_of_its_skies_unless_told(files, capsys, monkeypatch, extra, skies,
                                                                       model):
    # as for temperature: the estimator's model follows the skies (averaged with --pixelise), an option overrides it
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    run_dir = files / ("run" + "".join(extra))
    assert main(_args(files, "--sims", "2", "--seed", "1", "--workers", "1", "--run-dir", str(run_dir), *extra)) == 0
    out = capsys.readouterr().out
    line = [ln for ln in out.splitlines() if ln.startswith("  pixels: ")]
    assert len(line) == 1 and f"skies {skies};" in line[0] and f"estimator's model: {model}" in line[0], out
