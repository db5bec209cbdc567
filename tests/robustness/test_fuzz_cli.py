"""Property-based tests of the command line: random options for the finished subcommands.

For the ``mask``, ``inspect`` and ``physics`` subcommands (and for raw token
lists given to the top-level parser), any argument list ends with exit
status 0 (success, ``--help``, ``--version``) or 2 (bad input or usage), never
1 (an internal error) and never a traceback.  A status-2 run reports exactly
one error line, the last line on standard error; any other line there is a
cmbtools warning, never a foreign warning or a stack trace.

The arguments mix valid and invalid values: small power-of-two nside values
and invalid ones (zero, negative, non-powers of two, text, resolutions far
beyond any machine's memory), real, missing and damaged input files, and
output paths that exist, are new, or lie in missing directories.  ``--force``
is only combined with small nside values, so no example starts a large
computation.  Examples are derandomized for CI; set
``CMBTOOLS_FUZZ_EXAMPLES`` to explore more.
"""

from __future__ import annotations

import itertools
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

import _fuzzing
from _fuzzing import Hang, check_cli_outcome, run_cli, time_limit
from cmbtools import maps
from cmbtools._core.checks import UNSEEN

FINISHED = ("mask", "inspect", "physics")


def fuzz_settings(max_examples):
    # no per-example deadline: the time limit of run() bounds each command instead (physics runs take ~1 s)
    return _fuzzing.fuzz_settings(max_examples, deadline=None)


def run(argv, seconds=30.0):
    """(status, stdout, stderr) of ``cmbtools argv`` run in-process in the scratch directory."""
    return run_cli(argv, _DIR, seconds)


check_outcome = check_cli_outcome


_DIR = Path(tempfile.mkdtemp(prefix="cmbtools-fuzz-cli-"))
_COUNTER = itertools.count()


def _make_inputs():
    rng = np.random.default_rng(7)
    f = {}
    m8 = rng.normal(0.0, 1e-4, 768)
    m8[:10] = UNSEEN
    f["map8"] = maps.write_sky_map(_DIR / "map8.fits", m8, unit="uK_CMB", coordinates="G")
    f["map16"] = maps.write_sky_map(_DIR / "map16.fits", rng.normal(0.0, 1e-4, 3072), nested=True)
    f["hits8"] = maps.write_sky_map(_DIR / "hits8.fits", rng.integers(0, 20, 768).astype(float), unit=None)
    f["mask8"] = maps.write_mask(_DIR / "mask8.fits", maps.cap_mask(8, 0.0, 30.0, 70.0))
    f["mask16"] = maps.write_mask(_DIR / "mask16.fits", maps.cap_mask(16, 90.0, -20.0, 50.0) * 0.7)
    f["allmissing"] = maps.write_sky_map(_DIR / "allmissing.fits", np.full(768, UNSEEN))
    good = f["map8"].read_bytes()
    (_DIR / "cut.fits").write_bytes(good[: len(good) // 2])
    f["truncated"] = _DIR / "cut.fits"
    (_DIR / "text.fits").write_text("not a FITS file\n")
    f["text"] = _DIR / "text.fits"
    (_DIR / "holes.csv").write_text("name,lon_deg,lat_deg,radius_deg\na,10,20,3\nb,200,-40,\n")
    f["holes"] = _DIR / "holes.csv"
    (_DIR / "holes_bad.csv").write_text("lon_deg,radius_deg\n1,2\n")
    f["holes_bad"] = _DIR / "holes_bad.csv"
    (_DIR / "adir").mkdir()
    f["directory"] = _DIR / "adir"
    f["missing"] = _DIR / "does_not_exist.fits"
    return {k: str(v) for k, v in f.items()}


INPUTS = _make_inputs()
_EXISTING_OUTPUT = maps.write_mask(_DIR / "existing.fits", np.ones(768))


@st.composite
def output_paths(draw, suffix=".fits"):
    kind = draw(st.sampled_from(["new", "new", "new", "existing", "no_dir", "is_dir", "proc"]))
    if kind == "new":
        return str(_DIR / f"out{next(_COUNTER)}{suffix}")
    if kind == "existing":
        return str(_EXISTING_OUTPUT)
    if kind == "no_dir":
        return str(_DIR / "no" / "such" / f"x{suffix}")
    if kind == "is_dir":
        return str(_DIR / "adir")
    return f"/proc/cmbtools-fuzz{suffix}"  # not writable, even for root


def inputs(*keys):
    return st.sampled_from([INPUTS[k] for k in keys])


_ANY_TEXT = st.text(max_size=12)
_NUMBER = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(min_value=-10**6, max_value=10**6).map(str),
    st.sampled_from(["0", "-0", "1e-300", "1e308", "1e999", "nan", "inf", "-inf", "abc", "", " 5 ", "1_0", "0x10"]),
)
_SMALL_NSIDE = st.sampled_from(["1", "2", "4", "8", "16", "32"])
_BAD_NSIDE = st.sampled_from(["0", "-8", "3", "12", "1000", "abc", "", "8.0", "1e3", str(2**20), str(2**29), str(2**30),
                              str(2**80)])


def _cap_text():
    lon = st.floats(min_value=-400, max_value=400, allow_nan=False).map(lambda v: f"{v:.4g}")
    lat = st.one_of(st.floats(min_value=-90, max_value=90).map(lambda v: f"{v:.4g}"), _NUMBER)
    radius = st.one_of(st.floats(min_value=0.5, max_value=180).map(lambda v: f"{v:.4g}"), _NUMBER)
    good = st.tuples(lon, lat, radius).map(",".join)
    return st.one_of(good, good, st.lists(_NUMBER, max_size=4).map(",".join), _ANY_TEXT)


# ---------------------------------------------------------------- mask

@st.composite
def mask_argv(draw):
    force = draw(st.integers(0, 5)) == 0
    nside = st.one_of(_SMALL_NSIDE, _SMALL_NSIDE) if force else st.one_of(_SMALL_NSIDE, _SMALL_NSIDE, _BAD_NSIDE)
    options = {
        "--nside": nside,
        "--coord": st.sampled_from(["G", "C", "E", "X", "g"]),
        "--from-mask": inputs("mask8", "mask16", "map8", "truncated", "text", "missing", "directory", "allmissing"),
        "--keep-cap": _cap_text(),
        "--cut-latitude": st.one_of(st.floats(min_value=0, max_value=89).map(lambda v: f"{v:.3g}"), _NUMBER),
        "--latitude-coord": st.sampled_from(["G", "C", "E", "Q"]),
        "--holes": inputs("holes", "holes_bad", "missing", "map8"),
        "--hole-radius": st.one_of(st.sampled_from(["0.5", "2", "5"]), _NUMBER),
        "--from-map": inputs("hits8", "map8", "map16", "allmissing", "text", "missing"),
        "--field": st.sampled_from(["0", "1", "-1", "x"]),
        "--threshold": st.one_of(st.sampled_from(["5", "0", "10.5", "-1e-4"]), _NUMBER),
        "--keep-where": st.sampled_from(["below", "above", "sideways"]),
        "--apodize": st.sampled_from(["cosine", "gaussian", "square"]),
        "--apodize-width": st.one_of(st.sampled_from(["2", "10", "30", "180"]), _NUMBER),
        "-o": output_paths(),
        "--info": inputs("mask8", "mask16", "map8", "truncated", "missing", "directory", "allmissing"),
    }
    chosen = draw(st.lists(st.sampled_from(sorted(options)), min_size=0, max_size=7, unique=True))
    if draw(st.integers(0, 2)) > 0 and "-o" not in chosen and "--info" not in chosen:
        chosen.append("-o")  # most runs try to build something
    argv = ["mask"]
    for opt in chosen:
        argv += [opt, draw(options[opt])]
    for flag in ("--overwrite",) + (("--force",) if force else ()):
        if flag == "--force" or draw(st.booleans()):
            argv.append(flag)
    if draw(st.integers(0, 15)) == 0:
        argv.append(draw(st.sampled_from(["--help", "stray", "--nosuch", "-x"])))
    return argv


@fuzz_settings(70)
@given(mask_argv())
def test_mask_command_exits_0_or_2(argv):
    code, out, err = run(argv)
    check_outcome(argv, code, out, err)
    if code == 0 and "-o" in argv and "--help" not in argv:
        # a success wrote a valid mask where it said
        target = argv[argv.index("-o") + 1]
        w = maps.read_mask(target)
        assert f"wrote           {target}" in out
        assert abs(float(out.split("f_sky")[1].split()[0]) - w.mean()) < 1e-6


# ---------------------------------------------------------------- inspect

@st.composite
def inspect_argv(draw):
    argv = ["inspect"]
    if draw(st.integers(0, 10)) > 0:
        argv.append(draw(st.one_of(inputs("map8", "map16", "hits8", "mask8", "allmissing", "truncated", "text",
                                          "missing", "directory"), _ANY_TEXT.filter(lambda t: not t.startswith("-")))))
    options = {
        "--mask": inputs("mask8", "mask16", "map8", "truncated", "missing", "allmissing"),
        "--field": st.sampled_from(["0", "1", "5", "-1", "one"]),
        "--unit": st.one_of(st.sampled_from(["K", "uK_CMB", "mK", "K_RJ", "MJy/sr", "parsec", ""]), _ANY_TEXT),
        "--figure": output_paths(".png"),
    }
    chosen = draw(st.lists(st.sampled_from(sorted(options)), max_size=4, unique=True))
    if "--figure" in chosen and draw(st.integers(0, 3)) > 0:  # figures take ~0.5 s: draw few of them
        chosen.remove("--figure")
    for opt in chosen:
        argv += [opt, draw(options[opt])]
    for flag in ("--overwrite", "--force"):
        if draw(st.booleans()):
            argv.append(flag)
    if draw(st.integers(0, 15)) == 0:
        argv.append(draw(st.sampled_from(["--help", "extra.fits", "--nosuch"])))
    return argv


@fuzz_settings(50)
@given(inspect_argv())
def test_inspect_command_exits_0_or_2(argv):
    code, out, err = run(argv)
    check_outcome(argv, code, out, err)
    if code == 0 and "--help" not in argv:
        assert out.startswith("file") and "nside" in out


# ---------------------------------------------------------------- physics

_PHYSICS = {
    "--h0": st.one_of(st.floats(min_value=20, max_value=150).map(lambda v: f"{v:.4g}"),
                      st.sampled_from(["0.001", "0.5", "999", "1000", "-70"]), _NUMBER),
    "--omega-b-h2": st.one_of(st.floats(min_value=0.005, max_value=0.05).map(lambda v: f"{v:.4g}"),
                              st.sampled_from(["1e-9", "1e-5", "0.5", "100", "-0.02"]), _NUMBER),
    "--omega-c-h2": st.one_of(st.floats(min_value=0.0, max_value=0.5).map(lambda v: f"{v:.4g}"),
                              st.sampled_from(["0", "5", "1000", "-0.1"]), _NUMBER),
    "--omega-k": st.one_of(st.floats(min_value=-0.2, max_value=0.3).map(lambda v: f"{v:.3g}"),
                           st.sampled_from(["-3", "-1", "0.9", "2", "50"]), _NUMBER),
    "--t0": st.one_of(st.floats(min_value=1.0, max_value=5.0).map(lambda v: f"{v:.4g}"),
                      st.sampled_from(["0.001", "20", "99.9", "100", "-2.7"]), _NUMBER),
    "--neff": st.one_of(st.floats(min_value=0.0, max_value=6.0).map(lambda v: f"{v:.3g}"),
                        st.sampled_from(["0", "0.5", "4.5", "99", "100"]), _NUMBER),
    "--neutrino-mass": st.one_of(st.floats(min_value=0.0, max_value=1.0).map(lambda v: f"{v:.3g}"),
                                 st.sampled_from(["0", "5", "99.9", "-0.1"]), _NUMBER),
    "--helium": st.one_of(st.floats(min_value=0.0, max_value=0.49).map(lambda v: f"{v:.3g}"),
                          st.sampled_from(["0.5", "0.9", "-0.1"]), _NUMBER),
    "--peebles-fudge": st.one_of(st.floats(min_value=0.5, max_value=3.0).map(lambda v: f"{v:.3g}"),
                                 st.sampled_from(["0", "1e-6", "3.5"]), _NUMBER),
}


@st.composite
def physics_argv(draw):
    chosen = draw(st.lists(st.sampled_from(sorted(_PHYSICS)), min_size=1, max_size=4, unique=True))
    argv = ["physics"]
    for opt in chosen:
        argv += [opt, draw(_PHYSICS[opt])]
    if draw(st.booleans()):
        argv.append("--json")
    if draw(st.integers(0, 20)) == 0:
        argv.append(draw(st.sampled_from(["--help", "--nosuch", "stray"])))
    return argv


@fuzz_settings(30)
@given(physics_argv())
def test_physics_command_exits_0_or_2(argv):
    code, out, err = run(argv, seconds=60.0)
    check_outcome(argv, code, out, err)
    if code == 0 and "--json" in argv and "--help" not in argv:
        import json

        result = json.loads(out)
        # last scattering happens while the universe cools through a few thousand kelvin
        # (from memory: z* ~ 1100 for standard parameters; the bound is loose for extreme ones)
        assert result["z_star"] > 100 and np.isfinite(result["theta_star"]) and result["theta_star"] > 0


# ---------------------------------------------------------------- raw tokens at the top level

_TOKENS = st.one_of(
    st.sampled_from([*FINISHED, "--help", "--version", "--debug", "-o", "--nside", "8", "--info", "--json",
                     "--h0", "70", INPUTS["mask8"], INPUTS["map8"], "--", "-", "--force", "--overwrite"]),
    st.text(max_size=10),
)


@fuzz_settings(120)
@given(st.lists(_TOKENS, max_size=6))
def test_any_token_list_exits_0_or_2(tokens):
    # the debug flag shows tracebacks on purpose; drop it, as well as unfinished subcommands
    tokens = [t for t in tokens if t != "--debug"]
    if tokens and tokens[0] not in FINISHED and not tokens[0].startswith("-"):
        tokens = tokens[1:]
    code, out, err = run(tokens)
    check_outcome(tokens, code, out, err)


def test_the_time_limit_turns_a_hang_into_an_error():
    import time

    with pytest.raises(Hang):
        with time_limit(0.05):
            time.sleep(2.0)
