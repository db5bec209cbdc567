"""The ``cmbtools validate`` command, run in-process through cmbtools.cli.main on nside-16 files."""

from __future__ import annotations

import json
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

from cmbtools.simulate import validate_estimator
from cmbtools.cli import main
from cmbtools.maps import cap_mask, write_sky_map, write_mask
from cmbtools.simulate import NoiseModel
from cmbtools.spectrum import Binning, SpectrumEstimator

NSIDE = 16
LMAX = 40


def _spectrum(lmax):
    ell = np.arange(lmax + 1)
    return np.where(ell >= 2, 1e-10 * 1000.0 / (ell + 10.0) ** 2, 0.0)


@pytest.fixture
def files(tmp_path):
    mask = cap_mask(NSIDE, 0.0, 90.0, 120.0)
    write_mask(tmp_path / "mask.fits", mask)
    cl = _spectrum(60)
    lines = ["# unit: K^2", "ell,cl"] + [f"{ell},{v:.17g}" for ell, v in enumerate(cl)]
    (tmp_path / "model.csv").write_text("\n".join(lines) + "\n")
    return tmp_path, mask


def _args(tmp, *extra):
    return [
        "validate", str(tmp / "mask.fits"), "--lmax", str(LMAX), "--bin-width", "8", "--beam-fwhm", "30",
        "--noise-depth", "30", "--spectrum", str(tmp / "model.csv"), "--no-progress", *extra,
    ]


def test_validate_writes_outputs_matches_the_library_and_resumes(files, capsys, monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    tmp, mask = files
    run_dir = tmp / "run"
    assert main(_args(tmp, "--sims", "6", "--seed", "4", "--workers", "1", "--run-dir", str(run_dir))) == 0
    out = capsys.readouterr().out
    assert "validated the spectrum estimator on 6 simulations (seed 4) on 1 local worker process" in out
    assert "max |bias|" in out and "scatter / error" in out
    # the skies go to 4 nside - 1 = 63 by default, but the --spectrum table stops at ell 60: its end it is
    assert f"input: {tmp / 'model.csv'} (sha256 " in out and "...) to ell 60; beam" in out
    for name in ("summary.csv", "summary.json", "validation.png", "run.json", "covariance.npz"):
        assert (run_dir / name).is_file()
    assert len(list(run_dir.glob("sim_*.npz"))) == 6
    doc = json.loads((run_dir / "summary.json").read_text())
    assert doc["n_sims"] == 6 and doc["seed"] == 4 and doc["settings"]["pixel_window"] == "yes"
    assert set(doc) >= {"n_sims", "max_abs_bias_sigma", "median_error_ratio", "min_error_ratio", "max_error_ratio"}
    ratios = np.array(doc["bins"]["error_ratio"])
    assert doc["min_error_ratio"] == pytest.approx(ratios.min(), rel=1e-12)
    assert doc["max_error_ratio"] == pytest.approx(ratios.max(), rel=1e-12)
    from cmbtools.spectrum import read_covariance

    simulated = read_covariance(run_dir / "covariance.npz")
    assert simulated.kind == "simulation" and simulated.n_sims == 6
    np.testing.assert_allclose(np.sqrt(np.diag(simulated.matrix)), np.array(doc["bins"]["std"]), rtol=1e-9)

    # the same run through the library, on threads: the same numbers
    # (the command injects a 100 uK monopole and a 3 mK dipole, uses the input spectrum as the guess, and
    # simulates and models the skies to the end of that spectrum, ell 60; without --pixelise its skies are
    # sampled at the pixel centres and so is its model, averaged_pixels=False)
    from cmbtools.simulate import Dipole

    est = SpectrumEstimator(mask, Binning.uniform(2, LMAX, 8), lmax=LMAX, beam=30.0, guess_cl=_spectrum(60),
                            sky_lmax=60, averaged_pixels=False)
    with ThreadPoolExecutor(2) as pool:
        ref = validate_estimator(est, _spectrum(60), n_sims=6, seed=4, noise=NoiseModel(30.0), executor=pool,
                                 progress=False, monopole=100e-6, dipole=Dipole(3e-3, 60.0, 30.0), sky_lmax=60)
    np.testing.assert_allclose(doc["bins"]["mean"], ref.mean, rtol=1e-12)
    np.testing.assert_allclose(doc["bins"]["bias_sigma"], ref.bias_sigma, rtol=1e-9, atol=1e-12)
    assert doc["max_abs_bias_sigma"] == pytest.approx(ref.summary()["max_abs_bias_sigma"], rel=1e-9)
    lines = (run_dir / "summary.csv").read_text().splitlines()
    body = [ln for ln in lines if not ln.startswith("#")]
    assert body[0].startswith("ell_min,ell_max,ell_eff,expected,mean,std")
    table = np.array([[float(v) for v in ln.split(",")] for ln in body[1:]])
    np.testing.assert_allclose(table[:, 4], ref.mean * 1e12, rtol=1e-9)  # uK^2

    # the same command with more simulations resumes: the 6 records stay as they are
    before = (run_dir / "sim_000003.npz").read_bytes()
    assert main(_args(tmp, "--sims", "9", "--seed", "4", "--workers", "2", "--run-dir", str(run_dir))) == 0
    out = capsys.readouterr().out
    assert "resumed 6 finished simulations" in out and "ran 3" in out
    assert (run_dir / "sim_000003.npz").read_bytes() == before
    assert json.loads((run_dir / "summary.json").read_text())["n_sims"] == 9


def test_validate_refuses_another_run_unless_restarted(files, capsys, monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    tmp, _ = files
    run_dir = tmp / "run"
    common = ("--sims", "3", "--workers", "1", "--run-dir", str(run_dir))
    assert main(_args(tmp, "--seed", "1", *common)) == 0
    capsys.readouterr()
    assert main(_args(tmp, "--seed", "2", *common)) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "seed 1, this call uses seed 2" in err and "--restart" in err
    assert main(_args(tmp, "--seed", "2", "--restart", *common)) == 0
    assert json.loads((run_dir / "run.json").read_text())["seed"] == 2


def test_validate_bad_inputs_exit_2_before_any_work(files, capsys):
    tmp, mask = files
    run_dir = tmp / "never"
    cases = [
        (["validate", str(tmp / "missing.fits"), "--run-dir", str(run_dir)], "no such file"),
        (["validate", str(tmp / "mask.fits"), "--hits", str(tmp / "mask.fits"), "--run-dir", str(run_dir)],
         "--hits needs --noise-depth"),
        (_args(tmp, "--noise-knee", "30", "--run-dir", str(run_dir)), "given together"),
        (_args(tmp, "--sims", "1", "--run-dir", str(run_dir)), "at least 2"),
        (_args(tmp, "--figure", str(tmp / "fig.jpg"), "--run-dir", str(run_dir)), ".png or .pdf"),
        (_args(tmp, "--run-dir", str(tmp / "no" / "such")), "does not exist"),
    ]
    (tmp / "exists.csv").write_text("x\n")
    cases.append((_args(tmp, "--table", str(tmp / "exists.csv"), "--run-dir", str(run_dir)), "output exists"))
    for argv, message in cases:
        assert main(argv) == 2, argv
        err = capsys.readouterr().err.strip()
        assert len(err.splitlines()) == 1 and message in err, err
    assert not run_dir.exists()  # nothing was started
    # a hits map that misses part of the mask is an input error too
    hits = np.ones(12 * NSIDE**2)
    hits[mask > 0.5] = 0.0
    write_sky_map(tmp / "hits.fits", hits, unit=None)
    assert main(_args(tmp, "--hits", str(tmp / "hits.fits"), "--run-dir", str(run_dir))) == 2
    assert "hits map does not cover" in capsys.readouterr().err
    # --workers and --scheduler exclude each other (argparse: exit 2)
    with pytest.raises(SystemExit) as info:
        main(_args(tmp, "--workers", "2", "--scheduler", "tcp://127.0.0.1:1"))
    assert info.value.code == 2


@pytest.mark.slow
def test_validate_default_fiducial_spectrum(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    write_mask(tmp_path / "mask.fits", cap_mask(NSIDE, 0.0, 90.0, 120.0))
    argv = ["validate", str(tmp_path / "mask.fits"), "--lmax", "40", "--bin-width", "10", "--sims", "4",
            "--seed", "9", "--workers", "1", "--keep-monopole-dipole", "--no-pixel-window", "--no-progress",
            "--run-dir", str(tmp_path / "run"), "--figure", str(tmp_path / "fig.pdf"), "--unit", "K"]
    assert main(argv) == 0
    out = capsys.readouterr().out
    assert "input: built-in fiducial spectrum" in out and "beam: none" in out
    doc = json.loads((tmp_path / "run" / "summary.json").read_text())
    assert doc["settings"]["pixel_window"] == "no" and doc["settings"]["input_spectrum"] == (
        "built-in fiducial spectrum (cmbtools' model with astropy's Planck18 parameters)")
    assert (tmp_path / "fig.pdf").read_bytes()[:5] == b"%PDF-"
    assert "# unit: K^2" in (tmp_path / "run" / "summary.csv").read_text()


@pytest.mark.parametrize("extra, skies, model", [
    ((), "sampled at the pixel centres", "pixel centres"),
    (("--pixelise",), "averaged over each pixel", "averaged pixels"),
    (("--pixelise", "--pixel-centre-maps"), "averaged over each pixel", "pixel centres"),
    (("--averaged-pixels",), "sampled at the pixel centres", "averaged pixels"),
])
def test_validate_models_the_pixels_of_its_skies_unless_told(files, capsys, monkeypatch, extra, skies, model):
    # the estimator's model follows the simulated skies (averaged with --pixelise, pixel centres without), either
    # option overrides it, and the summary says which; the bandpowers differ by the averaged-pixel correction
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    tmp, _ = files
    run_dir = tmp / ("run" + "".join(extra))
    assert main(_args(tmp, "--sims", "2", "--seed", "1", "--workers", "1", "--run-dir", str(run_dir), *extra)) == 0
    out = capsys.readouterr().out
    line = [ln for ln in out.splitlines() if ln.startswith("  pixels: ")]
    assert len(line) == 1 and f"skies {skies};" in line[0] and f"estimator's model: {model}" in line[0], out


def test_validate_pixel_options_exclude_each_other(files, capsys):
    tmp, _ = files
    with pytest.raises(SystemExit) as err:
        main(_args(tmp, "--sims", "2", "--averaged-pixels", "--pixel-centre-maps"))
    assert err.value.code == 2
    assert "not allowed with argument" in capsys.readouterr().err
