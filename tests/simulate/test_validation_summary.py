"""The headline numbers of a validation run, recomputed from the per-simulation records on disk (fast, nside 16)."""

from __future__ import annotations

import json
import math
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

from cmbtools import maps
from cmbtools.simulate import NoiseModel, validate_estimator
from cmbtools.spectrum import Binning, SpectrumEstimator

NSIDE, LMAX, N_SIMS = 16, 47, 12


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    run_dir = tmp_path_factory.mktemp("validation") / "run"
    mask = maps.apodize_mask(maps.cap_mask(NSIDE, 10.0, 30.0, 80.0), 10.0, nthreads=1)
    est = SpectrumEstimator(mask, Binning.uniform(2, LMAX, 8), pixel_window=False, nthreads=1)
    ell = np.arange(LMAX + 1)
    cl = np.where(ell >= 2, 1e-10 * (10.0 / (ell + 10.0)) ** 2, 0.0)
    with ThreadPoolExecutor(1) as pool:
        result = validate_estimator(est, cl, n_sims=N_SIMS, seed=5, noise=NoiseModel(40.0), run_dir=run_dir,
                                    executor=pool, progress=False, errors="knox")  # the records' own cl_err
    return est, cl, run_dir, result


def _records(run_dir):
    """cl and cl_err of every simulation, read with numpy alone from the sim_NNNNNN.npz files."""
    files = sorted(run_dir.glob("sim_*.npz"))
    assert len(files) == N_SIMS
    cls, errs = [], []
    for f in files:
        with np.load(f, allow_pickle=False) as z:
            cls.append(z["cl"])
            errs.append(z["cl_err"])
    return np.array(cls), np.array(errs)


def test_summary_fields_match_an_independent_computation_from_the_records(run, tmp_path):
    est, cl, run_dir, result = run
    samples, errors = _records(run_dir)
    expected = est.expected_bandpowers(cl)
    # the definitions of the documented fields, written out here with the standard library's statistics
    n = N_SIMS
    rms_terms, ratios = [], []
    for b in range(samples.shape[1]):
        column = [float(v) for v in samples[:, b]]
        mean = math.fsum(column) / n
        std = math.sqrt(math.fsum((v - mean) ** 2 for v in column) / (n - 1))  # ddof = 1
        analytic = math.fsum(float(v) for v in errors[:, b]) / n
        rms_terms.append(((mean - expected[b]) / (std / math.sqrt(n))) ** 2)
        ratios.append(std / analytic)
    rms_bias = math.sqrt(math.fsum(rms_terms) / len(rms_terms))
    min_ratio = min(ratios)

    summary = result.summary()
    assert summary["n_sims"] == N_SIMS and summary["n_bins"] == samples.shape[1]
    # agreement to rounding (different summation orders): 1e-10 relative
    assert summary["rms_bias_sigma"] == pytest.approx(rms_bias, rel=1e-10)
    assert summary["min_error_ratio"] == pytest.approx(min_ratio, rel=1e-10)
    assert summary["max_error_ratio"] == pytest.approx(max(ratios), rel=1e-10)
    # the same numbers in the JSON file the validate command writes
    doc = json.loads(result.write_json(tmp_path / "summary.json").read_text())
    assert doc["rms_bias_sigma"] == pytest.approx(rms_bias, rel=1e-10)
    assert doc["min_error_ratio"] == pytest.approx(min_ratio, rel=1e-10)
    # and the per-bin columns agree with the records
    np.testing.assert_allclose(result.samples, samples, rtol=0, atol=0)
    np.testing.assert_allclose(result.error_ratio, ratios, rtol=1e-10)
