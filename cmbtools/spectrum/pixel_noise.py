"""White instrument noise described pixel by pixel, for the analytic covariance.

:class:`PixelNoise` is a variance map (K^2 per pixel) with an optional
spectral shape (1/f noise); it enters the noise term of
:class:`~cmbtools.spectrum.GaussianCovariance` through the coupling kernel of
``Omega w^2 v`` (see :mod:`cmbtools.spectrum.covariance`).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools._core.checks import as_map, check_cl, check_positive, missing_pixels, nside_from_npix, resolve_nthreads
from cmbtools.exceptions import InvalidInputError, ResolutionMismatchError

__all__ = ["PixelNoise"]

_ARCMIN = math.pi / 180.0 / 60.0


@dataclasses.dataclass(frozen=True, eq=False)
class PixelNoise:
    """White instrument noise described pixel by pixel: its variance map.

    Parameters
    ----------
    variance : array_like of shape (12*nside**2,)
        Noise variance of every pixel, K^2 (0, UNSEEN or NaN where unobserved).
    shape : array_like of shape (n,), optional
        ``N_l / N_white`` for noise that is not white (a 1/f knee): the noise
        pseudo-covariance is scaled by ``sqrt(shape_l shape_l')``; ``None`` for
        white noise.  Values beyond its end are taken as its last value.
    description : str, default=''
        Recorded in the outputs.

    Examples
    --------
    >>> import numpy as np
    >>> from cmbtools.spectrum import PixelNoise
    >>> noise = PixelNoise.from_hits(np.ones(12 * 16**2), 30.0)
    >>> round(float(noise.white_noise) * 1e17, 3)    # (30 uK-arcmin)^2 in K^2 sr
    7.615
    """

    variance: np.ndarray
    shape: np.ndarray | None = None
    description: str = ""

    def __post_init__(self):
        v = as_map(self.variance, "variance").copy()
        v[missing_pixels(v)] = 0.0
        if np.any(v < 0):
            raise InvalidInputError(f"The noise 'variance' map has negative values (first at pixel {int(np.argmax(v < 0))}).")
        if not np.any(v > 0):
            raise InvalidInputError("The noise 'variance' map is zero everywhere.")
        v.setflags(write=False)
        object.__setattr__(self, "variance", v)
        if self.shape is not None:
            s = check_cl(self.shape, "shape")
            s = s.copy()
            s.setflags(write=False)
            object.__setattr__(self, "shape", s)
        object.__setattr__(self, "description", str(self.description))

    @property
    def nside(self) -> int:
        """HEALPix resolution of the variance map."""
        return nside_from_npix(self.variance.size, "variance")

    @property
    def white_noise(self) -> float:
        """Mean white-noise power ``N_white = Omega <v>`` over the observed pixels, K^2 sr."""
        v = self.variance
        return float(4.0 * math.pi / v.size * v[v > 0].mean())

    @classmethod
    def from_hits(cls, hits, depth_uk_arcmin) -> "PixelNoise":
        """White noise of a map depth (uK-arcmin) shaped by a hits map.

        The pixel standard deviation scales as ``1/sqrt(hits)`` and the depth is the
        root-mean-square over the observed pixels, as in
        :class:`cmbtools.simulate.NoiseModel`.

        Parameters
        ----------
        hits : array_like of shape (12*nside**2,)
            Relative observation time per pixel (0 where unobserved).
        depth_uk_arcmin : float
            Map depth in uK-arcmin.

        Returns
        -------
        PixelNoise
        """
        h = as_map(hits, "hits").copy()
        h[missing_pixels(h)] = 0.0
        if np.any(h < 0) or not np.any(h > 0):
            raise InvalidInputError("The 'hits' map must be >= 0 and positive somewhere.")
        depth = check_positive(depth_uk_arcmin, "depth_uk_arcmin")
        n_white = (depth * 1e-6 * _ARCMIN) ** 2
        seen = h > 0
        inv = np.zeros_like(h)
        inv[seen] = 1.0 / h[seen]
        inv /= inv[seen].mean()
        omega = 4.0 * math.pi / h.size
        return cls(n_white / omega * inv, None, f"{depth:g} uK-arcmin shaped by a hits map")

    @classmethod
    def uniform(cls, nside, depth_uk_arcmin) -> "PixelNoise":
        """White noise of the same depth (uK-arcmin) in every pixel of ``nside``.

        Parameters
        ----------
        nside : int
            HEALPix resolution.
        depth_uk_arcmin : float
            Map depth in uK-arcmin.

        Returns
        -------
        PixelNoise
        """
        depth = check_positive(depth_uk_arcmin, "depth_uk_arcmin")
        npix = 12 * int(nside) ** 2
        n_white = (depth * 1e-6 * _ARCMIN) ** 2
        return cls(np.full(npix, n_white * npix / (4.0 * math.pi)), None, f"{depth:g} uK-arcmin, uniform")

    @classmethod
    def from_model(cls, model, nside, lmax) -> "PixelNoise":
        """The variance map and spectral shape of a :class:`cmbtools.simulate.NoiseModel`.

        Parameters
        ----------
        model : NoiseModel
            Depth, optional hits map and optional 1/f knee.
        nside : int
            Resolution of the maps the noise is added to.
        lmax : int
            Largest multipole of the spectral shape.

        Returns
        -------
        PixelNoise
        """
        from cmbtools.simulate.noise import noise_spectrum

        nl = noise_spectrum(model, lmax, nside)
        shape = None if model.ell_knee is None else np.maximum(nl / model.white_noise, 0.0)
        npix = 12 * int(nside) ** 2
        base = model.white_noise * npix / (4.0 * math.pi)
        r = np.ones(npix) if model.hits is None else np.asarray(model.relative_sigma)
        # the correlated part is multiplied by the same relative sigma: the shape scales the whole term
        return cls(base * r**2, shape, repr(model))

    @classmethod
    def from_noise_maps(cls, maps, *, lmax=None, nthreads=None) -> "PixelNoise":
        """Estimate the variance map (and the spectral shape) from noise-only simulations.

        The variance of pixel p is the mean of ``n_p^2`` over the maps; the shape
        is the mean full-sky spectrum of the maps divided by their standard
        deviation map, over ``Omega`` (1 for white noise), on the observed pixels.

        Parameters
        ----------
        maps : sequence of ndarray of shape (12*nside**2,)
            At least two noise-only maps, K_CMB.
        lmax : int, optional
            Largest multipole of the shape (default ``3 nside - 1``).
        nthreads : int, optional
            Threads of the transforms.

        Returns
        -------
        PixelNoise
        """
        if isinstance(maps, np.ndarray) and maps.ndim == 1:
            raise InvalidInputError("The noise 'maps' must be a list of maps, not a single map.")
        arrays = [as_map(m, f"maps[{i}]") for i, m in enumerate(maps)]
        if len(arrays) < 2:
            raise InvalidInputError("Give at least two noise maps to estimate a variance map.")
        nside = nside_from_npix(arrays[0].size, "maps[0]")
        for i, a in enumerate(arrays):
            if a.size != arrays[0].size:
                raise ResolutionMismatchError(
                    f"The noise maps[{i}] has nside {nside_from_npix(a.size)} but maps[0] has nside {nside}.",
                    nside_from_npix(a.size), nside)
        seen = np.ones(arrays[0].size, bool)
        for a in arrays:
            seen &= ~missing_pixels(a)
        var = np.zeros(arrays[0].size)
        for a in arrays:
            var += np.where(seen, a, 0.0) ** 2
        var /= len(arrays)
        lmax = 3 * nside - 1 if lmax is None else int(lmax)
        sd = np.sqrt(var)
        ok = seen & (sd > 0)
        frac = ok.mean()
        shape = np.zeros(lmax + 1)
        nthreads = resolve_nthreads(nthreads)
        for a in arrays:
            z = np.zeros(a.size)
            z[ok] = a[ok] / sd[ok]
            shape += _sht.map_spectra([z], lmax, nthreads=nthreads)[0]
        shape /= len(arrays) * frac * (4.0 * math.pi / a.size)
        return cls(var, shape, f"estimated from {len(arrays)} noise maps")

    def shape_to(self, lmax) -> np.ndarray:
        """``N_l / N_white`` for ell = 0..lmax (ones for white noise).

        Parameters
        ----------
        lmax : int
            Largest multipole.

        Returns
        -------
        ndarray of shape (lmax+1,)
        """
        if self.shape is None:
            return np.ones(lmax + 1)
        s = np.empty(lmax + 1)
        n = min(lmax + 1, self.shape.size)
        s[:n] = self.shape[:n]
        s[n:] = self.shape[-1]
        return s
