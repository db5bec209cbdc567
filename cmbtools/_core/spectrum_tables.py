"""Spectrum tables: C_l, D_l and N_l from ell, one spectrum or the six of a polarized sky.

Spectrum tables
---------------
A spectrum table is a UTF-8 text file:

* lines starting with ``#`` are comments; a comment of the form
  ``# unit: uK^2`` gives the unit of an unsuffixed spectrum column;
* the first other line names the columns, separated by commas or by
  whitespace (the data rows use the same separator);
* a column ``ell`` holds consecutive integer multipoles (no gaps, no
  repeats), starting anywhere >= 0;
* one spectrum column: ``cl`` (C_l) or ``dl`` (D_l = l(l+1) C_l / 2 pi), with
  the unit either as a suffix, ``cl_k2``, ``cl_uk2``, ``dl_k2``, ``dl_uk2``, or
  in the ``# unit:`` comment.  A ``cl`` column without a unit is in K^2 (the
  library's unit); a ``dl`` column must state its unit.  If a file has both a
  C_l and a D_l column (as the files :func:`write_spectrum_table` writes), the
  C_l column is read and the D_l column is ignored; other columns (errors,
  notes) are ignored too;
* blank lines are skipped; a byte-order mark at the start (as spreadsheet
  programs write) is ignored;
* ell is at most 10**7 (far beyond any map a machine can hold).

Example (the layout :func:`write_spectrum_table` writes)::

    # cmbtools spectrum table
    # columns: ell; cl_k2 = C_l in K^2; dl_uk2 = l(l+1) C_l / 2pi in uK^2
    ell,cl_k2,dl_uk2
    0,0,0
    1,0,0
    2,6.66333604e-10,636.254...

Recognised unit spellings (case-insensitive, ``^`` optional): ``K^2``,
``K_CMB^2``, ``uK^2``, ``uK_CMB^2`` (also with the micro sign).

:func:`read_spectrum_table` (and :func:`read_noise_spectrum_table`, which
prefers an ``nl`` column) also accepts a bandpower table (the columns
``ell_min,ell_max,...,cl,...`` that :meth:`cmbtools.spectrum.Bandpowers.write_csv`
writes): the spectrum is then taken as constant over each bin, C_l = C_b for
ell_min <= l <= ell_max, and zero below the first bin.  Likewise
:func:`read_polarized_spectrum_table` accepts a polarized bandpower table
(a ``spectrum`` column: what :meth:`cmbtools.spectrum.PolarizedBandpowers.write_csv`
writes), each spectrum constant over its bins, and :func:`read_spectrum_table`
takes its TT rows, as it takes a polarized spectrum table's TT column.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import numpy as np

from cmbtools._core.binned_tables import _spectrum_from_bandpowers, spectra_from_polarized_bandpowers
from cmbtools._core.checks import check_cl
from cmbtools._core.tables import (
    LARGEST_ELL,
    _UNITS,
    number_cell,
    power_unit_factor,
    read_text_table,
    write_text_table,
)
from cmbtools.exceptions import InputFileError, InvalidInputError

__all__ = ["read_spectrum_table", "write_spectrum_table", "read_polarized_spectrum_table"]

_SPECTRUM_COLUMN = re.compile(r"^(cl|dl|nl)(?:_(k2|uk2|kcmb2|ukcmb2))?$")
_POLARIZED_COLUMN = re.compile(r"^(cl|dl)_(tt|ee|bb|te|tb|eb)(?:_(k2|uk2|kcmb2|ukcmb2))?$")
#: The spectra of a polarized table, in the order its columns are written.
POLARIZED_SPECTRA = ("TT", "EE", "BB", "TE", "TB", "EB")


def read_spectrum_table(path) -> np.ndarray:
    """Read a spectrum table (see the module notes for the format) as C_l in K^2.

    Parameters
    ----------
    path : str or path-like
        The text file.

    Returns
    -------
    cl : ndarray of float64, shape (ell_max+1,)
        C_l in K^2 indexed by ell from 0.  Multipoles below the table's first
        ell are filled with 0; a D_l table gives C_0 = 0 (D_0 must be 0).

    Raises
    ------
    InputFileError
        If the file is missing or unreadable, or has no ``ell`` or spectrum
        column, an unknown or missing unit, a non-numeric or non-finite cell,
        a negative power, a non-integer ell, an ell above
        10**7, a gap or repeat in ell, or a D_l whose C_l is
        too large for a double.  The message names the file, the line and
        the problem.
    """
    return _read_power_table(path, prefer=("cl", "dl"))


def _read_power_table(path, *, prefer) -> np.ndarray:
    """The reader behind :func:`read_spectrum_table` and :func:`read_noise_spectrum_table`."""
    table = read_text_table(path, what="a spectrum table")
    p = table.path
    units = [(v, n) for v, n in table.comment_values("unit", before_header=True) if v]
    unit_comment = units[-1] if units else None
    header = None if table.names is None else (list(table.names), None, table.header_line)
    rows = table.rows
    if header is None:
        raise InputFileError(p, "has no column names (expected a line such as 'ell,cl_k2')")
    names, _, header_line = header
    if "ell" not in names and "ell_min" in names and "ell_max" in names:
        if "spectrum" in names:  # a polarized bandpower table: its TT rows (as a polarized table's TT column)
            return spectra_from_polarized_bandpowers(table, ("TT",))["TT"]
        return _spectrum_from_bandpowers(table)
    if "ell" not in names:
        raise InputFileError(p, f"line {header_line}: no 'ell' column (columns: {', '.join(names)})")
    if names.count("ell") > 1:
        raise InputFileError(p, f"line {header_line}: the 'ell' column appears twice")
    spectra = [(i, _SPECTRUM_COLUMN.match(n)) for i, n in enumerate(names)]
    spectra = [(i, m) for i, m in spectra if m and m.group(1) in prefer]
    chosen = []
    for kind_wanted in prefer:
        chosen = chosen or [(i, m) for i, m in spectra if m.group(1) == kind_wanted]
    if not chosen and any(_POLARIZED_COLUMN.match(n) and n.split("_")[1] == "tt" for n in names):
        return _polarized_spectra(table, ("TT",))["TT"]  # a polarized table: its TT column
    if not chosen:
        expected = ", ".join(repr(f"{k}{s}") for k in prefer for s in ("", "_k2", "_uk2"))
        raise InputFileError(
            p, f"line {header_line}: no spectrum column: expected one of {expected} (columns: {', '.join(names)})"
        )
    if len(chosen) > 1:
        raise InputFileError(
            p, f"line {header_line}: more than one {chosen[0][1].group(1)} column "
               f"({', '.join(names[i] for i, _ in chosen)})"
        )
    col, match = chosen[0]
    kind, suffix = match.group(1), match.group(2)
    if suffix is not None:
        factor = _UNITS[suffix]
        if unit_comment is not None and power_unit_factor(unit_comment[0]) not in (None, factor):
            raise InputFileError(
                p, f"line {unit_comment[1]}: the unit comment {unit_comment[0]!r} contradicts the column "
                   f"name {names[col]!r}"
            )
    elif unit_comment is not None:
        factor = power_unit_factor(unit_comment[0])
        if factor is None:
            raise InputFileError(
                p, f"line {unit_comment[1]}: unknown unit {unit_comment[0]!r} (use K^2 or uK^2)"
            )
    elif kind in ("cl", "nl"):
        factor = 1.0
    else:
        raise InputFileError(
            p, f"line {header_line}: the 'dl' column has no unit; name it 'dl_uk2' or 'dl_k2', "
               "or add a '# unit: uK^2' comment"
        )
    if not rows:
        raise InputFileError(p, "has column names but no data rows")
    ells, (values,) = _ell_rows(p, rows, names, [(col, True)])
    return _as_cl(p, rows, names[col], kind, factor, ells, values)


def _ell_rows(p, rows, names, columns):
    """``(ells, [values per column])`` of the data rows: one ``ell`` per row, increasing by 1.

    ``columns``: ``(index, must_be_non_negative)`` of each value column read.  Every cell is checked (a
    number, finite, not negative where a power must not be) with an error naming its line.
    """
    ell_col = names.index("ell")
    ells = np.empty(len(rows), dtype=np.int64)
    values = [np.empty(len(rows)) for _ in columns]
    for j, (number, cells) in enumerate(rows):
        if len(cells) != len(names):
            raise InputFileError(p, f"line {number}: {len(cells)} cells, but the header names {len(names)} columns")
        ell_value = number_cell(p, cells[ell_col], f"line {number}: ell")
        if not math.isfinite(ell_value) or ell_value != int(ell_value) or ell_value < 0:
            raise InputFileError(p, f"line {number}: ell {cells[ell_col]!r} is not a non-negative integer")
        if ell_value > LARGEST_ELL:
            raise InputFileError(p, f"line {number}: ell {cells[ell_col]!r} is above the largest ell, {LARGEST_ELL}")
        ells[j] = int(ell_value)
        for (col, non_negative), out in zip(columns, values):
            v = number_cell(p, cells[col], f"line {number}: {names[col]} value")
            if not math.isfinite(v):
                raise InputFileError(p, f"line {number}: {names[col]} value {cells[col]!r} is not finite")
            if v < 0 and non_negative:
                raise InputFileError(p, f"line {number}: negative power {names[col]} = {cells[col]} (a spectrum is >= 0)")
            out[j] = v
    steps = np.diff(ells)
    if np.any(steps != 1):
        j = int(np.argmax(steps != 1))
        problem = "repeats" if steps[j] == 0 else ("decreases" if steps[j] < 0 else "skips")
        raise InputFileError(
            p, f"line {rows[j + 1][0]}: ell {problem} from {ells[j]} to {ells[j + 1]} "
               "(ell must increase by 1 from row to row)"
        )
    return ells, values


def _as_cl(p, rows, name, kind, factor, ells, values):
    """C_l in K^2 from ell = 0 (zero below the first row) of one column of kind 'cl'/'nl' or 'dl'."""
    lmin, lmax = int(ells[0]), int(ells[-1])
    cl = np.zeros(lmax + 1)
    if kind in ("cl", "nl"):
        cl[lmin:] = values * factor
        return cl
    ell = np.arange(lmin, lmax + 1, dtype=float)
    if lmin == 0:
        if values[0] != 0:
            raise InputFileError(p, f"line {rows[0][0]}: D_l at ell = 0 must be 0 (C_0 cannot be recovered from D_0)")
        ell, dvals, start = ell[1:], values[1:], 1
    else:
        dvals, start = values, lmin
    # the factor first: 2 pi D_l alone overflows for D_l near the largest double
    with np.errstate(over="ignore"):
        cl[start:] = dvals * factor * (2.0 * math.pi / (ell * (ell + 1.0)))
    if not np.all(np.isfinite(cl)):
        j = int(np.argmax(~np.isfinite(cl))) - lmin
        raise InputFileError(p, f"line {rows[j][0]}: {name} value {values[j]!r} gives a C_l too large for a double")
    return cl


def read_polarized_spectrum_table(path) -> dict:
    """Read a polarized spectrum table as a dict of C_l arrays in K^2.

    Columns ``ell`` and, per spectrum XY in TT, EE, BB, TE (required), TB, EB
    (optional, zero when absent), ``cl_xy`` or ``dl_xy`` with the unit rules
    of the spectrum tables (``cl_te_k2``, ``dl_ee_uk2``, or a ``# unit:``
    comment; a ``cl_xy`` without unit is in K^2).  TE, TB and EB may be
    negative.  :func:`write_spectrum_table` writes such tables from a dict,
    and :func:`read_spectrum_table` reads their TT column.

    Parameters
    ----------
    path : str or path-like
        The text file.

    Returns
    -------
    dict
        ``'TT', 'TE', 'TB', 'EE', 'EB', 'BB'`` -> ndarray (ell_max+1,), K^2, from ell = 0.

    Raises
    ------
    InputFileError
        For a missing file, no ``ell`` column, a missing TT, EE, BB or TE
        column, a unit problem, a non-numeric or non-finite cell, a negative
        TT, EE or BB, or a gap in ell (the message names the line).
    """
    table = read_text_table(path, what="a polarized spectrum table")
    got = _polarized_spectra(table, POLARIZED_SPECTRA)
    n = got["TT"].size
    return {k: got.get(k, np.zeros(n)) for k in ("TT", "TE", "TB", "EE", "EB", "BB")}


def _polarized_spectra(table, wanted) -> dict:
    """C_l (K^2, from ell = 0) of the ``wanted`` spectra of a parsed polarized table (TB, EB optional)."""
    p = table.path
    if table.names is None:
        raise InputFileError(p, "has no column names (expected a line such as 'ell,cl_tt_k2,cl_ee_k2,...')")
    names, header_line = list(table.names), table.header_line
    if "ell" not in names and "ell_min" in names and "ell_max" in names:
        if "spectrum" in names:  # a polarized bandpower table: each spectrum constant over its bins
            return spectra_from_polarized_bandpowers(table, wanted)
        raise InputFileError(p, f"line {header_line}: a temperature bandpower table (no 'spectrum' column); a "
                                "polarized table needs TT, EE, BB and TE, e.g. the table of `cmbtools spectrum` on "
                                "I, Q, U maps")
    if names.count("ell") != 1:
        raise InputFileError(p, f"line {header_line}: needs exactly one 'ell' column (columns: {', '.join(names)})")
    units = [(v, n) for v, n in table.comment_values("unit", before_header=True) if v]
    unit_comment = units[-1] if units else None
    columns = {}
    for spectrum in wanted:
        found = [(i, m) for i, m in ((i, _POLARIZED_COLUMN.match(n)) for i, n in enumerate(names))
                 if m and m.group(2) == spectrum.lower()]
        found = [x for x in found if x[1].group(1) == "cl"] or found
        if not found:
            if spectrum in ("TB", "EB"):
                continue
            raise InputFileError(
                p, f"line {header_line}: no {spectrum} column: a polarized table needs TT, EE, BB and TE columns "
                   f"such as 'cl_{spectrum.lower()}_k2' or 'dl_{spectrum.lower()}_uk2' (columns: {', '.join(names)})"
            )
        if len(found) > 1:
            raise InputFileError(p, f"line {header_line}: more than one {spectrum} column "
                                    f"({', '.join(names[i] for i, _ in found)})")
        col, m = found[0]
        kind, suffix = m.group(1), m.group(3)
        if suffix is not None:
            factor = _UNITS[suffix]
            if unit_comment is not None and power_unit_factor(unit_comment[0]) not in (None, factor):
                raise InputFileError(p, f"line {unit_comment[1]}: the unit comment {unit_comment[0]!r} contradicts "
                                        f"the column name {names[col]!r}")
        elif unit_comment is not None:
            factor = power_unit_factor(unit_comment[0])
            if factor is None:
                raise InputFileError(p, f"line {unit_comment[1]}: unknown unit {unit_comment[0]!r} (use K^2 or uK^2)")
        elif kind == "cl":
            factor = 1.0
        else:
            raise InputFileError(p, f"line {header_line}: the {names[col]!r} column has no unit; name it "
                                    f"'{names[col]}_uk2' or '{names[col]}_k2', or add a '# unit: uK^2' comment")
        columns[spectrum] = (col, kind, factor)
    rows = table.rows
    if not rows:
        raise InputFileError(p, "has column names but no data rows")
    ells, values = _ell_rows(p, rows, names, [(col, spectrum in ("TT", "EE", "BB"))
                                              for spectrum, (col, _, _) in columns.items()])
    return {spectrum: _as_cl(p, rows, names[col], kind, factor, ells, vals)
            for (spectrum, (col, kind, factor)), vals in zip(columns.items(), values)}


def read_noise_spectrum_table(path) -> np.ndarray:
    """Read a noise spectrum N_l (K^2, from ell = 0): a spectrum table whose ``nl`` column, if any, is preferred.

    Accepts everything :func:`read_spectrum_table` accepts (an ``ell`` column
    with ``nl``, ``cl`` or ``dl`` and their unit suffixes, or a bandpower table).
    """
    return _read_power_table(path, prefer=("nl", "cl", "dl"))


def _format(x):
    return "0" if x == 0 else f"{x:.10e}"


def write_spectrum_table(path, cl, *, overwrite=False, header=None) -> Path:
    """Write C_l (K^2, indexed by ell from 0) as a spectrum table.

    The file has the columns ``ell``, ``cl_k2`` (C_l in K^2) and ``dl_uk2``
    (D_l in uK^2), comma-separated, with 11 significant digits; see the module
    notes for the format.  :func:`read_spectrum_table` reads it back (from the
    C_l column) to a relative 1e-10.

    Parameters
    ----------
    path : str or path-like
        Output file; written atomically.
    cl : array_like of shape (lmax+1,)
        C_l in K^2 from ell = 0 (finite, >= 0).
    overwrite : bool, default=False
        Replace an existing file.
    header : str or dict, optional
        Extra comment lines: a string (one comment line per text line) or a
        mapping written as ``# key: value`` lines.  The key ``unit`` is
        reserved (the column names carry the units).

    Returns
    -------
    Path
        The file written.
    """
    if isinstance(cl, dict):
        columns = _polarized_columns(cl)
        lines = ["# cmbtools polarized spectrum table",
                 "# columns: ell; cl_XY_k2 = C_l of XY in K^2; dl_XY_uk2 = l(l+1) C_l / 2pi in uK^2"]
    else:
        columns = {"": check_cl(cl, "cl")}
        lines = ["# cmbtools spectrum table",
                 "# columns: ell; cl_k2 = C_l in K^2; dl_uk2 = l(l+1) C_l / 2pi in uK^2"]
    if header is not None:
        if isinstance(header, str):
            extra = [f"# {t}".rstrip() for t in header.splitlines()]
        elif isinstance(header, dict):
            extra = []
            for key, value in header.items():
                key_s, value_s = str(key).strip(), str(value)
                if key_s.lower() in ("unit", "units"):
                    raise InvalidInputError("The 'header' may not set 'unit': the column names carry the units.")
                if "\n" in key_s or "\n" in value_s or ":" in key_s:
                    raise InvalidInputError(f"The 'header' entry {key!r} must be one line without ':' in the key.")
                extra.append(f"# {key_s}: {value_s}")
        else:
            raise InvalidInputError(f"The 'header' parameter must be a str or a dict. Got {type(header).__name__} instead.")
        for t in extra:
            if re.match(r"#\s*units?\s*:", t, flags=re.IGNORECASE):
                raise InvalidInputError("The 'header' may not contain a 'unit:' line: the column names carry the units.")
        lines.extend(extra)
    tags = [f"_{k.lower()}" if k else "" for k in columns]
    names = ("ell", *(f"cl{t}_k2" for t in tags), *(f"dl{t}_uk2" for t in tags))
    arrays = list(columns.values())
    n = arrays[0].size
    ell = np.arange(n, dtype=float)
    dls = [ell * (ell + 1.0) * a / (2.0 * math.pi) * 1e12 for a in arrays]
    rows = ((str(i), *(_format(a[i]) for a in arrays), *(_format(d[i]) for d in dls)) for i in range(n))
    return write_text_table(path, names, rows, comments=[c[2:] for c in lines], overwrite=overwrite)


def _polarized_columns(spectra) -> dict:
    """The checked arrays of a polarized table in column order (TB, EB only when given and non-zero)."""
    keys = {str(k).upper(): k for k in spectra}
    unknown = sorted(set(keys) - set(POLARIZED_SPECTRA))
    missing = [k for k in ("TT", "EE", "BB", "TE") if k not in keys]
    if unknown or missing:
        raise InvalidInputError(
            "The polarized spectra must be a dict with keys TT, EE, BB, TE (optionally TB, EB). "
            f"Got keys {sorted(keys)} instead."
        )
    out = {}
    for k in POLARIZED_SPECTRA:
        if k in keys:
            out[k] = check_cl(spectra[keys[k]], f"cl {k}", allow_negative=k in ("TE", "TB", "EB"))
    if len({a.size for a in out.values()}) > 1:
        raise InvalidInputError(f"The polarized spectra must all have one length. Got lengths {sorted({a.size for a in out.values()})}.")
    return {k: a for k, a in out.items() if k in ("TT", "EE", "BB", "TE") or np.any(a != 0)}
