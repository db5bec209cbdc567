"""The polarized Monte Carlo validation: its per-spectrum headline numbers, recomputed from the records on disk
with the standard library, a hand-made case with known answers, and the checks of its inputs (fast, nside 16)."""

from __future__ import annotations

import csv
import json
import math
from concurrent.futures import ThreadPoolExecutor

import healpy as hp
import numpy as np
import pytest

from cmbtools import maps
from cmbtools.exceptions import InvalidInputError
from cmbtools.simulate import (
    Dipole, NoiseModel, PolarizedValidationResult, validate_estimator, validate_polarized_estimator,
)
from cmbtools.spectrum import Binning, PolarizedSpectrumEstimator

NSIDE, LMAX, N_SIMS, FWHM = 16, 40, 16, 90.0
SIX = ("TT", "TE", "TB", "EE", "EB", "BB")


def _spectra(lmax):
    """Invented smooth spectra (K^2) with TE correlation and BB at 5% of EE."""
    ell = np.arange(lmax + 1.0)
    base = np.where(ell >= 2, 1e-10 * 100.0 / (ell + 10.0) ** 2, 0.0)
    return {"TT": base, "EE": 0.2 * base, "BB": 0.01 * base, "TE": 0.25 * base}


def _mask():
    cap = maps.cap_mask(NSIDE, 40.0, 30.0, 60.0) * maps.disc_mask(NSIDE, [(50.0, 35.0)], radius_deg=8.0)
    return maps.apodize_mask(cap, 12.0, nthreads=1)


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """Skies as real maps are: power to 4 nside - 1 averaged from a finer grid, monopole and dipole,
    noise shaped by hits (Q, U sqrt(2) noisier), a tapered cap with a hole."""
    run_dir = tmp_path_factory.mktemp("polval") / "run"
    mask = _mask()
    z = hp.pix2vec(NSIDE, np.arange(12 * NSIDE**2))[2]
    hits = 1.0 + 0.6 * z + 0.5
    est = PolarizedSpectrumEstimator(mask, Binning.uniform(2, LMAX, 8), beam=FWHM, nthreads=1)
    spectra = _spectra(8 * NSIDE - 1)
    with ThreadPoolExecutor(1) as pool:
        result = validate_estimator(
            est, spectra, n_sims=N_SIMS, seed=11, noise=NoiseModel(40.0, hits=hits), monopole=1e-4,
            dipole=Dipole(3e-3, 60.0, 30.0), sky_lmax=4 * NSIDE - 1, sky_beam=FWHM, pixelise=True,
            run_dir=run_dir, executor=pool, progress=False,
        )
    return est, spectra, run_dir, result


def _records(run_dir):
    files = sorted(run_dir.glob("sim_*.npz"))
    assert len(files) == N_SIMS
    cls, errs = [], []
    for f in files:
        with np.load(f, allow_pickle=False) as z:
            cls.append(z["cl"])
            errs.append(z["cl_err"])
    return np.array(cls), np.array(errs)


def _stats(column, errors, expected):
    """mean, std (ddof 1), bias in standard errors, scatter / mean reported error: the documented definitions."""
    n = len(column)
    mean = math.fsum(column) / n
    std = math.sqrt(math.fsum((v - mean) ** 2 for v in column) / (n - 1))
    return (mean - expected) / (std / math.sqrt(n)), std / (math.fsum(errors) / n)


def test_per_spectrum_fields_match_an_independent_computation_from_the_records(run, tmp_path):
    est, spectra, run_dir, result = run
    assert isinstance(result, PolarizedValidationResult)
    samples, errors = _records(run_dir)
    assert samples.shape == (N_SIMS, 6, est.binning.n_bins)
    expected = est.expected_bandpowers({k: v[: est.lmax + 1] for k, v in spectra.items()})
    summary = result.summary()
    doc = json.loads(result.write_json(tmp_path / "summary.json").read_text())
    all_bias, all_ratio = [], []
    for i, s in enumerate(SIX):
        bias, ratio = zip(*(_stats([float(v) for v in samples[:, i, b]], [float(v) for v in errors[:, i, b]],
                                   float(expected[s][b])) for b in range(samples.shape[2])))
        all_bias += bias
        all_ratio += ratio
        want = {
            "max_abs_bias_sigma": max(abs(v) for v in bias),
            "rms_bias_sigma": math.sqrt(math.fsum(v * v for v in bias) / len(bias)),
            "min_error_ratio": min(ratio),
            "max_error_ratio": max(ratio),
            "median_error_ratio": float(np.median(ratio)),
        }
        for key, value in want.items():
            # agreement to rounding (different summation orders)
            assert summary["spectra"][s][key] == pytest.approx(value, rel=1e-10), (s, key)
            assert doc["spectra"][s][key] == pytest.approx(value, rel=1e-10), (s, key)
        np.testing.assert_allclose(doc["bins"][s]["bias_sigma"], bias, rtol=1e-10)
    assert summary["max_abs_bias_sigma"] == pytest.approx(max(abs(v) for v in all_bias), rel=1e-10)
    assert summary["min_error_ratio"] == pytest.approx(min(all_ratio), rel=1e-10)
    assert summary["max_error_ratio"] == pytest.approx(max(all_ratio), rel=1e-10)
    # TB and EB are expected to be zero: no transfer; the others have one
    for s in ("TB", "EB"):
        assert summary["spectra"][s]["median_transfer"] is None and doc["spectra"][s]["median_transfer"] is None
    for s in ("TT", "EE"):
        assert 0.5 < summary["spectra"][s]["median_transfer"] < 1.5
    assert doc["n_sims"] == N_SIMS and doc["seed"] == 11 and doc["unit"] == "K^2"
    assert doc["settings"]["pixelised"].startswith("yes") and doc["settings"]["sky_lmax"] == 4 * NSIDE - 1


def test_the_table_has_one_row_per_spectrum_and_bin(run, tmp_path):
    est, spectra, run_dir, result = run
    path = result.write_csv(tmp_path / "summary.csv", unit="K")
    lines = [ln for ln in path.read_text().splitlines() if not ln.startswith("#")]
    rows = list(csv.DictReader(lines))
    nb = est.binning.n_bins
    assert len(rows) == 6 * nb
    assert [r["spectrum"] for r in rows] == [s for s in SIX for _ in range(nb)]
    samples, _ = _records(run_dir)
    for i, s in enumerate(SIX):
        got = [float(r["mean"]) for r in rows if r["spectrum"] == s]
        np.testing.assert_allclose(got, samples[:, i, :].mean(axis=0), rtol=1e-9)  # written with 10 digits
    header = [ln for ln in path.read_text().splitlines() if ln.startswith("# BB:")]
    assert len(header) == 1 and "max_abs_bias_sigma" in header[0]


def test_hand_made_samples_give_the_known_numbers(tmp_path):
    """Three simulations per bin at expected + (-1, 0, 1) x d + shift: mean = expected + shift, std = d,
    bias = shift / (d / sqrt 3); each spectrum gets its own shift and reported error, so a field filled from
    the wrong spectrum, the wrong bin or with another ddof gives another number."""
    nb = 4
    expected = np.arange(1.0, 1.0 + 6 * nb).reshape(6, nb)
    d = 0.5
    shift = np.zeros((6, nb))
    shift[5, 2] = 2.0 * d / math.sqrt(3.0)  # BB, bin 2: bias exactly 2
    shift[1, 0] = -1.0 * d / math.sqrt(3.0)  # TE, bin 0: bias exactly -1
    err = np.full((6, nb), d)
    err[3] = 2 * d  # EE reports twice the scatter: ratio 0.5
    err[4, 1] = d / 4  # EB bin 1 reports a quarter: ratio 4
    samples = np.stack([expected + shift + k * d for k in (-1.0, 0.0, 1.0)])
    errors = np.stack([err] * 3)
    res = PolarizedValidationResult.from_samples(samples, errors, expected, ell_min=[2, 10, 20, 30],
                                                 ell_max=[9, 19, 29, 39], ell_eff=[5.5, 14.5, 24.5, 34.5])
    s = res.summary()
    assert s["max_abs_bias_sigma"] == pytest.approx(2.0, rel=1e-12)
    assert s["spectra"]["BB"]["max_abs_bias_sigma"] == pytest.approx(2.0, rel=1e-12)
    assert s["spectra"]["TE"]["max_abs_bias_sigma"] == pytest.approx(1.0, rel=1e-12)
    assert s["spectra"]["TT"]["max_abs_bias_sigma"] == pytest.approx(0.0, abs=1e-12)
    assert s["spectra"]["BB"]["rms_bias_sigma"] == pytest.approx(math.sqrt(4.0 / nb), rel=1e-12)
    assert s["spectra"]["EE"]["max_error_ratio"] == pytest.approx(0.5, rel=1e-12)
    assert s["spectra"]["EB"]["max_error_ratio"] == pytest.approx(4.0, rel=1e-12)
    assert s["spectra"]["EB"]["min_error_ratio"] == pytest.approx(1.0, rel=1e-12)
    assert s["min_error_ratio"] == pytest.approx(0.5, rel=1e-12) and s["max_error_ratio"] == pytest.approx(4.0)
    assert s["spectra"]["BB"]["median_transfer"] == pytest.approx(1.0, rel=1e-12)  # the median of 1, 1, 1, 1.03
    assert res.worst_bin() == ("BB", 2)
    doc = json.loads(res.write_json(tmp_path / "s.json").read_text())
    assert doc["bins"]["BB"]["bias_sigma"][2] == pytest.approx(2.0, rel=1e-12)
    assert doc["bins"]["TE"]["bias_sigma"][0] == pytest.approx(-1.0, rel=1e-12)
    res.plot(tmp_path / "s.png")
    assert (tmp_path / "s.png").stat().st_size > 10_000


def test_bad_inputs_are_refused_before_any_simulation(tmp_path):
    mask = _mask()
    est = PolarizedSpectrumEstimator(mask, Binning.uniform(2, LMAX, 8), beam=FWHM, nthreads=1)
    spectra = _spectra(4 * NSIDE - 1)
    run_dir = tmp_path / "never"
    with pytest.raises(InvalidInputError, match="sky_beam"):  # the estimator holds its beam to lmax only
        validate_polarized_estimator(est, spectra, n_sims=2, sky_lmax=4 * NSIDE - 1, run_dir=run_dir)
    with pytest.raises(InvalidInputError, match="does not match"):
        validate_polarized_estimator(est, spectra, n_sims=2, sky_lmax=4 * NSIDE - 1, sky_beam=60.0, run_dir=run_dir)
    hits = np.ones(12 * NSIDE**2)
    hits[mask > 0] = 0.0
    with pytest.raises(InvalidInputError, match="hits map does not cover"):
        validate_polarized_estimator(est, spectra, n_sims=2, noise=NoiseModel(30.0, hits=hits), run_dir=run_dir)
    with pytest.raises(InvalidInputError, match="not available for a polarized estimator"):
        validate_estimator(est, spectra, n_sims=2, errors="knox", run_dir=run_dir)
    assert not run_dir.exists()
