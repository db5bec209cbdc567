"""``cmbtools spectrum`` end to end, in process, on small files (nside 32)."""

from __future__ import annotations

import numpy as np
import pytest

from cmbtools import maps
from cmbtools._core import sht as _sht
from cmbtools.cli import main
from cmbtools.spectrum import Bandpowers, Binning, SpectrumEstimator, gaussian_beam, pixel_window

NSIDE, LMAX = 32, 95
FWHM = 90.0


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("tern")
    rng = np.random.default_rng(99)
    ell = np.arange(LMAX + 1)
    cl = np.where(ell >= 2, 1e-9 * (20.0 / (ell + 20.0)) ** 2, 0.0)
    n = _sht.alm_size(LMAX)
    alm = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * np.sqrt(cl[_sht.alm_ell(LMAX)] / 2)
    alm[: LMAX + 1] = alm[: LMAX + 1].real * np.sqrt(2)
    # the observed map: beam and pixel window applied in harmonic space
    window = gaussian_beam(FWHM, LMAX) * pixel_window(NSIDE, LMAX)
    sky = _sht.alm2map(_sht.almxfl(alm, window, LMAX), NSIDE, LMAX, nthreads=1)
    m1 = sky + rng.standard_normal(sky.size) * 1e-6
    m2 = sky + rng.standard_normal(sky.size) * 1e-6
    mask = maps.apodize_mask(maps.cap_mask(NSIDE, 250.0, -55.0, 70.0), 10.0, nthreads=1)
    paths = {
        "map": d / "tern_map_a.fits",
        "map2": d / "tern_map_b.fits",
        "mask": d / "tern_mask.fits",
        "theory": d / "tern_theory.csv",
        "noise": d / "tern_noise.csv",
        "dir": d,
    }
    maps.write_sky_map(paths["map"], m1)
    maps.write_sky_map(paths["map2"], m2)
    maps.write_mask(paths["mask"], mask)
    paths["theory"].write_text("ell,cl\n" + "".join(f"{i},{float(c)!r}\n" for i, c in enumerate(cl)))
    nl = (1e-6) ** 2 * 4 * np.pi / sky.size
    paths["noise"].write_text("# unit: K^2\nell,nl\n" + "".join(f"{i},{nl!r}\n" for i in range(LMAX + 1)))
    paths["arrays"] = (m1, m2, mask)
    return paths


def test_auto_spectrum_end_to_end(files, tmp_path, capsys):
    out = tmp_path / "tern_spectrum.csv"
    code = main([
        "spectrum", str(files["map"]), "--mask", str(files["mask"]), "--beam-fwhm", str(FWHM),
        "--bin-width", "12", "--noise-spectrum", str(files["noise"]), "-o", str(out),
        "--fits", str(tmp_path / "t.fits"), "--figure", str(tmp_path / "t.png"),
        "--theory", str(files["theory"]), "--threads", "1",
    ])
    assert code == 0
    captured = capsys.readouterr()
    text = captured.out
    # the 90 arcmin beam is narrower than two 110-arcmin pixels: the default bins end at 2 nside = 64, not at
    # lmax = 95, and one warning line says why (the power the beam keeps at 3 nside: exp(-l(l+1) sigma^2) = 0.32)
    assert "auto-spectrum" in text and "f_sky" in text and "wrote" in text
    assert "5 bins of 12-15 multipoles (ell 2-64)" in text
    warning = captured.err.strip().splitlines()
    assert len(warning) == 1 and warning[0].startswith("cmbtools: warning: a beam narrower than two pixels")
    assert "keeps 0.32 of the sky's power" in warning[0] and "2*nside = 64" in warning[0]
    bp = Bandpowers.read_csv(out)
    assert bp.metadata["map"] == str(files["map"])
    assert len(bp.metadata["map_sha256"]) == 64
    assert bp.metadata["beam"] == "gaussian fwhm_arcmin=90"
    # the same numbers as the library call with the same settings
    m1, _, mask = files["arrays"]
    # (--theory is also the guess spectrum of the deprojection-bias correction)
    from cmbtools._core.spectrum_tables import read_spectrum_table

    est = SpectrumEstimator(mask, Binning.uniform(2, 2 * NSIDE, 12), lmax=LMAX, beam=FWHM, nthreads=1,
                            guess_cl=read_spectrum_table(files["theory"]))
    nl = np.full(LMAX + 1, (1e-6) ** 2 * 4 * np.pi / m1.size)
    ref = est.estimate(maps.read_sky_map(files["map"])[0], noise_cl=nl)
    np.testing.assert_allclose(bp.cl, ref.cl, rtol=1e-12)
    # the errors: the Gaussian covariance of the measured power with its noise (no per-pixel noise given)
    from cmbtools.spectrum import GaussianCovariance

    total = est.estimate(maps.read_map(files["map"])[0])
    np.testing.assert_allclose(bp.cl_err, GaussianCovariance(est, nthreads=1).covariance(total).errors, rtol=1e-9)
    assert (tmp_path / "t.fits").stat().st_size > 0
    assert (tmp_path / "t.png").read_bytes()[:4] == b"\x89PNG"


def test_pixel_model_options(files, tmp_path, capsys):
    # default (nside 32): maps averaged into pixels; --pixel-centre-maps: the pixel window alone (these test maps
    # are synthesised at the pixel centres); each is recorded in the table and equals the library's result
    m1, _, mask = files["arrays"]
    bins = Binning.uniform(2, 2 * NSIDE, 12)
    for extra, averaged, record in (((), True, "averaged"), (("--pixel-centre-maps",), False, "sampled at the pixel")):
        out = tmp_path / f"pix{len(extra)}.csv"
        assert main(["spectrum", str(files["map"]), "--mask", str(files["mask"]), "--beam-fwhm", str(FWHM),
                     "--bin-width", "12", "-o", str(out), "--threads", "1", "--errors", "knox", *extra]) == 0
        bp = Bandpowers.read_csv(out)
        assert bp.metadata["pixels"].startswith(record)
        est = SpectrumEstimator(mask, bins, lmax=LMAX, beam=FWHM, averaged_pixels=averaged, nthreads=1)
        np.testing.assert_allclose(bp.cl, est.estimate(maps.read_sky_map(files["map"])[0]).cl, rtol=1e-12)
    capsys.readouterr()
    assert main(["spectrum", str(files["map"]), "--mask", str(files["mask"]), "--averaged-pixels",
                 "--no-pixel-window", "-o", str(tmp_path / "x.csv")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "pixel window" in err[0]


def test_cross_spectrum_with_operator_cache(files, tmp_path, capsys):
    cache = tmp_path / "op.npz"
    args = ["spectrum", str(files["map"]), str(files["map2"]), "--mask", str(files["mask"]),
            "--beam-fwhm", str(FWHM), "--log-bins", "6", "--lmin", "8", "--operator-cache", str(cache),
            "--threads", "1"]
    assert main(args + ["-o", str(tmp_path / "a.csv")]) == 0
    assert cache.exists()
    assert main(args + ["-o", str(tmp_path / "b.csv")]) == 0  # loads the cached estimator
    a = Bandpowers.read_csv(tmp_path / "a.csv")
    b = Bandpowers.read_csv(tmp_path / "b.csv")
    np.testing.assert_array_equal(a.cl, b.cl)
    assert a.metadata["spectrum"] == "cross" and a.metadata["map2"] == str(files["map2"])
    assert "cross-spectrum" in capsys.readouterr().out


def test_existing_output_is_refused_before_any_work(files, tmp_path, capsys):
    out = tmp_path / "exists.csv"
    out.write_text("keep me\n")
    code = main(["spectrum", str(files["map"]), "--mask", str(files["mask"]), "-o", str(out),
                 "--figure", str(tmp_path / "fig.png")])
    assert code == 2
    err = capsys.readouterr().err
    assert "output exists" in err and err.count("\n") == 1
    assert out.read_text() == "keep me\n"
    assert not (tmp_path / "fig.png").exists()
    assert main(["spectrum", str(files["map"]), "--mask", str(files["mask"]), "-o", str(out),
                 "--overwrite", "--threads", "1"]) == 0
    assert out.read_text().startswith("# cmbtools bandpowers")


@pytest.mark.parametrize(
    "extra, message",
    [
        (["--figure", "fig.jpg"], ".png or .pdf"),
        (["--lmax", "200"], "lmax"),
        (["--bin-edges", "2,10,x"], "whole numbers"),
        (["--mask2", "MASK"], "second map"),
        (["--beam", "missing_beam.csv"], "no such file"),
    ],
)
def test_bad_input_exits_2_with_one_line(files, tmp_path, capsys, monkeypatch, extra, message):
    monkeypatch.chdir(tmp_path)
    extra = [str(files["mask"]) if e == "MASK" else e for e in extra]
    code = main(["spectrum", str(files["map"]), "--mask", str(files["mask"]), "-o", "t.csv"] + extra)
    assert code == 2
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1
    assert not (tmp_path / "t.csv").exists()


def test_resolution_mismatch_exits_2(files, tmp_path, capsys):
    small = tmp_path / "mask16.fits"
    maps.write_mask(small, np.ones(12 * 16**2))
    code = main(["spectrum", str(files["map"]), "--mask", str(small), "-o", str(tmp_path / "t.csv")])
    assert code == 2
    assert "nside" in capsys.readouterr().err


@pytest.mark.filterwarnings("always::cmbtools.exceptions.CmbtoolsWarning")
def test_missing_pixels_are_dropped_with_a_warning(files, tmp_path, capsys):
    m1, _, mask = files["arrays"]
    holed = m1.copy()
    holed[np.flatnonzero(mask > 0.5)[:4]] = maps.UNSEEN
    path = tmp_path / "holed.fits"
    maps.write_sky_map(path, holed)
    # the CLI prints warnings as one stderr line (cli.main routes warnings.showwarning)
    code = main(["spectrum", str(path), "--mask", str(files["mask"]), "-o", str(tmp_path / "t.csv"),
                 "--threads", "1"])
    assert code == 0
    err = capsys.readouterr().err
    assert "warning:" in err and "4 missing pixels inside the mask" in err
    # no beam: the default bins end at 2 nside = 64, with a warning line
    assert "cmbtools: warning: no beam (109.9 arcmin at nside 32)" in err and "2*nside = 64" in err
    eff = mask.copy()
    eff[np.flatnonzero(mask > 0.5)[:4]] = 0.0
    ref = SpectrumEstimator(eff, Binning.uniform(2, 2 * NSIDE, 16), lmax=LMAX, nthreads=1).estimate(
        np.where(eff > 0, holed, 0.0))
    np.testing.assert_allclose(Bandpowers.read_csv(tmp_path / "t.csv").cl, ref.cl, rtol=1e-12)


def test_usage_errors_exit_2(files, capsys):
    with pytest.raises(SystemExit) as info:
        main(["spectrum", str(files["map"]), "-o", "x.csv"])  # --mask is required
    assert info.value.code == 2
    with pytest.raises(SystemExit) as info:
        main(["spectrum", str(files["map"]), "--mask", "m", "--bin-width", "4", "--log-bins", "3", "-o", "x.csv"])
    assert info.value.code == 2


def test_a_spectrum_table_written_by_cmbtools_is_accepted_as_the_noise_spectrum(files, tmp_path, capsys):
    # every table cmbtools writes is accepted wherever a table of its kind is read
    from cmbtools.simulate import write_spectrum_table

    nl = np.full(LMAX + 1, (1e-6) ** 2 * 4 * np.pi / (12 * NSIDE**2))
    noise = tmp_path / "noise_written.csv"
    write_spectrum_table(noise, nl)  # ell,cl_k2,dl_uk2
    out = tmp_path / "with_written_noise.csv"
    code = main(["spectrum", str(files["map"]), "--mask", str(files["mask"]), "--beam-fwhm", str(FWHM),
                 "--bin-width", "12", "--noise-spectrum", str(noise), "-o", str(out), "--threads", "1"])
    assert code == 0, capsys.readouterr().err
    m1, _, mask = files["arrays"]
    est = SpectrumEstimator(mask, Binning.uniform(2, 2 * NSIDE, 12), lmax=LMAX, beam=FWHM, nthreads=1)
    ref = est.estimate(maps.read_sky_map(files["map"])[0], noise_cl=nl)
    # the table keeps 11 significant digits of N_l: the bandpowers agree to well below their errors
    np.testing.assert_allclose(Bandpowers.read_csv(out).cl, ref.cl, rtol=1e-9, atol=1e-9 * float(np.max(ref.cl_err)))
