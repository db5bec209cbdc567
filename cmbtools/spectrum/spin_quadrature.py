"""Weighted sums of the spin-0 and spin-2 coupling matrices by exact quadrature, without forming the matrices.

The coupling matrices of a weight spectrum ``W_L`` (``coupling`` module: ``M00``, ``M02``, ``M++``, ``M--``)
are sums over ``L`` of ``(2L+1)/(4 pi) W_L`` times products of two 3j symbols.  The integral of three
Wigner d-functions, ``int d^l_{m1 n1} d^l'_{m2 n2} d^L_{m3 n3} dx = 2 (l l' L; m1 m2 m3)(l l' L; n1 n2 n3)``
(``x = cos theta``, ``m1 + m2 + m3 = n1 + n2 + n3 = 0``; e.g. Varshalovich et al. 1988, Quantum Theory of
Angular Momentum, 4.11.1, from memory; checked here against ducc0's kernel to rounding, tests), turns each
into an integral against the weights' correlation function ``xi_W = sum_L (2L+1)/(4 pi) W_L P_L``::

    M00_ll' / (2l'+1) = 1/2 int P_l P_l' xi_W dx
    M02_ll' / (2l'+1) = 1/2 int d^l_20 d^l'_20 xi_W dx
    M++_ll' / (2l'+1) = 1/4 int (d^l_22 d^l'_22 + d^l_2-2 d^l'_2-2) xi_W dx
    M--_ll' / (2l'+1) = 1/4 int (d^l_22 d^l'_22 - d^l_2-2 d^l'_2-2) xi_W dx

(the parity factor ``(1 +- (-1)^(l+l'+L))/2`` of ``M++``/``M--`` is the ``d_2-2`` term, since
``(l l' L; 2 -2 0) = (-1)^(l+l'+L) (l l' L; -2 2 0)``).  Every ``d^l_mn`` with even ``m, n`` is a polynomial
of degree ``l`` in ``x``, so for rows and columns to ``lmax`` and ``W`` to ``2 lmax`` the integrand has degree
``4 lmax`` and Gauss-Legendre quadrature on ``2 lmax + 1`` nodes is exact.  With ``A_U(x) = sum_l U_l d^l(x)``
for a set of weight vectors ``U`` (columns), the sums

    U^T (M / (2l'+1)) V = c sum_i w_i xi_W(x_i) A_U(x_i) A_V(x_i)          (binned: bin sums of the matrix)
    (U^T M)_l' = (2l'+1) c sum_i w_i xi_W(x_i) A_U(x_i) d^l'(x_i)           (rows reduced, every column)

cost ``O(lmax^2 k)`` for ``k`` weight vectors (the d-functions by their three-term recurrence in ``l``, in
blocks of multipoles, and matrix products), where the coupling kernel's 3j symbols cost ``O(lmax^3)`` per
matrix.  The temperature covariance (``covariance._CouplingQuadrature``) does the same for ``M00``.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = []

#: Wigner d-function tables, (m, n) of ``d^l_mn``.
_MN = {"P": (0, 0), "20": (2, 0), "22": (2, 2), "2m2": (2, -2)}

#: Each coupling kind as (table, coefficient) terms: M_ll'/(2l'+1) = sum c int d^l d^l' xi_W dx.
_TERMS = {
    "00": (("P", 0.5),),
    "02": (("20", 0.5),),
    "++": (("22", 0.25), ("2m2", 0.25)),
    "--": (("22", 0.25), ("2m2", -0.25)),
    "+-": (("2m2", 0.5),),  # M++ - M--
}

#: Doubles per block of one d-function table (64 MB): the multipoles of a block are ``_BLOCK_DOUBLES // nodes``
#: (all of them up to lmax ~ 2000, where one matrix product per table does each sum).
_BLOCK_DOUBLES = 2**23


def _d_blocks(types, x, lmax, block=None):
    """Yield (l0, l1, {type: (l1 - l0, nodes) array of d^l(x)}) for l = 0..lmax, by the recurrence in l.

    ``d^{l+1} = [(2l+1)(l(l+1) x - m n) d^l - (l+1) sqrt((l^2-m^2)(l^2-n^2)) d^{l-1}]
    / [l sqrt(((l+1)^2-m^2)((l+1)^2-n^2))]``, from ``d^l = 0`` below ``l = max(|m|, |n|)`` and
    ``P_0 = 1``, ``P_1 = x``, ``d^2_22 = ((1+x)/2)^2``, ``d^2_2-2 = ((1-x)/2)^2``, ``d^2_20 = sqrt(3/8) (1-x^2)``.
    The tables run the recurrence together (one array of all types).
    """
    types = list(types)
    if block is None:
        block = max(64, _BLOCK_DOUBLES // max(1, x.size))
    nt = len(types)
    m = np.array([_MN[t][0] for t in types], dtype=np.float64)[:, None]
    n = np.array([_MN[t][1] for t in types], dtype=np.float64)[:, None]
    legendre = np.array([t == "P" for t in types])[:, None]
    starts = {"P": None, "22": 0.25 * (1.0 + x) ** 2, "2m2": 0.25 * (1.0 - x) ** 2,
              "20": math.sqrt(3.0 / 8.0) * (1.0 - x * x)}
    prev = np.zeros((nt, x.size))
    cur = np.zeros((nt, x.size))
    for l0 in range(0, lmax + 1, block):
        l1 = min(lmax + 1, l0 + block)
        tab = np.empty((nt, l1 - l0, x.size))
        for ell in range(l0, l1):
            if ell == 0:
                cur = np.where(legendre, 1.0, 0.0) * np.ones_like(x)
            elif ell == 1:
                prev, cur = cur, np.where(legendre, x[None, :], 0.0)
            elif ell == 2:
                nxt = np.empty_like(cur)
                for i, t in enumerate(types):
                    nxt[i] = 0.5 * (3.0 * x * cur[i] - prev[i]) if t == "P" else starts[t]
                prev, cur = cur, nxt
            else:
                k = ell - 1  # d^{k+1} from d^k, d^{k-1}
                den = k * np.sqrt(((k + 1) ** 2 - m * m) * ((k + 1) ** 2 - n * n))
                a = (2 * k + 1) / den
                b = (k + 1) * np.sqrt((k * k - m * m) * (k * k - n * n)) / den
                prev, cur = cur, a * (k * (k + 1) * x[None, :] - m * n) * cur - b * prev
            tab[:, ell - l0, :] = cur
        yield l0, l1, {t: tab[i] for i, t in enumerate(types)}


class SpinCouplingQuadrature:
    """Bin sums and row-reduced forms of the coupling matrices of weight spectra (see the module notes).

    Parameters
    ----------
    lmax : int
        Rows and columns ``l = 0..lmax`` of the matrices.
    spectra : dict
        Key -> weight (cross-)spectrum ``W_L`` from ``L = 0`` (used to ``2 lmax``; missing values are zero).
    nthreads : int
        Threads of the Legendre sums (ducc0's transforms restricted to m = 0).
    """

    def __init__(self, lmax, spectra, nthreads=1):
        from cmbtools.spectrum.covariance import _legendre_nodes, _legendre_sum

        self.lmax = int(lmax)
        n = 2 * self.lmax + 1
        theta, wts = _legendre_nodes(n)
        self._x = np.cos(theta)
        ell_w = np.arange(2 * self.lmax + 1)
        self._g = {}
        for key, w in spectra.items():
            wl = np.zeros(2 * self.lmax + 1)
            k = min(wl.size, np.asarray(w).size)
            wl[:k] = np.asarray(w, dtype=np.float64)[:k]
            xi = _legendre_sum((2 * ell_w + 1) / (4 * math.pi) * wl, theta, nthreads)
            self._g[key] = wts * xi
        self._tables = {}

    def _blocks(self, types):
        """The d-function tables in blocks of multipoles; kept when one block holds them all (the second pass
        of :meth:`reduced_rows` after :meth:`project` then reuses them)."""
        x = self._x
        if self.lmax + 1 > max(64, _BLOCK_DOUBLES // x.size):
            yield from _d_blocks(types, x, self.lmax)
            return
        missing = [t for t in types if t not in self._tables]
        if missing:
            for _, _, tabs in _d_blocks(missing, x, self.lmax):
                self._tables.update(tabs)
        yield 0, self.lmax + 1, {t: self._tables[t] for t in types}

    def project(self, types, vectors):
        """``A_U(x_i) = sum_l U_l d^l(x_i)`` per table type, for the columns of ``vectors`` (lmax+1, k)."""
        u = np.asarray(vectors, dtype=np.float64)
        out = {t: np.zeros((self._x.size, u.shape[1])) for t in types}
        for l0, l1, tabs in self._blocks(types):
            for t in types:
                out[t] += tabs[t].T @ u[l0:l1]
        return out

    def binned(self, kind, key, a_u, a_v):
        """``U^T (M / (2l'+1)) V`` of kind '00', '02', '++', '--' or '+-' from projections ``a_u``, ``a_v``."""
        g = self._g[key]
        res = None
        for t, c in _TERMS[kind]:
            part = c * (a_u[t].T @ (g[:, None] * a_v[t]))
            res = part if res is None else res + part
        return res

    def reduced_rows(self, requests):
        """``U^T M`` (columns ``l' = 0..lmax``, scaled by ``2 l' + 1``) for (kind, key, projections of U) queries.

        One pass of the d-function recurrence and one matrix product per table for all the requests; returns
        a list of (k, lmax+1) arrays.
        """
        types = sorted({t for kind, _, _ in requests for t, _ in _TERMS[kind]})
        parts = {t: [] for t in types}  # per table: (request index, weighted projection)
        sizes = []
        for r, (kind, key, a_u) in enumerate(requests):
            g = self._g[key]
            for t, c in _TERMS[kind]:
                parts[t].append((r, (c * g)[:, None] * a_u[t]))
            sizes.append(a_u[_TERMS[kind][0][0]].shape[1])
        stacked = {t: np.concatenate([f for _, f in parts[t]], axis=1) for t in types}
        outs = [np.zeros((k, self.lmax + 1)) for k in sizes]
        for l0, l1, tabs in self._blocks(types):
            for t in types:
                prod = tabs[t] @ stacked[t]  # (l1 - l0, columns of every request)
                pos = 0
                for r, f in parts[t]:
                    outs[r][:, l0:l1] += prod[:, pos:pos + f.shape[1]].T
                    pos += f.shape[1]
        col = 2.0 * np.arange(self.lmax + 1) + 1.0
        for o in outs:
            o *= col[None, :]
        return outs


def bin_vectors(weights, bin_index, n_bins):
    """The (lmax+1, n_bins) matrix of per-ell weights placed in their bins' columns (zero outside the bins)."""
    weights = np.asarray(weights, dtype=np.float64)
    u = np.zeros((weights.size, n_bins))
    sel = np.nonzero(bin_index[: weights.size] >= 0)[0]
    u[sel, bin_index[sel]] = weights[sel]
    return u
