"""The binned MASTER operator: mask spectra -> mode-coupling matrices -> binned matrices and their inverses.

:func:`build_operator` is where a :class:`~cmbtools.spectrum.SpectrumEstimator`
builds its coupling (through :mod:`cmbtools.spectrum.coupling`, the only caller
of ducc0's coupling kernel) and the covariance kernels
(:func:`cmbtools.spectrum.errors.covariance_kernel`).  Notation as in
:mod:`cmbtools.spectrum.estimator`: bandpowers are ``(P M F Q)^-1 P C~``.
"""

from __future__ import annotations

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools._core.checks import resolve_nthreads
from cmbtools.exceptions import IllConditionedError
from cmbtools.spectrum import coupling as _coupling
from cmbtools.spectrum.errors import _reduce_cols, _reduce_rows
from cmbtools.spectrum.errors import covariance_kernel as _covariance_kernel

def _binned_operator(pm, factor, binning, lmax, max_cond, what):
    """Binned matrix ``A = P M F Q`` from ``P M``; check its conditioning; return ``A^-1`` and the condition number."""
    q = binning.model_weights(lmax)
    a = _reduce_cols(pm * factor[None, :], q, binning.ell_min)
    # divide out the mean of F over every bin so that the test measures the mask coupling only
    u = np.zeros(lmax + 1)
    idx = binning.bin_index
    sel = np.nonzero(idx >= 0)[0]
    u[sel] = 1.0 / binning.n_ell[idx[sel]]
    f_mean = np.add.reduceat(factor * u, binning.ell_min)
    if np.any(~(np.abs(f_mean) > 1e-300)):
        b = int(np.argmax(~(np.abs(f_mean) > 1e-300)))
        raise IllConditionedError(
            f"The {what} is singular (condition number inf): the beam, pixel window or transfer function "
            f"is zero over bin {b} (ell {int(binning.ell_min[b])}-{int(binning.ell_max[b])}); "
            f"lower lmax or end the bins before that multipole.",
            np.inf,
        )
    normalised = a / f_mean[None, :]
    if not np.all(np.isfinite(normalised)):
        raise IllConditionedError(f"The {what} has non-finite entries (condition number inf).", np.inf)
    cond = float(np.linalg.cond(normalised))
    if not np.isfinite(cond) or cond > max_cond:
        narrow = int(binning.n_ell.min())
        raise IllConditionedError(
            f"The {what} is ill-conditioned: condition number {cond:.3g} (the limit is {max_cond:.3g}); "
            f"the bandpowers cannot be told apart on this mask. Use wider bins (the narrowest has "
            f"{narrow} multipole{'s' if narrow != 1 else ''}), apodize the mask more, or lower lmax.",
            cond,
        )
    return np.linalg.inv(a), cond


def build_operator(inp, nthreads) -> dict:
    """Everything :class:`SpectrumEstimator` precomputes from its settings ``inp`` (:class:`EstimatorSettings`).

    The masks' spectra to ``2 lmax`` (kept), the mode-coupling matrices (rows bin-averaged),
    the inverses of the binned matrices with their condition number, the
    covariance kernels (``covariance=True``) and the mask moments.
    """
    nthreads = resolve_nthreads(nthreads)
    lmax, binning = inp.lmax, inp.binning
    lw = _coupling.mask_lmax(lmax, inp.nside, inp.n_iter)
    p = binning.averaging_weights(lmax)
    fast = inp.fast

    f1 = inp.beam1**2 * inp.pixel_window**2 * inp.transfer1
    f2 = inp.beam2**2 * inp.pixel_window**2 * inp.transfer2
    f12 = inp.beam1 * inp.beam2 * inp.pixel_window**2 * np.sqrt(inp.transfer1 * inp.transfer2)
    same_factor = np.array_equal(f1, f2) and np.array_equal(f1, f12)

    # the coarse-grid monopole/dipole bias needs neither the fine mask spectrum nor the coupling: it runs on a
    # thread while the mask's transform and the coupling kernel run
    # and so do the pixel shapes' sums of averaged maps (after it, on the same thread: the kernels use the cores)
    executor, pending = None, {}
    coarse, averaged = _coarse_bias_applies(inp), bool(inp.averaged_pixels and inp.sky_factors is not None)
    if coarse or averaged:
        import concurrent.futures

        executor = concurrent.futures.ThreadPoolExecutor(max_workers=1, thread_name_prefix="cmbtools-bias")
        couplings = ("11",) if inp.mask2 is None else ("11", "12", "22")
        for which in couplings if coarse else ():
            pending[which] = executor.submit(_coarse_bias_below, inp, which, nthreads)
        for which in couplings if averaged else ():
            pending["averaged" + which] = executor.submit(_averaging_shape, inp, which, nthreads)
    try:
        return _build_operator(inp, nthreads, lmax, binning, lw, p, fast, f1, f2, f12, same_factor, pending)
    finally:
        if executor is not None:
            executor.shutdown(wait=True, cancel_futures=True)


def _build_operator(inp, nthreads, lmax, binning, lw, p, fast, f1, f2, f12, same_factor, pending):
    if inp.n_iter == 0:  # never holds the masks' full coefficients (see _sht.map_spectra)
        masks = [inp.mask1] if inp.mask2 is None else [inp.mask1, inp.mask2]
        rings = _sht.occupied_rings(inp.mask1)
        if inp.mask2 is not None:
            rings = rings | _sht.occupied_rings(inp.mask2)
        spectra = _sht.map_spectra(masks, lw, nthreads=nthreads, rings=rings)
        w11 = spectra[0]
        if inp.mask2 is not None:
            w22, w12 = spectra[1], spectra[2]
    else:
        alm1 = _sht.map2alm(inp.mask1, lw, n_iter=inp.n_iter, nthreads=nthreads)
        w11 = _sht.alm2cl(alm1, lmax=lw)
        if inp.mask2 is not None:
            alm2 = _sht.map2alm(inp.mask2, lw, n_iter=inp.n_iter, nthreads=nthreads)
            w22 = _sht.alm2cl(alm2, lmax=lw)
            w12 = _sht.alm2cl(alm1, alm2, lmax=lw)
            del alm2
        del alm1

    deps = deprojections(inp, nthreads)

    def pm_of(w, which):
        # P (1 + r) M for the windows and the noise; P (1 + r + t) M for the binned matrix (t: power above the bins)
        m = _coupling.coupling_matrix(w, lmax, fast=fast, nthreads=nthreads)
        rows = _correction_rows(inp, m, which, deps, nthreads, mask_cl=w, coarse_below=pending.get(which),
                                averaged=pending.get("averaged" + which))
        if rows is None:
            pm = _reduce_rows(m, p, binning.ell_min)
            return pm, pm
        bias_rows, leak_rows = rows  # row factors folded into the bin weights: no copy of m
        pm = _reduce_rows(m, p * bias_rows, binning.ell_min)
        if np.array_equal(bias_rows, leak_rows):  # no power above the bins: no second matrix
            return pm, pm
        return pm, _reduce_rows(m, p * leak_rows, binning.ell_min)

    shape = in_bin_shape(binning, lmax, inp.guess_cl)
    what = "binned mode-coupling matrix"
    pm11, pma11 = pm_of(w11, "11")
    ainv11, cond11 = _binned_operator(pma11, f1 * shape, binning, lmax, inp.max_condition_number, what)
    if inp.mask2 is None:
        pm12 = pm22 = None
        if same_factor:
            ainv12 = ainv22 = None
        else:
            ainv12, _ = _binned_operator(pma11, f12 * shape, binning, lmax, inp.max_condition_number, what + " of map 1 x map 2")
            ainv22, _ = _binned_operator(pma11, f2 * shape, binning, lmax, inp.max_condition_number, what + " of map 2")
    else:
        pm12, pma12 = pm_of(w12, "12")
        pm22, pma22 = pm_of(w22, "22")
        ainv12, _ = _binned_operator(pma12, f12 * shape, binning, lmax, inp.max_condition_number, what + " of map 1 x map 2")
        ainv22, _ = _binned_operator(pma22, f2 * shape, binning, lmax, inp.max_condition_number, what + " of map 2")

    from cmbtools.maps.masks import mask_moments

    mom1 = mask_moments(inp.mask1)
    if inp.mask2 is None:
        fsky12 = mom1.f_sky_eff
    else:
        fsky12 = mask_moments(np.sqrt(inp.mask1 * inp.mask2)).f_sky_eff

    g11 = g12 = None
    if inp.covariance:
        sq = inp.mask1 * inp.mask1
        m2 = _coupling.coupling_matrix(
            _coupling.mask_spectrum(sq, lmax=lmax, n_iter=inp.n_iter, nthreads=nthreads),
            lmax, fast=fast, nthreads=nthreads, scale_columns=False,
        )
        del sq
        if inp.mask2 is None:
            g12 = None if same_factor else _covariance_kernel(m2, f12, binning, lmax)
            g11 = _covariance_kernel(m2, f1, binning, lmax)
        else:
            g11 = _covariance_kernel(m2, f1, binning, lmax)
            del m2
            prod = inp.mask1 * inp.mask2
            m2 = _coupling.coupling_matrix(
                _coupling.mask_spectrum(prod, lmax=lmax, n_iter=inp.n_iter, nthreads=nthreads),
                lmax, fast=fast, nthreads=nthreads, scale_columns=False,
            )
            del prod
            g12 = _covariance_kernel(m2, f12, binning, lmax)
        del m2

    return {
        "inputs": inp,
        "f1": f1,
        "f2": f2,
        "f12": f12,
        "pm11": pm11,
        "pm12": pm12,
        "pm22": pm22,
        "ainv11": ainv11,
        "ainv12": ainv12,
        "ainv22": ainv22,
        "g11": g11,
        "g12": g12,
        "condition_number": cond11,
        "f_sky": mom1.f_sky,
        "f_sky_eff": mom1.f_sky_eff,
        "f_sky_eff_cross": fsky12,
        "w2": mom1.w2,
        "deprojection1": deps[0],
        "deprojection2": deps[1],
        # the masks' spectra to mask_lmax (kept for the analytic covariance, which needs them again)
        "mask_cl11": w11,
        "mask_cl12": None if inp.mask2 is None else w12,
        "mask_cl22": None if inp.mask2 is None else w22,
    }


def in_bin_shape(binning, lmax, guess_cl):
    """``C_guess,l / (Q P C_guess)_l``: the guess spectrum's shape inside each bin (ones without a guess).

    The binned matrix models the spectrum inside a bin as the guess's shape scaled to the bandpower
    (``Q -> diag(shape) Q``) instead of flat: for a sky whose spectrum is the guess (times any
    constant) the bandpowers are then the bin averages of the sky spectrum, not those of a flat
    approximation of it (the flat model is 1.5% low in a first bin of 16 multipoles from ell 2).
    """
    shape = np.ones(lmax + 1)
    if guess_cl is None:
        return shape
    g = np.asarray(guess_cl, dtype=np.float64)[: lmax + 1]
    binned = np.add.reduceat(binning.averaging_weights(lmax) * g, binning.ell_min)
    idx = np.full(lmax + 1, -1)
    idx[: binning.bin_index.size] = binning.bin_index
    sel = idx >= 0
    model = binning.model_weights(lmax)
    model[sel] *= binned[idx[sel]]
    ok = sel & (model > 0) & (g > 0)
    shape[ok] = g[ok] / model[ok]
    return shape


def deprojections(inp, nthreads):
    """The template deprojections of map 1 and map 2 (None when only the monopole/dipole or nothing is removed).

    The plain monopole/dipole removal keeps its own faster path in the estimator; a
    :class:`~cmbtools.spectrum.deprojection.TemplateDeprojection` is built when user templates are given.
    """
    if not inp.templates:
        return None, None
    from cmbtools.spectrum.deprojection import TemplateDeprojection

    d1 = TemplateDeprojection(inp.mask1, inp.templates, monopole_dipole=inp.remove_monopole_dipole, nthreads=nthreads)
    d2 = None
    if inp.mask2 is not None:
        d2 = TemplateDeprojection(inp.mask2, inp.templates, monopole_dipole=inp.remove_monopole_dipole,
                                  nthreads=nthreads)
    return d1, d2


def _coarse_bias_applies(inp):
    """Whether :func:`_correction_rows` takes the monopole/dipole bias from the coarse grid."""
    from cmbtools.spectrum.deprojection import COARSE_NSIDE

    return bool(inp.sky_factors is not None and inp.deprojects and inp.correct_deprojection_bias
                and not inp.templates and inp.nside > COARSE_NSIDE)


def _signal_and_masks(inp, which):
    """The guess spectrum on the grid and the two masks of the coupling ``which`` ("11", "12" or "22")."""
    factor = inp.sky_factors[{"11": 0, "22": 1, "12": 2}[which]]
    signal = factor * inp.guess_cl[: factor.size]
    mask_a = inp.mask2 if which == "22" else inp.mask1
    mask_b = inp.mask1 if which == "11" else (inp.mask2 if inp.mask2 is not None else inp.mask1)
    return factor, signal, mask_a, mask_b


def _coarse_bias_below(inp, which, nthreads):
    from cmbtools.spectrum import deprojection as _dep

    _, signal, mask_a, mask_b = _signal_and_masks(inp, which)
    return _dep.coarse_grid_bias_below(mask_a, signal, inp.lmax, mask2=None if mask_b is mask_a else mask_b,
                                       nthreads=nthreads)


def _averaging_shape(inp, which, nthreads):
    """The pixel shapes' part of the expected pseudo-power of averaged maps for the coupling ``which``."""
    from cmbtools.spectrum.averaging_bias import averaging_bias, default_centres, pair_radius
    from cmbtools.spectrum.pixel_windows import pixel_window

    factor, signal, mask_a, mask_b = _signal_and_masks(inp, which)
    window = np.asarray(pixel_window(inp.nside, inp.sky_lmax, nthreads=nthreads), dtype=np.float64)
    safe = np.where(window > 0, window**2, 1.0)
    return averaging_bias(mask_a, signal / safe, window, inp.lmax, mask2=None if mask_b is mask_a else mask_b,
                          radius=pair_radius(inp.nside, factor / safe), max_centres=default_centres(inp.nside),
                          nthreads=nthreads)


def _correction_rows(inp, m, which, deps, nthreads, mask_cl=None, coarse_below=None, averaged=None):
    """Row factors of the coupling matrix ``m`` for the deprojection bias and the power above the bins, or None.

    With the monopole/dipole removal alone on a grid finer than
    :data:`~cmbtools.spectrum.deprojection.COARSE_NSIDE`, the bias comes from
    :func:`~cmbtools.spectrum.deprojection.coarse_grid_deprojection_bias` (``mask_cl``: the
    masks' spectrum); user templates always get the exact bias.  With ``averaged_pixels`` the pixel shapes' bias
    (:func:`~cmbtools.spectrum.averaging_bias.averaging_bias`) joins the second rows (the sky's, not the noise's).
    """
    if inp.sky_factors is None:
        return None
    from cmbtools.spectrum import deprojection as _dep
    lmax = inp.lmax
    factor, signal, mask_a, mask_b = _signal_and_masks(inp, which)
    bias = None
    coarse = (not inp.templates and mask_cl is not None and inp.nside > _dep.COARSE_NSIDE)
    if inp.deprojects and inp.correct_deprojection_bias and coarse and coarse_below is not None:
        bias = _dep.continued_coarse_grid_bias(coarse_below.result(), lmax, mask_cl)
    elif inp.deprojects and inp.correct_deprojection_bias and coarse:
        bias = _dep.coarse_grid_deprojection_bias(
            mask_a, signal, lmax, mask_cl, mask2=None if mask_b is mask_a else mask_b, nthreads=nthreads
        )
    elif inp.deprojects and inp.correct_deprojection_bias:
        built = list(deps)

        def dep_of(index):
            if built[index] is None:
                mask = inp.mask1 if index == 0 else inp.mask2
                built[index] = _dep.TemplateDeprojection(
                    mask, inp.templates, monopole_dipole=inp.remove_monopole_dipole, nthreads=nthreads
                )
            return built[index]

        if inp.mask2 is None or which == "11":
            da = db = dep_of(0)
        elif which == "22":
            da = db = dep_of(1)
        else:
            da, db = dep_of(0), dep_of(1)
        bias = _dep.deprojection_bias(da, signal, lmax, deprojection2=None if db is da else db, nthreads=nthreads)
    leakage = None
    if inp.sky_lmax > inp.binning.lmax:
        leakage = _dep.above_bins_leakage(
            mask_a, signal, lmax, inp.binning.lmax + 1, mask2=None if mask_b is mask_a else mask_b, nthreads=nthreads
        )
    if inp.averaged_pixels:
        # the pixel shapes' part of the expected pseudo-power of averaged maps: the sky's, not the noise's, so it
        # joins the binned matrix's rows (like the leakage), not those of the noise bias and the windows
        # (computed on build_operator's thread when it started one: ``averaged`` is its future)
        shape = averaged.result() if averaged is not None else _averaging_shape(inp, which, nthreads)
        leakage = shape if leakage is None else leakage + shape
    with_bias = _dep.row_factors(m, signal, lmax, bias=bias)
    return with_bias, _dep.row_factors(m, signal, lmax, bias=bias, leakage=leakage)
