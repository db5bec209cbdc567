"""Gaussian random skies: coefficients, maps with beam, pixel window, monopole and dipole.

Every function takes ``rng`` (see :mod:`cmbtools.simulate.random_streams`,
which states the reproducibility contract: block streams, drawn on several
threads); :func:`gaussian_sky` draws only the coefficients of
:func:`gaussian_alm`, with the beam and pixel window applied as they are drawn.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools._core.checks import check_cl, check_lmax, check_nside, check_positive, resolve_nthreads
from cmbtools._core.memory import check_memory, estimate_dipole_map_bytes, estimate_sky_bytes
from cmbtools.exceptions import InvalidInputError
from cmbtools.simulate.random_streams import block_normals, resolve_rng

__all__ = ["gaussian_alm", "gaussian_sky", "Dipole", "dipole_map"]


def gaussian_alm(cl, lmax, *, rng=None, nthreads=None) -> np.ndarray:
    """Draw the harmonic coefficients of a statistically isotropic Gaussian sky.

    Parameters
    ----------
    cl : array_like of shape (>= lmax+1,)
        Power spectrum C_l in K^2, indexed by ell from 0 (extra entries are ignored).
    lmax : int
        Largest multipole.
    rng : Generator, SeedSequence, int or None, optional
        Random source (see :mod:`cmbtools.simulate.random_streams` for the draws).
    nthreads : int, optional
        Threads that draw the random numbers (default: all cores); the
        coefficients do not depend on it.

    Returns
    -------
    alm : ndarray of complex128, shape (alm_size(lmax),)
        Coefficients in healpy's layout: ``a_l0`` real with variance ``C_l``,
        ``a_lm`` (m > 0) with real and imaginary parts each of variance ``C_l / 2``.
    """
    lmax = check_lmax(lmax)
    cl = check_cl(cl, "cl", lmax=lmax)[: lmax + 1]
    return _gaussian_alm(cl, lmax, rng, nthreads)


def _gaussian_alm(cl, lmax, rng, nthreads, factor=None) -> np.ndarray:
    """:func:`gaussian_alm` of checked inputs, the coefficients times ``factor`` (a function of ell) as drawn."""
    source = resolve_rng(rng)
    size = _sht.alm_size(lmax)
    amp = np.sqrt(0.5 * cl)
    if factor is not None:
        amp *= factor
    ell = _sht.alm_ell(lmax)
    alm = np.empty(size, dtype=np.complex128)
    pairs = alm.view(np.float64)  # the real and imaginary part of each coefficient, interleaved

    def scale(start, stop, values):  # a block holds whole coefficients (BLOCK_SIZE is even)
        parts = values.reshape(-1, 2)
        parts *= np.take(amp, ell[start // 2: stop // 2])[:, None]

    block_normals(source, 2 * size, out=pairs, transform=scale, nthreads=resolve_nthreads(nthreads))
    # m = 0 coefficients are real with the full variance C_l (their imaginary draws are not used)
    alm.real[: lmax + 1] *= math.sqrt(2.0)
    alm.imag[: lmax + 1] = 0.0
    return alm


def _beam_factor(beam, lmax) -> np.ndarray | None:
    """B_l up to lmax from None, a FWHM in arcmin, or an array."""
    from cmbtools.spectrum.beams import GaussianBeam

    if beam is None:
        return None
    if isinstance(beam, GaussianBeam):
        beam = beam.fwhm_arcmin
    if isinstance(beam, numbers.Real) and not isinstance(beam, bool):
        from cmbtools.spectrum.beams import gaussian_beam

        fwhm = check_positive(beam, "beam", allow_zero=True)
        return np.asarray(gaussian_beam(fwhm, lmax), dtype=np.float64)[: lmax + 1]
    try:
        b = np.asarray(beam, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError(
            f"The 'beam' parameter must be None, a FWHM in arcmin or an array B_l. Got {beam!r} instead."
        ) from None
    if b.ndim != 1 or b.size < lmax + 1:
        raise InvalidInputError(
            f"The 'beam' array must be 1-d and extend to ell={lmax}. Got shape {b.shape} instead."
        )
    if not np.all(np.isfinite(b)):
        raise InvalidInputError("The 'beam' array has non-finite values.")
    return b[: lmax + 1]


@dataclass(frozen=True)
class Dipole:
    """A dipole given by its amplitude and direction.

    Parameters
    ----------
    amplitude_k : float
        Amplitude in K (the map gains ``amplitude_k * cos(angle to the direction)``).
    lon_deg, lat_deg : float
        Direction in the map's own coordinates (longitude, latitude in degrees).
    """

    amplitude_k: float
    lon_deg: float
    lat_deg: float

    def __post_init__(self):
        for name in ("amplitude_k", "lon_deg", "lat_deg"):
            try:
                v = float(getattr(self, name))
            except (TypeError, ValueError):
                raise InvalidInputError(f"The {name!r} parameter must be a number. Got {getattr(self, name)!r} instead.") from None
            if not np.isfinite(v):
                raise InvalidInputError(f"The {name!r} parameter must be finite. Got {v!r} instead.")
            object.__setattr__(self, name, v)
        if not -90.0 <= self.lat_deg <= 90.0:
            raise InvalidInputError(f"The 'lat_deg' parameter must be in [-90, 90]. Got {self.lat_deg!r} instead.")

    @cached_property
    def vector(self) -> np.ndarray:
        """The dipole as a Cartesian 3-vector in K."""
        lon, lat = np.radians(self.lon_deg), np.radians(self.lat_deg)
        v = self.amplitude_k * np.array([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)])
        v.setflags(write=False)
        return v


def _dipole_vector(dipole) -> np.ndarray:
    if isinstance(dipole, Dipole):
        return np.asarray(dipole.vector)
    try:
        v = np.asarray(dipole, dtype=np.float64)
    except (TypeError, ValueError):
        v = None
    if v is None or v.shape != (3,) or not np.all(np.isfinite(v)):
        raise InvalidInputError(
            "The 'dipole' parameter must be a Cartesian 3-vector in K or a "
            f"cmbtools.simulate.Dipole(amplitude_k, lon_deg, lat_deg). Got {dipole!r} instead."
        )
    return v


def dipole_map(nside, dipole, *, force=False) -> np.ndarray:
    """A RING map of ``d . n`` for a dipole ``d`` (3-vector in K or :class:`Dipole`).

    ``force=True`` goes ahead (with a warning) when the map and its temporaries
    (about six maps) would not fit in the memory available; otherwise that
    raises :class:`~cmbtools.exceptions.MemoryLimitError` before allocating.

    Parameters
    ----------
    nside : int
        Resolution of the map.
    dipole : array_like of shape (3,) or Dipole
        The dipole: a Cartesian vector in K or a :class:`Dipole`.
    force : bool, default=False
        Go ahead even when the memory estimate exceeds what the machine has available.

    Returns
    -------
    ndarray of shape (12*nside**2,)
        The map in K, RING.
    """
    nside = check_nside(nside)
    v = _dipole_vector(dipole)
    check_memory(estimate_dipole_map_bytes(nside), f"A dipole map at nside {nside}", force=force)
    return _dipole_map(nside, v)


def _dipole_map(nside, v) -> np.ndarray:
    """``v . n`` on the RING grid (checked inputs; no memory check)."""
    import healpy as hp

    x, y, z = hp.pix2vec(nside, np.arange(12 * nside * nside))
    return v[0] * x + v[1] * y + v[2] * z


def gaussian_sky(
    cl,
    nside,
    *,
    lmax=None,
    beam=None,
    pixel_window=True,
    monopole=0.0,
    dipole=None,
    rng=None,
    nthreads=None,
    force=False,
    pixelise=False,
) -> np.ndarray:
    """Simulate a Gaussian CMB temperature map as an instrument would see it.

    The coefficients of :func:`gaussian_alm` are multiplied by the beam and the
    pixel window and synthesized on the HEALPix grid (or, with ``pixelise``,
    the beam-convolved sky is averaged over each pixel's area, as a detector's
    map holds it); then an optional monopole and dipole are added in pixel space.

    Parameters
    ----------
    cl : array_like
        Sky power spectrum C_l in K^2, indexed by ell from 0.
    nside : int
        HEALPix resolution of the output.
    lmax : int, optional
        Largest multipole simulated; default ``min(3*nside - 1, len(cl) - 1)``;
        at most ``4*nside - 1``.
    beam : None, float or array_like, optional
        None (no beam), a Gaussian beam FWHM in arcmin, or the beam transfer B_l.
    pixel_window : bool, default=True
        Multiply by the HEALPix pixel window of ``nside``, computed by cmbtools
        itself (:func:`cmbtools.spectrum.pixel_windows.pixel_window`; no download).
    monopole : float, default=0
        Constant added to every pixel, in K.
    dipole : array_like of shape (3,) or Dipole, optional
        Dipole added in pixel space: a Cartesian vector in K, or a
        :class:`Dipole` (amplitude in K, longitude and latitude in degrees).
    rng : Generator, SeedSequence, int or None, optional
        Random source; use :func:`simulation_rng` for sets of simulations.
    nthreads : int, optional
        Threads for the random numbers and the transform (default: all cores).
    force : bool, default=False
        Go ahead (with a :class:`~cmbtools.exceptions.CmbtoolsWarning`) even
        when the memory estimate exceeds what the machine has available.
    pixelise : bool, default=False
        Average the beam-convolved sky over the area of each pixel
        (:func:`cmbtools.simulate.pixel_averaging.pixel_averaged_map`, 16
        quadrature nodes per pixel) instead of sampling it, smoothed by the
        pixel window, at the pixel centres: the pixels' own shapes, which the
        isotropic window leaves out, are then in the map.  The estimator's
        default ``averaged_pixels`` model assumes such maps.  Needs
        ``pixel_window=True`` (the averaging is the pixel window); about 20
        times slower than the synthesis (0.8 s at nside 128).

    Returns
    -------
    m : ndarray of float64, shape (12*nside**2,)
        The map in K_CMB, RING ordering.

    Raises
    ------
    MemoryLimitError
        If the map, its coefficients and the transform would not fit in
        memory (estimated before allocating; unless ``force``).
    """
    nside = check_nside(nside)
    cl = check_cl(cl, "cl")
    if lmax is None:
        lmax = min(3 * nside - 1, cl.size - 1)
    lmax = check_lmax(lmax, nside)
    if cl.size < lmax + 1:
        raise InvalidInputError(f"The 'cl' must extend to ell={lmax}. Got ell up to {cl.size - 1} instead.")
    try:
        monopole = float(monopole)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The 'monopole' parameter must be a number in K. Got {monopole!r} instead.") from None
    if not np.isfinite(monopole):
        raise InvalidInputError(f"The 'monopole' parameter must be finite. Got {monopole!r} instead.")
    if not isinstance(pixel_window, (bool, np.bool_)):
        raise InvalidInputError(f"The 'pixel_window' parameter must be True or False. Got {pixel_window!r} instead.")
    pixelise = _check_pixelise(pixelise, pixel_window)
    dip = None if dipole is None else _dipole_vector(dipole)
    check_memory(
        max(estimate_sky_bytes(nside, lmax, dip is not None), _averaging_bytes(nside, lmax, 1) if pixelise else 0),
        f"A simulated sky at nside {nside} with lmax {lmax}", force=force
    )
    b = _beam_factor(beam, lmax)
    if pixelise:
        return _averaged_sky(cl, nside, lmax, b, monopole, dip, rng, nthreads)
    return _gaussian_sky(cl, nside, lmax, b, pixel_window, monopole, dip, rng, nthreads)


def _check_pixelise(pixelise, pixel_window) -> bool:
    if not isinstance(pixelise, (bool, np.bool_)):
        raise InvalidInputError(f"The 'pixelise' parameter must be True or False. Got {pixelise!r} instead.")
    if pixelise and not pixel_window:
        raise InvalidInputError("The 'pixelise' parameter averages the sky over each pixel, which is the pixel window: "
                                "leave 'pixel_window' True with it.")
    return bool(pixelise)


def _averaging_bytes(nside, lmax, n_fields) -> int:
    """Peak bytes of :func:`~cmbtools.simulate.pixel_averaging.pixel_averaged_map` for ``n_fields`` maps."""
    from cmbtools.simulate.pixel_averaging import averaging_order

    nodes = 12 * nside * nside * averaging_order(nside, lmax) ** 2
    # the rule (pixel, theta and phi, weight), the values at the nodes and their weighted copy, the output maps
    return int(nodes * (8 + 16 + 8 + 16 * n_fields)) + 2 * n_fields * 12 * nside * nside * 8


def _averaged_sky(cl, nside, lmax, b, monopole, dip, rng, nthreads) -> np.ndarray:
    """The beam-convolved sky of :func:`_gaussian_sky`'s draws averaged over each pixel (checked inputs)."""
    from cmbtools.simulate.pixel_averaging import pixel_averaged_map

    transfer = np.ones(lmax + 1) if b is None else np.asarray(b, dtype=np.float64)
    alm = _gaussian_alm(np.asarray(cl, dtype=np.float64)[: lmax + 1], lmax, rng, nthreads, transfer)
    m = pixel_averaged_map(alm, nside, lmax, nthreads=nthreads)
    del alm
    if monopole:
        m += monopole
    if dip is not None:
        m += _dipole_map(nside, dip)
    return m


def _gaussian_sky(cl, nside, lmax, b, pixel_window, monopole, dip, rng, nthreads, rings=None) -> np.ndarray:
    """:func:`gaussian_sky` on checked inputs (``b``: B_l or None; ``dip``: a 3-vector or None); no memory check.

    ``rings`` (boolean over the rings): synthesize only those and leave the
    other pixels at 0 before the monopole and dipole are added (for a sky
    that a mask touching only those rings will weight).
    """

    transfer = np.ones(lmax + 1)
    if b is not None:
        transfer *= b
    if pixel_window:
        from cmbtools.spectrum.pixel_windows import pixel_window as _pixel_window

        transfer *= np.asarray(_pixel_window(nside, lmax), dtype=np.float64)[: lmax + 1]

    alm = _gaussian_alm(np.asarray(cl, dtype=np.float64)[: lmax + 1], lmax, rng, nthreads, transfer)
    m = _sht.alm2map(alm, nside, lmax, nthreads=nthreads, rings=rings)
    if monopole:
        m += monopole
    if dip is not None:
        m += _dipole_map(nside, dip)
    return m
