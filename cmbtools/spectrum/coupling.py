"""The mode-coupling matrix of a mask (MASTER, Hivon et al. 2002, ApJ 567, 2).

This is the only module that calls ducc0's coupling kernel
(:func:`ducc0.misc.experimental.coupling_matrix_rect`).

For a weight map ``w`` with (cross-)power spectrum ``W_l`` the pseudo-spectrum
of ``w * T`` has the expectation ``<C~_l> = sum_l' M_ll' C_l'`` with
(Hivon et al. 2002, eq. A31)::

    M_ll' = (2 l' + 1) / (4 pi) * sum_l'' (2 l'' + 1) W_l'' (l l' l''; 0 0 0)^2

ducc0's kernel returns ``sum_l'' (2 l'' + 1)/(4 pi) W_l'' (l l' l''; 0 0 0)^2``,
i.e. ``M_ll' / (2 l' + 1)`` (it multiplies the input spectrum by
``(2l+1)/(4 pi)`` and leaves out the ``2 l' + 1`` of the column); the factor is
applied here, in place.  The 3j symbols vanish unless ``l'' <= l + l'``, so the
mask spectrum is needed up to ``2 lmax``.

The mask spectrum is the plain quadrature (adjoint transform, no refinement)
of the pixelized mask, up to ``2 lmax``.  The matrix is then the exact
expectation of the pseudo-spectrum that the same quadrature gives for a sky
band-limited at ``lmax`` (checked by Monte Carlo in the tests): it also
corrects the HEALPix quadrature's own aliasing, which biases a plain
full-sky spectrum by up to ~10% near ``l = 3 nside`` for red spectra.

The fast option is the approximation of Louis et al. 2020, PRD 102, 123538:
the matrix is computed exactly for rows below ``l_exact``, only a band of
half-width ``dl_band`` around the diagonal up to ``l_toeplitz``, and above it
every diagonal is taken as constant (Toeplitz form) from its value at
``l_toeplitz``.
"""

from __future__ import annotations

import numpy as np
import ducc0

from cmbtools._core import sht as _sht
from cmbtools._core.checks import check_int, resolve_nthreads
from cmbtools.exceptions import InvalidInputError

__all__ = [
    "mask_lmax",
    "mask_spectrum",
    "coupling_matrix",
    "default_fast_settings",
    "fast_lmax_limit",
    "coupling_matrices",
    "pure_b_ratio",
]


def mask_lmax(lmax: int, nside: int | None = None, n_iter: int = 0) -> int:
    """Largest multipole of the mask spectrum that the coupling at ``lmax`` uses.

    ``2 lmax`` (all the 3j symbols can reach) for the plain quadrature
    (``n_iter=0``); with refinement steps at most ``3 nside - 1``, above which
    the refinement of a HEALPix map diverges.
    """
    lw = 2 * int(lmax)
    if n_iter > 0 and nside is not None:
        lw = min(lw, 3 * int(nside) - 1)
    return lw


def mask_spectrum(mask1, mask2=None, *, lmax: int, n_iter: int = 0, nthreads: int | None = None) -> np.ndarray:
    """(Cross-)power spectrum of one or two weight maps up to ``mask_lmax(lmax)``.

    Parameters
    ----------
    mask1, mask2 : ndarray of shape (12*nside**2,)
        Weight maps (checked by the caller); ``mask2=None`` gives the auto-spectrum.
    lmax : int
        Largest multipole of the coupling matrix (the spectrum goes to ``2*lmax``).
    n_iter : int, default=0
        Refinement steps of the harmonic transform.
    nthreads : int, optional
        Threads for the transforms.

    Returns
    -------
    ndarray of shape (mask_lmax(lmax, nside, n_iter)+1,)
        ``W_l``, dimensionless.
    """
    nside = int(round(np.sqrt(np.size(mask1) / 12)))
    lw = mask_lmax(lmax, nside, n_iter)
    nthreads = resolve_nthreads(nthreads)
    if n_iter == 0:  # the transforms skip the rings where the weights are zero
        rings = _sht.occupied_rings(mask1) if mask2 is None else _sht.occupied_rings(mask1) | _sht.occupied_rings(mask2)
        spectra = _sht.map_spectra([mask1] if mask2 is None else [mask1, mask2], lw, nthreads=nthreads, rings=rings)
        return spectra[0] if mask2 is None else spectra[2]
    a1 = _sht.map2alm(mask1, lw, n_iter=n_iter, nthreads=nthreads)
    if mask2 is None:
        return _sht.alm2cl(a1, lmax=lw)
    a2 = _sht.map2alm(mask2, lw, n_iter=n_iter, nthreads=nthreads)
    return _sht.alm2cl(a1, a2, lmax=lw)


def fast_lmax_limit(nside: int) -> int:
    """Largest lmax at which the fast (banded/Toeplitz) coupling is used by default: ``2 nside``.

    Above it the exact matrix carries the HEALPix quadrature's aliasing
    (mask multipoles above ``4 nside``, reached by entries with
    ``l + l' > 4 nside``), which the banded form cannot represent.  Measured
    at nside 1024 with an apodized latitude cut: bandpowers within 6e-6 of
    the exact matrix up to lmax = 2.4 nside, 8e-3 off at 2.54 nside and 14%
    at 3 nside.
    """
    return 2 * int(nside)


def default_fast_settings(lmax: int) -> tuple[int, int, int]:
    """Default ``(l_exact, l_toeplitz, dl_band)`` of the fast coupling for ``lmax``.

    Exact up to a quarter of ``lmax`` (at least 200 multipoles), banded with
    half-width ``lmax/4`` (at least 100) up to half of ``lmax`` (at least 400),
    Toeplitz above.

    Accuracy (measured, apodized caps): the bandpowers agree with the exact
    matrix to < 1e-3 relative up to ``l = 2 nside`` (2e-4 at nside 1024,
    lmax 3071; 1e-9 below 1.5 nside).  Above ``2 nside`` the exact matrix also
    carries the HEALPix quadrature's aliasing (mask multipoles near
    ``2 lmax``, far from the diagonal), which a banded/Toeplitz form cannot
    represent: the difference grows to ~2% at 2.5 nside and ~8% at 3 nside
    for a red spectrum.  The estimator therefore computes the exact matrix
    when lmax is above :func:`fast_lmax_limit`.
    """
    lmax = int(lmax)
    l_exact = min(lmax, max(200, lmax // 4))
    l_toeplitz = min(lmax, max(400, lmax // 2, l_exact))
    dl_band = max(100, lmax // 4)
    return l_exact, l_toeplitz, dl_band


def coupling_matrix(
    w_l,
    lmax: int,
    *,
    fast: tuple[int, int, int] | None = None,
    nthreads: int | None = None,
    scale_columns: bool = True,
) -> np.ndarray:
    """Mode-coupling matrix ``M_ll'`` for ``l, l' = 0..lmax`` from a mask spectrum.

    Parameters
    ----------
    w_l : array_like of shape (n,)
        (Cross-)power spectrum of the weight map(s) from ell = 0; values
        above ``2*lmax`` are not used, missing ones (``n < 2*lmax+1``) are
        taken as zero.
    lmax : int
        Largest multipole.
    fast : (int, int, int), optional
        ``(l_exact, l_toeplitz, dl_band)`` of the Louis et al. 2020
        approximation; ``None`` computes the exact matrix.
    nthreads : int, optional
        Threads for the kernel.
    scale_columns : bool, default=True
        Multiply column ``l'`` by ``2 l' + 1`` (the MASTER matrix).  ``False``
        returns ``M_ll' / (2 l' + 1)``, the form the narrow-kernel covariance
        uses.

    Returns
    -------
    ndarray of shape (lmax+1, lmax+1)
        ``M[l, l']``, float64, C-contiguous.
    """
    lmax = check_int(lmax, "lmax", minimum=0)
    w = np.asarray(w_l, dtype=np.float64)
    need = mask_lmax(lmax) + 1
    if w.ndim != 1 or w.size == 0 or not np.all(np.isfinite(w)):
        raise InvalidInputError(f"The mask spectrum must be a non-empty 1-d array of finite values. Got shape {w.shape}.")
    spec = np.zeros((1, need))
    n = min(need, w.size)
    spec[0, :n] = w[:n]
    out = np.empty((1, lmax + 1, lmax + 1), dtype=np.float64)
    kwargs = {}
    if fast is not None:
        l_exact, l_toeplitz, dl_band = (int(v) for v in fast)
        if not (0 <= l_exact <= l_toeplitz <= lmax) or dl_band < 1:
            raise InvalidInputError(
                "The fast coupling settings must satisfy 0 <= l_exact <= l_toeplitz <= lmax and dl_band >= 1. "
                f"Got l_exact={l_exact}, l_toeplitz={l_toeplitz}, dl_band={dl_band} with lmax={lmax} instead."
            )
        kwargs = dict(l_exact=l_exact, l_toeplitz=l_toeplitz, dl_band=dl_band)
    ducc0.misc.experimental.coupling_matrix_rect(
        spec, (0,), out, nthreads=resolve_nthreads(nthreads), **kwargs
    )
    m = out[0]
    if scale_columns:
        m *= 2.0 * np.arange(lmax + 1, dtype=np.float64) + 1.0
    return m


# ----------------------------------------------------------------------------- polarization
# For weights w_a, w_b with cross-spectrum W_L, the pseudo-spectra of masked fields have expectations
# (Kogut et al. 2003, ApJS 148, 161, eqs. 5-8 (from memory); the spin-2 extension of Hivon et al. 2002,
# ApJ 567, 2, eq. A31), with L = l + l' + l'' and every sum over l'' (2 l'' + 1)/(4 pi) W_l'':
# 
#     M00_ll'  = (2l'+1) sum (l l' l''; 0 0 0)^2
#     M02_ll'  = (2l'+1) sum (l l' l''; 0 0 0) (l l' l''; -2 2 0)
#     M++_ll'  = (2l'+1) sum (l l' l''; -2 2 0)^2 (1 + (-1)^L) / 2
#     M--_ll'  = (2l'+1) sum (l l' l''; -2 2 0)^2 (1 - (-1)^L) / 2
# 
#     <TT~> = M00 TT,  <TE~> = M02 TE,  <TB~> = M02 TB,
#     <EE~> = M++ EE + M-- BB,  <BB~> = M-- EE + M++ BB,  <EB~> = M++ EB - M-- BE.
# 
# ducc0's kernel (optypes 0, 1, 2, 3) returns the sums without the (2l'+1) column factor (checked against
# sympy's exact 3j symbols in the tests).

#: ducc0 optype of each kernel kind; '+-' gives the ++ and -- pair.
_OPTYPES = {"00": 0, "02": 1, "++": 2, "+-": 4}


def coupling_matrices(requests, lmax: int, *, nthreads=None, lmax_columns=None):
    """Several coupling matrices in one call of ducc0's kernel.

    Parameters
    ----------
    requests : sequence of (kind, w_l)
        ``kind`` is '00', '02', '++' or '+-' (the latter gives the ++ and the -- matrices); ``w_l`` the
        (cross-)power spectrum of the two weight maps from ell = 0 (values above what is needed ignored).
    lmax : int
        Rows ``l = 0..lmax``.
    lmax_columns : int, optional
        Columns ``l' = 0..lmax_columns`` (default lmax); the mask spectrum is needed to lmax + lmax_columns.

    Returns
    -------
    list of ndarray of shape (lmax+1, lmax_columns+1)
        One matrix per '00' / '02' / '++' request, two (++, --) per '+-' request, in order; columns scaled by
        ``2 l' + 1``.
    """
    lc = lmax if lmax_columns is None else int(lmax_columns)
    need = lmax + lc + 1
    spec = np.zeros((len(requests), need))
    optypes = []
    n_out = 0
    for i, (kind, w) in enumerate(requests):
        w = np.asarray(w, dtype=np.float64)
        n = min(need, w.size)
        spec[i, :n] = w[:n]
        optypes.append(_OPTYPES[kind])
        n_out += 2 if kind == "+-" else 1
    out = np.empty((n_out, lmax + 1, lc + 1), dtype=np.float64)
    ducc0.misc.experimental.coupling_matrix_rect(spec, tuple(optypes), out, nthreads=resolve_nthreads(nthreads))
    out *= (2.0 * np.arange(lc + 1) + 1.0)[None, None, :]
    return list(out)


def pure_b_ratio(lmax: int, lmax_columns=None) -> np.ndarray:
    """``N_l / N_l'`` with ``N_l = sqrt((l-2)!/(l+2)!)`` (zero where l or l' < 2), shape (lmax+1, lmax_columns+1).

    The purified B coefficients of a window w are ``sum_l'm' (N_l/N_l') B_l'm' int w Y*_lm Y_l'm'``
    (Smith 2006, PRD 74, 083002; integrate the pure estimator by parts twice), so their couplings are the
    spin-0 ones times this ratio (TB, B x E use the 0-0 / 0-2 kernels times the ratio, BB times its square).
    """
    lc = lmax if lmax_columns is None else int(lmax_columns)

    def n_inv(l):
        l = np.asarray(l, dtype=np.float64)
        return np.sqrt(np.clip((l - 1) * l * (l + 1) * (l + 2), 0.0, None))  # 1 / N_l

    rows = n_inv(np.arange(lmax + 1))
    cols = n_inv(np.arange(lc + 1))
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where((rows[:, None] > 0) & (cols[None, :] > 0), cols[None, :] / rows[:, None], 0.0)
    return r
