"""Workflows that connect and one vocabulary across the subcommands (run as a user runs them)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent
while not ((ROOT / "maps").is_dir() and (ROOT / "cmbtools").is_dir()):  # the repository root (tests may be nested)
    ROOT = ROOT.parent
MAPS = ROOT / "maps"
STEP = 300  # seconds: a generous limit for one command


def _env():
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    env["CMBTOOLS_NUM_THREADS"] = "1"
    env.pop("PYTHONWARNINGS", None)
    return env


def cmbtools(*argv, cwd, timeout=STEP):
    return subprocess.run([sys.executable, "-m", "cmbtools", *map(str, argv)], cwd=cwd, env=_env(),
                          capture_output=True, text=True, timeout=timeout)


def small_mask(directory, name="mask.fits", cap="0,30,70", nside=16):
    out = cmbtools("mask", "--nside", nside, "--keep-cap", cap, "-o", name, cwd=directory)
    assert out.returncode == 0, out.stderr
    return directory / name


def read_fits_map(path):
    from astropy.io import fits

    with fits.open(path) as hdul:
        data = hdul[1].data
        return np.array(data[data.columns[0].name], dtype=np.float64).reshape(-1), hdul[1].header


# ------------------------------------------------------------------ inputs checked before any work


def test_a_theory_table_too_short_for_the_figure_fails_before_anything_is_written(tmp_path):
    lines = (MAPS / "fiducial_cl.csv").read_text().splitlines()
    (tmp_path / "short.csv").write_text("\n".join(lines[:200]) + "\n")  # stops near ell 195
    argv = ("spectrum", MAPS / "tern_half1.fits", "--mask", MAPS / "tern_mask.fits", "--theory", "short.csv",
            "-o", "t.csv", "--figure", "t.png")
    out = cmbtools(*argv, cwd=tmp_path)
    assert out.returncode == 2
    assert out.stderr.startswith("cmbtools spectrum: error: The --theory table 'short.csv' stops at ell=")
    # no beam on an nside-128 map: the default bins end at 2 nside = 256 (lmax is 383)
    assert "the bins reach ell=256" in out.stderr and len(out.stderr.splitlines()) == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["short.csv"]  # all outputs or none


def test_operator_cache_says_whether_it_was_built_reused_or_rebuilt(tmp_path):
    mask = small_mask(tmp_path)
    argv = ["spectrum", MAPS / "tern_half1.fits", "--mask", mask, "-o", "a.csv", "--operator-cache", "op.npz",
            "--overwrite"]
    # the demo map is nside 128: make a matching small map first
    out = cmbtools("simulate", "--nside", 16, "--seed", 4, "--sims", 1, "--output-dir", ".", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    argv[1] = "sky_0000.fits"
    first = cmbtools(*argv, cwd=tmp_path)
    assert first.returncode == 0, first.stderr
    assert "  operator cache: built and saved (op.npz)" in first.stdout.splitlines()
    second = cmbtools(*argv, cwd=tmp_path)
    assert "  operator cache: reused (op.npz)" in second.stdout.splitlines()
    third = cmbtools(*argv, "--bin-width", 8, cwd=tmp_path)  # other bins: the cached operator does not fit
    assert third.returncode == 0, third.stderr
    assert "  operator cache: rebuilt, the file held another estimator (op.npz)" in third.stdout.splitlines()
    assert "stale" in third.stderr


def test_log_bins_have_a_minimum_width_so_the_default_works(tmp_path):
    # 30 log bins at nside 128 on the demo patch used to start with ell = 2 alone and stop as ill-conditioned
    out = cmbtools("spectrum", MAPS / "tern_sky.fits", "--mask", MAPS / "tern_mask.fits", "--beam-fwhm", 25,
                   "--log-bins", 30, "-o", "log.csv", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    rows = [line.split(",") for line in (tmp_path / "log.csv").read_text().splitlines()
            if line and not line.startswith("#")][1:]
    widths = [int(r[1]) - int(r[0]) + 1 for r in rows]
    # default smallest width: 1/(2 f_sky) rounded up, f_sky = 0.163 -> 4 multipoles
    assert min(widths) == 4 and len(rows) == 30
    assert rows[0][:2] == ["2", "5"]


def test_log_bin_edges_follow_log_spacing_above_the_minimum_width():
    from cmbtools.spectrum import Binning

    b = Binning.log_spaced(2, 383, 30, min_width=4)
    assert b.n_ell.min() == 4 and b.n_bins == 30 and b.lmin == 2 and b.lmax == 383
    ratios = (b.ell_max[-8:] + 1) / b.ell_min[-8:]
    # above the minimum width the edges are evenly spaced in log(ell) again (ratio within rounding)
    assert np.ptp(ratios) < 0.02


def test_two_masks_print_each_sky_fraction_and_the_cross_spectrum_one(tmp_path):
    from cmbtools import maps

    out = cmbtools("mask", "--nside", 128, "--keep-cap", "250,-55,40", "-o", "m2.fits", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    out = cmbtools("spectrum", MAPS / "tern_half1.fits", MAPS / "tern_half2.fits", "--mask", MAPS / "tern_mask.fits",
                   "--mask2", "m2.fits", "--bin-width", 24, "-o", "x.csv", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    w1 = maps.read_mask(MAPS / "tern_mask.fits")
    w2 = maps.read_mask(tmp_path / "m2.fits")
    cross = maps.mask_moments(np.sqrt(w1 * w2)).f_sky_eff
    line = next(s for s in out.stdout.splitlines() if "sky fraction" in s)
    assert line == (f"  sky fraction: mask 1 f_sky {w1.mean():.3f}, mask 2 f_sky {w2.mean():.3f}; "
                    f"cross-spectrum f_sky_eff {cross:.3f}")


def test_estimator_sky_fractions_mean_what_their_docstrings_say():
    from cmbtools import maps, spectrum

    w1 = maps.cap_mask(16, 0.0, 30.0, 70.0)
    w2 = maps.cap_mask(16, 20.0, 30.0, 60.0)
    est = spectrum.SpectrumEstimator(w1, spectrum.Binning.uniform(2, 47, 8), mask2=w2)
    m1 = maps.mask_moments(w1)
    assert est.f_sky == pytest.approx(m1.f_sky, rel=1e-12)
    assert est.f_sky_eff == pytest.approx(m1.f_sky_eff, rel=1e-12)  # mask 1's, for its auto-spectrum
    assert est.f_sky_eff_cross == pytest.approx(maps.mask_moments(np.sqrt(w1 * w2)).f_sky_eff, rel=1e-12)
    assert "mask 1" in type(est).f_sky_eff.__doc__ and "cross" in type(est).f_sky_eff_cross.__doc__


# ------------------------------------------------------------------ validate: bins and cross mode


def test_validate_takes_the_binning_options_of_spectrum(tmp_path):
    mask = small_mask(tmp_path)
    out = cmbtools("validate", mask, "--bin-edges", "2,10,20,35,48", "--sims", 3, "--seed", 1, "--workers", 1,
                   "--run-dir", "r1", "--no-progress", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    summary = json.loads((tmp_path / "r1" / "summary.json").read_text())
    assert summary["bins"]["ell_min"] == [2, 10, 20, 35] and summary["bins"]["ell_max"] == [9, 19, 34, 47]
    out = cmbtools("validate", mask, "--log-bins", 5, "--min-bin-width", 4, "--sims", 3, "--seed", 1, "--workers", 1,
                   "--run-dir", "r2", "--no-progress", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    summary = json.loads((tmp_path / "r2" / "summary.json").read_text())
    bins = summary["bins"]
    widths = np.array(bins["ell_max"]) - np.array(bins["ell_min"]) + 1
    # no beam: the default bins end at 2 nside = 32 (not at lmax = 47), with one warning line
    assert bins["ell_min"][0] == 2 and bins["ell_max"][-1] == 32 and widths.min() >= 4
    assert out.stderr.startswith("cmbtools: warning: no beam") and "2*nside = 32" in out.stderr


def test_validate_cross_mode_with_two_masks_has_no_noise_bias(tmp_path):
    mask = small_mask(tmp_path)
    small_mask(tmp_path, "mask2.fits", cap="10,30,65")
    # --keep-monopole-dipole: the removal biases the lowest bin on a small patch (README, Cautions)
    out = cmbtools("validate", mask, "--mask2", "mask2.fits", "--noise-depth", 2000, "--bin-width", 8, "--sims", 40,
                   "--keep-monopole-dipole",
                   "--seed", 5, "--workers", 2, "--run-dir", "rx", "--no-progress", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert "cross-spectrum of two splits" in out.stdout
    summary = json.loads((tmp_path / "rx" / "summary.json").read_text())
    assert summary["settings"]["spectrum_kind"] == "cross"
    # independent noise in the two splits: no noise bias, so every bin's mean agrees with the input within
    # its standard error (|bias| < 4 sigma for each of 5 bins; false alarm ~3e-4, common practice)
    assert max(abs(b) for b in summary["bins"]["bias_sigma"]) < 4.0


# ------------------------------------------------------------------ simulate: split maps


def test_simulate_splits_share_the_sky_and_have_independent_noise(tmp_path):
    depth = 400.0  # uK-arcmin
    out = cmbtools("simulate", "--nside", 32, "--seed", 9, "--sims", 1, "--noise-depth", depth, "--splits", 2,
                   "--output-dir", "s", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    a, ha = read_fits_map(tmp_path / "s" / "sky_0000_split1.fits")
    b, hb = read_fits_map(tmp_path / "s" / "sky_0000_split2.fits")
    assert (ha["CMBSPLIT"], hb["CMBSPLIT"]) == (1, 2)
    # white noise per pixel: depth / pixel side, pixel side = sqrt(4 pi / npix) in arcmin (common practice)
    sigma = depth * 1e-6 / np.degrees(np.sqrt(4 * np.pi / a.size)) / 60.0
    diff = a - b  # the sky cancels: two independent noises, variance 2 sigma^2
    assert np.std(diff) == pytest.approx(np.sqrt(2) * sigma, rel=0.02)  # 12288 pixels: 1.3% standard error
    assert abs(np.corrcoef(diff, a + b)[0, 1]) < 0.05  # the sum's sky does not leak into the difference
    # split 1 is the map a run without --splits writes (the noise draws follow the sky's)
    out = cmbtools("simulate", "--nside", 32, "--seed", 9, "--sims", 1, "--noise-depth", depth, "--output-dir", "one",
                   cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    single, _ = read_fits_map(tmp_path / "one" / "sky_0000.fits")
    np.testing.assert_array_equal(single, a)


# ------------------------------------------------------------------ one vocabulary


@pytest.mark.parametrize("command", ["spectrum", "validate"])
def test_a_bin_width_of_zero_is_refused(tmp_path, command):
    args = [MAPS / "tern_sky.fits", "--mask", MAPS / "tern_mask.fits", "-o", "x.csv"] if command == "spectrum" \
        else [MAPS / "tern_mask.fits"]
    out = cmbtools(command, *args, "--bin-width", 0, cwd=tmp_path)
    assert out.returncode == 2
    assert "argument --bin-width: expected a whole number of at least 1, got '0'" in out.stderr


def test_the_same_thing_has_the_same_option_name_everywhere(tmp_path):
    import argparse

    from cmbtools import cli

    parser = cli.build_parser()
    subparsers = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices
    options = {name: {s for a in p._actions for s in a.option_strings if a.help != argparse.SUPPRESS}
               for name, p in subparsers.items()}
    # one name per thing
    for name in ("simulate", "spectrum", "validate"):
        assert {"--beam", "--beam-fwhm", "--noise-depth"} <= options[name] | {"--noise-depth"}
    assert {"--noise-knee", "--noise-slope", "--hits", "--sims", "--monopole", "--dipole"} <= (
        options["simulate"] & options["validate"])
    assert "--field" in options["mask"] and "--field" in options["inspect"]
    assert not {"--beam-file", "--knee-ell", "--knee-slope", "--count", "--map-field", "--monopole-uk",
                "--dipole-uk"} & set().union(*options.values())
    assert "--json" in options["physics"] and "--json" not in options["validate"]  # a flag: print as JSON
    assert "--json-file" in options["validate"]
    # the old spellings still work for one release, with a warning
    out = cmbtools("simulate", "--nside", 16, "--seed", 1, "--count", 1, "--output-dir", "old", cwd=tmp_path)
    assert out.returncode == 0 and "--count is deprecated" in out.stderr and (tmp_path / "old" / "sky_0000.fits").exists()


def test_monopole_and_dipole_take_the_same_values_in_simulate_and_validate(tmp_path, capsys):
    """--monopole UK and --dipole UK [LON LAT] mean the same in both commands: the maps of simulate with the
    former simulate-only spellings (--monopole-uk, --dipole-uk, kept with a warning) equal those of the new ones;
    a dipole given by its amplitude alone points to (60, 30) like validate's; other counts are refused."""
    from cmbtools import cli, maps

    def simulate(*extra, out):
        argv = ["simulate", "--nside", "8", "--seed", "4", "--sims", "1", "--no-pixel-window", "--threads", "1",
                "--output-dir", str(tmp_path / out), *map(str, extra)]
        code = cli.main(argv)
        return code, capsys.readouterr()

    code, _ = simulate("--monopole", 50, "--dipole", 80, 60, 30, out="new")
    assert code == 0
    code, printed = simulate("--monopole-uk", 50, "--dipole-uk", 80, 60, 30, out="old")
    assert code == 0 and "--monopole-uk is deprecated" in printed.err and "--dipole-uk is deprecated" in printed.err
    code, _ = simulate("--monopole", 50, "--dipole", 80, out="short")
    assert code == 0
    new = maps.read_sky_map(tmp_path / "new" / "sky_0000.fits")[0]
    np.testing.assert_array_equal(maps.read_sky_map(tmp_path / "old" / "sky_0000.fits")[0], new)
    np.testing.assert_array_equal(maps.read_sky_map(tmp_path / "short" / "sky_0000.fits")[0], new)
    base, _ = simulate(out="plain")
    plain = maps.read_sky_map(tmp_path / "plain" / "sky_0000.fits")[0]
    # the added dipole: 80 uK towards (60, 30) on top of 50 uK (healpy's own unit vectors, common practice)
    import healpy as hp

    vec = np.array(hp.pix2vec(8, np.arange(768)))
    np.testing.assert_allclose(new - plain, 50e-6 + 80e-6 * (hp.ang2vec(60.0, 30.0, lonlat=True) @ vec), atol=1e-12)
    for command, extra in (("simulate", ["--nside", "8", "--seed", "4", "--output-dir", str(tmp_path / "bad")]),
                           ("validate", [str(MAPS / "tern_mask.fits"), "--run-dir", str(tmp_path / "badrun")])):
        code = cli.main([command, *extra, "--dipole", "80", "60"])
        printed = capsys.readouterr()
        assert code == 2 and printed.err.count("\n") == 1
        assert "--dipole takes UK or UK LON LAT" in printed.err and "Got 2 values" in printed.err
    assert not (tmp_path / "bad").exists() and not (tmp_path / "badrun").exists()


def test_every_command_says_wrote(tmp_path):
    out = cmbtools("mask", "--nside", 16, "--cut-latitude", 20, "-o", "m.fits", cwd=tmp_path)
    assert out.returncode == 0
    assert out.stdout.splitlines()[0] == "wrote           m.fits"
    assert "written" not in out.stdout


# ------------------------------------------------------------------ noise bias from the command line


def test_noise_bias_from_the_half_difference_round_trips_through_its_table(tmp_path):
    # the demo map is the mean of the two halves: (HALF1 - HALF2) / 2 holds its noise without the sky
    common = ("spectrum", MAPS / "tern_sky.fits", "--mask", MAPS / "tern_mask.fits", "--beam-fwhm", 25,
              "--bin-width", 24)
    out = cmbtools(*common, "--half-difference", MAPS / "tern_half1.fits", MAPS / "tern_half2.fits",
                   "--write-noise-spectrum", "noise.csv", "-o", "auto.csv", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert "  noise bias subtracted: half-difference of" in out.stdout
    # the written noise table is read back by --noise-spectrum and gives the same bandpowers
    again = cmbtools(*common, "--noise-spectrum", "noise.csv", "-o", "auto2.csv", cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    from cmbtools.spectrum import Bandpowers

    a = Bandpowers.read_csv(tmp_path / "auto.csv")
    b = Bandpowers.read_csv(tmp_path / "auto2.csv")
    np.testing.assert_allclose(b.cl, a.cl, rtol=1e-9, atol=1e-9 * np.abs(a.cl).max())
    noise = Bandpowers.read_csv(tmp_path / "noise.csv")
    raw = cmbtools(*common, "-o", "raw.csv", cwd=tmp_path)
    assert raw.returncode == 0, raw.stderr
    r = Bandpowers.read_csv(tmp_path / "raw.csv")
    np.testing.assert_allclose(r.cl - noise.cl, a.cl, rtol=1e-9, atol=1e-9 * np.abs(a.cl).max())
    # and the noise-subtracted auto-spectrum agrees with the cross-spectrum of the halves (no noise bias there):
    # within 4 errors of the auto-spectrum in every bin (Knox errors; the two share the sky, so the
    # difference is noise-dominated and well inside that)
    cross = cmbtools("spectrum", MAPS / "tern_half1.fits", MAPS / "tern_half2.fits", "--mask", MAPS / "tern_mask.fits",
                     "--beam-fwhm", 25, "--bin-width", 24, "-o", "cross.csv", cwd=tmp_path)
    assert cross.returncode == 0, cross.stderr
    c = Bandpowers.read_csv(tmp_path / "cross.csv")
    assert np.all(np.abs(a.cl - c.cl) < 4 * a.cl_err)
    assert np.all(noise.cl[-4:] > 3 * np.abs(a.cl[-4:] - c.cl[-4:]))  # the bias removed is far larger than that


def test_a_noise_table_with_other_bins_is_refused_before_writing(tmp_path):
    common = ("spectrum", MAPS / "tern_sky.fits", "--mask", MAPS / "tern_mask.fits", "--beam-fwhm", 25)
    out = cmbtools(*common, "--bin-width", 24, "--half-difference", MAPS / "tern_half1.fits", MAPS / "tern_half2.fits",
                   "--write-noise-spectrum", "noise.csv", "-o", "a.csv", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    out = cmbtools(*common, "--bin-width", 32, "--noise-spectrum", "noise.csv", "-o", "b.csv", cwd=tmp_path)
    assert out.returncode == 2 and "has other bins than this spectrum" in out.stderr
    assert not (tmp_path / "b.csv").exists()


def test_a_spectrum_table_written_by_cmbtools_is_accepted_as_a_noise_spectrum(tmp_path):
    # `simulate --write-noise-spectrum` writes the noise model's N_l (ell,cl_k2,dl_uk2); `spectrum` reads it
    out = cmbtools("simulate", "--nside", 128, "--noise-depth", 35, "--write-noise-spectrum", "nl.csv", "--sims", 0,
                   cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert (tmp_path / "nl.csv").read_text().splitlines()[-384].startswith("0,")
    from cmbtools.simulate import NoiseModel, noise_spectrum

    expected = noise_spectrum(NoiseModel(35.0), 383, 128)
    from cmbtools._core.spectrum_tables import read_noise_spectrum_table

    np.testing.assert_allclose(read_noise_spectrum_table(tmp_path / "nl.csv"), expected, rtol=1e-10)
    out = cmbtools("spectrum", MAPS / "tern_sky.fits", "--mask", MAPS / "tern_mask.fits", "--beam-fwhm", 25,
                   "--bin-width", 24, "--noise-spectrum", "nl.csv", "-o", "a.csv", cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    assert "  noise bias subtracted: nl.csv" in out.stdout


def test_a_noise_table_may_not_overwrite_a_noise_map_given_as_input(tmp_path):
    import shutil

    shutil.copy(MAPS / "tern_half1.fits", tmp_path / "h1.fits")
    out = cmbtools("spectrum", MAPS / "tern_sky.fits", "--mask", MAPS / "tern_mask.fits", "--half-difference",
                   "h1.fits", MAPS / "tern_half2.fits", "--write-noise-spectrum", "h1.fits", "-o", "a.csv",
                   "--overwrite", cwd=tmp_path)
    assert out.returncode == 2 and "is also an input of this command" in out.stderr
    assert (tmp_path / "h1.fits").read_bytes() == (MAPS / "tern_half1.fits").read_bytes()
