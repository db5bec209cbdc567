"""Instrument noise: white, inhomogeneous (hits map) and correlated (1/f knee).

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

Random draws (part of the reproducibility contract, stated in
:mod:`cmbtools.simulate.random_streams`): :func:`noise_map` draws one set of
``12 nside^2`` standard normals from block streams for the white part (RING
order), then, only with a knee, the coefficients of the correlated part as
:func:`~cmbtools.simulate.gaussian_alm` does.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools._core.checks import (
    UNSEEN,
    as_map,
    check_lmax,
    check_nside,
    check_positive,
    missing_pixels,
    nside_from_npix,
    resolve_nthreads,
)
from cmbtools._core.memory import check_memory, estimate_noise_bytes
from cmbtools.exceptions import InvalidInputError
from cmbtools.simulate.random_streams import block_normals, blocks_of_pixels, resolve_rng
from cmbtools.simulate.skies import gaussian_alm

__all__ = ["depth_to_white_noise", "NoiseModel", "noise_map", "white_noise_map", "noise_spectrum"]

#: One arcminute in radians.
ARCMIN_IN_RAD = math.pi / (180.0 * 60.0)


def depth_to_white_noise(depth_uk_arcmin) -> float:
    """White-noise power N_white in K^2 of a map depth in uK-arcmin: ``(depth in K rad)^2``.

    Parameters
    ----------
    depth_uk_arcmin : float
        Map depth in uK-arcmin (> 0).

    Returns
    -------
    float
        N_white in K^2.
    """
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


def noise_spectrum(model, lmax, nside=None, *, weights=None) -> np.ndarray:
    """Expected noise power N_l in K^2 of a :class:`NoiseModel`, for ``l = 0 .. lmax``.

    ``N_l = N_white`` for white noise (with ``N_0 = N_white`` too), and
    ``N_l = N_white (1 + (ell_knee / l)^alpha)`` for ``l >= 1`` with ``N_0 = 0``
    when the model has a knee (the correlated part diverges at l = 0, and a
    monopole carries no information: convention of this package).  With a
    hits map this is the power of the observed region (see the module notes).

    Parameters
    ----------
    model : NoiseModel
        The noise.
    lmax : int
        Largest multipole.
    nside : int, optional
        If given, checked against the hits map's nside and used to bound
        ``lmax <= 4*nside - 1``.
    weights : ndarray of shape (12*nside**2,), optional
        The mask of a measurement.  With a hits map, the noise power that a
        MASTER estimator with this mask recovers (the noise bias it must
        subtract) is ``N_l sum(w^2 r^2) / sum(w^2)`` (``r`` the relative noise
        standard deviation of each pixel): the pseudo-spectrum of white pixel
        noise is ``Omega mean(w^2 sigma^2)`` at every l, exactly, on any grid
        (common practice).  On the demo survey's apodized mask this is 0.966 of
        the power with uniform weights.  The correlated part is scaled the same
        way (exact when ``w r`` varies slowly).

    Returns
    -------
    ndarray of shape (lmax+1,)
        N_l in K^2.
    """
    model = _check_model(model)
    if nside is not None:
        nside = _check_model_nside(model, nside)
    lmax = check_lmax(lmax, nside)
    scale = 1.0
    if weights is not None and model.hits is not None:
        w = np.asarray(weights, dtype=np.float64)
        r = np.asarray(model.relative_sigma, dtype=np.float64)
        if w.shape != r.shape:
            raise InvalidInputError(
                f"The 'weights' have {w.size} pixels but the noise model's hits map has {r.size}; give them at the "
                "same nside."
            )
        w2 = float(np.sum(w * w))
        if not w2 > 0:
            raise InvalidInputError("The 'weights' are zero everywhere.")
        scale = float(np.sum(w * w * r * r)) / w2
    nl = np.full(lmax + 1, model.white_noise * scale)
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
        from cmbtools.exceptions import ResolutionMismatchError

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
        The noise to draw.
    nside : int
        Resolution (must match the hits map).
    rng : Generator, SeedSequence, int or None, optional
        Random source; use :func:`simulation_rng` for sets of simulations.
    lmax : int, optional
        Largest multipole of the correlated part (default ``3*nside - 1``).
    nthreads : int, optional
        Threads for the random numbers and the transform of the correlated
        part (default: all cores); the noise does not depend on it.
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
    check_memory(_noise_bytes(model, nside, lmax), f"A noise map at nside {nside}", force=force)
    return _noise_map(model, nside, lmax, rng, nthreads)


def _noise_bytes(model, nside, lmax) -> int:
    """Peak bytes of :func:`noise_map` for ``model``."""
    return estimate_noise_bytes(
        nside, lmax, correlated=model.ell_knee is not None,
        hits_scaling=model.hits is not None and "relative_sigma" not in model.__dict__,
    )


def _noise_map(model, nside, lmax, rng, nthreads, rings=None) -> np.ndarray:
    """:func:`noise_map` on checked inputs; no memory check.

    ``rings`` (boolean over the rings): only the blocks of random numbers
    that hold pixels of those rings are drawn and the correlated part is
    synthesized on them only; their pixels get the values of the full map,
    the others 0 (UNSEEN where unobserved).
    """
    gen = resolve_rng(rng)
    npix = 12 * nside * nside
    sigma = math.sqrt(model.white_noise * npix / (4.0 * math.pi))
    r = model.relative_sigma if model.ell_knee is None else None  # with a knee: applied to the sum

    def scale(start, stop, values):  # while the block is in the cache
        values *= sigma
        if r is not None:
            values *= r[start:stop]

    n, blocks = None, None
    if rings is not None:
        blocks = blocks_of_pixels(*_sht.ring_pixel_ranges(nside, rings), npix)
        n = np.zeros(npix)
    n = block_normals(gen, npix, out=n, transform=scale, nthreads=resolve_nthreads(nthreads), blocks=blocks)
    if model.ell_knee is not None:
        red = noise_spectrum(model, lmax) - model.white_noise
        red[0] = 0.0
        alm = gaussian_alm(red, lmax, rng=gen, nthreads=nthreads)
        n += _sht.alm2map(alm, nside, lmax, nthreads=nthreads, rings=rings)
        if model.hits is not None:
            n *= model.relative_sigma
    if model.hits is not None:
        n[model.relative_sigma == 0] = UNSEEN
    return n


def white_noise_map(nside, depth_uk_arcmin, *, rng=None, hits=None, force=False) -> np.ndarray:
    """White noise of a given depth in uK-arcmin (optionally shaped by a hits map), K_CMB, RING.

    Equivalent to ``noise_map(NoiseModel(depth_uk_arcmin, hits=hits), nside, rng=rng, force=force)``.

    Parameters
    ----------
    nside : int
        Resolution (must match the hits map).
    depth_uk_arcmin : float
        Map depth in uK-arcmin (> 0).
    rng : Generator, SeedSequence, int or None, optional
        Random source; use :func:`simulation_rng` for sets of simulations.
    hits : array_like of shape (12*nside**2,), optional
        Hits map shaping the per-pixel depth (see :class:`NoiseModel`).
    force : bool, default=False
        Go ahead (with a warning) even when the memory estimate exceeds what
        the machine has available.

    Returns
    -------
    ndarray of float64, shape (12*nside**2,)
        Noise in K_CMB, RING.
    """
    return noise_map(NoiseModel(depth_uk_arcmin, hits=hits), nside, rng=rng, force=force)
