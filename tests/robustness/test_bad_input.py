"""The bad-input matrix of the finished modules (maps, masks, physics, outputs) and the CLI error policy.

Each case is checked twice where it applies: the Python API raises one
specific :mod:`cmbtools.exceptions` class with a message naming the file or
parameter and the problem, and the command line exits with status 2 and
exactly one line on standard error that names them too.  The memory
estimates of :mod:`cmbtools._core.memory` are tested here as well, with a
monkeypatched amount of available memory.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tracemalloc

import healpy as hp
import numpy as np
import pytest
from astropy.cosmology import LambdaCDM
from astropy.io import fits

from cmbtools import cli, maps, physics
from cmbtools._core import memory as _resources
from cmbtools._core.checks import UNSEEN
from cmbtools.exceptions import (
    CmbtoolsError,
    CmbtoolsWarning,
    IllConditionedError,
    InputFileError,
    InvalidInputError,
    MemoryLimitError,
    OutputExistsError,
    OutputPathError,
    ResolutionMismatchError,
)

NSIDE = 8
NPIX = 12 * NSIDE**2


def run_cli(capsys, *argv):
    """(exit status, stdout, stderr) of the CLI run in-process; argparse errors count as their exit status."""
    try:
        code = cli.main([str(a) for a in argv])
    except SystemExit as exc:
        code = exc.code
    out, err = capsys.readouterr()
    return code, out, err


def one_error_line(err, *fragments):
    """Standard error is exactly one line, an error report containing every fragment, and no traceback."""
    lines = err.splitlines()
    assert len(lines) == 1, f"expected one line on stderr, got {len(lines)}:\n{err}"
    line = lines[0]
    assert "error:" in line and "Traceback" not in err, line
    for fragment in fragments:
        assert str(fragment) in line, f"{fragment!r} not in {line!r}"
    return line


def sky(nside=NSIDE, seed=1):
    return np.random.default_rng(seed).normal(0.0, 1e-4, 12 * nside**2)


def write_table(path, values, **header):
    """A one-column binary table with the given header cards (for files cmbtools would not write)."""
    hdu = fits.BinTableHDU.from_columns([fits.Column(name="T", format="D", array=np.asarray(values, dtype=float))])
    for key, value in header.items():
        hdu.header[key] = value
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    return path


@pytest.fixture
def files(tmp_path):
    """Good and bad input files of every kind the map readers meet."""
    f = {}
    f["map"] = maps.write_sky_map(tmp_path / "map.fits", sky())
    f["map16"] = maps.write_sky_map(tmp_path / "map16.fits", sky(16))
    f["mask"] = maps.write_mask(tmp_path / "mask.fits", maps.cap_mask(NSIDE, 0.0, 30.0, 60.0))
    f["mask16"] = maps.write_mask(tmp_path / "mask16.fits", maps.cap_mask(16, 0.0, 30.0, 60.0))
    f["missing"] = tmp_path / "none.fits"
    f["directory"] = tmp_path / "a_directory.fits"
    f["directory"].mkdir()
    f["text"] = tmp_path / "notes.fits"
    f["text"].write_text("SIMPLE = this is not really a FITS file\n")
    good = f["map"].read_bytes()
    f["truncated"] = tmp_path / "truncated.fits"
    f["truncated"].write_bytes(good[: len(good) - 2880 - 100])  # the data block is cut short
    f["pixels"] = write_table(tmp_path / "pixels.fits", np.zeros(700), ORDERING="RING")
    f["nside12"] = write_table(tmp_path / "nside12.fits", np.zeros(12 * 12**2), ORDERING="RING")
    f["weights_big"] = maps.write_sky_map(tmp_path / "big.fits", np.full(NPIX, 1.5), unit=None)
    f["weights_zero"] = maps.write_sky_map(tmp_path / "zero.fits", np.zeros(NPIX), unit=None)
    f["all_missing"] = maps.write_sky_map(tmp_path / "holes.fits", np.full(NPIX, UNSEEN))
    return f


# ---------------------------------------------------------------- input files: API

@pytest.mark.parametrize(
    "key, fragment",
    [
        ("missing", "no such file"),
        ("directory", "is a directory, expected a file"),
        ("text", "cannot be read as FITS"),
        ("truncated", "truncated"),
        ("pixels", "holds 700 values, which is not 12*nside**2 and the file is not an explicit-index partial-sky file"),
        ("nside12", "nside 12, which is not a power of two"),
    ],
)
@pytest.mark.parametrize("reader", [maps.read_sky_map, maps.read_mask])
def test_unreadable_files_raise_input_file_error(files, key, fragment, reader):
    with pytest.raises(InputFileError) as info:
        reader(files[key])
    assert info.value.path == str(files[key])
    assert str(info.value).startswith(f"{files[key]}: ") and fragment in str(info.value)


@pytest.mark.parametrize(
    "key, fragment",
    [
        ("weights_big", "must have values in [0, 1]. Got values in [1.5, 1.5]"),
        ("weights_zero", "is zero everywhere"),
        ("all_missing", "is zero everywhere"),  # missing pixels of a mask file weigh 0
    ],
)
def test_invalid_mask_files(files, key, fragment):
    with pytest.raises(InputFileError, match="is not a valid mask") as info:
        if key == "all_missing":
            with pytest.warns(CmbtoolsWarning, match="hold no number"):
                maps.read_mask(files[key])
        else:
            maps.read_mask(files[key])
    assert fragment in str(info.value)


def test_missing_values_in_a_mask_file_weigh_zero(tmp_path):
    # documented choice: a mask *file* may mark pixels as missing (UNSEEN, NaN; partial-sky files leave
    # them out) and those pixels get weight 0; a mask *array* with NaN is an error (next test)
    w = np.ones(NPIX)
    w[:10] = np.nan
    w[10:20] = UNSEEN
    path = maps.write_sky_map(tmp_path / "w.fits", w, unit=None)
    # never silent: the warning gives the count of pixels that hold no number
    with pytest.warns(CmbtoolsWarning, match=r"20 mask pixels hold no number \(NaN, inf or UNSEEN\); they get weight 0"):
        got = maps.read_mask(path)
    assert np.all(got[:20] == 0.0) and np.all(got[20:] == 1.0)


@pytest.mark.parametrize(
    "weights, message",
    [
        (np.full(NPIX, 1.5), r"must have values in \[0, 1\]\. Got values in \[1\.5, 1\.5\]"),
        (np.full(NPIX, -0.1), r"must have values in \[0, 1\]"),
        (np.where(np.arange(NPIX) < 5, np.nan, 1.0), r"has 5 NaN or infinite values"),
        (np.zeros(NPIX), r"is zero everywhere: no sky is left"),
        (np.ones(700), r"has 700 pixels, which is not 12\*nside\*\*2"),
    ],
)
@pytest.mark.parametrize("use", ["moments", "apodize", "combine", "fit"])
def test_invalid_mask_arrays(weights, message, use):
    with pytest.raises(InvalidInputError, match=message):
        if use == "moments":
            maps.mask_moments(weights)
        elif use == "apodize":
            maps.apodize_mask(weights, 5.0)
        elif use == "combine":
            maps.combine_masks(weights)
        else:
            maps.fit_monopole_dipole(np.zeros(weights.size if weights.size == NPIX else NPIX), weights)


def test_nside_not_a_power_of_two():
    for build in (lambda: maps.cap_mask(12, 0, 0, 10), lambda: maps.latitude_cut_mask(12, 10),
                  lambda: maps.disc_mask(12, [[0, 0, 1]]), lambda: maps.change_resolution(sky(), 12),
                  lambda: maps.change_mask_resolution(np.ones(NPIX), 12)):
        with pytest.raises(InvalidInputError, match=r"must be a power of two \(HEALPix nside\)\. Got 12 instead"):
            build()
    with pytest.raises(InvalidInputError, match="has 1728 pixels, which is not 12"):
        maps.mask_moments(np.ones(12 * 12**2))


def test_map_and_mask_of_different_nside_offer_the_resolution_change():
    m, w = sky(8), np.ones(12 * 16**2)
    with pytest.raises(ResolutionMismatchError) as info:
        maps.fit_monopole_dipole(m, w)
    assert (info.value.nside_a, info.value.nside_b) == (8, 16)
    # the message names the functions that change the resolution; nothing is changed silently
    assert "nside 8 but the 'mask' has nside 16" in str(info.value)
    assert "cmbtools.maps.change_mask_resolution" in str(info.value)
    with pytest.raises(ResolutionMismatchError, match="change_resolution"):
        maps.combine_masks(np.ones(12 * 8**2), w)
    # following the advice works
    fit = maps.fit_monopole_dipole(m, maps.change_mask_resolution(w, 8))
    assert np.isfinite(fit.monopole)


def test_all_missing_map():
    m = np.full(NPIX, UNSEEN)
    with pytest.raises(IllConditionedError, match="Only 0 pixels are unmasked and valid") as info:
        maps.fit_monopole_dipole(m)
    assert info.value.condition_number == np.inf
    with pytest.raises(InvalidInputError, match=r"has no valid pixel: all 768 pixels are missing"):
        maps.change_resolution(m, 4)
    with pytest.raises(InvalidInputError, match="has no valid pixel to smooth"):
        maps.smooth_map(m, fwhm_arcmin=60.0, fill_missing="mean", nthreads=1)
    with pytest.raises(InvalidInputError, match="No valid pixel is below the threshold"):
        maps.threshold_mask(m, 1.0)
    with pytest.raises(InvalidInputError, match="has 768 missing"):
        maps.rotate_map(m, "G", "C", nthreads=1)


def test_lmax_above_the_band_limit_warns_and_above_4_nside_is_refused():
    m = sky()
    # 3 nside - 1 is the band limit of a HEALPix map (common practice, healpy's default lmax)
    with pytest.warns(CmbtoolsWarning, match=r"lmax = 24 is above 3\*nside - 1 = 23 for nside 8"):
        out = maps.smooth_map(m, fwhm_arcmin=120.0, lmax=24, nthreads=1)
    assert out.shape == m.shape and np.all(np.isfinite(out))
    with pytest.warns(CmbtoolsWarning, match="above 3"):
        maps.rotate_map(m, "G", "E", lmax=31, nthreads=1)
    with pytest.raises(InvalidInputError, match=r"The 'lmax' parameter must be an int in \[0, 31\]\. Got 32 instead"):
        maps.smooth_map(m, fwhm_arcmin=120.0, lmax=32, nthreads=1)
    maps.smooth_map(m, fwhm_arcmin=120.0, lmax=23, nthreads=1)  # at the band limit: no warning


def test_partial_file_describing_a_huge_map_is_refused_before_allocating(tmp_path):
    hdu = fits.BinTableHDU.from_columns([
        fits.Column(name="PIXEL", format="K", array=np.array([0, 5, 9])),
        fits.Column(name="T", format="D", array=np.array([1.0, 2.0, 3.0])),
    ])
    for key, value in dict(ORDERING="RING", NSIDE=2**24, OBJECT="PARTIAL", INDXSCHM="EXPLICIT").items():
        hdu.header[key] = value
    path = tmp_path / "huge.fits"
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    # nside 2^24: 12 * 2^48 pixels of 8 bytes, twice = 54 PB, more than any machine
    with pytest.raises(MemoryLimitError, match=r"The partial-sky file .*huge\.fits' at nside 16777216 would need about 54 PB") as info:
        maps.read_sky_map(path, unit="K")
    assert info.value.required_bytes == 2 * 8 * 12 * 4**24


# ---------------------------------------------------------------- input files: CLI

@pytest.mark.parametrize(
    "key, fragment",
    [
        ("missing", "no such file"),
        ("directory", "is a directory"),
        ("text", "cannot be read as FITS"),
        ("truncated", "truncated"),
        ("pixels", "holds 700 values, which is not 12*nside**2"),
        ("nside12", "not a power of two"),
        ("all_missing", "has no valid pixel: all 768 pixels are missing"),
    ],
)
def test_inspect_refuses_bad_map_files(files, capsys, key, fragment):
    code, out, err = run_cli(capsys, "inspect", files[key])
    assert code == 2 and out == ""
    one_error_line(err, "cmbtools inspect: error:", files[key], fragment)


@pytest.mark.parametrize(
    "key, fragment",
    [
        ("missing", "no such file"),
        ("directory", "is a directory"),
        ("truncated", "truncated"),
        ("weights_big", "values in [0, 1]"),
        ("weights_zero", "zero everywhere"),
        ("nside12", "not a power of two"),
    ],
)
@pytest.mark.parametrize("how", ["info", "from-mask", "inspect-mask"])
def test_cli_refuses_bad_mask_files(files, tmp_path, capsys, key, fragment, how):
    if how == "info":
        argv = ["mask", "--info", files[key]]
    elif how == "from-mask":
        argv = ["mask", "--from-mask", files[key], "-o", tmp_path / "out.fits"]
    else:
        argv = ["inspect", files["map"], "--mask", files[key]]
    code, out, err = run_cli(capsys, *argv)
    assert code == 2 and out == ""
    one_error_line(err, files[key], fragment)
    assert not (tmp_path / "out.fits").exists()


def test_cli_map_and_mask_of_different_nside(files, tmp_path, capsys):
    code, out, err = run_cli(capsys, "inspect", files["map"], "--mask", files["mask16"])
    assert code == 2 and out == ""
    # the message tells how to change the mask's resolution with the tool itself
    one_error_line(err, "nside 8 but the 'mask' has nside 16", f"cmbtools mask --from-mask {files['mask16']} --nside 8")
    # two inputs of different nside for a new mask: refused unless --nside says which resolution to use
    out_path = tmp_path / "new.fits"
    code, out, err = run_cli(capsys, "mask", "--from-mask", files["mask16"], "--from-map", files["map"],
                             "--threshold", 0.0, "-o", out_path)
    assert code == 2 and out == ""
    one_error_line(err, "--from-mask has nside 16 but --from-map has nside 8", "give --nside N")
    assert not out_path.exists()
    # with --nside the change happens and is reported, never silently
    code, out, err = run_cli(capsys, "mask", "--from-mask", files["mask16"], "--from-map", files["map"],
                             "--threshold", 0.0, "--nside", 8, "-o", out_path)
    assert (code, err) == (0, "")
    assert "--from-mask changed from nside 16 to 8" in out and "--from-map" not in out
    expected = maps.change_mask_resolution(maps.read_mask(files["mask16"]), 8) * (maps.read_sky_map(files["map"])[0] < 0)
    np.testing.assert_allclose(maps.read_mask(out_path), expected, rtol=0, atol=1e-15)


def test_cli_nside_not_a_power_of_two(tmp_path, capsys):
    code, out, err = run_cli(capsys, "mask", "--nside", 12, "--cut-latitude", 10, "-o", tmp_path / "m.fits")
    assert code == 2 and out == ""
    one_error_line(err, "The '--nside' parameter must be a power of two", "Got 12 instead")


# ---------------------------------------------------------------- physics

def test_inconsistent_cosmologies_raise_invalid_input():
    with pytest.raises(InvalidInputError, match="negative or non-finite density parameter Ode0 = -0.5"):
        physics.comoving_distance(1.0, LambdaCDM(H0=70, Om0=0.3, Ode0=-0.5, Tcmb0=2.7255, Ob0=0.05))
    # a closed universe with this much curvature re-collapses before z = 0 is reached going back:
    # E(z)^2 = Om (1+z)^3 + Ok (1+z)^2 + OL turns negative (Friedmann equation; common practice)
    closed = LambdaCDM(H0=70, Om0=0.3, Ode0=3.0, Tcmb0=2.7255, Ob0=0.05)
    with pytest.raises(InvalidInputError, match="bounces or re-collapses"):
        physics.last_scattering(closed)
    with pytest.raises(InvalidInputError, match="expansion rate E"):
        physics.comoving_distance(2.0, closed)
    with pytest.raises(InvalidInputError, match="must have a positive baryon density Ob0"):
        physics.last_scattering(LambdaCDM(H0=70, Om0=0.3, Ode0=0.7, Tcmb0=2.7255))


@pytest.mark.parametrize(
    "options, fragments",
    [
        (["--omega-b-h2", "-0.01"], ["The '--omega-b-h2' option must be > 0", "Got -0.01 instead"]),
        (["--omega-c-h2", "-1"], ["The '--omega-c-h2' option must be >= 0"]),
        (["--h0", "0"], ["The '--h0' option must be > 0 and < 1000"]),
        (["--omega-k", "-3"], ["bounces or re-collapses"]),
        (["--t0", "99"], ["is not 99 % ionized"]),
        # found by the fuzz tests: these used to end in internal errors
        (["--omega-b-h2", "1e-9"], ["visibility function of this cosmology has no maximum"]),
        (["--omega-b-h2", "100"], ["no reionization redshift matches"]),
        (["--h0", "0.001"], ["no reionization redshift matches"]),
        (["--neff", "0.5"], ["A neutrino mass needs at least one neutrino species"]),
        (["--helium", "0.9"], ["'helium_fraction' parameter must be a finite number in [0, 0.5)"]),
        (["--h0", "abc"], ["argument --h0: expected a number, got 'abc'"]),
        (["--h0", "nan"], ["expected a finite number, got 'nan'"]),
    ],
)
def test_physics_cli_refuses_inconsistent_parameters(capsys, options, fragments):
    code, out, err = run_cli(capsys, "physics", *options)
    assert code == 2 and out == ""
    one_error_line(err, *fragments)


def test_physics_cli_accepts_any_neutrino_count(capsys):
    # astropy wants one mass per species, floor(N_eff) of them (astropy.cosmology docs); the tool
    # puts the mass on one species whatever --neff is
    code, out, err = run_cli(capsys, "physics", "--neff", "4.5", "--json")
    assert (code, err) == (0, "")
    assert '"neff": 4.5' in out and '"neutrino_mass_sum_ev": 0.06' in out


@pytest.mark.parametrize(
    "text, fragment",
    [
        ("140,1\n145,-0.2\n150,1\n", "row 2: transmission must be >= 0"),
        ("140,1\n145,nan\n150,1\n", "row 2: the transmission is not a finite number"),
        ("140,1\n140,1\n150,1\n", "frequencies must be strictly increasing"),
        ("140,1\n145\n150,1\n", "line 2: expected 2 columns"),
        ("140,1\n145,x\n", "line 2: 'x' is not a number"),
        ("frequency_ghz,transmission\n", "a bandpass needs at least 2 rows; got 0"),
    ],
)
def test_bad_bandpass_files(tmp_path, text, fragment):
    path = tmp_path / "band.csv"
    path.write_text(text)
    with pytest.raises(InputFileError, match="band.csv: ") as info:
        physics.read_bandpass(path)
    assert fragment in str(info.value)


# ---------------------------------------------------------------- outputs

def test_output_paths_are_checked_before_any_work(tmp_path, capsys):
    m = sky()
    with pytest.raises(OutputPathError, match="does not exist"):
        maps.write_sky_map(tmp_path / "no" / "such" / "dir" / "m.fits", m)
    not_a_dir = tmp_path / "file.txt"
    not_a_dir.write_text("x")
    with pytest.raises(OutputPathError, match="is not a directory"):
        maps.write_sky_map(not_a_dir / "m.fits", m)
    with pytest.raises(OutputPathError, match="is a directory, expected a file name"):
        maps.write_sky_map(tmp_path, m)
    # a directory nobody may write to: /proc refuses new files even to root, whatever its mode bits
    # say (os.access answers yes for root), so the check creates a probe file (Linux proc(5))
    with pytest.raises(OutputPathError, match="is not writable"):
        maps.write_sky_map("/proc/cmbtools-test.fits", m)
    existing = maps.write_sky_map(tmp_path / "m.fits", m)
    before = existing.read_bytes()
    with pytest.raises(OutputExistsError, match="output exists; pass overwrite=True"):
        maps.write_sky_map(existing, 2 * m)
    assert existing.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["file.txt", "m.fits"]  # no probe or temporary left
    for target, fragment in [(tmp_path / "no" / "m.fits", "does not exist"), ("/proc/m.fits", "is not writable"),
                             (existing, "output exists")]:
        code, out, err = run_cli(capsys, "mask", "--nside", 8, "--cut-latitude", 10, "-o", target)
        assert code == 2 and out == ""
        one_error_line(err, target, fragment)
        code, out, err = run_cli(capsys, "inspect", existing, "--figure", str(target).replace(".fits", ".png")
                                 if target != existing else existing)
        assert code == 2 and out == ""
        one_error_line(err, fragment)


# ---------------------------------------------------------------- memory estimates

def test_estimates_match_the_arrays_numpy_and_healpy_allocate():
    assert _resources.estimate_map_bytes(16) == np.zeros(hp.nside2npix(16)).nbytes
    assert _resources.estimate_map_bytes(16, 3, np.float32) == 3 * np.zeros(hp.nside2npix(16), np.float32).nbytes
    for lmax in (0, 1, 7, 100):
        # healpy's Alm.getsize counts the m <= l coefficients of healpy's layout (healpy reference)
        assert _resources.estimate_alm_bytes(lmax) == hp.Alm.getsize(lmax) * np.dtype(np.complex128).itemsize
    assert _resources.estimate_coupling_bytes(50, 2) == 2 * np.zeros((51, 51)).nbytes
    assert _resources.estimate_transform_bytes(8, 23) == 3 * 768 * 8 + 2 * hp.Alm.getsize(23) * 16
    for bad in (lambda: _resources.estimate_map_bytes(12), lambda: _resources.estimate_alm_bytes(-1),
                lambda: _resources.estimate_map_bytes(8, -1)):
        with pytest.raises(InvalidInputError):
            bad()


@pytest.mark.parametrize(
    "build, estimate",
    [
        (lambda: maps.cap_mask(64, 10, 20, 40), _resources.estimate_map_bytes(64, 2)),
        (lambda: maps.latitude_cut_mask(64, 20), _resources.estimate_map_bytes(64, 1) + 64 * 12 * 64**2),
        (lambda: maps.change_resolution(np.ones(12 * 16**2), 64),
         _resources.estimate_map_bytes(16, 3) + _resources.estimate_map_bytes(64, 4)),
    ],
)
def test_estimates_bound_the_memory_actually_used(build, estimate):
    # numpy reports its allocations to tracemalloc (Python docs, tracemalloc; numpy >= 1.13); the
    # estimate counts the result and the large temporaries, so the traced peak stays below it
    # but not far below (a factor of 4 is the slack allowed for chunked work buffers)
    tracemalloc.start()
    try:
        out = build()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert out.nbytes <= estimate
    assert peak / 4 <= estimate, (peak, estimate)


def test_available_memory_sources(tmp_path, monkeypatch):
    meminfo = tmp_path / "meminfo"
    meminfo.write_text("MemTotal:       8000000 kB\nMemFree:         100000 kB\nMemAvailable:    2000000 kB\n")
    monkeypatch.setattr(_resources, "_MEMINFO", str(meminfo))
    monkeypatch.setattr(_resources, "_CGROUP_V2", (str(tmp_path / "none.max"), str(tmp_path / "none.current")))
    monkeypatch.setattr(_resources, "_CGROUP_V1", (str(tmp_path / "none.limit"), str(tmp_path / "none.usage")))
    monkeypatch.delenv("CMBTOOLS_MEMORY_LIMIT", raising=False)
    assert _resources.available_memory_bytes() == 2000000 * 1024  # /proc/meminfo counts in KiB (Linux proc(5))
    # a control-group limit: what is left under it counts if smaller
    (tmp_path / "cg.max").write_text("1000000000\n")
    (tmp_path / "cg.current").write_text("400000000\n")
    monkeypatch.setattr(_resources, "_CGROUP_V2", (str(tmp_path / "cg.max"), str(tmp_path / "cg.current")))
    assert _resources.available_memory_bytes() == 600000000
    (tmp_path / "cg.max").write_text("max\n")  # cgroup v2 writes "max" for no limit (Linux cgroup-v2 docs)
    assert _resources.available_memory_bytes() == 2000000 * 1024
    (tmp_path / "v1.limit").write_text(f"{2**63 - 4096}\n")  # cgroup v1's "no limit"
    monkeypatch.setattr(_resources, "_CGROUP_V1", (str(tmp_path / "v1.limit"), str(tmp_path / "none")))
    assert _resources.available_memory_bytes() == 2000000 * 1024
    # the user's own cap
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "1.5GB")
    assert _resources.available_memory_bytes() == 1_500_000_000
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "1GiB")
    assert _resources.available_memory_bytes() == 2**30
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "lots")
    with pytest.raises(InvalidInputError, match=r"\$CMBTOOLS_MEMORY_LIMIT must be a number of bytes"):
        _resources.available_memory_bytes()
    # without /proc/meminfo: free physical pages from sysconf (POSIX sysconf, glibc extension)
    monkeypatch.delenv("CMBTOOLS_MEMORY_LIMIT")
    monkeypatch.setattr(_resources, "_MEMINFO", str(tmp_path / "absent"))
    expected = os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    assert abs(_resources.available_memory_bytes() - expected) < 0.2 * expected


def test_the_real_machine_reports_something_sensible():
    available = _resources.available_memory_bytes()
    total = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    assert 0 < available <= total * 1.01


def test_format_bytes():
    assert _resources.format_bytes(0) == "0 bytes"
    assert _resources.format_bytes(999) == "999 bytes"
    assert _resources.format_bytes(1000) == "1 kB"
    assert _resources.format_bytes(3_200_000) == "3.2 MB"
    assert _resources.format_bytes(1_610_612_736) == "1.61 GB"
    assert _resources.format_bytes(105_553_116_266_496) == "105.6 TB"


def test_check_memory(monkeypatch):
    monkeypatch.setattr(_resources, "available_memory_bytes", lambda: 1_000_000)
    assert _resources.check_memory(800_000, "A small job") == 800_000  # at 80 % exactly: allowed
    with pytest.raises(MemoryLimitError) as info:
        _resources.check_memory(900_000, "A mask at nside 64")
    assert str(info.value) == (
        "A mask at nside 64 would need about 900 kB but the machine has 1 MB available (cmbtools uses at most "
        "80% of it); lower nside/lmax, or pass force=True (CLI: --force) to try anyway"
    )
    assert (info.value.required_bytes, info.value.available_bytes) == (900_000, 1_000_000)
    assert isinstance(info.value, MemoryError)  # callers' `except MemoryError` still works
    assert _resources.check_memory(900_000, "x", fraction=1.0) == 900_000
    with pytest.warns(CmbtoolsWarning, match="would need about 2 MB but the machine has 1 MB available; going ahead"):
        assert _resources.check_memory(2_000_000, "A big job", force=True) == 2_000_000
    with pytest.raises(InvalidInputError, match="'fraction' parameter must be in"):
        _resources.check_memory(1, "x", fraction=0)
    monkeypatch.setattr(_resources, "available_memory_bytes", lambda: None)  # platform says nothing
    assert _resources.check_memory(10**30, "Anything") == 10**30


def test_api_functions_refuse_huge_nside_before_allocating():
    # nside 2^20 maps are 105.6 TB each: beyond any machine, refused at once
    for build, what in [
        (lambda: maps.cap_mask(2**20, 0, 0, 10), "A cap mask at nside 1048576"),
        (lambda: maps.latitude_cut_mask(2**20, 10), "A latitude-cut mask at nside 1048576"),
        (lambda: maps.disc_mask(2**20, [[0, 0, 1]]), "A mask with holes at nside 1048576"),
        (lambda: maps.change_resolution(np.ones(768), 2**20), "Changing the resolution of a map from nside 8 to 1048576"),
        (lambda: maps.change_mask_resolution(np.ones(768), 2**20), "Changing the resolution of a mask from nside 8"),
    ]:
        with pytest.raises(MemoryLimitError, match=what):
            build()


def test_api_force_overrides_the_estimate(monkeypatch):
    monkeypatch.setattr(_resources, "available_memory_bytes", lambda: 10_000)
    with pytest.raises(MemoryLimitError, match="A cap mask at nside 16 would need about 49.2 kB"):
        maps.cap_mask(16, 0, 0, 30)
    with pytest.raises(MemoryLimitError, match="Smoothing a map at nside 8 with lmax 23"):
        maps.smooth_map(sky(), fwhm_arcmin=60, nthreads=1)
    with pytest.raises(MemoryLimitError, match="Rotating a map at nside 8 with lmax 23"):
        maps.rotate_map(sky(), "G", "C", nthreads=1)
    with pytest.warns(CmbtoolsWarning, match="going ahead"):
        w = maps.cap_mask(16, 0, 0, 30, force=True)
    # the forced result is the normal one: the cap's area is 2 pi (1 - cos 30 deg) (Archimedes; common practice)
    assert abs(w.mean() - (1 - np.cos(np.radians(30))) / 2) < 0.01
    with pytest.warns(CmbtoolsWarning, match="going ahead"):
        maps.smooth_map(sky(), fwhm_arcmin=60, nthreads=1, force=True)


def test_cli_memory_refusal_and_force(tmp_path, capsys, monkeypatch):
    out_path = tmp_path / "m.fits"
    code, out, err = run_cli(capsys, "mask", "--nside", 2**20, "--cut-latitude", 10, "-o", out_path)
    assert code == 2 and out == ""
    one_error_line(err, "Building this mask at nside 1048576 would need about", "TB", "--force")
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "1MB")
    # nside 64 with a latitude cut: 1 piece + product + 2 + 3 = 7 maps of 393 kB = 2.75 MB
    code, out, err = run_cli(capsys, "mask", "--nside", 64, "--cut-latitude", 10, "-o", out_path)
    assert code == 2 and out == ""
    one_error_line(err, "Building this mask at nside 64 would need about 2.75 MB but the machine has 1 MB available")
    assert not out_path.exists()


@pytest.mark.filterwarnings("default::cmbtools.exceptions.CmbtoolsWarning")
def test_cli_force_warns_once_and_builds(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "1MB")
    out_path = tmp_path / "m.fits"
    code, out, err = run_cli(capsys, "mask", "--nside", 64, "--cut-latitude", 10, "--keep-cap", "0,60,30",
                             "-o", out_path, "--force")
    assert code == 0
    lines = err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("cmbtools: warning: Building this mask at nside 64 would need")
    monkeypatch.delenv("CMBTOOLS_MEMORY_LIMIT")
    w = maps.read_mask(out_path)
    np.testing.assert_array_equal(w, maps.latitude_cut_mask(64, 10) * maps.cap_mask(64, 0, 60, 30))


# ---------------------------------------------------------------- the CLI error policy

def test_debug_shows_the_traceback_before_and_after_the_subcommand(files, capsys):
    for argv in (["--debug", "inspect", files["missing"]], ["inspect", files["missing"], "--debug"],
                 ["--debug", "mask", "--info", files["weights_big"]], ["mask", "--debug", "--info", files["weights_big"]]):
        with pytest.raises(InputFileError):
            cli.main([str(a) for a in argv])
    capsys.readouterr()
    code, _, err = run_cli(capsys, "inspect", files["missing"])
    assert code == 2
    one_error_line(err, "no such file")


def test_debug_traceback_in_a_real_process(files):
    env = dict(os.environ, PYTHONWARNINGS="ignore")
    for position in ("before", "after"):
        argv = ["--debug", "inspect", str(files["missing"])] if position == "before" else ["inspect", str(files["missing"]), "--debug"]
        res = subprocess.run([sys.executable, "-m", "cmbtools", *argv], capture_output=True, text=True, env=env,
                             check=False, timeout=120)
        assert res.returncode == 1  # Python's status for an uncaught exception
        assert "Traceback (most recent call last)" in res.stderr and "InputFileError" in res.stderr
    res = subprocess.run([sys.executable, "-m", "cmbtools", "inspect", str(files["missing"])], capture_output=True,
                         text=True, env=env, check=False, timeout=120)
    assert res.returncode == 2 and res.stdout == ""
    one_error_line(res.stderr, "cmbtools inspect: error:", "no such file")


@pytest.mark.parametrize(
    "exc, fragments",
    [
        (InvalidInputError("first line\nsecond line\n\nthird"), ["first line second line third"]),
        (InputFileError("/data/a.fits", "cannot be read as FITS (header\nline 2)"), ["/data/a.fits: cannot be read as FITS (header line 2)"]),
        (PermissionError(13, "Permission denied", "/data/out.fits"), ["/data/out.fits: Permission denied"]),
        (OSError("disk\nfull"), ["disk full"]),
        (MemoryError("Unable to allocate 96.0 TiB"), ["out of memory (Unable to allocate 96.0 TiB)", "lower nside/lmax"]),
    ],
)
def test_every_reported_error_is_one_line_with_status_2(monkeypatch, capsys, exc, fragments):
    from cmbtools.cli import inspect

    def failing_run(args):
        raise exc

    monkeypatch.setattr(inspect, "run", failing_run)
    code, out, err = run_cli(capsys, "inspect", "whatever.fits")
    assert code == 2 and out == ""
    one_error_line(err, "cmbtools inspect: error:", *fragments)
    with pytest.raises(type(exc)):
        cli.main(["inspect", "whatever.fits", "--debug"])


def test_internal_errors_are_one_line_with_status_1(monkeypatch, capsys):
    from cmbtools.cli import inspect

    def broken_run(args):
        raise ZeroDivisionError("float division\nby zero")

    monkeypatch.setattr(inspect, "run", broken_run)
    code, out, err = run_cli(capsys, "inspect", "x.fits")
    assert code == 1
    line = err.strip()
    assert "\n" not in line and line == (
        "cmbtools inspect: internal error: ZeroDivisionError: float division by zero (run with --debug for the traceback)"
    )


def test_usage_errors_are_one_line_even_with_line_breaks_in_the_arguments(capsys):
    code, out, err = run_cli(capsys, "mask", "--nside", "8", "stray\nargument")
    assert code == 2 and out == ""
    one_error_line(err, "unrecognized arguments: stray argument")
    code, out, err = run_cli(capsys, "inspect")
    assert code == 2
    one_error_line(err, "the following arguments are required: MAP")


def test_every_cmbtools_error_class_reaches_the_user_as_one_line(monkeypatch, capsys):
    import cmbtools.exceptions as ex
    from cmbtools.cli import mask

    made = {
        ex.InvalidInputError: ex.InvalidInputError("bad value"),
        ex.InputFileError: ex.InputFileError("f.fits", "bad file"),
        ex.ResolutionMismatchError: ex.ResolutionMismatchError("nside 8 vs 16", 8, 16),
        ex.IllConditionedError: ex.IllConditionedError("singular", float("inf")),
        ex.OutputExistsError: ex.OutputExistsError("o.fits"),
        ex.OutputPathError: ex.OutputPathError("o.fits", "no directory"),
        ex.CacheError: ex.CacheError("stale cache"),
        ex.MemoryLimitError: ex.MemoryLimitError("too big", 10, 1),
        ex.WorkerLostError: ex.WorkerLostError("workers died", 3, 10),
    }
    # every public error class is covered
    public = {getattr(ex, name) for name in ex.__all__}
    assert {c for c in public if isinstance(c, type) and issubclass(c, CmbtoolsError) and c is not CmbtoolsError} == set(made)
    for cls, error in made.items():
        monkeypatch.setattr(mask, "run", lambda args, error=error: (_ for _ in ()).throw(error))
        code, out, err = run_cli(capsys, "mask", "--nside", "8")
        assert code == 2, cls
        one_error_line(err, "cmbtools mask: error:", str(error))


# ---------------------------------------------------------------- memory: the spectrum estimator, simulations, their CLIs

def _steep_cl(lmax):
    ell = np.arange(lmax + 1)
    return np.where(ell >= 2, 1e-10 / (ell + 1.0) ** 2, 0.0)


def _spectrum_file(path, lmax=60):
    """A spectrum table (K^2) for the simulate and validate commands, so they need not compute the fiducial one."""
    lines = ["# unit: K^2", "ell,cl"] + [f"{ell},{v:.17g}" for ell, v in enumerate(_steep_cl(lmax))]
    path.write_text("\n".join(lines) + "\n")
    return path


def _table_rows(path):
    """The data lines of a CSV table written by cmbtools (the '#' header lines left out)."""
    return [line for line in path.read_text().splitlines() if not line.startswith("#")]


def _draw_for_memory(index, rng, context):
    return {"x": rng.standard_normal(3) + context["offset"]}


def test_estimator_refuses_a_large_lmax_before_allocating(monkeypatch):
    import time

    from cmbtools.spectrum import Binning, SpectrumEstimator

    mask = maps.cap_mask(256, 0, 30, 60)
    mask2 = maps.cap_mask(256, 10, 30, 60)
    binning = Binning.uniform(2, 767, 16)
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "50MB")
    tracemalloc.start()
    try:
        start = time.perf_counter()
        with pytest.raises(MemoryLimitError, match=(
            r"^Building the spectrum estimator at nside 256 with lmax 767 would need about [0-9.]+ MB "
            r"but the machine has 50 MB available .*CLI: --force"
        )) as info:
            SpectrumEstimator(mask, binning, lmax=767, pixel_window=False, nthreads=1)
        elapsed = time.perf_counter() - start
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert elapsed < 1.0
    assert peak < 1_000_000  # refused before anything large, not even the 6.3 MB copy of the mask
    # at least the mask's coefficients up to 2 lmax and the mask's copy, at most a few times that plus the
    # default deprojection-bias correction of the monopole and dipole (4 templates)
    floor = _resources.estimate_alm_bytes(2 * 767) + _resources.estimate_map_bytes(256)
    bias = _resources.estimate_deprojection_bias_bytes(256, 767, n_templates=4)
    assert floor < info.value.required_bytes < 5 * floor + bias
    assert info.value.available_bytes == 50_000_000
    # the covariance and a second mask cost more
    for options in ({"covariance": True}, {"mask2": mask2}):
        with pytest.raises(MemoryLimitError) as more:
            SpectrumEstimator(mask, binning, lmax=767, pixel_window=False, nthreads=1, **options)
        assert more.value.required_bytes > info.value.required_bytes


def test_memory_estimates_of_the_estimator_and_the_sky_are_close_to_what_numpy_allocates():
    from cmbtools import simulate
    from cmbtools.spectrum import estimator as _estimator
    from cmbtools._core.memory import estimate_sky_bytes as _sky_bytes
    from cmbtools.spectrum import Binning, SpectrumEstimator

    nside, lmax = 64, 191
    mask, mask2 = maps.cap_mask(nside, 0, 30, 60), maps.cap_mask(nside, 10, 30, 60)
    binning = Binning.uniform(2, lmax, 16)
    cases = [
        ({}, lambda: SpectrumEstimator(mask, binning, lmax=lmax, pixel_window=False, nthreads=1)),
        ({"covariance": True},
         lambda: SpectrumEstimator(mask, binning, lmax=lmax, pixel_window=False, nthreads=1, covariance=True)),
        ({"mask2": mask2, "covariance": True},
         lambda: SpectrumEstimator(mask, binning, lmax=lmax, mask2=mask2, pixel_window=False, nthreads=1, covariance=True)),
    ]
    # the built-in guess spectrum of the deprojection-bias correction is computed once per process (and cached on
    # disk); its own working memory (about 0.1 GB, whatever the nside) is not part of the estimator's model
    simulate.fiducial_cl(lmax)
    for options, build in cases:
        need = _estimator._check_estimator_memory(
            mask, binning, lmax=lmax, mask2=options.get("mask2"), n_iter=0,
            covariance=options.get("covariance", False), force=False,
        )
        tracemalloc.start()
        try:
            build()
            _, peak = tracemalloc.get_traced_memory()
        finally:
            tracemalloc.stop()
        # numpy reports its allocations to tracemalloc (Python docs, tracemalloc); ducc0's own work
        # buffers are not traced, so the traced peak sits a little below the estimate (measured 0.9)
        assert 0.5 * need <= peak <= 2 * need, (options, peak, need)
    need = _sky_bytes(nside, lmax, with_dipole=True)
    tracemalloc.start()
    try:
        simulate.gaussian_sky(_steep_cl(lmax), nside, lmax=lmax, pixel_window=False, dipole=[1e-3, 0, 0], rng=1, nthreads=1)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert 0.5 * need <= peak <= 2 * need, (peak, need)


def test_estimator_force_warns_and_builds_the_same_estimator(tmp_path, monkeypatch):
    from cmbtools.spectrum import estimator as _estimator
    from cmbtools.spectrum import Binning, SpectrumEstimator, estimate_spectrum

    mask = maps.cap_mask(16, 0, 30, 60)
    binning = Binning.uniform(2, 47, 8)
    options = {"pixel_window": False, "nthreads": 1}
    reference = SpectrumEstimator(mask, binning, **options)
    need = _estimator._check_estimator_memory(mask, binning, lmax=None, mask2=None, n_iter=0, covariance=False, force=False)
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", str(need))  # 80 % of it may be used: just too small
    with pytest.raises(MemoryLimitError, match="Building the spectrum estimator at nside 16 with lmax 47 would need"):
        SpectrumEstimator(mask, binning, **options)
    with pytest.warns(CmbtoolsWarning, match="Building the spectrum estimator at nside 16 with lmax 47 .* going ahead") as record:
        forced = SpectrumEstimator(mask, binning, force=True, **options)
    assert len(record) == 1
    assert forced.cache_key == reference.cache_key
    np.testing.assert_array_equal(forced.bandpower_windows, reference.bandpower_windows)
    # the cache helper checks when it builds, and passes force on
    path = tmp_path / "estimator.npz"
    with pytest.raises(MemoryLimitError):
        SpectrumEstimator.load_or_build(path, mask, binning, **options)
    assert not path.exists()
    with pytest.warns(CmbtoolsWarning, match="going ahead"):
        SpectrumEstimator.load_or_build(path, mask, binning, force=True, **options)
    assert SpectrumEstimator.load(path).cache_key == reference.cache_key
    with pytest.raises(MemoryLimitError):
        estimate_spectrum(sky(16), mask, binning, **options)
    with pytest.warns(CmbtoolsWarning, match="going ahead"):
        bp = estimate_spectrum(sky(16), mask, binning, force=True, **options)
    np.testing.assert_array_equal(bp.cl, reference.estimate(sky(16)).cl)


def test_simulated_maps_refuse_huge_nside_and_force_goes_ahead(monkeypatch):
    from cmbtools import simulate

    cl = _steep_cl(47)
    model = simulate.NoiseModel(10.0, ell_knee=20.0, alpha=2.0)
    # nside 2^20: one map is 105.6 TB, beyond any machine, refused at once
    for build, what in [
        (lambda: simulate.gaussian_sky(cl, 2**20, lmax=47, pixel_window=False), "A simulated sky at nside 1048576 with lmax 47"),
        (lambda: simulate.noise_map(model, 2**20, lmax=47), "A noise map at nside 1048576"),
        (lambda: simulate.white_noise_map(2**20, 10.0), "A noise map at nside 1048576"),
        (lambda: simulate.dipole_map(2**20, [1e-3, 0, 0]), "A dipole map at nside 1048576"),
    ]:
        with pytest.raises(MemoryLimitError, match=what + r" would need about [0-9.]+ TB"):
            build()
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "10kB")  # one nside-16 map is 24.6 kB
    with pytest.raises(MemoryLimitError, match="A simulated sky at nside 16 with lmax 47 would need"):
        simulate.gaussian_sky(cl, 16, lmax=47, pixel_window=False, rng=3)
    with pytest.raises(MemoryLimitError, match="A noise map at nside 16 would need"):
        simulate.noise_map(model, 16, rng=3)
    with pytest.warns(CmbtoolsWarning, match="A simulated sky at nside 16 .* going ahead") as record:
        sky_forced = simulate.gaussian_sky(cl, 16, lmax=47, pixel_window=False, dipole=[1e-3, 0, 0], rng=3,
                                           nthreads=1, force=True)
    assert len(record) == 1  # the dipole inside is covered by the same estimate
    with pytest.warns(CmbtoolsWarning, match="A noise map at nside 16 .* going ahead"):
        noise_forced = simulate.noise_map(model, 16, rng=3, nthreads=1, force=True)
    monkeypatch.delenv("CMBTOOLS_MEMORY_LIMIT")
    np.testing.assert_array_equal(
        sky_forced, simulate.gaussian_sky(cl, 16, lmax=47, pixel_window=False, dipole=[1e-3, 0, 0], rng=3, nthreads=1)
    )
    np.testing.assert_array_equal(noise_forced, simulate.noise_map(model, 16, rng=3, nthreads=1))


def test_simulation_runs_count_every_worker_and_refuse_before_starting(tmp_path, monkeypatch):
    from concurrent.futures import ThreadPoolExecutor

    from cmbtools.simulate import run_simulations

    context = {"offset": 1.0, "table": np.zeros(125_000)}  # 1 MB that every worker holds
    run_dir = tmp_path / "run"
    with ThreadPoolExecutor(2) as pool:
        with pytest.raises(MemoryLimitError, match=(
            r"^Running 5 simulations on 2 concurrent tasks \(about 1 PB each\) would need about 2 PB"
        )) as info:
            run_simulations(_draw_for_memory, 5, seed=1, context=context, executor=pool, run_dir=run_dir,
                            memory_per_simulation=10**15, progress=False)
    assert info.value.required_bytes == 2 * 10**15  # threads share the context
    assert not run_dir.exists()  # nothing started, nothing written
    # the local process pool: each worker holds the pickled context and its copy, plus one simulation;
    # never more workers than simulations.  Refused before any process starts.
    needs = {}
    for workers, n_sims in ((1, 2), (3, 2)):
        with pytest.raises(MemoryLimitError, match=f"Running {n_sims} simulations on {min(workers, n_sims)} worker process") as info:
            run_simulations(_draw_for_memory, n_sims, seed=1, context=context, workers=workers,
                            memory_per_simulation=10**15, progress=False)
        needs[workers] = info.value.required_bytes
    per_worker = needs[3] - needs[1]
    assert 10**15 + 2_000_000 <= per_worker <= 10**15 + 2_001_000
    # force: warn once and run; the results are those of an unforced run
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "10kB")
    with ThreadPoolExecutor(2) as pool:
        with pytest.raises(MemoryLimitError, match="Running 4 simulations on 2 concurrent tasks"):
            run_simulations(_draw_for_memory, 4, seed=1, context=context, executor=pool,
                            memory_per_simulation=100_000, progress=False)
        with pytest.warns(CmbtoolsWarning, match="Running 4 simulations .* going ahead") as record:
            forced = run_simulations(_draw_for_memory, 4, seed=1, context=context, executor=pool,
                                     memory_per_simulation=100_000, progress=False, force=True)
        assert len(record) == 1
        monkeypatch.delenv("CMBTOOLS_MEMORY_LIMIT")
        plain = run_simulations(_draw_for_memory, 4, seed=1, context=context, executor=pool, progress=False)
    np.testing.assert_array_equal(forced["x"], plain["x"])


def test_validation_refuses_before_simulating_and_force_runs(monkeypatch):
    from concurrent.futures import ThreadPoolExecutor

    from cmbtools.simulate import NoiseModel, validate_estimator
    from cmbtools.spectrum import Binning, SpectrumEstimator

    est = SpectrumEstimator(maps.cap_mask(16, 0, 30, 60), Binning.uniform(2, 47, 8), pixel_window=False, nthreads=1)
    cl, noise = _steep_cl(47), NoiseModel(20.0)
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "10kB")
    with ThreadPoolExecutor(2) as pool:
        with pytest.raises(MemoryLimitError, match=r"^Running 3 simulations on 2 concurrent tasks \(about [0-9.]+ kB each\)") as info:
            validate_estimator(est, cl, n_sims=3, seed=5, noise=noise, executor=pool, progress=False)
        # each simulation holds at least its sky, its noise and their sum (three maps of 24.6 kB)
        assert info.value.required_bytes >= 2 * 3 * _resources.estimate_map_bytes(16)
        with pytest.warns(CmbtoolsWarning, match="Running 3 simulations .* going ahead") as record:
            forced = validate_estimator(est, cl, n_sims=3, seed=5, noise=noise, executor=pool, progress=False, force=True)
        assert len(record) == 1  # once for the run, not once per simulated sky or noise map
        monkeypatch.delenv("CMBTOOLS_MEMORY_LIMIT")
        plain = validate_estimator(est, cl, n_sims=3, seed=5, noise=noise, executor=pool, progress=False)
    np.testing.assert_allclose(forced.mean, plain.mean, rtol=1e-12, atol=0)


@pytest.mark.filterwarnings("default::cmbtools.exceptions.CmbtoolsWarning")
def test_spectrum_cli_memory_refusal_and_force(tmp_path, capsys, monkeypatch):
    mask_path = maps.write_mask(tmp_path / "mask.fits", maps.cap_mask(16, 0, 30, 60))
    map_path = maps.write_sky_map(tmp_path / "map.fits", sky(16))
    # a beam of more than two pixels (480 arcmin at nside 16): no narrow-beam warning line besides the memory one
    argv = ("spectrum", map_path, "--mask", mask_path, "--beam-fwhm", 480, "--no-pixel-window", "--threads", 1, "-o")
    out_path = tmp_path / "spectrum.csv"
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "10kB")
    code, out, err = run_cli(capsys, *argv, out_path)
    assert code == 2 and out == ""
    one_error_line(err, "cmbtools spectrum: error: Building the spectrum estimator at nside 16 with lmax 47 would need about",
                   "but the machine has 10 kB available", "--force")
    assert not out_path.exists()
    code, out, err = run_cli(capsys, *argv, out_path, "--force")
    assert code == 0
    lines = err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("cmbtools: warning: Building the spectrum estimator at nside 16")
    assert "going ahead" in lines[0]
    monkeypatch.delenv("CMBTOOLS_MEMORY_LIMIT")
    code, out, err = run_cli(capsys, *argv, tmp_path / "plain.csv")
    assert code == 0 and err == ""
    assert _table_rows(out_path) == _table_rows(tmp_path / "plain.csv")


@pytest.mark.filterwarnings("default::cmbtools.exceptions.CmbtoolsWarning")
def test_simulate_cli_memory_refusal_and_force(tmp_path, capsys, monkeypatch):
    # nside 2^20 with the default lmax 3*nside-1: the coefficients alone are hundreds of TB
    code, out, err = run_cli(capsys, "simulate", "--nside", 2**20, "--seed", 1, "--output-dir", tmp_path / "huge")
    assert code == 2 and out == ""
    one_error_line(err, "cmbtools simulate: error: Simulating maps at nside 1048576 with lmax 3145727 would need about",
                   "TB but the machine has", "--force")
    assert not (tmp_path / "huge").exists()  # refused before the output directory is made
    argv = ("simulate", "--nside", 16, "--seed", 3, "--sims", 2, "--noise-depth", 30, "--dipole", 100, 10, 20,
            "--spectrum", _spectrum_file(tmp_path / "cl.csv"), "--no-pixel-window", "--threads", 1, "--output-dir")
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "10kB")
    code, out, err = run_cli(capsys, *argv, tmp_path / "forced")
    assert code == 2 and out == ""
    one_error_line(err, "Simulating maps at nside 16 with lmax 47 would need about", "10 kB available", "--force")
    assert not (tmp_path / "forced").exists()
    code, out, err = run_cli(capsys, *argv, tmp_path / "forced", "--force")
    assert code == 0
    lines = err.splitlines()
    assert len(lines) == 1 and lines[0].startswith("cmbtools: warning: Simulating maps at nside 16")  # once, not per map
    monkeypatch.delenv("CMBTOOLS_MEMORY_LIMIT")
    code, out, err = run_cli(capsys, *argv, tmp_path / "plain")
    assert code == 0 and err == ""
    for i in range(2):
        forced, _ = maps.read_sky_map(tmp_path / "forced" / f"sky_{i:04d}.fits")
        plain, _ = maps.read_sky_map(tmp_path / "plain" / f"sky_{i:04d}.fits")
        np.testing.assert_array_equal(forced, plain)


@pytest.mark.filterwarnings("default::cmbtools.exceptions.CmbtoolsWarning")
def test_validate_cli_memory_refusal_and_force(tmp_path, capsys, monkeypatch):
    import json

    mask_path = maps.write_mask(tmp_path / "mask.fits", maps.cap_mask(16, 0, 90, 120))
    # a beam of more than two pixels (480 arcmin at nside 16): no narrow-beam warning line besides the memory ones
    argv = ("validate", mask_path, "--lmax", 40, "--bin-width", 8, "--beam-fwhm", 480, "--no-pixel-window",
            "--no-progress", "--seed", 4, "--spectrum", _spectrum_file(tmp_path / "cl.csv"))
    run_dir = tmp_path / "run"
    # the estimator is refused first
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "10kB")
    code, out, err = run_cli(capsys, *argv, "--sims", 2, "--workers", 1, "--run-dir", run_dir)
    assert code == 2 and out == ""
    one_error_line(err, "cmbtools validate: error: Building the spectrum estimator at nside 16 with lmax 40 would need about",
                   "--force")
    # the estimator fits in 1 MB, but not a thousand workers with one simulation each
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "1MB")
    code, out, err = run_cli(capsys, *argv, "--sims", 1000, "--workers", 1000, "--run-dir", run_dir)
    assert code == 2 and out == ""
    one_error_line(err, "cmbtools validate: error: Running 1000 simulations on 1000 worker processes (about",
                   "but the machine has 1 MB available", "--force")
    assert not run_dir.exists()  # nothing simulated, nothing written
    monkeypatch.setenv("CMBTOOLS_MEMORY_LIMIT", "10kB")
    code, out, err = run_cli(capsys, *argv, "--sims", 2, "--workers", 1, "--run-dir", run_dir, "--force")
    assert code == 0
    lines = err.splitlines()
    assert len(lines) == 2 and all(line.startswith("cmbtools: warning: ") and "going ahead" in line for line in lines)
    assert "Building the spectrum estimator at nside 16" in lines[0]
    assert "Running 2 simulations on 1 worker process" in lines[1]
    assert json.loads((run_dir / "summary.json").read_text())["n_sims"] == 2


# ----------------------------------------------------------------------------- paths, counts, inputs as outputs


def test_file_names_with_a_nul_character_are_refused(tmp_path, capsys):
    from cmbtools._core import files as _io
    from cmbtools.exceptions import InputFileError, OutputPathError

    with pytest.raises(InputFileError, match="NUL character"):
        _io.check_input_file("sky\x00.fits")
    with pytest.raises(OutputPathError, match="NUL character"):
        _io.check_output_path(str(tmp_path / "out\x00.csv"))
    code = cli.main(["mask", "--nside", "16", "--cut-latitude", "20", "-o", str(tmp_path / "m\x00.fits")])
    assert code == 2
    err = capsys.readouterr().err
    assert "NUL character" in err and len(err.strip().splitlines()) == 1
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(
    "argv",
    [
        ["simulate", "--fiducial", "--nside", "16", "--sims", "10000000", "--output-dir", "{tmp}/sims"],
        ["validate", "{mask}", "--sims", "2000000"],
        ["validate", "{mask}", "--threads", "100000"],
        ["spectrum", "{map}", "--mask", "{mask}", "--threads", "5000", "-o", "{tmp}/t.csv"],
    ],
    ids=["count", "sims", "validate-threads", "spectrum-threads"],
)
def test_absurd_counts_are_refused_before_any_work(tmp_path, capsys, argv):
    m = maps.write_sky_map(tmp_path / "m.fits", np.zeros(12 * 16**2))
    w = maps.write_mask(tmp_path / "w.fits", maps.latitude_cut_mask(16, 20.0))
    argv = [a.format(tmp=tmp_path, map=m, mask=w) for a in argv]
    with pytest.raises(SystemExit) as exit_info:
        cli.main(argv)
    assert exit_info.value.code == 2
    assert "expected at most" in capsys.readouterr().err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.fits", "w.fits"]


def test_api_counts_have_upper_bounds():
    from cmbtools import simulate
    from cmbtools._core.checks import resolve_nthreads

    with pytest.raises(InvalidInputError, match="n_sims"):
        simulate.run_simulations(lambda i, rng, context: {"x": 1.0}, 10**12, seed=1, progress=False)
    with pytest.raises(InvalidInputError, match="nthreads"):
        resolve_nthreads(10**6)


@pytest.mark.parametrize(
    "argv",
    [
        ["spectrum", "{map}", "--mask", "{mask}", "-o", "{map}", "--overwrite"],
        ["spectrum", "{map}", "--mask", "{mask}", "-o", "{tmp}/t.csv", "--figure", "{mask}", "--overwrite"],
        ["mask", "--from-mask", "{mask}", "--apodize", "cosine", "--apodize-width", "2", "-o", "{mask}", "--overwrite"],
        ["inspect", "{map}", "--figure", "{map}", "--overwrite"],
    ],
    ids=["spectrum-table", "spectrum-figure", "mask", "inspect"],
)
def test_an_output_that_is_an_input_is_refused_even_with_overwrite(tmp_path, capsys, argv):
    m = maps.write_sky_map(tmp_path / "m.fits", np.random.default_rng(0).normal(size=12 * 16**2))
    w = maps.write_mask(tmp_path / "w.fits", maps.apodize_mask(maps.latitude_cut_mask(16, 20.0), 10.0))
    before = {p: p.read_bytes() for p in (m, w)}
    argv = [a.format(tmp=tmp_path, map=m, mask=w) for a in argv]
    assert cli.main(argv) == 2
    err = capsys.readouterr().err
    assert "is also an input" in err and len(err.strip().splitlines()) == 1
    assert {p: p.read_bytes() for p in (m, w)} == before


def test_a_failed_simulate_run_removes_the_directory_it_created(tmp_path, capsys):
    bad = tmp_path / "spectrum.csv"
    bad.write_text("ell,cl\n0,1\n1,-5\n")  # negative power: refused after the directory is made
    out = tmp_path / "sims"
    assert cli.main(["simulate", "--nside", "16", "--spectrum", str(bad), "--output-dir", str(out)]) == 2
    assert "cmbtools simulate: error:" in capsys.readouterr().err
    assert not out.exists()
