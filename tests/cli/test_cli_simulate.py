"""The ``cmbtools simulate`` command and the demo-data generator."""

from __future__ import annotations

import importlib.util
import math
from pathlib import Path

import numpy as np
import pytest
from astropy.io import fits

from cmbtools.cli import main
from cmbtools.maps import read_sky_map, read_mask, write_sky_map
from cmbtools.simulate import (
    Dipole,
    NoiseModel,
    gaussian_sky,
    noise_map,
    read_spectrum_table,
    simulation_rng,
    write_spectrum_table,
)

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture
def table(tmp_path):
    ell = np.arange(48, dtype=float)
    cl = np.zeros(48)
    cl[2:] = 2e-9 / (ell[2:] * (ell[2:] + 1.0))
    path = tmp_path / "cl.csv"
    write_spectrum_table(path, cl)
    return path, read_spectrum_table(path)


def test_maps_match_the_library_and_record_the_seed(tmp_path, table, capsys):
    path, cl = table
    out = tmp_path / "sims"
    common = ["simulate", "--spectrum", str(path), "--nside", "16", "--lmax", "40", "--beam-fwhm", "120",
              "--noise-depth", "300", "--noise-knee", "10", "--noise-slope", "2", "--monopole", "50",
              "--dipole", "80", "120", "-30", "--seed", "5", "--prefix", "sky", "--threads", "1"]
    assert main(common + ["--sims", "2", "--output-dir", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "seed 5" in printed and "wrote" in printed
    model = NoiseModel(300.0, ell_knee=10.0, alpha=2.0)
    for i in range(2):
        m, info = read_sky_map(out / f"sky_{i:04d}.fits")
        rng = simulation_rng(5, i)
        expected = gaussian_sky(cl, 16, lmax=40, beam=120.0, monopole=50 * 1e-6, dipole=Dipole(80 * 1e-6, 120.0, -30.0),
                                rng=rng, nthreads=1)
        expected = expected + noise_map(model, 16, rng=rng, nthreads=1)
        np.testing.assert_array_equal(m, expected)  # float64 files: bit for bit
        header = fits.getheader(out / f"sky_{i:04d}.fits", 1)
        assert header["CMBSEED"] == 5 and header["CMBSIMID"] == i and header["CMBLMAX"] == 40
    # a later call for map 1 alone gives the same file content
    again = tmp_path / "again"
    assert main(common + ["--sims", "1", "--first-index", "1", "--output-dir", str(again)]) == 0
    np.testing.assert_array_equal(read_sky_map(again / "sky_0001.fits")[0], read_sky_map(out / "sky_0001.fits")[0])


def test_pixelised_maps_match_the_library(tmp_path, table, capsys):
    # --pixelise: each sky averaged over every pixel's area (gaussian_sky(pixelise=True)), recorded in the header
    path, cl = table
    out = tmp_path / "sims"
    assert main(["simulate", "--spectrum", str(path), "--nside", "16", "--lmax", "40", "--beam-fwhm", "120",
                 "--noise-depth", "300", "--splits", "2", "--seed", "5", "--threads", "1", "--pixelise", "--sims", "1",
                 "--output-dir", str(out)]) == 0
    assert "pixel window: yes, averaged over each pixel's area" in capsys.readouterr().out
    rng = simulation_rng(5, 0)
    sky = gaussian_sky(cl, 16, lmax=40, beam=120.0, pixelise=True, rng=rng, nthreads=1)
    plain = gaussian_sky(cl, 16, lmax=40, beam=120.0, rng=simulation_rng(5, 0), nthreads=1)
    for k in (1, 2):
        m, _ = read_sky_map(out / f"sky_0000_split{k}.fits")
        np.testing.assert_array_equal(m, sky + noise_map(NoiseModel(300.0), 16, rng=rng, nthreads=1))
        header = fits.getheader(out / f"sky_0000_split{k}.fits", 1)
        assert header["CMBPIXAV"] is True and header["CMBPIXWN"] is True
    assert np.max(np.abs(sky - plain)) > 1e-3 * np.std(plain)  # not the pixel-centre map


def test_no_overwrite_and_overwrite(tmp_path, table, capsys):
    path, _ = table
    args = ["simulate", "--spectrum", str(path), "--nside", "16", "--seed", "1", "--output-dir", str(tmp_path),
            "--no-pixel-window", "--float32", "--threads", "1"]
    assert main(args) == 0
    first = (tmp_path / "sky_0000.fits").read_bytes()
    capsys.readouterr()
    assert main(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "output exists" in err[0] and "--overwrite" in err[0]
    assert (tmp_path / "sky_0000.fits").read_bytes() == first
    assert main(args + ["--overwrite"]) == 0
    m, info = read_sky_map(tmp_path / "sky_0000.fits")
    assert "32" in info.dtype_in_file
    assert fits.getheader(tmp_path / "sky_0000.fits", 1)["TFORM1"] == "E"


def test_hits_map_gives_partial_sky_files(tmp_path, table):
    path, _ = table
    hits = np.zeros(12 * 16**2)
    hits[:1000] = np.linspace(1.0, 5.0, 1000)
    hits_path = tmp_path / "hits.fits"
    write_sky_map(hits_path, np.where(hits > 0, hits, np.nan), unit=None, observed_only=True)
    assert main(["simulate", "--spectrum", str(path), "--nside", "16", "--noise-depth", "100", "--hits",
                 str(hits_path), "--seed", "3", "--output-dir", str(tmp_path), "--threads", "1"]) == 0
    m, info = read_sky_map(tmp_path / "sky_0000.fits")
    assert info.n_missing == 12 * 16**2 - 1000
    assert np.all(np.isfinite(m[:1000])) and np.all(np.abs(m[:1000]) < 1e-2)


@pytest.mark.parametrize(
    "extra, message",
    [
        (["--sims", "1"], "--nside is required"),
        (["--sims", "0"], "nothing to do"),
        (["--nside", "16", "--noise-knee", "20"], "together"),
        (["--nside", "16", "--hits", "x.fits"], "need --noise-depth"),
        (["--nside", "16", "--prefix", "a/b"], "--prefix"),
        (["--nside", "16", "--lmax", "100"], "'--lmax' parameter"),
        (["--nside", "16", "--spectrum", "missing.csv"], "no such file"),
        (["--nside", "16", "--output-dir", "/nonexistent/dir/sims"], "parent directory does not exist"),
        (["--nside", "16", "--pixelise", "--no-pixel-window"], "leave out --no-pixel-window"),
    ],
)
def test_usage_errors_are_one_line_exit_2(tmp_path, extra, message, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["simulate", "--seed", "1", *extra]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0]
    assert not list(tmp_path.glob("*.fits"))


def test_spectrum_longer_lmax_than_table(tmp_path, table, capsys):
    path, _ = table
    assert main(["simulate", "--spectrum", str(path), "--nside", "32", "--seed", "1",
                 "--output-dir", str(tmp_path)]) == 2
    assert "the table ends at ell = 47" in capsys.readouterr().err


def test_write_fiducial_table_only(tmp_path, capsys):
    out = tmp_path / "fid.csv"
    assert main(["simulate", "--write-spectrum", str(out), "--lmax", "300", "--sims", "0"]) == 0
    cl = read_spectrum_table(out)
    assert cl.shape == (301,) and cl[0] == 0 and cl[1] == 0
    ell = np.arange(301)
    dl = ell * (ell + 1) * cl / (2 * math.pi) * 1e12
    assert 200 <= int(np.argmax(dl)) <= 240  # first acoustic peak near l ~ 220 (common practice)
    assert "fiducial" in out.read_text().splitlines()[2]


def _csv(path):
    lines = [ln for ln in Path(path).read_text().splitlines() if ln.strip() and not ln.startswith("#")]
    return lines[0].split(","), np.array([[float(c) for c in ln.split(",")] for ln in lines[1:]])


def _load_demo_script():
    spec = importlib.util.spec_from_file_location("make_demo_data", REPO / "scripts" / "make_demo_data.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.mark.slow
def test_demo_data_is_reproducible(tmp_path):
    script = _load_demo_script()
    assert script.main(["--output-dir", str(tmp_path), "--threads", "2"]) == 0
    assert script.main(["--output-dir", str(tmp_path)]) == 2  # refuses to overwrite
    total = 0
    for name in script.FILES:
        committed, fresh = REPO / "maps" / name, tmp_path / name
        total += committed.stat().st_size
        if name.endswith(".fits"):
            if name.endswith("mask.fits"):
                a, b = read_mask(committed), read_mask(fresh)
            elif "iqu" in name:  # I, Q and U
                from cmbtools.maps import read_iqu

                a, b = read_iqu(committed)[0], read_iqu(fresh)[0]
            else:
                a, b = read_sky_map(committed, unit="K")[0], read_sky_map(fresh, unit="K")[0]
            np.testing.assert_array_equal(np.isfinite(a) & (a > -1e30), np.isfinite(b) & (b > -1e30))
            np.testing.assert_allclose(a, b, rtol=2e-7, atol=1e-12)  # float32 precision
        else:
            (na, ta), (nb, tb) = _csv(committed), _csv(fresh)
            assert na == nb
            # the fiducial tables come out of scipy's ODE integration and quadrature, whose last digits move between
            # scipy releases and machines (measured: 5.2e-7 relative in fiducial_pol_cl.csv with scipy 1.17.1 against
            # the committed file); the other tables are exact
            rtol = 2e-6 if name.startswith("fiducial") else 1e-8
            np.testing.assert_allclose(ta, tb, rtol=rtol, atol=0)
    assert total < 5 * 1024 * 1024
    # the demo scenario: 15 sources inside the 50-degree Tern Field around (250, -55)
    names, src = _csv(REPO / "maps" / "tern_sources.csv")
    assert names[:2] == ["lon_deg", "lat_deg"] and src.shape[0] == 15
    import healpy as hp

    c = hp.ang2vec(250.0, -55.0, lonlat=True)
    v = hp.ang2vec(src[:, 0], src[:, 1], lonlat=True)
    assert np.all(np.degrees(np.arccos(v @ c)) < 50.0 - 3.0)
