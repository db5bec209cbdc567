"""Property-based tests of the table readers: any input loads correctly or raises the documented error.

Covered: ``simulate.read_spectrum_table`` (spectrum tables), ``spectrum.read_beam``
(text and FITS beam tables), ``Bandpowers.read_csv`` (bandpower tables), ``BandpowerTransfer.read_csv``
(per-bin transfer tables) and ``read_filter_table`` (harmonic filter tables).
Each reader gets random text and bytes, and near-valid tables built from a
known spectrum or beam with damage drawn at random: missing, renamed or
repeated columns, non-numeric, non-finite and negative cells, ells that skip,
repeat, go backwards, are fractional, negative or astronomically large,
short and long rows, unit comments that are unknown or contradict the column
name, other encodings (Latin-1, UTF-16) and separators, as well as harmless
variations (byte-order mark, CR/CRLF newlines, commas or whitespace,
comments, blank lines, extra columns, upper-case names).  A damaged table
must raise the documented :class:`~cmbtools.exceptions.InputFileError`; a
sound one must load exactly the values written (to a few ulp where a unit or
D_l conversion is involved).  Any other exception type, a foreign warning or
an example that runs longer than a few seconds (SIGALRM guard) is a failure.

Examples are derandomized for CI; set ``CMBTOOLS_FUZZ_EXAMPLES`` to explore more.
"""

from __future__ import annotations

import atexit
import io
import itertools
import math
import shutil
import tempfile
from pathlib import Path

import numpy as np
from astropy.io import fits
from hypothesis import given
from hypothesis import strategies as st

from _fuzzing import attempt, fuzz_settings, often, only_our_warnings
from cmbtools.exceptions import CmbtoolsWarning, InputFileError, InvalidInputError
from cmbtools.simulate import read_spectrum_table
from cmbtools.spectrum import Bandpowers, read_beam

_WORKDIR = Path(tempfile.mkdtemp(prefix="cmbtools-fuzz-tables-"))
atexit.register(shutil.rmtree, _WORKDIR, ignore_errors=True)
_COUNTER = itertools.count()


def new_path(suffix):
    return _WORKDIR / f"case{next(_COUNTER)}{suffix}"


def write_case(data, suffix=".csv"):
    path = new_path(suffix)
    path.write_bytes(data if isinstance(data, bytes) else data.encode("utf-8"))
    return path


_JUNK = ["abc", "1e", "--2", "0x1A", "one", "1.2.3", "\u221e", "n/a", "1e+", ".", "+-1"]
_NONFINITE = ["nan", "NaN", "inf", "-inf", "Infinity", "1e400", "-1e999"]
_SEPARATORS = [",", ", ", " ", "\t", "   "]
_NEWLINES = ["\n", "\r\n", "\r"]


def _number_text(v, style):
    return {"repr": repr(float(v)), "e10": f"{v:.10e}", "g17": f"{v:.17g}"}[style]


def _join(lines, newline, bom, final_newline):
    text = newline.join(lines) + (newline if final_newline else "")
    return ("\ufeff" if bom else "") + text


# =============================================================== spectrum tables

_SPEC_DEFECTS = (
    "no_ell", "ell_twice", "no_spectrum", "two_same_kind", "unknown_unit", "contradicting_unit", "non_numeric",
    "non_numeric_ell", "non_finite", "negative", "fractional_ell", "negative_ell", "gap", "duplicate", "swap",
    "short_row", "long_row", "no_rows", "no_header", "huge_ell", "astronomical_ell", "dl_nonzero_at_0", "latin1",
    "utf16", "semicolon", "overflow",
)
_FACTORS = {"k2": 1.0, "kcmb2": 1.0, "uk2": 1e-12, "ukcmb2": 1e-12}
_UNIT_TEXT = {1.0: ["K^2", "K2", "K_CMB^2", "k^2"], 1e-12: ["uK^2", "\u00b5K^2", "\u03bcK_CMB^2", "uk2", "muK^2"]}


class Case:
    """Bytes of a table, the reader's arguments and what must happen (short repr for failure reports)."""

    def __init__(self, data, facts, kwargs=None):
        self.data, self.facts, self.kwargs = data, facts, kwargs or {}

    def __repr__(self):
        shown = {k: v for k, v in self.facts.items() if k != "expected"}
        return f"Case({shown}, kwargs={self.kwargs}, data={self.data[:300]!r})"


def _damage_rows(draw, cells, defects):
    """The row defects the spectrum and beam tables share: a gap, a duplicate, a swap, a short row."""
    if "gap" in defects:
        del cells[draw(st.integers(1, len(cells) - 2))]
    if "duplicate" in defects:
        k = draw(st.integers(0, len(cells) - 1))
        cells.insert(k, list(cells[k]))
    if "swap" in defects:
        k = draw(st.integers(0, len(cells) - 2))
        cells[k], cells[k + 1] = cells[k + 1], cells[k]
    if "short_row" in defects:
        cells[draw(st.integers(0, len(cells) - 1))].pop()
    return cells


@st.composite
def spectrum_tables(draw):
    defects = set(draw(st.one_of(st.just(frozenset()), st.just(frozenset()),
                                 st.frozensets(st.sampled_from(_SPEC_DEFECTS), min_size=1, max_size=2))))
    kind = draw(st.sampled_from(["cl", "dl"]))
    unit = draw(st.sampled_from(sorted(_FACTORS)))
    unit_where = draw(st.sampled_from(["suffix", "comment", "both", "none"]))
    lmin = draw(often(2, 0, 1, 7, 40))
    n = draw(st.integers(min_value=1, max_value=25))
    # defects that need a particular layout to take effect
    if "overflow" in defects:
        kind, unit, lmin = "dl", "k2", min(lmin, 1)
        unit_where = "suffix" if unit_where == "none" else unit_where
        n = max(n, 2 - lmin)
    if "dl_nonzero_at_0" in defects:
        kind, lmin = "dl", 0
    if "unknown_unit" in defects:
        unit_where = "comment"
    if "contradicting_unit" in defects:
        unit_where = "both"
    # pairs that would cancel each other (a renamed column plus a second one of the same kind, ...)
    for keep, drop in (("no_spectrum", "two_same_kind"), ("no_ell", "ell_twice"), ("unknown_unit", "contradicting_unit"),
                       ("short_row", "long_row"), ("contradicting_unit", "unknown_unit")):
        if keep in defects:
            defects.discard(drop)
    if {"gap", "swap"} & defects:
        n = max(n, 3)
    factor = _FACTORS[unit] if unit_where != "none" else 1.0
    fatal = sorted(defects)
    if kind == "dl" and unit_where == "none":
        fatal.append("dl_without_unit")

    value = st.one_of(st.floats(min_value=0, max_value=1e4), st.floats(min_value=1e-13, max_value=1e-8),
                      st.sampled_from([0.0, 5e-324, 1e-300, 1e300]))
    values = draw(st.lists(value, min_size=n, max_size=n))
    ells = list(range(lmin, lmin + n))
    if kind == "dl" and lmin == 0:
        values[0] = 0.0  # D_0 must be 0 (C_0 cannot be recovered from it)
    if kind == "dl" and factor == 1.0 and draw(st.integers(0, 5)) == 0:
        # finite C_l from a D_l near the largest double: the conversion must not overflow on the way
        i = draw(st.sampled_from([j for j, l in enumerate(ells) if l >= 3] or [None]))
        if i is not None:
            values[i] = 1e308
    style = draw(st.sampled_from(["repr", "e10", "g17"]))
    cells = [[str(l), _number_text(v, style)] for l, v in zip(ells, values)]
    if draw(st.integers(0, 4)) == 0:  # whole numbers written as floats are still whole numbers
        for row in cells:
            row[0] = f"{row[0]}.0" if draw(st.booleans()) else f"{row[0]}e0"
    if "overflow" in defects:
        cells[1 - lmin][1] = "1.7e308"  # C_1 = pi * D_1 exceeds the largest double
    if "dl_nonzero_at_0" in defects:
        cells[0][1] = "12.5"

    spec_name = kind if unit_where in ("comment", "none") else f"{kind}_{unit}"
    names = ["ell", spec_name]
    if "no_spectrum" in defects:
        names[1] = "power"
    if "no_ell" in defects:
        names[0] = "l"
    sep = draw(st.sampled_from(_SEPARATORS))
    comma = "," in sep
    if "semicolon" in defects:
        sep, comma = ";", False
    # harmless extra columns: a numeric error column, a note with junk, a D_l column next to a C_l one
    extras = draw(st.lists(st.sampled_from(["err", "note", "other_spectrum"]), unique=True, max_size=2))
    if kind != "cl" or "no_spectrum" in defects:
        extras = [e for e in extras if e != "other_spectrum"]
    for extra in extras:
        if extra == "err":
            names.append("err")
            for row in cells:
                row.append("0.5")
        elif extra == "note":
            names.append("note")
            for row in cells:
                row.append(draw(st.sampled_from(_JUNK[:8])))
        else:
            names.append("dl_uk2")
            for row in cells:
                row.append(draw(st.sampled_from(["x", "-1", "nan", "1e999"])))  # ignored: the C_l column is read
    if "ell_twice" in defects:
        names.append("ell")
        for row in cells:
            row.append(row[0])
    if "two_same_kind" in defects:
        names.append(f"{kind}_uk2" if spec_name != f"{kind}_uk2" else f"{kind}_k2")
        for row in cells:
            row.append(row[1])
    order = draw(st.permutations(range(len(names))))
    names = [names[i] for i in order]
    cells = [[row[i] for i in order] for row in cells]
    col = {name: names.index(name) for name in names}
    i_ell = col.get("ell", col.get("l"))
    i_spec = col.get(spec_name, col.get("power"))

    r = draw(st.integers(0, n - 1))
    if "non_numeric" in defects:
        cells[r][i_spec] = draw(st.sampled_from(_JUNK + ([""] if comma else [])))
    if "non_numeric_ell" in defects:
        cells[r][i_ell] = draw(st.sampled_from(_JUNK + ["two"]))
    if "non_finite" in defects:
        cells[r][i_spec] = draw(st.sampled_from(_NONFINITE))
    if "negative" in defects:
        cells[r][i_spec] = draw(st.sampled_from(["-1e-12", "-3", "-5e-324"]))
    if "fractional_ell" in defects:
        cells[r][i_ell] = f"{ells[r]}.5"
    if "negative_ell" in defects:
        cells[0][i_ell] = "-1"
    if "huge_ell" in defects:
        for k, row in enumerate(cells):
            row[i_ell] = str(10**12 + k)
    if "astronomical_ell" in defects:
        cells[0][i_ell] = "1e300"
    cells = _damage_rows(draw, cells, defects)
    if "long_row" in defects:
        cells[draw(st.integers(0, len(cells) - 1))].append("0")
    if "no_rows" in defects:
        cells = []

    upper = draw(st.booleans())
    header = sep.join(n_.upper() if upper else n_ for n_ in names)
    lines = [sep.join(row) for row in cells]
    if comma and draw(st.booleans()):  # spaces around the cells
        lines = [", ".join(f" {c} " for c in row) for row in cells]
    for _ in range(draw(st.integers(0, 3))):  # comments and blank lines among the rows
        lines.insert(draw(st.integers(0, len(lines))), draw(st.sampled_from(["# a note", "", "   ", "#"])))
    top = draw(st.lists(st.sampled_from(["# cmbtools spectrum table", "# Tern Sky Survey fiducial", ""]), max_size=2))
    if unit_where in ("comment", "both"):
        if "unknown_unit" in defects:
            text = draw(st.sampled_from(["Jy^2", "K", "mK^2", "parsec"]))
        elif "contradicting_unit" in defects:
            text = draw(st.sampled_from(_UNIT_TEXT[1e-12 if factor == 1.0 else 1.0]))
        else:
            text = draw(st.sampled_from(_UNIT_TEXT[factor]))
        top.insert(draw(st.integers(0, len(top))), draw(st.sampled_from(["# unit: ", "# units : ", "#unit:"])) + text)
    if "latin1" in defects:
        top.append("# 145 GHz \u00b1 5 GHz")
    lines = top + ([] if "no_header" in defects else [header] + lines)
    text = _join(lines, draw(st.sampled_from(_NEWLINES)), draw(st.booleans()), draw(st.booleans()))
    if "utf16" in defects:
        data = text.encode("utf-16")
    elif "latin1" in defects:
        data = text.encode("latin-1", errors="replace")
    else:
        data = text.encode("utf-8")

    expected = None
    if not fatal:
        lmax = ells[-1]
        expected = np.zeros(lmax + 1)
        for l, v in zip(ells, (float(row[i_spec]) for row in cells)):
            if kind == "cl":
                expected[l] = v * factor
            elif l > 0:
                expected[l] = (2.0 * math.pi / (l * (l + 1.0))) * (v * factor)
    return Case(data, dict(kind=kind, factor=factor, unit_where=unit_where, fatal=fatal, expected=expected))


def check_spectrum(cl):
    assert isinstance(cl, np.ndarray) and cl.dtype == np.float64 and cl.ndim == 1 and cl.size >= 1
    assert np.all(np.isfinite(cl)) and np.all(cl >= 0)


def read_spectrum(path):
    cl, err, caught = attempt(read_spectrum_table, path)
    only_our_warnings(caught)
    if err is None:
        check_spectrum(cl)
    else:
        assert isinstance(err, InputFileError) and err.path == str(path), err
    return cl, err


@fuzz_settings(250)
@given(spectrum_tables())
def test_damaged_spectrum_tables_are_refused_and_sound_ones_load_exactly(case):
    path = write_case(case.data)
    cl, err = read_spectrum(path)
    f = case.facts
    if f["fatal"]:
        assert err is not None, f"a table with {f['fatal']} was accepted"
        return
    assert err is None, f"a sound table was refused: {err}"
    assert cl.shape == f["expected"].shape
    if f["kind"] == "cl" and f["factor"] == 1.0:
        np.testing.assert_array_equal(cl, f["expected"])  # read as written, to the bit
    else:
        # one unit or D_l conversion: a few ulp (the absolute term only matters for subnormal numbers)
        np.testing.assert_allclose(cl, f["expected"], rtol=1e-15, atol=1e-300)


_SPEC_TOKENS = st.one_of(
    st.sampled_from(["ell", "cl", "dl", "cl_k2", "cl_uk2", "dl_uk2", "dl_k2", "ELL", "err", "", "# unit: uK^2",
                     "#", "0", "1", "2", "3", "-1", "1e-10", "nan", "inf", "1e308", "2.5", "abc"]),
    st.floats().map(repr),
    st.integers(min_value=-5, max_value=10**20).map(str),
    st.text(max_size=5),
)


@st.composite
def token_tables(draw, tokens=_SPEC_TOKENS):
    """Lines of tokens joined by a separator: tables that are wrong in arbitrary ways."""
    sep = draw(st.sampled_from([",", " ", "\t", ";"]))
    lines = [sep.join(draw(st.lists(tokens, max_size=4))) for _ in range(draw(st.integers(0, 8)))]
    return _join(lines, draw(st.sampled_from(_NEWLINES)), draw(st.booleans()), draw(st.booleans()))


@fuzz_settings(150)
@given(st.one_of(st.binary(max_size=2000), st.text(max_size=400).map(str.encode),
                 token_tables().map(str.encode), token_tables().map(lambda t: t.encode("utf-16"))))
def test_random_input_never_crashes_the_spectrum_table_reader(data):
    # read_spectrum checks a loaded table (float64, finite, non-negative) or the documented error
    cl, err = read_spectrum(write_case(data))
    assert (cl is None) != (err is None)


# =============================================================== beam tables (text)

_BEAM_DEFECTS = (
    "no_ell", "no_beam", "non_numeric_ell", "non_numeric_beam", "non_finite", "nan_ell", "negative", "fractional_ell",
    "start_at_1", "gap", "duplicate", "swap", "short_row", "no_rows", "empty", "latin1", "utf16", "semicolon",
    "lmax_beyond", "lmax_negative",
)


@st.composite
def beam_texts(draw):
    defects = set(draw(st.one_of(st.just(frozenset()), st.just(frozenset()),
                                 st.frozensets(st.sampled_from(_BEAM_DEFECTS), min_size=1, max_size=2))))
    n = draw(st.integers(min_value=1, max_value=25))
    if {"gap", "swap", "start_at_1"} & defects:
        n = max(n, 3)
    b0 = draw(often(1.0, 0.5, 0.9995, 1.002, 0.0, 1.5))
    rest = draw(st.lists(st.one_of(st.floats(min_value=0, max_value=1.2), st.sampled_from([0.0, 5e-324, 1e-300])),
                         min_size=n - 1, max_size=n - 1))
    values = [b0] + rest
    style = draw(st.sampled_from(["repr", "e10", "g17"]))
    cells = [[str(l), _number_text(v, style)] for l, v in enumerate(values)]
    names = ["ell", "b_ell"]
    if "no_ell" in defects:
        names[0] = "l"
    if "no_beam" in defects:
        names[1] = "bl"
    extras = draw(st.lists(st.sampled_from(["err", "note"]), unique=True, max_size=2))
    for extra in extras:
        names.append(extra)
        for row in cells:
            row.append("0.01" if extra == "err" else draw(st.sampled_from(_JUNK[:8])))
    order = draw(st.permutations(range(len(names))))
    names = [names[i] for i in order]
    cells = [[row[i] for i in order] for row in cells]
    i_ell, i_beam = order.index(0), order.index(1)

    r = draw(st.integers(0, n - 1))
    if "non_numeric_ell" in defects:
        cells[r][i_ell] = draw(st.sampled_from(_JUNK))
    if "non_numeric_beam" in defects:
        cells[r][i_beam] = draw(st.sampled_from(_JUNK))
    if "non_finite" in defects:
        cells[r][i_beam] = draw(st.sampled_from(_NONFINITE))
    if "nan_ell" in defects:
        cells[r][i_ell] = draw(st.sampled_from(_NONFINITE))
    if "negative" in defects:
        cells[r][i_beam] = draw(st.sampled_from(["-1e-12", "-0.5", "-5e-324"]))
    if "fractional_ell" in defects:
        cells[r][i_ell] = f"{r}.5"
    if "start_at_1" in defects:
        del cells[0]
    cells = _damage_rows(draw, cells, defects)
    if "no_rows" in defects:
        cells = []
    if draw(st.integers(0, 4)) == 0 and cells and "short_row" not in defects:  # more cells than the header names: the extra ones are ignored
        cells[draw(st.integers(0, len(cells) - 1))].append("7")

    sep = draw(st.sampled_from(_SEPARATORS))
    if "semicolon" in defects:
        sep = ";"
    upper = draw(st.booleans())
    lines = [sep.join(row) for row in cells]
    if draw(st.booleans()) and lines:  # a comment at the end of a row (the format allows it)
        k = draw(st.integers(0, len(lines) - 1))
        lines[k] += "  # note"
    for _ in range(draw(st.integers(0, 3))):
        lines.insert(draw(st.integers(0, len(lines))), draw(st.sampled_from(["# a note", "", "   ", "#"])))
    header = sep.join(x.upper() if upper else x for x in names)
    if draw(st.booleans()):
        header += " # ell and B_l"
    top = draw(st.lists(st.sampled_from(["# Tern camera beam, 145 GHz", "# written by hand", ""]), max_size=2))
    if "latin1" in defects:
        top.append("# FWHM 25\u2032 \u00b1 1")
    lines = top + ([] if "empty" in defects else [header] + lines)
    text = _join(lines, draw(st.sampled_from(_NEWLINES)), draw(st.booleans()), draw(st.booleans()))
    if "utf16" in defects:
        data = text.encode("utf-16")
    elif "latin1" in defects:
        data = text.encode("latin-1", errors="replace")
    else:
        data = text.encode("utf-8")

    kwargs = {}
    if "lmax_beyond" in defects:
        kwargs["lmax"] = n - 1 + draw(st.integers(1, 100))
    elif "lmax_negative" in defects:
        kwargs["lmax"] = -1
    elif draw(st.integers(0, 3)) == 0:
        kwargs["lmax"] = draw(st.integers(0, n - 1))
    expected = None
    if not defects:
        expected = np.array([float(row[i_beam]) for row in cells])[: kwargs.get("lmax", n - 1) + 1]
    return Case(data, dict(defects=sorted(defects), expected=expected), kwargs)


def check_beam(b, caught):
    assert isinstance(b, np.ndarray) and b.dtype == np.float64 and b.ndim == 1 and b.size >= 1
    assert np.all(np.isfinite(b)) and np.all(b >= 0)
    # the one warning a loaded beam may carry says B_0 is not 1
    ours = [w for w in caught if issubclass(w.category, CmbtoolsWarning)]
    assert len(ours) == (abs(b[0] - 1.0) > 1e-3), [str(w.message) for w in ours]


def read_beam_case(path, **kwargs):
    b, err, caught = attempt(read_beam, path, **kwargs)
    only_our_warnings(caught)
    if err is None:
        check_beam(b, caught)
    elif not isinstance(err, InvalidInputError) or kwargs.get("lmax", 0) >= 0:
        assert isinstance(err, InputFileError) and err.path == str(path), err
    return b, err


@fuzz_settings(250)
@given(beam_texts())
def test_damaged_beam_tables_are_refused_and_sound_ones_load_exactly(case):
    path = write_case(case.data)
    b, err = read_beam_case(path, **case.kwargs)
    f = case.facts
    if "lmax_negative" in f["defects"]:
        assert isinstance(err, InvalidInputError), err  # a bad argument, not a bad file
    elif f["defects"]:
        assert err is not None, f"a beam table with {f['defects']} was accepted"
    else:
        assert err is None, f"a sound beam table was refused: {err}"
        np.testing.assert_array_equal(b, f["expected"])  # exactly as tabulated


_BEAM_TOKENS = st.one_of(
    st.sampled_from(["ell", "b_ell", "ELL", "B_ELL", "bl", "", "#", "# x", "0", "1", "2", "0.5", "-1", "nan", "inf",
                     "1e308", "2.5", "abc", "SIMPLE  ="]),
    st.floats().map(repr),
    st.integers(min_value=-5, max_value=10**20).map(str),
    st.text(max_size=5),
)


@fuzz_settings(150)
@given(st.one_of(st.binary(max_size=2000), st.text(max_size=400).map(str.encode),
                 token_tables(_BEAM_TOKENS).map(str.encode),
                 st.binary(max_size=3000).map(lambda b: b"SIMPLE  =                    T".ljust(80) + b)))
def test_random_input_never_crashes_the_beam_reader(data):
    # read_beam_case checks a loaded beam (float64, finite, non-negative; a warning iff B_0 != 1) or the error
    b, err = read_beam_case(write_case(data))
    assert (b is None) != (err is None)


# =============================================================== beam tables (FITS)

_ELL_DEFECTS = ("start_at_1", "gap", "fractional_ell")


@st.composite
def beam_fits_tables(draw):
    layout = draw(often("named", "named_extra", "single", "single_vector", "beam_without_ell", "two_unnamed",
                        "no_table", "image_first"))
    n = draw(often(draw(st.integers(1, 30)), 0))
    values = np.array(draw(st.lists(st.floats(min_value=0, max_value=1.2), min_size=n, max_size=n)), dtype=np.float64)
    if n and draw(st.booleans()):
        values[0] = 1.0
    defect = draw(often(None, "nan", "inf", "negative", "start_at_1", "gap", "fractional_ell", "complex", "text"))
    if (n < 3 and defect in ("gap", "start_at_1")) or ("single" in layout and defect in _ELL_DEFECTS):
        defect = None  # nothing to damage (a single column has no ell column)
    ell = np.arange(n, dtype=np.int64)
    if defect == "nan" and n:
        values[draw(st.integers(0, n - 1))] = np.nan
    if defect == "inf" and n:
        values[draw(st.integers(0, n - 1))] = np.inf
    if defect == "negative" and n:
        values[draw(st.integers(0, n - 1))] = -0.25
    if defect == "start_at_1":
        ell = ell + 1
    if defect == "gap":
        ell[draw(st.integers(1, n - 1)):] += 1
    ell_format = draw(st.sampled_from(["K", "J", "D", "E"]))
    ell_array = ell
    if defect == "fractional_ell" and n:
        ell_array, ell_format = ell + 0.5, "D"
    beam_format = draw(st.sampled_from(["D", "E"]))
    beam_array = values
    if defect == "complex":
        beam_format, beam_array = "M", values * (1 + 0.5j)
    if defect == "text":
        beam_format, beam_array = "A12", np.array([f"{v:.6g}" for v in values], dtype="U12")
    stored = np.asarray(beam_array.astype(np.float32) if beam_format == "E" else beam_array)
    ell_name = draw(st.sampled_from(["ELL", "ell", "Ell"]))
    beam_name = draw(st.sampled_from(["B_ELL", "b_ell", "B_Ell"]))
    columns = []
    if layout in ("named", "named_extra", "image_first"):
        columns = [fits.Column(name=ell_name, format=ell_format, array=ell_array),
                   fits.Column(name=beam_name, format=beam_format, array=beam_array)]
        if layout == "named_extra":
            columns.insert(draw(st.integers(0, 2)), fits.Column(name="ERR", format="E", array=np.zeros(n)))
    elif layout == "single":
        columns = [fits.Column(name=draw(st.sampled_from(["BEAM", "TEMPERATURE", "B"])), format=beam_format,
                               array=beam_array)]
    elif layout == "single_vector":
        beam_format = "3" + beam_format
        beam_array = np.resize(beam_array, (n, 3)) if n else np.zeros((0, 3))
        stored = np.asarray(beam_array.astype(np.float32) if beam_format == "3E" else beam_array)
        columns = [fits.Column(name="BEAM", format=beam_format, array=beam_array)]
    elif layout == "beam_without_ell":
        columns = [fits.Column(name=beam_name, format=beam_format, array=beam_array),
                   fits.Column(name="WEIGHT", format="D", array=np.ones(n))]
    elif layout == "two_unnamed":
        columns = [fits.Column(name="A", format="D", array=np.arange(n, dtype=float)),
                   fits.Column(name="B", format=beam_format, array=beam_array)]
    hdus = [fits.PrimaryHDU()]
    if layout in ("image_first", "no_table"):
        hdus.append(fits.ImageHDU(np.ones((2, 3))))
    if columns:
        with np.errstate(all="ignore"):
            hdus.append(fits.BinTableHDU.from_columns(columns))
    buffer = io.BytesIO()
    fits.HDUList(hdus).writeto(buffer)
    broken = layout in ("beam_without_ell", "two_unnamed", "no_table") or n == 0 or defect is not None
    expected = None if broken else np.asarray(stored, dtype=np.float64).ravel()
    return Case(buffer.getvalue(), dict(layout=layout, n=n, defect=defect, broken=broken, expected=expected))


@fuzz_settings(120)
@given(beam_fits_tables())
def test_fits_beam_tables_load_exactly_or_are_refused(case):
    path = write_case(case.data, ".fits")
    b, err = read_beam_case(path)
    f = case.facts
    if f["broken"]:
        assert err is not None, f"a FITS beam table ({f['layout']}, {f['n']} rows, {f['defect']}) was accepted"
    else:
        assert err is None, f"a sound FITS beam table was refused: {err}"
        np.testing.assert_array_equal(b, f["expected"])


def _reference_beam_fits():
    b = np.exp(-np.arange(300) ** 2 * 1e-5)
    cols = [fits.Column(name="ELL", format="K", array=np.arange(300)), fits.Column(name="B_ELL", format="D", array=b)]
    buffer = io.BytesIO()
    hdul = fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols)])
    hdul.writeto(buffer)
    with fits.open(io.BytesIO(buffer.getvalue())) as back:
        data_end = back[1].fileinfo()["datLoc"] + back[1].data.nbytes
    return buffer.getvalue(), b, data_end


_BEAM_FITS, _BEAM_VALUES, _BEAM_DATA_END = _reference_beam_fits()


@fuzz_settings(80)
@given(
    back=st.one_of(st.just(0), st.integers(min_value=0, max_value=len(_BEAM_FITS))),
    flips=st.lists(st.tuples(st.integers(min_value=0, max_value=len(_BEAM_FITS) - 1), st.integers(0, 255)), max_size=8),
)
def test_truncated_or_corrupted_fits_beams_load_in_full_or_not_at_all(back, flips):
    data = bytearray(_BEAM_FITS[: len(_BEAM_FITS) - back])
    for where, byte in flips:
        if data:
            data[where % len(data)] = byte
    b, err = read_beam_case(write_case(bytes(data), ".fits"))
    if not flips:
        if back == 0:
            np.testing.assert_array_equal(b, _BEAM_VALUES)
        elif len(data) < _BEAM_DATA_END:  # some table bytes are gone
            assert err is not None, f"a FITS beam cut to {len(data)} of {len(_BEAM_FITS)} bytes was accepted"


# =============================================================== bandpower tables

def _reference_bandpowers(seed):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 8))
    lo = 2 + 10 * np.arange(n)
    cl = rng.uniform(1e-12, 1e-9, n)
    return Bandpowers(ell_min=lo, ell_max=lo + 9, ell_eff=lo + 4.5, cl=cl, cl_err=0.1 * cl, dl=cl * 100.0,
                      dl_err=cl * 10.0, metadata={"spectrum": "auto", "nside": 16, "mask_file": "tern mask.fits"})


_BP_DAMAGE = st.one_of(
    st.tuples(st.just("delete_line"), st.integers(0, 50)),
    st.tuples(st.just("replace_cell"), st.integers(0, 50), st.integers(0, 6),
              st.one_of(st.sampled_from(_JUNK + _NONFINITE + ["", "2.5", "-3", "1e300", "7"]), st.floats().map(repr))),
    st.tuples(st.just("truncate"), st.integers(0, 4000)),
    st.tuples(st.just("unit"), st.sampled_from(["K^2", "uK^2", "mK^2", "uK", "", "Jy"])),
    st.tuples(st.just("encoding"), st.sampled_from(["utf-16", "latin-1"])),
)


@fuzz_settings(120)
@given(seed=st.integers(0, 2**32 - 1), unit=st.sampled_from(["uK", "K"]), damage=st.lists(_BP_DAMAGE, max_size=3),
       bom=st.booleans(), newline=st.sampled_from(_NEWLINES))
def test_bandpower_tables_load_or_raise(seed, unit, damage, bom, newline):
    bp = _reference_bandpowers(seed)
    path = new_path(".csv")
    bp.write_csv(path, unit=unit)
    lines = path.read_text(encoding="utf-8").splitlines()
    encoding = "utf-8"
    cut = None
    for d in damage:
        if d[0] == "delete_line" and lines:
            del lines[d[1] % len(lines)]
        elif d[0] == "replace_cell" and lines:
            k = d[1] % len(lines)
            cells = lines[k].split(",")
            cells[d[2] % len(cells)] = d[3]
            lines[k] = ",".join(cells)
        elif d[0] == "truncate":
            cut = d[1]
        elif d[0] == "unit":
            lines = [f"# unit: {d[1]}" if line.startswith("# unit:") else line for line in lines]
        elif d[0] == "encoding":
            encoding = d[1]
    text = _join(lines, newline, bom, True)
    data = text.encode(encoding, errors="replace")
    if cut is not None:
        data = data[:cut]
    path.write_bytes(data)
    got, err, caught = attempt(Bandpowers.read_csv, path)
    only_our_warnings(caught)
    if err is not None:
        assert isinstance(err, InputFileError) and err.path == str(path), err
        assert damage, f"an undamaged table was refused: {err}"
        return
    assert got.n_bins >= 1 and got.ell_min.dtype == np.int64 and got.ell_max.dtype == np.int64
    if not damage:
        np.testing.assert_array_equal(got.ell_min, bp.ell_min)
        np.testing.assert_array_equal(got.ell_max, bp.ell_max)
        for name in ("ell_eff", "cl", "cl_err", "dl", "dl_err"):
            np.testing.assert_allclose(getattr(got, name), getattr(bp, name), rtol=1e-15, atol=0, err_msg=name)
        assert got.metadata["nside"] == 16 and got.metadata["mask_file"] == "tern mask.fits"


def test_an_undamaged_bandpower_table_with_bom_and_crlf_loads():
    bp = _reference_bandpowers(3)
    path = new_path(".csv")
    bp.write_csv(path)
    path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes().replace(b"\n", b"\r\n"))
    got = Bandpowers.read_csv(path)
    np.testing.assert_allclose(got.cl, bp.cl, rtol=1e-15, atol=0)


# =============================================================== transfer and harmonic filter tables

def _reference_transfer(seed):
    from cmbtools.spectrum import BandpowerTransfer

    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 8))
    lo = 2 + 10 * np.arange(n)
    return BandpowerTransfer(lo, lo + 9, lo + 4.5, rng.uniform(0.01, 1.1, n), rng.uniform(0.0, 0.05, n),
                             {"n_sims": 40, "mask_file": "tern mask.fits"})


def _damaged_text(lines, damage, newline, bom):
    encoding, cut = "utf-8", None
    for d in damage:
        if d[0] == "delete_line" and lines:
            del lines[d[1] % len(lines)]
        elif d[0] == "replace_cell" and lines:
            k = d[1] % len(lines)
            cells = lines[k].split(",")
            cells[d[2] % len(cells)] = d[3]
            lines[k] = ",".join(cells)
        elif d[0] == "truncate":
            cut = d[1]
        elif d[0] == "encoding":
            encoding = d[1]
    data = _join(lines, newline, bom, True).encode(encoding, errors="replace")
    return data if cut is None else data[:cut]


_TABLE_DAMAGE = st.one_of(
    st.tuples(st.just("delete_line"), st.integers(0, 50)),
    st.tuples(st.just("replace_cell"), st.integers(0, 50), st.integers(0, 4),
              st.one_of(st.sampled_from(_JUNK + _NONFINITE + ["", "2.5", "-3", "0", "1e300", "7"]),
                        st.floats().map(repr))),
    st.tuples(st.just("truncate"), st.integers(0, 2000)),
    st.tuples(st.just("encoding"), st.sampled_from(["utf-16", "latin-1"])),
)


@fuzz_settings(120)
@given(seed=st.integers(0, 2**32 - 1), damage=st.lists(_TABLE_DAMAGE, max_size=3), bom=st.booleans(),
       newline=st.sampled_from(_NEWLINES))
def test_transfer_tables_load_or_raise(seed, damage, bom, newline):
    from cmbtools.spectrum import BandpowerTransfer

    t = _reference_transfer(seed)
    path = new_path(".csv")
    t.write_csv(path)
    path.write_bytes(_damaged_text(path.read_text(encoding="utf-8").splitlines(), damage, newline, bom))
    got, err, caught = attempt(BandpowerTransfer.read_csv, path)
    only_our_warnings(caught)
    if err is not None:
        assert isinstance(err, InputFileError) and err.path == str(path), err
        assert damage, f"an undamaged table was refused: {err}"
        return
    assert got.n_bins >= 1 and np.all(got.transfer > 0) and np.all(got.transfer_error >= 0)
    assert np.all(got.ell_min[1:] > got.ell_max[:-1])
    if not damage:
        for name in ("ell_min", "ell_max", "ell_eff", "transfer", "transfer_error"):
            np.testing.assert_array_equal(getattr(got, name), getattr(t, name), err_msg=name)
        assert got.metadata["mask_file"] == "tern mask.fits"


@fuzz_settings(120)
@given(seed=st.integers(0, 2**32 - 1), damage=st.lists(_TABLE_DAMAGE, max_size=3), bom=st.booleans(),
       newline=st.sampled_from(_NEWLINES))
def test_harmonic_filter_tables_load_or_raise(seed, damage, bom, newline):
    from cmbtools._core.binned_tables import read_filter_table
    from cmbtools._core.tables import write_text_table

    rng = np.random.default_rng(seed)
    f = rng.uniform(-0.1, 1.0, int(rng.integers(1, 30)))
    path = write_text_table(new_path(".csv"), ("ell", "factor"), [(str(i), repr(float(v))) for i, v in enumerate(f)],
                            comments=["a high-pass"])
    path.write_bytes(_damaged_text(path.read_text(encoding="utf-8").splitlines(), damage, newline, bom))
    got, err, caught = attempt(read_filter_table, path)
    only_our_warnings(caught)
    if err is not None:
        assert isinstance(err, InputFileError) and err.path == str(path), err
        assert damage, f"an undamaged table was refused: {err}"
        return
    assert got.ndim == 1 and got.size >= 1 and np.all(np.isfinite(got))
    if not damage:
        np.testing.assert_array_equal(got, f)
