"""Masks: moments, geometric masks, combination, resolution change and apodization.

A mask is a RING map of weights in [0, 1]; weight 0 leaves a pixel out.
Sky fraction and moments follow the pseudo-Cl literature (Hivon et al. 2002,
ApJ 567, 2, where ``w_i`` is the sky average of the i-th power of the
weights): ``f_sky = mean(w)``, ``w2 = mean(w**2)``, ``w4 = mean(w**4)`` and the
effective sky fraction for mode counting ``f_sky_eff = w2**2 / w4``.

Positions for geometric masks are given as longitude/latitude in degrees in a
coordinate system ``coord`` ('G' galactic, 'C' equatorial, 'E' ecliptic); the
map's own system is ``map_coord`` (default galactic).  A pixel is inside a disc
when its centre is (HEALPix ``query_disc`` without the inclusive option).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from cmbtools.maps.monopole_dipole import _CHUNK, _pixel_vectors
from cmbtools.maps.healpix_table import normalize_coord
from cmbtools.maps.conversions import _regrade
from cmbtools._core.checks import (
    as_map,
    check_mask,
    check_nside,
    check_positive,
    check_same_nside,
    missing_pixels,
    resolve_nthreads,
)
from cmbtools._core.memory import check_memory, estimate_mask_bytes, estimate_regrade_bytes
from cmbtools._core.tables import number_cell, read_text_table
from cmbtools.exceptions import InputFileError, InvalidInputError

__all__ = [
    "MaskMoments",
    "mask_moments",
    "latitude_cut_mask",
    "cap_mask",
    "disc_mask",
    "read_positions_csv",
    "threshold_mask",
    "combine_masks",
    "change_mask_resolution",
    "apodize_mask",
    "taper_profile",
]


# ---------------------------------------------------------------- moments

@dataclass(frozen=True)
class MaskMoments:
    """Sky fraction and weight moments of a mask.

    Parameters
    ----------
    f_sky : float
        ``mean(w)`` over the whole sphere, the weighted sky fraction.
    w2, w4 : float
        ``mean(w**2)`` and ``mean(w**4)`` (Hivon et al. 2002).
    f_sky_eff : float
        ``w2**2 / w4``, the sky fraction that enters mode-counting errors.
    n_pixels_used : int
        Pixels with weight > 0.
    nside : int
        Resolution of the mask.
    """

    f_sky: float
    w2: float
    w4: float
    f_sky_eff: float
    n_pixels_used: int
    nside: int

    def __post_init__(self):
        for name in ("f_sky", "w2", "w4", "f_sky_eff"):
            v = getattr(self, name)
            if not (0.0 <= v <= 1.0 + 1e-12):
                raise InvalidInputError(f"MaskMoments.{name} must be in [0, 1], got {v!r}")
        if self.n_pixels_used < 0 or self.n_pixels_used > 12 * self.nside**2:
            raise InvalidInputError(f"MaskMoments.n_pixels_used must be in [0, npix], got {self.n_pixels_used}")

    @property
    def n_pixels(self) -> int:
        """Total pixels of the map, ``12*nside**2``."""
        return 12 * self.nside**2


def mask_moments(mask):
    """Sky fraction and moments of a mask.

    Parameters
    ----------
    mask : array_like of shape (12*nside**2,)
        Weights in [0, 1].

    Returns
    -------
    MaskMoments
        ``f_sky = mean(w)``, ``w2 = mean(w**2)``, ``w4 = mean(w**4)``,
        ``f_sky_eff = w2**2/w4`` and the count of pixels with ``w > 0``.
    """
    w = check_mask(mask, "mask")
    nside = int(round(math.sqrt(w.size / 12)))
    # sums in blocks of pixels: no map-sized temporary (w >= 0 is checked, so non-zero means used)
    w2 = float(np.dot(w, w)) / w.size
    w4 = 0.0
    for start in range(0, w.size, 1 << 20):
        sq = w[start:start + (1 << 20)] ** 2
        w4 += float(np.dot(sq, sq))
    w4 /= w.size
    return MaskMoments(
        f_sky=float(np.mean(w)), w2=w2, w4=w4, f_sky_eff=w2 * w2 / w4,
        n_pixels_used=int(np.count_nonzero(w)), nside=nside,
    )


# ---------------------------------------------------------------- geometry helpers

def _rotator(coord_from, coord_to):
    """healpy Rotator taking vectors from one system to the other (None if the same)."""
    import healpy as hp

    if coord_from == coord_to:
        return None
    return hp.Rotator(coord=[coord_from, coord_to])


def _check_lonlat(lon_deg, lat_deg, where="position"):
    try:
        lon, lat = float(lon_deg), float(lat_deg)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The {where} must be numbers (lon_deg, lat_deg). Got ({lon_deg!r}, {lat_deg!r}) instead.") from None
    if not (np.isfinite(lon) and np.isfinite(lat)) or abs(lat) > 90:
        raise InvalidInputError(f"The {where} must have a finite longitude and a latitude in [-90, 90]. Got ({lon_deg!r}, {lat_deg!r}) instead.")
    return lon, lat


def _check_radius(radius_deg, name="radius_deg"):
    r = check_positive(radius_deg, name)
    if r > 180:
        raise InvalidInputError(f"The {name!r} parameter must be in (0, 180] degrees. Got {radius_deg!r} instead.")
    return r


def _centre_vectors(lon_deg, lat_deg, coord, map_coord):
    """Unit vectors (n, 3) of positions given in ``coord``, expressed in ``map_coord``."""
    import healpy as hp

    vec = np.atleast_2d(hp.ang2vec(np.atleast_1d(lon_deg), np.atleast_1d(lat_deg), lonlat=True))
    rot = _rotator(coord, map_coord)
    if rot is not None:
        vec = np.atleast_2d(np.asarray(rot(vec.T)).T)
    return vec / np.linalg.norm(vec, axis=1, keepdims=True)


# ---------------------------------------------------------------- geometric masks

def latitude_cut_mask(nside, cut_deg, *, coord="G", map_coord="G", force=False):
    """Binary mask that removes the band ``|latitude| < cut_deg``.

    Parameters
    ----------
    nside : int
        Resolution of the mask.
    cut_deg : float
        Half-width of the removed band, in degrees, in [0, 90).
    coord : {'G', 'C', 'E'}, default='G'
        System in which the latitude is measured (galactic latitude by default).
    map_coord : {'G', 'C', 'E'}, default='G'
        Coordinate system of the map the mask is for.
    force : bool, default=False
        Go ahead even if the memory estimate exceeds what the machine has
        available (see :func:`cmbtools._core.memory.check_memory`).

    Returns
    -------
    ndarray of shape (12*nside**2,)
        1 where ``|lat| >= cut_deg`` (pixel centres), 0 elsewhere.

    Raises
    ------
    MemoryLimitError
        If the mask would not fit in memory (unless ``force``).
    """
    nside = check_nside(nside)
    cut = check_positive(cut_deg, "cut_deg", allow_zero=True)
    if cut >= 90:
        raise InvalidInputError(f"The 'cut_deg' parameter must be in [0, 90) degrees. Got {cut_deg!r} instead.")
    check_memory(estimate_mask_bytes(nside, 1, chunk_pixels=_CHUNK), f"A latitude-cut mask at nside {nside}", force=force)
    # vectors go from the map's system to the one the latitude is measured in
    rot = _rotator(normalize_coord(map_coord, "map_coord"), normalize_coord(coord, "coord"))
    npix = 12 * nside * nside
    out = np.empty(npix)
    zcut = math.sin(math.radians(cut))
    for start in range(0, npix, _CHUNK):
        pix = np.arange(start, min(start + _CHUNK, npix))
        vec = _pixel_vectors(nside, pix)
        z = vec[:, 2] if rot is None else np.asarray(rot(vec.T))[2]
        out[pix] = (np.abs(z) >= zcut).astype(np.float64)
    if not out.any():
        raise InvalidInputError(f"The latitude cut {cut_deg} degrees removes every pixel at nside {nside}.")
    return out


def cap_mask(nside, lon_deg, lat_deg, radius_deg, *, coord="G", map_coord="G", force=False):
    """Binary mask that keeps one circular patch (a spherical cap).

    Parameters
    ----------
    nside : int
        Resolution of the mask.
    lon_deg, lat_deg : float
        Centre of the patch, in degrees, in the system ``coord``.
    radius_deg : float
        Angular radius of the patch, in (0, 180] degrees.
    coord, map_coord : {'G', 'C', 'E'}, default='G'
        System of the centre, and system of the map.
    force : bool, default=False
        Go ahead even if the memory estimate exceeds what the machine has
        available.

    Returns
    -------
    ndarray of shape (12*nside**2,)
        1 for pixels whose centre lies within ``radius_deg`` of the centre, 0 elsewhere.

    Raises
    ------
    MemoryLimitError
        If the mask would not fit in memory (unless ``force``).
    """
    import healpy as hp

    nside = check_nside(nside)
    lon, lat = _check_lonlat(lon_deg, lat_deg, "cap centre")
    r = _check_radius(radius_deg)
    vec = _centre_vectors(lon, lat, normalize_coord(coord, "coord"), normalize_coord(map_coord, "map_coord"))[0]
    # the mask and the pixel list of the disc
    check_memory(estimate_mask_bytes(nside, 2), f"A cap mask at nside {nside}", force=force)
    out = np.zeros(12 * nside * nside)
    out[hp.query_disc(nside, vec, math.radians(r))] = 1.0
    if not out.any():
        raise InvalidInputError(
            f"A cap of radius {radius_deg} degrees contains no pixel centre at nside {nside}; use a larger radius."
        )
    return out


def read_positions_csv(path):
    """Read disc positions from a CSV file.

    The file has a header row with the columns ``lon_deg`` and ``lat_deg``
    and optionally ``radius_deg`` (other columns, such as a name, are
    ignored).  Blank lines and lines starting with ``#`` are skipped; an empty
    ``radius_deg`` cell means "use the default radius".

    Parameters
    ----------
    path : str or path-like
        The CSV file.

    Returns
    -------
    ndarray of shape (n, 3)
        Columns lon_deg, lat_deg, radius_deg (NaN where not given).

    Raises
    ------
    InputFileError
        If a required column is missing, a cell is not a number, a latitude
        is outside [-90, 90], a radius is not in (0, 180], or there are no rows.
    """
    table = read_text_table(path, what="a CSV table of positions", separator="csv",
                            undecodable="is not a UTF-8 text (CSV) file")
    p = table.path
    if table.names is None:
        raise InputFileError(p, "is empty: expected a header row with columns lon_deg, lat_deg[, radius_deg]")
    header = list(table.names)
    missing = [c for c in ("lon_deg", "lat_deg") if c not in header]
    if missing:
        raise InputFileError(
            p, f"lacks the column(s) {', '.join(missing)} (header: {', '.join(header)}); "
            f"expected lon_deg, lat_deg and optionally radius_deg"
        )
    i_lon, i_lat = header.index("lon_deg"), header.index("lat_deg")
    i_rad = header.index("radius_deg") if "radius_deg" in header else None
    rows = []
    for n, (_, row) in enumerate(table.rows, start=2):
        if len(row) < len(header):
            raise InputFileError(p, f"row {n} has {len(row)} cells but the header has {len(header)}")
        vals = []
        for i, col in ((i_lon, "lon_deg"), (i_lat, "lat_deg"), (i_rad, "radius_deg")):
            if i is None or (col == "radius_deg" and not row[i].strip()):
                vals.append(float("nan"))
                continue
            v = number_cell(p, row[i], f"row {n}, column {col}:")
            if not math.isfinite(v):
                raise InputFileError(p, f"row {n}, column {col}: {row[i].strip()!r} is not a finite number")
            vals.append(v)
        if abs(vals[1]) > 90:
            raise InputFileError(p, f"row {n}: latitude {vals[1]} is outside [-90, 90]")
        if not math.isnan(vals[2]) and not 0 < vals[2] <= 180:
            raise InputFileError(p, f"row {n}: radius {vals[2]} is not in (0, 180] degrees")
        rows.append(vals)
    if not rows:
        raise InputFileError(p, "has a header but no positions")
    return np.array(rows, dtype=np.float64)


def disc_mask(nside, positions, radius_deg=None, *, coord="G", map_coord="G", force=False):
    """Binary mask that removes discs around a list of positions (e.g. point sources).

    Parameters
    ----------
    nside : int
        Resolution of the mask.
    positions : str, path-like or array_like of shape (n, 2) or (n, 3)
        A CSV file (see :func:`read_positions_csv`) or an array of rows
        (lon_deg, lat_deg[, radius_deg]).
    radius_deg : float, optional
        Radius of every disc in degrees, used for rows that give none.
    coord : {'G', 'C', 'E'}, default='G'
        System of the positions.
    map_coord : {'G', 'C', 'E'}, default='G'
        System of the map.
    force : bool, default=False
        Go ahead even if the memory estimate exceeds what the machine has
        available.

    Returns
    -------
    ndarray of shape (12*nside**2,)
        0 for pixels whose centre lies within a disc, 1 elsewhere.

    Raises
    ------
    MemoryLimitError
        If the mask would not fit in memory (unless ``force``).
    """
    import healpy as hp

    nside = check_nside(nside)
    if isinstance(positions, (str, bytes)) or hasattr(positions, "__fspath__"):
        table = read_positions_csv(positions)
    else:
        try:
            table = np.array(positions, dtype=np.float64, ndmin=2)
        except (TypeError, ValueError):
            raise InvalidInputError("The 'positions' parameter must be a CSV path or an (n, 2) or (n, 3) array of numbers.") from None
        if table.ndim != 2 or table.shape[1] not in (2, 3) or table.shape[0] == 0:
            raise InvalidInputError(
                f"The 'positions' parameter must have shape (n, 2) or (n, 3). Got shape {table.shape} instead."
            )
        if table.shape[1] == 2:
            table = np.column_stack([table, np.full(table.shape[0], np.nan)])
    default = None if radius_deg is None else _check_radius(radius_deg)
    radii = table[:, 2].copy()
    if np.isnan(radii).any():
        if default is None:
            raise InvalidInputError(
                f"{int(np.isnan(radii).sum())} position(s) have no radius; pass 'radius_deg' to give a default."
            )
        radii[np.isnan(radii)] = default
    for k, r in enumerate(radii):
        _check_radius(r, f"radius_deg of position {k}")
    for k, (lon, lat) in enumerate(table[:, :2]):
        _check_lonlat(lon, lat, f"position {k}")
    vecs = _centre_vectors(table[:, 0], table[:, 1], normalize_coord(coord, "coord"), normalize_coord(map_coord, "map_coord"))
    # the mask and the pixel list of one disc
    check_memory(estimate_mask_bytes(nside, 2), f"A mask with holes at nside {nside}", force=force)
    out = np.ones(12 * nside * nside)
    for vec, r in zip(vecs, radii):
        out[hp.query_disc(nside, vec, math.radians(r))] = 0.0
    if not out.any():
        raise InvalidInputError("The discs cover the whole sky: no pixel is left.")
    return out


def threshold_mask(m, threshold, *, keep="below"):
    """Binary mask from a map and a threshold.

    Parameters
    ----------
    m : array_like of shape (12*nside**2,)
        Any map (a foreground template, a hit-count map, ...); missing pixels
        are never kept.
    threshold : float
        The cut value, in the map's unit.
    keep : {'below', 'above'}, default='below'
        Keep pixels with ``m < threshold`` ('below') or ``m > threshold`` ('above').

    Returns
    -------
    ndarray of shape (12*nside**2,)
        1 for kept pixels, 0 elsewhere.
    """
    a = as_map(m, "map")
    try:
        t = float(threshold)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The 'threshold' parameter must be a number. Got {threshold!r} instead.") from None
    if not math.isfinite(t):
        raise InvalidInputError(f"The 'threshold' parameter must be finite. Got {threshold!r} instead.")
    bad = missing_pixels(a)
    safe = np.where(bad, 0.0, a)
    if keep == "below":
        kept = safe < t
    elif keep == "above":
        kept = safe > t
    else:
        raise InvalidInputError(f"The 'keep' parameter must be 'below' or 'above'. Got {keep!r} instead.")
    kept &= ~bad
    if not kept.any():
        raise InvalidInputError(f"No valid pixel is {keep} the threshold {t:g}: the mask would be empty.")
    return kept.astype(np.float64)


def combine_masks(*masks):
    """Product of several masks of the same nside (a pixel is kept only where all keep it).

    Parameters
    ----------
    *masks : array_like of shape (12*nside**2,)
        Masks (weights in [0, 1]) of one nside, RING.

    Returns
    -------
    ndarray of shape (12*nside**2,)
        The product of the masks.
    """
    if not masks:
        raise InvalidInputError("combine_masks needs at least one mask.")
    out = check_mask(masks[0], "mask 0").copy()
    for k, mk in enumerate(masks[1:], start=1):
        w = check_mask(mk, f"mask {k}")
        check_same_nside(out, w, "mask 0", f"mask {k}")
        out *= w
    if not out.any():
        raise InvalidInputError("The combined mask is zero everywhere: the masks do not overlap.")
    return out


def change_mask_resolution(mask, nside_out, *, threshold=None, force=False):
    """Change a mask's nside: average the sub-pixels going down, repeat going up.

    Parameters
    ----------
    mask : array_like of shape (12*nside**2,)
        Weights in [0, 1].
    nside_out : int
        New resolution.
    threshold : float, optional
        If given, re-binarise: 1 where the new value is ``>= threshold``, 0
        elsewhere (``threshold=1`` keeps only fully unmasked coarse pixels).
    force : bool, default=False
        Go ahead even if the memory estimate exceeds what the machine has
        available.

    Returns
    -------
    ndarray of shape (12*nside_out**2,)

    Raises
    ------
    MemoryLimitError
        If the new mask would not fit in memory (unless ``force``).
    """
    w = check_mask(mask, "mask")
    nside_out = check_nside(nside_out, "nside_out")
    nside_in = int(round(math.sqrt(w.size / 12)))
    check_memory(estimate_regrade_bytes(nside_in, nside_out),
                 f"Changing the resolution of a mask from nside {nside_in} to {nside_out}", force=force)
    out = _regrade(w, nside_out)
    if threshold is not None:
        t = check_positive(threshold, "threshold")
        if t > 1:
            raise InvalidInputError(f"The 'threshold' parameter must be in (0, 1]. Got {threshold!r} instead.")
        out = (out >= t - 1e-12).astype(np.float64)
    if not out.any():
        raise InvalidInputError(f"The mask at nside {nside_out} is zero everywhere; lower the threshold.")
    return out


# ---------------------------------------------------------------- apodization

def taper_profile(distance_deg, width_deg):
    """The cosine apodization taper as a function of distance to the mask edge.

    ``w = x - sin(2 pi x) / (2 pi)`` with ``x = sqrt((1 - cos d) / (1 - cos width))``
    for ``d < width`` and ``w = 1`` beyond (Grain, Tristram & Stompor 2009,
    Phys. Rev. D 79, 123515; formula from memory).  For small angles
    ``x ~ d / width``; the taper and its slope vanish at the edge and its
    slope vanishes again at ``d = width``.

    Parameters
    ----------
    distance_deg : array_like
        Angular distance to the nearest masked pixel, degrees (>= 0).
    width_deg : float
        Apodization width, degrees.

    Returns
    -------
    ndarray or float
        The taper weight in [0, 1], shaped like ``distance_deg``.
    """
    d = np.radians(np.asarray(distance_deg, dtype=np.float64))
    width = math.radians(check_positive(width_deg, "width_deg"))
    x = np.sqrt(np.clip((1.0 - np.cos(d)) / (1.0 - math.cos(width)), 0.0, 1.0))
    return np.where(d >= width, 1.0, x - np.sin(2.0 * np.pi * x) / (2.0 * np.pi))


def _edge_distance(support, nside, max_angle):
    """Angle (rad) from each kept pixel centre to the nearest masked pixel centre.

    Pixels farther than ``max_angle`` get ``inf``.  Only masked pixels with a
    kept neighbour can be nearest, so the KD-tree (on unit vectors; chord
    lengths are turned into angles) holds just the boundary.
    """
    import healpy as hp
    from scipy.spatial import cKDTree

    masked = np.flatnonzero(~support)
    edge = []
    for start in range(0, masked.size, _CHUNK):
        pix = masked[start:start + _CHUNK]
        nb = hp.get_all_neighbours(nside, pix)
        has_kept = ((nb >= 0) & support[np.where(nb >= 0, nb, 0)]).any(axis=0)
        edge.append(pix[has_kept])
    edge = np.concatenate(edge) if edge else np.zeros(0, dtype=np.int64)
    dist = np.full(support.size, np.inf)
    if edge.size == 0:
        return dist
    tree = cKDTree(_pixel_vectors(nside, edge))
    kept = np.flatnonzero(support)
    chord_max = 2.0 * math.sin(min(max_angle, math.pi) / 2.0) * (1 + 1e-12)
    for start in range(0, kept.size, _CHUNK):
        pix = kept[start:start + _CHUNK]
        chord, _ = tree.query(_pixel_vectors(nside, pix), k=1, distance_upper_bound=chord_max)
        ang = np.full(chord.shape, np.inf)
        ok = np.isfinite(chord)
        ang[ok] = 2.0 * np.arcsin(np.clip(chord[ok] / 2.0, 0.0, 1.0))
        dist[pix] = ang
    return dist


def apodize_mask(mask, width_deg, *, taper="cosine", nthreads=None):
    """Taper a mask smoothly to zero at its edges.

    Parameters
    ----------
    mask : array_like of shape (12*nside**2,)
        Weights in [0, 1]; its support (pixels > 0) is what gets tapered,
        and non-binary weights are multiplied by the taper.
    width_deg : float
        Apodization width in degrees.
    taper : {'cosine', 'gaussian'}, default='cosine'
        'cosine': each kept pixel is weighted by :func:`taper_profile` of
        its true angular distance to the nearest masked pixel centre
        (Grain, Tristram & Stompor 2009); pixels farther than the width keep
        their weight.  'gaussian': the binary support is smoothed with a
        Gaussian beam of FWHM ``width_deg`` and then set to zero outside the
        original support, so this taper is about 0.5 right at the edge, not 0.
    nthreads : int, optional
        Threads for the transforms of the 'gaussian' taper.

    Returns
    -------
    ndarray of shape (12*nside**2,)
        Values in [0, 1], zero wherever the input mask is zero.
    """
    w = check_mask(mask, "mask")
    width = check_positive(width_deg, "width_deg")
    if width > 180:
        raise InvalidInputError(f"The 'width_deg' parameter must be at most 180 degrees. Got {width_deg!r} instead.")
    nside = int(round(math.sqrt(w.size / 12)))
    support = w > 0
    if taper == "cosine":
        dist = _edge_distance(support, nside, math.radians(width))
        factor = np.ones(w.size)
        near = np.isfinite(dist)
        factor[near] = taper_profile(np.degrees(dist[near]), width)
        out = w * factor
    elif taper == "gaussian":
        from cmbtools._core import sht as _sht

        lmax = 3 * nside - 1
        nthreads = resolve_nthreads(nthreads)
        sigma = math.radians(width) / math.sqrt(8.0 * math.log(2.0))
        ell = np.arange(lmax + 1)
        alm = _sht.map2alm(support.astype(np.float64), lmax, n_iter=3, nthreads=nthreads)
        smooth = _sht.alm2map(_sht.almxfl(alm, np.exp(-0.5 * ell * (ell + 1) * sigma**2), lmax), nside, lmax,
                              nthreads=nthreads)
        out = w * np.clip(smooth, 0.0, 1.0)
    else:
        raise InvalidInputError(f"The 'taper' parameter must be 'cosine' or 'gaussian'. Got {taper!r} instead.")
    out[~support] = 0.0
    if not out.any():
        raise InvalidInputError("The apodized mask is zero everywhere: the width is too large for this mask.")
    return out
