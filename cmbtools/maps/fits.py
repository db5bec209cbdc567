"""Reading and writing HEALPix maps and masks in FITS files.

A HEALPix FITS file keeps the map in the first binary-table extension.  Two
layouts exist (common practice, HEALPix FITS convention):

* full sky, implicit indexing: each column holds ``12*nside**2`` values (one
  value per row, or ``1024`` values per row), in RING or NESTED order given by
  the ``ORDERING`` keyword;
* partial sky, explicit indexing (``OBJECT='PARTIAL'``, ``INDXSCHM='EXPLICIT'``):
  a ``PIXEL`` column lists the pixel numbers and the other columns their
  values; pixels not listed are missing.

Readers return float64 RING maps in K_CMB with every missing pixel set to the
UNSEEN sentinel.  The unit comes from the column's ``TUNITn`` keyword (or
``BUNIT``/``UNIT``/``UNITS`` in the header) and must be a thermodynamic CMB
temperature unit (K, mK, uK, with or without a CMB tag); other units are an
error unless the caller states the unit.  FITS access goes through
:mod:`astropy.io.fits`; pixel reordering through :mod:`healpy`.
"""

from __future__ import annotations

import re
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from cmbtools._core.files import atomic_output, check_output_path, open_fits, sha256_file, short_message
from cmbtools._core.checks import renamed_keywords
from cmbtools._core.checks import UNSEEN, check_mask, missing_pixels, nside_from_npix
from cmbtools._version import __version__
from cmbtools.exceptions import CmbtoolsWarning, InputFileError, InvalidInputError


__all__ = [
    "MapInfo",
    "read_sky_map",
    "write_sky_map",
    "read_mask",
    "write_mask",
    "unit_scale",
    "normalize_coord",
    "read_iqu",
    "write_iqu",
    "is_iqu_file",
    "convert_polarization_convention",
    "read_mask_pair",
    "write_mask_pair",
]

_COORD_NAMES = {
    "G": "G", "GAL": "G", "GALACTIC": "G",
    "C": "C", "Q": "C", "EQ": "C", "EQU": "C", "EQUATORIAL": "C", "CELESTIAL": "C", "ICRS": "C",
    "E": "E", "ECL": "E", "ECLIPTIC": "E",
}


def normalize_coord(coord, name="coord"):
    """Return 'G', 'C' or 'E' for a coordinate-system name (None stays None).

    Accepts the single letters and the spelled-out names (galactic, equatorial
    or celestial, ecliptic), in any case.

    Parameters
    ----------
    coord : str or None
        A coordinate-system name or letter.
    name : str, default='coord'
        The parameter name for the error message.

    Returns
    -------
    str or None
        'G', 'C' or 'E' (None for None).
    """
    if coord is None:
        return None
    key = str(coord).strip().upper()
    if key not in _COORD_NAMES:
        raise InvalidInputError(
            f"The {name!r} parameter must be one of 'G' (galactic), 'C' (equatorial) or 'E' (ecliptic). "
            f"Got {coord!r} instead."
        )
    return _COORD_NAMES[key]


# ---------------------------------------------------------------- units

_PREFIX_SCALE = {"": 1.0, "m": 1e-3, "u": 1e-6, "mu": 1e-6, "micro": 1e-6, "n": 1e-9}
_CMB_TAGS = ("(cmb)", "[cmb]", "_cmb", "-cmb", "cmb", "_thermo", "(thermo)", "thermo")


def unit_scale(unit, *, source="unit"):
    """Factor that converts values in ``unit`` to K_CMB.

    Recognised: K, mK, uK (also uK written with the micro sign, muK, microK),
    each optionally tagged as CMB / thermodynamic (``K_CMB``, ``KCMB``,
    ``K (CMB)``, ``uK_CMB``, ``K_thermo`` ...), case-insensitive.

    Parameters
    ----------
    unit : str
        The unit of the values.
    source : str, default='unit'
        What the unit came from, for the error message.

    Returns
    -------
    float
        Multiply values in ``unit`` by this to get K_CMB.

    Raises
    ------
    InvalidInputError
        For Rayleigh-Jeans (antenna, brightness) temperatures, surface
        brightness units (Jy/sr, MJy/sr) or anything not recognised.
    """
    text = str(unit).strip()
    s = text.replace("\u00b5", "u").replace("\u03bc", "u").replace(" ", "").lower()
    if "rj" in s or "ant" in s or "bright" in s:
        raise InvalidInputError(
            f"The {source} {text!r} is a Rayleigh-Jeans (brightness) temperature; cmbtools needs "
            f"thermodynamic CMB temperature (K_CMB). Convert the map first, or state the unit explicitly."
        )
    if "jy" in s or "/sr" in s:
        raise InvalidInputError(
            f"The {source} {text!r} is a surface brightness; cmbtools needs thermodynamic CMB "
            f"temperature (K_CMB). Convert the map first, or state the unit explicitly."
        )
    for tag in _CMB_TAGS:
        if s.endswith(tag) and len(s) > len(tag):
            s = s[: -len(tag)]
            break
    if s.endswith("kelvin"):
        s = s[: -len("kelvin")] + "k"
    m = re.fullmatch(r"(|m|u|mu|micro|n)k", s)
    if m is None:
        raise InvalidInputError(
            f"The {source} {text!r} is not a recognised CMB temperature unit "
            f"(expected K, mK or uK, optionally tagged CMB, e.g. 'K_CMB', 'uK_CMB')."
        )
    return _PREFIX_SCALE[m.group(1)]


# ---------------------------------------------------------------- reading

@dataclass(frozen=True)
class MapInfo:
    """What :func:`read_map` learnt about a map file.

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
        For I, Q, U files (:func:`read_iqu`): the unit string of each field.
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


def _first_table(p, hdul):
    from astropy.io import fits

    for hdu in hdul[1:]:
        if isinstance(hdu, fits.BinTableHDU) and hdu.data is not None and len(hdu.columns) > 0:
            return hdu
    raise InputFileError(p, "has no binary-table extension holding a HEALPix map")


def _header_str(header, *keys):
    for k in keys:
        if k in header:
            v = header[k]
            if isinstance(v, str) and v.strip():
                return v.strip()
    return None


def _column_values(p, column):
    """Flatten a table column into a 1-d array (handles 1024-values-per-row layouts)."""
    data = np.asarray(column)
    if data.dtype.kind not in "fiub":
        raise InputFileError(p, f"column has non-numeric type {data.dtype} and cannot be a map")
    return data.reshape(-1)


def _read_table(path, field, ordering, memory_check):
    """Shared reader: (values RING float64 with UNSEEN, dict of file facts).

    ``memory_check(bytes, what)`` is the public entry point's memory check (its ``force`` bound in), called
    once the size of a partial-sky map is known.
    """
    from astropy.io.fits.verify import VerifyError

    from cmbtools.exceptions import CmbtoolsError

    with open_fits(path) as (p, hdul):
        try:
            with warnings.catch_warnings():
                # astropy's notes on non-standard cards are about the file, not for the user of cmbtools
                warnings.filterwarnings("ignore", module=r"astropy\.io\.fits.*")
                return _parse_table(p, hdul, field, ordering, memory_check)
        except CmbtoolsError:
            raise
        except (VerifyError, ValueError, TypeError, KeyError, IndexError) as exc:
            # a header card or column definition that astropy cannot parse
            raise InputFileError(p, f"has a damaged FITS header or table ({short_message(exc)})") from None


def _memory_check(force):
    """The memory check of a public reader, with its ``force``."""
    from cmbtools._core.memory import check_memory

    return lambda need, what: check_memory(need, what, force=force)


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


def _parse_table(p, hdul, field, ordering, memory_check):
    """The body of :func:`_read_table`, run while the file is open.

    ``field`` is one column index (the values come back as one map) or a
    tuple of indices (the values come back stacked, shape ``(len(field), npix)``).
    """
    import healpy as hp

    table = _first_table(p, hdul)
    header = table.header
    names = list(table.columns.names)
    upper = [n.upper() for n in names]
    indxschm = (_header_str(header, "INDXSCHM") or "").upper()
    obj = (_header_str(header, "OBJECT") or "").upper()
    has_pixel_column = "PIXEL" in upper
    is_partial = indxschm == "EXPLICIT" or (obj == "PARTIAL" and has_pixel_column)
    if is_partial and not has_pixel_column:
        raise InputFileError(p, "is marked as an explicit-index (partial-sky) file but has no PIXEL column")
    value_columns = [i for i, n in enumerate(upper) if not (is_partial and n == "PIXEL")]
    single = not isinstance(field, tuple)
    fields = (field,) if single else field
    for f in fields:
        if isinstance(f, bool) or not isinstance(f, (int, np.integer)):
            raise InvalidInputError(f"The 'field' parameter must be an integer column index. Got {f!r} instead.")
        if not 0 <= int(f) < len(value_columns):
            raise InputFileError(
                p, f"has no field {f}: it holds {len(value_columns)} map column(s) "
                f"({', '.join(names[i] for i in value_columns)}), numbered from 0"
            )
    col_indices = [value_columns[int(f)] for f in fields]
    columns = [_column_values(p, table.data.field(i)) for i in col_indices]
    if len({c.size for c in columns}) > 1:
        raise InputFileError(
            p, "its map columns " + ", ".join(repr(names[i]) for i in col_indices)
            + " hold different numbers of values"
        )
    values = columns[0]
    dtype_in_file = values.dtype.name
    units = [
        (table.columns[i].unit or "").strip() or _header_str(header, f"TUNIT{i + 1}", "BUNIT", "UNIT", "UNITS")
        for i in col_indices
    ]
    temptype = _header_str(header, "TEMPTYPE")

    # ordering
    if ordering is not None:
        ordering_in_file = str(ordering).strip().upper()
    else:
        ordering_in_file = (_header_str(header, "ORDERING") or "").upper()
    if ordering_in_file in ("NEST", "NESTED"):
        ordering_in_file = "NESTED"
    elif ordering_in_file != "RING":
        if ordering is not None:
            raise InvalidInputError(f"The 'ordering' parameter must be 'RING' or 'NESTED'. Got {ordering!r} instead.")
        if not ordering_in_file:
            raise InputFileError(p, "has no ORDERING keyword; pass ordering='RING' or 'NESTED' to say which it is")
        raise InputFileError(p, f"has ORDERING={ordering_in_file!r}, expected 'RING' or 'NESTED'")

    # nside
    nside_key = header.get("NSIDE")
    if nside_key is not None:
        try:
            if isinstance(nside_key, bool):
                raise ValueError(nside_key)
            if isinstance(nside_key, (int, np.integer)):
                nside_hdr = int(nside_key)
            else:  # a real number (or text) that must be a whole number, e.g. 64.0 but not 64.5
                as_float = float(nside_key)
                if not as_float.is_integer():
                    raise ValueError(nside_key)
                nside_hdr = int(as_float)
        except (TypeError, ValueError, OverflowError):
            raise InputFileError(p, f"has a non-integer NSIDE keyword {nside_key!r}") from None
        if nside_hdr < 1 or nside_hdr & (nside_hdr - 1) or nside_hdr > 2**29:
            raise InputFileError(p, f"has NSIDE={nside_hdr}, which is not a power of two")
    else:
        nside_hdr = None

    outs = []
    if is_partial:
        if nside_hdr is None:
            raise InputFileError(p, "is a partial-sky file without an NSIDE keyword")
        nside = nside_hdr
        npix = 12 * nside * nside
        pix = _column_values(p, table.data.field(upper.index("PIXEL")))
        if pix.dtype.kind not in "iu" and not np.all(pix == np.round(pix)):
            raise InputFileError(p, "has non-integer pixel numbers in its PIXEL column")
        pix = pix.astype(np.int64)
        if pix.size != values.size:
            raise InputFileError(p, f"has {pix.size} pixel numbers but {values.size} values")
        if pix.size and (pix.min() < 0 or pix.max() >= npix):
            raise InputFileError(p, f"has pixel numbers outside [0, {npix - 1}] for NSIDE={nside}")
        if pix.size > 1 and np.any(np.diff(np.sort(pix)) == 0):
            raise InputFileError(p, "lists some pixel numbers more than once in its PIXEL column")
        # the file lists a few pixels, but the map it describes may be huge
        from cmbtools._core.memory import estimate_map_bytes

        memory_check(estimate_map_bytes(nside, 1 + len(columns)), f"The partial-sky file {str(p)!r} at nside {nside}")
        if ordering_in_file == "NESTED":
            pix = hp.nest2ring(nside, pix)
        for c in columns:
            out = np.full(npix, UNSEEN, dtype=np.float64)
            out[pix] = c.astype(np.float64)
            outs.append(out)
    else:
        npix = values.size
        nside = int(round(np.sqrt(npix / 12.0)))
        if nside < 1 or 12 * nside * nside != npix:
            raise InputFileError(
                p, f"column {names[col_indices[0]]!r} holds {npix} values, which is not 12*nside**2 "
                f"and the file is not an explicit-index partial-sky file"
            )
        if nside & (nside - 1):
            raise InputFileError(p, f"holds {npix} values, i.e. nside {nside}, which is not a power of two")
        if nside_hdr is not None and nside_hdr != nside:
            raise InputFileError(p, f"has NSIDE={nside_hdr} but {npix} pixels (nside {nside})")
        for c in columns:
            out = c.astype(np.float64)
            if ordering_in_file == "NESTED":
                out = hp.reorder(out, n2r=True)
            outs.append(out)
    coord_raw = _header_str(header, "COORDSYS")
    try:
        coord = normalize_coord(coord_raw) if coord_raw else None
    except InvalidInputError:
        coord = None
    n_bad_values = 0
    for c, out in zip(columns, outs):
        bad = missing_pixels(out)
        # values stored in the file that are no number (a partial-sky file's unlisted pixels are not counted)
        n_bad_values += int(np.count_nonzero(missing_pixels(c))) if is_partial else int(np.count_nonzero(bad))
        out[bad] = UNSEEN
    facts = dict(
        path=str(p), nside=nside, ordering_in_file=ordering_in_file, unit_in_file=units[0], coord=coord,
        dtype_in_file=dtype_in_file, is_partial=is_partial, temptype=temptype, n_bad_values=n_bad_values,
    )
    if not single:
        facts["units_by_field"] = tuple(units)
        facts["column_names"] = tuple(names[i] for i in col_indices)
        facts["value_column_names"] = tuple(names[i] for i in value_columns)
        facts["polarization_convention_card"] = _polarization_card(header)
    return (outs[0] if single else np.stack(outs)), facts


def _scale_to_kcmb(path, unit, file_unit, temptype, *, what="the file"):
    """Factor from the file's values to K_CMB: ``unit`` if given, else the file's unit (see :func:`read_map`)."""
    if unit is not None:
        return unit_scale(unit, source="'unit' parameter")
    if temptype and temptype.upper().startswith("ANTENNA"):
        raise InputFileError(
            path, "has TEMPTYPE='ANTENNA' (Rayleigh-Jeans temperature); cmbtools needs "
            "thermodynamic K_CMB; convert the map first, or pass unit= to state the unit"
        )
    if file_unit is None:
        warnings.warn(
            f"{path}: {what} states no unit; assuming K_CMB (pass unit= to state it)",
            CmbtoolsWarning,
            stacklevel=3,
        )
        return 1.0
    try:
        return unit_scale(file_unit, source=f"unit in {what}")
    except InvalidInputError as exc:
        raise InputFileError(path, f"{exc} (pass unit= to override)") from None


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
    if unit is not None:
        scale = unit_scale(unit, source="'unit' parameter")
    else:
        file_unit = facts["unit_in_file"]
        if temptype and temptype.upper().startswith("ANTENNA"):
            raise InputFileError(
                facts["path"], "has TEMPTYPE='ANTENNA' (Rayleigh-Jeans temperature); cmbtools needs "
                "thermodynamic K_CMB; convert the map first, or pass unit= to state the unit"
            )
        if file_unit is None:
            warnings.warn(
                f"{facts['path']}: the file states no unit; assuming K_CMB (pass unit= to state it)",
                CmbtoolsWarning,
                stacklevel=2,
            )
            scale = 1.0
        else:
            try:
                scale = unit_scale(file_unit, source="unit in the file")
            except InvalidInputError as exc:
                raise InputFileError(facts["path"], f"{exc} (pass unit= to override)") from None
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

def _header_cards(extra_header):
    if extra_header is None:
        return []
    items = extra_header.items() if isinstance(extra_header, dict) else extra_header
    cards = []
    for item in items:
        if isinstance(item, (tuple, list)) and len(item) in (2, 3):
            cards.append(tuple(item))
        else:
            raise InvalidInputError(
                f"The 'header' parameter must be a dict or a list of (key, value[, comment]) tuples. "
                f"Got the entry {item!r} instead."
            )
    return cards


_RESERVED = {"PIXTYPE", "ORDERING", "NSIDE", "FIRSTPIX", "LASTPIX", "INDXSCHM", "OBJECT", "COORDSYS",
             "BAD_DATA", "XTENSION", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "TFIELDS", "PCOUNT", "GCOUNT",
             "EXTNAME", "POLANGLE", "POLCCONV", *(f"{k}{i}" for k in ("TUNIT", "TTYPE", "TFORM") for i in range(1, 5))}


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
    import healpy as hp
    from astropy.io import fits

    try:
        a = np.asarray(m, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError("The 'm' parameter must be an array of numbers.") from None
    if a.ndim != 1:
        raise InvalidInputError(f"The 'm' parameter must be a 1-d HEALPix map. Got shape {a.shape} instead.")
    nside = nside_from_npix(a.size, "m")
    npix = a.size
    coord = normalize_coord(coordinates)
    if dtype is None:
        out_dtype = np.dtype(np.float64)
    else:
        out_dtype = np.dtype(dtype)
        if out_dtype not in (np.dtype(np.float32), np.dtype(np.float64)):
            raise InvalidInputError(f"The 'dtype' parameter must be float32 or float64. Got {dtype!r} instead.")
    if unit is not None:
        scale = unit_scale(unit, source="'unit' parameter")
        # FITS header values are printable ASCII: write the micro sign as 'u'
        unit = str(unit).strip().replace("\u00b5", "u").replace("\u03bc", "u")
        if not unit.isascii() or not unit.isprintable():
            raise InvalidInputError(f"The 'unit' parameter must be printable ASCII text. Got {unit!r} instead.")
    cards = _header_cards(header)
    for c in cards:
        if str(c[0]).upper() in _RESERVED:
            raise InvalidInputError(f"The 'header' parameter may not set the HEALPix keyword {c[0]!r}.")
    check_output_path(path, overwrite=overwrite)

    bad = missing_pixels(a)
    values = a.copy()
    if unit is not None and scale != 1.0:
        with np.errstate(over="ignore"):  # checked just below
            values[~bad] /= scale
    values[bad] = UNSEEN
    too_big = ~bad & ~(np.abs(values) <= np.finfo(out_dtype).max)
    if too_big.any():
        i = int(np.argmax(too_big))
        raise InvalidInputError(
            f"The map value {float(a[i])!r} at pixel {i} does not fit in {out_dtype.name}"
            + (f" (in {unit})" if unit is not None else "")
            + ("; write the map with dtype='float64'." if out_dtype == np.float32 else ".")
        )
    if nested:
        values = hp.reorder(values, r2n=True)
        bad = hp.reorder(bad.astype(np.int8), r2n=True).astype(bool)
    tform = "E" if out_dtype == np.float32 else "D"
    if observed_only:
        pix = np.flatnonzero(~bad)
        if pix.size == 0:
            raise InvalidInputError("The map has no valid pixel; a partial-sky file would be empty.")
        pix_format = "J" if npix < 2**31 else "K"
        columns = [
            fits.Column(name="PIXEL", format=pix_format, array=pix.astype(np.int32 if pix_format == "J" else np.int64)),
            fits.Column(name=column_name, format=tform, unit=unit, array=values[pix].astype(out_dtype)),
        ]
    else:
        columns = [fits.Column(name=column_name, format=tform, unit=unit, array=values.astype(out_dtype))]
    hdu = fits.BinTableHDU.from_columns(columns)
    h = hdu.header
    h["EXTNAME"] = ("SKYMAP" if not observed_only else "PARTIAL_SKYMAP", "HEALPix map")
    h["PIXTYPE"] = ("HEALPIX", "HEALPix pixelisation")
    h["ORDERING"] = ("NESTED" if nested else "RING", "pixel ordering scheme")
    h["NSIDE"] = (nside, "resolution parameter")
    h["FIRSTPIX"] = (0, "first pixel number (0 based)")
    h["LASTPIX"] = (npix - 1, "last pixel number (0 based)")
    h["INDXSCHM"] = ("EXPLICIT" if observed_only else "IMPLICIT", "indexing: implicit or explicit")
    h["OBJECT"] = ("PARTIAL" if observed_only else "FULLSKY", "sky coverage")
    if coord is not None:
        h["COORDSYS"] = (coord, "G = galactic, C = equatorial, E = ecliptic")
    h["BAD_DATA"] = (UNSEEN, "value of missing pixels")
    if unit is not None:
        h["TEMPTYPE"] = ("THERMO", "thermodynamic CMB temperature")
    h["CREATOR"] = (f"cmbtools {__version__}", "software that wrote this file")
    for c in cards:
        h[str(c[0])] = tuple(c[1:]) if len(c) == 3 else c[1]
    primary = fits.PrimaryHDU()
    primary.header["CREATOR"] = (f"cmbtools {__version__}", "software that wrote this file")
    with atomic_output(path, overwrite=overwrite) as tmp:
        fits.HDUList([primary, hdu]).writeto(tmp, overwrite=True)
    return Path(path)


def _write_columns(path, a, units, column_names, *, coordinates, nested, overwrite, header, dtype, observed_only,
                   more_cards=()):
    """Write the rows of ``a`` (shape (n, npix), RING, K_CMB) as the value columns of one HEALPix table."""
    import healpy as hp
    from astropy.io import fits

    nside = nside_from_npix(a.shape[1], "m")
    npix = a.shape[1]
    coord = normalize_coord(coordinates)
    if dtype is None:
        out_dtype = np.dtype(np.float64)
    else:
        try:
            out_dtype = np.dtype(dtype)
        except TypeError:
            out_dtype = None
        if out_dtype not in (np.dtype(np.float32), np.dtype(np.float64)):
            raise InvalidInputError(f"The 'dtype' parameter must be float32 or float64. Got {dtype!r} instead.")
    scales, clean_units = [], []
    for unit in units:
        if unit is not None:
            scales.append(unit_scale(unit, source="'unit' parameter"))
            # FITS header values are printable ASCII: write the micro sign as 'u'
            unit = str(unit).strip().replace("\u00b5", "u").replace("\u03bc", "u")
            if not unit.isascii() or not unit.isprintable():
                raise InvalidInputError(f"The 'unit' parameter must be printable ASCII text. Got {unit!r} instead.")
        else:
            scales.append(1.0)
        clean_units.append(unit)
    cards = _header_cards(header)
    for c in cards:
        if str(c[0]).upper() in _RESERVED:
            raise InvalidInputError(f"The 'header' parameter may not set the HEALPix keyword {c[0]!r}.")
    check_output_path(path, overwrite=overwrite)

    bads, values = [], []
    for row, unit, scale in zip(a, clean_units, scales):
        bad = missing_pixels(row)
        v = row.copy()
        if unit is not None and scale != 1.0:
            with np.errstate(over="ignore"):  # checked just below
                v[~bad] /= scale
        v[bad] = UNSEEN
        too_big = ~bad & ~(np.abs(v) <= np.finfo(out_dtype).max)
        if too_big.any():
            i = int(np.argmax(too_big))
            raise InvalidInputError(
                f"The map value {float(row[i])!r} at pixel {i} does not fit in {out_dtype.name}"
                + (f" (in {unit})" if unit is not None else "")
                + ("; write the map with dtype='float64'." if out_dtype == np.float32 else ".")
            )
        if nested:
            v = hp.reorder(v, r2n=True)
            bad = hp.reorder(bad.astype(np.int8), r2n=True).astype(bool)
        bads.append(bad)
        values.append(v)
    tform = "E" if out_dtype == np.float32 else "D"
    if observed_only:
        pix = np.flatnonzero(~np.logical_and.reduce(bads))
        if pix.size == 0:
            raise InvalidInputError("The map has no valid pixel; a partial-sky file would be empty.")
        pix_format = "J" if npix < 2**31 else "K"
        columns = [fits.Column(name="PIXEL", format=pix_format, array=pix.astype(np.int32 if pix_format == "J" else np.int64))]
        columns += [fits.Column(name=name, format=tform, unit=unit, array=v[pix].astype(out_dtype))
                    for v, unit, name in zip(values, clean_units, column_names)]
    else:
        columns = [fits.Column(name=name, format=tform, unit=unit, array=v.astype(out_dtype))
                   for v, unit, name in zip(values, clean_units, column_names)]
    hdu = fits.BinTableHDU.from_columns(columns)
    h = hdu.header
    h["EXTNAME"] = ("SKYMAP" if not observed_only else "PARTIAL_SKYMAP", "HEALPix map")
    h["PIXTYPE"] = ("HEALPIX", "HEALPix pixelisation")
    h["ORDERING"] = ("NESTED" if nested else "RING", "pixel ordering scheme")
    h["NSIDE"] = (nside, "resolution parameter")
    h["FIRSTPIX"] = (0, "first pixel number (0 based)")
    h["LASTPIX"] = (npix - 1, "last pixel number (0 based)")
    h["INDXSCHM"] = ("EXPLICIT" if observed_only else "IMPLICIT", "indexing: implicit or explicit")
    h["OBJECT"] = ("PARTIAL" if observed_only else "FULLSKY", "sky coverage")
    if coord is not None:
        h["COORDSYS"] = (coord, "G = galactic, C = equatorial, E = ecliptic")
    h["BAD_DATA"] = (UNSEEN, "value of missing pixels")
    if any(u is not None for u in clean_units):
        h["TEMPTYPE"] = ("THERMO", "thermodynamic CMB temperature")
    for key, value, comment in more_cards:
        h[key] = (value, comment)
    h["CREATOR"] = (f"cmbtools {__version__}", "software that wrote this file")
    for c in cards:
        h[str(c[0])] = tuple(c[1:]) if len(c) == 3 else c[1]
    primary = fits.PrimaryHDU()
    primary.header["CREATOR"] = (f"cmbtools {__version__}", "software that wrote this file")
    with atomic_output(path, overwrite=overwrite) as tmp:
        fits.HDUList([primary, hdu]).writeto(tmp, overwrite=True)
    return Path(path)


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


# ---------------------------------------------------------------- polarized (I, Q, U) maps
#
# Stokes Q and U are defined relative to a local frame at each pixel.  The IAU convention
# (Hamaker & Bregman 1996, A&A Suppl. 117, 161) counts the polarization angle from north towards
# east as seen on the sky; the HEALPix convention (Gorski et al. 2005, ApJ 622, 759) uses the local
# (theta, phi) basis, in which the angle runs the other way.  Q is the same in both and U changes
# sign (common practice).

#: The header keyword cmbtools writes to state the polarization angle convention of a file.
POLARIZATION_KEYWORD = "POLANGLE"

_CONVENTIONS = {"HEALPIX": "healpix", "COSMO": "healpix", "IAU": "iau"}


def normalize_polarization_convention(convention, name="polarization_convention"):
    """Return 'healpix' or 'iau' for a convention name (case-insensitive; None stays None)."""
    if convention is None:
        return None
    key = str(convention).strip().upper()
    if key not in ("HEALPIX", "IAU"):
        raise InvalidInputError(
            f"The {name!r} parameter must be 'healpix' or 'iau'. Got {convention!r} instead."
        )
    return _CONVENTIONS[key]


def _polarization_card(header):
    """The angle convention a header states: 'healpix', 'iau', None (not stated) or ('bad', text)."""
    for key in (POLARIZATION_KEYWORD, "POLCCONV"):  # POLCCONV: the HEALPix FITS convention's keyword
        if key in header:
            raw = header[key]
            text = str(raw).strip().upper() if isinstance(raw, str) else None
            if text in _CONVENTIONS:
                return _CONVENTIONS[text]
            return ("bad", f"{key}={raw!r}")
    return None


def convert_polarization_convention(m, from_convention, to_convention):
    """Change the polarization angle convention of an I, Q, U map: U changes sign.

    Parameters
    ----------
    m : array_like of shape (3, 12*nside**2)
        I, Q, U maps (RING or NESTED; any unit).  Missing pixels stay missing.
    from_convention, to_convention : {'healpix', 'iau'}
        The convention of ``m`` and the one wanted.

    Returns
    -------
    ndarray of shape (3, 12*nside**2)
        A new array; U is negated when the conventions differ.

    Examples
    --------
    >>> import numpy as np
    >>> m = np.array([[1.0], [2.0], [3.0]])
    >>> convert_polarization_convention(m, "healpix", "iau")[:, 0].tolist()
    [1.0, 2.0, -3.0]
    """
    a = _as_iqu(m, "m")
    src = normalize_polarization_convention(from_convention, "from_convention")
    dst = normalize_polarization_convention(to_convention, "to_convention")
    out = a.copy()
    if src != dst:
        good = ~missing_pixels(out[2])
        out[2, good] = -out[2, good]
    return out


def _as_iqu(m, name="m"):
    """A float64 array of shape (3, n) (no other checks)."""
    try:
        a = np.asarray(m, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The {name!r} parameter must be an array of numbers.") from None
    if a.ndim != 2 or a.shape[0] != 3:
        raise InvalidInputError(
            f"The {name!r} parameter must hold three maps I, Q, U, shape (3, 12*nside**2). Got shape {a.shape} instead."
        )
    return a


def is_iqu_file(path) -> bool:
    """True if a HEALPix FITS file holds I, Q, U maps.

    That is: its map table has at least three value columns and either states
    a polarization angle convention in its header or names its second and
    third columns with a leading Q and U (``Q``, ``Q_POLARISATION``,
    ``Q_STOKES``, ...).  A temperature-only file gives False.

    Parameters
    ----------
    path : str or path-like
        The FITS file.

    Returns
    -------
    bool
        Whether the file holds I, Q, U maps.

    Raises
    ------
    InputFileError
        If the file cannot be read as a HEALPix FITS table.
    """
    from astropy.io.fits.verify import VerifyError

    with open_fits(path) as (p, hdul):
        try:
            table = _first_table(p, hdul)
            header = table.header
            names = [n.upper() for n in table.columns.names]
        except (VerifyError, ValueError, TypeError, KeyError, IndexError) as exc:
            raise InputFileError(p, f"has a damaged FITS header or table ({short_message(exc)})") from None
    indxschm = (_header_str(header, "INDXSCHM") or "").upper()
    obj = (_header_str(header, "OBJECT") or "").upper()
    partial = indxschm == "EXPLICIT" or (obj == "PARTIAL" and "PIXEL" in names)
    values = [n for n in names if not (partial and n == "PIXEL")]
    if len(values) < 3:
        return False
    return _polarization_card(header) is not None or (values[1].startswith("Q") and values[2].startswith("U"))


def read_iqu(path, *, unit=None, file_ordering=None, polarization_convention=None, force=False):
    """Read I, Q, U HEALPix maps from a FITS file, in K_CMB, RING and the HEALPix angle convention.

    The first three map columns are read as I, Q and U (RING or NESTED, full
    sky or explicit-index partial sky, as for :func:`read_map`).  Each column
    is converted to K_CMB with its own unit (``TUNITn``).  The angle convention
    comes from the header keyword ``POLANGLE`` ('HEALPIX' or 'IAU'; the
    HEALPix FITS keyword ``POLCCONV``, 'COSMO' or 'IAU', is understood too);
    a file that states none is taken to be in the HEALPix convention (the
    HEALPix FITS default).  An IAU file's U is negated on reading.

    Parameters
    ----------
    path : str or path-like
        The FITS file.
    unit : str, optional
        Unit of all three columns, overriding the header (K, mK or uK, CMB).
    file_ordering : {'RING', 'NESTED'}, optional
        Override for files without an ``ORDERING`` keyword.
    polarization_convention : {'healpix', 'iau'}, optional
        The file's angle convention, overriding (or supplying) the header's.
    force : bool, default=False
        As for :func:`read_sky_map`.

    Returns
    -------
    m : ndarray of shape (3, 12*nside**2)
        float64 I, Q, U in K_CMB, RING, HEALPix convention; missing pixels
        (per field) hold UNSEEN.
    info : MapInfo
        As for :func:`read_sky_map` (``unit_in_file`` is I's unit), with
        ``units_by_field`` and ``polarization_convention_in_file`` set.

    Raises
    ------
    InputFileError
        For the problems :func:`read_map` reports, a file with fewer than
        three map columns, or an unknown convention keyword value.
    InvalidInputError
        For a bad ``unit``, ``ordering`` or ``polarization_convention``.

    Warns
    -----
    CmbtoolsWarning
        If a column states no unit and ``unit`` is not given (K_CMB is assumed).
    """
    override = normalize_polarization_convention(polarization_convention)
    n_columns = _count_value_columns(path)
    if n_columns < 3:
        raise InputFileError(
            Path(path), f"holds {n_columns} map column(s); an I, Q, U map needs three (I, Q, U). "
            "Read a temperature map with read_map"
        )
    m, facts = _read_table(path, (0, 1, 2), file_ordering, _memory_check(force))
    temptype = facts.pop("temptype")
    facts.pop("n_bad_values")
    card = facts.pop("polarization_convention_card")
    facts.pop("column_names")
    facts.pop("value_column_names")
    units = facts.pop("units_by_field")
    if isinstance(card, tuple):
        if override is None:
            raise InputFileError(
                facts["path"], f"has {card[1]}, expected 'HEALPIX' or 'IAU' "
                "(pass polarization_convention= to state it)"
            )
        card = None
    convention = override or card or "healpix"
    missing_unit = unit is None and any(u is None for u in units)
    if missing_unit:
        warnings.warn(
            f"{facts['path']}: " + ", ".join("IQU"[i] for i, u in enumerate(units) if u is None)
            + " column(s) state no unit; assuming K_CMB (pass unit= to state it)",
            CmbtoolsWarning,
            stacklevel=2,
        )
    n_missing = 0
    for i, file_unit in enumerate(units):
        if unit is None and file_unit is None:
            scale = 1.0
        else:
            scale = _scale_to_kcmb(facts["path"], unit, file_unit, temptype, what=f"the file's {'IQU'[i]} column")
        bad = missing_pixels(m[i])
        if scale != 1.0:
            m[i, ~bad] *= scale
        if convention == "iau" and i == 2:
            m[2, ~bad] = -m[2, ~bad]
        n_missing = max(n_missing, int(bad.sum()))
    info = MapInfo(n_missing=n_missing, sha256=sha256_file(facts["path"]), units_by_field=tuple(units),
                   polarization_convention_in_file=card, **facts)
    return m, info


def _count_value_columns(path) -> int:
    """Number of map columns (not counting a partial-sky file's PIXEL column)."""
    from astropy.io.fits.verify import VerifyError

    with open_fits(path) as (p, hdul):
        try:
            table = _first_table(p, hdul)
            header = table.header
            names = [n.upper() for n in table.columns.names]
        except (VerifyError, ValueError, TypeError, KeyError, IndexError) as exc:
            raise InputFileError(p, f"has a damaged FITS header or table ({short_message(exc)})") from None
    indxschm = (_header_str(header, "INDXSCHM") or "").upper()
    obj = (_header_str(header, "OBJECT") or "").upper()
    partial = indxschm == "EXPLICIT" or (obj == "PARTIAL" and "PIXEL" in names)
    return sum(1 for n in names if not (partial and n == "PIXEL"))


def write_iqu(path, m, *, unit="K_CMB", coordinates=None, nested=False, overwrite=False, header=None, dtype=None,
              observed_only=False, polarization_convention="healpix"):
    """Write I, Q, U HEALPix maps to one FITS file (atomically; never overwrites by default).

    The header states the angle convention in ``POLANGLE``; with
    ``polarization_convention='iau'`` U is negated on writing (the array
    given is always in the HEALPix convention, as everywhere in cmbtools).

    Parameters
    ----------
    path : str or path-like
        Destination.
    m : array_like of shape (3, 12*nside**2)
        I, Q, U in K_CMB, RING, HEALPix convention.  Missing pixels are
        written as UNSEEN.
    unit : str or sequence of 3 str, default='K_CMB'
        Unit of the written values, one for all fields or one per field
        (recorded in ``TUNIT1..3``).
    coordinates, nested, overwrite, header, dtype
        As for :func:`write_sky_map`.
    observed_only : bool, default=False
        Write an explicit-index file of the pixels valid in at least one field.
    polarization_convention : {'healpix', 'iau'}, default='healpix'
        The angle convention of the file.

    Returns
    -------
    pathlib.Path
        The file written.

    Raises
    ------
    OutputExistsError
        If ``path`` exists and ``overwrite`` is false.
    InvalidInputError
        For an array that is not (3, 12*nside**2), bad units, dtype or
        convention, or values that do not fit in the dtype.
    """
    a = _as_iqu(m, "m")
    convention = normalize_polarization_convention(polarization_convention)
    if unit is None or isinstance(unit, str):
        units = [unit] * 3
    else:
        units = list(unit)
        if len(units) != 3:
            raise InvalidInputError(
                f"The 'unit' parameter must be one unit or three (I, Q, U). Got {unit!r} instead."
            )
    if convention == "iau":
        a = convert_polarization_convention(a, "healpix", "iau")
    card = (POLARIZATION_KEYWORD, convention.upper(), "polarization angle convention: HEALPIX or IAU")
    return _write_columns(path, a, units, ["I", "Q", "U"], coordinates=coordinates, nested=nested, overwrite=overwrite,
                          header=header, dtype=dtype, observed_only=observed_only, more_cards=[card])


def read_mask_pair(path, *, pol_path=None, file_ordering=None, force=False):
    """Read a temperature mask and a polarization mask.

    The polarization mask comes from ``pol_path`` if given, else from the
    second column of ``path`` if it has one (the layout :func:`write_mask_pair`
    writes), else it is the temperature mask.  Both follow :func:`read_mask`'s
    rules (weights in [0, 1], missing pixels get weight 0).

    Parameters
    ----------
    path : str or path-like
        The FITS file of the temperature mask (and maybe the polarization mask).
    pol_path : str or path-like, optional
        A separate FITS file for the polarization mask.
    file_ordering : {'RING', 'NESTED'}, optional
        Override for files without an ``ORDERING`` keyword.
    force : bool, default=False
        As for :func:`read_sky_map`.

    Returns
    -------
    mask, pol_mask : ndarray of shape (12*nside**2,)
        The temperature and polarization weights, RING.

    Raises
    ------
    InputFileError
        As for :func:`read_mask`, and for two masks of different nside.
    """
    mask = read_mask(path, file_ordering=file_ordering, force=force)
    if pol_path is not None:
        pol_mask = read_mask(pol_path, file_ordering=file_ordering, force=force)
        if pol_mask.size != mask.size:
            raise InputFileError(
                Path(pol_path), f"has nside {nside_from_npix(pol_mask.size)} but the temperature mask "
                f"{str(path)!r} has nside {nside_from_npix(mask.size)}"
            )
    elif _count_value_columns(path) >= 2:
        pol_mask = read_mask(path, column=1, file_ordering=file_ordering, force=force)
    else:
        pol_mask = mask.copy()
    return mask, pol_mask


def write_mask_pair(path, mask, pol_mask, *, coordinates=None, nested=False, overwrite=False, header=None, dtype=None):
    """Write a temperature and a polarization mask as the two columns of one FITS file.

    Columns ``WEIGHT`` (temperature) and ``POL_WEIGHT`` (polarization), no unit;
    :func:`read_mask` reads the first, :func:`read_mask_pair` both.

    Parameters
    ----------
    path : str or path-like
        Destination (written atomically).
    mask, pol_mask : array_like of shape (12*nside**2,)
        Temperature and polarization weights in [0, 1], RING, same nside.
    coordinates : {'G', 'C', 'E'}, optional
        Coordinate system recorded in ``COORDSYS``.
    nested : bool, default=False
        Write in NESTED ordering.
    overwrite : bool, default=False
        Replace an existing file.
    header : dict or list of (key, value[, comment]), optional
        Additional header cards.
    dtype : {None, 'float32', 'float64'}, optional
        Data type in the file (default float64).

    Returns
    -------
    pathlib.Path
        The file written.
    """
    w = check_mask(mask, "mask")
    wp = check_mask(pol_mask, "pol_mask")
    if wp.size != w.size:
        raise InvalidInputError(
            f"The 'pol_mask' has {wp.size} pixels but the 'mask' has {w.size}; they must have the same nside."
        )
    return _write_columns(path, np.stack([w, wp]), [None, None], ["WEIGHT", "POL_WEIGHT"], coordinates=coordinates,
                          nested=nested, overwrite=overwrite, header=header, dtype=dtype, observed_only=False)
