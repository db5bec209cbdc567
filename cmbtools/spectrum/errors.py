"""Errors of the bandpowers: Knox variances with the effective sky fraction, and the covariance.

The Knox formula (Knox 1995, PRD 52, 4307) with ``f_sky_eff = w2^2/w4``
gives the per-bin variance; the optional covariance uses the narrow-kernel
approximation: the coupling of the squared mask sandwiched between the binned
inverses (common practice).
"""

from __future__ import annotations

import numpy as np

__all__ = ["covariance_kernel", "mode_counts", "bandpower_covariance"]


def _reduce_rows(matrix, weights, starts):
    """``P @ matrix`` for a bin-averaging ``P`` given by per-ell weights and bin starts.

    One weighted sum of each bin's rows (bin ``b`` runs from ``starts[b]`` to the next start, the
    last to the matrix's last row, like ``np.add.reduceat``); ``matrix`` is left unchanged and no
    temporary of its size is made (at lmax 6143 a coupling matrix is 0.3 GB).
    """
    starts = np.asarray(starts)
    ends = np.append(starts[1:], matrix.shape[0])
    out = np.empty((starts.size, matrix.shape[1]), dtype=np.result_type(matrix, weights))
    for b, (s, e) in enumerate(zip(starts, ends)):
        np.dot(weights[s:e], matrix[s:e], out=out[b])
    return out


def _reduce_cols(matrix, weights, starts):
    return np.add.reduceat(matrix * weights[None, :], starts, axis=1)


def covariance_kernel(m2_scaled, factor, binning, lmax):
    """``G[b, b'] = sum_{l in b, l' in b'} (f_l/n_b) M2_ll'/(2l'+1) (f_l'/n_b')`` (narrow-kernel covariance)."""
    u = np.zeros(lmax + 1)
    idx = binning.bin_index
    sel = np.nonzero(idx >= 0)[0]
    u[sel] = 1.0 / binning.n_ell[idx[sel]]
    r = factor * u
    rows = _reduce_rows(m2_scaled, r, binning.ell_min)
    g = _reduce_cols(rows, r, binning.ell_min)
    return 0.5 * (g + g.T)


def mode_counts(binning, f_sky_eff) -> np.ndarray:
    """``f_sky_eff * sum_{l in b} (2l+1)``, the effective number of modes per bin."""
    b = binning
    nu = (b.ell_max + 1) ** 2 - b.ell_min**2  # sum of (2l+1) over the bin
    return f_sky_eff * nu


def bandpower_covariance(ainv, g, c12, c11, c22, *, cross) -> np.ndarray:
    """Covariance of the bandpowers: ``A^-1 K A^-T`` with the narrow kernel ``K`` built on ``g``.

    Cross-spectra: ``K = (C12 C12^T + s s^T) * g`` with ``s = sqrt(C11 C22)``;
    auto-spectra: ``K = 2 C11 C11^T * g``.
    """
    if cross:
        s = np.sqrt(np.clip(c11 * c22, 0.0, None))
        inner = (np.outer(c12, c12) + np.outer(s, s)) * g
    else:
        inner = 2.0 * np.outer(c11, c11) * g
    cov = ainv @ inner @ ainv.T
    return 0.5 * (cov + cov.T)
