"""The HEALPix pixel window of polarization (E and B modes), computed from its definition and cached.

Definition (the spin-2 form of the temperature window of Gorski et al. 2005,
ApJ 622, 759, section 4.1)::

    (w^P_l)**2 = (1/Npix) sum_p (4 pi / (2l+1)) sum_m |<2Y_lm>_p|**2

where ``<2Y_lm>_p`` is the average over pixel p of the spin-2 harmonic, each
point's value taken in its own local (theta, phi) frame: a pixelised Q, U map
is the plain average of the Q, U samples that fall in the pixel.  Averaging
a spin-2 field over a pixel is complex-linear in Q + iU, so the spin +2 and -2
coefficients are not mixed: E and B are multiplied by the same ``w^P_l``.

By the addition theorem of spin-weighted harmonics (Ng & Liu 1999, IJMPD 8,
61; Hu & White 1997, PRD 56, 596, eq. 9) ``sum_m 2Y_lm(n1) 2Y*_lm(n2) =
(2l+1)/(4 pi) d^l_22(beta) exp(2i chi)``, where beta is the angle between the
two points and chi the angle by which n1's frame, carried along the great
circle to n2 (parallel transport), differs from n2's frame.  So ``(w^P_l)**2``
is the average over pixels of the mean of ``d^l_22(beta) cos(2 chi)`` over
pairs of points of the same pixel.

Method: the pairs of :mod:`cmbtools.spectrum.pixel_windows` (Gauss-Legendre nodes in face
coordinates, one pixel per symmetry class; chi is unchanged by the
symmetries: rotations about the axis, mirror images and the north-south
reflection only change its sign), with two histograms over the chord: the pair
weights, and the pair weights times ``cos(2 chi)``.  Then
``(w^P_l)**2 = sum_k Hcos_k d^l_22(beta_k) / sum_k H_k`` with ``d^l_22`` from
its three-term recurrence in l (started at ``d^2_22 = ((1 + cos beta)/2)**2``).

Accuracy (measured at nside 4-32): a refined rule (order 8, twice the bins,
deeper pole refinement) changes w^P_l by less than 5e-8 for l <= 3 nside and
7e-7 up to 4 nside; a brute-force midpoint rule of the definition over
sub-pixels (``tests/spectrum/test_polarization_pixel_window.py``, nside 1 and 2) agrees to 4e-6, the
accuracy of that reference.  ``w^P_0 = w^P_1 = 0`` (no E or B there).  The
window differs from the temperature one mostly at low l, where the turning
of the local frames inside the pixels near the poles lowers it: by 1.4e-3 at
nside 16, 1.5e-4 at nside 64, 1.3e-5 at nside 256.  A first computation
takes about 2.5 s at nside 256 on one core (cost grows as nside**2); later
calls read the cache.

Cache: ``cmbtools._core.files.cache_dir()/pixel_window_pol_nside{N}_v{ALGORITHM_VERSION}.npz``,
with the inputs, their hash and a checksum of the table, as for the
temperature window.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from cmbtools._core import files as _io
from cmbtools.spectrum import pixel_windows as _pixwin

__all__ = ["polarization_pixel_window"]

#: Version of the algorithm; part of the cache file name and checked on load.
ALGORITHM_VERSION = 1


def _local_frames(v):
    """Unit vectors e_theta, e_phi at points v (..., 3); a point on the axis gets the frame of phi = 0."""
    x, y, z = v[..., 0], v[..., 1], v[..., 2]
    rho = np.hypot(x, y)
    safe = np.where(rho > 0, rho, 1.0)
    cphi = np.where(rho > 0, x / safe, 1.0)
    sphi = np.where(rho > 0, y / safe, 0.0)
    e_theta = np.stack([z * cphi, z * sphi, -rho], axis=-1)
    e_phi = np.stack([-sphi, cphi, np.zeros_like(x)], axis=-1)
    return e_theta, e_phi


def _tally_block_spin2(vectors, pair_i, pair_j, pair_weight, scale):
    """Chord histograms of node pairs: plain weights and weights times cos(2 chi) (see the module notes)."""
    r, c = _pixwin.centred_chords(vectors, pair_i, pair_j, scale)
    k = r.shape[1]
    # frames: (n_j - n_i) . e_i gives the direction from n_i towards n_j in n_i's frame
    e_t, e_p = _local_frames(vectors)
    dt = np.matmul(e_t, r.transpose(0, 2, 1))  # [b, i, j] = e_theta_i . r_j
    dp = np.matmul(e_p, r.transpose(0, 2, 1))
    diag_t = np.einsum("bkc,bkc->bk", e_t, r)
    diag_p = np.einsum("bkc,bkc->bk", e_p, r)
    dt = dt.reshape(r.shape[0], k * k)
    dp = dp.reshape(r.shape[0], k * k)
    # at n_i towards n_j: e_i . (r_j - r_i); at n_j away from n_i: e_j . (r_j - r_i)
    z1 = (dt[:, pair_i * k + pair_j] - diag_t[:, pair_i]) + 1j * (dp[:, pair_i * k + pair_j] - diag_p[:, pair_i])
    z2 = (diag_t[:, pair_j] - dt[:, pair_j * k + pair_i]) + 1j * (diag_p[:, pair_j] - dp[:, pair_j * k + pair_i])
    z = z1 * np.conj(z2)
    z = z * z
    az = np.abs(z)
    cos2chi = np.where(az > 0, z.real / np.where(az > 0, az, 1.0), 1.0).ravel()
    idx = c.astype(np.intp).ravel()
    frac = c.ravel() - idx
    w1 = frac * pair_weight
    w0 = pair_weight - w1
    out = []
    for weights0, weights1 in ((w0, w1), (w0 * cos2chi, w1 * cos2chi)):
        s0 = np.bincount(idx, weights=weights0)
        s1 = np.bincount(idx, weights=weights1)
        hist = np.zeros(s0.size + 1)
        hist[:-1] += s0
        hist[1:] += s1
        out.append(hist)
    return out


def wigner_d22(cos_beta, lmax):
    """Wigner small-d ``d^l_22(beta)`` for l = 0..lmax at the given cos(beta): array (lmax+1, n).

    Three-term recurrence in l (e.g. Varshalovich et al. 1988, *Quantum Theory
    of Angular Momentum*, section 4.8; from memory) started at
    ``d^2_22 = ((1 + cos beta)/2)**2``; ``d^l_22 = 0`` for l < 2.
    """
    x = np.asarray(cos_beta, dtype=np.float64)
    out = np.zeros((lmax + 1,) + x.shape)
    if lmax < 2:
        return out
    out[2] = (0.5 * (1.0 + x)) ** 2
    prev = np.zeros_like(x)
    cur = out[2]
    for ell in range(2, lmax):
        lp = ell + 1.0
        a = ell * (lp * lp - 4.0)
        nxt = ((2 * ell + 1.0) * (ell * lp * x - 4.0) * cur - lp * (ell * ell - 4.0) * prev) / a
        out[ell + 1] = nxt
        prev, cur = cur, nxt
    return out


def _d22_sums(hist, hist_cos, chord, lmax):
    """``sum_k Hcos_k d^l_22(beta_k) / sum_k H_k`` for l = 0..lmax, without a (lmax, bins) array."""
    nz = np.nonzero(hist)[0]
    n = nz[-1] + 1
    h = hist_cos[:n] / hist.sum()
    x = 1.0 - 0.5 * chord[:n] ** 2
    out = np.zeros(lmax + 1)
    if lmax < 2:
        return out
    prev = np.zeros_like(x)
    cur = (0.5 * (1.0 + x)) ** 2
    out[2] = h @ cur
    for ell in range(2, lmax):
        lp = ell + 1.0
        nxt = ((2 * ell + 1.0) * (ell * lp * x - 4.0) * cur - lp * (ell * ell - 4.0) * prev) / (ell * (lp * lp - 4.0))
        prev, cur = cur, nxt
        out[ell + 1] = h @ cur
    return out


def _compute_window_squared(nside, lmax, *, order=None, bins_per_unit=None, pole_depth=_pixwin._POLE_DEPTH,
                            nthreads=1):
    """(w^P_l)**2 for l = 0..lmax (no cache, no checks)."""
    order = _pixwin._gauss_order(lmax, nside) if order is None else order
    bins_per_unit = _pixwin._bins_per_unit(lmax, nside) if bins_per_unit is None else bins_per_unit
    hist, hist_cos = _pixwin.pair_histograms(nside, order, bins_per_unit, pole_depth, nthreads, _tally_block_spin2)
    chord = np.arange(hist.size) / (bins_per_unit * nside)
    if hist_cos.size < hist.size:
        hist_cos = np.concatenate([hist_cos, np.zeros(hist.size - hist_cos.size)])
    return _d22_sums(hist, hist_cos, chord, lmax)


def cache_path(nside: int) -> Path:
    """Path of the cached polarization pixel-window table for ``nside``."""
    return _io.cache_dir() / f"pixel_window_pol_nside{int(nside)}_v{ALGORITHM_VERSION}.npz"


def polarization_pixel_window(nside, lmax=None, *, use_cache=True, nthreads=None) -> np.ndarray:
    """HEALPix pixel window of the E and B modes, w^P_l, computed from its definition (no network).

    Parameters
    ----------
    nside : int
        HEALPix resolution (a power of two).
    lmax : int, optional
        Largest multipole, at most ``8 * nside``.  Default ``4 * nside``.
    use_cache : bool, default=True
        Read the table from, and store it in, ``cmbtools._core.files.cache_dir()``.
    nthreads : int, optional
        Threads for the first computation.

    Returns
    -------
    ndarray of shape (lmax+1,), float64
        ``w^P_l`` with ``w^P_0 = w^P_1 = 0``: the E and B coefficients of a
        Q, U map averaged over pixels are ``w^P_l`` times those of the sky.

    Warns
    -----
    CmbtoolsWarning
        If a cache file is corrupt or stale (it is recomputed), or cannot be written.

    Notes
    -----
    Close to the temperature window: for nside >= 16 the two differ by less
    than 1e-3 (relative) up to l = 3 nside (see the module notes).

    Examples
    --------
    >>> w = polarization_pixel_window(16)
    >>> round(float(w[32]), 4)
    0.8219
    """
    return _pixwin.cached_window(nside, lmax, use_cache, nthreads, path_of=cache_path,
                                 compute_squared=_compute_window_squared, kind="pixel_window_pol",
                                 version=ALGORITHM_VERSION, what="polarization pixel-window")
