"""Shared fixtures.

Every test run uses a private on-disk cache directory so that tests never read
a user's cache and never depend on each other through it.
"""

from __future__ import annotations

import os

import numpy as np
import pytest


@pytest.fixture(autouse=True, scope="session")
def _private_cache_dir(tmp_path_factory):
    d = tmp_path_factory.mktemp("cmbtools-cache")
    old = os.environ.get("CMBTOOLS_CACHE_DIR")
    os.environ["CMBTOOLS_CACHE_DIR"] = str(d)
    yield d
    if old is None:
        os.environ.pop("CMBTOOLS_CACHE_DIR", None)
    else:
        os.environ["CMBTOOLS_CACHE_DIR"] = old


@pytest.fixture
def rng():
    """A fresh, seeded generator (tests never touch numpy's global state)."""
    return np.random.default_rng(20261202)


# ------------------------------------------------------------------ the longest tests first (pytest-xdist)
#
# With one process per core, a long test that starts last leaves the other processes idle at the end.  The
# tests below (CPU seconds of one process, measured with `--durations` on the 2-core machine; the order only,
# never a pass/fail) are handed out first, longest first, each to the next process that is free, so the
# processes finish together.  A key that is a file name makes the whole file one unit (its tests share a
# module-scoped fixture, which is then built once); any other key is a test's node id or the start of it
# (every parametrized case is its own unit).  Tests not listed are handed out afterwards as pytest-xdist does.
# Keys that match nothing (a renamed test) only cost the ordering; update them from a `--durations=30` run.
EXPECTED_SECONDS = {
    # wall seconds with -n 2 at load 2-3 (2026-12-04 13:42-13:55 UTC, --durations)
    "tests/spectrum/test_polarization_montecarlo.py::test_polarized_bandpowers_unbiased_with_right_errors": 115,
    "tests/cli/test_interface_faults.py::test_readme_api_block_runs_verbatim_as_a_script": 66,
    "tests/scripts/test_benchmark_script.py::test_quick_run_prints_every_figure": 57,
    "tests/simulate/test_polarized_theory.py": 55,
    "tests/spectrum/test_purified_averaged_pixels.py": 46,
    "tests/spectrum/test_covariance.py::test_gaussian_errors_match_the_scatter_of_simulations": 46,
    "tests/spectrum/test_averaged_pixels_default.py::test_default_model_is_unbiased_on_averaged_skies": 39,
    "tests/cli/test_readme_examples.py::test_a_readme_example_prints_what_the_readme_shows[validate]": 35,
    "tests/cli/test_readme_examples.py::test_a_readme_example_prints_what_the_readme_shows[spectrum1]": 34,
    "tests/spectrum/test_polarized_averaged_pixels.py::test_polarized_default_model_on_averaged_iqu_skies": 34,
    "tests/spectrum/test_deprojection.py::"
    "test_every_bin_unbiased_on_pixelised_skies_with_monopole_dipole_and_power_above_lmax": 30,
    "tests/cli/test_interface_workflows.py::test_validate_takes_the_binning_options_of_spectrum": 28,
    "tests/cli/test_readme_examples.py::test_a_readme_example_prints_what_the_readme_shows[spectrum+spectrum]": 26,
    "tests/spectrum/test_transfer.py::test_measured_transfer_undoes_a_high_pass_on_independent_realistic_maps": 22,
    "tests/cli/test_cli_default_range.py::test_validate_uses_the_default_range_and_skies_to_four_nside": 19,
    "tests/cli/test_interface_workflows.py::test_operator_cache_says_whether_it_was_built_reused_or_rebuilt": 18,
    "tests/cli/test_interface_workflows.py::test_noise_bias_from_the_half_difference_round_trips_through_its_table": 17,
    "tests/spectrum/test_pure_b_noise_bias.py": 15,
    "tests/cli/test_cli_polarized_covariance.py::"
    "test_validate_polarized_writes_covariance_and_transfer_that_spectrum_reads_back": 14,
    "tests/cli/test_cli_default_range.py::test_iqu_spectra_follow_the_same_default_range": 14,
    "tests/simulate/test_theory_spectrum.py::test_amplitude_and_tilt_scale_as_the_primordial_spectrum": 12,
    "tests/spectrum/test_estimator_montecarlo.py": 15,
    "tests/cli/test_cli_validate.py::test_validate_writes_outputs_matches_the_library_and_resumes": 15,
    "tests/cli/test_interface_workflows.py::test_validate_cross_mode_with_two_masks_has_no_noise_bias": 13,
}


def _expected_key(nodeid):
    """The EXPECTED_SECONDS key that covers ``nodeid`` (the longest), or None."""
    best = None
    for key in EXPECTED_SECONDS:
        if nodeid == key or nodeid.startswith(key + "::") or nodeid.startswith(key + "["):
            if best is None or len(key) > len(best):
                best = key
    return best


def long_units(collection):
    """[(seconds, [indices])] of the listed tests of ``collection`` (node ids), longest first; whole files
    for the keys that name a file, consecutive in the collection."""
    units = {}
    for i, nodeid in enumerate(collection):
        key = _expected_key(nodeid)
        if key is not None:
            units.setdefault(key if key.endswith(".py") else nodeid, (EXPECTED_SECONDS[key], []))[1].append(i)
    return sorted(units.values(), key=lambda u: (-u[0], u[1][0]))


@pytest.hookimpl(optionalhook=True)
def pytest_xdist_make_scheduler(config, log):
    if config.getoption("dist") != "load":
        return None
    from xdist.scheduler import LoadScheduling

    class LongestFirst(LoadScheduling):
        """pytest-xdist's load scheduling, with the units of EXPECTED_SECONDS first, longest first.

        A process runs a test once it knows the next one (for fixture teardown), so it always holds two: while
        it runs a long unit, what it holds next is the short tests of one file (not a long unit another process
        could take; a file's tests together, so its module-scoped fixtures are built once), and the next long
        unit goes to the first process that gets through those.
        """

        _units: list = []
        _long: set = set()

        def schedule(self):
            if self.collection is not None or not self.collection_is_completed or len(self.nodes) < 2 \
                    or not self._check_nodes_have_same_collection():
                return super().schedule()
            collection = next(iter(self.node2collection.values()))
            units = long_units(collection)
            taken = {i for _, unit in units for i in unit}
            short = [i for i in range(len(collection)) if i not in taken]
            if not units or len(short) < 2 * len(self.nodes):
                return super().schedule()
            self.collection = collection
            self.pending[:] = short
            self._units = [unit for _, unit in units]
            self._long = taken
            if self.maxschedchunk is None:
                self.maxschedchunk = len(collection)
            for node in self.nodes:
                self._top_up(node)
            return None

        def _top_up(self, node):
            held = self.node2pending[node]
            while len(held) < 2 and (self._units or self.pending):
                if self._units and not (held and held[-1] in self._long):
                    indices = self._units.pop(0)
                elif self.pending:
                    indices = self._next_file()
                else:
                    indices = self._units.pop(0)
                held.extend(indices)
                node.send_runtest_some(indices)

        def _next_file(self):
            """The next short tests of one file (together: a module-scoped fixture is then built once)."""
            first = self.collection[self.pending[0]].split("::")[0]
            n = 1
            while n < len(self.pending) and self.collection[self.pending[n]].split("::")[0] == first:
                n += 1
            indices = self.pending[:n]
            del self.pending[:n]
            return indices

        def check_schedule(self, node, duration=0):
            if self._units and not node.shutting_down:
                self._top_up(node)
                return None
            return super().check_schedule(node, duration)

    return LongestFirst(config, log)
