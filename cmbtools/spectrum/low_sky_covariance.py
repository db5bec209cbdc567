r"""The part of the bandpower covariance that comes from the sky's lowest multipoles, computed exactly.

Why.  The narrow-kernel covariance of :mod:`cmbtools.spectrum.covariance` treats the pseudo-power at ``l`` as the
power of a field that is locally stationary at that scale, ``sqrt(c_l c_l') K[w^2]``, narrow in ``l - l'``.
Under a beam the sky's spectrum is steep: the mask leaks the much larger power of lower multipoles into the
multipoles whose own power the beam suppressed, and the leaked parts at ``l`` and ``l'`` come from the *same*
few low sky modes near the mask's edges and holes.  The exact pseudo-spectrum covariance then has long-range
correlations in ``l`` (between ``l`` and ``l + 10``: 0.02-0.3 exact, 0.007-0.02 in the narrow-kernel form on the
survey of ``tests/spectrum/test_covariance.py``), and through the coupling inversion (which subtracts leaked
power estimated from the neighbouring bins) the model's neighbouring bandpowers came out too anti-correlated.

What.  Split the sky's coefficients into the low multipoles ``L1 <= L`` (``L = LOW_SKY_LMAX`` at most) and the
rest.  The estimator's map-to-pseudo-coefficient step (monopole/dipole or template removal, mask, analysis) is
linear, so the low part's pseudo-coefficients are ``a~_L = X s_L`` with one column of ``X`` per real sky mode
(one synthesis, the estimator's own removal and mask, one analysis each: ``(L+1)^2`` of them) and
``Sigma_L = X S_L X^T`` exactly, of rank ``(L+1)^2``.  For the binned pseudo-spectra ``C~_b = a~^T Q_b a~``
(``Q_b`` the bin weights ``p_l / (2l+1)`` on the coordinates of bin ``b``) Isserlis' theorem gives the
low part's covariance as Frobenius products of the per-bin Gram matrices ``G^xy_b = X_x^T Q_b X_y``:

    Cov_LL(C~^12_b, C~^12_b') = tr(G^12_b S^22 G^12_b'^T S^11) + tr(G^12_b S^12 G^12_b' S^12)

(``S^xy`` the low sky spectrum as maps x and y see it, beams and pixel window included; for an
auto-spectrum both terms are ``tr(G_b S G_b' S)``).  The covariance is then

    narrow-kernel(c) - narrow-kernel_LL(c^L) + Cov_LL

where ``c^L`` is the coupled spectrum of the low multipoles alone and ``narrow-kernel_LL`` the signal x signal
terms of the narrow-kernel form with the amplitudes ``c^L`` only: the low x low part is replaced by the exact
one, the high x high and low x high parts keep the narrow-kernel form (with the noise terms).  ``Sigma_L``
contains the removal, so :mod:`cmbtools.spectrum.deprojection_covariance` is given the sky above ``L`` only.

When.  Only where the sky leaks enough low power: the low multipoles' share of the coupled signal spectrum over
the top third of the multipoles above ``L`` must reach :data:`LEAK_SHARE` (decided per call of
:meth:`~cmbtools.spectrum.GaussianCovariance.covariance`, the part built on the first call that needs it).
Without a steep (beam-suppressed) spectrum the narrow-kernel form holds and the transforms are skipped.

Where to split.  ``L`` is the end of the bin that contains ``LOW_SKY_LMAX`` (32) if that end is at most
``LARGEST_LMAX`` (48), else the end of the last bin below it, so that every bin is wholly in the low part or
not (:func:`low_sky_lmax`).  Pairs of bins below ``L`` then have the exact low x low part; the pair of the last
bin below ``L`` and the next one is the one the split leaves least accurate (the low x high part stays in
narrow-kernel form, and just above ``L`` the leaked power comes from the modes just below it).

Measured against the exact Gaussian covariance (brute force: every sky mode to 4 nside through the estimator's
removal, mask and analysis; signal only):

* nside-32 survey of the Monte Carlo test (tapered cap with three holes, beam of two pixels, averaged pixels, no
  removal, bins of 16): model minus exact neighbour correlations -0.083, -0.025, -0.026, -0.070, -0.202
  (narrow kernel) -> -0.000, 0.016, -0.003, -0.031, -0.077 (``L = 33``); bin errors / exact 0.73-1.00 ->
  0.89-1.00 (the last bin, ell 82-95, 0.73 -> 0.89);
* nside-16 tapered cap with a hole, beam of two pixels, monopole/dipole removed, bins of 8
  (``tests/spectrum/test_low_sky_covariance.py``): 0.016, -0.017, -0.013, -0.058, -0.254 -> 0.000, 0.000,
  0.001, 0.037, -0.045; the first three bins' errors exact (to 1e-4), the others 1.004-1.086 of exact
  (narrow kernel 0.92-1.10); the cross-spectrum of that cap and a second one: -0.007, 0.007, 0.006, 0.018,
  -0.077 -> 0.000, 0.000, 0.000, 0.010, -0.071, the three bins below ``L`` exact (narrow kernel 1.013-1.022).

On the Monte Carlo test's 800 skies (noise included) the auto-spectrum's neighbouring pairs are off by -0.34,
1.97, -0.45, 0.86, 1.38 standard errors (narrow kernel: -0.05, 3.07, 0.07, 1.44, 2.11), the cross-spectrum's
by -0.10, 0.69, -0.08, -1.29, 1.48 (0.16, 0.73, -0.09, -1.31, 1.44); scatter / error 0.94-1.02 in every bin.

Cost.  ``(L+1)^2`` syntheses and analyses per map on the estimator's grid (the removal of all the modes of a block
as one matrix product), and the Gram matrices (``(L+1)^4`` times the coordinates of the bins), once per
:class:`~cmbtools.spectrum.GaussianCovariance`: about 2-3 s at nside 32 and 5-7 s at nside 64 for an
auto-spectrum (2-core machine at load ~3); a covariance then costs one product of two
(bins x (L+1)^4) tables.  ``L`` is lowered to earlier bin ends until the Gram matrices and the step's columns
fit ``WORK_BYTES`` (512 MB).  Above nside ``MAX_NSIDE`` (64) the block is not computed and the covariance is
the narrow-kernel one with the removal's term (:mod:`cmbtools.spectrum.deprojection_covariance`): the step's
``(L+1)^2`` transforms of the map would cost far more than the issue's speed target allows (nside 1024: about
1000 analyses of more than a second each, against a budget of about 20 s).  A coarse grid, as for the removal's
term, was not tried: the leaked power sits at the top of the range, where the averaged masks lose the
structure that leaks it.  At nside 128 and above the covariance is therefore the narrow-kernel one as before.
"""

from __future__ import annotations

import numpy as np

from cmbtools._core import sht as _sht

__all__ = ["LEAK_SHARE", "LOW_SKY_LMAX", "MAX_NSIDE", "LowSkyCovariance", "low_sky_lmax"]

#: Sky modes synthesized and projected together (a block of maps).
_BLOCK = 128

#: The sky's multipoles up to this one enter exactly.
LOW_SKY_LMAX = 32

#: The split moves up to the end of the bin that contains LOW_SKY_LMAX only as far as this multipole.
LARGEST_LMAX = 48

#: Estimators on finer grids keep the narrow-kernel covariance (the step costs (L+1)^2 transforms of the map).
MAX_NSIDE = 64

#: The part is computed when the low multipoles carry at least this share of the coupled signal spectrum over the
#: top third of the multipoles above the split (measured, nside 32 survey of the Monte Carlo test: 0.15-0.29
#: under its beam of two pixels, 0.005-0.008 under a beam of 0.8 pixel, 0.002-0.004 without a beam).
LEAK_SHARE = 0.05

#: Largest size of the per-bin Gram matrices and the step's columns (``L`` is lowered to fit).
WORK_BYTES = 512 * 2**20


def _bytes(level, first, n_bins, lmax, n_maps):
    """Bytes of the Gram matrices and of the columns of every map's step."""
    modes = (level + 1) ** 2 - first**2
    return n_bins * modes**2 * 8 + n_maps * (lmax + 1) ** 2 * modes * 8


def low_sky_lmax(binning, lmax, first, n_bins, n_maps=1):
    """The last multipole ``L`` of the exact low part, or None (too costly).

    The end of the bin that contains ``LOW_SKY_LMAX`` when it is at most ``LARGEST_LMAX``, else the end of the
    last bin below it (each bin wholly in the low part or not: on the nside-16 cap of the tests the pair of bins
    across a split inside a bin came out 0.05 too high, 0.04 with the split at the bin's end), else
    ``LOW_SKY_LMAX``; never above lmax; lowered to earlier bin ends until the Gram matrices and the columns of the
    ``n_maps`` maps' steps fit ``WORK_BYTES``.

    Parameters
    ----------
    binning : Binning
        The estimator's bins.
    lmax : int
        The estimator's lmax.
    first : int
        Smallest sky multipole with power (2 when the monopole and dipole are removed).
    n_bins : int
        Number of bins.
    n_maps : int, default=1
        Maps with their own mask (2 for a cross-spectrum of two masks).

    Returns
    -------
    int or None
    """
    ends = [int(e) for e in np.asarray(binning.ell_max) if first <= int(e) <= lmax]
    target = min(LOW_SKY_LMAX, lmax)
    above = [e for e in ends if e >= target]
    below = [e for e in ends if e < target]
    if above and above[0] <= LARGEST_LMAX:
        level = above[0]
    elif below:
        level = below[-1]
    else:
        level = target
    while _bytes(level, first, n_bins, lmax, n_maps) > WORK_BYTES:
        smaller = [e for e in ends if e < level]
        if not smaller:
            return None
        level = smaller[-1]
    return level if level >= first else None


def _real_order(lmax):
    """Index into the alm array, part and ell of every real coordinate up to ``lmax``, sorted by ell."""
    from cmbtools.spectrum.low_ell_covariance import _coords

    return _coords(lmax, 0, lmax)


class LowSkyCovariance:
    """The exact covariance of the binned pseudo-spectra's part made by the sky's multipoles up to ``l_low``.

    Built by :class:`~cmbtools.spectrum.GaussianCovariance`; see the module notes.

    Parameters
    ----------
    estimator : SpectrumEstimator
        The estimator (its masks, removal, analysis, binning).
    cross : bool
        Cross-spectrum of map 1 and map 2.
    l_low : int
        Largest sky multipole of the low part.
    first_sky : int
        Smallest sky multipole with power (2 when the monopole and dipole are removed).
    p : ndarray of shape (lmax+1,)
        Averaging weights of the bins.
    ell_min : ndarray of shape (n_bins,)
        First multipole of every bin.
    nthreads : int
        Threads of the transforms.
    """

    def __init__(self, estimator, cross, l_low, first_sky, p, ell_min, nthreads):
        from cmbtools.spectrum.low_ell_covariance import _to_real, _unit

        self.l_low = int(l_low)
        self.first_sky = int(first_sky)
        lmax = int(estimator.lmax)
        nside = int(estimator.nside)
        modes = _real_order(self.l_low)
        keep = modes[2] >= self.first_sky
        self._mode_ell = modes[2][keep]
        idx_s, part_s = modes[0][keep], modes[1][keep]
        out_idx, out_part, out_ell = _real_order(lmax)
        q = p[out_ell] / (2.0 * out_ell + 1.0)
        ends = np.append(ell_min[1:], lmax + 1)
        self.n_bins = int(ell_min.size)
        sides = ["1", "2"] if cross and estimator._inputs.mask2 is not None else ["1"]
        x = {}
        for side in sides:
            second = side == "2"
            mask = np.asarray(estimator.mask2 if second else estimator.mask, dtype=np.float64)
            removal = None
            if estimator._inputs.deprojects:  # the estimator's weighted fit: W (1 - T A^-1 T^T W), as one matrix
                dep = estimator._template_deprojection(second)
                t = np.stack([dep.template_map(i) for i in range(dep.n_templates)], axis=1)
                removal = (t, (mask[:, None] * t) @ dep.normal_inverse.T)  # (npix, n): T and W T A^-1
            cols = np.empty((out_idx.size, idx_s.size))
            for start in range(0, idx_s.size, _BLOCK):
                block = range(start, min(idx_s.size, start + _BLOCK))
                maps = np.stack([_sht.alm2map(_unit(self.l_low, idx_s[j], part_s[j]), nside, self.l_low,
                                              nthreads=nthreads) for j in block], axis=1)
                if removal is not None:
                    maps -= removal[0] @ (maps.T @ removal[1]).T  # (a short-and-wide product is slow in BLAS)
                maps *= mask[:, None]
                for k, j in enumerate(block):
                    alm = estimator._alm(np.ascontiguousarray(maps[:, k]), is_second=second)  # its own analysis
                    cols[:, j] = _to_real(alm, out_idx, out_part)
            x[side] = cols
        x1 = x["1"]
        x2 = x.get("2", x1) if cross else x1
        gram = np.empty((self.n_bins, idx_s.size, idx_s.size))
        first = np.searchsorted(out_ell, ell_min)  # the coordinates are ordered by ell
        last = np.searchsorted(out_ell, ends)
        from scipy.linalg.blas import dsyrk

        for b in range(self.n_bins):
            sel = slice(int(first[b]), int(last[b]))
            if x2 is x1:  # symmetric: one triangle (half the products), mirrored
                y = np.sqrt(q[sel, None]) * x1[sel]
                upper = dsyrk(1.0, y, trans=1)
                gram[b] = np.triu(upper) + np.triu(upper, 1).T
            else:
                gram[b] = x1[sel].T @ (q[sel, None] * x2[sel])
        self._gram = gram

    def binned(self, s11, s22, s12) -> np.ndarray:
        """``Cov_LL`` of the binned pseudo-spectra for the low sky spectra as the maps see them, K^4.

        Parameters
        ----------
        s11, s22, s12 : ndarray of shape (>= l_low+1,)
            ``B_x B_y p^2 T C_l`` of map 1, map 2 and their cross (from ell 0; equal for an auto-spectrum).

        Returns
        -------
        ndarray of shape (n_bins, n_bins)
        """
        e = self._mode_ell
        r1, r2 = np.sqrt(np.clip(s11[e], 0.0, None)), np.sqrt(np.clip(s22[e], 0.0, None))
        h1 = (self._gram * r1[None, :, None] * r2[None, None, :]).reshape(self.n_bins, -1)
        a = s12[e]
        h2 = (self._gram * a[None, :, None] * a[None, None, :]).reshape(self.n_bins, -1)
        gt = np.swapaxes(self._gram, 1, 2).reshape(self.n_bins, -1)
        out = h1 @ h1.T + h2 @ gt.T
        return 0.5 * (out + out.T)
