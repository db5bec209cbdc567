"""Bandpower covariance: the Gaussian (narrow-kernel) approximation and the simulated one.

Analytic covariance
-------------------
The masked map of a survey is ``w_x (s + n_x)``: the sky ``s`` (seen through
beam ``B_x`` and the pixel window) and white noise of per-pixel variance
``v_x`` (K^2).  Its pseudo-coefficients have the covariance

    <a~^x_lm a~^y*_l'm'> = sqrt(c^xy_l c^xy_l') K[w_x w_y]_lm,l'm' + delta_xy K[Omega w_x^2 v_x]_lm,l'm'

where ``K[X]`` is the coupling kernel of the weight map ``X`` and ``Omega``
the pixel area.  The noise term is exact for white noise (however its
variance varies across the sky); the signal term is the narrow-kernel
approximation of Efstathiou (2004, MNRAS 349, 603) with the improvement of
Garcia-Garcia, Alonso & Bellini (2019, JCAP 10, 056): ``c^xy_l`` is the
*coupled* (pseudo) signal spectrum divided by the mean of ``w_x w_y``, which
carries the beam, the pixel window and the leakage of the mask into it.  For
Gaussian fields the pseudo-spectra ``C~^ab_l`` then have the covariance

    Cov(C~^ab_l, C~^cd_l') = [S^ac S^bd + S^ad S^bc]_ll'

with each product of two kernels summed over m and m' into a coupling matrix
of the cross-spectrum of the two weight maps (``M_ll' / (2l'+1)``, the raw
form of :func:`cmbtools.spectrum.coupling.coupling_matrix`).  The bandpowers
are linear in the pseudo-spectrum, ``bp = R C~`` (binning and the inverse of the
binned coupling), so their covariance is ``R Cov R^T``.

All the coupling matrices a covariance needs (one for an auto-spectrum without
noise, three with noise, five for the cross-spectrum of two noisy maps) come
from one call of ducc0's kernel, which shares the Wigner 3j symbols among
them: the cost is about that of one or two coupling matrices.

Simulated covariance
--------------------
:func:`simulated_covariance` turns the bandpowers of a Monte Carlo run into a
covariance file; its inverse carries the Hartlap et al. (2007, A&A 464, 399,
eq. 17) factor ``(n - p - 2) / (n - 1)`` for ``n`` simulations and ``p`` bins.

Files
-----
:func:`write_covariance` / :func:`read_covariance` (``.npz`` without pickle,
or FITS); layout in :func:`write_covariance`.
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools._core.checks import as_map, check_cl, check_positive, missing_pixels, nside_from_npix, resolve_nthreads
from cmbtools._core.files import atomic_output, check_input_file, check_output_path
from cmbtools._version import __version__
from cmbtools.exceptions import InputFileError, InvalidInputError, ResolutionMismatchError

__all__ = [
    "PixelNoise",
    "GaussianCovariance",
    "BandpowerCovariance",
    "simulated_covariance",
    "hartlap_factor",
    "write_covariance",
    "read_covariance",
]

_ARCMIN = math.pi / 180.0 / 60.0
_FORMAT = "cmbtools-bandpower-covariance-1"


# ----------------------------------------------------------------------------- noise


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


# ----------------------------------------------------------------------------- coupled spectra


def _legendre_nodes(n):
    import ducc0

    theta = ducc0.misc.GL_thetas(n)
    return np.cos(theta), ducc0.misc.GL_weights(n, 1) / (2.0 * math.pi)


def _legendre_sum(coef, x):
    """``sum_L coef_L P_L(x)`` by the Clenshaw recurrence."""
    b1 = np.zeros_like(x)
    b2 = np.zeros_like(x)
    for ell in range(coef.size - 1, 0, -1):
        b0 = coef[ell] + (2 * ell + 1) / (ell + 1) * x * b1 - (ell + 1) / (ell + 2) * b2
        b2, b1 = b1, b0
    return coef[0] + x * b1 - 0.5 * b2


def _legendre_project(f, x, wts, lmax):
    """``int P_l(x) f(x) dx`` for l = 0..lmax (Gauss-Legendre nodes ``x``, weights ``wts``)."""
    out = np.empty(lmax + 1)
    g = f * wts
    p0, p1 = np.ones_like(x), x.copy()
    out[0] = g.sum()
    if lmax >= 1:
        out[1] = g @ p1
    for ell in range(2, lmax + 1):
        p0, p1 = p1, ((2 * ell - 1) * x * p1 - (ell - 1) * p0) / ell
        out[ell] = g @ p1
    return out


def coupled_spectrum(mask_cl, cl, lmax) -> np.ndarray:
    """``(M C)_l`` for l = 0..lmax: the pseudo-spectrum expected from ``cl`` under a mask of spectrum ``mask_cl``.

    ``M_lL = (2L+1)/(4 pi) sum_L'' (2L''+1) W_L'' (l L L''; 0 0 0)^2`` (Hivon et
    al. 2002, ApJ 567, 2, eq. A31), evaluated as ``2 pi int P_l xi_W xi_C dx``
    with the correlation functions of the mask and of the spectrum, exactly,
    on Gauss-Legendre nodes (the 3j identity ``int P_l P_L P_L'' = 2 (3j)^2``).

    Parameters
    ----------
    mask_cl : ndarray
        (Cross-)spectrum of the weight maps from ell 0 (at least to ``lmax + cl.size - 1``).
    cl : ndarray
        Spectrum from ell 0 (its length sets the largest multipole used).
    lmax : int
        Largest multipole of the result.

    Returns
    -------
    ndarray of shape (lmax+1,)
    """
    ls = cl.size - 1
    lw = min(mask_cl.size - 1, lmax + ls)
    n = (lmax + ls + lw) // 2 + 2
    x, wts = _legendre_nodes(n)
    ell_w = np.arange(lw + 1)
    xi_w = _legendre_sum((2 * ell_w + 1) / (4 * math.pi) * mask_cl[: lw + 1], x)
    ell_c = np.arange(ls + 1)
    xi_c = _legendre_sum((2 * ell_c + 1) / (4 * math.pi) * cl, x)
    return 2.0 * math.pi * _legendre_project(xi_w * xi_c, x, wts, lmax)


# ----------------------------------------------------------------------------- the analytic covariance


def _raw_couplings(spectra, lmax, nthreads):
    """``M_ll'/(2l'+1)`` of every spectrum, from one call of the kernel (the 3j symbols are shared)."""
    import ducc0

    need = 2 * lmax + 1
    spec = np.zeros((len(spectra), need))
    for i, w in enumerate(spectra):
        n = min(need, w.size)
        spec[i, :n] = w[:n]
    out = np.empty((len(spectra), lmax + 1, lmax + 1))
    ducc0.misc.experimental.coupling_matrix_rect(spec, (0,) * len(spectra), out, nthreads=nthreads)
    return out


#: Largest total size of the weight maps' coefficients held at once (above it, spectra are made pair by pair).
_COEFFICIENT_BUDGET = 2 * 2**30


def _pair_spectra(fields, pairs, lw, nthreads, rings):
    """Cross-spectra up to ``lw`` of the named weight maps, for every pair; each map transformed once when it fits."""
    names = sorted({n for p in pairs for n in p})
    if 16 * _sht.alm_size(lw) * len(names) <= _COEFFICIENT_BUDGET:
        alms = {n: _sht.map2alm(fields[n], lw, nthreads=nthreads, rings=rings) for n in names}
        return {p: _sht.alm2cl(alms[p[0]], alms[p[1]], lmax=lw) for p in pairs}
    out = {}
    for p in pairs:  # lean on memory: the split transforms of map_spectra, two maps at a time
        if p[0] == p[1]:
            out[p] = _sht.map_spectra([fields[p[0]]], lw, nthreads=nthreads, rings=rings)[0]
        else:
            out[p] = _sht.map_spectra([fields[p[0]], fields[p[1]]], lw, nthreads=nthreads, rings=rings)[2]
    return out


def _block_sum(matrix, starts):
    return np.add.reduceat(np.add.reduceat(matrix, starts, axis=0), starts, axis=1)


class GaussianCovariance:
    """The analytic covariance of the bandpowers of a :class:`SpectrumEstimator`, built once.

    The constructor computes the coupling matrices of the products of masks and
    noise-weighted masks that the covariance needs (see the module notes);
    :meth:`covariance` then gives the covariance for any signal spectrum
    (a theory ``C_l`` or measured bandpowers) at the cost of a few matrix sums.

    Parameters
    ----------
    estimator : SpectrumEstimator
        The estimator whose bandpowers are described (its masks, beams, pixel
        window, binning and binned inverse coupling).
    noise, noise2 : PixelNoise, optional
        Noise of map 1 and of map 2 (``noise2`` only for cross-spectra; the two
        noises are independent).  ``None``: no noise term.
    cross : bool, default=False
        Describe the cross-spectrum map 1 x map 2 (else the auto-spectrum of map 1).
    beam, beam2 : float or array_like, optional
        Gaussian FWHM (arcmin) or table ``B_l`` of map 1 / map 2 reaching above
        lmax: the signal model then extends to ``sky_lmax`` (the power above
        lmax that the pixels alias into the reported bins).  Without them the
        sky is taken as band-limited at lmax.
    sky_lmax : int, optional
        Band limit of the signal model with ``beam`` (default ``4 nside - 1``).
    nthreads : int, optional
        Threads of the transforms and of the coupling kernel.

    Attributes
    ----------
    n_bins : int
        Number of bins.
    windows : ndarray of shape (n_bins, lmax+1)
        The bandpower window functions of the described spectrum.

    Examples
    --------
    >>> import numpy as np
    >>> from cmbtools.spectrum import Binning, SpectrumEstimator, GaussianCovariance
    >>> bins = Binning.uniform(2, 47, 8, weighting="cl")
    >>> est = SpectrumEstimator(np.ones(12 * 16**2), bins, pixel_window=False, remove_monopole_dipole=False,
    ...                         nthreads=1)
    >>> cov = GaussianCovariance(est, nthreads=1).covariance(np.full(48, 1e-10))
    >>> ell = np.arange(2, 10)
    >>> full_sky = np.sum(2e-20 / (2 * ell + 1)) / 8**2   # mean of 8 C_l, each of variance 2 C^2/(2l+1)
    >>> round(float(cov.matrix[0, 0] / full_sky), 3)
    1.0
    """

    def __init__(self, estimator, *, noise=None, noise2=None, cross=False, beam=None, beam2=None, sky_lmax=None,
                 nthreads=None):
        for attr in ("mask", "mask2", "binning", "lmax", "nside"):
            if not hasattr(estimator, attr):
                raise InvalidInputError(
                    f"The 'estimator' parameter must be a cmbtools.spectrum.SpectrumEstimator. Got {type(estimator).__name__} instead."
                )
        cross = bool(cross)
        if noise2 is not None and not cross:
            raise InvalidInputError("The 'noise2' parameter applies to cross-spectra only (cross=True).")
        for name, nz in (("noise", noise), ("noise2", noise2)):
            if nz is not None and not isinstance(nz, PixelNoise):
                raise InvalidInputError(
                    f"The {name!r} parameter must be a cmbtools.spectrum.PixelNoise or None. Got {type(nz).__name__} instead."
                )
            if nz is not None and nz.variance.size != estimator.mask.size:
                raise ResolutionMismatchError(
                    f"The {name!r} variance map has nside {nz.nside} but the estimator's mask has nside {estimator.nside}.",
                    nz.nside, estimator.nside)
        self._estimator = estimator
        self._cross = cross
        self._noise = {"1": noise, "2": noise2 if cross else None}
        nthreads = resolve_nthreads(nthreads)
        self._nthreads = nthreads
        lmax = int(estimator.lmax)
        self._lmax = lmax
        w1 = np.asarray(estimator.mask, dtype=np.float64)
        w2 = np.asarray(estimator.mask2, dtype=np.float64) if cross else w1
        self._masks = {"1": w1, "2": w2}
        omega = 4.0 * math.pi / w1.size
        for x, nz in self._noise.items():
            if nz is not None:
                uncovered = int(np.count_nonzero((self._masks[x] > 0) & ~(nz.variance > 0)))
                if uncovered:
                    raise InvalidInputError(
                        f"The mask of map {x} is non-zero in {uncovered} pixels where the noise variance map is zero "
                        "(unobserved); zero the mask there.")
        # the weight maps of the pseudo-covariance and the pairs of them it needs
        fields = {}
        terms = []  # (signal pair or None, signal pair or None, field a, field b) of each product of kernels
        pairs = (("1", "1"), ("1", "1")) if not cross else (("1", "2"), ("1", "2"))
        (a, b), (c, d) = pairs

        def s_field(x, y):
            key = "S" + "".join(sorted(x + y))
            if key not in fields:
                fields[key] = self._masks[x] * self._masks[y]
            return key

        def n_field(x):
            key = "N" + x
            if key not in fields:
                fields[key] = omega * self._masks[x] ** 2 * self._noise[x].variance
            return key

        for (x1, y1), (x2, y2) in (((a, c), (b, d)), ((a, d), (b, c))):
            parts1 = [(("S", x1, y1), s_field(x1, y1))]
            if x1 == y1 and self._noise[x1] is not None:
                parts1.append((("N", x1, x1), n_field(x1)))
            parts2 = [(("S", x2, y2), s_field(x2, y2))]
            if x2 == y2 and self._noise[x2] is not None:
                parts2.append((("N", x2, x2), n_field(x2)))
            for k1, f1 in parts1:
                for k2, f2 in parts2:
                    terms.append((k1, k2, tuple(sorted((f1, f2)))))
        wanted = sorted({t[2] for t in terms})
        rings = _sht.occupied_rings(w1) | _sht.occupied_rings(w2)
        spectra = _pair_spectra(fields, wanted, 2 * lmax, nthreads, rings)
        mats = _raw_couplings([spectra[p] for p in wanted], lmax, nthreads)
        self._mats = {p: mats[i] for i, p in enumerate(wanted)}
        self._terms = terms
        # the band limit of the signal model and the factors (beam, pixel window, transfer) up to it
        lsky = lmax
        if beam is not None:
            lsky = 4 * int(estimator.nside) - 1 if sky_lmax is None else max(lmax, int(sky_lmax))
        self._lsky = lsky
        self._sky_factors = self._factors_to(estimator, cross, beam, beam2, lsky)
        # the spectra of the masks for the coupled signal spectra (iNKA)
        if cross:  # one call: both masks' spectra and their cross-spectrum
            w11, w22, w12 = _sht.map_spectra([w1, w2], lmax + lsky, nthreads=nthreads, rings=rings)
            self._mask_cl = {("1", "1"): w11, ("2", "2"): w22, ("1", "2"): w12}
        else:
            self._mask_cl = {("1", "1"): _sht.map_spectra([w1], lmax + lsky, nthreads=nthreads, rings=rings)[0]}
        self._mean_w = {k: float(np.mean(self._masks[k[0]] * self._masks[k[1]])) for k in self._mask_cl}
        # the linear operator pseudo-spectrum -> bandpowers (C_l units)
        pm, f, ainv = estimator._pair(cross)
        binning = estimator.binning
        conv = binning.dl_factor if binning.weighting == "dl" else np.ones(binning.n_bins)
        self._ainv = ainv / conv[:, None]
        self._p = binning.averaging_weights(lmax)
        self._starts = binning.ell_min
        self.windows = estimator._windows(cross)
        self.n_bins = int(binning.n_bins)

    def noise_bandpowers(self) -> np.ndarray:
        """Expected noise bias of the auto-spectrum's ``cl`` bandpowers, K^2 (zeros for a cross-spectrum).

        For white noise of variance ``v_p`` the pseudo-spectrum of the masked
        noise is exactly ``Omega mean(w^2 v)`` at every multipole (times the
        noise's spectral shape), however the variance varies across the sky.

        Returns
        -------
        ndarray of shape (n_bins,)
        """
        nz = self._noise["1"]
        if self._cross or nz is None:
            return np.zeros(self.n_bins)
        w = self._masks["1"]
        level = 4.0 * math.pi / w.size * float(np.mean(w**2 * nz.variance))
        pseudo = level * nz.shape_to(self._lmax)
        return self._ainv @ np.add.reduceat(self._p * pseudo, self._starts)

    @staticmethod
    def _factors_to(estimator, cross, beam, beam2, lsky):
        """``B_x B_y p^2 T`` of each pair of maps up to ``lsky`` (the estimator's own up to lmax)."""
        lmax = int(estimator.lmax)
        own = {
            ("1", "1"): np.asarray(estimator._f1),
            ("2", "2"): np.asarray(estimator._f2) if cross else np.asarray(estimator._f1),
            ("1", "2"): np.asarray(estimator._f12),
        }
        if lsky == lmax:
            return own
        from cmbtools.spectrum.beams import gaussian_beam
        from cmbtools.spectrum.pixel_windows import pixel_window

        def table(b, name):
            if np.ndim(b) == 0:
                return gaussian_beam(check_positive(b, name, allow_zero=True), lsky)
            return check_cl(b, name, lmax=lsky, allow_negative=True)[: lsky + 1]

        b1 = table(beam, "beam")
        b2 = b1 if beam2 is None else table(beam2, "beam2")
        pw = np.asarray(estimator.pixel_window)
        p2 = np.ones(lsky + 1)
        if not np.all(pw == 1.0):
            p2 = np.asarray(pixel_window(int(estimator.nside), lsky), dtype=np.float64)[: lsky + 1] ** 2
        out = {("1", "1"): b1 * b1 * p2, ("2", "2"): (b2 * b2 if cross else b1 * b1) * p2, ("1", "2"): b1 * b2 * p2}
        for k in out:  # the estimator's own factors (with its transfer functions) up to lmax
            out[k][: lmax + 1] = own[k]
            out[k][lmax + 1:] *= own[k][lmax] / out[k][lmax] if out[k][lmax] > 0 else 1.0
        return out

    # ------------------------------------------------------------------ signal models
    def _signal_cl(self, spectrum):
        """Sky spectrum C_l (l = 0..lmax) from a theory array or from measured bandpowers."""
        lmax = self._lmax
        if hasattr(spectrum, "cl") and hasattr(spectrum, "ell_eff"):
            # measured bandpowers: D_l linear between the bin centres, constant beyond the ends
            ell = np.arange(lmax + 1, dtype=np.float64)
            dl = np.asarray(spectrum.cl) * spectrum.ell_eff * (spectrum.ell_eff + 1) / (2 * math.pi)
            d = np.interp(ell, spectrum.ell_eff, np.clip(dl, 0.0, None))
            cl = np.zeros(lmax + 1)
            cl[1:] = d[1:] * 2 * math.pi / (ell[1:] * (ell[1:] + 1))
            return cl, "measured bandpowers"
        cl = check_cl(spectrum, "spectrum", lmax=lmax)[: self._lsky + 1].copy()
        if self._estimator.remove_monopole_dipole:
            cl[:2] = 0.0
        return cl, "theory spectrum"

    def pseudo_covariance(self, spectrum) -> np.ndarray:
        """Covariance of the pseudo-spectrum ``C~_l`` (l = 0..lmax) for a sky spectrum, K^4.

        Parameters
        ----------
        spectrum : array_like of shape (>= lmax+1,) or Bandpowers
            The sky ``C_l`` (K^2, before beam and pixel window), or measured
            bandpowers (``cl`` column), interpolated in ``D_l`` between bins.

        Returns
        -------
        ndarray of shape (lmax+1, lmax+1)
        """
        cl, _ = self._signal_cl(spectrum)
        lmax = self._lmax
        c = {}
        for key, wcl in self._mask_cl.items():
            f = self._sky_factors[key][: cl.size]
            c[key] = np.clip(coupled_spectrum(wcl, f * cl, lmax) / self._mean_w[key], 0.0, None)
        shapes = {x: (None if nz is None else nz.shape_to(lmax)) for x, nz in self._noise.items()}

        def amp(k):
            kind, x, y = k
            if kind == "S":
                return np.sqrt(c[tuple(sorted((x, y)))])
            return np.sqrt(shapes[x])

        cov = np.zeros((lmax + 1, lmax + 1))
        for k1, k2, p in self._terms:
            u = amp(k1) * amp(k2)
            cov += u[:, None] * self._mats[p] * u[None, :]
        return 0.5 * (cov + cov.T)

    def covariance(self, spectrum) -> "BandpowerCovariance":
        """The covariance of the bandpowers (``cl`` column, K^4) for a sky spectrum.

        Parameters
        ----------
        spectrum : array_like of shape (>= lmax+1,) or Bandpowers
            The sky ``C_l`` (K^2, before beam and pixel window), e.g. a theory
            spectrum (used up to the signal model's band limit), or measured bandpowers (their ``D_l`` interpolated
            linearly between bin centres).

        Returns
        -------
        BandpowerCovariance
        """
        _, source = self._signal_cl(spectrum)
        pc = self.pseudo_covariance(spectrum)
        p = self._p
        binned = _block_sum(pc * p[:, None] * p[None, :], self._starts)
        cov = self._ainv @ binned @ self._ainv.T
        cov = 0.5 * (cov + cov.T)
        est = self._estimator
        b = est.binning
        noise = [nz.description for nz in self._noise.values() if nz is not None]
        settings = {
            "method": "Gaussian, improved narrow-kernel approximation with noise-weighted couplings",
            "signal_model": source,
            "spectrum": "cross" if self._cross else "auto",
            "noise": "; ".join(noise) if noise else "none",
            "nside": int(est.nside),
            "lmax": int(est.lmax),
            "estimator_key": getattr(est, "cache_key", ""),
        }
        return BandpowerCovariance(b.ell_min, b.ell_max, b.ell_eff, cov, self.windows, kind="gaussian",
                                   n_sims=0, settings=settings)


# ----------------------------------------------------------------------------- the covariance object and files


def hartlap_factor(n_sims, n_bins) -> float:
    """``(n - p - 2) / (n - 1)``, the factor that debiases the inverse of a simulated covariance.

    Hartlap, Simon & Schneider (2007, A&A 464, 399, eq. 17).

    Parameters
    ----------
    n_sims : int
        Number of simulations.
    n_bins : int
        Number of bins (the dimension of the covariance).

    Returns
    -------
    float
    """
    n, p = int(n_sims), int(n_bins)
    if n < p + 3:
        raise InvalidInputError(
            f"A simulated covariance of {p} bins needs at least {p + 3} simulations to be inverted. Got {n} instead."
        )
    return (n - p - 2) / (n - 1)


@dataclasses.dataclass(frozen=True, eq=False)
class BandpowerCovariance:
    """A bandpower covariance with its bins and window functions (what the covariance files hold).

    Parameters
    ----------
    ell_min, ell_max : array_like of int, shape (n_bins,)
        Bin limits (inclusive).
    ell_eff : array_like of shape (n_bins,)
        Effective multipole of each bin.
    matrix : array_like of shape (n_bins, n_bins)
        Covariance of the ``cl`` bandpowers, K^4.
    windows : array_like of shape (n_bins, lmax+1), optional
        Bandpower window functions ``E[cl] = windows @ C_l``.
    kind : {'gaussian', 'simulation', 'knox'}, default='gaussian'
        How it was obtained.
    n_sims : int, default=0
        Number of simulations of a simulated covariance.
    settings : dict, optional
        Recorded settings (str or number values).
    """

    ell_min: np.ndarray
    ell_max: np.ndarray
    ell_eff: np.ndarray
    matrix: np.ndarray
    windows: np.ndarray | None = None
    kind: str = "gaussian"
    n_sims: int = 0
    settings: dict = dataclasses.field(default_factory=dict)

    def __post_init__(self):
        lo = np.array(self.ell_min, dtype=np.int64)
        nb = lo.size
        hi = np.array(self.ell_max, dtype=np.int64)
        eff = np.array(self.ell_eff, dtype=np.float64)
        m = np.array(self.matrix, dtype=np.float64)
        if lo.ndim != 1 or nb == 0 or hi.shape != (nb,) or eff.shape != (nb,):
            raise InvalidInputError("The bins of a covariance must be three 1-d arrays of the same length.")
        if m.shape != (nb, nb) or not np.all(np.isfinite(m)):
            raise InvalidInputError(f"The covariance matrix must be a finite ({nb}, {nb}) array. Got shape {m.shape} instead.")
        if not np.allclose(m, m.T, rtol=1e-8, atol=0.0):
            raise InvalidInputError("The covariance matrix is not symmetric.")
        if np.any(np.diag(m) < 0):
            raise InvalidInputError("The covariance matrix has negative variances on its diagonal.")
        if self.kind not in ("gaussian", "simulation", "knox"):
            raise InvalidInputError(f"The covariance 'kind' must be 'gaussian', 'simulation' or 'knox'. Got {self.kind!r} instead.")
        for name, arr in (("ell_min", lo), ("ell_max", hi), ("ell_eff", eff), ("matrix", m)):
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)
        if self.windows is not None:
            w = np.array(self.windows, dtype=np.float64)
            if w.ndim != 2 or w.shape[0] != nb:
                raise InvalidInputError(f"The window functions must have shape ({nb}, lmax+1). Got {w.shape} instead.")
            w.setflags(write=False)
            object.__setattr__(self, "windows", w)
        object.__setattr__(self, "n_sims", int(self.n_sims))
        object.__setattr__(self, "settings", {str(k): v for k, v in dict(self.settings).items()})

    @property
    def n_bins(self) -> int:
        """Number of bins."""
        return int(self.ell_min.size)

    @property
    def errors(self) -> np.ndarray:
        """Square roots of the diagonal: the error bars of the ``cl`` bandpowers, K^2."""
        return np.sqrt(np.diag(self.matrix))

    @property
    def correlation(self) -> np.ndarray:
        """Correlation coefficients ``C_ij / sqrt(C_ii C_jj)``."""
        e = self.errors
        with np.errstate(invalid="ignore", divide="ignore"):
            return self.matrix / np.outer(e, e)

    def inverse(self) -> np.ndarray:
        """The inverse for a likelihood; a simulated covariance is debiased with :func:`hartlap_factor`.

        Returns
        -------
        ndarray of shape (n_bins, n_bins)
        """
        inv = np.linalg.inv(self.matrix)
        if self.kind == "simulation":
            inv *= hartlap_factor(self.n_sims, self.n_bins)
        return 0.5 * (inv + inv.T)

    def matches(self, binning) -> bool:
        """Whether the covariance has the bins of ``binning`` (a Binning or Bandpowers).

        Parameters
        ----------
        binning : Binning or Bandpowers
            Anything with ``ell_min`` and ``ell_max``.

        Returns
        -------
        bool
        """
        return (np.array_equal(np.asarray(binning.ell_min), self.ell_min)
                and np.array_equal(np.asarray(binning.ell_max), self.ell_max))

    def write(self, path, *, overwrite=False) -> Path:
        """Write to ``.npz`` or ``.fits`` (see :func:`write_covariance`).

        Parameters
        ----------
        path : str or path-like
            Output file, ``.npz`` or ``.fits``.
        overwrite : bool, default=False
            Replace an existing file.

        Returns
        -------
        Path
        """
        return write_covariance(path, self, overwrite=overwrite)


def simulated_covariance(samples, *, ell_min, ell_max, ell_eff, windows=None, settings=None) -> BandpowerCovariance:
    """The sample covariance (``ddof=1``) of simulated bandpowers.

    Its :meth:`BandpowerCovariance.inverse` applies the Hartlap et al. (2007)
    factor.

    Parameters
    ----------
    samples : array_like of shape (n_sims, n_bins)
        ``cl`` bandpowers of every simulation, K^2.
    ell_min, ell_max, ell_eff : array_like of shape (n_bins,)
        The bins.
    windows : array_like of shape (n_bins, lmax+1), optional
        Bandpower window functions to store with it.
    settings : dict, optional
        Settings to record.

    Returns
    -------
    BandpowerCovariance
    """
    x = np.asarray(samples, dtype=np.float64)
    if x.ndim != 2 or x.shape[0] < 2:
        raise InvalidInputError(f"The 'samples' must have shape (n_sims, n_bins) with n_sims >= 2. Got {x.shape} instead.")
    cov = np.atleast_2d(np.cov(x, rowvar=False, ddof=1))
    return BandpowerCovariance(ell_min, ell_max, ell_eff, 0.5 * (cov + cov.T), windows, kind="simulation",
                               n_sims=x.shape[0], settings=dict(settings or {}))


def write_covariance(path, covariance, *, overwrite=False) -> Path:
    """Write a :class:`BandpowerCovariance` to ``.npz`` (no pickle) or ``.fits``, atomically.

    Layout (both formats; C_l bandpowers, K^4 for the matrix):

    * ``.npz``: arrays ``ell_min``, ``ell_max``, ``ell_eff`` (n_bins,),
      ``covariance`` (n_bins, n_bins), ``windows`` (n_bins, lmax+1, present when
      known) and ``settings``, a JSON string with ``format``, ``software``,
      ``kind`` ('gaussian', 'simulation' or 'knox'), ``n_sims``, ``unit``
      ('K^4') and the recorded settings.
    * ``.fits``: primary header with ``CMBFMT``, ``KIND``, ``NSIMS``, ``BUNIT``
      and the settings as ``HIERARCH`` cards; extension ``BINS`` (table
      ``ELL_MIN``, ``ELL_MAX``, ``ELL_EFF``), image ``COVARIANCE`` and image
      ``WINDOWS`` (rows = bins, columns = ell from 0).

    Parameters
    ----------
    path : str or path-like
        ``.npz`` or ``.fits`` file.
    covariance : BandpowerCovariance
        What to write.
    overwrite : bool, default=False
        Replace an existing file.

    Returns
    -------
    Path
    """
    out = check_output_path(path, overwrite=overwrite)
    suffix = out.suffix.lower()
    if suffix not in (".npz", ".fits"):
        raise InvalidInputError(f"A covariance file must end in .npz or .fits. Got {str(path)!r} instead.")
    c = covariance
    meta = {"format": _FORMAT, "software": f"cmbtools {__version__}", "kind": c.kind, "n_sims": c.n_sims,
            "unit": "K^4", **c.settings}
    if suffix == ".npz":
        arrays = {"ell_min": c.ell_min, "ell_max": c.ell_max, "ell_eff": c.ell_eff, "covariance": c.matrix}
        if c.windows is not None:
            arrays["windows"] = c.windows
        with atomic_output(out, overwrite=overwrite, suffix=".npz") as tmp:
            with open(tmp, "wb") as fh:
                np.savez(fh, settings=np.array(json.dumps(meta, sort_keys=True)), **arrays)
        return out
    from astropy.io import fits

    primary = fits.PrimaryHDU()
    primary.header["CMBFMT"] = _FORMAT
    primary.header["KIND"] = c.kind
    primary.header["NSIMS"] = c.n_sims
    primary.header["BUNIT"] = "K^4"
    for k, v in c.settings.items():
        text = v if isinstance(v, (int, float)) else " ".join(str(v).splitlines())[:60]
        primary.header[f"HIERARCH {k.upper()}"[:60]] = text
    bins = fits.BinTableHDU.from_columns([
        fits.Column(name="ELL_MIN", format="K", array=c.ell_min),
        fits.Column(name="ELL_MAX", format="K", array=c.ell_max),
        fits.Column(name="ELL_EFF", format="D", array=c.ell_eff),
    ], name="BINS")
    hdus = [primary, bins, fits.ImageHDU(np.asarray(c.matrix), name="COVARIANCE")]
    if c.windows is not None:
        hdus.append(fits.ImageHDU(np.asarray(c.windows), name="WINDOWS"))
    with atomic_output(out, overwrite=overwrite, suffix=".fits") as tmp:
        fits.HDUList(hdus).writeto(tmp)
    return out


def read_covariance(path) -> BandpowerCovariance:
    """Read a covariance file written by :func:`write_covariance` (``.npz`` or ``.fits``).

    Parameters
    ----------
    path : str or path-like
        The file.

    Returns
    -------
    BandpowerCovariance

    Raises
    ------
    InputFileError
        If the file is missing, unreadable or not a cmbtools covariance file.
    """
    p = check_input_file(path)
    try:
        if p.suffix.lower() == ".npz":
            with open(p, "rb") as fh, np.load(fh, allow_pickle=False) as z:
                meta = json.loads(str(z["settings"][()]))
                if meta.get("format") != _FORMAT:
                    raise InputFileError(p, "not a cmbtools covariance file")
                windows = z["windows"] if "windows" in z.files else None
                arrays = (z["ell_min"], z["ell_max"], z["ell_eff"], z["covariance"])
        else:
            from astropy.io import fits

            with fits.open(p, memmap=False) as hdul:
                if hdul[0].header.get("CMBFMT") != _FORMAT:
                    raise InputFileError(p, "not a cmbtools covariance file")
                t = hdul["BINS"].data
                arrays = (np.array(t["ELL_MIN"]), np.array(t["ELL_MAX"]), np.array(t["ELL_EFF"]),
                          np.array(hdul["COVARIANCE"].data, dtype=np.float64))
                windows = np.array(hdul["WINDOWS"].data, dtype=np.float64) if "WINDOWS" in hdul else None
                meta = {"kind": hdul[0].header["KIND"], "n_sims": int(hdul[0].header["NSIMS"])}
    except InputFileError:
        raise
    except Exception as exc:  # noqa: BLE001 - any decoding failure: not a readable covariance file
        raise InputFileError(p, f"cannot be read as a covariance file ({type(exc).__name__}: {exc})") from None
    settings = {k: v for k, v in meta.items() if k not in ("format", "software", "kind", "n_sims", "unit")}
    try:
        return BandpowerCovariance(*arrays, windows, kind=meta["kind"], n_sims=int(meta["n_sims"]), settings=settings)
    except (InvalidInputError, KeyError) as exc:
        raise InputFileError(p, f"is not a valid covariance file ({exc})") from None
