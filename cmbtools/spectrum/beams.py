"""Beam transfer functions B_l: the Gaussian beam and tabulated beams read from files.

A beam transfer function is the harmonic response of the instrument to a
point source, normalised so that ``B_0 = 1`` for a beam that conserves total
power; the observed spectrum is ``B_l**2`` times the sky's.

Table files
-----------
:func:`write_beam` writes, and :func:`read_beam` reads, a plain-text table::

    # any number of comment lines
    ell,b_ell
    0,1
    1,0.99999995
    ...

Columns may be separated by commas or by whitespace; ``#`` starts a comment
(whole line or the end of a line); further columns are ignored; a byte-order
mark at the start (as spreadsheet programs write) is ignored.
:func:`read_beam` also reads a FITS binary table, either with columns named
``ELL`` and ``B_ELL`` (any case) or with one single column taken as B_l
indexed by ell from 0; the columns must hold real numbers (integer or
floating point).  A table must start at ell = 0, have every ell up to its
last one exactly once and in order, and finite values ``>= 0``.
"""

from __future__ import annotations

import dataclasses
import math
import warnings
from pathlib import Path

import numpy as np

from cmbtools._core import files as _io
from cmbtools._core.tables import number_cell, read_text_table, write_text_table
from cmbtools._core.checks import check_lmax, check_positive, renamed_keywords
from cmbtools._version import __version__
from cmbtools.exceptions import CmbtoolsWarning, InputFileError, InvalidInputError

__all__ = ["GaussianBeam", "gaussian_beam", "gaussian_polarized_beam", "read_beam", "write_beam"]

#: Column names accepted for the multipole and the beam (compared case-insensitively).
_ELL_NAMES = ("ell",)
_BEAM_NAMES = ("b_ell",)

#: |B_0 - 1| above which a tabulated beam triggers a warning (it is still used as given).
_B0_TOLERANCE = 1e-3


@dataclasses.dataclass(frozen=True)
class GaussianBeam:
    """A circular Gaussian beam given by its full width at half maximum, in arcminutes.

    Wherever a beam is accepted (``SpectrumEstimator(beam=...)``, ``gaussian_sky(beam=...)``, ...),
    ``GaussianBeam(fwhm_arcmin=25.0)`` says what a bare number (also accepted) means: a FWHM in arcmin.

    Parameters
    ----------
    fwhm_arcmin : float
        Full width at half maximum, arcminutes (>= 0).
    """

    fwhm_arcmin: float

    def __post_init__(self):
        object.__setattr__(self, "fwhm_arcmin", check_positive(self.fwhm_arcmin, "fwhm_arcmin", allow_zero=True))

    def transfer(self, lmax) -> np.ndarray:
        """B_l for ell = 0..lmax (:func:`gaussian_beam`).

        Parameters
        ----------
        lmax : int
            Largest multipole.

        Returns
        -------
        ndarray of shape (lmax+1,)
            The beam transfer function.
        """
        return gaussian_beam(self.fwhm_arcmin, lmax)


def gaussian_beam(fwhm_arcmin, lmax) -> np.ndarray:
    """Transfer function of a circular Gaussian beam.

    Parameters
    ----------
    fwhm_arcmin : float
        Full width at half maximum, arcminutes (>= 0; 0 gives B_l = 1).
    lmax : int
        Largest multipole.

    Returns
    -------
    ndarray of shape (lmax+1,), float64
        ``B_l = exp(-l(l+1) sigma**2 / 2)`` with ``sigma = fwhm / sqrt(8 ln 2)`` in radians.

    Examples
    --------
    >>> b = gaussian_beam(25.0, 1000)
    >>> round(float(b[500]), 6)
    0.302848
    """
    fwhm = check_positive(fwhm_arcmin, "fwhm_arcmin", allow_zero=True)
    lmax = check_lmax(lmax)
    sigma = math.radians(fwhm / 60.0) / math.sqrt(8.0 * math.log(2.0))
    ell = np.arange(lmax + 1, dtype=np.float64)
    with np.errstate(over="ignore"):  # a beam wider than the sky: B_l = 0 above l = 0, not an overflow warning
        return np.exp(-0.5 * ell * (ell + 1.0) * sigma * sigma)  # in this order, l = 0 gives exactly 0 * sigma



def gaussian_polarized_beam(fwhm_arcmin, lmax) -> np.ndarray:
    """Transfer function of a circular Gaussian beam for the E and B modes (spin 2).

    A spin-2 field smoothed by a circular Gaussian has
    ``B_l = exp(-(l(l+1) - 4) sigma**2 / 2)`` (Challinor et al. 2000, PRD 62,
    123002, eq. 3.4 with spin 2; Ng & Liu 1999, IJMPD 8, 61), slightly above
    the temperature beam: the factor ``exp(2 sigma**2)`` is 1 + 4e-5 for
    25 arcmin.  Set to 0 for l < 2 (E and B start at l = 2).

    Parameters
    ----------
    fwhm_arcmin : float
        Full width at half maximum, arcminutes (>= 0).
    lmax : int
        Largest multipole.

    Returns
    -------
    ndarray of shape (lmax+1,), float64

    Examples
    --------
    >>> b = gaussian_polarized_beam(25.0, 1000)
    >>> round(float(b[500] / gaussian_beam(25.0, 1000)[500]), 6)
    1.000019
    """
    fwhm = check_positive(fwhm_arcmin, "fwhm_arcmin", allow_zero=True)
    lmax = check_lmax(lmax)
    sigma = math.radians(fwhm / 60.0) / math.sqrt(8.0 * math.log(2.0))
    ell = np.arange(lmax + 1, dtype=np.float64)
    with np.errstate(over="ignore"):
        out = np.exp(-0.5 * (ell * (ell + 1.0) - 4.0) * sigma * sigma)
    out[:2] = 0.0
    return out


# --------------------------------------------------------------------------- reading


def read_beam(path, *, lmax=None) -> np.ndarray:
    """Read a tabulated beam transfer function B_l.

    Parameters
    ----------
    path : str or path-like
        A text table (``ell`` and ``b_ell`` columns, see the module
        docstring) or a FITS binary table.
    lmax : int, optional
        Return ell = 0..lmax only; the table must reach it.  Default: the
        whole table.

    Returns
    -------
    ndarray of shape (lmax+1,), float64
        B_l, exactly as tabulated (never renormalised).

    Raises
    ------
    InputFileError
        If the file is missing or unreadable, a column is missing, a cell is
        not a number, the ells do not run 0, 1, 2, ... without gaps, a value
        is negative, NaN or infinite, or ``lmax`` lies beyond the table.

    Warns
    -----
    CmbtoolsWarning
        If B_0 differs from 1 by more than 1e-3 (the beam is used as given).
    """
    p = _io.check_input_file(path)
    if lmax is not None:
        lmax = check_lmax(lmax)
    with open(p, "rb") as fh:
        magic = fh.read(9)
    if magic == b"SIMPLE  =":
        ell, beam, where = _read_fits_table(p)
    else:
        ell, beam, where = _read_text_table(p)
    _check_table(p, ell, beam, where)
    last = int(ell[-1])
    if lmax is not None and lmax > last:
        raise InputFileError(p, f"the beam table ends at ell={last} but lmax={lmax} was requested")
    if abs(beam[0] - 1.0) > _B0_TOLERANCE:
        warnings.warn(
            f"{p}: the beam has B_0 = {beam[0]:.6g}, not 1; it is used as given (not renormalised).",
            CmbtoolsWarning,
            stacklevel=2,
        )
    n = last + 1 if lmax is None else lmax + 1
    return np.array(beam[:n], dtype=np.float64)


def _read_text_table(p: Path):
    """Parse a text table; return (ell, beam, locations) with locations naming each row's line."""
    table = read_text_table(p, what="a beam table", inline_comments=True,
                            undecodable="is neither a FITS file nor a UTF-8 text table")
    header = table.names
    if header is None:
        raise InputFileError(p, "is empty: expected a header 'ell,b_ell' and one row per multipole")
    i_ell = next((i for i, c in enumerate(header) if c in _ELL_NAMES), -1)
    i_beam = next((i for i, c in enumerate(header) if c in _BEAM_NAMES), -1)
    missing = [n for n, i in (("ell", i_ell), ("b_ell", i_beam)) if i < 0]
    if missing:
        raise InputFileError(
            p,
            f"line {table.header_line}: the header must name the columns 'ell' and 'b_ell'; "
            f"missing {' and '.join(repr(m) for m in missing)} (header: {', '.join(header)!r})",
        )
    ells, beams, where = [], [], []
    for lineno, cells in table.rows:
        if len(cells) < len(header):
            raise InputFileError(
                p, f"line {lineno}: expected {len(header)} columns as in the header, found {len(cells)}"
            )
        values = []
        for name, i in (("ell", i_ell), ("b_ell", i_beam)):
            values.append(number_cell(p, cells[i], f"line {lineno}: the {name} cell"))
        ells.append(values[0])
        beams.append(values[1])
        where.append(f"line {lineno}")
    if not ells:
        raise InputFileError(p, "has a header but no rows")
    return np.array(ells), np.array(beams), where


def _read_fits_table(p: Path):
    """Read the first binary-table HDU of a FITS file; return (ell, beam, locations)."""
    from astropy.io import fits
    from astropy.io.fits.verify import VerifyError

    from cmbtools._core.files import open_fits, short_message

    # open_fits reads every HDU now and turns damaged or truncated files (and astropy's
    # warnings about them) into InputFileError; what is left are tables of the wrong shape
    with open_fits(p) as (_, hdul), warnings.catch_warnings():
        warnings.filterwarnings("ignore", module=r"astropy\.io\.fits.*")
        try:
            ell, beam = _parse_fits_table(p, hdul, fits)
        except InputFileError:
            raise
        except (VerifyError, OSError, ValueError, TypeError, KeyError, IndexError) as exc:
            raise InputFileError(p, f"cannot read the FITS beam table ({short_message(exc)})") from None
    if beam.size == 0:
        raise InputFileError(p, "the FITS beam table has no rows")
    where = [f"row {i + 1}" for i in range(beam.size)]
    return ell, beam, where


def _parse_fits_table(p: Path, hdul, fits):
    """(ell, beam) from the first binary table of an open FITS file."""
    tables = [h for h in hdul if isinstance(h, fits.BinTableHDU)]
    if not tables:
        raise InputFileError(p, "the FITS file has no binary table")
    hdu = tables[0]
    names = list(hdu.columns.names)
    lower = [n.lower() for n in names]
    data = hdu.data
    i_ell = next((i for i, c in enumerate(lower) if c in _ELL_NAMES), -1)
    i_beam = next((i for i, c in enumerate(lower) if c in _BEAM_NAMES), -1)
    if i_beam >= 0:
        if i_ell < 0:
            raise InputFileError(p, f"the FITS table has a B_ELL column but no ELL column (columns: {names})")
        ell = _real_column(p, data, names[i_ell])
        beam = _real_column(p, data, names[i_beam])
    elif len(names) == 1:
        beam = _real_column(p, data, names[0])
        ell = np.arange(beam.size, dtype=np.float64)
    else:
        raise InputFileError(
            p, f"the FITS table must have columns ELL and B_ELL, or a single column; found {names}"
        )
    return ell, beam


def _real_column(p: Path, data, name: str) -> np.ndarray:
    """A FITS column as a flat float64 array; complex, text and variable-length columns are refused."""
    column = np.asarray(data[name])
    if column.dtype.kind not in "iuf":
        raise InputFileError(p, f"the FITS column {name!r} holds {column.dtype} values, not real numbers")
    return column.astype(np.float64).ravel()


def _check_table(p: Path, ell: np.ndarray, beam: np.ndarray, where: list[str]) -> None:
    """Check ell runs 0, 1, 2, ... and B_l is finite and >= 0; name the first offending row."""
    if ell.size != beam.size:
        raise InputFileError(p, f"the ell and b_ell columns differ in length ({ell.size} and {beam.size})")
    bad = ~np.isfinite(ell) | (ell != np.round(ell))
    if bad.any():
        i = int(np.argmax(bad))
        raise InputFileError(p, f"{where[i]}: ell = {float(ell[i])!r} is not a whole number")
    if ell[0] != 0:
        raise InputFileError(p, f"{where[0]}: the table starts at ell={int(ell[0])}; it must start at ell=0")
    expected = np.arange(ell.size)
    off = ell != expected
    if off.any():
        i = int(np.argmax(off))
        raise InputFileError(
            p,
            f"{where[i]}: ell = {int(ell[i])} follows ell = {int(ell[i - 1])}; "
            f"the table must list every ell from 0 once, in increasing order",
        )
    nonfinite = ~np.isfinite(beam)
    if nonfinite.any():
        i = int(np.argmax(nonfinite))
        raise InputFileError(p, f"{where[i]} (ell={i}): b_ell is {float(beam[i])!r}; values must be finite")
    negative = beam < 0
    if negative.any():
        i = int(np.argmax(negative))
        raise InputFileError(p, f"{where[i]} (ell={i}): b_ell = {float(beam[i])!r} is negative; values must be >= 0")


# --------------------------------------------------------------------------- writing


@renamed_keywords(header_comment="header")
def write_beam(path, b_ell, *, overwrite=False, header=None) -> Path:
    """Write a beam transfer function as a text table that :func:`read_beam` reads back exactly.

    Parameters
    ----------
    path : str or path-like
        Output file (written atomically).
    b_ell : array_like of shape (lmax+1,)
        B_l for ell = 0..lmax; finite and >= 0.
    overwrite : bool, default=False
        Replace an existing file.
    header : str, optional
        Text written as ``#`` comment lines above the table (may span lines).

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    InvalidInputError
        If ``b_ell`` is not a 1-d array of finite values >= 0.
    OutputExistsError
        If the file exists and ``overwrite`` is false.
    """
    try:
        b = np.asarray(b_ell, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError("The 'b_ell' parameter must be an array of numbers.") from None
    if b.ndim != 1 or b.size == 0:
        raise InvalidInputError(f"The 'b_ell' parameter must be a 1-d array indexed by ell. Got shape {b.shape} instead.")
    if not np.all(np.isfinite(b)):
        i = int(np.argmax(~np.isfinite(b)))
        raise InvalidInputError(f"The 'b_ell' parameter must be finite. Got {float(b[i])!r} at ell={i} instead.")
    if np.any(b < 0):
        i = int(np.argmax(b < 0))
        raise InvalidInputError(f"The 'b_ell' parameter must be >= 0. Got {float(b[i])!r} at ell={i} instead.")
    comments = []
    if header:
        comments += [c for c in str(header).splitlines()]
    comments.append(f"beam transfer function B_l for ell = 0..{b.size - 1}, written by cmbtools {__version__}")
    rows = ((str(i), repr(v)) for i, v in enumerate(b.tolist()))
    out = write_text_table(path, ("ell", "b_ell"), rows, comments=comments, overwrite=overwrite)
    return out
