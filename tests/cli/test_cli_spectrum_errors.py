"""``cmbtools spectrum`` error models: Gaussian covariance (default), Knox, a covariance file; the covariance output."""

from __future__ import annotations

import numpy as np
import pytest

from cmbtools import maps
from cmbtools._core import sht as _sht
from cmbtools.cli import main
from cmbtools.spectrum import (
    Bandpowers, Binning, GaussianCovariance, PixelNoise, SpectrumEstimator, read_covariance, simulated_covariance,
)

NSIDE, LMAX = 16, 47


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("errors")
    rng = np.random.default_rng(7)
    ell = np.arange(LMAX + 1)
    cl = np.where(ell >= 2, 1e-9 * (20.0 / (ell + 20.0)) ** 2, 0.0)
    n = _sht.alm_size(LMAX)
    alm = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * np.sqrt(cl[_sht.alm_ell(LMAX)] / 2)
    alm[: LMAX + 1] = alm[: LMAX + 1].real * np.sqrt(2)
    sky = _sht.alm2map(alm, NSIDE, LMAX, nthreads=1)
    hits = np.linspace(0.5, 1.5, sky.size)
    mask = maps.apodize_mask(maps.cap_mask(NSIDE, 250.0, -55.0, 70.0), 10.0, nthreads=1)
    p = {"map": d / "a.fits", "map2": d / "b.fits", "mask": d / "mask.fits", "hits": d / "hits.fits",
         "variance": d / "variance.fits", "dir": d}
    maps.write_map(p["map"], sky + rng.standard_normal(sky.size) * 2e-6)
    maps.write_map(p["map2"], sky + rng.standard_normal(sky.size) * 2e-6)
    maps.write_mask(p["mask"], mask)
    maps.write_map(p["hits"], hits)
    maps.write_map(p["variance"], PixelNoise.from_hits(hits, 100.0).variance)
    return p, mask, hits


def _run(p, *extra):
    return main(["spectrum", str(p["map"]), str(p["map2"]), "--mask", str(p["mask"]), "--bin-width", "8",
                 "--no-pixel-window", "--threads", "1", *extra])


def test_default_errors_are_the_diagonal_of_the_gaussian_covariance(files, tmp_path, capsys):
    p, mask, hits = files
    out, cov_path = tmp_path / "x.csv", tmp_path / "cov.npz"
    assert _run(p, "-o", str(out), "--covariance", str(cov_path), "--noise-depth", "100", "--hits", str(p["hits"]),
                "--noise-depth2", "100", "--hits2", str(p["hits"])) == 0
    assert "errors: Gaussian covariance of the measured bandpowers" in capsys.readouterr().out
    bp = Bandpowers.read_csv(out)
    cov = read_covariance(cov_path)
    assert cov.kind == "gaussian" and cov.windows.shape == (bp.n_bins, LMAX + 1)
    np.testing.assert_allclose(bp.cl_err, cov.errors, rtol=1e-9)
    # the same covariance from the library, with the noise as a variance map (no beam: the default bins end at
    # 2 nside = 32)
    assert bp.ell_max[-1] == 2 * NSIDE
    est = SpectrumEstimator(mask, Binning.uniform(2, 2 * NSIDE, 8), lmax=LMAX, mask2=mask, pixel_window=False,
                            nthreads=1)
    noise = PixelNoise.from_hits(hits, 100.0)
    ref = GaussianCovariance(est, noise=noise, noise2=noise, cross=True, nthreads=1).covariance(bp)
    np.testing.assert_allclose(cov.matrix, ref.matrix, rtol=1e-6)
    # the noise given as variance maps gives the same numbers
    out2 = tmp_path / "y.csv"
    assert _run(p, "-o", str(out2), "--noise-variance", str(p["variance"]), "--noise-variance2", str(p["variance"])) == 0
    np.testing.assert_allclose(Bandpowers.read_csv(out2).cl_err, bp.cl_err, rtol=1e-6)


def test_knox_option_and_a_covariance_file_as_the_error_model(files, tmp_path):
    p, mask, hits = files
    knox = tmp_path / "knox.csv"
    assert _run(p, "-o", str(knox), "--errors", "knox") == 0
    bp = Bandpowers.read_csv(knox)
    # without a noise description a cross-spectrum keeps the Knox errors (the maps' noise enters through them)
    plain = tmp_path / "plain.csv"
    assert _run(p, "-o", str(plain)) == 0
    np.testing.assert_allclose(Bandpowers.read_csv(plain).cl_err, bp.cl_err, rtol=1e-12)
    # Knox 1995 for a cross-spectrum with f_sky_eff: (C12^2 + C11 C22) / (f_sky_eff sum(2l+1)) (its own record says so)
    assert "Knox" in bp.metadata["errors"]
    sim = simulated_covariance(np.random.default_rng(1).standard_normal((50, bp.n_bins)) * 1e-12,
                               ell_min=bp.ell_min, ell_max=bp.ell_max, ell_eff=bp.ell_eff)
    sim_path = sim.write(tmp_path / "sim.fits")
    out = tmp_path / "from_file.csv"
    assert _run(p, "-o", str(out), "--covariance-from", str(sim_path)) == 0
    np.testing.assert_allclose(Bandpowers.read_csv(out).cl_err, sim.errors, rtol=1e-9)


@pytest.mark.parametrize("extra, message", [
    (["--hits", "HITS"], "--hits needs --noise-depth"),
    (["--errors", "knox", "--covariance-from", "COV"], "not both"),
    (["--covariance", "out.txt"], "must end in .npz or .fits"),
])
def test_bad_error_options_exit_2_with_one_line(files, tmp_path, capsys, extra, message):
    p, _, _ = files
    extra = [str(p["hits"]) if e == "HITS" else str(tmp_path / "c.npz") if e == "COV" else
             str(tmp_path / e) if e.endswith(".txt") else e for e in extra]
    assert _run(p, "-o", str(tmp_path / "z.csv"), *extra) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0]
    assert not (tmp_path / "z.csv").exists()
