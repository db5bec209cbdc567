"""Property-based tests of the command line: random options for ``spectrum``, ``simulate`` and ``validate``.

As in test_fuzz_cli.py (which covers ``mask``, ``inspect`` and ``physics``):
any argument list ends with exit status 0 (success, ``--help``) or 2 (bad
input or usage), never 1 (an internal error), never a traceback and never a
hang (a SIGALRM guard); a status-2 run reports one error line, the last line
on standard error, and every other line there is a cmbtools warning.  A
success leaves outputs that read back.

The arguments mix valid and invalid values and files: nside-16 and -32 maps
and masks (RING, NESTED, with missing pixels, truncated, not FITS, missing),
good and damaged spectrum, noise-spectrum, beam and bin-edge tables, estimator
caches that are valid, stale or corrupt, run directories that are new, hold
another run or are files, and output paths that exist, are new, or lie in
missing directories.  Heavy options are only drawn small: at most a few maps
or simulations, nside at most 32, and resolutions or multipoles far beyond a
machine's memory only where the command must refuse them before any work
(``--force`` is only combined with small values).  ``validate`` runs its
simulations on a one-thread in-process pool here (starting worker processes
costs seconds per run); test_cli_validate.py and test_atomic_writes_more.py run
the real process pool.  Examples are derandomized for CI; set
``CMBTOOLS_FUZZ_EXAMPLES`` to explore more.
"""

from __future__ import annotations

import atexit
import contextlib
import itertools
import json
import shutil
import tempfile
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from unittest import mock

import numpy as np
import pytest
from hypothesis import event, given
from hypothesis.control import currently_in_test_context
from hypothesis import strategies as st

from _fuzzing import Hang, check_cli_outcome, fuzz_settings, run_cli, time_limit
from cmbtools import maps
from cmbtools.simulate import engine as _engine
from cmbtools._core.checks import UNSEEN
from cmbtools.simulate import write_spectrum_table
from cmbtools.spectrum import Bandpowers, Binning, SpectrumEstimator, write_beam

_DIR = Path(tempfile.mkdtemp(prefix="cmbtools-fuzz-cli-spectrum-"))
atexit.register(shutil.rmtree, _DIR, ignore_errors=True)
_COUNTER = itertools.count()


def run(argv, seconds=60.0):
    r = run_cli(argv, _DIR, seconds)
    if currently_in_test_context():
        event(f"exit status {r[0]}")  # shown by --hypothesis-show-statistics
    return r


@contextlib.contextmanager
def in_process_pool():
    """Run the simulations of ``validate`` on one thread of this process instead of spawned workers."""

    def one_thread(job, pending, seed, store, **kwargs):
        with ThreadPoolExecutor(1) as pool:
            _engine._run_generic(pool, job, pending, seed, store, n_sims=kwargs["n_sims"])

    with mock.patch.object(_engine, "_run_local_pool", one_thread):
        yield


# ---------------------------------------------------------------- input files

def _cl(lmax):
    ell = np.arange(lmax + 1)
    return np.where(ell >= 2, 1e-10 * 1000.0 / (ell + 10.0) ** 2, 0.0)


def _make_inputs():
    rng = np.random.default_rng(17)
    d = _DIR / "inputs"
    d.mkdir()
    f = {}
    f["map16"] = maps.write_sky_map(d / "map16.fits", rng.normal(0.0, 1e-4, 3072))
    f["map16b"] = maps.write_sky_map(d / "map16b.fits", rng.normal(0.0, 1e-4, 3072), unit="uK_CMB", nested=True)
    holes = rng.normal(0.0, 1e-4, 3072)
    holes[rng.random(3072) < 0.02] = UNSEEN
    f["map16_missing"] = maps.write_sky_map(d / "map16_missing.fits", holes)
    f["map32"] = maps.write_sky_map(d / "map32.fits", rng.normal(0.0, 1e-4, 12288))
    f["mask16"] = maps.write_mask(d / "mask16.fits", maps.cap_mask(16, 0.0, 60.0, 70.0))
    f["mask16b"] = maps.write_mask(d / "mask16b.fits", maps.cap_mask(16, 180.0, -30.0, 80.0) * 0.8)
    f["mask16_tiny"] = maps.write_mask(d / "mask16_tiny.fits", maps.cap_mask(16, 0.0, 0.0, 4.0))
    f["mask32"] = maps.write_mask(d / "mask32.fits", maps.cap_mask(32, 0.0, 60.0, 70.0))
    f["hits16"] = maps.write_sky_map(d / "hits16.fits", rng.integers(0, 30, 3072).astype(float), unit=None)
    good = f["map16"].read_bytes()
    (d / "truncated.fits").write_bytes(good[: len(good) // 2])
    f["truncated"] = d / "truncated.fits"
    (d / "text.fits").write_text("not a FITS file\n")
    f["text"] = d / "text.fits"
    f["missing"] = d / "does_not_exist.fits"
    (d / "adir").mkdir()
    f["directory"] = d / "adir"

    write_spectrum_table(d / "cl.csv", _cl(200))
    f["cl"] = d / "cl.csv"
    ell = np.arange(2, 130)
    dl = ell * (ell + 1) * _cl(129)[2:] / (2 * np.pi) * 1e12
    (d / "dl.txt").write_text("\ufeff# unit: uK^2\nell dl\n" + "".join(f"{l} {v!r}\n" for l, v in zip(ell, dl)))
    f["dl"] = d / "dl.txt"
    write_spectrum_table(d / "cl_short.csv", _cl(20))
    f["cl_short"] = d / "cl_short.csv"
    write_spectrum_table(d / "cl_zero.csv", np.zeros(100))  # a null run: no power at all
    f["cl_zero"] = d / "cl_zero.csv"
    (d / "cl_gap.csv").write_text("ell,cl\n0,0\n1,0\n3,1e-10\n")
    f["cl_gap"] = d / "cl_gap.csv"
    (d / "cl_negative.csv").write_text("ell,cl\n0,0\n1,-1e-10\n")
    f["cl_negative"] = d / "cl_negative.csv"
    (d / "cl_huge_ell.csv").write_text("ell,cl\n1000000000000,1e-10\n")
    f["cl_huge_ell"] = d / "cl_huge_ell.csv"

    noise = np.full(200, 1e-15)
    (d / "noise.csv").write_text("ell,nl\n" + "".join(f"{l},{v!r}\n" for l, v in enumerate(noise)))
    f["noise"] = d / "noise.csv"
    (d / "noise_uk.txt").write_text("# unit: uK^2\nell cl\n" + "".join(f"{l} 0.001\n" for l in range(100)))
    f["noise_uk"] = d / "noise_uk.txt"
    (d / "noise_short.csv").write_text("ell,nl\n0,1e-15\n1,1e-15\n2,1e-15\n")
    f["noise_short"] = d / "noise_short.csv"
    (d / "noise_bad.csv").write_text("ell,power\n0,1\n")
    f["noise_bad"] = d / "noise_bad.csv"
    (d / "noise_gap.csv").write_text("ell,nl\n0,1e-15\n2,1e-15\n")
    f["noise_gap"] = d / "noise_gap.csv"
    (d / "noise_bom.csv").write_bytes(b"\xef\xbb\xbf" + (d / "noise.csv").read_bytes().replace(b"\n", b"\r\n"))
    f["noise_bom"] = d / "noise_bom.csv"
    (d / "noise_huge_ell.csv").write_text("ell,nl\n1000000000000,1e-15\n")
    f["noise_huge_ell"] = d / "noise_huge_ell.csv"

    write_beam(d / "beam.csv", np.exp(-np.arange(200) ** 2 * 1e-4))
    f["beam"] = d / "beam.csv"
    write_beam(d / "beam_short.csv", np.ones(10))
    f["beam_short"] = d / "beam_short.csv"
    (d / "beam_bad.csv").write_text("ell,b_ell\n0,1\n1,-0.5\n")
    f["beam_bad"] = d / "beam_bad.csv"

    # per-bin transfer tables: the default bins of nside 16 (width 16 to lmax 47), others, a non-positive one
    (d / "transfer.csv").write_text("ell_min,ell_max,ell_eff,transfer,transfer_error\n2,17,9.5,0.3,0.01\n"
                                    "18,33,25.5,0.9,0.01\n34,47,40.5,1.0,0\n")
    f["transfer"] = d / "transfer.csv"
    (d / "transfer_bins.csv").write_text("ell_min,ell_max,transfer\n2,9,0.5\n")
    f["transfer_bins"] = d / "transfer_bins.csv"
    (d / "transfer_zero.csv").write_text("ell_min,ell_max,transfer\n2,17,0\n18,33,1\n34,47,1\n")
    f["transfer_zero"] = d / "transfer_zero.csv"
    # harmonic filter tables: to 4 nside - 1 of nside 16, too short, bad
    (d / "filter.csv").write_text("ell,factor\n" + "".join(f"{l},{min(1.0, l / 20.0)!r}\n" for l in range(64)))
    f["filter"] = d / "filter.csv"
    (d / "filter_short.csv").write_text("ell,factor\n0,0\n1,0.5\n")
    f["filter_short"] = d / "filter_short.csv"
    (d / "filter_bad.csv").write_text("ell,factor\n0,0\n2,0.5\n")
    f["filter_bad"] = d / "filter_bad.csv"

    (d / "edges.txt").write_text("# bin edges\n2 10 20\n30, 45\n")
    f["edges"] = d / "edges.txt"
    (d / "edges_bad.txt").write_text("2 ten 20\n")
    f["edges_bad"] = d / "edges_bad.txt"

    est = SpectrumEstimator(maps.read_mask(f["mask16"]), Binning.uniform(2, 47, 16), nthreads=1)
    f["cache_valid"] = est.save(d / "cache_valid.npz")
    other = SpectrumEstimator(maps.read_mask(f["mask16b"]), Binning.uniform(2, 47, 8), nthreads=1)
    f["cache_stale"] = other.save(d / "cache_stale.npz")
    (d / "cache_corrupt.npz").write_bytes(f["cache_valid"].read_bytes()[:3000])
    f["cache_corrupt"] = d / "cache_corrupt.npz"
    return {k: str(v) for k, v in f.items()}


INPUTS = _make_inputs()
_EXISTING = {suffix: _DIR / f"existing{suffix}" for suffix in (".csv", ".fits", ".png", ".json", ".npz")}
for _path in _EXISTING.values():
    _path.write_text("an existing output\n")


def inputs(*keys):
    return st.sampled_from([INPUTS[k] for k in keys])


def copy_of(key):
    """A fresh copy of an input, for arguments that a run may replace."""
    source = Path(INPUTS[key])
    target = _DIR / f"copy{next(_COUNTER)}{source.suffix}"
    shutil.copyfile(source, target)
    return str(target)


@st.composite
def output_paths(draw, suffix=".csv"):
    kind = draw(st.sampled_from(["new", "new", "new", "existing", "no_dir", "is_dir", "proc", "bad_suffix"]))
    if kind == "new":
        return str(_DIR / f"out{next(_COUNTER)}{suffix}")
    if kind == "existing":
        return str(_EXISTING[suffix])
    if kind == "no_dir":
        return str(_DIR / "no" / "such" / f"x{suffix}")
    if kind == "is_dir":
        return INPUTS["directory"]
    if kind == "bad_suffix":
        return str(_DIR / f"out{next(_COUNTER)}.txt")
    return f"/proc/cmbtools-fuzz{suffix}"  # not writable, even for root


_ANY_TEXT = st.text(max_size=10).filter(lambda t: "\x00" not in t)  # NUL bytes in paths: see the report
_NUMBER = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(min_value=-10**6, max_value=10**6).map(str),
    st.sampled_from(["0", "-0", "1e-300", "1e308", "1e999", "nan", "inf", "-inf", "abc", "", " 5 ", "1_0", "0x10"]),
)
# no huge counts: --sims is bounded but large, and a list of 2**70 indices fills the memory
_BAD_INT = st.sampled_from(["-1", "abc", "", "1.5", "1e3", "0x10", "-0", "2 ", "+3"])
_EXTREME = st.sampled_from(["1e300", "1e-300", "5e-324", "1.7976931348623157e308", "1e-30", "1e30"])


def _small_float(lo, hi, digits=4):
    return st.floats(min_value=lo, max_value=hi, allow_nan=False).map(lambda v: f"{v:.{digits}g}")


def number(lo, hi, extreme=_EXTREME):
    """Mostly ordinary values in [lo, hi], sometimes legal but extreme ones, sometimes anything at all."""
    good = _small_float(lo, hi)
    return st.one_of(good, good, good, extreme, _NUMBER)


def draw_options(draw, options, argv, *, min_size=0, max_size=6, required=()):
    chosen = draw(st.lists(st.sampled_from(sorted(options)), min_size=min_size, max_size=max_size, unique=True))
    for opt in required:
        if opt not in chosen and draw(st.integers(0, 9)) > 0:
            chosen.append(opt)
    for opt in chosen:
        value = draw(options[opt])
        argv += [opt] + (list(value) if isinstance(value, tuple) else ([] if value is None else [value]))
    return argv


def stray(draw, argv):
    if draw(st.integers(0, 15)) == 0:
        argv.append(draw(st.sampled_from(["--help", "--nosuch", "-x", "stray.fits"])))
    return argv


# ---------------------------------------------------------------- spectrum

_MAPS = ("map16", "map16b", "map16_missing", "map32", "mask16", "truncated", "text", "missing", "directory")
_MASKS = ("mask16", "mask16b", "mask16_tiny", "mask32", "map16", "truncated", "missing", "hits16")


@st.composite
def spectrum_argv(draw):
    force = draw(st.integers(0, 5)) == 0
    lmax = st.one_of(st.integers(0, 63).map(str), _BAD_INT) if force else \
        st.one_of(st.integers(0, 63).map(str), st.sampled_from(["64", "191", "10000", "1000000", str(2**62)]), _BAD_INT)
    options = {
        "--mask2": inputs(*_MASKS),
        "--lmax": lmax,
        "--bin-width": st.one_of(st.sampled_from(["1", "4", "8", "16", "40", "1000"]), _BAD_INT, st.just("0")),
        "--bin-edges": st.one_of(inputs("edges", "edges_bad", "directory"),
                                 st.sampled_from(["2,10,20,40", "2 10 20", "10,2", "2", "2,10,1e300", "2,1e18",
                                                  "2.5,10", "nan,10", "", "a,b"])),
        "--log-bins": st.one_of(st.sampled_from(["1", "3", "5", "46", "47", "10000"]), _BAD_INT),
        "--lmin": st.one_of(st.sampled_from(["0", "1", "2", "10", "47", "48", "100000000000"]), _BAD_INT),
        "--bin-weighting": st.sampled_from(["dl", "cl", "DL", "x"]),
        "--beam-fwhm": number(0.1, 600.0),
        "--beam": inputs("beam", "beam_short", "beam_bad", "cl", "map16", "missing"),
        "--beam2-fwhm": number(0.1, 600.0),
        "--beam2": inputs("beam", "beam_short", "beam_bad", "missing"),
        "--no-pixel-window": st.none(),
        "--keep-monopole-dipole": st.none(),
        "--noise-spectrum": inputs("noise", "noise_uk", "noise_bom", "noise_short", "noise_bad", "noise_gap",
                                   "noise_huge_ell", "cl", "dl", "map16", "missing"),
        "--fast-coupling": st.none(),
        "--theory": inputs("cl", "dl", "cl_short", "cl_gap", "cl_negative", "cl_huge_ell", "noise", "missing"),
        "--transfer": inputs("transfer", "transfer_bins", "transfer_zero", "cl", "map16", "missing"),
        # a copy of a cache (a stale or corrupt one is replaced) or of a map (that must never be replaced)
        "--operator-cache": st.one_of(st.sampled_from(["cache_valid", "cache_stale", "cache_corrupt", "map16"]).map(copy_of),
                                      inputs("directory"), output_paths(".npz")),
        "--fits": output_paths(".fits"),
        "--figure": output_paths(".png"),
        "--unit": st.sampled_from(["uK", "K", "mK"]),
        "--threads": st.one_of(st.sampled_from(["0", "1", "2", "64"]), _BAD_INT),
        "--overwrite": st.none(),
    }
    argv = ["spectrum"]
    if draw(st.integers(0, 12)) > 0:
        argv.append(draw(inputs(*_MAPS)))
    if draw(st.integers(0, 3)) == 0:
        argv.append(draw(inputs(*_MAPS)))
    argv = draw_options(draw, options, argv, max_size=6)
    if "--figure" in argv and draw(st.integers(0, 2)) > 0:  # figures take ~0.2 s: draw few of them
        i = argv.index("--figure")
        del argv[i:i + 2]
    if draw(st.integers(0, 12)) > 0:
        argv += ["--mask", draw(inputs(*_MASKS))]
    if draw(st.integers(0, 12)) > 0:
        argv += ["-o", draw(output_paths(".csv"))]
    if force:
        argv.append("--force")
    return stray(draw, argv)


@fuzz_settings(90, deadline=None)
@given(spectrum_argv())
def test_spectrum_command_exits_0_or_2(argv):
    code, out, err = run(argv)
    check_cli_outcome(argv, code, out, err)
    if code == 0 and "--help" not in argv:
        table = argv[argv.index("-o") + 1]
        bp = Bandpowers.read_csv(Path(_DIR, table))
        assert f"  wrote {table}" in out
        assert f"{bp.n_bins} bins of" in out
        assert np.all(np.isfinite(bp.cl))


# ---------------------------------------------------------------- simulate

_SMALL_NSIDE = st.sampled_from(["1", "2", "4", "8", "16", "32"])
_BAD_NSIDE = st.sampled_from(["0", "3", "12", "-8", "abc", "", "8.0", str(2**29), str(2**30), str(2**80)])


@st.composite
def simulate_argv(draw):
    force = draw(st.integers(0, 5)) == 0
    nside = _SMALL_NSIDE if force else st.one_of(_SMALL_NSIDE, _SMALL_NSIDE, _BAD_NSIDE)
    # the fiducial spectrum is computed once for ell <= 2500; longer ones take seconds each
    lmax = st.one_of(st.integers(0, 127).map(str), st.sampled_from(["2500", "10001", str(2**40)]), _BAD_INT)
    options = {
        "--fiducial": st.none(),
        "--spectrum": inputs("cl", "dl", "cl_zero", "cl_short", "cl_gap", "cl_negative", "cl_huge_ell", "map16",
                             "missing"),
        "--nside": nside,
        "--lmax": lmax,
        "--beam-fwhm": number(0.1, 600.0),
        "--beam": inputs("beam", "beam_short", "beam_bad", "missing", "map16"),
        "--no-pixel-window": st.none(),
        "--monopole": number(-1e3, 1e3, st.sampled_from(["1e300", "-1e300", "1e30", "-1e-300"])),
        "--dipole": st.tuples(number(0, 5e3), number(-400, 400), number(-90, 90, st.sampled_from(["90", "-90"]))),
        "--noise-depth": number(0.1, 500.0),
        "--hits": inputs("hits16", "map16", "mask16", "map32", "text", "missing"),
        "--noise-knee": number(1.0, 200.0),
        "--noise-slope": number(0.5, 5.0),
        "--splits": st.one_of(st.sampled_from(["1", "2", "3"]), _BAD_INT),
        "--seed": st.one_of(st.integers(0, 2**64).map(str), _BAD_INT),
        "--sims": st.one_of(st.sampled_from(["0", "1", "2", "3"]), _BAD_INT),
        "--first-index": st.one_of(st.sampled_from(["0", "5", "9999", str(10**18)]), _BAD_INT),
        "--output-dir": st.one_of(st.builds(lambda: str(_DIR / f"sims{next(_COUNTER)}")),
                                  st.sampled_from([str(_DIR / "no" / "such" / "dir"), INPUTS["map16"], "/proc/x",
                                                   str(_DIR / "sims_shared")])),
        "--prefix": st.one_of(st.sampled_from(["sky", "tern", "a.b-c_d+e"]), _ANY_TEXT),
        "--coord": st.sampled_from(["G", "C", "E", "Q"]),
        "--float32": st.none(),
        "--write-spectrum": output_paths(".csv"),
        "--threads": st.one_of(st.sampled_from(["0", "1", "2"]), _BAD_INT),
        "--overwrite": st.none(),
    }
    argv = draw_options(draw, options, ["simulate"], max_size=7, required=("--nside", "--output-dir"))
    if force:
        argv.append("--force")
    return stray(draw, argv)


@fuzz_settings(90, deadline=None)
@given(simulate_argv())
def test_simulate_command_exits_0_or_2(argv):
    code, out, err = run(argv)
    check_cli_outcome(argv, code, out, err)
    if code == 0 and "--help" not in argv:
        written = [line.split()[1] for line in out.splitlines() if line.startswith("wrote ")]
        assert written, out
        for path in written:
            path = Path(_DIR, path)
            if path.suffix == ".fits":
                m, info = maps.read_sky_map(path)
                assert np.all(np.isfinite(m))
            else:
                from cmbtools.simulate import read_spectrum_table

                assert read_spectrum_table(path).size >= 1


# ---------------------------------------------------------------- validate

def _other_run_dir():
    """A run directory that holds another run (seed 1): a new seed without --restart must be refused."""
    d = _DIR / "other_run"
    with in_process_pool():
        code, out, err = run(["validate", INPUTS["mask16"], "--sims", "2", "--seed", "1", "--no-progress",
                              "--run-dir", str(d), "--bin-width", "16"])
    assert code == 0, err
    return str(d)


_OTHER_RUN = _other_run_dir()


@st.composite
def validate_argv(draw):
    force = draw(st.integers(0, 5)) == 0
    lmax = st.one_of(st.integers(0, 63).map(str), _BAD_INT) if force else \
        st.one_of(st.integers(0, 63).map(str), st.sampled_from(["64", "100000", str(2**62)]), _BAD_INT)
    options = {
        "--lmax": lmax,
        "--bin-width": st.one_of(st.sampled_from(["1", "8", "16", "100"]), _BAD_INT, st.just("0")),
        "--lmin": st.one_of(st.sampled_from(["0", "2", "30", "47", "64"]), _BAD_INT),
        "--bin-weighting": st.sampled_from(["dl", "cl", "x"]),
        "--beam-fwhm": number(0.1, 600.0),
        "--beam": inputs("beam", "beam_short", "beam_bad", "missing"),
        "--no-pixel-window": st.none(),
        "--keep-monopole-dipole": st.none(),
        "--fast-coupling": st.none(),
        "--noise-depth": number(0.1, 500.0),
        "--hits": inputs("hits16", "map32", "text", "missing"),
        "--noise-knee": number(1.0, 100.0),
        "--noise-slope": number(0.5, 4.0),
        "--spectrum": inputs("cl", "dl", "cl_zero", "cl_short", "cl_gap", "cl_huge_ell", "missing"),
        "--harmonic-filter": inputs("filter", "filter_short", "filter_bad", "cl", "missing"),
        "--sims": st.one_of(st.sampled_from(["0", "1", "2", "3", "4"]), _BAD_INT),
        "--seed": st.one_of(st.integers(0, 2**64).map(str), _BAD_INT),
        "--workers": st.one_of(st.sampled_from(["0", "1", "2", "1000"]), _BAD_INT),
        "--threads": st.one_of(st.sampled_from(["0", "1"]), _BAD_INT),
        "--run-dir": st.one_of(st.builds(lambda: str(_DIR / f"run{next(_COUNTER)}")),
                               st.sampled_from([_OTHER_RUN, INPUTS["map16"], str(_DIR / "no" / "such" / "run")])),
        "--restart": st.none(),
        "--table": output_paths(".csv"),
        "--json-file": output_paths(".json"),
        "--figure": output_paths(".png"),
        "--transfer-table": output_paths(".csv"),
        "--unit": st.sampled_from(["uK", "K", "nK"]),
        "--overwrite": st.none(),
    }
    argv = ["validate"]
    if draw(st.integers(0, 12)) > 0:
        argv.append(draw(inputs(*_MASKS)))
    argv = draw_options(draw, options, argv, max_size=6, required=("--sims", "--run-dir"))
    argv.append("--no-progress")
    if force:
        argv.append("--force")
    return stray(draw, argv)


@fuzz_settings(60, deadline=None)
@given(validate_argv())
def test_validate_command_exits_0_or_2(argv):
    with in_process_pool():
        code, out, err = run(argv)
    check_cli_outcome(argv, code, out, err)
    if code == 0 and "--help" not in argv:
        assert out.startswith("validated the spectrum estimator on ")
        json_path = argv[argv.index("--json-file") + 1] if "--json-file" in argv else None
        if json_path is None:
            run_dir = argv[argv.index("--run-dir") + 1] if "--run-dir" in argv else "validation_run"
            json_path = Path(run_dir, "summary.json")
        doc = json.loads(Path(_DIR, json_path).read_text())
        assert doc["n_sims"] >= 2 and doc["n_bins"] >= 1


# ---------------------------------------------------------------- legal but extreme numbers

_NUMERIC = {
    "spectrum": {"--beam-fwhm": (0.1, 600.0), "--beam2-fwhm": (0.1, 600.0)},
    "simulate": {"--beam-fwhm": (0.1, 600.0), "--monopole": (-1e3, 1e3), "--noise-depth": (0.1, 500.0),
                 "--noise-knee": (1.0, 200.0), "--noise-slope": (0.5, 5.0), "--dipole": (0.0, 5e3)},
    "validate": {"--beam-fwhm": (0.1, 600.0), "--noise-depth": (0.1, 500.0), "--noise-knee": (1.0, 100.0),
                 "--noise-slope": (0.5, 4.0)},
}
_SKELETON = {
    "spectrum": lambda: ["spectrum", INPUTS["map16"], INPUTS["map16b"], "--mask", INPUTS["mask16"],
                         "-o", str(_DIR / f"out{next(_COUNTER)}.csv")],
    "simulate": lambda: ["simulate", "--nside", "16", "--seed", "3", "--output-dir", str(_DIR / f"sims{next(_COUNTER)}")],
    "validate": lambda: ["validate", INPUTS["mask16"], "--sims", "2", "--seed", "3", "--bin-width", "16",
                         "--run-dir", str(_DIR / f"run{next(_COUNTER)}"), "--no-progress"],
}
_HUGE = st.sampled_from(["1e300", "1.7976931348623157e308", "1e30", "1e-300", "5e-324", "1e-30"])


@st.composite
def extreme_argv(draw, command):
    """A valid run of ``command`` in which a few numbers are legal but extreme (1e300, 5e-324, ...)."""
    argv = _SKELETON[command]()
    numeric = _NUMERIC[command]
    for opt in draw(st.lists(st.sampled_from(sorted(numeric)), min_size=1, max_size=3, unique=True)):
        lo, hi = numeric[opt]
        value = draw(st.one_of(_small_float(lo, hi), _HUGE, _HUGE.map(lambda v: "-" + v) if lo < 0 else _HUGE))
        argv += [opt, value] + (["10", "20"] if opt == "--dipole" else [])
    # the noise options need one another
    if ("--noise-knee" in argv) != ("--noise-slope" in argv):
        argv += ["--noise-slope", "2"] if "--noise-knee" in argv else ["--noise-knee", "50"]
    for knee in ("--noise-knee",):
        if knee in argv and "--noise-depth" not in argv:
            argv += ["--noise-depth", "30"]
    if command == "simulate" and draw(st.booleans()):
        argv.append("--float32")
    return argv


@fuzz_settings(40, deadline=None)
@given(st.sampled_from(sorted(_SKELETON)).flatmap(lambda c: st.tuples(st.just(c), extreme_argv(c))))
def test_extreme_but_legal_numbers_exit_0_or_2(case):
    command, argv = case
    with in_process_pool():
        code, out, err = run(argv)
    check_cli_outcome(argv, code, out, err)


# ---------------------------------------------------------------- raw tokens

_TOKENS = st.one_of(
    st.sampled_from(["spectrum", "simulate", "validate", "--help", "--mask", "-o", "--nside", "16", "8", "2", "0",
                     "--sims", "--lmax", "--seed", "--output-dir", "--run-dir", "--write-spectrum",
                     "--spectrum", "--beam", "--noise-depth", "--overwrite", "--no-progress", "--fiducial",
                     INPUTS["map16"], INPUTS["mask16"], INPUTS["cl"], INPUTS["beam"], "--", "-"]),
    _ANY_TEXT.filter(lambda t: _at_most(t, 16)),  # no "--sims 99999" from random text
)


def _at_most(text, limit):
    try:
        return abs(int(text)) <= limit
    except ValueError:
        return True


@fuzz_settings(80, deadline=None)
@given(st.sampled_from(["spectrum", "simulate", "validate"]), st.lists(_TOKENS, max_size=7))
def test_any_token_list_exits_0_or_2(command, tokens):
    argv = [command] + [t for t in tokens if t != "--debug"]
    with in_process_pool():
        code, out, err = run(argv)
    check_cli_outcome(argv, code, out, err)


def test_the_time_limit_turns_a_hang_into_an_error():
    import time

    with pytest.raises(Hang):
        with time_limit(0.05):
            time.sleep(2.0)
