"""Property-based tests of the polarized inputs: the polarized spectrum table reader, and ``cmbtools spectrum`` on
I, Q, U maps and ``cmbtools validate --polarized`` fed such tables and random options.

A sound table loads exactly (C_l in K^2 from ell = 0, D_l and uK^2 converted); a damaged one raises
:class:`~cmbtools.exceptions.InputFileError` naming the file; random bytes never raise anything else. A command
exits 0 having written all of its outputs, or 2 with one error line having written none.
"""

from __future__ import annotations

import contextlib
import itertools
import math
import tempfile
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from unittest import mock

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from _fuzzing import attempt, check_cli_outcome, fuzz_settings, only_our_warnings, run_cli
from cmbtools.exceptions import InputFileError
from cmbtools.simulate import read_polarized_spectrum_table

_DIR = Path(tempfile.mkdtemp(prefix="cmbtools-fuzz-pol-"))
_COUNTER = itertools.count()

_REQUIRED = ("TT", "EE", "BB", "TE")
_AUTO = ("TT", "EE", "BB")
_DEFECTS = ("missing_required", "negative_auto", "non_numeric", "non_finite", "gap", "repeat", "short_row",
            "duplicate_column", "dl_without_unit", "no_rows", "unknown_unit", "dl_nonzero_at_0", "fractional_ell",
            "no_ell")
_JUNK = ["abc", "1e", "--2", "0x1A", "1.2.3", "\u221e", "n/a", "."]
_NONFINITE = ["nan", "inf", "-inf", "1e400"]
_UNIT_FACTOR = {"k2": 1.0, "uk2": 1e-12}


def _new_path(suffix=".csv"):
    return _DIR / f"case{next(_COUNTER)}{suffix}"


@st.composite
def polarized_tables(draw):
    """(bytes, expected dict or None): a polarized table, sound or with a few known defects."""
    defects = set(draw(st.lists(st.sampled_from(_DEFECTS), max_size=2, unique=True))) if draw(st.booleans()) else set()
    spectra = list(_REQUIRED) + draw(st.lists(st.sampled_from(["TB", "EB"]), unique=True, max_size=2))
    lmin = draw(st.sampled_from([0, 2]))
    n = draw(st.integers(1, 10))
    ells = list(range(lmin, lmin + n))
    unit_style = draw(st.sampled_from(["suffix", "comment", "none"]))  # none: C_l columns in K^2
    unit = draw(st.sampled_from(["k2", "uk2"]))
    columns = {}
    for s in spectra:
        kind = "cl" if unit_style == "none" else draw(st.sampled_from(["cl", "dl"]))
        name = f"{kind}_{s.lower()}" + (f"_{unit}" if unit_style == "suffix" else "")
        scale = 1e-10 if unit == "k2" else 1e2
        values = [draw(st.floats(0.0 if s in _AUTO else -1.0, 1.0, allow_nan=False)) * scale for _ in ells]
        if kind == "dl" and lmin == 0:
            values[0] = 0.0
        columns[s] = [name, kind, values]
    fatal = False
    if "missing_required" in defects:
        del columns[draw(st.sampled_from(_REQUIRED))]
        fatal = True
    if "dl_without_unit" in defects and unit_style != "comment":
        s = draw(st.sampled_from(sorted(columns)))
        columns[s][0] = f"dl_{s.lower()}"  # no unit in the name and no unit comment: refused
        columns[s][1] = "dl"
        if lmin == 0:
            columns[s][2][0] = 0.0
        fatal = True
    if "duplicate_column" in defects:
        s = draw(st.sampled_from(sorted(columns)))
        other = "dl" if columns[s][1] == "cl" else "cl"
        # a second column of the same spectrum and the same kind is refused; of the other kind, C_l is read
        same = draw(st.booleans())
        twin = columns[s][0] if same else columns[s][0].replace(columns[s][1], other, 1)
        columns[s + "_twin"] = [twin, columns[s][1] if same else other, list(columns[s][2])]
        fatal = fatal or same
    names = ["ell"] + [c[0] for c in columns.values()]
    rows = [[str(ell)] + [repr(float(c[2][j])) for c in columns.values()] for j, ell in enumerate(ells)]
    keys = list(columns)
    r = draw(st.integers(0, n - 1))
    if "negative_auto" in defects:
        auto = [k for k in keys if k in _AUTO]
        if auto:
            rows[r][1 + keys.index(draw(st.sampled_from(auto)))] = "-1e-12"
            fatal = True
    if "non_numeric" in defects:
        rows[r][draw(st.integers(0, len(names) - 1))] = draw(st.sampled_from(_JUNK))
        fatal = True
    if "non_finite" in defects:
        rows[r][draw(st.integers(1, len(names) - 1))] = draw(st.sampled_from(_NONFINITE))
        fatal = True
    if "fractional_ell" in defects:
        rows[r][0] = f"{ells[r]}.5"
        fatal = True
    if "gap" in defects and n >= 2:
        rows[-1][0] = str(ells[-1] + 1)
        fatal = True
    if "repeat" in defects and n >= 2:
        rows[-1][0] = str(ells[-2])
        fatal = True
    if "short_row" in defects:
        rows[r] = rows[r][:-1]
        fatal = True
    if "dl_nonzero_at_0" in defects and lmin == 0:
        read = [i for i, k in enumerate(keys) if columns[k][1] == "dl" and not k.endswith("_twin")
                and k + "_twin" not in columns]  # the D_l columns the reader uses
        if read:
            rows[0][1 + read[0]] = "1.5"
            fatal = True
    if "no_ell" in defects:
        names[0] = "l"
        fatal = True
    if "no_rows" in defects:
        rows = []
        fatal = True
    top = []
    if unit_style == "comment":
        top.append("# unit: " + ("K^2" if unit == "k2" else "uK^2"))
    if "unknown_unit" in defects:
        top = ["# unit: Jy^2"]  # needed by (and refused for) columns without a unit in their name
        if unit_style != "suffix":
            fatal = True
    newline = draw(st.sampled_from(["\n", "\r\n"]))
    text = newline.join(top + [",".join(names)] + [",".join(row) for row in rows]) + newline
    expected = None
    if fatal is False:
        lmax = ells[-1]
        expected = {k: np.zeros(lmax + 1) for k in ("TT", "TE", "TB", "EE", "EB", "BB")}
        factor = 1.0 if unit_style == "none" else _UNIT_FACTOR[unit]
        for k, (name, kind, values) in columns.items():
            if k.endswith("_twin"):
                continue
            if "duplicate_column" in defects and (k + "_twin") in columns and kind == "dl":
                name, kind, values = columns[k + "_twin"]  # the C_l column of the pair is read
            for ell, v in zip(ells, values):
                c = float(repr(float(v))) * factor
                expected[k][ell] = c if kind == "cl" else (0.0 if ell == 0 else 2.0 * math.pi * c / (ell * (ell + 1.0)))
    return text.encode("utf-8"), fatal, expected


def _read(path):
    got, err, caught = attempt(read_polarized_spectrum_table, path)
    only_our_warnings(caught)
    if err is not None:
        assert isinstance(err, InputFileError) and err.path == str(path), err
    return got, err


@fuzz_settings(200)
@given(polarized_tables())
def test_polarized_tables_load_exactly_or_are_refused(case):
    data, fatal, expected = case
    path = _new_path()
    path.write_bytes(data)
    got, err = _read(path)
    if fatal:
        assert err is not None, data.decode()
        return
    assert err is None, f"a sound table was refused: {err}\n{data.decode()}"
    assert set(got) == {"TT", "TE", "TB", "EE", "EB", "BB"}
    for k, v in expected.items():
        assert got[k].dtype == np.float64 and got[k].shape == v.shape, k
        # one unit or D_l conversion: a few ulp
        np.testing.assert_allclose(got[k], v, rtol=1e-14, atol=1e-300, err_msg=k)


_TOKENS = st.one_of(
    st.sampled_from(["ell", "cl_tt_k2", "cl_ee_k2", "cl_bb_k2", "cl_te_k2", "dl_tt_uk2", "cl_tb", "cl_eb", "",
                     "# unit: uK^2", "#", "0", "1", "2", "-1", "1e-10", "nan", "inf", "1e308", "abc"]),
    st.floats().map(repr),
    st.text(max_size=4),
)


@fuzz_settings(120)
@given(st.one_of(st.binary(max_size=1500), st.text(max_size=300).map(str.encode),
                 st.lists(st.lists(_TOKENS, max_size=6).map(",".join), max_size=8).map(
                     lambda lines: "\n".join(lines).encode())))
def test_random_input_never_crashes_the_polarized_table_reader(data):
    path = _new_path()
    path.write_bytes(data)
    got, err = _read(path)
    assert (got is None) != (err is None)
    if got is not None:
        for k in ("TT", "EE", "BB"):
            assert np.all(np.isfinite(got[k])) and np.all(got[k] >= 0)


# ---------------------------------------------------------------- the commands, fed polarized tables

def _iqu_inputs():
    import healpy as hp

    from cmbtools.maps import apodize_mask, cap_mask, write_iqu, write_mask

    d = _DIR / "inputs"
    d.mkdir(exist_ok=True)
    nside, lmax = 16, 40
    rng = np.random.default_rng(5)
    ell = np.arange(lmax + 1.0)
    shape = np.where(ell >= 2, 1e-10 / (ell + 5.0) ** 2, 0.0)
    alm = [hp.synalm(a * shape, lmax=lmax) for a in (1.0, 0.3, 0.05)]
    sky = hp.alm2map(alm, nside, lmax=lmax, pol=True)
    paths = {}
    for k in (1, 2):
        paths[f"iqu{k}"] = str(d / f"iqu{k}.fits")
        write_iqu(paths[f"iqu{k}"], sky + rng.standard_normal(sky.shape) * 1e-7)
    paths["mask"] = str(d / "mask.fits")
    write_mask(paths["mask"], apodize_mask(cap_mask(nside, 0.0, 60.0, 60.0), 10.0, nthreads=1))
    return paths


_INPUTS = _iqu_inputs()


@contextlib.contextmanager
def _in_process_pool():
    """Run the simulations of ``validate`` on one thread of this process instead of spawned workers."""
    from cmbtools.simulate import engine

    def one_thread(job, pending, seed, store, **kwargs):
        with ThreadPoolExecutor(1) as pool:
            engine._run_generic(pool, job, pending, seed, store, n_sims=kwargs["n_sims"])

    with mock.patch.object(engine, "_run_local_pool", one_thread):
        yield


@fuzz_settings(12, deadline=None)
@given(polarized_tables(), st.sampled_from(["20", "40"]))
def test_spectrum_on_iqu_maps_with_any_theory_table_writes_all_or_nothing(case, lmax):
    data, fatal, _expected = case
    theory = _new_path()
    theory.write_bytes(data)
    k = next(_COUNTER)
    out, fig = _DIR / f"pol{k}.csv", _DIR / f"pol{k}.png"
    argv = ["spectrum", _INPUTS["iqu1"], _INPUTS["iqu2"], "--mask", _INPUTS["mask"], "--lmax", lmax,
            "--bin-width", "8", "--theory", str(theory), "-o", str(out), "--figure", str(fig), "--threads", "1"]
    code, stdout, err = run_cli(argv, _DIR)
    check_cli_outcome(argv, code, stdout, err)
    if fatal:
        assert code == 2, err
    if code == 0:
        assert out.is_file() and fig.is_file()
    else:
        assert not out.exists() and not fig.exists()


@st.composite
def polarized_validate_argv(draw):
    k = next(_COUNTER)
    argv = ["validate", _INPUTS["mask"], "--polarized", "--sims", draw(st.sampled_from(["1", "2", "3"])),
            "--seed", "3", "--run-dir", str(_DIR / f"run{k}"), "--no-progress"]
    options = {
        "--lmax": st.sampled_from(["20", "40", "47", "63", "64", "x"]),
        "--bin-width": st.sampled_from(["8", "16", "0"]),
        "--lmin": st.sampled_from(["0", "1", "2", "30"]),
        "--beam-fwhm": st.sampled_from(["60", "600", "1e300", "-1"]),
        "--noise-depth": st.sampled_from(["30", "0", "nan"]),
        "--pol-mask": st.sampled_from([_INPUTS["mask"], _INPUTS["iqu1"], str(_DIR / "missing.fits")]),
        "--purify-b": st.none(),
        "--tensor-ratio": st.sampled_from(["0", "0.1", "11", "nan"]),
        "--sky-lmax": st.sampled_from(["40", "63", "64", "127"]),
        "--pixelise": st.none(),
        "--cross": st.none(),
        "--keep-monopole-dipole": st.none(),
        "--fast-coupling": st.none(),
    }
    chosen = draw(st.lists(st.sampled_from(sorted(options)), max_size=4, unique=True))
    if draw(st.integers(0, 4)) > 0:  # mostly a table: the built-in spectra take seconds to compute
        argv += ["--spectrum", "TABLE"]
    for opt in chosen:
        value = draw(options[opt])
        argv += [opt] if value is None else [opt, value]
    return argv


@fuzz_settings(6, deadline=None)
@given(polarized_validate_argv(), polarized_tables())
def test_polarized_validate_exits_0_or_2(argv, case):
    if "TABLE" in argv:
        table = _new_path()
        table.write_bytes(case[0])
        argv = [str(table) if a == "TABLE" else a for a in argv]
    with _in_process_pool():
        code, out, err = run_cli(argv, _DIR)
    check_cli_outcome(argv, code, out, err)
    run_dir = Path(argv[argv.index("--run-dir") + 1])
    if code == 0:
        assert out.startswith("validated the polarized spectrum estimator on ")
        for name in ("summary.csv", "summary.json", "validation.png"):
            assert (run_dir / name).is_file()
    else:
        for name in ("summary.csv", "summary.json", "validation.png"):
            assert not (run_dir / name).exists()
