"""Reading and writing power-spectrum tables (plain text).

The format
----------
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
"""

from __future__ import annotations

import math
import re

import numpy as np

from ._io import atomic_output, check_input_file, check_output_path
from ._validation import check_cl
from .exceptions import InputFileError, InvalidInputError

__all__ = ["read_spectrum_table", "write_spectrum_table"]

#: The largest multipole a table may hold.  lmax <= 4 nside - 1 puts ell = 10**7 beyond nside 2**21, whose
#: map alone needs 420 TB; the bound keeps a typing error (or a damaged file) from allocating terabytes.
LARGEST_ELL = 10**7

_UNITS = {"k2": 1.0, "kcmb2": 1.0, "uk2": 1e-12, "ukcmb2": 1e-12}
_SPECTRUM_COLUMN = re.compile(r"^(cl|dl)(?:_(k2|uk2|kcmb2|ukcmb2))?$")


def _unit_factor(text):
    key = text.strip().lower().replace("μ", "u").replace("µ", "u").replace("^", "").replace("_", "").replace(" ", "")
    if key.startswith("mu"):
        key = key[1:]
    return _UNITS.get(key)


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
    p = check_input_file(path)
    try:
        text = p.read_text(encoding="utf-8-sig")  # -sig: a leading byte-order mark is not part of the header
    except UnicodeDecodeError:
        raise InputFileError(p, "is not a UTF-8 text file (expected a spectrum table)") from None
    unit_comment = None
    header = None
    rows = []
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line:
            continue
        if line.startswith("#"):
            m = re.match(r"#\s*units?\s*:\s*(.+)$", line, flags=re.IGNORECASE)
            if m and header is None:
                unit_comment = (m.group(1).strip(), number)
            continue
        if header is None:
            sep = "," if "," in line else None
            names = [c.strip().lower() for c in line.split(sep)]
            header = (names, sep, number)
            continue
        rows.append((number, line))
    if header is None:
        raise InputFileError(p, "has no column names (expected a line such as 'ell,cl_k2')")
    names, sep, header_line = header
    if "ell" not in names:
        raise InputFileError(p, f"line {header_line}: no 'ell' column (columns: {', '.join(names)})")
    if names.count("ell") > 1:
        raise InputFileError(p, f"line {header_line}: the 'ell' column appears twice")
    spectra = [(i, _SPECTRUM_COLUMN.match(n)) for i, n in enumerate(names)]
    spectra = [(i, m) for i, m in spectra if m]
    cls_ = [(i, m) for i, m in spectra if m.group(1) == "cl"]
    dls_ = [(i, m) for i, m in spectra if m.group(1) == "dl"]
    chosen = cls_ or dls_
    if not chosen:
        raise InputFileError(
            p, f"line {header_line}: no spectrum column: expected 'cl', 'dl', 'cl_k2', 'cl_uk2', 'dl_k2' "
               f"or 'dl_uk2' (columns: {', '.join(names)})"
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
        if unit_comment is not None and _unit_factor(unit_comment[0]) not in (None, factor):
            raise InputFileError(
                p, f"line {unit_comment[1]}: the unit comment {unit_comment[0]!r} contradicts the column "
                   f"name {names[col]!r}"
            )
    elif unit_comment is not None:
        factor = _unit_factor(unit_comment[0])
        if factor is None:
            raise InputFileError(
                p, f"line {unit_comment[1]}: unknown unit {unit_comment[0]!r} (use K^2 or uK^2)"
            )
    elif kind == "cl":
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
    for j, (number, line) in enumerate(rows):
        cells = [c.strip() for c in line.split(sep)]
        if len(cells) != len(names):
            raise InputFileError(p, f"line {number}: {len(cells)} cells, but the header names {len(names)} columns")
        try:
            ell_value = float(cells[ell_col])
        except ValueError:
            raise InputFileError(p, f"line {number}: ell {cells[ell_col]!r} is not a number") from None
        if not math.isfinite(ell_value) or ell_value != int(ell_value) or ell_value < 0:
            raise InputFileError(p, f"line {number}: ell {cells[ell_col]!r} is not a non-negative integer")
        if ell_value > LARGEST_ELL:
            raise InputFileError(p, f"line {number}: ell {cells[ell_col]!r} is above the largest ell, {LARGEST_ELL}")
        try:
            v = float(cells[col])
        except ValueError:
            raise InputFileError(p, f"line {number}: {names[col]} value {cells[col]!r} is not a number") from None
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
    if kind == "cl":
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


def _format(x):
    return "0" if x == 0 else f"{x:.10e}"


def write_spectrum_table(path, cl, *, overwrite=False, header=None) -> None:
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
    """
    cl = check_cl(cl, "cl")
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
    lines.append("ell,cl_k2,dl_uk2")
    ell = np.arange(cl.size, dtype=float)
    dl_uk2 = ell * (ell + 1.0) * cl / (2.0 * math.pi) * 1e12
    for i in range(cl.size):
        lines.append(f"{i},{_format(cl[i])},{_format(dl_uk2[i])}")
    check_output_path(path, overwrite=overwrite)
    with atomic_output(path, overwrite=overwrite) as tmp:
        tmp.write_text("\n".join(lines) + "\n", encoding="utf-8")
