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

The covariance needs the bin sums of ``u_l M_ll' u_l'`` for a few weight
spectra (one for an auto-spectrum without noise, three with noise, five for the
cross-spectrum of two noisy maps), never the matrices themselves.  With
``M_ll'/(2l'+1) = 1/2 int P_l P_l' xi_W dx`` (``xi_W`` the correlation function
of the weight spectrum) each bin sum is a Gauss-Legendre sum over ``2 lmax + 1``
nodes of the products of two per-bin Legendre series, exact for these band
limits and equal to the bin sums of ducc0's coupling matrices to rounding
(:class:`_CouplingQuadrature`; tested): about ``lmax^2 n_bins`` operations per
vector ``u`` where the kernel's 3j symbols take ``lmax^3``.  Each distinct
weight map (``w_x w_y``, ``Omega w_x^2 v_x``) is transformed once, to
``2 lmax``; the masks' own spectra (for the coupled signal spectra) are the
ones the estimator's first call computed and kept.  The products of kernels
that share a weight spectrum are its columns of ``u``, and the Legendre sums of
the coupled spectra are ducc0's transforms restricted to ``m = 0``.
:meth:`GaussianCovariance.pseudo_covariance`, the per-multipole covariance, is
the only one that makes the full matrices (one kernel call, on its first use).

Removed modes.  An estimator that removes the monopole and dipole (or
templates) before masking changes the covariance of the lowest bins: the
removal takes variance out of them, and the narrow-kernel term above misses
how much.  :mod:`cmbtools.spectrum.deprojection_covariance` adds the exact
low-rank change of the pseudo-coefficient covariance (its cross term with the
main one in the same narrow-kernel form), bin-summed over the first bins where
it matters; see that module for the method and its measured accuracy.  Given
measured bandpowers of an estimator built without the deprojection-bias
correction, the signal model adds the expected bias back first.
:meth:`GaussianCovariance.pseudo_covariance` is the per-multipole covariance
without the removal.

Lowest sky multipoles.  Under a beam the sky's spectrum is steep, and the mask leaks the much larger power of
the lowest multipoles into the upper bins; the leaked power at ``l`` and ``l'`` comes from the same few sky
modes, which the narrow-kernel form (narrow in ``l - l'``) cannot correlate: its neighbouring bins came out
too anti-correlated (on the Monte Carlo test's survey, against the exact Gaussian covariance: -0.08 to -0.20).
Up to nside :data:`~cmbtools.spectrum.low_sky_covariance.MAX_NSIDE` (64), where the low multipoles carry a
share of at least :data:`~cmbtools.spectrum.low_sky_covariance.LEAK_SHARE` of the coupled power at the top of the
range, the covariance replaces the
narrow-kernel part made by the sky's multipoles up to ``L`` (about 32, at a bin's end) alone by the exact one
(:mod:`cmbtools.spectrum.low_sky_covariance`: the estimator's removal, mask and analysis applied to each of those
sky modes, Isserlis' theorem on the bins' Gram matrices); the parts made by the higher multipoles, and by the low
and high ones together, keep the narrow-kernel form.  The removal of the low modes is then in the exact part,
and the removal's term sees the sky above ``L`` only.  :meth:`GaussianCovariance.pseudo_covariance` stays the
narrow-kernel one.

The noise is described by :class:`~cmbtools.spectrum.pixel_noise.PixelNoise`;
the result is a :class:`~cmbtools.spectrum.bandpower_covariance.BandpowerCovariance`
(simulated covariances and the covariance files are in that module).
"""

from __future__ import annotations

import math

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools._core.checks import check_cl, check_positive, resolve_nthreads
from cmbtools.exceptions import InvalidInputError, ResolutionMismatchError
from cmbtools.spectrum.bandpower_covariance import BandpowerCovariance
from cmbtools.spectrum.pixel_noise import PixelNoise

__all__ = ["GaussianCovariance"]


# ----------------------------------------------------------------------------- coupled spectra


def _legendre_nodes(n):
    import ducc0

    theta = ducc0.misc.GL_thetas(n)
    return theta, ducc0.misc.GL_weights(n, 1) / (2.0 * math.pi)


def _nodes_geometry(theta):
    """The Gauss-Legendre nodes as rings of one pixel each (for ducc0's transforms restricted to m = 0)."""
    n = theta.size
    return {"theta": theta, "nphi": np.ones(n, dtype=np.uintp), "phi0": np.zeros(n),
            "ringstart": np.arange(n, dtype=np.uintp)}


def _y_l0(lmax):
    """``Y_l0 / P_l = sqrt((2l+1) / (4 pi))``."""
    return np.sqrt((2.0 * np.arange(lmax + 1) + 1.0) / (4.0 * math.pi))


def _legendre_sum(coef, theta, nthreads):
    """``sum_L coef_L P_L(cos theta)``: ducc0's synthesis restricted to m = 0 (no Python loop over L)."""
    import ducc0

    lmax = coef.size - 1
    alm = (coef / _y_l0(lmax)).astype(np.complex128).reshape(1, -1)
    return ducc0.sht.experimental.synthesis(alm=alm, lmax=lmax, mmax=0, spin=0, nthreads=nthreads,
                                            **_nodes_geometry(theta))[0]


def _legendre_project(f, theta, wts, lmax, nthreads):
    """``int P_l(x) f(x) dx`` for l = 0..lmax on the Gauss-Legendre nodes ``cos theta`` (weights ``wts``)."""
    import ducc0

    g = (f * wts).reshape(1, -1)
    a = ducc0.sht.experimental.adjoint_synthesis(map=g, lmax=lmax, mmax=0, spin=0, nthreads=nthreads,
                                                 **_nodes_geometry(theta))[0]
    return a.real / _y_l0(lmax)


def coupled_spectrum(mask_cl, cl, lmax, *, nthreads=1) -> np.ndarray:
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
    nthreads : int, default=1
        Threads of the Legendre transforms (ducc0's, restricted to m = 0).

    Returns
    -------
    ndarray of shape (lmax+1,)
    """
    ls = cl.size - 1
    lw = min(mask_cl.size - 1, lmax + ls)
    n = (lmax + ls + lw) // 2 + 2
    theta, wts = _legendre_nodes(n)
    ell_w = np.arange(lw + 1)
    xi_w = _legendre_sum((2 * ell_w + 1) / (4 * math.pi) * mask_cl[: lw + 1], theta, nthreads)
    ell_c = np.arange(ls + 1)
    xi_c = _legendre_sum((2 * ell_c + 1) / (4 * math.pi) * cl, theta, nthreads)
    return 2.0 * math.pi * _legendre_project(xi_w * xi_c, theta, wts, lmax, nthreads)


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


class _CouplingQuadrature:
    """Bin sums of ``u_l M_ll' u_l'`` (``M`` the raw coupling of a weight spectrum) without forming ``M``.

    ``M_ll'/(2l'+1) = sum_L (2L+1)/(4 pi) W_L (l l' L; 0 0 0)^2 = 1/2 int P_l P_l' xi_W dx`` (the 3j identity
    ``int P_l P_l' P_L dx = 2 (3j)^2``, ``xi_W = sum_L (2L+1)/(4 pi) W_L P_L``).  The integrand has degree
    at most ``4 lmax``, so Gauss-Legendre quadrature on ``2 lmax + 1`` nodes is exact, and

        sum_{l in b, l' in b'} u_l M_ll'/(2l'+1) u_l' = 1/2 sum_i w_i xi_W(x_i) A_b(x_i) A_b'(x_i),
        A_b(x) = sum_{l in b} u_l P_l(x):

    a table of ``P_l`` on the nodes ``x >= 0`` (the others by ``P_l(-x) = (-1)^l P_l(x)``), one weighted
    bin sum per vector ``u`` and a product of two (nodes x bins) matrices, instead of the coupling
    kernel's ``O(lmax^3)`` 3j symbols.  Agrees with the kernel's matrices to rounding (tested).
    """

    def __init__(self, spectra, lmax, nthreads):
        n = 2 * lmax + 1
        theta, wts = _legendre_nodes(n)
        h = n // 2 + 1  # nodes 0..h-1 have x >= 0 (the last one x = 0, n being odd)
        x = np.cos(theta[:h])
        table = np.empty((lmax + 1, h))  # P_l(x_i), by the stable upward recurrence
        table[0] = 1.0
        if lmax >= 1:
            table[1] = x
        for ell in range(1, lmax):
            table[ell + 1] = ((2 * ell + 1) * x * table[ell] - ell * table[ell - 1]) / (ell + 1)
        self._table = np.ascontiguousarray(table.T)  # (nodes, ell)
        self._sign = np.where(np.arange(lmax + 1) % 2 == 0, 1.0, -1.0)
        ell_w = np.arange(2 * lmax + 1)
        self._g = {}
        for key, w in spectra.items():
            wl = np.zeros(2 * lmax + 1)
            k = min(wl.size, w.size)
            wl[:k] = w[:k]
            xi = _legendre_sum((2 * ell_w + 1) / (4 * math.pi) * wl, theta, nthreads)
            g = 0.5 * wts * xi
            self._g[key] = (g[:h], g[n - 1: n - h: -1])  # the nodes x >= 0 and their mirrors x < 0 (x = 0 once)

    def binned(self, key, u, starts):
        """``sum_j block_sum(M * (u_j u_j^T))`` for the columns ``u_j`` of ``u`` (shape (lmax+1, k))."""
        g_pos, g_neg = self._g[key]
        out = None
        for j in range(u.shape[1]):
            a_pos = np.add.reduceat(self._table * u[:, j], starts, axis=1)
            a_neg = np.add.reduceat(self._table * (self._sign * u[:, j]), starts, axis=1)
            part = a_pos.T @ (g_pos[:, None] * a_pos) + a_neg[:-1].T @ (g_neg[:, None] * a_neg[:-1])
            out = part if out is None else out + part
        return out


#: Largest total size of the weight maps' coefficients held at once (above it, spectra are made pair by pair).
_COEFFICIENT_BUDGET = 2 * 2**30


def _pair_spectra(fields, pairs, lw, nthreads):
    """Cross-spectra up to ``lw`` of the named weight maps, for every pair; each map transformed once when it fits.

    Every transform skips the rings where its own map is zero (a product of two masks is zero wherever
    either mask is).
    """
    names = sorted({n for p in pairs for n in p})
    rings = {n: _sht.occupied_rings(fields[n]) for n in names}
    if 16 * _sht.alm_size(lw) * len(names) <= _COEFFICIENT_BUDGET:
        alms = {n: _sht.map2alm(fields[n], lw, nthreads=nthreads, rings=rings[n]) for n in names}
        return {p: _sht.alm2cl(alms[p[0]], alms[p[1]], lmax=lw) for p in pairs}
    out = {}
    for p in pairs:  # lean on memory: the split transforms of map_spectra, two maps at a time
        if p[0] == p[1]:
            out[p] = _sht.map_spectra([fields[p[0]]], lw, nthreads=nthreads, rings=rings[p[0]])[0]
        else:
            both = rings[p[0]] | rings[p[1]]
            out[p] = _sht.map_spectra([fields[p[0]], fields[p[1]]], lw, nthreads=nthreads, rings=both)[2]
    return out


def _estimator_mask_spectra(estimator, cross, need):
    """The masks' spectra the estimator's first call computed (plain quadrature, to ``2 lmax``), or None.

    ``None`` when the estimator refined its mask transforms (``n_iter > 0``), when its spectra stop
    below ``need`` or when it does not hold them (an estimator file from before they were kept).
    """
    inp = getattr(estimator, "_inputs", None)
    w11 = getattr(estimator, "_mask_cl11", None)
    if inp is None or w11 is None or int(inp.n_iter) != 0 or w11.size < need + 1:
        return None
    if not cross:
        return {("1", "1"): w11[: need + 1]}
    if inp.mask2 is None:  # both maps under the same mask
        return {("1", "1"): w11[: need + 1], ("2", "2"): w11[: need + 1], ("1", "2"): w11[: need + 1]}
    w22, w12 = getattr(estimator, "_mask_cl22", None), getattr(estimator, "_mask_cl12", None)
    if w22 is None or w12 is None:
        return None
    return {("1", "1"): w11[: need + 1], ("2", "2"): w22[: need + 1], ("1", "2"): w12[: need + 1]}


class GaussianCovariance:
    """The analytic covariance of the bandpowers of a :class:`SpectrumEstimator`, built once.

    The constructor transforms the products of masks and noise-weighted masks
    that the covariance needs and prepares their coupling sums (see the module
    notes); :meth:`covariance` then gives the covariance for any signal spectrum
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

        same_mask = {"1": "1", "2": "1" if w2 is w1 else "2"}  # one field (and transform) per distinct product

        def s_field(x, y):
            key = "S" + "".join(sorted(same_mask[x] + same_mask[y]))
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
        spectra = _pair_spectra(fields, wanted, 2 * lmax, nthreads)
        fields.clear()  # the weight maps are not needed past their spectra
        self._spectra = {p: spectra[p] for p in wanted}
        self._quadrature = _CouplingQuadrature(self._spectra, lmax, nthreads)
        self._mats = None  # the full coupling matrices, made by pseudo_covariance only
        self._terms = terms
        # the band limit of the signal model and the factors (beam, pixel window, transfer) up to it
        lsky = lmax
        if beam is not None:
            lsky = 4 * int(estimator.nside) - 1 if sky_lmax is None else max(lmax, int(sky_lmax))
        self._lsky = lsky
        self._sky_factors = self._factors_to(estimator, cross, beam, beam2, lsky)
        # the spectra of the masks for the coupled signal spectra (iNKA): the estimator's own when they reach
        # lmax + lsky (no signal model above lmax), else transformed here
        self._mask_cl = _estimator_mask_spectra(estimator, cross, lmax + lsky)
        if self._mask_cl is None and cross and w2 is not w1:  # one call: both masks' spectra and their cross
            rings = _sht.occupied_rings(w1) | _sht.occupied_rings(w2)
            w11, w22, w12 = _sht.map_spectra([w1, w2], lmax + lsky, nthreads=nthreads, rings=rings)
            self._mask_cl = {("1", "1"): w11, ("2", "2"): w22, ("1", "2"): w12}
        elif self._mask_cl is None:
            w11 = _sht.map_spectra([w1], lmax + lsky, nthreads=nthreads, rings=_sht.occupied_rings(w1))[0]
            self._mask_cl = {("1", "1"): w11}
            if cross:  # both maps under one mask
                self._mask_cl.update({("2", "2"): w11, ("1", "2"): w11})
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
        # the exact covariance of the part made by the sky's lowest multipoles (spectrum.low_sky_covariance)
        # (its level here; the part itself is built on the first covariance whose sky leaks enough low power)
        self._low_sky_level = self._low_sky_split(estimator, cross)
        self._low_sky_built = None
        self._low_sky_off = False
        # the monopole/dipole (template) removal's change of the covariance (spectrum.deprojection_covariance)
        self._deprojection = None
        if estimator._inputs.deprojects:
            from cmbtools.spectrum.deprojection_covariance import DeprojectionCovariance

            weights = {x: (None if nz is None else omega * self._masks[x] ** 2 * nz.variance)
                       for x, nz in self._noise.items()}
            self._deprojection = DeprojectionCovariance(estimator, weights, cross, nthreads)

    def _low_sky_split(self, estimator, cross):
        """The last multipole of the exact low-sky part (:func:`~cmbtools.spectrum.low_sky_covariance.low_sky_lmax`), or None."""
        from cmbtools.spectrum import low_sky_covariance as low

        if int(estimator.nside) > low.MAX_NSIDE:
            return None
        first = 2 if estimator.remove_monopole_dipole else 0
        n_maps = 2 if cross and estimator._inputs.mask2 is not None else 1
        return low.low_sky_lmax(estimator.binning, self._lmax, first, self.n_bins, n_maps)

    @property
    def _low_sky(self):
        """The :class:`~cmbtools.spectrum.low_sky_covariance.LowSkyCovariance` of this covariance (built once), or None."""
        from cmbtools.spectrum import low_sky_covariance as low

        if self._low_sky_level is None or self._low_sky_off:
            return None
        if self._low_sky_built is None:
            est = self._estimator
            first = 2 if est.remove_monopole_dipole else 0
            self._low_sky_built = low.LowSkyCovariance(est, self._cross, self._low_sky_level, first, self._p,
                                                       self._starts, self._nthreads)
        return self._low_sky_built

    @_low_sky.setter
    def _low_sky(self, value):
        """Setting None turns the exact low-sky part off (the narrow-kernel covariance alone)."""
        if value is not None:
            raise ValueError("only None turns the exact low-sky part off")
        self._low_sky_off = True

    def _leaks_low_sky(self, cl) -> bool:
        """Whether the sky's multipoles up to the split carry enough of the coupled power at the top of the range.

        The exact part matters where the mask leaks the low multipoles' power into bins whose own power is small
        (under a beam); elsewhere the narrow-kernel form holds and the part's ``(L+1)^2`` transforms are skipped.
        The test: the share of the low multipoles in the coupled spectrum over the top third of the multipoles
        above the split reaches :data:`~cmbtools.spectrum.low_sky_covariance.LEAK_SHARE`.
        """
        from cmbtools.spectrum import low_sky_covariance as low

        level = self._low_sky_level
        if level is None or self._low_sky_off:
            return False
        low_cl = cl.copy()
        low_cl[level + 1:] = 0.0
        c, c_low = self._coupled(cl), self._coupled(low_cl)
        top = slice(level + 1 + 2 * (self._lmax - level) // 3, self._lmax + 1)
        share = 0.0
        for k in c:
            whole = np.abs(np.asarray(c[k])[top])
            part = np.abs(np.asarray(c_low[k])[top])
            ok = whole > 0
            if np.any(ok):
                share = max(share, float(np.max(part[ok] / whole[ok])))
        return share >= low.LEAK_SHARE

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
            bp = np.asarray(spectrum.cl, dtype=np.float64)
            ell_eff = np.asarray(spectrum.ell_eff, dtype=np.float64)
            cl = self._interpolated(bp, ell_eff)
            inp = self._estimator._inputs
            if self._deprojection is not None and not inp.correct_deprojection_bias and bp.size == self.n_bins:
                # the bandpowers of an estimator without the deprojection-bias correction are low where the
                # removal takes power: the sky model adds the expected bias back (two fixed-point steps)
                pair = ("1", "2") if self._cross else ("1", "1")
                for _ in range(2):
                    signal = {k: self._sky_factors[k][: cl.size] * cl for k in self._mask_cl}
                    delta = np.zeros(lmax + 1)
                    bias = self._deprojection.pseudo_bias(signal, pair)
                    delta[: bias.size] = bias[: lmax + 1]
                    shift = self._ainv @ np.add.reduceat(self._p * delta, self._starts)
                    cl = self._interpolated(bp - shift, ell_eff)
            return cl, "measured bandpowers"
        cl = check_cl(spectrum, "spectrum", lmax=lmax)[: self._lsky + 1].copy()
        if self._estimator.remove_monopole_dipole:
            cl[:2] = 0.0
        return cl, "theory spectrum"

    def _interpolated(self, bp, ell_eff):
        """C_l (l = 0..lmax) of bandpowers: D_l linear between the bin centres, constant beyond the ends."""
        lmax = self._lmax
        ell = np.arange(lmax + 1, dtype=np.float64)
        d = np.interp(ell, ell_eff, np.clip(bp * ell_eff * (ell_eff + 1) / (2 * math.pi), 0.0, None))
        cl = np.zeros(lmax + 1)
        cl[1:] = d[1:] * 2 * math.pi / (ell[1:] * (ell[1:] + 1))
        if self._estimator.remove_monopole_dipole:  # removed from every map: no monopole/dipole power
            cl[:2] = 0.0
        return cl

    def pseudo_covariance(self, spectrum) -> np.ndarray:
        """Covariance of the pseudo-spectrum ``C~_l`` (l = 0..lmax) for a sky spectrum, K^4.

        Without the monopole/dipole (template) removal's change, which :meth:`covariance` adds to the
        first bins' sums, and in the narrow-kernel form throughout: the exact part of the lowest sky multipoles
        is made bin by bin in :meth:`covariance` only (see the module notes).

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
        return self._pseudo_covariance(cl, self._coupled(cl))

    def _coupled(self, cl):
        """The narrow-kernel amplitudes: coupled signal spectra over the mean weight, l = 0..lmax."""
        c = {}
        for key, wcl in self._mask_cl.items():
            f = self._sky_factors[key][: cl.size]
            c[key] = np.clip(coupled_spectrum(wcl, f * cl, self._lmax, nthreads=self._nthreads) / self._mean_w[key],
                             0.0, None)
        return c

    def _pseudo_covariance(self, cl, c):
        mats = self._matrices()
        cov = sum(mats[p] * (u @ u.T) for p, u in self._grouped_terms(c))
        return 0.5 * (cov + cov.T)

    def _grouped_terms(self, c, signal_only=False):
        """``(M_p, U_p)`` for every coupling matrix: the pseudo-covariance is ``sum_p M_p * (U_p U_p^T)``.

        ``c``: the amplitudes of :meth:`_coupled`.  Each product of kernels adds ``u_l M_ll' u_l'`` with
        ``u`` the product of two amplitudes; the products that share a matrix are the columns of its
        ``U`` (one elementwise pass per matrix).
        """
        lmax = self._lmax
        shapes = {x: (None if nz is None else nz.shape_to(lmax)) for x, nz in self._noise.items()}

        def amp(k):
            kind, x, y = k
            if kind == "S":
                return np.sqrt(c[tuple(sorted((x, y)))])
            return np.sqrt(shapes[x])

        columns = {}
        for k1, k2, p in self._terms:
            if signal_only and (k1[0] != "S" or k2[0] != "S"):
                continue
            columns.setdefault(p, []).append(amp(k1) * amp(k2))
        return [(p, np.stack(cols, axis=1)) for p, cols in columns.items()]

    def _matrices(self):
        """The raw coupling matrices of the weight spectra (one kernel call; only the per-multipole covariance needs them)."""
        if self._mats is None:
            wanted = list(self._spectra)
            mats = _raw_couplings([self._spectra[p] for p in wanted], self._lmax, self._nthreads)
            self._mats = {p: mats[i] for i, p in enumerate(wanted)}
        return self._mats

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
        cl, source = self._signal_cl(spectrum)
        c = self._coupled(cl)
        p = self._p
        binned = None
        for key, u in self._grouped_terms(c):  # the bin sums of the pseudo-covariance, weight spectrum by spectrum
            part = self._quadrature.binned(key, p[:, None] * u, self._starts)
            binned = part if binned is None else binned + part
        binned = 0.5 * (binned + binned.T)
        high = cl
        if self._leaks_low_sky(cl):  # the low sky x low sky part: exact in place of the narrow-kernel one
            level = self._low_sky.l_low
            low_cl = cl.copy()
            low_cl[level + 1:] = 0.0
            high = cl - low_cl
            narrow = None
            for key, u in self._grouped_terms(self._coupled(low_cl), signal_only=True):
                part = self._quadrature.binned(key, p[:, None] * u, self._starts)
                narrow = part if narrow is None else narrow + part
            s = {k: self._sky_factors[k][: low_cl.size] * low_cl for k in self._mask_cl}
            pair = ("1", "2") if self._cross else ("1", "1")
            exact = self._low_sky.binned(s[("1", "1")], s[("2", "2") if self._cross else ("1", "1")], s[pair])
            binned = binned + exact - 0.5 * (narrow + narrow.T)
        if self._deprojection is not None:
            # the removal of the low sky is in the exact part: the removal's term sees the sky above it
            signal = {k: self._sky_factors[k][: high.size] * high for k in self._mask_cl}
            shapes = {x: (None if nz is None else nz.shape_to(self._lmax)) for x, nz in self._noise.items()}
            c_high = c if high is cl else self._coupled(high)
            binned = binned + self._deprojection.binned_correction(signal, c_high, shapes, p, self._starts,
                                                                   np.diag(binned).copy())
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
