"""One HEALPix binary table in a FITS file: the reader and the writer behind every map file.

A HEALPix FITS file keeps the map in the first binary-table extension.  Two
layouts exist (common practice, HEALPix FITS convention):

* full sky, implicit indexing: each column holds ``12*nside**2`` values (one
  value per row, or ``1024`` values per row), in RING or NESTED order given by
  the ``ORDERING`` keyword;
* partial sky, explicit indexing (``OBJECT='PARTIAL'``, ``INDXSCHM='EXPLICIT'``):
  a ``PIXEL`` column lists the pixel numbers and the other columns their
  values; pixels not listed are missing.

:func:`_read_table` reads one column or several into float64 RING arrays with
every missing pixel set to UNSEEN, and returns the facts of the file (nside,
ordering, units, coordinate system, ...); :func:`_write_columns` writes n
columns.  The header vocabulary lives here too: coordinate-system names
(:func:`normalize_coord`), CMB temperature units (:func:`unit_scale`) and the
polarization angle convention keyword.  The map readers and writers of
:mod:`cmbtools.maps.fits` (temperature maps, masks) and
:mod:`cmbtools.maps.polarized_fits` (I, Q, U maps, mask pairs) are thin layers
over these.  FITS access goes through :mod:`astropy.io.fits`; pixel reordering
through :mod:`healpy`.
"""

from __future__ import annotations

import re
import warnings
from pathlib import Path

import numpy as np

from cmbtools._core.checks import UNSEEN, missing_pixels, nside_from_npix
from cmbtools._core.files import atomic_output, check_output_path, open_fits, short_message
from cmbtools._version import __version__
from cmbtools.exceptions import CmbtoolsWarning, InputFileError, InvalidInputError

__all__ = ["unit_scale", "normalize_coord"]

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


def _scale_to_kcmb(path, unit, file_unit, temptype, *, what="the file"):
    """Factor from the file's values to K_CMB: ``unit`` if given, else the file's unit (see :func:`~cmbtools.maps.read_sky_map`)."""
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


# ---------------------------------------------------------------- polarization angle convention
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


# ---------------------------------------------------------------- reading

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


def _value_column_names(path):
    """The header of a file's map table and the names (upper case) of its map columns.

    A partial-sky file's ``PIXEL`` column is not a map column.  Only the header
    and the column definitions are parsed, not the values.
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
    return header, [n for n in names if not (partial and n == "PIXEL")]


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

