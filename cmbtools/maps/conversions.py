"""Map operations: coordinate rotation, resolution change and smoothing.

* :func:`rotate_map` rotates a complete map between galactic, equatorial and
  ecliptic coordinates in harmonic space (analysis with ``_sht``, healpy's
  ``Rotator.rotate_alm``, synthesis), so it is exact for band-limited maps up
  to ``lmax``.  Missing pixels have no harmonic meaning: they are refused.
* :func:`rotate_mask` rotates masks (and any map with holes) in pixel space:
  each output pixel takes the value of the input pixel containing its
  rotated centre, so binary masks stay binary.
* :func:`change_resolution` averages the valid sub-pixels going down (a
  coarse pixel is missing when too few are valid) and repeats going up.
* :func:`smooth_map` multiplies the harmonic coefficients by a Gaussian or a
  tabulated beam ``B_l``.
"""

from __future__ import annotations

import math

import numpy as np

from cmbtools._core.checks import (
    UNSEEN,
    as_map,
    check_cl,
    check_lmax,
    check_nside,
    check_positive,
    missing_pixels,
    resolve_nthreads,
    warn_lmax_above_band_limit,
)
from cmbtools._core.memory import check_memory, estimate_map_transform_bytes, estimate_regrade_bytes
from cmbtools.exceptions import InvalidInputError

__all__ = ["rotate_map", "rotate_mask", "change_resolution", "smooth_map", "rotate_iqu", "smooth_iqu"]


def _nside_of(a):
    return int(round(math.sqrt(a.size / 12)))


def _regrade(values, nside_out, *, min_valid_fraction=None):
    """Average down / repeat up a RING map; missing pixels are excluded from averages.

    A coarse pixel is missing when fewer than ``min_valid_fraction`` of its
    sub-pixels are valid (and always when none is).
    """
    import healpy as hp

    nside_in = _nside_of(values)
    if nside_out == nside_in:
        return values.copy()
    bad = missing_pixels(values)
    nest_in = hp.ring2nest(nside_in, np.arange(values.size))  # ring index -> nest index
    v_nest = np.empty_like(values)
    v_nest[nest_in] = values
    b_nest = np.empty_like(bad)
    b_nest[nest_in] = bad
    if nside_out < nside_in:
        k = (nside_in // nside_out) ** 2
        v = np.where(b_nest, 0.0, v_nest).reshape(-1, k)
        n_valid = (~b_nest).reshape(-1, k).sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            out_nest = v.sum(axis=1) / n_valid
        need = 1 if min_valid_fraction is None else max(1, math.ceil(min_valid_fraction * k - 1e-9))
        out_nest[n_valid < need] = UNSEEN
    else:
        k = (nside_out // nside_in) ** 2
        out_nest = np.repeat(np.where(b_nest, UNSEEN, v_nest), k)
    ring_of_nest = hp.nest2ring(nside_out, np.arange(out_nest.size))
    out = np.empty_like(out_nest)
    out[ring_of_nest] = out_nest
    return out


def change_resolution(m, nside_out, *, min_valid_fraction=0.5, force=False):
    """Change a map's nside, handling missing pixels.

    Going down, each coarse pixel is the plain mean of its valid sub-pixels;
    it is marked missing (UNSEEN) when fewer than ``min_valid_fraction`` of
    its sub-pixels are valid.  Going up, each pixel is repeated (missing
    pixels stay missing).  Averaging adds the coarse pixel's window to the
    map; no harmonic correction is made.

    Parameters
    ----------
    m : array_like of shape (12*nside**2,)
        RING map.
    nside_out : int
        New resolution.
    min_valid_fraction : float, default=0.5
        Fraction in (0, 1] of valid sub-pixels a coarse pixel needs.
    force : bool, default=False
        Go ahead even if the memory estimate exceeds what the machine has
        available (see :func:`cmbtools._core.memory.check_memory`).

    Returns
    -------
    ndarray of shape (12*nside_out**2,)

    Raises
    ------
    InvalidInputError
        If the map has no valid pixel, or for a bad ``nside_out`` or fraction.
    MemoryLimitError
        If the new map would not fit in memory (unless ``force``).
    """
    a = as_map(m, "map")
    nside_out = check_nside(nside_out, "nside_out")
    f = check_positive(min_valid_fraction, "min_valid_fraction")
    if f > 1:
        raise InvalidInputError(f"The 'min_valid_fraction' parameter must be in (0, 1]. Got {min_valid_fraction!r} instead.")
    nside_in = _nside_of(a)
    check_memory(estimate_regrade_bytes(nside_in, nside_out),
                 f"Changing the resolution of a map from nside {nside_in} to {nside_out}", force=force)
    if missing_pixels(a).all():
        raise InvalidInputError(f"The 'map' has no valid pixel: all {a.size} pixels are missing (UNSEEN, NaN or inf).")
    return _regrade(a, nside_out, min_valid_fraction=f)


def _coord_pair(coord_in, coord_out):
    from cmbtools.maps.healpix_table import normalize_coord

    return normalize_coord(coord_in, "coord_in"), normalize_coord(coord_out, "coord_out")


def rotate_map(m, coord_in, coord_out, *, lmax=None, n_iter=3, nthreads=None, force=False):
    """Rotate a complete map from one coordinate system to another, in harmonic space.

    Parameters
    ----------
    m : array_like of shape (12*nside**2,)
        RING map without missing pixels.
    coord_in, coord_out : {'G', 'C', 'E'}
        Coordinate systems (galactic, equatorial, ecliptic).
    lmax : int, optional
        Band limit of the rotation (default ``3*nside - 1``); structure above
        it is lost.
    n_iter : int, default=3
        Refinement steps of the analysis (see :func:`cmbtools._core.sht.map2alm`).
    nthreads : int, optional
        Threads for the transforms.
    force : bool, default=False
        Go ahead even if the memory estimate exceeds what the machine has
        available.

    Returns
    -------
    ndarray of shape (12*nside**2,)

    Raises
    ------
    InvalidInputError
        If the map has missing pixels (rotate masks with :func:`rotate_mask`;
        fill holes before rotating a map).
    MemoryLimitError
        If the transforms would not fit in memory (unless ``force``).

    Warns
    -----
    CmbtoolsWarning
        If ``lmax > 3*nside - 1``.
    """
    import healpy as hp

    from cmbtools._core import sht as _sht

    try:
        a = as_map(m, "map", allow_missing=False)
    except InvalidInputError as exc:
        raise InvalidInputError(
            f"{exc} A harmonic rotation needs a complete map: fill the holes first, "
            f"or rotate it in pixel space with rotate_mask."
        ) from None
    cin, cout = _coord_pair(coord_in, coord_out)
    if cin == cout:
        return a.copy()
    nside = _nside_of(a)
    lmax = 3 * nside - 1 if lmax is None else check_lmax(lmax, nside)
    warn_lmax_above_band_limit(lmax, nside)
    check_memory(estimate_map_transform_bytes(nside, lmax, 1), f"Rotating a map at nside {nside} with lmax {lmax}", force=force)
    nthreads = resolve_nthreads(nthreads)
    alm = _sht.map2alm(a, lmax, n_iter=n_iter, nthreads=nthreads).astype(np.complex128)
    alm = hp.Rotator(coord=[cin, cout]).rotate_alm(alm, lmax=lmax)
    return _sht.alm2map(alm, nside, lmax, nthreads=nthreads)


def rotate_mask(mask, coord_in, coord_out):
    """Rotate a mask (or a map with holes) between coordinate systems in pixel space.

    Each output pixel takes the value of the input pixel that contains its
    centre, rotated back into ``coord_in`` (nearest-pixel resampling, so a
    binary mask stays binary).  Missing pixels of a map stay missing.

    Parameters
    ----------
    mask : array_like of shape (12*nside**2,)
        RING mask (values in [0, 1]) or any RING map.
    coord_in, coord_out : {'G', 'C', 'E'}
        Coordinate systems.

    Returns
    -------
    ndarray of shape (12*nside**2,)
    """
    import healpy as hp

    from cmbtools.maps.monopole_dipole import _CHUNK, _pixel_vectors

    a = as_map(mask, "mask")
    cin, cout = _coord_pair(coord_in, coord_out)
    if cin == cout:
        return a.copy()
    nside = _nside_of(a)
    rot = hp.Rotator(coord=[cout, cin])  # output centres -> input system
    out = np.empty_like(a)
    for start in range(0, a.size, _CHUNK):
        pix = np.arange(start, min(start + _CHUNK, a.size))
        v = np.asarray(rot(_pixel_vectors(nside, pix).T))
        out[pix] = a[hp.vec2pix(nside, v[0], v[1], v[2])]
    return out


def gaussian_beam_window(fwhm_arcmin, lmax):
    """Deprecated name of :func:`cmbtools.spectrum.gaussian_beam` (the one Gaussian beam); kept for one release.

    Parameters
    ----------
    fwhm_arcmin : float
        Full width at half maximum, arcminutes.
    lmax : int
        Largest multipole.

    Returns
    -------
    ndarray of shape (lmax+1,)
        ``B_l``.
    """
    from cmbtools.spectrum.beams import gaussian_beam

    return gaussian_beam(fwhm_arcmin, lmax)


_FILL_CHOICES = (None, "zero", "mean")


def smooth_map(m, *, fwhm_arcmin=None, beam=None, lmax=None, fill_missing=None, n_iter=3, nthreads=None,
               force=False):
    """Smooth a map with a Gaussian beam or a tabulated beam ``B_l``.

    Parameters
    ----------
    m : array_like of shape (12*nside**2,)
        RING map.
    fwhm_arcmin : float, optional
        FWHM of a Gaussian beam, in arcminutes.
    beam : array_like of shape (>= lmax+1,), optional
        Tabulated beam transfer ``B_l`` indexed by ell (exactly one of
        ``fwhm_arcmin`` and ``beam`` must be given).
    lmax : int, optional
        Band limit (default ``3*nside - 1``).
    fill_missing : {None, 'zero', 'mean'}, default=None
        What to do with missing pixels.  ``None`` refuses maps with missing
        pixels (smoothing would spread the sentinel).  'zero' or 'mean' fill
        them with 0 or with the mean of the valid pixels before smoothing and
        mark them missing again afterwards; pixels near the holes are then
        biased towards the fill value over about one FWHM.
    n_iter : int, default=3
        Refinement steps of the analysis.
    nthreads : int, optional
        Threads for the transforms.
    force : bool, default=False
        Go ahead even if the memory estimate exceeds what the machine has
        available.

    Returns
    -------
    ndarray of shape (12*nside**2,)
        The smoothed map; missing pixels (if filled) are UNSEEN again.

    Raises
    ------
    InvalidInputError
        For missing pixels without ``fill_missing``, a map with no valid pixel,
        or a bad beam.
    MemoryLimitError
        If the transforms would not fit in memory (unless ``force``).

    Warns
    -----
    CmbtoolsWarning
        If ``lmax > 3*nside - 1``.
    """
    from cmbtools._core import sht as _sht

    a = as_map(m, "map")
    nside = _nside_of(a)
    lmax = 3 * nside - 1 if lmax is None else check_lmax(lmax, nside)
    warn_lmax_above_band_limit(lmax, nside)
    if (fwhm_arcmin is None) == (beam is None):
        raise InvalidInputError("Give exactly one of 'fwhm_arcmin' (Gaussian beam) and 'beam' (tabulated B_l).")
    if beam is None:
        from cmbtools.spectrum.beams import gaussian_beam

        bl = gaussian_beam(check_positive(fwhm_arcmin, "fwhm_arcmin"), lmax)
    else:
        bl = check_cl(beam, "beam", lmax=lmax)[: lmax + 1]
    if fill_missing not in _FILL_CHOICES:
        raise InvalidInputError(f"The 'fill_missing' parameter must be None, 'zero' or 'mean'. Got {fill_missing!r} instead.")
    bad = missing_pixels(a)
    if bad.any():
        if fill_missing is None:
            raise InvalidInputError(
                f"The 'map' has {int(bad.sum())} missing pixels; smoothing would spread them. "
                f"Pass fill_missing='zero' or 'mean' to fill them first."
            )
        if bad.all():
            raise InvalidInputError("The 'map' has no valid pixel to smooth.")
        a = a.copy()
        a[bad] = 0.0 if fill_missing == "zero" else float(np.mean(a[~bad]))
    check_memory(estimate_map_transform_bytes(nside, lmax), f"Smoothing a map at nside {nside} with lmax {lmax}", force=force)
    nthreads = resolve_nthreads(nthreads)
    alm = _sht.map2alm(a, lmax, n_iter=n_iter, nthreads=nthreads)
    out = _sht.alm2map(_sht.almxfl(alm, bl, lmax), nside, lmax, nthreads=nthreads)
    out[bad] = UNSEEN
    return out


# --------------------------------------------------------------------------- polarized maps


def _as_iqu_map(m, name="map", *, allow_missing=True):
    """(3, npix) float64 I, Q, U maps with a valid HEALPix size."""
    from cmbtools.maps.polarized_fits import _as_iqu

    a = _as_iqu(m, name)
    rows = [as_map(a[i], f"{name} ({'IQU'[i]})", allow_missing=allow_missing) for i in range(3)]
    return np.stack(rows)


def _iqu_alm(a, lmax, n_iter, nthreads):
    """T, E, B coefficients of a complete (3, npix) map (HEALPix convention)."""
    from cmbtools._core import sht as _sht

    alm_t = _sht.map2alm(a[0], lmax, n_iter=n_iter, nthreads=nthreads)
    alm_e, alm_b = _sht.map2alm_spin2(a[1], a[2], lmax, n_iter=n_iter, nthreads=nthreads)
    return [np.asarray(x, dtype=np.complex128) for x in (alm_t, alm_e, alm_b)]


def _iqu_from_alm(alms, nside, lmax, nthreads):
    from cmbtools._core import sht as _sht

    t = _sht.alm2map(alms[0], nside, lmax, nthreads=nthreads)
    q, u = _sht.alm2map_spin2(alms[1], alms[2], nside, lmax, nthreads=nthreads)
    return np.stack([t, q, u])


def rotate_iqu(m, coord_in, coord_out, *, lmax=None, n_iter=3, nthreads=None, force=False):
    """Rotate complete I, Q, U maps between coordinate systems, in harmonic space.

    The temperature and the E and B coefficients are rotated with the same
    Wigner rotation (healpy's ``Rotator.rotate_alm``), and Q, U are
    synthesized again in the local frames of the new coordinates, so the
    polarization angle changes by the rotation of the local frame at every
    pixel (the spin-2 transformation, Zaldarriaga & Seljak 1997, PRD 55, 1830).
    E and B spectra are unchanged, and rotating back gives the input (for
    maps band-limited to ``lmax``).

    Parameters
    ----------
    m : array_like of shape (3, 12*nside**2)
        I, Q, U in the HEALPix convention, RING, without missing pixels.
    coord_in, coord_out : {'G', 'C', 'E'}
        Coordinate systems (galactic, equatorial, ecliptic).
    lmax : int, optional
        Band limit (default ``3*nside - 1``).
    n_iter : int, default=3
        Refinement steps of the analysis.
    nthreads : int, optional
        Threads for the transforms.
    force : bool, default=False
        Go ahead even if the memory estimate exceeds what the machine has available.

    Returns
    -------
    ndarray of shape (3, 12*nside**2)

    Raises
    ------
    InvalidInputError
        If a map has missing pixels or the array is not (3, npix).
    MemoryLimitError
        If the transforms would not fit in memory (unless ``force``).
    """
    import healpy as hp

    try:
        a = _as_iqu_map(m, "map", allow_missing=False)
    except InvalidInputError as exc:
        raise InvalidInputError(
            f"{exc} A harmonic rotation needs complete maps: fill the holes first, "
            f"or rotate a mask in pixel space with rotate_mask."
        ) from None
    cin, cout = _coord_pair(coord_in, coord_out)
    if cin == cout:
        return a.copy()
    nside = _nside_of(a[0])
    lmax = 3 * nside - 1 if lmax is None else check_lmax(lmax, nside)
    warn_lmax_above_band_limit(lmax, nside)
    check_memory(estimate_map_transform_bytes(nside, lmax, 4), f"Rotating I, Q, U maps at nside {nside} with lmax {lmax}", force=force)
    nthreads = resolve_nthreads(nthreads)
    alms = _iqu_alm(a, lmax, n_iter, nthreads)
    rot = hp.Rotator(coord=[cin, cout])
    alms = [rot.rotate_alm(x, lmax=lmax) for x in alms]
    return _iqu_from_alm(alms, nside, lmax, nthreads)


def _field_beams(fwhm_arcmin, beam, lmax):
    """(B_T, B_P) up to lmax from one or two FWHM, or one or two tabulated beams."""
    if (fwhm_arcmin is None) == (beam is None):
        raise InvalidInputError("Give exactly one of 'fwhm_arcmin' (Gaussian beam) and 'beam' (tabulated B_l).")
    if fwhm_arcmin is not None:
        values = fwhm_arcmin if isinstance(fwhm_arcmin, (tuple, list)) else (fwhm_arcmin, fwhm_arcmin)
        if len(values) != 2:
            raise InvalidInputError(
                f"The 'fwhm_arcmin' parameter must be one FWHM or two (temperature, polarization). Got {fwhm_arcmin!r} instead."
            )
        from cmbtools.spectrum.beams import gaussian_polarized_beam

        return gaussian_beam_window(values[0], lmax), gaussian_polarized_beam(check_positive(values[1], "fwhm_arcmin"), lmax)
    if isinstance(beam, (tuple, list)) or (np.ndim(beam) == 2):
        if len(beam) != 2:
            raise InvalidInputError("The 'beam' parameter must be one B_l or two (temperature, polarization).")
        return tuple(check_cl(b, "beam", lmax=lmax)[: lmax + 1] for b in beam)
    b = check_cl(beam, "beam", lmax=lmax)[: lmax + 1]
    return b, b


def smooth_iqu(m, *, fwhm_arcmin=None, beam=None, lmax=None, fill_missing=None, n_iter=3, nthreads=None, force=False):
    """Smooth I, Q, U maps with a beam per field (temperature, polarization).

    I is smoothed as by :func:`smooth_map`; Q and U together as a spin-2
    field (their E and B coefficients are multiplied by the polarization beam).

    Parameters
    ----------
    m : array_like of shape (3, 12*nside**2)
        I, Q, U, RING, HEALPix convention.
    fwhm_arcmin : float or (float, float), optional
        Gaussian FWHM in arcmin: one for all fields or (temperature, polarization).
        The polarization beam of a Gaussian is its spin-2 transfer function
        (:func:`cmbtools.spectrum.beams.gaussian_polarized_beam`).
    beam : array_like or (array_like, array_like), optional
        Tabulated B_l: one for all fields or (B_T, B_P).  Exactly one of
        ``fwhm_arcmin`` and ``beam`` must be given.
    lmax, fill_missing, n_iter, nthreads, force
        As for :func:`smooth_map` (missing pixels are handled per field; a
        pixel missing in Q or U is filled in both).

    Returns
    -------
    ndarray of shape (3, 12*nside**2)
        Smoothed maps; filled pixels are UNSEEN again.

    Raises
    ------
    InvalidInputError
        For missing pixels without ``fill_missing``, an empty field, or a bad beam.
    """
    a = _as_iqu_map(m, "map")
    nside = _nside_of(a[0])
    lmax = 3 * nside - 1 if lmax is None else check_lmax(lmax, nside)
    warn_lmax_above_band_limit(lmax, nside)
    b_t, b_p = _field_beams(fwhm_arcmin, beam, lmax)
    if fill_missing not in _FILL_CHOICES:
        raise InvalidInputError(f"The 'fill_missing' parameter must be None, 'zero' or 'mean'. Got {fill_missing!r} instead.")
    bad_t = missing_pixels(a[0])
    bad_p = missing_pixels(a[1]) | missing_pixels(a[2])
    a = a.copy()
    for rows, bad in (((0,), bad_t), ((1, 2), bad_p)):
        if bad.any():
            if fill_missing is None:
                raise InvalidInputError(
                    f"The 'map' has {int(bad.sum())} missing pixels in {'I' if rows == (0,) else 'Q/U'}; smoothing "
                    f"would spread them. Pass fill_missing='zero' or 'mean' to fill them first."
                )
            if bad.all():
                raise InvalidInputError(f"The 'map' has no valid pixel in {'I' if rows == (0,) else 'Q/U'} to smooth.")
            for r in rows:
                a[r, bad] = 0.0 if fill_missing == "zero" else float(np.mean(a[r, ~bad]))
    check_memory(estimate_map_transform_bytes(nside, lmax, 3), f"Smoothing I, Q, U maps at nside {nside} with lmax {lmax}", force=force)
    nthreads = resolve_nthreads(nthreads)
    from cmbtools._core import sht as _sht

    alms = _iqu_alm(a, lmax, n_iter, nthreads)
    alms = [_sht.almxfl(alms[0], b_t, lmax), _sht.almxfl(alms[1], b_p, lmax), _sht.almxfl(alms[2], b_p, lmax)]
    out = _iqu_from_alm(alms, nside, lmax, nthreads)
    out[0, bad_t] = UNSEEN
    out[1:, bad_p] = UNSEEN
    return out
