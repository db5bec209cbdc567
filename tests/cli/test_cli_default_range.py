"""The top of the bins on the command line: the default range, its warning line, and the user's choice winning.

``spectrum`` (temperature and I, Q, U files) and ``validate`` (temperature and ``--polarized``) end the bins of
``--bin-width``/``--log-bins`` at the default top of the range when no ``--lmax`` is given: 2.5 nside, or the
last l where a Gaussian beam keeps B_l^2 >= 1e-3, or 2 nside under a beam narrower than two pixels (or none).
The expected tops below are computed here from the Gaussian beam's transfer function
B_l = exp(-l(l+1) sigma^2 / 2), sigma = FWHM / sqrt(8 ln 2) (common practice), not read from the library.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from cmbtools import maps
from cmbtools.cli import build_parser, main
from cmbtools.spectrum import Bandpowers

NSIDE = 32  # pixels of 110 arcmin: sqrt(4 pi / (12 nside^2)) rad


def _beam_top(fwhm_arcmin):
    """The last l with exp(-l(l+1) sigma^2) >= 1e-3 (Gaussian beam, common practice)."""
    sigma = math.radians(fwhm_arcmin / 60.0) / math.sqrt(8.0 * math.log(2.0))
    ell = 0
    while math.exp(-(ell + 1) * (ell + 2) * sigma**2) >= 1e-3:
        ell += 1
    return ell


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("range")
    rng = np.random.default_rng(3)
    npix = 12 * NSIDE**2
    mask = maps.apodize_mask(maps.cap_mask(NSIDE, 0.0, 60.0, 60.0), 10.0, nthreads=1)
    maps.write_mask(d / "mask.fits", mask)
    maps.write_sky_map(d / "map.fits", rng.standard_normal(npix) * 1e-5)
    iqu = rng.standard_normal((3, npix)) * 1e-5
    from cmbtools.maps.polarized_fits import write_iqu

    write_iqu(d / "iqu.fits", iqu)
    return d


def _spectrum(files, tmp_path, *extra, map_name="map.fits"):
    out = tmp_path / "t.csv"
    code = main(["spectrum", str(files / map_name), "--mask", str(files / "mask.fits"), "-o", str(out),
                 "--threads", "1", *extra])
    return code, out


def test_the_beam_and_the_grid_set_the_default_top(files, tmp_path, capsys):
    # a 300 arcmin beam (2.7 pixels) keeps 1e-3 of the power up to l = 70, below 2.5 nside = 80
    assert _beam_top(300.0) == 70
    code, out = _spectrum(files, tmp_path, "--beam-fwhm", "300", "--bin-width", "8")
    assert code == 0
    captured = capsys.readouterr()
    assert captured.err == ""  # a beam of more than two pixels: no warning
    bp = Bandpowers.read_csv(out)
    assert bp.ell_min[0] == 2 and bp.ell_max[-1] == 70
    assert "(ell 2-70)" in captured.out and "lmax 95" in captured.out  # the transforms still go to 3 nside - 1
    # a 230 arcmin beam (2.1 pixels) keeps 1e-3 beyond 2.5 nside: the grid's limit, 80, ends the bins
    assert _beam_top(230.0) > 80
    code, out = _spectrum(files, tmp_path, "--beam-fwhm", "230", "--bin-width", "8", "--overwrite")
    assert code == 0 and capsys.readouterr().err == ""
    assert Bandpowers.read_csv(out).ell_max[-1] == 80


def test_a_narrow_beam_ends_the_bins_at_two_nside_with_one_warning_line(files, tmp_path, capsys):
    # 150 arcmin < two pixels (220 arcmin): it keeps exp(-96*97 sigma^2) = 0.12 of the power at l = 3 nside
    sigma = math.radians(150.0 / 60.0) / math.sqrt(8.0 * math.log(2.0))
    kept = math.exp(-96 * 97 * sigma**2)
    code, out = _spectrum(files, tmp_path, "--beam-fwhm", "150", "--log-bins", "5")
    assert code == 0
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("cmbtools: warning: a beam narrower than two pixels (109.9 arcmin")
    assert f"keeps {kept:.2g} of the sky's power at l = 3*nside" in err[0] and "2*nside = 64" in err[0]
    assert Bandpowers.read_csv(out).ell_max[-1] == 64


def test_the_users_range_wins_over_the_default(files, tmp_path, capsys):
    code, out = _spectrum(files, tmp_path, "--beam-fwhm", "300", "--bin-width", "8", "--lmax", "95")
    assert code == 0 and capsys.readouterr().err == ""
    assert Bandpowers.read_csv(out).ell_max[-1] == 95
    code, out = _spectrum(files, tmp_path, "--bin-edges", "2,40,90", "--overwrite")
    assert code == 0
    bp = Bandpowers.read_csv(out)
    assert list(bp.ell_min) == [2, 40] and list(bp.ell_max) == [39, 89]
    err = capsys.readouterr().err.strip().splitlines()  # no beam: the aliasing is still said, once
    assert len(err) == 1 and "no beam" in err[0] and "(the bins of --bin-edges are used)" in err[0]


def test_bad_input_stays_one_line_under_a_narrow_beam(files, tmp_path, capsys):
    # --lmin above the default top: one line that says how to set the range
    code, out = _spectrum(files, tmp_path, "--lmin", "70")
    assert code == 2 and not out.exists()
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--lmin (70) is above the default top of the bins (64" in err[0] and "--lmax" in err[0]
    # an error after the range was set: still only the error line (the warning comes with a finished run)
    code, out = _spectrum(files, tmp_path, "--beam", str(tmp_path / "missing_beam.csv"))
    assert code == 2 and not out.exists()
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


def test_iqu_spectra_follow_the_same_default_range(files, tmp_path, capsys):
    code, out = _spectrum(files, tmp_path, "--beam-fwhm", "300", "--bin-width", "8", map_name="iqu.fits")
    assert code == 0
    captured = capsys.readouterr()
    assert captured.err == "" and "polarized spectra" in captured.out and "(ell 2-70)" in captured.out
    text = [ln for ln in out.read_text().splitlines() if not ln.startswith("#")]
    assert text[0].startswith("spectrum,ell_min,ell_max")
    assert max(int(ln.split(",")[2]) for ln in text[1:]) == 70


def test_validate_uses_the_default_range_and_skies_to_four_nside(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("CMBTOOLS_NUM_THREADS", "1")
    nside = 16  # pixels of 220 arcmin; a 600 arcmin beam keeps 1e-3 of the power up to l = 34 < 2.5 nside = 40
    assert _beam_top(600.0) == 34
    maps.write_mask(tmp_path / "mask.fits", maps.cap_mask(nside, 0.0, 60.0, 70.0))
    common = ["--beam-fwhm", "600", "--bin-width", "8", "--sims", "2", "--seed", "1", "--workers", "1",
              "--no-progress"]
    assert main(["validate", str(tmp_path / "mask.fits"), *common, "--run-dir", str(tmp_path / "t")]) == 0
    captured = capsys.readouterr()
    doc = json.loads((tmp_path / "t" / "summary.json").read_text())
    assert doc["bins"]["ell_max"][-1] == 34 and doc["settings"]["sky_lmax"] == 4 * nside - 1
    assert "lmax 47" in captured.out and "(ell 2-34)" in captured.out and "to ell 63" in captured.out
    assert captured.err == ""
    assert main(["validate", str(tmp_path / "mask.fits"), *common, "--polarized", "--run-dir",
                 str(tmp_path / "p")]) == 0
    out = capsys.readouterr().out
    doc = json.loads((tmp_path / "p" / "summary.json").read_text())
    assert max(doc["bins"]["ell_max"]) == 34 and "(ell 2-34)" in out and "skies to ell 63" in out
    # the user's --lmax wins, and a cross-spectrum's split skies go to 4 nside - 1 as well (--sky-lmax moves it)
    assert main(["validate", str(tmp_path / "mask.fits"), *common, "--lmax", "40", "--cross", "--run-dir",
                 str(tmp_path / "x")]) == 0
    doc = json.loads((tmp_path / "x" / "summary.json").read_text())
    assert doc["bins"]["ell_max"][-1] == 40 and doc["settings"]["sky_lmax"] == 4 * nside - 1
    assert main(["validate", str(tmp_path / "mask.fits"), *common, "--lmax", "40", "--cross", "--sky-lmax", "50",
                 "--run-dir", str(tmp_path / "x50")]) == 0
    doc = json.loads((tmp_path / "x50" / "summary.json").read_text())
    assert doc["settings"]["sky_lmax"] == 50
    # the 600' beam leaves no signal in the bin ell 34-40 that --lmax 40 asks for: its measured transfer is not
    # positive here, so the transfer table is left out with one warning line and every other output is written
    f_b = np.array(doc["bins"]["transfer"], dtype=float)
    assert f_b[-1] <= 0 and np.all(f_b[:-1] > 0)
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "transfer.csv not written" in err[0] and "(ell 34-40)" in err[0]
    assert not (tmp_path / "x50" / "transfer.csv").exists() and (tmp_path / "x50" / "covariance.npz").is_file()


def test_the_help_states_the_default_range():
    parser = build_parser()
    for command in ("spectrum", "validate"):
        sub = parser._subparsers._group_actions[0].choices[command]
        text = " ".join(sub.format_help().split())
        assert "without --lmax they end at the default top of the range: 2.5 nside" in text
        assert "1e-3 of the sky's power" in text and "2 nside for a beam narrower than two pixels" in text
    validate = parser._subparsers._group_actions[0].choices["validate"]
    assert "(default 4 nside - 1, as real skies, for both splits with --cross;" in " ".join(validate.format_help().split())
