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

The kinds of table, each a set of options and column checks over these two
functions: spectrum tables (:mod:`cmbtools._core.spectrum_tables`), bandpower,
transfer and filter tables (:mod:`cmbtools._core.binned_tables`), beam tables
(:mod:`cmbtools.spectrum.beams`), disc positions (:mod:`cmbtools.maps.masks`),
bandpasses (:mod:`cmbtools.physics.bandpass`), validation tables
(:mod:`cmbtools.simulate.validation_result`).
"""

from __future__ import annotations

import csv
import dataclasses
import re
from pathlib import Path


from cmbtools._core.files import atomic_output, check_input_file, check_output_path
from cmbtools.exceptions import InputFileError, InvalidInputError

__all__ = []

#: The largest multipole a table may hold.  lmax <= 4 nside - 1 puts ell = 10**7 beyond nside 2**21, whose
#: map alone needs 420 TB; the bound keeps a typing error (or a damaged file) from allocating terabytes.
LARGEST_ELL = 10**7

# --------------------------------------------------------------------------- units

#: Units of power the writers take: the name of the unit of the temperature, squared in the file.
POWER_UNITS = {"uK": 1.0e12, "K": 1.0}

_UNITS = {"k2": 1.0, "kcmb2": 1.0, "uk2": 1e-12, "ukcmb2": 1e-12}


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


def key_value_lines(items) -> list:
    """``key: value`` comment lines, one per ``(key, value)`` pair, each value folded onto one line (its line
    breaks become spaces), so that every line stays a comment of the table."""
    return [f"{k}: {' '.join(str(v).splitlines())}" for k, v in items]


def metadata_comments(title, unit, metadata) -> list:
    """Comment lines of a result table: the title, ``unit: <unit>^2``, then ``key: value`` per metadata item."""
    return [title, f"unit: {unit}^2"] + key_value_lines((k, v) for k, v in metadata.items() if k != "unit")
