"""Text tables: the one reader and writer behind every table cmbtools reads or writes, and one unit vocabulary.

Every text table cmbtools reads (spectrum and noise-spectrum tables, bandpower
tables, beam tables, disc positions, bandpasses) is parsed by
:func:`read_text_table`, and every text table it writes (spectrum tables,
bandpower tables, validation tables, beam tables) by :func:`write_text_table`.
The shared rules: UTF-8 text, a leading byte-order mark ignored, blank lines
skipped, lines starting with ``#`` are comments (``# key: value`` comments are
kept), the first other line names the columns (case-insensitive), cells are
separated by commas or by white space.  A kind of table may differ only in
the options it passes (whether a ``#`` may end a data row early, whether the
column names are optional, whether the separator is decided per line).

Units of power: :data:`POWER_UNITS` (``'uK'`` and ``'K'``, for uK^2 and K^2)
is what the writers take; :func:`power_unit_factor` reads every spelling a
file may carry (``K^2``, ``K_CMB^2``, ``uK^2``, ``uK_CMB^2``, with or without
``^``, micro sign accepted).

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
ell_min <= l <= ell_max, and zero below the first bin.
"""

from __future__ import annotations

import csv
import dataclasses
import math
import re
from pathlib import Path

import numpy as np

from cmbtools._core.checks import check_cl
from cmbtools._core.files import atomic_output, check_input_file, check_output_path
from cmbtools.exceptions import InputFileError, InvalidInputError

__all__ = ["read_spectrum_table", "write_spectrum_table", "read_polarized_spectrum_table"]

#: The largest multipole a table may hold.  lmax <= 4 nside - 1 puts ell = 10**7 beyond nside 2**21, whose
#: map alone needs 420 TB; the bound keeps a typing error (or a damaged file) from allocating terabytes.
LARGEST_ELL = 10**7

# --------------------------------------------------------------------------- units

#: Units of power the writers take: the name of the unit of the temperature, squared in the file.
POWER_UNITS = {"uK": 1.0e12, "K": 1.0}

_UNITS = {"k2": 1.0, "kcmb2": 1.0, "uk2": 1e-12, "ukcmb2": 1e-12}
_SPECTRUM_COLUMN = re.compile(r"^(cl|dl|nl)(?:_(k2|uk2|kcmb2|ukcmb2))?$")
_POLARIZED_COLUMN = re.compile(r"^(cl|dl)_(tt|ee|bb|te|tb|eb)(?:_(k2|uk2|kcmb2|ukcmb2))?$")
#: The spectra of a polarized table, in the order its columns are written.
POLARIZED_SPECTRA = ("TT", "EE", "BB", "TE", "TB", "EB")


def power_unit_scale(unit, name="unit") -> float:
    """Factor from K^2 to ``unit``^2 for a writer's ``unit`` argument ('uK' or 'K')."""
    if unit not in POWER_UNITS:
        raise InvalidInputError(f"The {name!r} parameter must be 'uK' or 'K'. Got {unit!r} instead.")
    return POWER_UNITS[unit]


def power_unit_factor(text):
    """Factor from the unit spelled ``text`` (``uK^2``, ``K_CMB^2``, ...) to K^2, or None if unknown."""
    key = text.strip().lower().replace("μ", "u").replace("µ", "u").replace("^", "").replace("_", "").replace(" ", "")
    if key.startswith("mu"):
        key = key[1:]
    return _UNITS.get(key)


# --------------------------------------------------------------------------- the reader


@dataclasses.dataclass(frozen=True)
class TextTable:
    """A parsed text table: column names, data rows as text cells, and the comment lines.

    ``names`` is None when the file has no column names (only with
    ``header=False``).  ``rows`` holds ``(line number, cells)``; ``comments``
    holds ``(line number, text after '#')`` for every full comment line.
    """

    path: Path
    names: tuple | None
    header_line: int | None
    rows: tuple
    comments: tuple

    def comment_values(self, key, *, before_header=False) -> list:
        """``(value, line)`` of the ``# key: value`` comments (key case-insensitive; ``units`` counts as ``unit``)."""
        found = []
        for number, body in self.comments:
            if before_header and self.header_line is not None and number > self.header_line:
                continue
            m = re.match(r"\s*([A-Za-z_ ]+?)\s*:\s*(.*)$", body)
            if m:
                k = m.group(1).strip().lower()
                if k == key or (key == "unit" and k == "units"):
                    found.append((m.group(2).strip(), number))
        return found

    def metadata(self) -> dict:
        """Every ``# key: value`` comment as a dict (the last one wins), values as text."""
        meta = {}
        for _, body in self.comments:
            if ":" in body:
                k, v = body.split(":", 1)
                meta[k.strip()] = v.strip()
        return meta


def number_cell(path, text, where) -> float:
    """``float(text)``, or :class:`InputFileError` ``"<where> <text!r> is not a number"`` for the file ``path``."""
    try:
        return float(text)
    except ValueError:
        raise InputFileError(path, f"{where} {text.strip()!r} is not a number") from None


def _split_cells(line, sep):
    if sep == ",":
        return [c.strip() for c in line.split(",")]
    if sep == "csv":
        return [c for c in next(csv.reader([line]))]
    return line.split()


def read_text_table(path, *, what, inline_comments=False, header=True, separator="auto", undecodable=None) -> TextTable:
    """Parse a text table (see the module notes); each kind of table checks its own columns.

    Parameters
    ----------
    path : str or path-like
        The file.
    what : str
        What the table should be, for the message of a file that is not UTF-8 text.
    inline_comments : bool, default=False
        A ``#`` ends any line early (not only comment lines).
    header : bool, default=True
        The first non-comment line names the columns; with False every line is a row.
    separator : {'auto', 'per-line', ',', 'csv'}, default='auto'
        'auto': commas if the column names contain one, else white space, for
        every row; 'per-line': decided on each line; ',': commas; 'csv': CSV
        quoting rules (:mod:`csv`).
    undecodable : str, optional
        The message for a file that is not UTF-8 text (default: one naming ``what``).

    Returns
    -------
    TextTable

    Raises
    ------
    InputFileError
        If the file is missing, unreadable or not UTF-8 text.
    """
    p = check_input_file(path)
    try:
        text = p.read_text(encoding="utf-8-sig")  # -sig: a leading byte-order mark is not part of the table
    except UnicodeDecodeError:
        raise InputFileError(p, undecodable or f"is not a UTF-8 text file (expected {what})") from None
    names = header_line = None
    sep = None if separator in ("auto", "per-line") else separator
    rows, comments = [], []
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if line.startswith("#"):
            comments.append((number, line[1:]))
            continue
        if inline_comments:
            line = line.split("#", 1)[0].strip()
        if not line:
            continue
        if separator == "per-line":
            sep = "," if "," in line else None
        if header and names is None:
            if separator == "auto":
                sep = "," if "," in line else None
            names = tuple(c.strip().lower() for c in _split_cells(line, sep))
            header_line = number
            continue
        rows.append((number, tuple(_split_cells(line, sep))))
    return TextTable(p, names, header_line, tuple(rows), tuple(comments))


# --------------------------------------------------------------------------- the writer


def write_text_table(path, names, rows, *, comments=(), overwrite=False) -> Path:
    """Write a comma-separated text table atomically: ``#`` comment lines, the column names, the rows.

    Parameters
    ----------
    path : str or path-like
        Output file (checked, then written atomically).
    names : sequence of str
        Column names.
    rows : iterable of sequence of str
        Cells already formatted as text.
    comments : sequence of str, optional
        Comment lines, written after ``# ``.
    overwrite : bool, default=False
        Replace an existing file.

    Returns
    -------
    Path
    """
    out = check_output_path(path, overwrite=overwrite)
    lines = [f"# {c}".rstrip() for c in comments]
    lines.append(",".join(names))
    lines.extend(",".join(r) for r in rows)
    with atomic_output(out, overwrite=overwrite) as tmp:
        tmp.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return out


def metadata_comments(title, unit, metadata) -> list:
    """Comment lines of a result table: the title, ``unit: <unit>^2``, then ``key: value`` per metadata item."""
    lines = [title, f"unit: {unit}^2"]
    lines += [f"{k}: {v}" for k, v in metadata.items() if k != "unit"]
    return lines


# --------------------------------------------------------------------------- bandpower tables

#: The columns of a bandpower table, in order.
BANDPOWER_COLUMNS = ("ell_min", "ell_max", "ell_eff", "cl", "cl_err", "dl", "dl_err")
_BANDPOWER_SPECTRA = ("cl", "cl_err", "dl", "dl_err")


def _parse_value(text):
    t = text.strip()
    try:
        return int(t)
    except ValueError:
        pass
    try:
        return float(t)
    except ValueError:
        return t


def read_bandpower_table(path, table=None):
    """Columns (K^2) and metadata of a bandpower table; see :meth:`cmbtools.spectrum.Bandpowers.read_csv`.

    Returns ``(path, columns, metadata)`` with ``ell_min``/``ell_max`` as int64.
    """
    if table is None:
        table = read_text_table(path, what="a bandpower table", separator=",")
    p = table.path
    meta = {}
    for _, body in table.comments:
        body = body.strip()
        if ":" in body:
            k, v = body.split(":", 1)
            meta[k.strip()] = _parse_value(v)
    if table.names is None:
        raise InputFileError(p, f"no column header {','.join(BANDPOWER_COLUMNS)} found")
    if table.names != BANDPOWER_COLUMNS:
        found = ",".join(table.names)
        raise InputFileError(p, f"line {table.header_line}: expected the columns {','.join(BANDPOWER_COLUMNS)}; found {found!r}")
    rows = []
    for lineno, cells in table.rows:
        if len(cells) != len(BANDPOWER_COLUMNS):
            raise InputFileError(p, f"line {lineno}: expected {len(BANDPOWER_COLUMNS)} values, found {len(cells)}")
        try:
            rows.append([float(c) for c in cells])
        except ValueError:
            raise InputFileError(p, f"line {lineno}: a value is not a number ({','.join(cells)!r})") from None
    if not rows:
        raise InputFileError(p, "the table has no rows")
    unit_text = str(meta.pop("unit", "uK^2"))
    unit = unit_text[:-2] if unit_text.endswith("^2") else unit_text
    if unit not in POWER_UNITS:
        raise InputFileError(p, f"unknown unit {unit_text!r} (expected uK^2 or K^2)")
    scale = POWER_UNITS[unit]
    a = np.array(rows)
    cols = {c: a[:, i] for i, c in enumerate(BANDPOWER_COLUMNS)}
    for c in ("ell_min", "ell_max"):
        v = cols[c]
        bad = ~np.isfinite(v) | (v != np.round(v)) | (np.abs(v) > 2**62)
        if bad.any():
            j = int(np.argmax(bad))
            raise InputFileError(p, f"data row {j + 1}: {c} = {float(v[j])!r} is not a whole number")
        cols[c] = v.astype(np.int64)
    for c in _BANDPOWER_SPECTRA:
        cols[c] = cols[c] / scale
    return p, cols, meta


def _spectrum_from_bandpowers(table):
    """C_l (K^2) constant over each bin of a bandpower table, zero below the first bin."""
    p, cols, _ = read_bandpower_table(table.path, table)
    lo, hi, cb = cols["ell_min"], cols["ell_max"], cols["cl"]
    if lo[0] < 0 or np.any(hi < lo) or np.any(lo[1:] != hi[:-1] + 1):
        raise InputFileError(p, "the bins of a bandpower table read as a spectrum must follow each other without "
                                "gaps or overlaps, from ell >= 0")
    if hi[-1] > LARGEST_ELL:
        raise InputFileError(p, f"ell_max {int(hi[-1])} is above the largest ell, {LARGEST_ELL}")
    bad = ~np.isfinite(cb) | (cb < 0)
    if bad.any():
        j = int(np.argmax(bad))
        raise InputFileError(p, f"data row {j + 1}: cl = {float(cb[j])!r} is not a finite power >= 0")
    cl = np.zeros(int(hi[-1]) + 1)
    for a, b, v in zip(lo, hi, cb):
        cl[int(a): int(b) + 1] = v
    return cl


# --------------------------------------------------------------------------- spectrum tables


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
    ell_col = names.index("ell")
    ells = np.empty(len(rows), dtype=np.int64)
    values = np.empty(len(rows))
    for j, (number, cells) in enumerate(rows):
        if len(cells) != len(names):
            raise InputFileError(p, f"line {number}: {len(cells)} cells, but the header names {len(names)} columns")
        ell_value = number_cell(p, cells[ell_col], f"line {number}: ell")
        if not math.isfinite(ell_value) or ell_value != int(ell_value) or ell_value < 0:
            raise InputFileError(p, f"line {number}: ell {cells[ell_col]!r} is not a non-negative integer")
        if ell_value > LARGEST_ELL:
            raise InputFileError(p, f"line {number}: ell {cells[ell_col]!r} is above the largest ell, {LARGEST_ELL}")
        v = number_cell(p, cells[col], f"line {number}: {names[col]} value")
        if not math.isfinite(v):
            raise InputFileError(p, f"line {number}: {names[col]} value {cells[col]!r} is not finite")
        if v < 0:
            raise InputFileError(p, f"line {number}: negative power {names[col]} = {cells[col]} (a spectrum is >= 0)")
        ells[j] = int(ell_value)
        values[j] = v
    steps = np.diff(ells)
    if np.any(steps != 1):
        j = int(np.argmax(steps != 1))
        problem = "repeats" if steps[j] == 0 else ("decreases" if steps[j] < 0 else "skips")
        raise InputFileError(
            p, f"line {rows[j + 1][0]}: ell {problem} from {ells[j]} to {ells[j + 1]} "
               "(ell must increase by 1 from row to row)"
        )
    lmin, lmax = int(ells[0]), int(ells[-1])
    cl = np.zeros(lmax + 1)
    if kind in ("cl", "nl"):
        cl[lmin:] = values * factor
    else:
        ell = np.arange(lmin, lmax + 1, dtype=float)
        if lmin == 0:
            if values[0] != 0:
                raise InputFileError(
                    p, f"line {rows[0][0]}: D_l at ell = 0 must be 0 (C_0 cannot be recovered from D_0)"
                )
            ell, dvals, start = ell[1:], values[1:], 1
        else:
            dvals, start = values, lmin
        # the factor first: 2 pi D_l alone overflows for D_l near the largest double
        with np.errstate(over="ignore"):
            cl[start:] = dvals * factor * (2.0 * math.pi / (ell * (ell + 1.0)))
        if not np.all(np.isfinite(cl)):
            j = int(np.argmax(~np.isfinite(cl))) - lmin
            raise InputFileError(
                p, f"line {rows[j][0]}: {names[col]} value {values[j]!r} gives a C_l too large for a double"
            )
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
    ell_col = names.index("ell")
    ells = np.empty(len(rows), dtype=np.int64)
    values = {k: np.empty(len(rows)) for k in columns}
    for j, (number, cells) in enumerate(rows):
        if len(cells) != len(names):
            raise InputFileError(p, f"line {number}: {len(cells)} cells, but the header names {len(names)} columns")
        ell_value = number_cell(p, cells[ell_col], f"line {number}: ell")
        if not math.isfinite(ell_value) or ell_value != int(ell_value) or ell_value < 0:
            raise InputFileError(p, f"line {number}: ell {cells[ell_col]!r} is not a non-negative integer")
        if ell_value > LARGEST_ELL:
            raise InputFileError(p, f"line {number}: ell {cells[ell_col]!r} is above the largest ell, {LARGEST_ELL}")
        ells[j] = int(ell_value)
        for spectrum, (col, _, _) in columns.items():
            v = number_cell(p, cells[col], f"line {number}: {names[col]} value")
            if not math.isfinite(v):
                raise InputFileError(p, f"line {number}: {names[col]} value {cells[col]!r} is not finite")
            if v < 0 and spectrum in ("TT", "EE", "BB"):
                raise InputFileError(p, f"line {number}: negative power {names[col]} = {cells[col]} (a spectrum is >= 0)")
            values[spectrum][j] = v
    steps = np.diff(ells)
    if np.any(steps != 1):
        j = int(np.argmax(steps != 1))
        problem = "repeats" if steps[j] == 0 else ("decreases" if steps[j] < 0 else "skips")
        raise InputFileError(p, f"line {rows[j + 1][0]}: ell {problem} from {ells[j]} to {ells[j + 1]} "
                                "(ell must increase by 1 from row to row)")
    lmin, lmax = int(ells[0]), int(ells[-1])
    out = {}
    for spectrum, (col, kind, factor) in columns.items():
        vals = values[spectrum]
        cl = np.zeros(lmax + 1)
        if kind == "cl":
            cl[lmin:] = vals * factor
        else:
            ell = np.arange(lmin, lmax + 1, dtype=float)
            if lmin == 0:
                if vals[0] != 0:
                    raise InputFileError(p, f"line {rows[0][0]}: D_l at ell = 0 must be 0 (C_0 cannot be recovered from D_0)")
                ell, dvals, start = ell[1:], vals[1:], 1
            else:
                dvals, start = vals, lmin
            with np.errstate(over="ignore"):
                cl[start:] = dvals * factor * (2.0 * math.pi / (ell * (ell + 1.0)))
            if not np.all(np.isfinite(cl)):
                raise InputFileError(p, f"{names[col]} holds a D_l whose C_l is too large for a double")
        out[spectrum] = cl
    return out


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


# --------------------------------------------------------------------------- transfer and filter tables

#: The columns of a bandpower transfer table, in order (``transfer_error`` optional when read).
TRANSFER_COLUMNS = ("ell_min", "ell_max", "ell_eff", "transfer", "transfer_error")


def write_transfer_table(path, ell_min, ell_max, ell_eff, transfer, transfer_error, *, metadata=None,
                         overwrite=False) -> Path:
    """Write a per-bin transfer function as a text table (the layout :func:`read_transfer_table` reads).

    Comment lines (the title, the meaning of the columns, then ``# key: value``
    per ``metadata`` item), then the columns :data:`TRANSFER_COLUMNS`:
    ``ell_min,ell_max`` (bin limits, inclusive), ``ell_eff``, ``transfer``
    (``F_b``, the mean recovered bandpower over the expected one, dimensionless)
    and ``transfer_error`` (its standard error; 0 when unknown).

    Returns
    -------
    Path
    """
    comments = ["cmbtools bandpower transfer function",
                "columns: ell_min, ell_max = bin limits (inclusive); ell_eff; transfer = F_b, the mean recovered "
                "bandpower over the expected one; transfer_error = its standard error"]
    comments += [f"{k}: {' '.join(str(v).splitlines())}" for k, v in dict(metadata or {}).items()]
    rows = [(str(int(a)), str(int(b)), repr(float(e)), repr(float(t)), repr(float(s)))
            for a, b, e, t, s in zip(ell_min, ell_max, ell_eff, transfer, transfer_error)]
    return write_text_table(path, TRANSFER_COLUMNS, rows, comments=comments, overwrite=overwrite)


def read_transfer_table(path):
    """Read a per-bin transfer table: ``(path, columns, metadata)``.

    The table needs the columns ``ell_min``, ``ell_max`` and ``transfer``;
    ``ell_eff`` (default: the middle of the bin) and ``transfer_error``
    (default 0) are optional and other columns are ignored, so the per-bin
    table of ``cmbtools validate`` (``summary.csv``) is accepted as well as the
    transfer table it writes.  The bins must be whole numbers, increasing,
    without overlaps; ``transfer`` must be finite and positive, ``transfer_error``
    finite and >= 0.  Returned columns: ``ell_min``/``ell_max`` int64, the
    others float64.

    Raises
    ------
    InputFileError
        Missing file or column, a cell that is not a number, bad bins, a
        transfer that is not positive (the message names the line).
    """
    table = read_text_table(path, what="a transfer table")
    p = table.path
    if table.names is None:
        raise InputFileError(p, "has no column names (expected 'ell_min,ell_max,ell_eff,transfer,transfer_error')")
    names = list(table.names)
    missing = [c for c in ("ell_min", "ell_max", "transfer") if c not in names]
    if missing:
        raise InputFileError(p, f"line {table.header_line}: no {', '.join(repr(c) for c in missing)} column "
                                f"(a transfer table has the columns {','.join(TRANSFER_COLUMNS)}; found {','.join(names)})")
    for c in set(names):
        if names.count(c) > 1:
            raise InputFileError(p, f"line {table.header_line}: the column {c!r} appears twice")
    if not table.rows:
        raise InputFileError(p, "has column names but no data rows")
    wanted = [c for c in TRANSFER_COLUMNS if c in names]
    values = {c: np.empty(len(table.rows)) for c in wanted}
    for j, (number, cells) in enumerate(table.rows):
        if len(cells) != len(names):
            raise InputFileError(p, f"line {number}: {len(cells)} cells, but the header names {len(names)} columns")
        for c in wanted:
            v = number_cell(p, cells[names.index(c)], f"line {number}: {c}")
            if not math.isfinite(v):
                raise InputFileError(p, f"line {number}: {c} = {cells[names.index(c)]!r} is not finite")
            if c in ("ell_min", "ell_max") and (v != int(v) or v < 0 or v > LARGEST_ELL):
                raise InputFileError(p, f"line {number}: {c} = {cells[names.index(c)]!r} is not a whole number "
                                        f"in [0, {LARGEST_ELL}]")
            if c == "transfer" and not v > 0:
                raise InputFileError(p, f"line {number}: transfer = {cells[names.index(c)]!r} is not positive (the "
                                        "bin keeps no signal: it cannot be corrected; drop or widen it)")
            if c == "transfer_error" and v < 0:
                raise InputFileError(p, f"line {number}: transfer_error = {cells[names.index(c)]!r} is negative")
            values[c][j] = v
    lo, hi = values["ell_min"].astype(np.int64), values["ell_max"].astype(np.int64)
    lines = [number for number, _ in table.rows]
    for j in range(lo.size):
        if hi[j] < lo[j]:
            raise InputFileError(p, f"line {lines[j]}: ell_max {hi[j]} is below ell_min {lo[j]}")
        if j and lo[j] <= hi[j - 1]:
            raise InputFileError(p, f"line {lines[j]}: the bin {lo[j]}-{hi[j]} starts inside or before the one "
                                    f"above it ({lo[j - 1]}-{hi[j - 1]}); bins must increase without overlaps")
    cols = {"ell_min": lo, "ell_max": hi,
            "ell_eff": values.get("ell_eff", 0.5 * (lo + hi)),
            "transfer": values["transfer"],
            "transfer_error": values.get("transfer_error", np.zeros(lo.size))}
    return p, cols, table.metadata()


def read_filter_table(path) -> np.ndarray:
    """Read a harmonic filter table: the factor ``f_l`` that multiplies every ``a_lm`` of multipole ``l``.

    Columns ``ell`` (every multipole from 0, once, in increasing order) and
    ``factor`` (finite, dimensionless); other columns are ignored.  The power
    of the filtered sky is ``f_l^2 C_l``.

    Returns
    -------
    ndarray of shape (ell_max+1,)
        ``f_l`` from ell = 0.

    Raises
    ------
    InputFileError
        Missing file or column, a cell that is not a number or not finite,
        ells that do not run 0, 1, 2, ... (the message names the line).
    """
    table = read_text_table(path, what="a filter table")
    p = table.path
    if table.names is None:
        raise InputFileError(p, "has no column names (expected 'ell,factor')")
    names = list(table.names)
    missing = [c for c in ("ell", "factor") if c not in names]
    if missing or names.count("ell") > 1 or names.count("factor") > 1:
        raise InputFileError(p, f"line {table.header_line}: a filter table has one 'ell' and one 'factor' column "
                                f"(found {','.join(names)})")
    if not table.rows:
        raise InputFileError(p, "has column names but no data rows")
    i_ell, i_f = names.index("ell"), names.index("factor")
    out = np.empty(len(table.rows))
    for j, (number, cells) in enumerate(table.rows):
        if len(cells) != len(names):
            raise InputFileError(p, f"line {number}: {len(cells)} cells, but the header names {len(names)} columns")
        ell = number_cell(p, cells[i_ell], f"line {number}: ell")
        if ell != j:
            raise InputFileError(p, f"line {number}: ell = {cells[i_ell]!r} where {j} was expected (the table lists "
                                    "every ell from 0 once, in increasing order)")
        v = number_cell(p, cells[i_f], f"line {number}: factor")
        if not math.isfinite(v):
            raise InputFileError(p, f"line {number}: factor = {cells[i_f]!r} is not finite")
        out[j] = v
        if j > LARGEST_ELL:
            raise InputFileError(p, f"line {number}: ell is above the largest ell, {LARGEST_ELL}")
    return out
