"""Gaussian random skies, instrument noise and reproducible per-simulation random streams.

Random numbers
--------------
Every function takes ``rng``: a :class:`numpy.random.Generator`, a
:class:`numpy.random.SeedSequence`, an int seed, or ``None`` (fresh entropy),
resolved with :func:`numpy.random.default_rng`.  numpy's global state is never
used.  For a set of simulations, :func:`simulation_rng` gives the generator of
simulation ``index`` from one master ``seed`` as
``default_rng(SeedSequence(seed, spawn_key=(index,)))``.  Simulation ``i``
depends only on ``(seed, i)``: the maps are the same whatever order the
simulations run in, however many workers share them, and on any machine
(numpy's PCG64 bit generator and its normal sampler are platform independent).

Order of the random draws (part of the reproducibility contract):

* :func:`gaussian_alm` draws two blocks of ``alm_size(lmax)`` standard normals,
  the real parts and then the imaginary parts, in healpy's coefficient order.
* :func:`noise_map` draws ``12 nside^2`` standard normals for the white part
  (RING order), then, only with a knee, the coefficients of the correlated part
  as :func:`gaussian_alm` does.
* :func:`gaussian_sky` draws only the coefficients of :func:`gaussian_alm`.

Noise conventions
-----------------
A map depth ``d`` in uK-arcmin means white noise of harmonic power
``N_white = (d * 1e-6 * pi / 10800)^2`` K^2 (the depth converted to K rad,
squared: common practice), i.e. a per-pixel standard deviation
``sigma = d_K_rad / sqrt(pixel area in sr)``.  With a knee, the noise power is
``N_l = N_white (1 + (ell_knee / l)^alpha)`` for ``l >= 1`` and ``N_0 = 0``.
With a hits map, the per-pixel standard deviation scales as
``1 / sqrt(hits)`` and is normalised so that the *mean noise variance over the
observed pixels* (hits > 0) equals that of a uniform map of the given depth;
the depth is then the root-mean-square pixel depth of the observed region, and
:func:`noise_spectrum` is the noise power a mask-corrected estimator recovers
from the observed region with uniform weights.  Unobserved pixels are set to
the HEALPix UNSEEN sentinel.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from . import _sht
from ._validation import (
    UNSEEN,
    as_map,
    check_cl,
    check_int,
    check_lmax,
    check_nside,
    check_positive,
    missing_pixels,
    nside_from_npix,
)
from .exceptions import InvalidInputError

__all__ = [
    "depth_to_white_noise",
    "simulation_seed_sequence",
    "simulation_rng",
    "simulation_rngs",
    "gaussian_alm",
    "gaussian_sky",
    "Dipole",
    "dipole_map",
    "NoiseModel",
    "noise_map",
    "white_noise_map",
    "noise_spectrum",
]

#: One arcminute in radians.
ARCMIN_IN_RAD = math.pi / (180.0 * 60.0)

#: Passed as ``force`` by callers that have checked the memory of the whole job already
#: (the Monte Carlo engine): no second estimate, no repeated warning per simulation.
_ALREADY_CHECKED = object()


# --------------------------------------------------------------------------- memory estimates
# Measured peaks (resident memory, nside 256-1024, lmax up to 1535) are within ~15% of these.


def _synthesis_bytes(nside, lmax) -> int:
    """One synthesis: coefficients with their filtered copy's temporaries, the output map and ducc's ring buffer.

    The ring buffer holds about 1.25 x ``(4 nside - 1) x (lmax + 1)`` complex values (measured).
    """
    from ._resources import estimate_alm_bytes, estimate_map_bytes

    ring = 16 * (4 * nside - 1) * (lmax + 1)
    return estimate_map_bytes(nside) + int(1.5 * estimate_alm_bytes(lmax)) + int(1.25 * ring)


def _sky_bytes(nside, lmax, with_dipole=False) -> int:
    """Peak of :func:`gaussian_sky`: the draws (about four sets of coefficients), the synthesis, the dipole."""
    from ._resources import estimate_alm_bytes, estimate_map_bytes

    phases = [4 * estimate_alm_bytes(lmax), _synthesis_bytes(nside, lmax)]
    if with_dipole:  # the map, the pixel numbers, three coordinate maps and two temporaries
        phases.append(estimate_map_bytes(nside, 7))
    return max(phases)


def _noise_bytes(model, nside, lmax) -> int:
    """Peak of :func:`noise_map`: the white draws, the correlated part's synthesis, the hits scaling."""
    from ._resources import estimate_alm_bytes, estimate_map_bytes

    one = estimate_map_bytes(nside)
    phases = [2 * one]  # the draws and the scaled copy
    if model.ell_knee is not None:
        phases += [one + 4 * estimate_alm_bytes(lmax), one + _synthesis_bytes(nside, lmax)]
    if model.hits is not None and "relative_sigma" not in model.__dict__:
        phases.append(4 * one)  # the noise, then 1/hits, its square root and the observed-pixel selection
    return max(phases)


def _check_memory(need, what, force):
    if force is _ALREADY_CHECKED:
        return need
    from ._resources import check_memory

    return check_memory(need, what, force=force)


# --------------------------------------------------------------------------- random streams


def resolve_rng(rng=None, name="rng") -> np.random.Generator:
    """Return a :class:`numpy.random.Generator` from a generator, seed sequence, int seed or None."""
    if isinstance(rng, np.random.Generator):
        return rng
    if rng is None or isinstance(rng, np.random.SeedSequence):
        return np.random.default_rng(rng)
    if isinstance(rng, numbers.Integral) and not isinstance(rng, bool) and int(rng) >= 0:
        return np.random.default_rng(int(rng))
    raise InvalidInputError(
        f"The {name!r} parameter must be a numpy Generator, a SeedSequence, a non-negative int seed "
        f"or None. Got {rng!r} instead."
    )


def _check_seed(seed) -> int:
    return check_int(seed, "seed", minimum=0)


def simulation_seed_sequence(seed, index) -> np.random.SeedSequence:
    """The seed sequence of simulation ``index`` of a set started from ``seed``.

    ``SeedSequence(seed, spawn_key=(index,))``: the same stream as the
    ``index``-th child of ``SeedSequence(seed).spawn(...)``, with random access.

    Parameters
    ----------
    seed : int
        Master seed of the set (>= 0), recorded in output headers as ``CMBSEED``.
    index : int
        Simulation number (>= 0), recorded as ``CMBSIMID``.
    """
    return np.random.SeedSequence(_check_seed(seed), spawn_key=(check_int(index, "index", minimum=0),))


def simulation_rng(seed, index) -> np.random.Generator:
    """The random generator of simulation ``index`` of a set started from ``seed``.

    Simulation ``i`` depends only on ``(seed, i)``, so any worker can produce
    any simulation and the results do not depend on the number of workers or
    the order of the work.

    Examples
    --------
    >>> a = simulation_rng(42, 3).standard_normal(2)
    >>> b = simulation_rngs(42, 4)[3].standard_normal(2)
    >>> bool((a == b).all())
    True
    """
    return np.random.default_rng(simulation_seed_sequence(seed, index))


def simulation_rngs(seed, n) -> list:
    """Generators of simulations ``0 .. n-1`` (see :func:`simulation_rng`)."""
    n = check_int(n, "n", minimum=0)
    seed = _check_seed(seed)
    return [simulation_rng(seed, i) for i in range(n)]


# --------------------------------------------------------------------------- skies


def gaussian_alm(cl, lmax, *, rng=None) -> np.ndarray:
    """Draw the harmonic coefficients of a statistically isotropic Gaussian sky.

    Parameters
    ----------
    cl : array_like of shape (>= lmax+1,)
        Power spectrum C_l in K^2, indexed by ell from 0 (extra entries are ignored).
    lmax : int
        Largest multipole.
    rng : Generator, SeedSequence, int or None, optional
        Random source (see the module notes for the order of the draws).

    Returns
    -------
    alm : ndarray of complex128, shape (alm_size(lmax),)
        Coefficients in healpy's layout: ``a_l0`` real with variance ``C_l``,
        ``a_lm`` (m > 0) with real and imaginary parts each of variance ``C_l / 2``.
    """
    lmax = check_lmax(lmax)
    cl = check_cl(cl, "cl", lmax=lmax)[: lmax + 1]
    gen = resolve_rng(rng)
    size = _sht.alm_size(lmax)
    draws = gen.standard_normal((2, size))
    amp = np.sqrt(0.5 * cl)[_sht.alm_ell(lmax)]
    alm = np.empty(size, dtype=np.complex128)
    alm.real = draws[0] * amp
    alm.imag = draws[1] * amp
    # m = 0 coefficients are real with the full variance C_l.
    alm.real[: lmax + 1] = draws[0, : lmax + 1] * np.sqrt(cl)
    alm.imag[: lmax + 1] = 0.0
    return alm


def _beam_factor(beam, lmax) -> np.ndarray | None:
    """B_l up to lmax from None, a FWHM in arcmin, or an array."""
    if beam is None:
        return None
    if isinstance(beam, numbers.Real) and not isinstance(beam, bool):
        from ._beams import gaussian_beam

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
    """
    import healpy as hp

    from ._resources import estimate_map_bytes

    nside = check_nside(nside)
    v = _dipole_vector(dipole)
    _check_memory(estimate_map_bytes(nside, 6), f"A dipole map at nside {nside}", force)
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
) -> np.ndarray:
    """Simulate a Gaussian CMB temperature map as an instrument would see it.

    The coefficients of :func:`gaussian_alm` are multiplied by the beam and the
    pixel window and synthesized on the HEALPix grid; then an optional monopole
    and dipole are added in pixel space.

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
        itself (:func:`cmbtools._pixwin.pixel_window`; no download).
    monopole : float, default=0
        Constant added to every pixel, in K.
    dipole : array_like of shape (3,) or Dipole, optional
        Dipole added in pixel space: a Cartesian vector in K, or a
        :class:`Dipole` (amplitude in K, longitude and latitude in degrees).
    rng : Generator, SeedSequence, int or None, optional
        Random source; use :func:`simulation_rng` for sets of simulations.
    nthreads : int, optional
        Threads for the transform (default: all cores).
    force : bool, default=False
        Go ahead (with a :class:`~cmbtools.exceptions.CmbtoolsWarning`) even
        when the memory estimate exceeds what the machine has available.

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
    dip = None if dipole is None else _dipole_vector(dipole)
    _check_memory(_sky_bytes(nside, lmax, dip is not None), f"A simulated sky at nside {nside} with lmax {lmax}", force)
    b = _beam_factor(beam, lmax)

    transfer = np.ones(lmax + 1)
    if b is not None:
        transfer *= b
    if pixel_window:
        from ._pixwin import pixel_window as _pixel_window

        transfer *= np.asarray(_pixel_window(nside, lmax), dtype=np.float64)[: lmax + 1]

    alm = gaussian_alm(cl, lmax, rng=rng)
    alm = _sht.almxfl(alm, transfer, lmax)
    m = _sht.alm2map(alm, nside, lmax, nthreads=nthreads)
    if monopole:
        m += monopole
    if dip is not None:
        m += dipole_map(nside, dip, force=_ALREADY_CHECKED)
    return m


# --------------------------------------------------------------------------- noise


def depth_to_white_noise(depth_uk_arcmin) -> float:
    """White-noise power N_white in K^2 of a map depth in uK-arcmin: ``(depth in K rad)^2``."""
    d = check_positive(depth_uk_arcmin, "depth_uk_arcmin", allow_zero=True)
    sigma = d * 1e-6 * ARCMIN_IN_RAD
    if sigma * sigma == math.inf:  # (float ** 2 would raise OverflowError instead)
        raise InvalidInputError(
            f"The 'depth_uk_arcmin' parameter is too large: its noise power overflows a double. Got {d!r} instead."
        )
    return sigma * sigma


@dataclass(frozen=True, eq=False)
class NoiseModel:
    """Instrument noise: white at a given depth, optionally inhomogeneous and with a 1/f knee.

    Parameters
    ----------
    depth_uk_arcmin : float
        Map depth in uK-arcmin (> 0).  With ``hits`` it is the root-mean-square
        pixel depth over the observed pixels.
    hits : array_like of shape (12*nside**2,), optional
        Relative observation time per pixel (RING).  The noise standard
        deviation scales as ``1/sqrt(hits)``; pixels with zero (or missing)
        hits are unobserved and :func:`noise_map` sets them to UNSEEN.
    ell_knee : float, optional
        Knee multipole of the correlated noise (needs ``alpha``).
    alpha : float, optional
        Slope of the correlated noise: ``N_l = N_white (1 + (ell_knee/l)^alpha)``.

    Attributes
    ----------
    white_noise : float
        N_white in K^2 (see :func:`depth_to_white_noise`).
    nside : int or None
        nside of the hits map, if any.
    """

    depth_uk_arcmin: float
    hits: np.ndarray | None = None
    ell_knee: float | None = None
    alpha: float | None = None

    def __post_init__(self):
        object.__setattr__(self, "depth_uk_arcmin", check_positive(self.depth_uk_arcmin, "depth_uk_arcmin"))
        depth_to_white_noise(self.depth_uk_arcmin)  # refuses a depth whose noise power overflows
        if self.hits is not None:
            h = as_map(self.hits, "hits").copy()
            h[missing_pixels(h)] = 0.0
            if np.any(h < 0):
                raise InvalidInputError(f"The 'hits' map has negative values (first at pixel {int(np.argmax(h < 0))}).")
            if not np.any(h > 0):
                raise InvalidInputError("The 'hits' map is zero everywhere: no pixel is observed.")
            h.setflags(write=False)
            object.__setattr__(self, "hits", h)
        if (self.ell_knee is None) != (self.alpha is None):
            raise InvalidInputError("The 'ell_knee' and 'alpha' parameters must be given together (or neither).")
        if self.ell_knee is not None:
            object.__setattr__(self, "ell_knee", check_positive(self.ell_knee, "ell_knee"))
            object.__setattr__(self, "alpha", check_positive(self.alpha, "alpha"))

    @property
    def white_noise(self) -> float:
        return depth_to_white_noise(self.depth_uk_arcmin)

    @property
    def nside(self) -> int | None:
        return None if self.hits is None else nside_from_npix(self.hits.size, "hits")

    @cached_property
    def relative_sigma(self) -> np.ndarray | None:
        """Per-pixel noise standard deviation relative to a uniform map of the same depth.

        ``sqrt((1/hits) / mean_observed(1/hits))``, 0 where unobserved; None without hits.
        """
        if self.hits is None:
            return None
        h = self.hits
        seen = h > 0
        inv = np.zeros_like(h)
        inv[seen] = 1.0 / h[seen]
        inv /= inv[seen].mean()
        r = np.sqrt(inv)
        r.setflags(write=False)
        return r

    def __repr__(self):
        hits = "None" if self.hits is None else f"<hits map, nside {self.nside}>"
        return (
            f"NoiseModel(depth_uk_arcmin={self.depth_uk_arcmin!r}, hits={hits}, "
            f"ell_knee={self.ell_knee!r}, alpha={self.alpha!r})"
        )


def _check_model(model) -> NoiseModel:
    if not isinstance(model, NoiseModel):
        raise InvalidInputError(f"The 'model' parameter must be a cmbtools.simulate.NoiseModel. Got {model!r} instead.")
    return model


def noise_spectrum(model, lmax, nside=None) -> np.ndarray:
    """Expected noise power N_l in K^2 of a :class:`NoiseModel`, for ``l = 0 .. lmax``.

    ``N_l = N_white`` for white noise (with ``N_0 = N_white`` too), and
    ``N_l = N_white (1 + (ell_knee / l)^alpha)`` for ``l >= 1`` with ``N_0 = 0``
    when the model has a knee (the correlated part diverges at l = 0, and a
    monopole carries no information: convention of this package).  With a
    hits map this is the power of the observed region (see the module notes).

    Parameters
    ----------
    model : NoiseModel
    lmax : int
    nside : int, optional
        If given, checked against the hits map's nside and used to bound
        ``lmax <= 4*nside - 1``.
    """
    model = _check_model(model)
    if nside is not None:
        nside = _check_model_nside(model, nside)
    lmax = check_lmax(lmax, nside)
    nl = np.full(lmax + 1, model.white_noise)
    if model.ell_knee is not None:
        ell = np.arange(1, lmax + 1, dtype=np.float64)
        with np.errstate(over="ignore", invalid="ignore"):  # checked just below (0 * inf when N_white underflows)
            nl[1:] *= 1.0 + (model.ell_knee / ell) ** model.alpha
        nl[0] = 0.0
        if not np.all(np.isfinite(nl)):
            raise InvalidInputError(
                f"The noise model's correlated part N_white (ell_knee / l)^alpha overflows a double at l = 1 "
                f"(ell_knee = {model.ell_knee!r}, alpha = {model.alpha!r}); lower 'ell_knee' or 'alpha'."
            )
    return nl


def _check_model_nside(model, nside) -> int:
    nside = check_nside(nside)
    if model.nside is not None and model.nside != nside:
        from .exceptions import ResolutionMismatchError

        raise ResolutionMismatchError(
            f"The noise model's hits map has nside {model.nside} but nside {nside} was requested; "
            "change the resolution of the hits map first (cmbtools.maps.change_resolution).",
            model.nside,
            nside,
        )
    return nside


def noise_map(model, nside, *, rng=None, lmax=None, nthreads=None, force=False) -> np.ndarray:
    """Draw a noise map from a :class:`NoiseModel`.

    The white part is drawn pixel by pixel (standard deviation
    ``sqrt(N_white / pixel area)``), which has the flat power ``N_white`` at
    every multipole.  With a knee, a correlated Gaussian field of power
    ``N_white (ell_knee/l)^alpha`` (``l = 1 .. lmax``) is synthesized and added.
    With hits, the sum is multiplied by :attr:`NoiseModel.relative_sigma` and
    unobserved pixels are set to UNSEEN.

    Parameters
    ----------
    model : NoiseModel
    nside : int
        Resolution (must match the hits map).
    rng : Generator, SeedSequence, int or None, optional
    lmax : int, optional
        Largest multipole of the correlated part (default ``3*nside - 1``).
    nthreads : int, optional
        Threads for the transform of the correlated part.
    force : bool, default=False
        Go ahead (with a :class:`~cmbtools.exceptions.CmbtoolsWarning`) even
        when the memory estimate exceeds what the machine has available.

    Returns
    -------
    n : ndarray of float64, shape (12*nside**2,)
        Noise in K_CMB, RING.

    Raises
    ------
    MemoryLimitError
        If the noise map and its temporaries would not fit in memory
        (estimated before allocating; unless ``force``).
    """
    model = _check_model(model)
    nside = _check_model_nside(model, nside)
    lmax = 3 * nside - 1 if lmax is None else check_lmax(lmax, nside)
    _check_memory(_noise_bytes(model, nside, lmax), f"A noise map at nside {nside}", force)
    gen = resolve_rng(rng)
    npix = 12 * nside * nside
    sigma = math.sqrt(model.white_noise * npix / (4.0 * math.pi))
    n = gen.standard_normal(npix) * sigma
    if model.ell_knee is not None:
        red = noise_spectrum(model, lmax) - model.white_noise
        red[0] = 0.0
        alm = gaussian_alm(red, lmax, rng=gen)
        n += _sht.alm2map(alm, nside, lmax, nthreads=nthreads)
    if model.hits is not None:
        r = model.relative_sigma
        n *= r
        n[r == 0] = UNSEEN
    return n


def white_noise_map(nside, depth_uk_arcmin, *, rng=None, hits=None, force=False) -> np.ndarray:
    """White noise of a given depth in uK-arcmin (optionally shaped by a hits map), K_CMB, RING.

    Equivalent to ``noise_map(NoiseModel(depth_uk_arcmin, hits=hits), nside, rng=rng, force=force)``.
    """
    return noise_map(NoiseModel(depth_uk_arcmin, hits=hits), nside, rng=rng, force=force)
