"""Polarized maps in FITS files: I, Q, U maps and temperature/polarization mask pairs.

Stokes Q and U are defined relative to a local frame at each pixel.  The IAU convention
(Hamaker & Bregman 1996, A&A Suppl. 117, 161) counts the polarization angle from north towards
east as seen on the sky; the HEALPix convention (Gorski et al. 2005, ApJ 622, 759) uses the local
(theta, phi) basis, in which the angle runs the other way.  Q is the same in both and U changes
sign (common practice).  Inside cmbtools Q and U are in the HEALPix convention; the header keyword
``POLANGLE`` states a file's convention.  The table layer is :mod:`cmbtools.maps.healpix_table`.
"""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np

from cmbtools._core.checks import check_mask, missing_pixels, nside_from_npix
from cmbtools._core.files import sha256_file
from cmbtools.exceptions import CmbtoolsWarning, InputFileError, InvalidInputError
from cmbtools.maps.fits import MapInfo, read_mask
from cmbtools.maps.healpix_table import (
    POLARIZATION_KEYWORD,
    _memory_check,
    _polarization_card,
    _read_table,
    _scale_to_kcmb,
    _value_column_names,
    _write_columns,
    normalize_polarization_convention,
)

__all__ = [
    "read_iqu",
    "write_iqu",
    "is_iqu_file",
    "convert_polarization_convention",
    "read_mask_pair",
    "write_mask_pair",
]


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
    header, values = _value_column_names(path)
    if len(values) < 3:
        return False
    return _polarization_card(header) is not None or (values[1].startswith("Q") and values[2].startswith("U"))


def read_iqu(path, *, unit=None, file_ordering=None, polarization_convention=None, force=False):
    """Read I, Q, U HEALPix maps from a FITS file, in K_CMB, RING and the HEALPix angle convention.

    The first three map columns are read as I, Q and U (RING or NESTED, full
    sky or explicit-index partial sky, as for :func:`~cmbtools.maps.read_sky_map`).  Each column
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
        For the problems :func:`~cmbtools.maps.read_sky_map` reports, a file with fewer than
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
    return len(_value_column_names(path)[1])


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