"""Exact Gaussian covariance of the lowest bins of the polarized pseudo-spectra (the "exact low-multipole block").

The narrow-kernel covariance of :mod:`cmbtools.spectrum.polarized_covariance` errs at the largest scales of a
small patch, where the window's kernels are as wide as the bins (first-bin error / scatter 0.73-1.27 on the
tapered cap of the Monte Carlo test).  There the covariance can be computed exactly for Gaussian skies and
Gaussian white pixel noise, by linear algebra on a small number of harmonic modes:

1. The estimator's map-to-coefficient step is linear: for the pseudo-coefficients ``a~`` of the exact bins
   (real orthonormal coordinates ``x_i``: ``a_l0``, ``sqrt(2) Re a_lm``, ``sqrt(2) Im a_lm``; the pseudo-Cl of a
   multipole is ``sum_i x_i y_i / (2l+1)``) it is ``a~ = A s + K n`` for the sky's coefficients ``s`` (every
   T, E, B mode up to ``L_sky = SKY_LMAX_FACTOR x`` the last exact multipole) and the pixel noise ``n``.  ``A``
   and ``K`` include everything the estimator does: the monopole/dipole removal of I (a weighted fit, a
   symmetric projection of the map), the masks, the spin-0/spin-2 analyses and, with purification, the pure-B
   terms with the window's spin-1 and spin-2 derivatives.
2. These steps are applied on a coarse HEALPix grid: the masks, window derivatives and noise weights averaged
   into ``nside_c`` pixels, the smallest power of two whose grid resolves the sky's modes, ``3 nside_c - 1 >=
   L_sky`` (at most the map's nside: there the step is the estimator's to rounding).  For the default first
   bin (ell 2-17, ``L_sky = 51``: ``nside_c = 32``) on an nside-64 map the block's errors differ from those on
   the map's own grid by 0.06-0.4 % (standard) and up to 1.6 % (purified BB); ``nside_c = 16`` would be 1-2 %
   and 20-140 % off.  Each row of
   ``A`` is the transposed step applied to one output mode (the adjoint: one synthesis at the output multipole
   times the windows, one analysis to ``L_sky``), so the cost grows with the few output modes, not with the
   many sky modes.
3. The pseudo-coefficient covariance is ``Sigma = A S A^T + K N K^T``: ``S`` the sky spectra as the maps see
   them (beams, pixel windows, transfer), ``N`` the pixel noise variance.  ``K N K^T`` is computed row by row as
   the forward step applied to the noise-weighted transposed step (exact, no noise simulations).
4. The binned pseudo-spectra are quadratic in ``a~``: Isserlis' theorem (Isserlis 1918, Biometrika 12, 134) gives
   ``Cov(x y, z w) = Sigma_xz Sigma_yw + Sigma_xw Sigma_yz`` for each pair of coordinates, summed with the
   binning weights (the Gaussian pseudo-Cl covariance of Efstathiou 2004, MNRAS 349, 603, here without the
   narrow-kernel approximation).

The sky spectra are taken from the measured bandpowers (piecewise in the bins, with the estimator's in-bin
shape, beyond the bins the nearest bin), so ``Sigma`` is linear in one amplitude per (spectrum, bin) and per
noise term.  The block is built once per estimator as Frobenius products of the per-amplitude terms (the Gram
tables below); an estimate only multiplies them by its amplitudes (microseconds).

Noise: white pixel noise of constant variance within each mask, its level taken from the data: the auto- minus
cross-pseudo-spectra of the two maps (cross-spectra), the subtracted noise bias (auto-spectra with
``noise_cl`` or ``noise_maps``); an auto-spectrum without a noise description carries its noise in the
measured bandpowers, as sky power.

TT alone (:func:`low_ell_temperature_block`): the same construction with the temperature field only (no spin-2
rows, TT amplitudes and the temperature noise) over one bin more than the six spectra's block.  The narrow-kernel
model correlates the first two TT bins too weakly on a small patch (0.10 against 0.22 exact on the Monte Carlo
test's tapered cap), and through the inverse coupling the second bin's error came out 3.2-3.7 % high with the first
bin alone exact (measured, Monte Carlo test's setting).  Its cost at nside 64 for the default bins (ell 2-33,
``L_sky = 99`` on an nside-64 grid) is about that of the six spectra's first-bin block (3.6 s against 3.1 s of CPU
for a cross-spectrum, measured at load ~10).

Left out: sky power above ``L_sky`` (it reaches the first bin only through the window's multipoles above
``L_sky - L_out``), and the noise's inhomogeneity (its level is the mean over the mask).
"""

from __future__ import annotations

import numpy as np

from cmbtools._core import sht as _sht

__all__ = ["SKY_LMAX_FACTOR", "low_ell_block", "low_ell_temperature_block", "temperature_bins"]

#: The sky's modes enter the exact block up to this multiple of the last exact multipole.
SKY_LMAX_FACTOR = 3

#: The amplitudes' own variance is taken out of the block unless that leaves a variance below this fraction.
UNBIASED_FLOOR = 0.25


def _coords(lmax, l_lo, l_hi):
    """Real coordinates of the multipoles l_lo..l_hi in an alm array of ``lmax``: (alm index, part, ell).

    part 0: ``a_l0``; 1: ``sqrt(2) Re a_lm``; 2: ``sqrt(2) Im a_lm`` (m > 0).
    """
    idx, part, ell = [], [], []
    for l in range(l_lo, l_hi + 1):
        for m in range(l + 1):
            i = m * (2 * lmax + 1 - m) // 2 + l
            if m == 0:
                idx.append(i), part.append(0), ell.append(l)
            else:
                idx += [i, i]
                part += [1, 2]
                ell += [l, l]
    return np.array(idx), np.array(part), np.array(ell)


def _to_real(alm, idx, part):
    a = alm[idx]
    return np.where(part == 0, a.real, np.where(part == 1, np.sqrt(2.0) * a.real, np.sqrt(2.0) * a.imag))


def _unit(lmax, i, p):
    a = np.zeros(_sht.alm_size(lmax), dtype=np.complex128)
    a[i] = 1.0 if p == 0 else (np.sqrt(0.5) if p == 1 else 1j * np.sqrt(0.5))
    return a


def _coarse_nside(nside, l_sky):
    """The smallest power of two whose grid resolves the sky's modes (3 n - 1 >= l_sky), at most the map's nside."""
    n = 1
    while 3 * n - 1 < l_sky:
        n *= 2
    return max(1, min(nside, n))


class _Side:
    """One map's map-to-coefficient step on the coarse grid (masks, removal, purification, noise weights)."""

    def __init__(self, est, which, nside_c, l_out, nthreads):
        from cmbtools.spectrum.deprojection_covariance import _averaged_down

        self.nthreads = nthreads
        self.nside = nside_c
        self.l_out = l_out
        t, p = est.masks["t" + which], est.masks["p" + which]
        k = (est.nside // nside_c) ** 2
        maps = [t, p, t * t, p * p]
        self.pure = est.purify_b
        if self.pure:
            eth_w, eth2_w = est._derivs[est._key_of["p" + which]]
            seen = p != 0
            maps += [np.where(seen, eth_w.real, 0.0), np.where(seen, eth_w.imag, 0.0),
                     np.where(seen, eth2_w.real, 0.0), np.where(seen, eth2_w.imag, 0.0)]
        coarse = maps if k == 1 else _averaged_down(maps, nside_c)
        self.wt, self.wp = coarse[0], coarse[1]
        # white noise of unit variance per map pixel, seen through the coarse pixels: the variance whose
        # weighted sum of squares equals the map's (zero where the window is)
        with np.errstate(divide="ignore", invalid="ignore"):
            self.nt = np.where(self.wt != 0, coarse[2] / (k * self.wt**2), 0.0)
            self.np_ = np.where(self.wp != 0, coarse[3] / (k * self.wp**2), 0.0)
        if self.pure:
            self.eth = coarse[4] + 1j * coarse[5]
            self.eth2 = coarse[6] + 1j * coarse[7]
        self.q = 4.0 * np.pi / self.wt.size
        self.rings_t = _sht.occupied_rings(self.wt)  # the transforms skip the rings the windows zero (exact)
        self.rings_p = _sht.occupied_rings(self.wp)
        self.remove = est.remove_monopole_dipole
        if self.remove:
            import healpy as hp

            v = np.array(hp.pix2vec(nside_c, np.arange(self.wt.size)))
            self.tmpl = np.vstack([np.ones(self.wt.size), v]).T  # (npix, 4): monopole and dipole
            a = self.tmpl.T @ (self.wt[:, None] * self.tmpl)
            self.ainv = np.linalg.inv(a)

    # the step: I -> T~ and Q, U -> E~, B~ (complex alm to l_out), as the estimator does it
    def project_t(self, m):
        """``W (1 - T (T^T W T)^-1 T^T W) m``: the masked map after the weighted monopole/dipole fit (symmetric)."""
        wm = self.wt * m
        if self.remove:
            wm = wm - self.wt * (self.tmpl @ (self.ainv @ (self.tmpl.T @ wm)))
        return wm

    def forward_t(self, m):
        return _sht.map2alm(self.project_t(m), self.l_out, nthreads=self.nthreads, rings=self.rings_t)

    def forward_p(self, q, u):
        if self.pure:
            from cmbtools.spectrum.purification import pure_eb_alm

            return pure_eb_alm(q, u, self.wp, self.eth, self.eth2, self.l_out, nthreads=self.nthreads,
                               rings=self.rings_p)
        e, b = _sht.map2alm_spin(np.stack([self.wp * q, self.wp * u]), 2, self.l_out, nthreads=self.nthreads,
                                 rings=self.rings_p)
        return e, b

    # the transposed step: the map whose dot product with the input map gives one real output coordinate
    def kernel_t(self, i, p):
        # the projection starts with the window: the rings it zeroes need no synthesis (exact)
        y = _sht.alm2map(_unit(self.l_out, i, p), self.nside, self.l_out, nthreads=self.nthreads, rings=self.rings_t)
        return self.q * self.project_t(y)

    def kernel_p(self, field, i, p, ell):
        u = _unit(self.l_out, i, p)
        z = np.zeros_like(u)
        qu = _sht.alm2map_spin(np.stack([u, z] if field == "E" else [z, u]), 2, self.nside, self.l_out,
                               nthreads=self.nthreads)
        kq, ku = self.wp * qu[0], self.wp * qu[1]
        if self.pure and field == "B" and ell >= 2:
            n_l = 1.0 / np.sqrt((ell - 1.0) * ell * (ell + 1.0) * (ell + 2.0))
            # spin-1 term: C[P conj(eth w)] with P conj(eth w) = (q a + u b) + i (u a - q b), eth w = a + i b
            rs = _sht.alm2map_spin(np.stack([z, 2.0 * n_l * np.sqrt(ell * (ell + 1.0)) * u]), 1, self.nside,
                                   self.l_out, nthreads=self.nthreads)
            a, b = self.eth.real, self.eth.imag
            kq = kq + a * rs[0] - b * rs[1]
            ku = ku + b * rs[0] + a * rs[1]
            # spin-0 term: -N_l a[Im(P conj(eth^2 w))], Im(...) = u c - q d, eth^2 w = c + i d
            t = _sht.alm2map(-n_l * u, self.nside, self.l_out, nthreads=self.nthreads)
            kq = kq - self.eth2.imag * t
            ku = ku + self.eth2.real * t
        if self.pure:
            seen = self.wp != 0
            kq, ku = np.where(seen, kq, 0.0), np.where(seen, ku, 0.0)
        return self.q * kq, self.q * ku


class _Operator:
    """Rows of A (sky modes to the exact bins' pseudo-coefficients) and the unit-noise covariance, one map."""

    def __init__(self, est, which, n_exact, nthreads, temperature_only=False):
        b = est.binning
        self.l_lo, self.l_hi = int(b.ell_min[0]), int(b.ell_max[n_exact - 1])
        self.l_sky = min(est.lmax, int(SKY_LMAX_FACTOR * self.l_hi))
        nside_c = _coarse_nside(est.nside, self.l_sky)
        side = _Side(est, which, nside_c, self.l_hi, nthreads)
        self.nside_c = nside_c
        idx, part, ell = _coords(self.l_hi, self.l_lo, self.l_hi)
        sidx, spart, sell = _coords(self.l_sky, 0, self.l_sky)
        self.ell, self.sky_ell = ell, sell
        n, ns = idx.size, sidx.size
        self.a_t = np.empty((n, ns))  # T~ <- T
        self.n_t = np.empty((n, n))  # unit noise: T~ T~
        polarized = not temperature_only
        self.a_p = np.empty((2 * n, 2 * ns)) if polarized else None  # (E~, B~) <- (E, B)
        self.n_p = np.empty((2 * n, 2 * n)) if polarized else None  # (E~, B~) (E~, B~)
        for r, (i, p, l) in enumerate(zip(idx, part, ell)):
            k = side.kernel_t(i, p)
            self.a_t[r] = _to_real(_sht.map2alm(k, self.l_sky, nthreads=nthreads, rings=side.rings_t), sidx,
                                   spart) / side.q
            self.n_t[r] = _to_real(side.forward_t(side.nt * k), idx, part)
            for f, off in (("E", 0), ("B", n)) if polarized else ():
                kq, ku = side.kernel_p(f, i, p, l)
                e, bb = _sht.map2alm_spin(np.stack([kq, ku]), 2, self.l_sky, nthreads=nthreads, rings=side.rings_p)
                self.a_p[off + r, :ns] = _to_real(e, sidx, spart) / side.q
                self.a_p[off + r, ns:] = _to_real(bb, sidx, spart) / side.q
                e, bb = side.forward_p(side.np_ * kq, side.np_ * ku)
                self.n_p[off + r, :n] = _to_real(e, idx, part)
                self.n_p[off + r, n:] = _to_real(bb, idx, part)
        self.n_t = 0.5 * (self.n_t + self.n_t.T)
        if polarized:
            self.n_p = 0.5 * (self.n_p + self.n_p.T)

    def rows(self, out_field, sky_field):
        """The (n_out, n_sky) block of output field (T, E, B) from sky field (T, E, B); None where zero."""
        n = self.ell.size
        ns = self.sky_ell.size
        if out_field == "T":
            return self.a_t if sky_field == "T" else None
        if sky_field == "T":
            return None
        r0 = 0 if out_field == "E" else n
        c0 = 0 if sky_field == "E" else ns
        return self.a_p[r0:r0 + n, c0:c0 + ns]


_FIELDS = ("T", "E", "B")
_SKY_SPECTRA = ("TT", "TE", "TB", "EE", "EB", "BB")


def _sky_weights(est, lmax):
    """Per multipole, the model of a unit bandpower (the bins' weighting times the in-bin shapes) per spectrum."""
    b = est.binning
    w = b.unit_bandpower_cl(lmax)
    shapes = est._in_bin_shapes()
    out = {}
    for s in _SKY_SPECTRA:
        sh = np.ones(lmax + 1) if shapes is None else np.asarray(shapes[s][: lmax + 1])
        out[s] = w * sh
    groups = np.clip(np.searchsorted(b.ell_min, np.arange(lmax + 1), side="right") - 1, 0, b.n_bins - 1)
    return out, groups


class LowEllBlock:
    """The exact covariance of the first ``n_exact`` bins of one pair of maps, as Gram tables of its terms."""

    def __init__(self, est, name, n_exact, nthreads, temperature_only=False):
        b = est.binning
        self.n_exact = n_exact
        fields = ("T",) if temperature_only else _FIELDS
        sky_spectra = ("TT",) if temperature_only else _SKY_SPECTRA
        sides = ("a",) if name == "11" else ("a", "b")
        which = {"a": "1", "b": "1" if name == "11" else "2"}
        ops = {}
        for s in sides:
            key = (est._key_of["t" + which[s]], est._key_of["p" + which[s]])
            if key not in ops:
                ops[key] = _Operator(est, which[s], n_exact, nthreads, temperature_only)
            ops[s] = ops[key]
        op = ops["a"]
        self.l_sky = op.l_sky
        self.nside_c = op.nside_c
        n = op.ell.size
        # binning weight of each coordinate, per exact bin: p_bl / (2l+1)
        p = b.averaging_weights(est.lmax)
        ell = op.ell
        binx = b.bin_index[ell]
        self.c = [np.where(binx == k, p[ell] / (2.0 * ell + 1.0), 0.0) for k in range(n_exact)]
        # the coordinates run by multipole: each bin's are a slice (the products below need only those)
        self.sel = [slice(int(np.argmax(binx == k)), int(binx.size - np.argmax(binx[::-1] == k)))
                    for k in range(n_exact)]
        weights, groups = _sky_weights(est, op.l_sky)
        sky_g = groups[op.sky_ell]
        self.groups = sorted(set(sky_g.tolist()))

        def factor(f, s):
            return est._factors[("t" if f == "T" else "p") + which[s]][: op.l_sky + 1]

        # sky coordinates are ordered by multipole: each group of multipoles is a slice
        bounds = {g: (int(np.argmax(sky_g == g)), int(sky_g.size - np.argmax(sky_g[::-1] == g))) for g in self.groups}
        ns = op.sky_ell.size

        def fed_by(o, u):
            """(output fields, rows) of the outputs that sky field u reaches."""
            return (("T",), o.a_t) if u == "T" else (("E", "B"), o.a_p[:, (0 if u == "E" else ns):][:, :ns])

        # the terms of every block (side1, field1, side2, field2): list of (amplitude key, matrix)
        terms = {}
        pairs = [(s1, s2) for i, s1 in enumerate(sides) for s2 in sides[i:]]
        done = {}
        for s1, s2 in pairs:
            o1, o2 = ops[s1], ops[s2]
            same_as = None
            for (d1, d2), blocks in done.items():
                if (ops[d1] is o1 and ops[d2] is o2 and all(np.array_equal(factor(f, d1), factor(f, s1))
                                                           and np.array_equal(factor(f, d2), factor(f, s2))
                                                           for f in fields)):
                    same_as = blocks
                    break
            if same_as is None:
                blocks = {}
                for spec in sky_spectra:
                    u, v = spec
                    tr = est._transfer[spec][: op.l_sky + 1]
                    for uu, vv in ((u, v), (v, u)) if u != v else ((u, v),):
                        f1, r1 = fed_by(o1, uu)
                        f2, r2 = fed_by(o2, vv)
                        d = (weights[spec] * tr * factor(uu, s1) * factor(vv, s2))[op.sky_ell]
                        for g in self.groups:
                            lo, hi = bounds[g]
                            m = (r1[:, lo:hi] * d[None, lo:hi]) @ r2[:, lo:hi].T
                            for i, x in enumerate(f1):
                                for j, y in enumerate(f2):
                                    lst = blocks.setdefault((x, y), {})
                                    part = m[i * n:(i + 1) * n, j * n:(j + 1) * n]
                                    k = ("s", spec, g)
                                    lst[k] = part if k not in lst else lst[k] + part
                done[(s1, s2)] = blocks
            else:
                blocks = same_as
            for x in fields:
                for y in fields:
                    lst = list(blocks.get((x, y), {}).items())
                    if s1 == s2:
                        if x == "T" and y == "T":
                            lst.append((("n", s1, "T"), o1.n_t))
                        elif x != "T" and y != "T":
                            r0 = 0 if x == "E" else n
                            c0 = 0 if y == "E" else n
                            lst.append((("n", s1, "P"), o1.n_p[r0:r0 + n, c0:c0 + n]))
                    terms[(s1, x, s2, y)] = lst
        self._terms = terms
        self.sides = sides
        self._gram = {}
        self._flat = {}

    def _flattened(self, f1, f2, b1, b2):
        """(keys, stacked flattened terms scaled by sqrt(c_b1) x sqrt(c_b2)) of one block (cached)."""
        key = (f1, f2, b1, b2)
        if key not in self._flat:
            t = self._block(f1, f2)
            s1, s2 = self.sel[b1], self.sel[b2]
            c1, c2 = np.sqrt(self.c[b1][s1]), np.sqrt(self.c[b2][s2])
            stack = np.empty((len(t), c1.size * c2.size))
            for r, (_, m) in enumerate(t):
                stack[r] = (c1[:, None] * m[s1, s2] * c2[None, :]).ravel()
            self._flat[key] = ([k for k, _ in t], stack)
        return self._flat[key]

    def _block(self, f1, f2):
        """Terms of the block of fields f1 = (side, field), f2: list of (key, matrix), transposed if needed."""
        key = (f1[0], f1[1], f2[0], f2[1])
        if key in self._terms:
            return self._terms[key]
        rev = self._terms[(f2[0], f2[1], f1[0], f1[1])]
        return [(k, m.T) for k, m in rev]

    def gram(self, x, z, y, w, bx, bz):
        """``c_bx^T (Sigma_xz o Sigma_yw) c_bz`` per pair of terms: (keys1, keys2, table)."""
        key = (x, z, y, w, bx, bz)
        if key not in self._gram:
            k1, f1 = self._flattened(x, z, bx, bz)
            k2, f2 = self._flattened(y, w, bx, bz)
            self._gram[key] = (k1, k2, f1 @ f2.T)
        return self._gram[key]

    def prepare(self, parts_of, comps):
        """The quadratic form of every covariance entry in the amplitudes, then drop the term matrices.

        Entry (i, bx, j, bz) of the covariance is ``a^T Q[i, bx, j, bz] a`` for the vector ``a`` of the
        amplitudes (:attr:`keys`).
        """
        grams = []
        for ci in comps:
            for cj in comps:
                for _, x, y in parts_of(ci):
                    for _, z, w in parts_of(cj):
                        x_, y_, z_, w_ = (self._side(f) for f in (x, y, z, w))
                        for bx in range(self.n_exact):
                            for bz in range(self.n_exact):
                                grams.append(self.gram(x_, z_, y_, w_, bx, bz))
                                grams.append(self.gram(x_, w_, y_, z_, bx, bz))
        keys = sorted({k for k1, k2, _ in grams for k in k1 + k2}, key=repr)
        pos = {k: i for i, k in enumerate(keys)}
        nc, ne, nk = len(comps), self.n_exact, len(keys)
        q = np.zeros((nc, ne, nc, ne, nk, nk))
        for i, ci in enumerate(comps):
            for j, cj in enumerate(comps):
                for wi, x, y in parts_of(ci):
                    for wj, z, w in parts_of(cj):
                        x_, y_, z_, w_ = (self._side(f) for f in (x, y, z, w))
                        for bx in range(ne):
                            for bz in range(ne):
                                for k1, k2, table in (self.gram(x_, z_, y_, w_, bx, bz),
                                                      self.gram(x_, w_, y_, z_, bx, bz)):
                                    if k1 and k2:
                                        i1 = np.array([pos[k] for k in k1])
                                        i2 = np.array([pos[k] for k in k2])
                                        q[i, bx, j, bz][np.ix_(i1, i2)] += wi * wj * table
        self.keys = keys
        self.quadratic = q
        self._terms = self._flat = self._gram = None

    def _side(self, f):
        return f if f[0] in self.sides else ("a", f[1])

    def covariance(self, amplitudes, amplitude_covariance=None):
        """(n_comp, n_exact, n_comp, n_exact) covariance of the binned pseudo-spectra for the given amplitudes.

        ``amplitude_covariance(key1, key2)``, if given, is the covariance of two measured amplitudes: the
        quadratic form then takes ``a a^T - Cov(a)``, whose mean is the product of the true amplitudes (the
        measured ones would raise the first bin's variance by their own relative variance, ~10 % there).
        """
        a = np.array([amplitudes.get(k, 0.0) for k in self.keys])
        out = np.einsum("ibjzkl,k,l->ibjz", self.quadratic, a, a)
        if amplitude_covariance is None:
            return out
        c = np.array([[amplitude_covariance(k1, k2) for k2 in self.keys] for k1 in self.keys])
        unbiased = out - np.einsum("ibjzkl,kl->ibjz", self.quadratic, c)
        n = out.shape[0] * out.shape[1]
        d_out, d_unb = np.diag(out.reshape(n, n)), np.diag(unbiased.reshape(n, n))
        # a measured amplitude far below its error (noise-dominated TB, EB) can make the difference meaningless:
        # keep the plain form then
        return unbiased if np.all(d_unb > UNBIASED_FLOOR * d_out) else out


def sky_amplitudes(values, n_bins, groups):
    """Amplitude per (spectrum, bin) from the six reported spectra (bins' weighting), made positive semi-definite.

    ``values``: dict spectrum -> (n_bins,) bandpowers.  Each bin's 3 x 3 matrix of TT..BB is projected onto the
    positive semi-definite matrices (negative eigenvalues set to zero).
    """
    amp = {}
    for g in groups:
        m = np.array([[values["TT"][g], values["TE"][g], values["TB"][g]],
                      [values["TE"][g], values["EE"][g], values["EB"][g]],
                      [values["TB"][g], values["EB"][g], values["BB"][g]]])
        # scale the fields alike before the projection (the spectra differ by orders of magnitude)
        d = np.sqrt(np.clip(np.abs(np.diag(m)), 1e-300, None))
        ev, vec = np.linalg.eigh(m / np.outer(d, d))
        m = (vec * np.clip(ev, 0.0, None)) @ vec.T * np.outer(d, d)
        for (i, j), s in zip(((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2)), _SKY_SPECTRA):
            amp[("s", s, g)] = float(m[i, j])
    return amp


def low_ell_block(est, name):
    """The estimator's exact low-multipole block of the pair ('11' or '12'), built on first use (cached)."""
    n_exact = est.exact_low_bins

    def make():
        blk = LowEllBlock(est, name, n_exact, est._threads())
        blk.prepare(est._parts, est._components_of(name))
        return blk

    return est._cached(("low_ell_block", name), make)


def temperature_bins(binning, n_exact):
    """The number of lowest bins of the exact TT-only block: one more than ``n_exact`` (none without it).

    The second bin's TT variance and its covariance with the first come mostly from the first bin's scales,
    which the narrow-kernel kernels spread too little (bin-to-bin correlation 0.10 against 0.22 exact on the
    Monte Carlo test's tapered cap): with the first bin exact alone the second bin's TT error was 1.037 of
    the exact Gaussian one, with both bins and their cross-covariance 1.001 (measured, noiseless auto-spectrum,
    all five bins exact as the reference).  The temperature field alone costs a fraction of the polarized
    block (no spin-2 rows, one spectrum in the Isserlis sums), so it reaches one bin further.
    """
    if n_exact == 0:
        return 0
    return min(binning.n_bins, n_exact + 1)


def low_ell_temperature_block(est, name):
    """The exact TT-only block of the pair over :func:`temperature_bins` bins, built on first use (cached)."""
    n_t = temperature_bins(est.binning, est.exact_low_bins)

    def make():
        blk = LowEllBlock(est, name, n_t, est._threads(), temperature_only=True)
        blk.prepare(est._parts, ("TT",))
        return blk

    return est._cached(("low_ell_temperature_block", name), make)
