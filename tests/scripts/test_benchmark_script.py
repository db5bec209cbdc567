"""scripts/benchmark.py runs and reports every figure of every workload (not the timings themselves).

Speed targets are checked by running the script on a quiet machine (see the
README's performance section), never as timed unit tests.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

SCRIPT = Path(__file__).resolve().parents[2] / "scripts" / "benchmark.py"

EXPECTED = {
    "W1": {
        "nside", "lmax", "f_sky", "n_bins", "repeats", "anafast_s", "first_call_exact_s", "first_call_fast_s",
        "first_call_exact_ratio", "first_call_fast_ratio", "reuse_s", "reuse_ratio", "coupling_s",
        "bare_kernels_s", "first_call_exact_vs_kernels_s", "first_call_vs_kernels_ratio", "anafast_no_iteration_s",
        "first_call_vs_anafast_no_iteration_ratio",
        "bare_kernel_s", "coupling_ratio", "fast_max_rel_diff_all_bins", "fast_max_rel_diff_below_2nside",
        "banded_max_rel_diff_all_bins", "banded_max_rel_diff_below_2nside", "first_call_banded_s",
        "pixel_window_first_computation_s", "first_call_profile",
    },
    "W2": {
        "nside", "lmax", "repeats", "simulation_s", "bare_synthesis_analysis_s", "simulation_ratio",
        "simulation_without_monopole_dipole_removal_s", "simulation_without_monopole_dipole_removal_ratio",
        "random_numbers_s", "random_numbers_ratio", "pool_simulations", "simulations_per_second_1_worker",
        "simulations_per_second_2_workers", "workers_speedup", "profile",
    },
    "W3": {
        "nside", "lmax", "f_sky", "repeats", "anafast_s", "first_call_fast_s", "first_call_fast_ratio",
        "peak_rss_gb", "rss_with_inputs_loaded_gb", "first_call_fast_in_child_s", "pixel_window_first_computation_s",
    },
    "W4": {"n_redshifts", "n_astropy", "cmbtools_s", "astropy_s", "astropy_scaled_s", "ratio", "max_rel_diff"},
    "W5": {
        "nside", "lmax", "repeats", "temperature_first_call_s", "polarized_first_call_s", "first_call_ratio",
        "temperature_first_call_default_pixel_model_s", "temperature_reuse_s", "polarized_reuse_s", "reuse_ratio",
    },
    "W6": {
        "nside", "lmax", "repeats", "coupling_computation_s", "mask_transform_s", "coupling_kernel_s",
        "auto_covariance_s", "auto_in_coupling_matrices", "auto_in_kernel_calls",
        "cross_covariance_s", "cross_in_coupling_matrices", "cross_in_kernel_calls", "new_spectrum_s",
    },
}
TARGETS = {
    "W1.first_call_exact_ratio", "W1.first_call_fast_ratio", "W1.first_call_vs_kernels_ratio", "W1.reuse_ratio",
    "W1.coupling_ratio", "W1.fast_max_rel_diff_all_bins", "W2.simulation_ratio", "W2.workers_speedup",
    "W3.first_call_fast_ratio", "W3.peak_rss_gb", "W4.ratio", "W4.max_rel_diff", "W5.first_call_ratio",
    "W5.reuse_ratio", "W6.auto_in_coupling_matrices", "W6.cross_in_coupling_matrices",
}
PROFILE_STEPS = (
    "random_numbers", "sky_synthesis", "analysis", "monopole_dipole_removal", "pseudo_spectrum", "map_checks_and_mask",
    "rest",
)
FIRST_CALL_STEPS = (
    "settings", "settings.guess_spectrum", "operator", "operator.mask_spectrum", "operator.coupling_kernel",
    "operator.deprojection_bias_and_row_factors", "operator.binned_inverse", "estimate",
    "estimate.monopole_dipole_removal",
)


def test_quick_run_prints_every_figure(tmp_path):
    import os
    import shutil

    from cmbtools import simulate

    # a cache of the script's own, holding only the fiducial spectra of this test process's cache (computed
    # once per process, 10-20 s; the script computes them before any timed call): pixel windows and
    # averaged-pixel sums it computes itself
    simulate.fiducial_cl(2)
    simulate.fiducial_spectra(2)
    cache = tmp_path / "cache"
    cache.mkdir()
    for f in Path(os.environ["CMBTOOLS_CACHE_DIR"]).glob("fiducial_*.npz"):
        shutil.copy(f, cache / f.name)
    env_home = {"CMBTOOLS_CACHE_DIR": str(cache)}

    res = subprocess.run(
        [sys.executable, str(SCRIPT), "--quick", "--threads", "1"],
        capture_output=True, text=True, timeout=300, env={**os.environ, **env_home},
    )
    assert res.returncode == 0, res.stderr[-2000:]
    report = json.loads(res.stdout)
    assert set(report) == {"machine", "quick", "W1", "W2", "W3", "W4", "W5", "W6", "targets"}
    assert report["quick"] is True
    assert report["machine"]["threads"] == 1
    profile = report["W2"].pop("profile")
    assert set(profile) == {"simulation_s", "floor_bare_synthesis_analysis_s"} | {
        f"{step}_{unit}" for step in PROFILE_STEPS for unit in ("s", "of_floor")
    }
    for key, value in profile.items():
        assert isinstance(value, (int, float)) and math.isfinite(value) and value >= 0, (key, value)
    # the steps add up to the simulation (the rest is what no step names)
    steps = sum(profile[f"{step}_s"] for step in PROFILE_STEPS)
    assert abs(steps - profile["simulation_s"]) <= 0.05 * profile["simulation_s"] + 1e-3
    report["W2"]["profile"] = 0.0
    first = report["W1"].pop("first_call_profile")
    assert set(first) == {"first_call_s", "floor_bare_kernels_s"} | {
        f"{label}_{unit}" for label in FIRST_CALL_STEPS for unit in ("s", "of_floor")
    }
    for key, value in first.items():
        assert isinstance(value, (int, float)) and math.isfinite(value) and value >= 0, (key, value)
    # the top-level steps of a first call fit inside it
    assert sum(first[f"{label}_s"] for label in ("settings", "operator", "estimate")) <= 1.05 * first["first_call_s"] + 1e-3
    report["W1"]["first_call_profile"] = 0.0
    for name, keys in EXPECTED.items():
        assert set(report[name]) == keys, name
        for key, value in report[name].items():
            assert isinstance(value, (int, float)) and math.isfinite(value) and value >= 0, (name, key, value)
    assert report["W2"]["pool_simulations"] > 4
    assert set(report["targets"]) == TARGETS
    for key, entry in report["targets"].items():
        name, figure = key.split(".")
        assert entry["value"] == report[name][figure]
        if "at_least" in entry:  # simulations per second with 2 workers over 1: higher is better
            assert entry["met"] == (entry["value"] >= entry["at_least"])
        else:
            assert entry["met"] == (entry["value"] <= entry["target"])
    # accuracy figures are real comparisons even at the tiny sizes: distances agree with astropy
    # far better than the target, and the fast approximation equals the exact matrix where exact
    assert report["W4"]["max_rel_diff"] < 1e-6
    assert report["W1"]["lmax"] == 3 * report["W1"]["nside"] - 1
