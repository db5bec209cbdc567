"""Reading and writing HEALPix maps and masks in FITS files.

Temperature maps (one column of a HEALPix FITS table, full or partial sky, RING or
NESTED) and masks.  Readers return float64 RING maps in K_CMB with every missing pixel set to the
UNSEEN sentinel.  The unit comes from the column's ``TUNITn`` keyword (or
``BUNIT``/``UNIT``/``UNITS`` in the header) and must be a thermodynamic CMB
temperature unit (K, mK, uK, with or without a CMB tag); other units are an
error unless the caller states the unit.  The HEALPix table itself is read and
written by :mod:`cmbtools.maps.healpix_table`; I, Q, U maps and mask pairs are in
:mod:`cmbtools.maps.polarized_fits`.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from cmbtools._core.checks import check_mask, missing_pixels, renamed_keywords
from cmbtools._core.files import sha256_file
from cmbtools.exceptions import CmbtoolsWarning, InputFileError, InvalidInputError
from cmbtools.maps.healpix_table import (  # noqa: F401  (normalize_coord, unit_scale: part of this module's names)
    _memory_check,
    _read_table,
    _scale_to_kcmb,
    _write_columns,
    normalize_coord,
    unit_scale,
)

__all__ = [
    "MapInfo",
    "read_sky_map",
    "write_sky_map",
    "read_mask",
    "write_mask",
]


@dataclass(frozen=True)
class MapInfo:
    """What :func:`read_sky_map` learnt about a map file.

    Parameters
    ----------
    path : str
        The file read.
    nside : int
        HEALPix resolution.
    ordering_in_file : {'RING', 'NESTED'}
        Pixel ordering in the file (the returned map is always RING).
    unit_in_file : str or None
        The unit string found in the file (None if there was none).
    coord : {'G', 'C', 'E'} or None
        Coordinate system from the ``COORDSYS`` keyword, if present.
    dtype_in_file : str
        numpy name of the column's data type, e.g. ``'float32'``.
    n_missing : int
        Number of missing pixels (UNSEEN, NaN, inf, or not listed in a partial file).
    is_partial : bool
        True for an explicit-index (partial-sky) file.
    sha256 : str
        Hex SHA-256 of the file's bytes.
    units_by_field : tuple of (str or None), optional
        For I, Q, U files (:func:`~cmbtools.maps.read_iqu`): the unit string of each field.
    polarization_convention_in_file : {'healpix', 'iau'} or None, optional
        For I, Q, U files: the angle convention the header states (None if none).
    """

    path: str
    nside: int
    ordering_in_file: str
    unit_in_file: str | None
    coord: str | None
    dtype_in_file: str
    n_missing: int
    is_partial: bool
    sha256: str
    units_by_field: tuple | None = None
    polarization_convention_in_file: str | None = None

    def __post_init__(self):
        if self.ordering_in_file not in ("RING", "NESTED"):
            raise InvalidInputError(f"MapInfo.ordering_in_file must be 'RING' or 'NESTED', got {self.ordering_in_file!r}")
        if self.n_missing < 0 or self.n_missing > 12 * self.nside**2:
            raise InvalidInputError(f"MapInfo.n_missing must be in [0, npix], got {self.n_missing}")

    @property
    def npix(self) -> int:
        """Number of pixels of the full-sky map, ``12*nside**2``."""
        return 12 * self.nside**2


@renamed_keywords(field="column")
def read_map_values(path, *, column=0, force=False):
    """Read a HEALPix map's values as the file stores them (no unit conversion), RING ordering.

    Parameters
    ----------
    path : str or path-like
        The FITS file.
    column : int, default=0
        Which map column to read, numbered from 0.
    force : bool, default=False
        Read a partial-sky file even if the full-sky map it describes is
        larger than the memory the machine has available.

    Returns
    -------
    ndarray of shape (12*nside**2,)
        float64 values in the file's own unit; missing pixels hold UNSEEN.
    """
    values, _facts = _read_table(path, column, None, _memory_check(force))
    return values


@renamed_keywords(field="column", ordering="file_ordering")
def read_sky_map(path, *, column=0, unit=None, file_ordering=None, force=False):
    """Read a HEALPix map from a FITS file, in K_CMB and RING ordering.

    Parameters
    ----------
    path : str or path-like
        The FITS file.
    column : int, default=0
        Which map column to read, numbered from 0 (the ``PIXEL`` column of a
        partial-sky file is not counted).
    unit : str, optional
        The unit of the values in the file, overriding what the header says
        (for files with a missing or wrong unit).  Must be K, mK or uK in
        thermodynamic CMB temperature.
    file_ordering : {'RING', 'NESTED'}, optional
        Override for files without (or with a wrong) ``ORDERING`` keyword.
    force : bool, default=False
        Read a partial-sky file even if the full-sky map it describes is
        larger than the memory the machine has available.

    Returns
    -------
    m : ndarray of shape (12*nside**2,)
        float64 map in K_CMB, RING ordering; missing pixels (UNSEEN, NaN or inf
        in the file, or pixels a partial-sky file does not list) hold
        :data:`cmbtools._core.checks.UNSEEN`.
    info : MapInfo
        nside, ordering and unit found in the file, coordinate system,
        missing-pixel count, content hash.

    Raises
    ------
    InputFileError
        If the file is missing, not FITS, truncated, has no HEALPix table, an
        impossible pixel count or nside, no such column, or a unit that is not a
        thermodynamic CMB temperature (and ``unit`` is not given).
    MemoryLimitError
        If a partial-sky file describes a map too large for the memory
        available (unless ``force``).

    Warns
    -----
    CmbtoolsWarning
        If the file states no unit and ``unit`` is not given (K_CMB is assumed).
    """
    m, facts = _read_table(path, column, file_ordering, _memory_check(force))
    temptype = facts.pop("temptype")
    facts.pop("n_bad_values")
    scale = _scale_to_kcmb(facts["path"], unit, facts["unit_in_file"], temptype)
    bad = missing_pixels(m)
    if scale != 1.0:
        good = ~bad
        m[good] *= scale
    info = MapInfo(n_missing=int(bad.sum()), sha256=sha256_file(facts["path"]), **facts)
    return m, info


@renamed_keywords(field="column", ordering="file_ordering")
def read_mask(path, *, column=0, file_ordering=None, force=False):
    """Read a mask (binary or weighted, values in [0, 1]) from a HEALPix FITS file.

    Pixels missing from the file get weight 0: pixels a partial-sky file does
    not list silently, stored values that are no number (UNSEEN, NaN or inf)
    with a warning that gives their count.  Units are ignored.

    Parameters
    ----------
    path : str or path-like
        The FITS file.
    column : int, default=0
        Which map column to read.
    file_ordering : {'RING', 'NESTED'}, optional
        Override for files without an ``ORDERING`` keyword.
    force : bool, default=False
        As for :func:`read_sky_map`.

    Returns
    -------
    mask : ndarray of shape (12*nside**2,)
        float64 weights in [0, 1], RING ordering.

    Raises
    ------
    InputFileError
        For unreadable files (see :func:`read_sky_map`) and for values outside
        [0, 1] or a mask that is zero everywhere.
    MemoryLimitError
        As for :func:`read_sky_map`.
    """
    w, facts = _read_table(path, column, file_ordering, _memory_check(force))
    n_stored = facts["n_bad_values"]
    if n_stored > 0:
        warnings.warn(
            f"{facts['path']}: {n_stored} mask pixel{'s' if n_stored != 1 else ''} hold no number "
            f"(NaN, inf or UNSEEN); they get weight 0",
            CmbtoolsWarning,
            stacklevel=2,
        )
    w[missing_pixels(w)] = 0.0
    try:
        return check_mask(w, "mask")
    except InvalidInputError as exc:
        raise InputFileError(facts["path"], f"is not a valid mask: {exc}") from None


# ---------------------------------------------------------------- writing


@renamed_keywords(coord="coordinates", nest="nested", extra_header="header", partial="observed_only")
def write_sky_map(path, m, *, unit="K_CMB", coordinates=None, nested=False, overwrite=False, header=None,
                  dtype=None, observed_only=False, column_name="TEMPERATURE"):
    """Write a HEALPix map to a FITS file (atomically; never overwrites by default).

    Parameters
    ----------
    path : str or path-like
        Destination.
    m : array_like of shape (12*nside**2,)
        RING-ordered map in K_CMB (or a dimensionless map with ``unit=None``).
        Missing pixels (UNSEEN, NaN, inf) are written as UNSEEN.
    unit : str or None, default='K_CMB'
        Unit to write the values in: the map is converted from K_CMB to it
        (``unit='uK_CMB'`` multiplies by 1e6) and the unit is recorded in
        ``TUNIT``.  ``None`` writes the values unchanged with no unit
        (masks, hit counts).
    coordinates : {'G', 'C', 'E'}, optional
        Coordinate system recorded in ``COORDSYS``.
    nested : bool, default=False
        Write in NESTED ordering instead of RING.
    overwrite : bool, default=False
        Replace an existing file.
    header : dict or list of (key, value[, comment]), optional
        Additional header cards (the HEALPix keywords cannot be overridden).
    dtype : {None, 'float32', 'float64'}, optional
        Data type in the file (default float64).
    observed_only : bool, default=False
        Write an explicit-index partial-sky file: only the pixels that are
        not missing are stored, with their pixel numbers in a ``PIXEL`` column.
    column_name : str, default='TEMPERATURE'
        Name of the value column.

    Returns
    -------
    pathlib.Path
        The file written.

    Raises
    ------
    OutputExistsError
        If ``path`` exists and ``overwrite`` is false.
    InvalidInputError
        For a malformed map, an unknown unit or dtype, a value that does not
        fit in the dtype (in the unit), or ``observed_only=True`` with no valid pixel.
    """
    try:
        a = np.asarray(m, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError("The 'm' parameter must be an array of numbers.") from None
    if a.ndim != 1:
        raise InvalidInputError(f"The 'm' parameter must be a 1-d HEALPix map. Got shape {a.shape} instead.")
    return _write_columns(path, a[np.newaxis], [unit], [column_name], coordinates=coordinates, nested=nested,
                          overwrite=overwrite, header=header, dtype=dtype, observed_only=observed_only)


@renamed_keywords(coord="coordinates", nest="nested", extra_header="header")
def write_mask(path, mask, *, coordinates=None, nested=False, overwrite=False, header=None, dtype=None):
    """Write a mask (values in [0, 1]) to a HEALPix FITS file with no unit.

    Parameters are as for :func:`write_sky_map`; the mask is checked with the
    same rules as :func:`read_mask` before anything is written.

    Parameters
    ----------
    path : str or path-like
        Destination.
    mask : array_like of shape (12*nside**2,)
        RING mask, weights in [0, 1].
    coordinates : {'G', 'C', 'E'}, optional
        Coordinate system recorded in ``COORDSYS``.
    nested : bool, default=False
        Write in NESTED ordering instead of RING.
    overwrite : bool, default=False
        Replace an existing file.
    header : dict or list of (key, value[, comment]), optional
        Additional header cards (the HEALPix keywords cannot be overridden).
    dtype : {None, 'float32', 'float64'}, optional
        Data type in the file (default float64).

    Returns
    -------
    pathlib.Path
        The file written.
    """
    w = check_mask(mask, "mask")
    return write_sky_map(path, w, unit=None, coordinates=coordinates, nested=nested, overwrite=overwrite,
                         header=header, dtype=dtype, column_name="WEIGHT")


def read_map(path, *, field=0, unit=None, ordering=None, force=False):
    """Deprecated name of :func:`read_sky_map` (``field`` is ``column``, ``ordering`` is ``file_ordering``).

    Kept for one release.

    Parameters
    ----------
    path, field, unit, ordering, force
        As ``path``, ``column``, ``unit``, ``file_ordering`` and ``force`` of :func:`read_sky_map`.

    Returns
    -------
    m : ndarray
        As :func:`read_sky_map`.
    info : MapInfo
        As :func:`read_sky_map`.
    """
    return read_sky_map(path, column=field, unit=unit, file_ordering=ordering, force=force)


def write_map(path, m, *, unit="K_CMB", coord=None, nest=False, overwrite=False, extra_header=None, dtype=None,
              partial=False, column_name="TEMPERATURE"):
    """Deprecated name of :func:`write_sky_map` with its old keywords. Kept for one release.

    Parameters
    ----------
    path, m, unit, coord, nest, overwrite, extra_header, dtype, partial, column_name
        As ``path``, ``m``, ``unit``, ``coordinates``, ``nested``, ``overwrite``, ``header``, ``dtype``,
        ``observed_only`` and ``column_name`` of :func:`write_sky_map`.

    Returns
    -------
    Path
        The file written.
    """
    return write_sky_map(path, m, unit=unit, coordinates=coord, nested=nest, overwrite=overwrite, header=extra_header,
                         dtype=dtype, observed_only=partial, column_name=column_name)

