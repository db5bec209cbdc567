"""The binned coupled system of the polarized spectra and its inverse, built once per pair of maps.

The coupled system (Kogut et al. 2003, ApJS 148, 161; Hivon et al. 2002, ApJ 567, 2, eq. A31 extended to
spin 2; the kernels are listed in the coupling module) is, for the pseudo-spectra ``X~`` of the masked
maps and the sky spectra ``X`` times ``F^X_l = B^a_l B^b_l p^a_l p^b_l T^X_l``::

    TT~ = M00 TT     TE~ = M02 TE     TB~ = M02 TB
    EE~ = M++ EE + M-- BB      BB~ = M-- EE + M++ BB      EB~ = (M++ - M--) EB

With B-mode purification (Smith 2006, PRD 74, 083002) the B coefficients are the pure ones and the rows
involving B become ``TB~ = R.M00 TB``, ``EB~ = R.M02 EB``, ``BB~ = R^2.M00 BB`` with
``R_ll' = N_l / N_l'`` (see :func:`~cmbtools.spectrum.coupling.pure_b_ratio`): no E leaks into B.  Binned
with the averaging operator ``P`` and the piecewise-flat model ``Q``, the system is a square matrix of
``n_spectra x n_bins`` rows whose inverse gives the bandpowers; the EE/BB block is solved jointly, which
removes the E/B mixing of the mask on average.

:class:`_PolarizedOperator` is the base of :class:`~cmbtools.spectrum.PolarizedSpectrumEstimator`: its
immutable state, the masks' spectra and moments, the P-reduced coupling kernels and the binned covariance kernels
(exact Gauss-Legendre sums of Wigner d-functions, :mod:`cmbtools.spectrum.spin_quadrature`: no matrix is formed;
the pure B's kinds by ducc0's kernel) and the binned operator :class:`_Pair` of map 1 x map 1 and map 1 x map 2.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools._core.checks import resolve_nthreads
from cmbtools.exceptions import IllConditionedError
from cmbtools.spectrum import coupling as _coupling
from cmbtools.spectrum import polarized_corrections as _corrections
from cmbtools.spectrum import spin_quadrature as _sq
from cmbtools.spectrum.errors import _reduce_cols, _reduce_rows

__all__ = []


#: The spectra measured for a pair of maps a, b ('ET' is E_a x T_b, 'BT' is B_a x T_b); the sky spectrum
#: each one estimates, and the two fields (index 0..2 for T, E, B of map a and of map b).
_COMPONENTS_AUTO = ("TT", "TE", "TB", "EE", "EB", "BB")
_COMPONENTS_CROSS = ("TT", "TE", "ET", "TB", "BT", "EE", "EB", "BB")
_SKY = {"TT": "TT", "TE": "TE", "ET": "TE", "TB": "TB", "BT": "TB", "EE": "EE", "EB": "EB", "BB": "BB"}
_FIELD = {"T": 0, "E": 1, "B": 2}


#: Components solved together (the EE/BB block); every other component is decoupled alone.
_GROUPS_AUTO = (("TT",), ("TE",), ("TB",), ("EE", "BB"), ("EB",))
_GROUPS_CROSS = (("TT",), ("TE",), ("ET",), ("TB",), ("BT",), ("EE", "BB"), ("EB",))


@dataclasses.dataclass(frozen=True, eq=False)
class _Pair:
    """The binned operator of one pair of maps (a, b)."""

    components: tuple
    ainv: np.ndarray  # (n_comp * n_bins, n_comp * n_bins)
    pmf: dict  # component -> list of (column component, (n_bins, lmax+1) P M F)
    pm: dict  # component -> list of (column component, (n_bins, lmax+1) P M), for the noise bias
    condition_number: float
    rows: dict | None = None  # component -> (n_bins,) row factors of the corrections (None: no correction)


def _freeze(a):
    a = np.ascontiguousarray(a)
    a.setflags(write=False)
    return a


#: The share of the spin-2 coupling of a window product that goes to the other parity (the M-- row sums over
#: the M++ + M-- ones, per bin) above which the covariance kernels of polarization fields take their spin kind.
PARITY_SHARE_SPIN_KERNELS = 0.1


#: The coupling of each P-reduced kernel kind ('00R' is R.M00, R_ll' = N_l / N_l', ...) and the power of R.
_KIND_BASE = {"00": ("00", 0), "00R": ("00", 1), "00RR": ("00", 2), "02": ("02", 0), "02R": ("02", 1),
              "++": ("++", 0), "--": ("--", 0), "+-": ("+-", 0)}


def _quadrature_types(kinds):
    return sorted({t for k in kinds for t, _ in _sq._TERMS[k]})


def covariance_kernel(q, key, kind, proj, nb, n_low=None):
    """The binned covariance kernel ``G_bb' = sum_{l in b, l' in b'} r_l M_ll'/(2l'+1) r_l'`` of one window
    product (quadrature ``q``, spectrum ``key``) and its number of spin-kind bins.

    ``proj``: the projections (:meth:`SpinCouplingQuadrature.project`) of the (lmax+1, nb + 1) weights, the
    per-bin ``r_l`` columns and a last column ``2l'+1`` over every multipole (the row sums).  Kind '00': M00.
    Kinds '02' and '++': the spin kind (M02, or M++) in the rows and columns of the first bins, those where
    the other parity takes more than ``PARITY_SHARE_SPIN_KERNELS`` of the spin-2 coupling (the largest
    scales of a patch); M00 elsewhere (there the in-field reduction terms carry the parity: with the spin
    kinds in every bin the polarized errors at ell 18-80 came out 1-3 % lower, and M00 matched the scatter;
    measured).  ``n_low``: the number of spin-kind bins if fixed by the caller.
    """
    a = {t: v[:, :nb] for t, v in proj.items()}
    g = q.binned("00", key, a, a)
    if kind == "00":
        return g, 0
    if n_low is None:
        ones = {t: v[:, nb:nb + 1] for t, v in proj.items() if t in ("22", "2m2")}
        rows_pp = q.binned("++", key, a, ones)[:, 0]
        rows_mm = q.binned("--", key, a, ones)[:, 0]
        with np.errstate(invalid="ignore", divide="ignore"):
            share = np.where(rows_pp + rows_mm > 0, rows_mm / (rows_pp + rows_mm), 0.0)
        above = share > PARITY_SHARE_SPIN_KERNELS
        n_low = int(np.argmin(above)) if not above.all() else above.size
    if n_low:
        gs = q.binned("02" if kind == "02" else "++", key, a, a)
        g[:n_low, :] = gs[:n_low, :]
        g[:, :n_low] = gs[:, :n_low]
    return g, n_low


def covariance_weights(binning, lmax, n_bins=None):
    """(lmax+1, n_bins + 1): the per-bin ``r_l = 1/n_b`` columns of the first ``n_bins`` bins (default all) and
    the column ``2l'+1`` of the row sums, for :func:`covariance_kernel`."""
    nb = binning.n_bins if n_bins is None else int(n_bins)
    idx = np.full(lmax + 1, -1)
    n = min(lmax + 1, binning.bin_index.size)
    idx[:n] = binning.bin_index[:n]
    idx[idx >= nb] = -1
    r = np.zeros(lmax + 1)
    sel = np.nonzero(idx >= 0)[0]
    r[sel] = 1.0 / binning.n_ell[idx[sel]]
    u = np.zeros((lmax + 1, nb + 1))
    u[:, :nb] = _sq.bin_vectors(r, idx, nb)
    u[:, nb] = 2.0 * np.arange(lmax + 1) + 1.0
    return u


class _PolarizedOperator:
    """State, mask spectra, coupling kernels and binned operators of the polarized estimator (its base class).

    The subclass's constructor sets, with :meth:`_set`: ``lmax``, ``binning``, ``purify_b``, ``_unique``
    (the distinct masks), ``_key_of`` (mask name 't1', 'p1', 't2', 'p2' -> index in ``_unique``),
    ``_factors`` (beam times pixel window of each mask name), ``_transfer`` (per sky spectrum),
    ``_max_cond``, ``_nthreads`` and ``_cache``.
    """

    def _set(self, name, value):
        object.__setattr__(self, name, value)

    def __setattr__(self, name, value):
        raise AttributeError(f"PolarizedSpectrumEstimator is immutable; cannot set {name!r}")

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_nthreads"] = None  # a worker process uses its own thread budget
        return state

    def __setstate__(self, state):
        for k, v in state.items():
            object.__setattr__(self, k, v)

    def _cached(self, key, make):
        """A derived quantity of the masks and settings, computed on first use and kept."""
        c = self._cache
        if key not in c:
            c[key] = make()
        return c[key]

    def _threads(self):
        return resolve_nthreads(self._nthreads)

    def _moments(self, *keys):
        """mean of the product of the named masks ('t1', 'p2', ...)."""
        idx = tuple(sorted(self._key_of[k] for k in keys))

        def make():
            prod = np.ones(self.masks["t1"].size)
            for i in idx:
                prod = prod * self._unique[i]
            return float(np.mean(prod))

        return self._cached(("moment",) + idx, make)

    # ------------------------------------------------------------------ couplings
    def _mask_spectrum(self, i, j):
        """Cross-spectrum (plain quadrature, to 2 lmax) of unique masks i and j."""
        i, j = sorted((i, j))

        def make():
            u = self._unique
            lw = 2 * self.lmax
            nthreads = self._threads()
            if i == j:
                return _sht.map_spectra([u[i]], lw, nthreads=nthreads, rings=_sht.occupied_rings(u[i]))[0]
            rings = _sht.occupied_rings(u[i]) | _sht.occupied_rings(u[j])
            s = _sht.map_spectra([u[i], u[j]], lw, nthreads=nthreads, rings=rings)
            self._cache.setdefault(("mask_spectrum", i, i), s[0])
            self._cache.setdefault(("mask_spectrum", j, j), s[1])
            return s[2]

        return self._cached(("mask_spectrum", i, j), make)

    def _kernels(self, wanted, covariance=None):
        """P-reduced coupling matrices (n_bins, lmax+1) for keys (kind, i, j); missing ones computed and cached.

        Kinds: '00', '02', '++', '--', '+-' (= ++ minus --), and for the pure B '00R' (R.M00), '00RR'
        (R^2.M00), '02R' (R.M02), with ``R = N_l / N_l'`` (:func:`pure_b_ratio`).  ``covariance``: the
        (keys, spectra) of binned covariance kernels to compute too; a key's first item is its kind, '00',
        '02' or '++' (:func:`covariance_kernel`).  No matrix is formed: the P-reduced rows and the bin sums
        are exact Gauss-Legendre sums of Wigner d-functions (:mod:`cmbtools.spectrum.spin_quadrature`; equal
        to ducc0's coupling kernel reduced the same way to rounding, tested), except the pure B's kinds
        (one call of ducc0's kernel, see below).
        """
        missing = sorted({k for k in wanted if ("kernel",) + k not in self._cache})
        cov_keys, cov_spectra = covariance if covariance is not None else ((), ())
        if not missing and not cov_keys:
            return {k: self._cache[("kernel",) + k] for k in wanted}
        lmax = self.lmax
        b = self.binning
        p_w = b.averaging_weights(lmax)
        nb = b.n_bins
        # the pure B's kinds (R = N_l / N_l' grows as (l'/l)^2) from ducc0's kernel: its matrices keep their
        # relative precision in the small far-off-diagonal entries that R multiplies (a sum on the nodes has
        # an absolute rounding error, which R^2 would raise to 1e-11 of a row at lmax 32 and more above)
        ratio_kinds = [k for k in missing if _KIND_BASE[k[0]][1] > 0]
        missing = [k for k in missing if _KIND_BASE[k[0]][1] == 0]
        if ratio_kinds:
            base = {}
            for kind, i, j in ratio_kinds:
                base.setdefault((_KIND_BASE[kind][0], i, j), []).append(kind)
            mats = _coupling.coupling_matrices([(k, self._mask_spectrum(i, j)) for k, i, j in base], lmax,
                                               nthreads=self._threads())
            ratio = _coupling.pure_b_ratio(lmax)
            for m, (bk, i, j) in zip(mats, base):
                for kind in base[(bk, i, j)]:
                    r = ratio if _KIND_BASE[kind][1] == 1 else ratio * ratio
                    self._cache[("kernel", kind, i, j)] = _freeze(_reduce_rows(m * r, p_w, b.ell_min))
            del mats
        spectra = {("mask", i, j): self._mask_spectrum(i, j) for _, i, j in missing}
        spectra.update({("cov", n): w for n, w in enumerate(cov_spectra)})
        if not missing and not cov_keys:
            return {k: self._cache[("kernel",) + k] for k in wanted}
        q = _sq.SpinCouplingQuadrature(lmax, spectra, nthreads=self._threads())
        # every weight vector in one projection per d-function table
        columns, where = [], {}
        if missing:
            where[0] = (0, None)
            columns.append(_sq.bin_vectors(p_w, b.bin_index, nb))
        if cov_keys:
            where["cov"] = (len(columns), None)
            columns.append(covariance_weights(b, lmax))
        types = _quadrature_types([_KIND_BASE[k][0] for k, _, _ in missing]
                                  + (["00", "02", "++"] if cov_keys else []))
        proj = q.project(types, np.concatenate(columns, axis=1))
        offsets = np.cumsum([0] + [c.shape[1] for c in columns])

        def part(slot):
            k = where[slot][0]
            return {t: v[:, offsets[k]:offsets[k + 1]] for t, v in proj.items()}

        if missing:
            reqs = [(kind, ("mask", i, j), part(0)) for kind, i, j in missing]
            for (kind, i, j), m in zip(missing, q.reduced_rows(reqs)):
                self._cache[("kernel", kind, i, j)] = _freeze(m)
        if cov_keys:
            pc = part("cov")
            for n, k in enumerate(cov_keys):
                g, n_low = covariance_kernel(q, ("cov", n), k[0], pc, nb)
                if k[0] != "00":
                    self._cache[("cov_kernel_spin_bins",) + k] = n_low
                self._cache[("cov_kernel",) + k] = _freeze(0.5 * (g + g.T))
        return {k: self._cache[("kernel",) + k] for k in wanted}

    def _terms(self, comp, a, b):
        """[(column component, kernel key)] of one pseudo-spectrum component of maps a x b."""
        k = self._key_of

        def key(kind, x, y):
            i, j = sorted((k[x], k[y]))
            return (kind, i, j)

        ta, pa, tb, pb = "t" + a, "p" + a, "t" + b, "p" + b
        pure = self.purify_b
        if comp == "TT":
            return [("TT", key("00", ta, tb))]
        if comp == "TE":
            return [("TE", key("02", ta, pb))]
        if comp == "ET":
            return [("ET", key("02", pa, tb))]
        if comp in ("TB", "BT"):
            x, y = (ta, pb) if comp == "TB" else (pa, tb)
            return [(comp, key("00R", x, y) if pure else key("02", x, y))]
        if comp == "EE":
            return [("EE", key("++", pa, pb)), ("BB", key("--", pa, pb))]
        if comp == "BB":
            if pure:
                return [("BB", key("00RR", pa, pb))]
            return [("EE", key("--", pa, pb)), ("BB", key("++", pa, pb))]
        if comp == "EB":
            return [("EB", key("02R", pa, pb) if pure else key("+-", pa, pb))]
        raise KeyError(comp)

    def _factor(self, col, a, b):
        """``F_l`` of a column component: beams times pixel windows of its two fields, times the transfer."""
        fa = self._factors[("t" if col[0] == "T" else "p") + a]
        fb = self._factors[("t" if col[1] == "T" else "p") + b]
        return fa * fb * self._transfer[_SKY[col]]

    def _pair(self, name):
        """The binned operator of map 1 x map 1 ('11') or map 1 x map 2 ('12'), built on first use."""
        return self._cached(("pair", name), lambda: self._build_pair(*name))

    def _build_pair(self, a, b):
        comps = _COMPONENTS_AUTO if a == b else _COMPONENTS_CROSS
        groups = _GROUPS_AUTO if a == b else _GROUPS_CROSS
        binning, lmax = self.binning, self.lmax
        nb = binning.n_bins
        terms = {c: self._terms(c, a, b) for c in comps}
        kernels = self._kernels({key for t in terms.values() for _, key in t})
        q = binning.model_weights(lmax)
        rows = _corrections.row_factors(self, a, b, comps, terms, kernels)
        shapes = self._in_bin_shapes()
        u = np.zeros(lmax + 1)
        idx = binning.bin_index
        sel = np.nonzero(idx >= 0)[0]
        u[sel] = 1.0 / binning.n_ell[idx[sel]]
        pmf, pm = {}, {}
        for c in comps:
            pmf[c] = [(col, _freeze(kernels[key] * self._factor(col, a, b)[None, :])) for col, key in terms[c]]
            pm[c] = [(col, kernels[key]) for col, key in terms[c]]
        ainv = np.zeros((len(comps) * nb, len(comps) * nb))
        sigmas = []
        for group in groups:
            n = len(group)
            block = np.zeros((n * nb, n * nb))
            scale = np.zeros(n * nb)
            for r, c in enumerate(group):
                for col, km in pmf[c]:
                    s = group.index(col)
                    qc = q if shapes is None else q * shapes[_SKY[col]]
                    part = _reduce_cols(km.copy(), qc, binning.ell_min)
                    if rows is not None:
                        part *= rows[c][:, None]
                    block[r * nb:(r + 1) * nb, s * nb:(s + 1) * nb] += part
                f_mean = np.add.reduceat(self._factor(c, a, b) * u, binning.ell_min)
                if np.any(~(np.abs(f_mean) > 1e-300)):
                    bad = int(np.argmax(~(np.abs(f_mean) > 1e-300)))
                    raise IllConditionedError(
                        f"The binned coupled system of {_SKY[c]} is singular (condition number inf): the beam, pixel "
                        f"window or transfer function is zero over bin {bad} (ell {int(binning.ell_min[bad])}-"
                        f"{int(binning.ell_max[bad])}); lower lmax or end the bins before that multipole.",
                        np.inf,
                    )
                scale[r * nb:(r + 1) * nb] = f_mean
            normalised = block / scale[None, :]
            if not np.all(np.isfinite(normalised)):
                raise IllConditionedError("The binned coupled system has non-finite entries (condition number inf).", np.inf)
            sigmas.append(np.linalg.svd(normalised, compute_uv=False))
            where = [comps.index(c) for c in group]
            inv = np.linalg.inv(block)
            for r, cr in enumerate(where):
                for s, cs in enumerate(where):
                    ainv[cr * nb:(cr + 1) * nb, cs * nb:(cs + 1) * nb] = inv[r * nb:(r + 1) * nb, s * nb:(s + 1) * nb]
        sv = np.concatenate(sigmas)
        cond = float(sv.max() / sv.min()) if sv.min() > 0 else np.inf
        if not np.isfinite(cond) or cond > self._max_cond:
            narrow = int(binning.n_ell.min())
            raise IllConditionedError(
                f"The binned coupled system of the polarized spectra is ill-conditioned: condition number "
                f"{cond:.3g} (the limit is {self._max_cond:.3g}); the bandpowers cannot be told apart on these "
                f"masks. Use wider bins (the narrowest has {narrow} multipole{'s' if narrow != 1 else ''}), "
                f"apodize the masks more, or lower lmax.",
                cond,
            )
        return _Pair(tuple(comps), _freeze(ainv), pmf, pm, cond,
                     None if rows is None else {c: _freeze(v) for c, v in rows.items()})

    def _in_bin_shapes(self):
        """Per sky spectrum, the guess's shape inside each bin (None without a guess); see polarized_corrections."""
        if self._guess is None:
            return None
        return self._cached(("in_bin_shapes",), lambda: {
            k: _freeze(v) for k, v in _corrections.in_bin_shapes(self.binning, self.lmax, self._guess).items()})
