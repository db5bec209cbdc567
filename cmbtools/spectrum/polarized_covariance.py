"""Gaussian covariance of the polarized pseudo-spectra, with the E-to-B leakage where the window varies.

The estimator's pseudo-coefficients are those of the masked fields; for Gaussian skies the pseudo-spectra
have the covariance (Efstathiou 2004, MNRAS 349, 603, in its cross-field form)

    Cov(X~Y_l, Z~W_l') = 1/((2l+1)(2l'+1)) sum_mm' [ <x_lm z*_l'm'> <y*_lm w_l'm'> + <x_lm w*_l'm'> <y*_lm z_l'm'> ]

The narrow-kernel approximation (Efstathiou 2004; improved by Garcia-Garcia, Alonso & Bellini 2019,
JCAP: the spectra are the *coupled* ones, divided by the mean of the window product) writes each
``<x_lm z*_l'm'>`` as ``sqrt(c^XZ_l c^XZ_l') K[w_x w_z]_lm,l'm'`` and each sum over m, m' of two kernels
as a coupling matrix ``Xi(u, v)_ll' = M[u x v]_ll' / (2l'+1)`` of the cross-spectrum of the window
products ``u`` and ``v``.  The kind of ``M`` follows the spins: a spin-s field seen through ``u`` has the
kernel ``int sY*_lm u sY_l'm'``, and the sum over m, m' of two such kernels is (the 3j form of the
products of spin-weighted harmonics, as in the spin-2 pseudo-Cl covariance of Challinor & Chon 2005,
MNRAS 360, 509, from memory) ``sum_L (2L+1)/(4 pi) U_L (l l' L; s1 -s1 0) (l l' L; s2 -s2 0)``: ``M00``
for two temperature pairings, ``M02`` for a temperature and a polarization pairing, and for two
polarization pairings the parity-even part of the spin-2 kernel that the E (or B) projection keeps,
``M++``.  A pairing of T with E or B has no same-spin form; its kernel is taken as ``M02`` too (the
kind of a pairing set is '00' without polarization fields, '++' with four, '02' otherwise).  The three
kinds agree where l >> the window's bandwidth; at the largest scales of a small patch they do not, and
there the spin kinds are used: in the rows and columns of the first bins, where the other parity takes
more than 10 % of the spin-2 coupling of the window product (``polarized_operator.covariance_kernel``), M00
above (there the in-field reduction below carries the parity; the spin kinds in every bin lowered the
errors at ell 18-80 by 1-3 %, away from the scatter).  Measured (the Monte Carlo test: 10-degree taper
of a 40-degree cap, first bin ell 2-17), reported error / simulated scatter in the first bin with M00
everywhere -> with the spin kinds: TE 1.28 -> 1.04, EE 1.13 -> 0.97, BB 1.24 -> 1.04, EB 1.06 -> 1.04,
TB 1.28 -> 1.15 (standard); the purified B's first bin is not mended (TB 1.26 -> 1.20, EB 1.35 -> 1.30,
BB 0.73 -> 0.73).  For spin-2 fields this is right only where E and B have the same
power: where the window varies, the masked E modes leak into the pseudo-B coefficients.

The leakage is local.  Smith (2006, PRD 74, 083002: the counter-terms of its pure estimator, in the
expansion the purification module uses) writes the standard pseudo-B of ``w P`` as the pure B
minus the terms ``2 N_l sqrt(l(l+1)) C[P eth-bar w] - N_l a[Im(P eth-bar^2 w)]``: for a pure-E sky the
leaked coefficients are those of the E field seen through the window's gradient, ``|eth w|`` (the
spin-2 term is smaller by a further factor ``|eth^2 w| / (l |eth w|)``).  Locally, for a mode of direction
``phi`` and a gradient of direction ``phi_w``, the leaked amplitude is ``a sin(phi - phi_w)``, and the E
mode keeps on average ``w^2 - a^2/2`` of its power (the pseudo-spectra's sum rule ``M++ + M-- = M00[w^2]`` on the
rows).  So every pseudo-field is a sum of sky fields seen through local windows:

    T~ : w_t T
    E~ : w E   (power w^2 + s w lap w)    - a sin(.) B
    B~ : w B   (power w^2 + s w lap w)    + a sin(.) E          (standard)
    B~ : w B + an incoherent part of power q' from B            (pure, no E)

with ``q = a^2/2 = s_b |eth w|^2``, where ``s_b`` makes the mean of ``q`` the mean leakage of bin b, the
row sums of the binned ``M--`` kernel (exact, with the sky's curvature and the spin-2 term).  The in-field
power is to first order ``w^2 + s_b w lap(w)`` (the rotation of the mode through the kernel: its mean is
``<w^2> - <q>`` after integrating by parts, but it sits where ``w`` curves, not where it slopes); for the
pure B, ``q'`` carries the row sums of ``R^2 M00`` above the mean of ``w^2``.  The coupled spectra ``c``
are solved from the measured binned pseudo-spectra with these row sums (the 2 x 2 system of EE and BB).
Products of two per-mode covariances average over the direction ``phi``: even terms (no leakage, or the
leaked power) multiply as they are; ``sin`` times ``sin`` (the E~ x B~ correlation of leaked modes, ``i``
times a real amplitude whose sign follows the field that carries the leak: ``E~ = K+ E + i K- B`` and
``B~ = K+ B - i K- E`` in the standard spin-2 algebra) counts half, with the sign of the pairing.  The
leaked power counts as an incoherent field: the 3/2 of a single direction's ``<sin^4>`` does not survive
the sum over the kernel's multipoles (with it, the BB scatter of a 10-degree taper is over-predicted by
~20 % at ell ~ 15; without, within 6 %: measured).  The in-field reduction is kept to first order (its
square, of order 1/l^4 of its own field's power, is left out; its product with the leaked power is kept,
as the leaked E can far exceed the B it is added to).  Every term has its own
kernel ``Xi(u, v)`` of its window products (the leakage lives in the taper, whose products have broad
kernels: much of their weight falls outside a narrow bin), of the kind of their pairing, except the
pure B's extra power, which keeps ``M00``.

The result is the covariance of the binned pseudo-spectra of the estimator's components; the estimator
propagates it through its inverse coupled system.
"""

from __future__ import annotations

import numpy as np

from cmbtools._core import sht as _sht

__all__ = ["pseudo_covariance", "covariance_requests", "window_derivative_maps"]

# angular averages of products of two per-mode terms (see the module notes)
_ANGULAR = {("even", "even"): 1.0, ("even", "s2"): 1.0, ("s2", "even"): 1.0, ("s2", "s2"): 1.0,
            ("odd", "odd"): 0.5, ("red", "even"): 1.0, ("even", "red"): 1.0, ("red", "s2"): 1.0, ("s2", "red"): 1.0}
# (the in-field reduction times itself is of order 1/l^4 of the same field's power: left out)


def window_derivative_maps(window, lmax, *, nthreads=None):
    """``|eth w|`` (the norm of the gradient, per radian) and ``lap w`` (its Laplacian, per steradian) of a window.

    Both from the window's coefficients up to lmax (one analysis, one spin-1 and one spin-0 synthesis).

    Parameters
    ----------
    window : ndarray of shape (12*nside**2,)
        The window, RING.
    lmax : int
        Band limit of the derivatives.
    nthreads : int, optional
        Threads of the transforms.

    Returns
    -------
    (ndarray, ndarray) of shape (12*nside**2,)
    """
    window = np.asarray(window, dtype=np.float64)
    nside = int(round(np.sqrt(window.size / 12)))
    w = _sht.map2alm(window, lmax, nthreads=nthreads, rings=_sht.occupied_rings(window))
    ell = _sht.alm_ell(lmax).astype(np.float64)
    g = -np.sqrt(ell * (ell + 1.0)) * w
    d = _sht.alm2map_spin(np.stack([g, np.zeros_like(g)]), 1, nside, lmax, nthreads=nthreads)
    lap = _sht.alm2map(-ell * (ell + 1.0) * w, nside, lmax, nthreads=nthreads)
    return np.hypot(d[0], d[1]), lap


def _per_unit(mean, moment):
    """Scale of a window-gradient map whose mean is ``mean`` (zero without a gradient: the full sky)."""
    if not moment > 0.0:
        return np.zeros_like(mean)
    return mean / moment


class _Model:
    """The per-mode covariances of one pair of maps, as sums of local window terms."""

    def __init__(self, est, name, spectra_of, structure_only=False):
        self.structure_only = structure_only
        self.est = est
        self.name = name
        self.spectra_of = spectra_of
        b = est.binning
        self.nb = b.n_bins
        self.rows = np.add.reduceat(b.averaging_weights(est.lmax), b.ell_min)
        self.pure = est.purify_b
        self._c = {}

    # ----------------------------------------------------------------- windows
    def mask(self, side, kind):
        """Key of the mask ('t1', 'p2', ...) of a side ('a', 'b') for T ('t') or polarization ('p')."""
        return self.est._mask_of((side, "T" if kind == "t" else "E"), self.name)

    def base(self, side, kind):
        """Key of a base map: 't1', 'p1', ..., 'd1', 'd2' (``|eth w|`` of a polarization mask), 'h1', 'h2' (its Laplacian)."""
        m = self.mask(side, "t" if kind == "t" else "p")
        return m if kind in ("t", "p") else kind + m[1]

    def map_id(self, key):
        """Identity of a base map (the same window under two keys has one identity)."""
        est = self.est
        return ("m", est._key_of[key]) if key[0] in "tp" else (key[0], est._key_of["p" + key[1]])

    def map(self, key):
        return self._map(key)

    def _map(self, key):
        est = self.est
        if key[0] in "tp":
            return est._unique[est._key_of[key]]
        j = est._key_of["p" + key[1]]
        d, h = est._cached(("window_derivative_maps", j), lambda: window_derivative_maps(
            est._unique[j], est.lmax, nthreads=est._threads()))
        return d if key[0] == "d" else h

    def moment(self, keys):
        """Mean over the sky of the product of the base maps (sorted key tuple, cached)."""
        est = self.est
        ids = tuple(sorted(("m", est._key_of[k]) if k[0] in "tp" else (k[0], est._key_of["p" + k[1]]) for k in keys))

        def make():
            prod = None
            for k in keys:
                m = self._map(k)
                prod = m if prod is None else prod * m
            return float(np.mean(prod))

        return est._cached(("window_moment",) + ids, make)

    def row_mean(self, kind, ma, mb):
        """Per-bin row sums / rows of a binned kernel of the two masks."""
        k = self.est._key_of
        key = (kind,) + tuple(sorted((k[ma], k[mb])))

        def make():
            kern = self.est._kernels({key})[key]
            return kern.sum(axis=1) / self.rows

        return self.est._cached(("row_mean",) + key, make)

    def leak(self, sa, sb):
        """(mean leakage per bin ``<q>``, scale ``s_b`` of ``|eth w_a| |eth w_b|``) of two polarization windows."""
        if self.structure_only:
            return np.ones(self.nb), np.ones(self.nb)
        key = ("leak", sa, sb)
        if key not in self._c:
            pa, pb = self.mask(sa, "p"), self.mask(sb, "p")
            mean_q = self.row_mean("--", pa, pb)
            self._c[key] = (mean_q, _per_unit(mean_q, self.moment((self.base(sa, "d"), self.base(sb, "d")))))
        return self._c[key]

    def extra(self, sa, sb):
        """Pure B: the power above ``<w_a w_b>`` (per bin) and its scale on ``|eth w_a| |eth w_b|``."""
        if self.structure_only:
            return np.ones(self.nb), np.ones(self.nb)
        key = ("extra", sa, sb)
        if key not in self._c:
            pa, pb = self.mask(sa, "p"), self.mask(sb, "p")
            q = self.row_mean("00RR", pa, pb) - self.est._moments(pa, pb)
            self._c[key] = (q, _per_unit(q, self.moment((self.base(sa, "d"), self.base(sb, "d")))))
        return self._c[key]

    # ----------------------------------------------------------------- coupled spectra
    def obs(self, x, y):
        return self.spectra_of(x, y)

    def c(self, u, v, sa, sb):
        """The coupled sky spectrum c^{UV} between side sa's field U and side sb's field V (per bin)."""
        if self.structure_only:
            return np.ones(self.nb)
        key = (u, v, sa, sb)
        if key not in self._c:
            self._c[key] = self._solve(u, v, sa, sb)
        return self._c[key]

    def _solve(self, u, v, sa, sb):
        est = self.est
        x, y = (sa, u), (sb, v)
        ma = self.mask(sa, "t" if u == "T" else "p")
        mb = self.mask(sb, "t" if v == "T" else "p")
        m = est._moments(ma, mb)
        if u == "T" and v == "T":
            return self.obs(x, y) / m
        if "T" in (u, v):
            other = v if u == "T" else u
            if other == "B" and self.pure:
                kind = "00R"
                return self.obs(x, y) / self.row_mean(kind, ma, mb)
            return self.obs(x, y) / m
        # both polarization fields
        lq, _ = self.leak(sa, sb)
        if u != v:  # EB or BE
            if self.pure:
                return self.obs(x, y) / self.row_mean("02R", ma, mb)
            return self.obs(x, y) / (m - 2.0 * lq)
        o_ee = self.obs((sa, "E"), (sb, "E"))
        o_bb = self.obs((sa, "B"), (sb, "B"))
        if self.pure:
            xq, _ = self.extra(sa, sb)
            c_bb = o_bb / (m + xq)
            c_ee = (o_ee - lq * c_bb) / (m - lq)
        else:
            det = (m - lq) ** 2 - lq**2
            c_ee = ((m - lq) * o_ee - lq * o_bb) / det
            c_bb = ((m - lq) * o_bb - lq * o_ee) / det
        self._c[("E", "E", sa, sb)] = c_ee
        self._c[("B", "B", sa, sb)] = c_bb
        return c_ee if u == "E" else c_bb

    # ----------------------------------------------------------------- per-mode terms
    def components(self, side, f):
        """(sky field, role, base-map kind, sign) of one pseudo-field."""
        if f == "T":
            return [("T", "in", "t", 1.0)]
        if f == "E":
            return [("E", "in", "p", 1.0), ("B", "leak", "d", -1.0)]
        if self.pure:
            return [("B", "in", "p", 1.0), ("B", "extra", "d", 1.0)]
        return [("B", "in", "p", 1.0), ("E", "leak", "d", 1.0)]

    def per_mode(self, x, z):
        """<x_lm z*_l'm'> as a list of (parity, per-bin amplitude, base maps)."""
        (sa, fx), (sb, fz) = x, z
        out = []
        for u, ru, ku, gu in self.components(sa, fx):
            for v, rv, kv, gv in self.components(sb, fz):
                maps = (self.base(sa, ku), self.base(sb, kv))
                c = self.c(u, v, sa, sb) * gu * gv
                if ru == "in" and rv == "in":
                    out.append(("even", c, maps))
                    reduced = fx != "T" and fz != "T" and not (self.pure and fx == "B" and fz == "B")
                    if reduced:  # the power a spin-2 mode loses to the other parity: w_a w_b + s (w_a h_b + h_a w_b) / 2
                        _, s = self.leak(sa, sb)
                        out.append(("red", 0.5 * c * s, (self.base(sa, "p"), self.base(sb, "h"))))
                        out.append(("red", 0.5 * c * s, (self.base(sa, "h"), self.base(sb, "p"))))
                elif ru == "leak" and rv == "leak":
                    _, s = self.leak(sa, sb)
                    out.append(("s2", c * s, maps))
                elif ru == "extra" and rv == "extra":
                    _, s = self.extra(sa, sb)
                    out.append(("even", c * s, maps))
                elif {ru, rv} == {"in", "leak"}:
                    # i times a real amplitude: <x z*> = i A, <z x*> = -i A^T (the leaked part is +-i K- of the
                    # other parity), so the sign follows the field that carries the leak
                    leak_side, order = (sb, 1.0) if rv == "leak" else (sa, -1.0)
                    _, s = self.leak(leak_side, leak_side)
                    out.append(("odd", order * c * np.sqrt(2.0 * np.clip(s, 0.0, None)), maps))
        return out


def _sym(o1, o2):
    return 0.5 * (np.outer(o1, o2) + np.outer(o2, o1))


def _ident(model, maps):
    return tuple(sorted(model.map_id(k) for k in maps))


def _kernel_key(model, u, v, kind="00"):
    """Key of a covariance kernel: its coupling kind ('00', '02', '++') and the identities of the window products."""
    return (kind,) + tuple(sorted((_ident(model, u), _ident(model, v))))


def _is_leak(key):
    return any(kind in ("d", "h") for part in key[1:] for kind, _ in part)


def _kernel_kind(fields):
    """Coupling kind of the kernel of one Isserlis pairing of four fields (see the module notes).

    No polarization field: '00'; four: '++'; else '02' (the T x spin-2 pairings).
    """
    n_pol = sum(f[1] != "T" for f in fields)
    return "00" if n_pol == 0 else ("++" if n_pol == 4 else "02")


def _field_map(model, field):
    return model.base(field[0], "t" if field[1] == "T" else "p")


def _structure(est, name):
    """The terms of every covariance block: which per-mode terms multiply which window-product kernel.

    Returns (per-mode pairs in order, blocks) where a block (i, j) is a list of (kernel key, reference
    key, indices of the first terms, indices of the second terms, factors, (u, v), (u_ref, v_ref)); the
    reference is the main kernel of the pairing (the fields' own windows).  Depends only on the masks,
    the pair and the purification, so it is built once.
    """
    def make():
        model = _Model(est, name, None, structure_only=True)
        order, offsets, sizes = [], {}, []
        terms_of = {}

        def per_mode(x, z):
            if (x, z) not in terms_of:
                terms = model.per_mode(x, z)
                offsets[(x, z)] = sum(sizes)
                order.append((x, z))
                sizes.append(len(terms))
                terms_of[(x, z)] = terms
            return [(offsets[(x, z)] + k, t[0], t[2]) for k, t in enumerate(terms_of[(x, z)])]

        comps = est._components_of(name)
        blocks = {}
        for i, ci in enumerate(comps):
            for j in range(i, len(comps)):
                groups = {}
                for wi, x, y in est._parts(ci):
                    for wj, z, w in est._parts(comps[j]):
                        for (p, q), (r, t) in (((x, z), (y, w)), ((x, w), (y, z))):
                            ref = ((_field_map(model, p), _field_map(model, q)),
                                   (_field_map(model, r), _field_map(model, t)))
                            kind = _kernel_kind((p, q, r, t))
                            ref_key = _kernel_key(model, *ref, kind)
                            for i1, t1, u in per_mode(p, q):
                                for i2, t2, v in per_mode(r, t):
                                    f = _ANGULAR.get((t1, t2))
                                    if f is None:
                                        continue
                                    # the pure B's extra power keeps the spin-0 kernel (its amplitude is
                                    # normalised on the 00RR row sums; with the spin kinds its first-bin error
                                    # fell from 0.75 to 0.61 of the scatter: measured)
                                    extra = ((t1 == "even" and any(m[0] == "d" for m in u))
                                             or (t2 == "even" and any(m[0] == "d" for m in v)))
                                    key = _kernel_key(model, u, v, "00" if extra else kind)
                                    g = groups.setdefault((key, ref_key), ([], [], [], (u, v), ref))
                                    g[0].append(i1)
                                    g[1].append(i2)
                                    g[2].append(wi * wj * f)
                blocks[(i, j)] = [(k, rk, np.array(a), np.array(b), np.array(c), uv, ref)
                                  for (k, rk), (a, b, c, uv, ref) in groups.items()]
        return order, blocks

    return est._cached(("covariance_structure", name), make)


def _products(model):
    products = {}

    def product(maps):
        i = _ident(model, maps)
        if i not in products:
            prod = None
            for m in maps:
                prod = model.map(m) if prod is None else prod * model.map(m)
            products[i] = prod
        return products[i]

    return product


def _pair_spectrum(model, product, u, v, lmax, nthreads):
    a, b = product(u), product(v)
    rings = _sht.occupied_rings(a) | _sht.occupied_rings(b)
    if _ident(model, u) == _ident(model, v):
        return _sht.map_spectra([a], lmax, nthreads=nthreads, rings=rings)[0]
    return _sht.map_spectra([a, b], lmax, nthreads=nthreads, rings=rings)[2]


def _pair_spectra(model, product, pairs, lmax, nthreads):
    """Cross-spectra to ``lmax`` of the window products of every (u, v) pair: each distinct pair once, each
    distinct product map transformed once (on the rings where it is not zero) when its coefficients are
    held whole, else pair by pair as :func:`_pair_spectrum`."""
    ids = [tuple(sorted((_ident(model, u), _ident(model, v)))) for u, v in pairs]
    first = {}
    for i, (u, v) in zip(ids, pairs):
        first.setdefault(i, (u, v))
    nside = int(round(np.sqrt(product(pairs[0][0]).size / 12))) if pairs else 0
    n_maps = len({_ident(model, m) for uv in first.values() for m in uv})
    done = {}
    if pairs and not _sht.runs_in_pieces(nside, lmax, n_maps):
        alms = {}

        def alm(maps):
            k = _ident(model, maps)
            if k not in alms:
                m = product(maps)
                alms[k] = _sht.map2alm(m, lmax, nthreads=nthreads, rings=_sht.occupied_rings(m))
            return alms[k]

        for i, (u, v) in first.items():
            done[i] = _sht.alm2cl(alm(u), alm(v), lmax=lmax)
    else:
        for i, (u, v) in first.items():
            done[i] = _pair_spectrum(model, product, u, v, lmax, nthreads)
    return [done[i] for i in ids]


def covariance_requests(est, name):
    """(keys, spectra) of the main window-product kernels (no gradient) the pair needs and the cache lacks.

    Their bin sums are taken to lmax with the estimator's couplings (quadrature); the leakage kernels are made by
    :func:`_leak_kernels`.
    """
    order, blocks = _structure(est, name)
    model = _Model(est, name, None, structure_only=True)
    missing = {}
    for items in blocks.values():
        for key, ref_key, _, _, _, uv, ref in items:
            for k, pair in ((key, uv), (ref_key, ref)):
                if not _is_leak(k) and ("cov_kernel",) + k not in est._cache and k not in missing:
                    missing[k] = pair
    product = _products(model)
    keys = list(missing)
    spectra = _pair_spectra(model, product, list(missing.values()), est.lmax, est._threads())
    return keys, spectra


#: The leakage's share of the pseudo-power, ~2 <|eth w|^2> / (l^2 <w^2>), below which its kernels are taken as
#: the main ones scaled by the means of the window products (their exact shape matters only where they count).
_LEAK_EXACT_DOWN_TO = 1e-3


def _leak_lmax(est, name, model):
    """Largest multipole of the exact leakage kernels: the end of the last bin where the leakage counts."""
    ratios = []
    for side in ("a", "b"):
        d = model.base(side, "d")
        p = model.base(side, "p")
        ratios.append(model.moment((d, d)) / max(model.moment((p, p)), 1e-300))
    ell_cut = np.sqrt(2.0 * max(ratios) / _LEAK_EXACT_DOWN_TO)
    b = est.binning
    exact = b.ell_max <= ell_cut
    if not np.any(exact):
        return -1, exact
    return int(b.ell_max[exact].max()), exact


def _leak_kernels(est, name):
    """The binned leakage kernels: exact below the cut (quadrature to the cut), scaled main kernels above."""
    done = ("leak_kernels_done", name)
    if done in est._cache:
        return

    order, blocks = _structure(est, name)
    model = _Model(est, name, None, structure_only=True)
    lc, exact = _leak_lmax(est, name, model)
    wanted = {}
    n_spin = {}
    for items in blocks.values():
        for key, ref_key, _, _, _, uv, ref in items:
            if _is_leak(key):
                wanted.setdefault(key, uv)
                if key[0] != "00":  # the spin kind in the first bins of the main kernel of the pairing
                    n_spin[key] = max(n_spin.get(key, 0), est._cache.get(("cov_kernel_spin_bins",) + ref_key, 0))
    exact_kernels = {}
    if lc >= 0 and wanted:
        from cmbtools.spectrum import spin_quadrature as _sq
        from cmbtools.spectrum.polarized_operator import covariance_kernel, covariance_weights

        product = _products(model)
        keys = list(wanted)
        # the taper's products have broad kernels: their spectra to 2 lc, all the kernel can use
        spectra = dict(enumerate(_pair_spectra(model, product, list(wanted.values()), 2 * lc, est._threads())))
        q = _sq.SpinCouplingQuadrature(lc, spectra, nthreads=est._threads())
        n_ex = int(np.count_nonzero(exact))
        proj = q.project(["2m2", "20", "22", "P"], covariance_weights(est.binning, lc, n_ex))
        for n, k in enumerate(keys):
            g, _ = covariance_kernel(q, n, k[0], proj, n_ex, n_low=None if k[0] == "00" else min(n_spin[k], n_ex))
            exact_kernels[k] = 0.5 * (g + g.T)
    n_exact = int(np.count_nonzero(exact))
    for items in blocks.values():
        for key, ref_key, _, _, _, uv, ref in items:
            ck = ("leak_kernel", key, ref_key)
            if not _is_leak(key) or ck in est._cache:
                continue
            main = est._cache[("cov_kernel",) + ref_key]
            scale = model.moment(uv[0] + uv[1]) / model.moment(ref[0] + ref[1])
            g = main * scale
            if key in exact_kernels:
                g = g.copy()
                g[:n_exact, :n_exact] = exact_kernels[key]
            g.setflags(write=False)
            est._cache[ck] = g
    est._cache[done] = True


def pseudo_covariance(est, name, spectra_of):
    """Gaussian covariance of the binned pseudo-spectra of the pair's components (see the module notes).

    Parameters
    ----------
    est : PolarizedSpectrumEstimator
        The estimator (its masks, kernels and caches).
    name : {'11', '12'}
        The pair of maps.
    spectra_of : callable
        ``spectra_of(x, y)``: the binned pseudo-spectrum of two fields ``(side, 'T'|'E'|'B')``.

    Returns
    -------
    ndarray of shape (n_comp * n_bins, n_comp * n_bins)
    """
    order, blocks = _structure(est, name)
    if ("covariance_kernels_done", name) not in est._cache:
        keys, spectra = covariance_requests(est, name)
        if keys:
            est._kernels(set(), covariance=(keys, spectra))
        est._cache[("covariance_kernels_done", name)] = True
    _leak_kernels(est, name)
    model = _Model(est, name, spectra_of)
    if ("window_maps_dropped", name) not in est._cache:
        # what the per-bin amplitudes need of the gradient maps, then the maps go (an estimator sent to
        # worker processes carries only per-bin arrays and numbers)
        for sa in ("a", "b"):
            for sb in ("a", "b"):
                model.moment((model.base(sa, "d"), model.base(sb, "d")))
        for key in [k for k in est._cache if k[0] == "window_derivative_maps"]:
            del est._cache[key]
        est._cache[("window_maps_dropped", name)] = True
    values = np.array([t[1] for xz in order for t in model.per_mode(*xz)])
    nb = model.nb
    n = len(est._components_of(name))
    cov = np.zeros((n * nb, n * nb))
    for (i, j), items in blocks.items():
        block = np.zeros((nb, nb))
        for key, ref_key, first, second, factors, _, _ in items:
            a = values[first] * factors[:, None]
            b = values[second]
            s = a.T @ b
            kernel = est._cache[("leak_kernel", key, ref_key) if _is_leak(key) else ("cov_kernel",) + key]
            block += 0.5 * (s + s.T) * kernel
        cov[i * nb:(i + 1) * nb, j * nb:(j + 1) * nb] = block
        cov[j * nb:(j + 1) * nb, i * nb:(i + 1) * nb] = block.T
    return cov
