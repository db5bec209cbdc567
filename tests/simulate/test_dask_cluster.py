"""The Monte Carlo engine on a real dask cluster: two local worker processes on this machine.

The cluster is started once for the module (``distributed.LocalCluster`` with
two single-threaded worker processes) and only listens on the loopback interface,
its HTTP server on a free port: on the fixed default port (8787, taken whenever
another cluster runs on the machine, e.g. another test run's) distributed warns,
which is an error here.
"""

from __future__ import annotations

import json
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest

distributed = pytest.importorskip("distributed", reason="the optional 'dask' extra is not installed")

from cmbtools.simulate import run_simulations, validate_estimator  # noqa: E402
from cmbtools.cli import main  # noqa: E402
from cmbtools.maps import cap_mask, write_mask  # noqa: E402
from cmbtools.simulate import NoiseModel, simulation_rng  # noqa: E402
from cmbtools.spectrum import Binning, SpectrumEstimator  # noqa: E402

from _mc_kill_child import draw_normals  # noqa: E402  (light module for the workers)


@pytest.fixture(scope="module")
def client():
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0", host="127.0.0.1"
    )
    c = distributed.Client(cluster)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


def _red_spectrum(lmax):
    ell = np.arange(lmax + 1)
    return np.where(ell >= 2, 1e-10 * 1000.0 / (ell + 10.0) ** 2, 0.0)


@pytest.fixture(scope="module")
def estimator():
    nside = 16
    return SpectrumEstimator(cap_mask(nside, 0.0, 90.0, 120.0), Binning.uniform(2, 2 * nside, 6), beam=30.0)


def test_dask_cluster_gives_the_same_result_as_the_local_pool(client, estimator, monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    cl = _red_spectrum(estimator.lmax)
    kw = dict(n_sims=6, seed=17, noise=NoiseModel(depth_uk_arcmin=30.0), progress=False)
    on_dask = validate_estimator(estimator, cl, executor=client, **kw)
    local = validate_estimator(estimator, cl, workers=2, **kw)
    np.testing.assert_allclose(on_dask.samples, local.samples, rtol=1e-12, atol=0)
    np.testing.assert_allclose(on_dask.bias_sigma, local.bias_sigma, rtol=1e-9, atol=1e-12)
    # both dask workers took part, and each got 2 cores // 2 worker threads = 1 transform thread
    env = client.run(lambda: __import__("os").environ.get("CMBTOOLS_NUM_THREADS"))
    assert len(env) == 2 and set(env.values()) <= {"1"}


def test_client_executor_and_resuming_across_executors(client, tmp_path):
    run_dir = tmp_path / "run"
    ctx = {"size": 3}
    with ThreadPoolExecutor(1) as pool:
        first = run_simulations(draw_normals, 4, seed=23, context=ctx, run_dir=run_dir, executor=pool, progress=False)
    # the rest of the run on the cluster, through client.get_executor()
    rest = run_simulations(draw_normals, 10, seed=23, context=ctx, run_dir=run_dir, executor=client.get_executor(),
                           progress=False)
    assert first.n_resumed == 0 and rest.n_resumed == 4
    ref = np.stack([simulation_rng(23, i).standard_normal(3) for i in range(10)])
    np.testing.assert_array_equal(rest["x"], ref)
    np.testing.assert_array_equal(rest["index"], np.arange(10))
    assert len(list(run_dir.glob("sim_*.npz"))) == 10


def test_cli_validate_on_the_cluster(client, tmp_path, capsys):
    mask_path = tmp_path / "mask.fits"
    write_mask(mask_path, cap_mask(16, 0.0, 90.0, 120.0))
    cl = _red_spectrum(40)
    table = ["ell,cl"] + [f"{ell},{v:.17g}" for ell, v in enumerate(cl)]
    (tmp_path / "model.csv").write_text("\n".join(table) + "\n")
    common = [
        "validate", str(mask_path), "--lmax", "40", "--bin-width", "8", "--beam-fwhm", "30",
        "--noise-depth", "30", "--spectrum", str(tmp_path / "model.csv"), "--sims", "5", "--seed", "3",
        "--no-progress",
    ]
    assert main(common + ["--scheduler", client.scheduler.address, "--run-dir", str(tmp_path / "dask")]) == 0
    out = capsys.readouterr().out
    assert "5 simulations" in out and client.scheduler.address in out
    assert main(common + ["--workers", "2", "--run-dir", str(tmp_path / "local")]) == 0
    on_dask = json.loads((tmp_path / "dask" / "summary.json").read_text())
    local = json.loads((tmp_path / "local" / "summary.json").read_text())
    assert on_dask["n_sims"] == local["n_sims"] == 5
    np.testing.assert_allclose(on_dask["bins"]["mean"], local["bins"]["mean"], rtol=1e-12)
    assert on_dask["max_abs_bias_sigma"] == pytest.approx(local["max_abs_bias_sigma"], rel=1e-9)
