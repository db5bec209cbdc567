"""Tables of binned quantities: bandpower tables and transfer-function tables, and the harmonic filter table.

A bandpower table (what :meth:`cmbtools.spectrum.Bandpowers.write_csv` writes)
has the columns :data:`BANDPOWER_COLUMNS`; a transfer table (what
:meth:`cmbtools.spectrum.BandpowerTransfer.write_csv` writes) the columns
:data:`TRANSFER_COLUMNS`.  A filter table gives a factor per multipole.  All
of them are read by :func:`cmbtools._core.tables.read_text_table`; every per-bin
table (bandpowers, transfer functions, validation tables, and their polarized
forms with a ``spectrum`` column) is written by :func:`write_binned_table`.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from cmbtools._core.tables import (
    LARGEST_ELL, POWER_UNITS, key_value_lines, number_cell, read_text_table, write_text_table,
)
from cmbtools.exceptions import InputFileError

__all__ = []

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


def result_metadata(table) -> dict:
    """The ``# key: value`` comments of a result table (bandpowers, polarized bandpowers), numbers as numbers."""
    return {k: _parse_value(v) for k, v in table.metadata().items()}


def result_unit_scale(path, metadata) -> float:
    """Factor from a result table's values to K^2: its ``unit`` entry (removed from ``metadata``), default uK^2."""
    unit_text = str(metadata.pop("unit", "uK^2"))
    unit = unit_text[:-2] if unit_text.endswith("^2") else unit_text
    if unit not in POWER_UNITS:
        raise InputFileError(path, f"unknown unit {unit_text!r} (expected uK^2 or K^2)")
    return POWER_UNITS[unit]


def read_bandpower_table(path, table=None):
    """Columns (K^2) and metadata of a bandpower table; see :meth:`cmbtools.spectrum.Bandpowers.read_csv`.

    Returns ``(path, columns, metadata)`` with ``ell_min``/``ell_max`` as int64.
    """
    if table is None:
        table = read_text_table(path, what="a bandpower table", separator=",")
    p = table.path
    meta = result_metadata(table)
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
    scale = result_unit_scale(p, meta)
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
    return _constant_over_bins(p, cols["ell_min"], cols["ell_max"], cols["cl"], "", True)


#: The columns of a polarized bandpower table (what :meth:`cmbtools.spectrum.PolarizedBandpowers.write_csv` writes).
POLARIZED_BANDPOWER_COLUMNS = ("spectrum", "ell_min", "ell_max", "ell_eff", "cl", "cl_err", "dl", "dl_err")
#: Its spectra, in the order of its rows.
POLARIZED_BANDPOWER_SPECTRA = ("TT", "TE", "TB", "EE", "EB", "BB")


def read_polarized_bandpower_table(path, table=None):
    """Columns and metadata of a polarized bandpower table; see :meth:`cmbtools.spectrum.PolarizedBandpowers.read_csv`.

    Returns ``(path, columns, metadata)``: ``ell_min``/``ell_max`` (int64) and ``ell_eff`` of shape (n_bins,), the
    values ``cl``, ``cl_err``, ``dl``, ``dl_err`` (K^2) of shape (6, n_bins), spectra in the order
    :data:`POLARIZED_BANDPOWER_SPECTRA`.
    """
    if table is None:
        table = read_text_table(path, what="a polarized bandpower table", separator=",")
    p = table.path
    meta = result_metadata(table)
    six, columns = POLARIZED_BANDPOWER_SPECTRA, POLARIZED_BANDPOWER_COLUMNS
    if table.names != columns:
        raise InputFileError(p, f"expected the columns {','.join(columns)}")
    scale = result_unit_scale(p, meta)
    names, values = [], []
    for lineno, cells in table.rows:
        if len(cells) != len(columns):
            raise InputFileError(p, f"line {lineno}: expected {len(columns)} values, found {len(cells)}")
        names.append(cells[0])
        try:
            values.append([float(c) for c in cells[1:]])
        except ValueError:
            raise InputFileError(p, f"line {lineno}: a value is not a number ({','.join(cells)!r})") from None
    if not values or len(values) % len(six):
        raise InputFileError(p, f"expected the same bins for each of {', '.join(six)}; found {len(values)} rows")
    nb = len(values) // len(six)
    a = np.array(values).reshape(len(six), nb, len(columns) - 1)
    if names != [s for s in six for _ in range(nb)]:
        raise InputFileError(p, f"the spectrum column must list {', '.join(six)} in that order, each over the same bins")
    if not np.all(a[:, :, :3] == a[:1, :, :3]):
        raise InputFileError(p, "the six spectra must have the same bins")
    lims = a[0, :, :2]
    if not np.all(np.isfinite(lims)) or np.any(lims != np.round(lims)) or np.any(np.abs(lims) > 2**62):
        raise InputFileError(p, "ell_min and ell_max must be whole numbers")
    cols = {"ell_min": a[0, :, 0].astype(np.int64), "ell_max": a[0, :, 1].astype(np.int64), "ell_eff": a[0, :, 2]}
    cols.update({c: a[:, :, 3 + k] / scale for k, c in enumerate(_BANDPOWER_SPECTRA)})
    return p, cols, meta


def _constant_over_bins(p, lo, hi, cb, name, non_negative):
    """C_l constant over each bin (zero below the first): a bandpower table read as a spectrum."""
    if lo[0] < 0 or np.any(hi < lo) or np.any(lo[1:] != hi[:-1] + 1):
        raise InputFileError(p, "the bins of a bandpower table read as a spectrum must follow each other without "
                                "gaps or overlaps, from ell >= 0")
    if hi[-1] > LARGEST_ELL:
        raise InputFileError(p, f"ell_max {int(hi[-1])} is above the largest ell, {LARGEST_ELL}")
    bad = ~np.isfinite(cb) | ((cb < 0) if non_negative else False)
    if np.any(bad):
        j = int(np.argmax(bad))
        what = "a finite power >= 0" if non_negative else "finite"
        raise InputFileError(p, f"{name}data row {j + 1}: cl = {float(cb[j])!r} is not {what}")
    cl = np.zeros(int(hi[-1]) + 1)
    for a, b, v in zip(lo, hi, cb):
        cl[int(a): int(b) + 1] = v
    return cl


def spectra_from_polarized_bandpowers(table, wanted) -> dict:
    """C_l (K^2) of the ``wanted`` spectra of a polarized bandpower table, constant over each bin.

    TT, EE and BB must be >= 0 in every bin (a spectrum), TE, TB and EB finite.
    """
    p, cols, _ = read_polarized_bandpower_table(table.path, table)
    six = POLARIZED_BANDPOWER_SPECTRA
    return {s: _constant_over_bins(p, cols["ell_min"], cols["ell_max"], cols["cl"][six.index(s)], f"{s} ",
                                   s in ("TT", "EE", "BB")) for s in wanted}


# --------------------------------------------------------------------------- transfer and filter tables

#: The columns of a bandpower transfer table, in order (``transfer_error`` optional when read).
TRANSFER_COLUMNS = ("ell_min", "ell_max", "ell_eff", "transfer", "transfer_error")


def _exact(value) -> str:
    """A float cell that reads back to the same double (17 significant digits at most, ``nan`` as ``nan``)."""
    return repr(float(value))


def write_binned_table(path, names, ell_min, ell_max, ell_eff, values, *, spectra=None, comments=(),
                       overwrite=False, number=_exact, ell_eff_number=None) -> Path:
    """Write a table of per-bin values, the layout of every binned table cmbtools writes (bandpowers, transfer
    functions, validation tables; temperature and polarized).

    The columns are ``ell_min,ell_max,ell_eff`` then ``names``, preceded by ``spectrum`` when ``spectra``
    is given; one row per bin, or per spectrum and bin (the first spectrum's bins first).

    Parameters
    ----------
    path : str or path-like
        Output file (checked, then written atomically).
    names : sequence of str
        The value columns after ``ell_eff``.
    ell_min, ell_max, ell_eff : array_like of shape (n_bins,)
        Bin limits (whole numbers, inclusive) and effective multipoles.
    values : sequence of array_like
        One per name: shape (n_bins,), or (len(spectra), n_bins) with ``spectra``.
    spectra : sequence of str, optional
        The ``spectrum`` column's names, in the order of the values' first axis.
    comments : sequence of str, optional
        Comment lines (see :func:`cmbtools._core.tables.write_text_table`).
    overwrite : bool, default=False
        Replace an existing file.
    number : callable, optional
        Float to cell text (default: ``repr``, exact when read back).
    ell_eff_number : callable, optional
        The same for ``ell_eff`` (default: ``number``).

    Returns
    -------
    Path
    """
    eff_text = number if ell_eff_number is None else ell_eff_number
    bins = [[str(int(a)), str(int(b)), eff_text(e)] for a, b, e in zip(ell_min, ell_max, ell_eff)]
    if spectra is None:
        rows = [cells + [number(v[j]) for v in values] for j, cells in enumerate(bins)]
    else:
        rows = [[s] + cells + [number(v[i][j]) for v in values]
                for i, s in enumerate(spectra) for j, cells in enumerate(bins)]
    head = ("spectrum",) if spectra is not None else ()
    return write_text_table(path, head + ("ell_min", "ell_max", "ell_eff") + tuple(names), rows, comments=comments,
                            overwrite=overwrite)


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
    comments += key_value_lines(dict(metadata or {}).items())
    return write_binned_table(path, TRANSFER_COLUMNS[3:], ell_min, ell_max, ell_eff, (transfer, transfer_error),
                              comments=comments, overwrite=overwrite)


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
    if "spectrum" in names:
        raise InputFileError(p, "has a 'spectrum' column: it is the transfer table of polarized spectra (one row per "
                                "spectrum and bin), for the spectra of I, Q, U maps; a temperature spectrum needs the "
                                "table of `cmbtools validate` without --polarized")
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
