"""Spherical-harmonic transforms on HEALPix maps, through ducc0.

This is the only module that imports :mod:`ducc0.sht`.  Coefficients use
healpy's layout (m-major, ``index = m*(2*lmax+1-m)//2 + l``), so they can be
passed to healpy functions unchanged.  Maps are in RING ordering.

``map2alm`` is the adjoint synthesis scaled by the pixel area, optionally
followed by ``n_iter`` Jacobi refinements ``alm += A^T W (m - A alm)``, the
same scheme as healpy's ``map2alm(iter=...)`` (so results agree with healpy to
rounding for the same ``n_iter``).
"""

from __future__ import annotations

import functools

import numpy as np
import ducc0

from ._validation import resolve_nthreads

__all__ = ["ring_geometry", "map2alm", "alm2map", "alm2cl", "almxfl", "alm_size", "alm_ell"]


@functools.lru_cache(maxsize=16)
def ring_geometry(nside: int) -> dict:
    """Ring layout of a RING-ordered HEALPix map (theta, phi0, nphi, ringstart), cached."""
    info = ducc0.healpix.Healpix_Base(int(nside), "RING").sht_info()
    for v in info.values():
        v.setflags(write=False)
    return info


def alm_size(lmax: int, mmax: int | None = None) -> int:
    """Number of complex coefficients for ``lmax`` (and ``mmax``, default lmax)."""
    mmax = lmax if mmax is None else mmax
    return (mmax + 1) * (lmax + 1) - (mmax * (mmax + 1)) // 2


@functools.lru_cache(maxsize=8)
def alm_ell(lmax: int) -> np.ndarray:
    """ell of every coefficient in healpy's layout (read-only, cached)."""
    ell = np.concatenate([np.arange(m, lmax + 1) for m in range(lmax + 1)])
    ell.setflags(write=False)
    return ell


@functools.lru_cache(maxsize=8)
def _m_weights(lmax: int) -> np.ndarray:
    """1 for m = 0 coefficients, 2 for m > 0 (the m < 0 half is implied)."""
    w = np.full(alm_size(lmax), 2.0)
    w[: lmax + 1] = 1.0
    w.setflags(write=False)
    return w


def alm2map(alm, nside: int, lmax: int, *, nthreads: int | None = None) -> np.ndarray:
    """Synthesize a RING-ordered map of ``nside`` from coefficients up to ``lmax``."""
    geom = ring_geometry(nside)
    alm = np.asarray(alm)
    out = ducc0.sht.experimental.synthesis(
        alm=alm.reshape(1, -1),
        lmax=lmax,
        spin=0,
        nthreads=resolve_nthreads(nthreads),
        **geom,
    )
    return out[0]


def map2alm(m, lmax: int, *, n_iter: int = 0, nthreads: int | None = None) -> np.ndarray:
    """Harmonic coefficients of a RING-ordered map up to ``lmax``.

    Parameters
    ----------
    m : ndarray of shape (12*nside**2,)
        The map (float32 or float64; float64 is used internally).
    lmax : int
        Largest multipole.
    n_iter : int, default=0
        Jacobi refinement steps (healpy's ``iter``); each costs one synthesis
        and one adjoint synthesis and reduces the quadrature error of the
        HEALPix grid.
    nthreads : int, optional
        Threads for ducc0 (default: all cores).
    """
    m = np.asarray(m, dtype=np.float64)
    npix = m.size
    nside = int(round(np.sqrt(npix / 12)))
    geom = ring_geometry(nside)
    nthreads = resolve_nthreads(nthreads)
    scale = 4.0 * np.pi / npix
    alm = ducc0.sht.experimental.adjoint_synthesis(
        map=m.reshape(1, -1), lmax=lmax, spin=0, nthreads=nthreads, **geom
    )
    alm *= scale
    for _ in range(n_iter):
        resid = m - ducc0.sht.experimental.synthesis(alm=alm, lmax=lmax, spin=0, nthreads=nthreads, **geom)[0]
        corr = ducc0.sht.experimental.adjoint_synthesis(
            map=resid.reshape(1, -1), lmax=lmax, spin=0, nthreads=nthreads, **geom
        )
        alm += scale * corr
    return alm[0]


def alm2cl(alm1, alm2=None, lmax: int | None = None) -> np.ndarray:
    """Angular (cross-)power spectrum ``C_l = sum_m a1_lm a2*_lm / (2l+1)`` (real part)."""
    alm1 = np.asarray(alm1)
    if lmax is None:
        lmax = int(round((np.sqrt(8 * alm1.size + 1) - 3) / 2))
    if alm1.size != alm_size(lmax):
        raise ValueError(f"alm has {alm1.size} coefficients, not the {alm_size(lmax)} of lmax={lmax}")
    if alm2 is None:
        prod = alm1.real**2 + alm1.imag**2
    else:
        alm2 = np.asarray(alm2)
        prod = alm1.real * alm2.real + alm1.imag * alm2.imag
    cl = np.bincount(alm_ell(lmax), weights=prod * _m_weights(lmax), minlength=lmax + 1)
    return cl / (2.0 * np.arange(lmax + 1) + 1.0)


def almxfl(alm, fl, lmax: int) -> np.ndarray:
    """Multiply coefficients by a function of ell (a beam, a window, ...)."""
    fl = np.asarray(fl, dtype=np.float64)
    f = np.zeros(lmax + 1)
    n = min(fl.size, lmax + 1)
    f[:n] = fl[:n]
    return np.asarray(alm) * f[alm_ell(lmax)]
