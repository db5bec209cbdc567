"""Tests of the Monte Carlo engine (cmbtools.simulate.engine, re-exported by cmbtools.simulate).

The generic engine is exercised with small per-simulation functions; the
estimator validation with real skies at nside 16-32.  Statistical checks use a
fixed seed and bounds derived from the number of simulations.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import healpy as hp
import numpy as np
import pytest
import scipy.stats

from cmbtools.spectrum import coupling as _coupling
from cmbtools._core import sht as _sht
from cmbtools.simulate import (
    SimulationSet,
    ValidationResult,
    run_simulations,
    transfer_from_pseudo_spectrum,
    validate_estimator,
    validate_pipeline,
)
from cmbtools.exceptions import (
    CacheError,
    CmbtoolsWarning,
    InvalidInputError,
    OutputExistsError,
    OutputPathError,
    WorkerLostError,
)
from cmbtools.maps import apodize_mask, cap_mask
from cmbtools.simulate import NoiseModel, simulation_rng
from cmbtools.spectrum import Binning, SpectrumEstimator

from _mc_kill_child import die_in_worker  # light module: spawned workers import it quickly

TESTS_DIR = Path(__file__).resolve().parents[1]  # the helpers (_mc_kill_child) live in tests/


# --------------------------------------------------------------------------- per-simulation functions
# (module level, so that spawned worker processes can import them)


def draw_normals(index, rng, context):
    return {"x": rng.standard_normal(context["size"]), "index": np.int64(index)}


def draw_bandpowers(index, rng, context):
    """Gaussian 'bandpowers' around a known mean, with a reported error (possibly wrong)."""
    sigma = context["sigma"]
    return {
        "cl": context["mean"] + context["shift"] * sigma + sigma * rng.standard_normal(sigma.size),
        "cl_err": sigma * context["reported_error_factor"],
    }


def smooth_one_degree(m):
    """A 'filter' the estimator does not know about: an extra 60 arcmin Gaussian smoothing."""
    nside = hp.npix2nside(m.size)
    lmax = 3 * nside - 1
    alm = _sht.map2alm(m, lmax, n_iter=3, nthreads=1)
    # healpy's gauss_beam is the reference Gaussian window here (a general-purpose library).
    return _sht.alm2map(_sht.almxfl(alm, hp.gauss_beam(np.radians(1.0), lmax), lmax), nside, lmax, nthreads=1)


# --------------------------------------------------------------------------- fixtures


@pytest.fixture
def one_thread(monkeypatch):
    """Transforms use one thread each (thread pools in tests must not oversubscribe 2 cores)."""
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")


def _red_spectrum(lmax):
    ell = np.arange(lmax + 1)
    return np.where(ell >= 2, 1e-10 * 1000.0 / (ell + 10.0) ** 2, 0.0)  # K^2, D_l roughly flat


@pytest.fixture(scope="module")
def small_estimator():
    """nside 16, a 3/4-sky cap, 30 arcmin beam, pixel window, bins of 6."""
    nside = 16
    mask = cap_mask(nside, 0.0, 90.0, 120.0)
    return SpectrumEstimator(mask, Binning.uniform(2, 2 * nside, 6), beam=30.0)


@pytest.fixture(scope="module")
def estimator32():
    """nside 32, an apodized cap of f_sky ~ 0.6, 40 arcmin beam, pixel window, bins of 8 up to l = 64."""
    nside = 32
    mask = apodize_mask(cap_mask(nside, 30.0, 60.0, 105.0), 8.0)
    return SpectrumEstimator(mask, Binning.uniform(2, 2 * nside, 8), beam=40.0)


# --------------------------------------------------------------------------- reproducibility


def test_simulation_i_uses_seed_sequence_with_spawn_key_i():
    # numpy documents SeedSequence(seed).spawn(n)[i] as the sequence with spawn_key (i,):
    # both must give the stream the engine hands to simulation i.
    seed, n = 20261202, 7
    with ThreadPoolExecutor(3) as pool:
        sims = run_simulations(draw_normals, n, seed=seed, context={"size": 5}, executor=pool, progress=False)
    children = np.random.SeedSequence(seed).spawn(n)
    for i in range(n):
        ref = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(i,))).standard_normal(5)
        np.testing.assert_array_equal(sims["x"][i], ref)
        np.testing.assert_array_equal(sims["x"][i], np.random.default_rng(children[i]).standard_normal(5))
    np.testing.assert_array_equal(sims["index"], np.arange(n))
    assert isinstance(sims, SimulationSet) and sims.n_sims == n and sims.seed == seed and sims.n_resumed == 0


def test_bandpowers_identical_with_one_and_two_process_workers(small_estimator, one_thread):
    cl = _red_spectrum(small_estimator.lmax)
    noise = NoiseModel(depth_uk_arcmin=30.0)
    kw = dict(n_sims=6, seed=11, noise=noise, progress=False)
    one = validate_estimator(small_estimator, cl, workers=1, **kw)
    two = validate_estimator(small_estimator, cl, workers=2, **kw)
    with ThreadPoolExecutor(2) as pool:
        threads = validate_estimator(small_estimator, cl, executor=pool, **kw)
    # Same seed => the same sky and noise in every simulation; the transforms may
    # round differently with other thread counts, hence 1e-12 rather than bit equality.
    np.testing.assert_allclose(one.samples, two.samples, rtol=1e-12, atol=0)
    np.testing.assert_allclose(one.samples, threads.samples, rtol=1e-12, atol=0)
    assert one.seed == two.seed == 11
    # and the simulations differ from one another (the streams are not reused)
    assert np.all(np.abs(np.diff(one.samples, axis=0)).max(axis=1) > 0)


# --------------------------------------------------------------------------- statistics


def test_statistics_are_the_textbook_estimators():
    rng = np.random.default_rng(5)
    x = 2.0 + rng.standard_normal((50, 4))
    err = np.full_like(x, 0.8)
    expected = np.array([2.0, 2.1, 1.9, 2.0])
    r = ValidationResult.from_samples(x, err, expected, ell_min=[2, 10, 18, 26], ell_max=[9, 17, 25, 33],
                                      ell_eff=[5.5, 13.5, 21.5, 29.5])
    # bias_sigma is the one-sample t statistic (scipy.stats.ttest_1samp as the reference)
    t = scipy.stats.ttest_1samp(x, expected, axis=0).statistic
    np.testing.assert_allclose(r.bias_sigma, t, rtol=1e-12)
    np.testing.assert_allclose(r.covariance, np.cov(x, rowvar=False), rtol=1e-12)
    np.testing.assert_allclose(r.std, np.sqrt(np.diag(np.cov(x, rowvar=False))), rtol=1e-12)
    np.testing.assert_allclose(r.error_ratio, r.std / 0.8, rtol=1e-12)
    np.testing.assert_allclose(r.transfer, x.mean(axis=0) / expected, rtol=1e-12)
    # D_l factor defaults to l(l+1)/2pi at ell_eff (common practice)
    np.testing.assert_allclose(r.dl_factor, np.array([5.5, 13.5, 21.5, 29.5]) * [6.5, 14.5, 22.5, 30.5] / (2 * np.pi))
    s = r.summary()
    assert s["n_sims"] == 50
    assert s["max_abs_bias_sigma"] == pytest.approx(np.max(np.abs(t)), rel=1e-12)
    assert s["median_error_ratio"] == pytest.approx(np.median(r.std / 0.8), rel=1e-12)


def _bandpower_context(n_bins, shift=0.0, factor=1.0):
    return {
        "mean": np.linspace(1.0, 3.0, n_bins),
        "sigma": np.linspace(0.1, 0.4, n_bins),
        "shift": shift,
        "reported_error_factor": factor,
    }


def test_unbiased_simulations_give_small_bias_and_unit_error_ratio():
    n_sims, n_bins = 200, 12
    ctx = _bandpower_context(n_bins)
    with ThreadPoolExecutor(2) as pool:
        sims = run_simulations(draw_bandpowers, n_sims, seed=3, context=ctx, executor=pool, progress=False)
    r = ValidationResult.from_samples(sims["cl"], sims["cl_err"], ctx["mean"], ell_min=np.arange(n_bins) * 10 + 2,
                                      ell_max=np.arange(n_bins) * 10 + 11, ell_eff=np.arange(n_bins) * 10 + 6.5)
    # bias_sigma ~ Student t with N-1 = 199 dof: |t| > 4 in any of 12 bins has probability ~1e-3
    assert np.all(np.abs(r.bias_sigma) < 4.0)
    # rms of 12 draws of ~N(0,1): chi2_12/12 lies in [0.3, 2.2] with probability > 0.99 (scipy.stats.chi2)
    lo, hi = scipy.stats.chi2.ppf([0.001, 0.999], n_bins) / n_bins
    assert lo < np.mean(r.bias_sigma**2) < hi
    # the sample std has relative uncertainty 1/sqrt(2(N-1)) = 0.05 per bin (common practice)
    e = 1.0 / np.sqrt(2 * (n_sims - 1))
    assert np.all(np.abs(r.error_ratio - 1.0) < 4 * e)
    assert abs(np.mean(r.error_ratio) - 1.0) < 4 * e / np.sqrt(n_bins)
    assert abs(r.summary()["median_error_ratio"] - 1.0) < 4 * e
    np.testing.assert_allclose(r.transfer, 1.0, atol=4 * ctx["sigma"].max() / ctx["mean"].min() / np.sqrt(n_sims))


def test_bias_and_wrong_errors_are_detected():
    n_sims, n_bins = 200, 6
    ctx = _bandpower_context(n_bins, shift=0.5, factor=0.5)  # biased by sigma/2, errors reported half as large
    with ThreadPoolExecutor(2) as pool:
        sims = run_simulations(draw_bandpowers, n_sims, seed=8, context=ctx, executor=pool, progress=False)
    r = ValidationResult.from_samples(sims["cl"], sims["cl_err"], ctx["mean"], ell_min=np.arange(n_bins) * 10 + 2,
                                      ell_max=np.arange(n_bins) * 10 + 11, ell_eff=np.arange(n_bins) * 10 + 6.5)
    # mean bias 0.5 sigma => bias_sigma ~ 0.5 sqrt(N) = 7.07, scattered by ~1
    np.testing.assert_allclose(r.bias_sigma, 0.5 * np.sqrt(n_sims), atol=4.0)
    e = 1.0 / np.sqrt(2 * (n_sims - 1))
    np.testing.assert_allclose(r.error_ratio, 2.0, atol=2.0 * 4 * e)
    assert r.summary()["max_abs_bias_sigma"] > 4.0


def test_estimator_validation_is_unbiased_with_beam_noise_and_dipole(estimator32, one_thread):
    n = 60
    cl = _red_spectrum(estimator32.lmax)
    with ThreadPoolExecutor(2) as pool:
        r = validate_estimator(
            estimator32, cl, n_sims=n, seed=2026, noise=NoiseModel(depth_uk_arcmin=25.0),
            monopole=3e-5, dipole=[1e-4, -2e-4, 5e-5], executor=pool, progress=False,
        )
    assert r.n_sims == n and r.n_bins == estimator32.binning.n_bins
    np.testing.assert_allclose(r.expected, estimator32.expected_bandpowers(cl), rtol=1e-14)
    # unbiased: each bias_sigma ~ t_59; 8 bins => |t| < 4 with probability > 0.99
    assert np.all(np.abs(r.bias_sigma) < 4.0)
    # the Knox errors (Knox 1995) describe the scatter up to the sample noise of the std,
    # 1/sqrt(2(N-1)) = 0.092 per bin, plus a 10% allowance for the f_sky_eff approximation
    # on a cut sky (Hivon et al. 2002, ApJ 567, 2)
    e = 1.0 / np.sqrt(2 * (n - 1))
    assert np.all(np.abs(r.error_ratio - 1.0) < 0.10 + 4 * e)
    assert abs(r.summary()["median_error_ratio"] - 1.0) < 0.10 + 3 * e
    # no filtering in this pipeline: the per-bin transfer is 1 within the standard error
    np.testing.assert_allclose(r.transfer, 1.0, atol=4.0 * np.max(r.std / np.sqrt(n) / r.expected))
    assert r.metadata["nside"] == 32 and "depth_uk_arcmin=25.0" in r.metadata["noise"]


@pytest.mark.slow
def test_estimator_validation_many_simulations(estimator32, one_thread):
    n = 300
    cl = _red_spectrum(estimator32.lmax)
    with ThreadPoolExecutor(2) as pool:
        r = validate_pipeline(estimator32.mask, estimator32.binning, cl, beam=40.0,
                              noise=NoiseModel(depth_uk_arcmin=25.0), n_sims=n, seed=7,
                              executor=pool, progress=False)
    e = 1.0 / np.sqrt(2 * (n - 1))
    assert np.all(np.abs(r.bias_sigma) < 4.0)
    lo, hi = scipy.stats.chi2.ppf([0.001, 0.999], r.n_bins) / r.n_bins
    assert lo < np.mean(r.bias_sigma**2) < hi + 0.5  # neighbouring bins are slightly correlated
    assert abs(r.summary()["median_error_ratio"] - 1.0) < 0.10 + 3 * e


# --------------------------------------------------------------------------- run directory, resuming


def test_run_dir_streams_records_and_resumes(tmp_path):
    run_dir = tmp_path / "run"
    ctx = {"size": 3}
    with ThreadPoolExecutor(2) as pool:
        part = run_simulations(draw_normals, 5, seed=9, context=ctx, run_dir=run_dir, executor=pool, progress=False)
        assert sorted(p.name for p in run_dir.iterdir()) == ["run.json"] + [f"sim_{i:06d}.npz" for i in range(5)]
        full = run_simulations(draw_normals, 12, seed=9, context=ctx, run_dir=run_dir, executor=pool, progress=False)
        fresh = run_simulations(draw_normals, 12, seed=9, context=ctx, executor=pool, progress=False)
    assert part.n_resumed == 0 and full.n_resumed == 5 and full.run_dir == run_dir
    np.testing.assert_array_equal(full["x"], fresh["x"])
    np.testing.assert_array_equal(full["x"][:5], part["x"])
    manifest = json.loads((run_dir / "run.json").read_text())
    assert manifest["seed"] == 9 and manifest["n_sims"] == 12 and len(manifest["input_hash"]) == 64
    assert manifest["function"] == f"{draw_normals.__module__}.draw_normals"
    with np.load(run_dir / "sim_000007.npz", allow_pickle=False) as z:
        np.testing.assert_array_equal(z["x"], fresh["x"][7])
        assert int(z["_index"]) == 7
    # fewer simulations than on disk: the first ones, nothing runs
    few = run_simulations(draw_normals, 3, seed=9, context=ctx, run_dir=run_dir, executor=ThreadPoolExecutor(1),
                          progress=False)
    assert few.n_resumed == 3
    np.testing.assert_array_equal(few["x"], fresh["x"][:3])
    # seed=None resumes with the recorded seed
    again = run_simulations(draw_normals, 12, context=ctx, run_dir=run_dir, executor=ThreadPoolExecutor(1),
                            progress=False)
    assert again.seed == 9 and again.n_resumed == 12


def test_run_dir_refuses_another_run(tmp_path):
    run_dir = tmp_path / "run"
    pool = ThreadPoolExecutor(1)
    run_simulations(draw_normals, 4, seed=1, context={"size": 2}, run_dir=run_dir, executor=pool, progress=False)
    with pytest.raises(CacheError, match="seed 1, this call uses seed 2"):
        run_simulations(draw_normals, 4, seed=2, context={"size": 2}, run_dir=run_dir, executor=pool, progress=False)
    with pytest.raises(CacheError, match="other inputs"):
        run_simulations(draw_normals, 4, seed=1, context={"size": 3}, run_dir=run_dir, executor=pool, progress=False)
    with pytest.raises(CacheError, match="other inputs"):
        run_simulations(draw_bandpowers, 4, seed=1, context={"size": 2}, run_dir=run_dir, executor=pool,
                        progress=False)
    # nothing was touched by the refused calls
    assert len(list(run_dir.glob("sim_*.npz"))) == 4
    new = run_simulations(draw_normals, 4, seed=2, context={"size": 3}, run_dir=run_dir, executor=pool,
                          progress=False, restart=True)
    assert new.n_resumed == 0 and new["x"].shape == (4, 3)
    assert json.loads((run_dir / "run.json").read_text())["seed"] == 2
    pool.shutdown()


def test_corrupt_record_is_detected_and_redone(tmp_path):
    run_dir = tmp_path / "run"
    pool = ThreadPoolExecutor(1)
    ref = run_simulations(draw_normals, 6, seed=4, context={"size": 2}, run_dir=run_dir, executor=pool, progress=False)
    (run_dir / "sim_000002.npz").write_bytes(b"not an npz file")
    # a record whose numbers were changed after writing fails its checksum
    with np.load(run_dir / "sim_000004.npz", allow_pickle=False) as z:
        data = {k: z[k] for k in z.files}
    data["x"] = data["x"] + 1.0
    with open(run_dir / "sim_000004.npz", "wb") as fh:
        np.savez(fh, **data)
    # a temporary file left by a writer that was killed is removed
    (run_dir / ".sim_000005.npz.abc123.tmp.npz").write_bytes(b"partial")
    with pytest.warns(CmbtoolsWarning) as record:
        again = run_simulations(draw_normals, 6, seed=4, context={"size": 2}, run_dir=run_dir, executor=pool,
                                progress=False)
    messages = " ".join(str(w.message) for w in record)
    assert "sim_000002.npz: cannot be read" in messages and "sim_000004.npz: fails its checksum" in messages
    assert again.n_resumed == 4
    np.testing.assert_array_equal(again["x"], ref["x"])
    assert not list(run_dir.glob(".sim_*"))
    pool.shutdown()


def test_run_dir_checks(tmp_path):
    pool = ThreadPoolExecutor(1)
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "sim_000000.npz").write_bytes(b"x")
    with pytest.raises(CacheError, match="no run.json"):
        run_simulations(draw_normals, 2, seed=1, context={"size": 2}, run_dir=foreign, executor=pool, progress=False)
    with pytest.raises(OutputPathError, match="does not exist"):
        run_simulations(draw_normals, 2, seed=1, context={"size": 2}, run_dir=tmp_path / "a" / "b", executor=pool,
                        progress=False)
    (tmp_path / "file").write_text("x")
    with pytest.raises(OutputPathError, match="not a directory"):
        run_simulations(draw_normals, 2, seed=1, context={"size": 2}, run_dir=tmp_path / "file", executor=pool,
                        progress=False)
    bad = tmp_path / "bad"
    bad.mkdir()
    (bad / "run.json").write_text("{not json")
    with pytest.raises(CacheError, match="manifest cannot be read"):
        run_simulations(draw_normals, 2, seed=1, context={"size": 2}, run_dir=bad, executor=pool, progress=False)
    pool.shutdown()


def test_killed_run_resumes_to_the_same_result(tmp_path):
    import _mc_kill_child as child

    run_dir = tmp_path / "killed"
    code = f"import sys; sys.path.insert(0, {str(TESTS_DIR)!r}); import _mc_kill_child; _mc_kill_child.run(sys.argv[1])"
    env = dict(os.environ, CMBTOOLS_NUM_THREADS="1")
    proc = subprocess.Popen([sys.executable, "-c", code, str(run_dir)], env=env, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 60.0
        while time.monotonic() < deadline and proc.poll() is None:
            if run_dir.is_dir() and len(list(run_dir.glob("sim_*.npz"))) >= 5:
                break
            time.sleep(0.02)
        assert proc.poll() is None, f"the child run ended before it was killed: {proc.stderr.read().decode()[-2000:]}"
    finally:
        # the child and its pool workers share the new session's process group, which we own
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
        proc.stderr.close()
    n_before = len(list(run_dir.glob("sim_*.npz")))
    assert 5 <= n_before < child.N_SIMS
    with ThreadPoolExecutor(4) as pool:
        resumed = child.run(run_dir, executor=pool)
        uninterrupted = child.run(tmp_path / "clean", executor=pool)
    assert resumed.n_resumed >= 5
    np.testing.assert_array_equal(resumed["x"], uninterrupted["x"])
    np.testing.assert_array_equal(resumed["index"], np.arange(child.N_SIMS))
    assert len(list(run_dir.glob("sim_*.npz"))) == child.N_SIMS


def test_a_worker_that_dies_does_not_lose_the_run(tmp_path, one_thread):
    ctx = {"marker": str(tmp_path / "deaths.txt"), "victim": 3, "deaths": 1}
    with pytest.warns(CmbtoolsWarning, match="worker process died"):
        sims = run_simulations(die_in_worker, 10, seed=21, context=ctx, run_dir=tmp_path / "run", workers=2,
                               progress=False)
    assert (tmp_path / "deaths.txt").read_text() == "died\n"  # it really died once
    with ThreadPoolExecutor(2) as pool:  # the marker is there now: nothing dies
        clean = run_simulations(die_in_worker, 10, seed=21, context=ctx, executor=pool, progress=False)
    np.testing.assert_array_equal(sims["x"], clean["x"])
    assert len(list((tmp_path / "run").glob("sim_*.npz"))) == 10


def test_workers_that_keep_dying_stop_the_run_which_then_resumes(tmp_path, one_thread):
    ctx = {"marker": str(tmp_path / "deaths.txt"), "victim": 0, "deaths": 2}
    kw = dict(seed=5, context=ctx, run_dir=tmp_path / "run", workers=1, progress=False, max_restarts=1)
    with pytest.warns(CmbtoolsWarning, match="restart 1 of at most 1"):
        with pytest.raises(WorkerLostError, match="Run the same call again to resume") as info:
            run_simulations(die_in_worker, 4, **kw)
    assert info.value.n_sims == 4 and info.value.n_finished == len(list((tmp_path / "run").glob("sim_*.npz")))
    sims = run_simulations(die_in_worker, 4, **kw)  # two deaths recorded: it runs through now
    assert sims.n_resumed == info.value.n_finished
    ref = np.stack([simulation_rng(5, i).standard_normal(3) for i in range(4)])
    np.testing.assert_array_equal(sims["x"], ref)


# --------------------------------------------------------------------------- inputs and progress


def _returns(value):
    def f(index, rng, context):
        return value(index)

    return f


def test_bad_inputs_raise_clear_errors(estimator32):
    pool = ThreadPoolExecutor(1)
    with pytest.raises(InvalidInputError, match="'simulate_one' parameter must be a callable"):
        run_simulations(42, 3, seed=1)
    with pytest.raises(InvalidInputError, match="'n_sims' parameter must be an int in"):
        run_simulations(draw_normals, 0, seed=1)
    with pytest.raises(InvalidInputError, match="'executor' parameter"):
        run_simulations(draw_normals, 2, seed=1, executor="local")
    with pytest.raises(InvalidInputError, match="'progress' parameter"):
        run_simulations(draw_normals, 2, seed=1, progress="yes")
    with pytest.raises(InvalidInputError, match="must be picklable"):
        run_simulations(lambda i, rng, c: {"x": 1.0}, 2, seed=1, workers=1, progress=False)
    with pytest.raises(InvalidInputError, match="must return a dict"):
        run_simulations(_returns(lambda i: 3.0), 2, seed=1, executor=pool, progress=False)
    with pytest.raises(InvalidInputError, match="must not start with '_'|do not start with '_'"):
        run_simulations(_returns(lambda i: {"_x": 1.0}), 2, seed=1, executor=pool, progress=False)
    with pytest.raises(InvalidInputError, match="of dtype"):
        run_simulations(_returns(lambda i: {"x": "text"}), 2, seed=1, executor=pool, progress=False)
    with pytest.raises(InvalidInputError, match="returned 'x' of shape"):
        run_simulations(_returns(lambda i: {"x": np.zeros(i + 1)}), 2, seed=1, executor=pool, progress=False)
    with pytest.raises(InvalidInputError, match="must be a cmbtools.spectrum.SpectrumEstimator"):
        validate_estimator("estimator", n_sims=2)
    hits = np.ones(estimator32.mask.size)
    hits[estimator32.mask > 0.5] = 0.0
    with pytest.raises(InvalidInputError, match="hits map does not cover"):
        validate_estimator(estimator32, _red_spectrum(95), n_sims=2, noise=NoiseModel(10.0, hits=hits))
    pool.shutdown()


def test_progress_bar_only_when_asked(capfd):
    with ThreadPoolExecutor(1) as pool:
        run_simulations(draw_normals, 4, seed=1, context={"size": 1}, executor=pool, progress=True)
        err = capfd.readouterr().err
        assert "4/4" in err
        run_simulations(draw_normals, 4, seed=1, context={"size": 1}, executor=pool, progress=False)
        assert capfd.readouterr().err == ""
        # default: only on a terminal, and pytest's captured stderr is not one
        run_simulations(draw_normals, 4, seed=1, context={"size": 1}, executor=pool)
        assert capfd.readouterr().err == ""


# --------------------------------------------------------------------------- transfer function


def test_transfer_helper_inverts_the_master_model_exactly():
    nside, lmax = 32, 95
    cl = _red_spectrum(lmax)
    beam = hp.gauss_beam(np.radians(0.5), lmax)  # healpy as the reference Gaussian beam
    truth = hp.gauss_beam(np.radians(1.0), lmax) ** 2
    # full sky: the coupling matrix is the identity and the plain ratio is exact
    full = np.ones(12 * nside**2)
    np.testing.assert_allclose(
        transfer_from_pseudo_spectrum(truth * beam**2 * cl, cl, full, beam=beam, iterations=0)[2:], truth[2:],
        rtol=1e-13,
    )
    # cut sky: the pseudo-spectrum of the MASTER model (Hivon et al. 2002, eq. 7) is inverted by the refinements
    mask = cap_mask(nside, 0.0, 90.0, 120.0)
    m = _coupling.coupling_matrix(_coupling.mask_spectrum(mask, lmax=lmax), lmax)
    pseudo = m @ (truth * beam**2 * cl)
    plain = transfer_from_pseudo_spectrum(pseudo, cl, mask, beam=beam, iterations=0)
    refined = transfer_from_pseudo_spectrum(pseudo, cl, mask, beam=beam, iterations=20)
    assert np.max(np.abs(plain / truth - 1)[2:]) > 0.05  # the plain ratio is biased by the coupling
    np.testing.assert_allclose(refined[2:], truth[2:], rtol=1e-5)
    np.testing.assert_array_equal(refined[:2], 1.0)  # no signal at l = 0, 1: set to 1 by definition


def test_transfer_measured_on_filtered_simulations(estimator32, one_thread):
    n = 40
    est = estimator32
    cl = _red_spectrum(est.lmax)
    lmax = est.lmax
    b2 = hp.gauss_beam(np.radians(1.0), lmax) ** 2  # what the filter does to the power (healpy reference)
    with ThreadPoolExecutor(2) as pool:
        plain = validate_estimator(est, cl, n_sims=n, seed=31, record_pseudo_spectra=True, executor=pool,
                                   progress=False)
        filtered = validate_estimator(est, cl, n_sims=n, seed=31, sky_filter=smooth_one_degree,
                                      record_pseudo_spectra=True, executor=pool, progress=False)
        t_plain = transfer_from_pseudo_spectrum(plain.mean_pseudo_cl, cl, est.mask, beam=est.beam,
                                                pixel_window=est.pixel_window)
        t_filt = transfer_from_pseudo_spectrum(filtered.mean_pseudo_cl, cl, est.mask, beam=est.beam,
                                               pixel_window=est.pixel_window)
        # Averaged over blocks of 8 multipoles, the Monte Carlo noise of the mean pseudo-spectrum is
        # ~ sqrt(2 / (8 (2l+1) f_sky N)) relative (cosmic variance, Knox 1995); the same skies enter both runs,
        # so their ratio is cleaner still.  l = 2..9 is left out (monopole/dipole removal, steepest coupling).
        blocks = np.arange(10, 2 * est.nside + 1, 8)
        for lo in blocks[:-1]:
            sl = slice(lo, lo + 8)
            tol = 5 * np.sqrt(2.0 / (8 * (2 * lo + 1) * est.f_sky * n))
            assert abs(np.mean(t_plain[sl]) - 1.0) < tol
            assert abs(np.mean(t_filt[sl] / t_plain[sl]) / np.mean(b2[sl]) - 1.0) < 0.02
        # the per-bin transfer of the filtered pipeline is the binned filter window
        binned_b2 = est.expected_bandpowers(cl * b2) / est.expected_bandpowers(cl)
        np.testing.assert_allclose(filtered.transfer / plain.transfer, binned_b2, rtol=0.03)
        # an estimator told about the transfer function recovers the input again
        corrected = SpectrumEstimator(est.mask, est.binning, beam=est.beam, transfer=t_filt)
        fixed = validate_estimator(corrected, cl, n_sims=n, seed=31, sky_filter=smooth_one_degree,
                                   executor=pool, progress=False)
    np.testing.assert_allclose(fixed.transfer, 1.0, atol=0.05)
    assert np.all(np.abs(fixed.bias_sigma) < 4.0)
    assert np.all(filtered.bias_sigma[-3:] < -4.0)  # without it the filter is a detected bias


# --------------------------------------------------------------------------- outputs


def test_outputs_table_json_and_figure(tmp_path, small_estimator, one_thread):
    cl = _red_spectrum(small_estimator.lmax)
    with ThreadPoolExecutor(2) as pool:
        r = validate_estimator(small_estimator, cl, n_sims=8, seed=3, executor=pool, progress=False)
    table = r.write_csv(tmp_path / "summary.csv")
    lines = table.read_text().splitlines()
    header = [ln for ln in lines if ln.startswith("#")]
    assert any(ln == "# n_sims: 8" for ln in header) and any(ln.startswith("# unit: uK^2") for ln in header)
    body = [ln for ln in lines if not ln.startswith("#")]
    assert body[0] == "ell_min,ell_max,ell_eff,expected,mean,std,analytic_error,bias_sigma,error_ratio,transfer"
    data = np.loadtxt(table, delimiter=",", comments="#", skiprows=1 + len(header), ndmin=2)
    np.testing.assert_array_equal(data[:, 0], r.ell_min)
    np.testing.assert_allclose(data[:, 4], r.mean * 1e12, rtol=1e-9)  # K^2 -> uK^2
    np.testing.assert_allclose(data[:, 7], r.bias_sigma, rtol=1e-9)
    doc = json.loads(r.write_json(tmp_path / "summary.json").read_text())
    for key in ("n_sims", "max_abs_bias_sigma", "median_error_ratio"):
        assert doc[key] == pytest.approx(r.summary()[key])
    assert doc["bins"]["ell_max"] == [int(v) for v in r.ell_max] and doc["settings"]["nside"] == 16
    fig = r.plot(tmp_path / "validation.png")
    assert fig.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and fig.stat().st_size > 10_000
    with pytest.raises(OutputExistsError):
        r.write_csv(tmp_path / "summary.csv")
    with pytest.raises(OutputExistsError):
        r.plot(tmp_path / "validation.png")
    r.plot(tmp_path / "validation.png", overwrite=True)
    with pytest.raises(InvalidInputError, match=".png or .pdf"):
        r.plot(tmp_path / "validation.jpg")
