"""B-mode purification of the polarization window (Smith 2006, PRD 74, 083002; Grain, Tristram & Stompor
2009, PRD 79, 123515).

The standard pseudo-B coefficients of ``w P`` mix E into B where the window varies.  The pure estimator
(Smith 2006, eq. 9 in spirit; notation of Grain et al. 2009 eqs. 6-8) replaces ``w (2Y_lm)*`` by
``N_l eth-bar^2 (w Y*_lm)`` with ``N_l = sqrt((l-2)!/(l+2)!)``:

    B_lm(pure) = (i/2) N_l int [ P+ eth-bar^2(w Y*_lm) - P- eth^2(w Y*_lm) ]

which, integrated by parts twice, sees only ``eth-bar^2 P+ - eth^2 P-``: the B modes.  Expanding the
derivatives gives three terms computed with spin-2, spin-1 and spin-0 transforms of the map times the
window and its spin-1 and spin-2 derivatives:

    B(pure) = B[w P]  +  2 N_l sqrt(l(l+1)) C[P+ conj(eth w)]  -  N_l a[Im(P+ conj(eth^2 w))]

(``B[.]``: curl coefficients of a spin-2 field; ``C[.]``: curl coefficients of a spin-1 field; ``a[.]``:
spin-0 coefficients; signs fixed for ducc0's/healpy's conventions and checked in the tests: a pure-E sky
gives no B through any smooth window).  The derivatives are computed from the window's harmonic
coefficients: ``eth w = sum sqrt(l(l+1)) w_lm 1Y_lm`` and ``eth^2 w = sum sqrt((l-1)l(l+1)(l+2)) w_lm 2Y_lm``.
"""

from __future__ import annotations

__all__ = ["window_derivatives", "pure_eb_alm"]

import numpy as np

from cmbtools._core import sht as _sht


def window_derivatives(window, lmax: int, *, nthreads=None, n_iter: int = 3):
    """Spin-1 and spin-2 derivatives ``eth w`` and ``eth^2 w`` of a window (complex maps, RING).

    The window's coefficients up to ``lmax`` come from ``n_iter`` refinement steps of the transform, so
    the derivatives are those of the window band-limited at lmax (an apodized window has little power
    above: its taper is many pixels wide).
    """
    window = np.asarray(window, dtype=np.float64)
    nside = int(round(np.sqrt(window.size / 12)))
    w = _sht.map2alm(window, lmax, n_iter=n_iter, nthreads=nthreads)
    ell = _sht.alm_ell(lmax).astype(np.float64)
    zero = np.zeros_like(w)
    g1 = -np.sqrt(ell * (ell + 1.0)) * w
    g2 = -np.sqrt(np.clip((ell - 1.0) * ell * (ell + 1.0) * (ell + 2.0), 0.0, None)) * w
    d1 = _sht.alm2map_spin(np.stack([g1, zero]), 1, nside, lmax, nthreads=nthreads)
    d2 = _sht.alm2map_spin(np.stack([g2, zero]), 2, nside, lmax, nthreads=nthreads)
    return d1[0] + 1j * d1[1], d2[0] + 1j * d2[1]


def pure_eb_alm(q, u, window, eth_w, eth2_w, lmax: int, *, nthreads=None, rings=None):
    """E (standard) and purified B coefficients of the Stokes maps Q, U seen through ``window``."""
    q = np.asarray(q, dtype=np.float64)
    u = np.asarray(u, dtype=np.float64)
    seen = window != 0  # the derivatives of the band-limited window reach beyond it: only data inside count
    q = np.where(seen, q, 0.0)
    u = np.where(seen, u, 0.0)
    e, b = _sht.map2alm_spin2(window * q, window * u, lmax, nthreads=nthreads, rings=rings)
    p = q + 1j * u
    f1 = p * np.conj(eth_w)
    c1 = _sht.map2alm_spin(np.stack([f1.real, f1.imag]), 1, lmax, nthreads=nthreads, rings=rings)[1]
    del f1
    f0 = (p * np.conj(eth2_w)).imag
    a0 = _sht.map2alm(f0, lmax, nthreads=nthreads, rings=rings)
    ell = _sht.alm_ell(lmax).astype(np.float64)
    n_l = np.zeros(ell.size)
    ok = ell >= 2
    n_l[ok] = 1.0 / np.sqrt((ell[ok] - 1) * ell[ok] * (ell[ok] + 1) * (ell[ok] + 2))
    b_pure = b + 2.0 * n_l * np.sqrt(ell * (ell + 1.0)) * c1 - n_l * a0
    return e, b_pure
