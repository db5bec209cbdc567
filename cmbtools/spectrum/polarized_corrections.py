"""The polarized estimator's corrections from a guess of the sky spectra: monopole/dipole removal and power above the bins.

The temperature estimator's two corrections (:mod:`cmbtools.spectrum.deprojection`) carried over to the
coupled TT..BB system of :mod:`cmbtools.spectrum.polarized_operator`:

* **Deprojection bias** (Elsner, Leistedt & Peiris 2016, MNRAS 456, 2095).  The monopole and dipole of I
  are fitted on the masked sky and removed; Q and U have no monopole or dipole (they are spin-2 fields) and
  get no removal.  TT's bias is the temperature estimator's (:func:`~cmbtools.spectrum.deprojection.
  deprojection_bias`, on grids above ``COARSE_NSIDE`` :func:`~cmbtools.spectrum.deprojection.
  coarse_grid_deprojection_bias`).  TE and TB (only their T side is removed) get the one-sided term of the
  same formula, ``delta_l = - sum_ij (A^-1)_ij C_l[G_i, Y_j]`` with ``Y_j`` the E (B) coefficients that the
  estimator's own polarization transform (standard or pure B) gives of the mask times the Q, U field whose
  E and B coefficients are ``S^TE_l H_j,lm`` and ``S^TB_l H_j,lm`` (``H_j`` the exact pixel sums of the
  template times the temperature mask): exact on the grid for the guess.  Above ``COARSE_NSIDE`` it is
  computed on the masks averaged to nside ``ONE_SIDED_NSIDE`` = 128, with the guess and the pseudo-spectrum up to
  ell 256, and taken as zero above (the bias of a smooth removal lives at the largest scales).
* **Power above the bins**: the sky's multipoles from the last bin to ``sky_lmax`` leak into the bins
  through every kernel of the coupled system (the columns above the bins of the same P-reduced kernels up
  to lmax, a rectangular kernel call above lmax).

Both enter as a factor per bin on the rows of each component of the binned system,
``1 + P(delta + leak)_b / (P M F S_guess)_b`` (columns within the bins; the multipoles below the first bin,
such as the monopole and dipole left by an imperfect removal, count with the leakage): exact when the sky spectra are the
guess times one constant per spectrum, like the temperature estimator's per-multipole row factors.  A
component whose guess gives no pseudo-power in a bin (TB, EB with zero guesses; TE where its positive and
negative parts cancel to below 1 % of their absolute sum) is left uncorrected there.  The model of the spectrum inside a bin follows
the guess's shape where the guess keeps one sign over the bin (:func:`in_bin_shapes`).
"""

from __future__ import annotations

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools.spectrum import coupling as _coupling
from cmbtools.spectrum import deprojection as _dep
from cmbtools.spectrum.deprojection import binned_columns  # noqa: F401 (the polarized estimator's too)
from cmbtools.spectrum.errors import _reduce_rows

__all__ = []

#: Grid of the one-sided (TE, TB) removal bias for maps finer than ``COARSE_NSIDE``: the masks averaged to it,
#: the bias to ``2 ONE_SIDED_NSIDE`` and zero above (a quarter of the cost of ``COARSE_NSIDE``'s grid).
ONE_SIDED_NSIDE = 128

#: Bins where a component's guess pseudo-power is below this fraction of the same sum taken over absolute values
#: (kernel and guess) get no row factor: the guess cancels there.
SMALL_BASE = 1e-2


#: A bin's guess shape is used when its average is at least this fraction of the average of its absolute value.
SHAPE_CANCELLATION = 0.25


def in_bin_shapes(binning, lmax, guess):
    """Per sky spectrum, ``g_l / (Q P g)_l`` inside every bin where the guess's average is not a cancellation.

    The binned system then models the spectrum inside a bin as the guess's shape scaled to the bandpower
    (as :func:`cmbtools.spectrum.operator.in_bin_shape` for temperature), so that a sky whose spectrum is
    the guess gets the bin averages of its spectrum, not those of a flat approximation.  A bin where the
    guess (TE) changes sign so much that its average is below ``SHAPE_CANCELLATION`` of the average of its
    absolute value keeps the flat model (the shape would divide by a near-zero average), as do zero guesses.
    """
    p = binning.averaging_weights(lmax)
    q = binning.model_weights(lmax)
    out = {}
    for name, g in guess.items():
        g = np.asarray(g, dtype=np.float64)[: lmax + 1]
        shape = np.ones(lmax + 1)
        binned = np.add.reduceat(p * g, binning.ell_min)
        magnitude = np.add.reduceat(p * np.abs(g), binning.ell_min)
        for b in range(binning.n_bins):
            lo, hi = int(binning.ell_min[b]), int(binning.ell_max[b])
            seg = g[lo:hi + 1]
            if magnitude[b] > 0 and abs(binned[b]) >= SHAPE_CANCELLATION * magnitude[b]:
                model = q[lo:hi + 1] * binned[b]
                shape[lo:hi + 1] = seg / model
        out[name] = shape
    return out


def _coarse_mask(est, key):
    """A mask ('t1', 'p1', ...) averaged into the pixels of ``ONE_SIDED_NSIDE``, cached per distinct mask."""
    from cmbtools.spectrum.deprojection import _averaged_down

    j = est._key_of[key]
    return est._cached(("coarse_mask", j), lambda: _averaged_down(est._unique[j], ONE_SIDED_NSIDE))


def _deprojection_of(est, key, mask=None):
    """The monopole/dipole removal of a temperature mask ('t1', 't2'; ``mask``: a coarse version), cached."""
    tag = ("deprojection", key, "coarse" if mask is not None else "fine")
    return est._cached(tag, lambda: _dep.TemplateDeprojection(
        est.masks[key] if mask is None else mask, nthreads=est._threads()))


def _tt_signal(est, a, b):
    """The TT guess of maps a x b as seen on the grid (beams, windows, transfer), to sky_lmax."""
    return est._sky_factors["t" + a] * est._sky_factors["t" + b] * est._sky_transfer["TT"] * est._guess["TT"]


def start_tt_biases(est, names):
    """Start the coarse-grid part of the TT removal bias of each pair in ``names`` ('11', '12') on a thread.

    The futures wait in ``est._cache`` under ("tt_bias_below", a, b) for :func:`_tt_bias`; returns the
    executor (to be shut down by the caller) or None when the coarse-grid bias is not used.
    """
    if (est._guess is None or not est.remove_monopole_dipole or not est.correct_deprojection_bias
            or est.nside <= _dep.COARSE_NSIDE):
        return None
    import concurrent.futures

    executor = concurrent.futures.ThreadPoolExecutor(max_workers=1, thread_name_prefix="cmbtools-bias")
    for a, b in names:
        ta, tb = "t" + a, "t" + b
        same = est._key_of[ta] == est._key_of[tb]
        est._cache[("tt_bias_below", a, b)] = executor.submit(
            _dep.coarse_grid_bias_below, est.masks[ta], _tt_signal(est, a, b), est.lmax,
            mask2=None if same else est.masks[tb], nthreads=est._threads(),
        )
    return executor


def _tt_bias(est, a, b, signal):
    """delta^TT_l of maps a x b for the grid spectrum ``signal`` (to sky_lmax)."""
    lmax = est.lmax
    ta, tb = "t" + a, "t" + b
    same = est._key_of[ta] == est._key_of[tb]
    if est.nside > _dep.COARSE_NSIDE:
        mask_cl = est._mask_spectrum(est._key_of[ta], est._key_of[tb])
        below = est._cache.pop(("tt_bias_below", a, b), None)
        if below is not None:  # started by start_tt_biases for the same signal
            return _dep.continued_coarse_grid_bias(below.result(), lmax, mask_cl)
        return _dep.coarse_grid_deprojection_bias(
            est.masks[ta], signal, lmax, mask_cl, mask2=None if same else est.masks[tb], nthreads=est._threads()
        )
    da = _deprojection_of(est, ta)
    db = da if same else _deprojection_of(est, tb)
    return _dep.deprojection_bias(da, signal, lmax, deprojection2=None if same else db, nthreads=est._threads())


def _one_sided_bias(est, t_key, p_key, s_te, s_tb):
    """(delta^TE_l, delta^TB_l): the bias of removing T's monopole/dipole (mask ``t_key``) in T x (E, B) of ``p_key``.

    ``s_te``, ``s_tb``: the grid spectra (to sky_lmax) between the removed T and the polarization field.
    """
    lmax = est.lmax
    nthreads = est._threads()
    coarse = est.nside > _dep.COARSE_NSIDE
    if coarse:
        dep = _deprojection_of(est, t_key, _coarse_mask(est, t_key))
        p_mask = _coarse_mask(est, p_key)
        nside = ONE_SIDED_NSIDE
        top = min(lmax, 2 * nside)
        lw = min(np.size(s_te) - 1, top)  # the removal's bias lives at the largest scales
    else:
        dep = _deprojection_of(est, t_key)
        p_mask = est.masks[p_key]
        nside = est.nside
        top = lmax
        lw = max(np.size(s_te) - 1, lmax)
    s_e = np.zeros(lw + 1)
    s_b = np.zeros(lw + 1)
    n = min(lw + 1, np.size(s_te))
    s_e[:n] = np.asarray(s_te, dtype=np.float64)[:n]
    s_b[:n] = np.asarray(s_tb, dtype=np.float64)[:n]
    omega = 4.0 * np.pi / dep.mask.size
    rings = _sht.occupied_rings(p_mask)
    pure = est.purify_b and not coarse
    if pure:
        eth_w, eth2_w = est._derivs[est._key_of[p_key]]
    ye, yb, g = [], [], []
    for i in range(dep.n_templates):
        h = _sht.adjoint_sums(dep.template_map(i) * dep.mask, lw, nthreads=nthreads)
        g.append(omega * _dep._truncate(h, lw, top))
        q, u = _sht.alm2map_spin2(_sht.almxfl(h, s_e, lw), _sht.almxfl(h, s_b, lw), nside, lw, nthreads=nthreads)
        if pure:
            e, bb = _purified(q, u, p_mask, eth_w, eth2_w, top, nthreads, rings)
        else:
            e, bb = _sht.map2alm_spin2(q * p_mask, u * p_mask, top, nthreads=nthreads, rings=rings)
        ye.append(e)
        yb.append(bb)
    a_inv = dep.normal_inverse
    d_te = np.zeros(lmax + 1)
    d_tb = np.zeros(lmax + 1)
    for i in range(dep.n_templates):
        ce = sum(a_inv[i, j] * ye[j] for j in range(dep.n_templates))
        cb = sum(a_inv[i, j] * yb[j] for j in range(dep.n_templates))
        d_te[: top + 1] -= _sht.alm2cl(g[i], ce, lmax=top)
        d_tb[: top + 1] -= _sht.alm2cl(g[i], cb, lmax=top)
    return d_te, d_tb


def _purified(q, u, window, eth_w, eth2_w, lmax, nthreads, rings):
    from cmbtools.spectrum import purification

    return purification.pure_eb_alm(q, u, window, eth_w, eth2_w, lmax, nthreads=nthreads, rings=rings)


def _rect_kernels(est, wanted):
    """P-reduced kernels of columns lmax+1..sky_lmax for the keys (kind, i, j): one kernel call, cached."""
    lmax, lc = est.lmax, est.sky_lmax
    missing = sorted({k for k in wanted if ("rect_kernel",) + k not in est._cache})
    if missing:
        nthreads = est._threads()
        base = {}
        for kind, i, j in missing:
            bkind = {"00": "00", "00R": "00", "00RR": "00", "02": "02", "02R": "02"}.get(kind, "+-")
            base.setdefault((bkind, i, j), []).append(kind)
        spectra = {}
        for _, i, j in base:
            if (i, j) not in spectra:
                u = est._unique
                if i == j:
                    spectra[(i, j)] = _sht.map_spectra([u[i]], lmax + lc, nthreads=nthreads)[0]
                else:
                    spectra[(i, j)] = _sht.map_spectra([u[i], u[j]], lmax + lc, nthreads=nthreads)[2]
        requests = list(base)
        mats = _coupling.coupling_matrices([(b, spectra[(i, j)]) for b, i, j in requests], lmax, nthreads=nthreads,
                                           lmax_columns=lc)
        ratio = _coupling.pure_b_ratio(lmax, lc) if any(k[0].endswith("R") for k in missing) else None
        p_w = est.binning.averaging_weights(lmax)
        pos = 0
        for (b, i, j) in requests:
            if b == "+-":
                made = {"++": mats[pos], "--": mats[pos + 1]}
                made["+-"] = made["++"] - made["--"]
                pos += 2
            else:
                made = {b: mats[pos]}
                pos += 1
            for kind in base[(b, i, j)]:
                if kind.endswith("RR"):
                    m = made[b] * (ratio * ratio)
                elif kind.endswith("R"):
                    m = made[b] * ratio
                else:
                    m = made[kind]
                red = _reduce_rows(m[:, lmax + 1:].copy(), p_w, est.binning.ell_min)
                red.setflags(write=False)
                est._cache[("rect_kernel", kind, i, j)] = red
        del mats
    return {k: est._cache[("rect_kernel",) + k] for k in wanted}


def _polarized_averaging_biases(est, a, b, components, grid, window_t):
    """The pixel shapes' part of the expected pseudo-power of Q, U (and T x Q, U) maps averaged into pixels.

    Per component of maps a x b: TE/TB (T of a with Q, U of b), ET/BT (Q, U of a with T of b), EE/BB/EB, from
    :func:`~cmbtools.spectrum.polarized_averaging_bias.polarized_averaging_bias` with the guess as seen on the grid
    (without the pixel windows).  With B-mode purification the components with B are those of the pure B (its
    spin-1 and spin-0 terms weighted by the window's derivatives: the module notes of
    :mod:`~cmbtools.spectrum.polarized_averaging_bias`, "pure B").  The parts that share their masks
    (T and P of a map under one mask) are computed in one pass over the pairs of pixels.
    """
    from cmbtools.spectrum.averaging_bias import default_centres, pair_radius
    from cmbtools.spectrum.polarized_averaging_bias import polarized_averaging_bias
    from cmbtools.spectrum.spin2_pixel_window import polarization_pixel_window

    sky = est.sky_lmax
    lmax = est.lmax
    window_p = np.zeros(sky + 1)
    w = np.asarray(polarization_pixel_window(est.nside, sky, nthreads=est._threads()), dtype=np.float64)[: sky + 1]
    window_p[: w.size] = w
    wins = {"T": window_t, "E": window_p, "B": window_p}

    def sky_spectrum(col):
        """The guess of a column component on the grid without the two pixel windows (zero where they are)."""
        prod = wins[col[0]] * wins[col[1]]
        return np.where(prod > 0, grid(col) / np.where(prod > 0, prod, 1.0), 0.0)

    def radius(x, y):
        """:func:`pair_radius` of two mask names' fields (their beams, without the windows)."""
        fa = est._sky_factors[x] * est._sky_factors[y]
        wa, wb = wins["T" if x[0] == "t" else "E"], wins["T" if y[0] == "t" else "E"]
        prod = wa * wb
        return pair_radius(est.nside, np.where(prod > 0, fa / np.where(prod > 0, prod, 1.0), 0.0))

    spectra = {k: sky_spectrum(k) for k in ("EE", "BB", "EB", "TE", "TB")}
    key = est._key_of
    # E_a x T_b: the T x P sums with the beams of E_a and T_b (differ from T_a x E_b's when the maps' beams do)
    spectra_et = dict(spectra, TE=sky_spectrum("ET"), TB=sky_spectrum("BT")) if a != b else spectra
    et_same = all(np.array_equal(spectra[k], spectra_et[k]) for k in ("TE", "TB"))
    # the calls: (mask of map a's fields, mask of map b's fields, parts, spectra); parts sharing their masks and
    # spectra share one pass over the pairs
    if a == b:
        calls = ([("p" + a, None, ("PP", "TP"), spectra)] if key["t" + a] == key["p" + a]
                 else [("p" + a, None, ("PP",), spectra), ("t" + a, "p" + a, ("TP",), spectra)])
    elif key["t" + a] == key["p" + a] and key["t" + b] == key["p" + b]:
        calls = ([("p" + a, "p" + b, ("PP", "TP", "PT"), spectra)] if et_same
                 else [("p" + a, "p" + b, ("PP", "TP"), spectra), ("p" + a, "p" + b, ("PT",), spectra_et)])
    elif key["t" + a] == key["t" + b] and key["p" + a] == key["p" + b] and et_same:
        # both maps under the same pair of masks and beams: E_a T_b has the pairs of T_a E_b seen from the other end
        calls = [("p" + a, "p" + b, ("PP",), spectra), ("t" + a, "p" + b, ("TP",), spectra)]
    else:
        calls = [("p" + a, "p" + b, ("PP",), spectra), ("t" + a, "p" + b, ("TP",), spectra),
                 ("p" + a, "t" + b, ("PT",), spectra_et)]
    got = {}
    for first, second, parts, spec in calls:
        same = second is None or key[first] == key[second]
        fields = {"PP": ("p", "p"), "TP": ("t", "p"), "PT": ("p", "t")}[parts[0]]
        derivatives = None
        if est.purify_b:  # the window derivatives of each side whose field is Q, U (the pure B's weights)
            sides = [first, first if second is None else second]
            derivatives = tuple(est._derivs[key[m]] if m[0] == "p" else None for m in sides)
        got.update(polarized_averaging_bias(
            est.masks[first], None if same else est.masks[second], spec, window_t, window_p, lmax, parts=parts,
            radius=radius(fields[0] + a, fields[1] + b), max_centres=default_centres(est.nside),
            derivatives=derivatives))
    if "ET" in components and "ET" not in got:
        got["ET"], got["BT"] = got["TE"], got["TB"]
    # the measured components of maps a x b: TE = T_a E_b ('TP'), ET = E_a T_b ('PT'), TB/BT likewise
    names = {"EE": "EE", "BB": "BB", "EB": "EB", "TE": "TE", "TB": "TB", "ET": "ET", "BT": "BT"}
    out = {}
    for c, g in names.items():
        if c in components and g in got:
            out[c] = got[g]
    return out


def row_factors(est, a, b, components, terms, kernels):
    """Per component of maps a x b: the (n_bins,) factor ``1 + P(delta + leak) / (P M F S_guess)`` of its rows.

    ``terms``: component -> [(column component, kernel key)]; ``kernels``: key -> (n_bins, lmax+1) P M.
    Returns None when the estimator makes no correction.
    """
    from cmbtools.spectrum.polarized_operator import _SKY

    guess = est._guess
    if guess is None:
        return None
    lmax, sky = est.lmax, est.sky_lmax
    nb = est.binning.n_bins
    p_w = est.binning.averaging_weights(lmax)

    def grid(col):
        """The guess of a column component as seen on the grid (beams, windows, transfer), to sky_lmax."""
        fa = est._sky_factors[("t" if col[0] == "T" else "p") + a]
        fb = est._sky_factors[("t" if col[1] == "T" else "p") + b]
        return fa * fb * est._sky_transfer[_SKY[col]] * guess[_SKY[col]]

    rect = {}
    if sky > lmax:
        wanted = {key for c in components for col, key in terms[c] if np.any(guess[_SKY[col]] != 0)}
        rect = _rect_kernels(est, wanted)
    bias = {}
    if est.remove_monopole_dipole and est.correct_deprojection_bias:
        bias["TT"] = _tt_bias(est, a, b, grid("TT"))
        for c in components:
            if c in ("TE", "ET"):
                t_side, p_side = ("t" + a, "p" + b) if c == "TE" else ("t" + b, "p" + a)
                s_te, s_tb = grid("TE"), grid("TB")
                if c == "ET":  # E_a x T_b: the T side is map b
                    fa_t, fb_p = est._sky_factors["t" + b], est._sky_factors["p" + a]
                    s_te = fa_t * fb_p * est._sky_transfer["TE"] * guess["TE"]
                    s_tb = fa_t * fb_p * est._sky_transfer["TB"] * guess["TB"]
                d_te, d_tb = _one_sided_bias(est, t_side, p_side, s_te, s_tb)
                bias[c] = d_te
                bias["TB" if c == "TE" else "BT"] = d_tb
    if getattr(est, "averaged_pixels", False):
        # maps averaged into pixels: the pixel shapes' part of TT's expected pseudo-power (the temperature
        # estimator's correction, the sky's power, joined to the leakage)
        from cmbtools.spectrum.averaging_bias import averaging_bias, default_centres, pair_radius
        from cmbtools.spectrum.pixel_windows import pixel_window

        window = np.zeros(sky + 1)
        w = np.asarray(pixel_window(est.nside, sky, nthreads=est._threads()), dtype=np.float64)[: sky + 1]
        window[: w.size] = w
        safe = np.where(window > 0, window**2, 1.0)
        signal = grid("TT")
        ta, tb = est.masks["t" + a], est.masks["t" + b]
        same = est._key_of["t" + a] == est._key_of["t" + b]
        factor = est._sky_factors["t" + a] * est._sky_factors["t" + b]
        shape = averaging_bias(ta, signal / safe, window, lmax, mask2=None if same else tb,
                               radius=pair_radius(est.nside, factor / safe), max_centres=default_centres(est.nside),
                               nthreads=est._threads())
        bias["TT"] = shape if "TT" not in bias else bias["TT"] + shape
        for c, shape in _polarized_averaging_biases(est, a, b, components, grid, window).items():
            bias[c] = shape if c not in bias else bias[c] + shape
    inside = binned_columns(est.binning, lmax)
    out = {}
    for c in components:
        base = np.zeros(nb)
        extra = np.zeros(nb)
        magnitude = np.zeros(nb)
        for col, key in terms[c]:
            s = grid(col)[: lmax + 1]
            k = kernels[key]
            base += k @ np.where(inside, s, 0.0)
            magnitude += np.abs(k) @ np.where(inside, np.abs(s), 0.0)
            extra += k @ np.where(inside, 0.0, s)
            if key in rect:
                s = grid(col)
                extra += rect[key] @ s[lmax + 1: sky + 1]
        if c in bias:
            extra += np.add.reduceat(p_w * bias[c], est.binning.ell_min)
        # a bin is corrected unless its guess pseudo-power cancels (a sign change of TE inside the bin, zero
        # TB/EB guesses): judged per bin against the same sum of absolute values, not against the largest bin
        # (a beam makes the top bins' pseudo-power of every spectrum tiny against the first ones')
        ok = np.abs(base) > SMALL_BASE * magnitude
        r = np.ones(nb)
        r[ok] += extra[ok] / base[ok]
        out[c] = r
    for key in [k for k in est._cache if k[0] in ("deprojection", "coarse_mask")]:
        del est._cache[key]  # map-sized: not kept (an estimator sent to workers carries per-bin arrays)
    return out
