"""The bias of Q, U (and T x Q, U) maps averaged into HEALPix pixels: the spin-2 form of :mod:`averaging_bias`.

A detector's Q, U map holds, in pixel p, the mean over the pixel's area of the beam-convolved Q and U, each
point's value taken in its own (theta, phi) frame (:mod:`cmbtools.simulate.pixel_averaging`).  The estimator's
model is the sky convolved with the isotropic polarization pixel window ``w^P_l``
(:mod:`cmbtools.spectrum.spin2_pixel_window`) and sampled at the pixel centres.  As for temperature
(:mod:`cmbtools.spectrum.averaging_bias`), the difference is confined to pairs of pixels a few pixels apart,
and it is summed over those pairs.

**Pair sums of the pseudo-spectra.**  Write ``P = Q + iU`` and, for a pair of points x, y at angle beta,
``z_x = (y . (e_theta + i e_phi)(x))^2 / sin^2 beta`` (``e^{2i alpha}``, alpha the angle at x from e_theta to
the great circle towards y) and ``z_y`` the same at y with x; ``P_r(x) = P(x) conj(z_x)`` is P in the frame of the
great circle through both points.  With the plain quadrature of the analysis and ``f = Omega^2 / 4 pi``
(Omega = 4 pi / Npix), the pseudo-spectra of maps weighted by W_a, W_b are exactly (the addition theorem of
spin-weighted harmonics, Hu & White 1997, PRD 56, 596; the signs checked against the estimator's own transforms
in tests/spectrum/test_polarized_averaging_bias.py)::

    EE~ + BB~ = f sum_pq W_a(p) W_b(q) Re[P_r(p) P_r(q)*] d^l_22(beta)
    EE~ - BB~ = f sum_pq W_a(p) W_b(q) Re[P_r(p) P_r(q)]  d^l_2,-2(beta)
    EB~ (the mean of E_a B_b and B_a E_b) = f/2 sum_pq W_a W_b Im[P_r(p) P_r(q)] d^l_2,-2(beta)
    TE~ = -f sum_pq W_T(p) W_P(q) T(p) Q_r(q) d^l_20(beta)      TB~: the same with U_r

and the covariances of a statistically isotropic sky in the great circle's frame are the correlation
functions ``<P_r P_r*> = xi_+ = sum (2l+1)/(4 pi) (EE + BB) d^l_22``, ``<P_r P_r> = sum (2l+1)/(4 pi)
(EE - BB + 2i EB) d^l_2,-2``, ``<T P_r> = -sum (2l+1)/(4 pi) (TE + i TB) d^l_20``.  For the model they are taken
at the centres with the windowed spectra; for averaged maps each pixel pair's covariance is the mean over both
pixels' nodes (Gauss-Legendre, as for temperature) of the node pairs' covariances turned into the nodes' own
frames (``<P(x) P(y)*> = xi_+ z_x conj(z_y)``, ``<P(x) P(y)> = xi_- z_x z_y``, ``<T(x) P(y)> = xi_T z_y``), then
turned into the frame of the centres' great circle.  The differences are binned in the centres' separation and
summed against the Wigner d functions (three-term recurrence in l).  That includes the small E/B mixing of the
averaging (the turning of the frames inside a pixel: BB from EE, EB and TB when the grid's symmetries do not
cancel them).  The pixels p whose pairs are summed are those of the temperature module (every pixel of the
first mask up to ``MAX_CENTRES``, else a stratified sample), and so are the radius and the quadrature order.

Cost: the spin-2 pair sums cost about twice the temperature ones per pair of pixels (complex frame factors on
every node pair); TE adds one pass more.  Results are kept in memory like the temperature ones
(:data:`averaging_bias.CACHE_SIZE` entries, same key rule).
"""

from __future__ import annotations

import collections
import hashlib
import math
import threading

import numpy as np

from cmbtools._core.checks import check_nside
from cmbtools.spectrum import averaging_bias as _ab

__all__ = ["polarized_averaging_bias", "wigner_d_series", "wigner_d_adjoint"]

#: (m1, m2) of the Wigner d functions used here, and their value at l = 2 as a function of x = cos beta.
_START = {
    (2, 2): lambda x: ((1.0 + x) / 2.0) ** 2,
    (2, -2): lambda x: ((1.0 - x) / 2.0) ** 2,
    (2, 0): lambda x: math.sqrt(3.0 / 8.0) * (1.0 - x * x),
}


def _d_recurrence(kind, x, lmax):
    """Yield (l, d^l_{m1 m2}(x)) for l = 2..lmax (three-term recurrence in l, stable upwards)."""
    m1, m2 = kind
    prev = np.zeros_like(x)
    cur = _START[kind](x)
    for ell in range(2, lmax + 1):
        yield ell, cur
        if ell == lmax:
            break
        a = ell * math.sqrt((ell + 1) ** 2 - m1 * m1) * math.sqrt((ell + 1) ** 2 - m2 * m2)
        b = (2 * ell + 1) * ell * (ell + 1)
        c0 = (2 * ell + 1) * m1 * m2
        c = (ell + 1) * math.sqrt(ell * ell - m1 * m1) * math.sqrt(ell * ell - m2 * m2)
        nxt = ((b * x - c0) * cur - c * prev) / a
        prev, cur = cur, nxt


def wigner_d_series(coeffs, kind, x) -> np.ndarray:
    """``sum_{l>=2} c_l d^l_{m1 m2}(beta)`` at ``x = cos beta`` (``kind`` = (2, 2), (2, -2) or (2, 0))."""
    c = np.asarray(coeffs, dtype=np.float64)
    x = np.asarray(x, dtype=np.float64)
    out = np.zeros_like(x)
    for ell, d in _d_recurrence(tuple(kind), x, c.size - 1):
        if c[ell] != 0.0:
            out += c[ell] * d
    return out


def wigner_d_adjoint(values, kind, x, lmax) -> np.ndarray:
    """``sum_k v_k d^l_{m1 m2}(beta_k)`` for l = 0..lmax (zero below l = 2): the adjoint of the series."""
    v = np.asarray(values, dtype=np.float64)
    out = np.zeros(lmax + 1)
    for ell, d in _d_recurrence(tuple(kind), np.asarray(x, dtype=np.float64), lmax):
        out[ell] = v @ d
    return out


def _tables(series, chord_max):
    """Cubic tables (the layout of averaging_bias's) of d-function series: (coeffs, kind) -> table."""
    step = chord_max**2 / _ab._TABLE_POINTS
    u = step * np.arange(_ab._TABLE_POINTS + 3)
    x = 1.0 - u / 2.0
    out = []
    for coeffs, kind in series:
        v = wigner_d_series(coeffs, kind, x)
        f0, f1, f2, f3 = v[:-3], v[1:-2], v[2:-1], v[3:]
        c = np.stack([f1, (-2 * f0 - 3 * f1 + 6 * f2 - f3) / 6.0, (f0 - 2 * f1 + f2) / 2.0,
                      (-f0 + 3 * f1 - 3 * f2 + f3) / 6.0])
        first = np.array([f0[0], (-11 * f0[0] + 18 * f1[0] - 9 * f2[0] + 2 * f3[0]) / 6.0,
                          (2 * f0[0] - 5 * f1[0] + 4 * f2[0] - f3[0]) / 2.0, c[3, 0]])
        out.append(np.ascontiguousarray(np.concatenate([first[:, None], c], axis=1)))
    return step, out


def _lookup(table, step, chord2):
    return _ab._lookup(table, step, chord2.copy())


def _frames(vectors):
    """``e_theta + i e_phi`` at unit vectors (..., 3) (never at a pole: nodes and centres are inside pixels)."""
    x, y, z = vectors[..., 0], vectors[..., 1], vectors[..., 2]
    rho = np.sqrt(x * x + y * y)
    out = np.empty(vectors.shape, dtype=np.complex128)
    out[..., 0] = (z * x - 1j * y) / rho
    out[..., 1] = (z * y + 1j * x) / rho
    out[..., 2] = -rho
    return out


def _phase(raw):
    """``raw^2 / |raw|^2`` (``e^{2i alpha}``); 1 where the two points coincide."""
    m2 = raw.real**2 + raw.imag**2
    tiny = m2 < 1e-24
    out = raw * raw / np.where(tiny, 1.0, m2)
    out[tiny] = 1.0
    return out


_cache: "collections.OrderedDict[str, dict]" = collections.OrderedDict()
_cache_lock = threading.Lock()


def clear_polarized_averaging_bias_cache() -> None:
    """Forget every result kept by :func:`polarized_averaging_bias`."""
    with _cache_lock:
        _cache.clear()


def _key(kind, w_a, w_b, spectra, win_a, win_b, lmax, radius, max_centres, order):
    h = hashlib.blake2b(digest_size=32)
    h.update(kind.encode())
    arrays = [("mask", w_a), ("mask2", w_b), ("win_a", win_a), ("win_b", win_b)]
    arrays += [("cl_" + k, spectra[k]) for k in sorted(spectra)]
    for name, arr in arrays:
        h.update(name.encode())
        if arr is None:
            h.update(b"none")
            continue
        a = np.ascontiguousarray(arr, dtype=np.float64)
        h.update(repr(a.shape).encode())
        h.update(a.view(np.uint8).reshape(-1) if a.size else b"")
    h.update(repr((int(lmax), None if radius is None else float(radius).hex(), int(max_centres), int(order),
                   _ab.MIN_RADIUS_PIXELS, _ab._TABLE_POINTS, _ab._HIST_BINS)).encode())
    return h.hexdigest()


def polarized_averaging_bias(kind, mask, mask2, spectra, window, window2, lmax, *, radius=None,
                             max_centres=_ab.MAX_CENTRES, order=_ab.ORDER) -> dict:
    """Expected pseudo-spectra of pixel-averaged maps minus those of the window model, for given sky spectra.

    Parameters
    ----------
    kind : {'PP', 'TP'}
        'PP': Q, U of map a (weights ``mask``) with Q, U of map b (``mask2``): returns 'EE', 'BB', 'EB' (EB the
        mean of E_a B_b and B_a E_b).  'TP': T of map a (``mask``) with Q, U of map b (``mask2``): returns
        'TE', 'TB' (E_a T_b is 'TP' with the maps' roles swapped: the same pairs).
    mask, mask2 : ndarray of shape (12 nside^2,)
        Weights (RING); ``mask2`` None: the same as ``mask``.
    spectra : dict of str to array_like
        The beam-convolved sky spectra without pixel window, to the sky's band limit: 'EE', 'BB', 'EB' for
        'PP', 'TE', 'TB' for 'TP' (missing keys: zero).
    window, window2 : array_like
        The pixel windows the estimator divides out for the fields of map a and map b (``w_T`` or ``w_P``).
    lmax : int
        Largest multipole of the result.
    radius : float, optional
        Largest pair separation, radians (default 7 pixels).
    max_centres, order : int
        As :func:`cmbtools.spectrum.averaging_bias.averaging_bias`.

    Returns
    -------
    dict of str to ndarray of shape (lmax+1,)
        The bias of each pseudo-spectrum, in the units of ``spectra`` (new arrays on every call).
    """
    if kind not in ("PP", "TP"):
        raise ValueError(kind)
    names = ("EE", "BB", "EB") if kind == "PP" else ("TE", "TB")
    n = max(np.size(spectra[k]) for k in names if k in spectra)
    sp = {}
    for k in names:
        v = np.zeros(n)
        if k in spectra:
            a = np.asarray(spectra[k], dtype=np.float64)
            v[: a.size] = a
        sp[k] = v
    w_a = np.asarray(mask, dtype=np.float64)
    w_b = None if mask2 is None else np.asarray(mask2, dtype=np.float64)
    win_a = np.zeros(n)
    win_b = np.zeros(n)
    a = np.asarray(window, dtype=np.float64)[:n]
    win_a[: a.size] = a
    a = np.asarray(window2, dtype=np.float64)[:n]
    win_b[: a.size] = a
    key = _key(kind, w_a, w_b, sp, win_a, win_b, lmax, radius, max_centres, order)
    with _cache_lock:
        kept = _cache.get(key)
        if kept is not None:
            _cache.move_to_end(key)
            return {k: v.copy() for k, v in kept.items()}
    result = _pair_sums(kind, w_a, w_b, sp, win_a, win_b, lmax, radius, max_centres, order)
    with _cache_lock:
        _cache[key] = {k: v.copy() for k, v in result.items()}
        _cache.move_to_end(key)
        while len(_cache) > _ab.CACHE_SIZE:
            _cache.popitem(last=False)
    return result


def _pair_sums(kind, w_a, w_b, sp, win_a, win_b, lmax, radius, max_centres, order):
    import ducc0

    w_b = w_a if w_b is None else w_b
    npix = w_a.size
    nside = check_nside(int(round(math.sqrt(npix / 12))))
    if radius is None:
        radius = _ab.MIN_RADIUS_PIXELS * math.sqrt(4.0 * math.pi / npix)
    pp = kind == "PP"
    out_names = ("EE", "BB", "EB") if pp else ("TE", "TB")
    if not np.any(w_a != 0.0) or not np.any(w_b != 0.0):
        return {k: np.zeros(lmax + 1) for k in out_names}
    ell = np.arange(sp[out_names[0]].size)
    norm = (2.0 * ell + 1.0) / (4.0 * np.pi)
    win2 = win_a * win_b
    if pp:
        # xi_+ (d22), xi_- (d2-2), xi_EB (d2-2): averaged (no window) then model (windowed)
        series = [(norm * (sp["EE"] + sp["BB"]), (2, 2)), (norm * (sp["EE"] - sp["BB"]), (2, -2)),
                  (norm * sp["EB"], (2, -2))]
    else:
        series = [(norm * sp["TE"], (2, 0)), (norm * sp["TB"], (2, 0))]
    has = [bool(np.any(c != 0.0)) for c, _ in series]
    series = series + [(c * win2, k) for c, k in series]
    base = ducc0.healpix.Healpix_Base(nside, "RING")
    reach = radius + 2.0 * base.max_pixrad()
    chord_max = 2.0 * math.sin(min(reach, math.pi) / 2.0) * 1.0001
    step, tables = _tables([s for s, h in zip(series, has + has) if h], chord_max)
    it = iter(tables)
    tab = [next(it) if h else None for h in has + has]
    ntab = len(has)
    avg_t, mod_t = tab[:ntab], tab[ntab:]

    centres, share = _ab._centres(w_a, max_centres)
    theta, phi = base.pix2ang(centres).T
    hist_chord_max = 2.0 * math.sin(min(radius, math.pi) / 2.0) * 1.0001
    scale = _ab._HIST_BINS / hist_chord_max
    nh = 3 if pp else 2
    hist = np.zeros((nh, _ab._HIST_BINS + 2))
    block = max(1, (1 << 19) // (order**4))
    symmetric = pp and w_b is w_a and centres.size == np.count_nonzero(w_a)
    pairs_p, pairs_q, pairs_w = [], [], []
    for k, (p, th, ph) in enumerate(zip(centres, theta, phi)):
        ranges = base.query_disc(np.array([th, ph]), radius)
        q = np.concatenate([np.arange(a, b) for a, b in ranges])
        q = q[w_b[q] != 0.0]
        if symmetric:  # each unordered pair once: Re and the d2-2 terms are symmetric in p, q
            q = q[q >= p]
            pairs_w.append(np.where(q > p, 2.0, 1.0) * (w_a[p] * w_b[q]))
        else:
            pairs_w.append(share[k] * w_a[p] * w_b[q])
        pairs_p.append(np.full(q.size, p))
        pairs_q.append(q)
    pairs_p, pairs_q, pairs_w = np.concatenate(pairs_p), np.concatenate(pairs_q), np.concatenate(pairs_w)
    used, index = np.unique(np.concatenate([pairs_p, pairs_q]), return_inverse=True)
    index_p, index_q = index[: pairs_p.size], index[pairs_p.size :]
    nodes, wt = _ab._pixel_nodes(nside, used, order)
    eps = _frames(nodes)
    centre_vec = np.asarray(base.pix2vec(used))
    centre_eps = _frames(centre_vec)
    weight2 = np.outer(wt, wt).ravel()
    for s in range(0, pairs_p.size, block):
        ip, iq = index_p[s : s + block], index_q[s : s + block]
        npair = ip.size
        xp, xq = nodes[ip], nodes[iq]
        c2 = np.matmul(xp, xq.transpose(0, 2, 1)).reshape(npair, -1)
        c2 *= -2.0
        c2 += 2.0
        np.clip(c2, 0.0, None, out=c2)
        # frame factors: z_x at the nodes of p (towards the node of q), z_y at the nodes of q
        zy = _phase(np.matmul(xp, eps[iq].transpose(0, 2, 1)).reshape(npair, -1))  # x . eps_y
        cp, cq = centre_vec[ip], centre_vec[iq]
        centre2 = np.sum((cp - cq) ** 2, axis=1)
        zq = _phase(np.einsum("ij,ij->i", cp, centre_eps[iq]))  # centre frames
        if pp:
            zx = _phase(np.matmul(eps[ip], xq.transpose(0, 2, 1)).reshape(npair, -1))  # y . eps_x
            zp = _phase(np.einsum("ij,ij->i", centre_eps[ip], cq))
            # <P_r(p) P_r(q)*> and <P_r(p) P_r(q)> in the centres' frame, averaged over the node pairs
            plus = (_lookup(avg_t[0], step, c2) * (zx * zy.conj())) @ weight2 * (zp.conj() * zq)
            minus_nodes = np.zeros(c2.shape, dtype=np.complex128)
            if has[1]:
                minus_nodes += _lookup(avg_t[1], step, c2)
            if has[2]:
                minus_nodes += 2j * _lookup(avg_t[2], step, c2)
            minus = (minus_nodes * (zx * zy)) @ weight2 * (zp.conj() * zq.conj())
            d_plus = plus.real - _lookup(mod_t[0], step, centre2)
            d_minus = minus.real - (_lookup(mod_t[1], step, centre2) if has[1] else 0.0)
            d_cross = minus.imag - (2.0 * _lookup(mod_t[2], step, centre2) if has[2] else 0.0)
            deltas = (d_plus, d_minus, d_cross)
        else:
            # <T(p) P_r(q)> = -(xi_TE + i xi_TB): the T node at p, the P node at q
            nodes_val = np.zeros(c2.shape, dtype=np.complex128)
            if has[0]:
                nodes_val += _lookup(avg_t[0], step, c2)
            if has[1]:
                nodes_val += 1j * _lookup(avg_t[1], step, c2)
            val = (nodes_val * zy) @ weight2 * zq.conj()
            d_te = val.real - (_lookup(mod_t[0], step, centre2) if has[0] else 0.0)
            d_tb = val.imag - (_lookup(mod_t[1], step, centre2) if has[1] else 0.0)
            deltas = (d_te, d_tb)
        pos = np.sqrt(centre2) * scale
        i = np.minimum(pos.astype(np.intp), _ab._HIST_BINS)
        f = pos - i
        pw = pairs_w[s : s + block]
        for h, d in zip(hist, deltas):
            wgt = pw * d
            h += np.bincount(i, weights=wgt * (1.0 - f), minlength=_ab._HIST_BINS + 2)[: _ab._HIST_BINS + 2]
            h[1:] += np.bincount(i, weights=wgt * f, minlength=_ab._HIST_BINS + 1)[: _ab._HIST_BINS + 1]
    chord = np.arange(_ab._HIST_BINS + 2) / scale
    x = 1.0 - chord**2 / 2.0
    omega = 4.0 * np.pi / npix
    f = omega**2 / (4.0 * np.pi)
    if pp:
        a = wigner_d_adjoint(hist[0], (2, 2), x, lmax)
        b = wigner_d_adjoint(hist[1], (2, -2), x, lmax)
        c = wigner_d_adjoint(hist[2], (2, -2), x, lmax)
        return {"EE": f * 0.5 * (a + b), "BB": f * 0.5 * (a - b), "EB": f * 0.5 * c}
    # the tables hold +xi_TE, +xi_TB, so the deltas are minus those of <T Q_r>, <T U_r>: TE~ = -f sum ... d20
    return {"TE": f * wigner_d_adjoint(hist[0], (2, 0), x, lmax),
            "TB": f * wigner_d_adjoint(hist[1], (2, 0), x, lmax)}
