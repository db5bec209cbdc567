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

    The masks' spectra to ``2 lmax``, the mode-coupling matrices (rows bin-averaged),
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

    def pm_of(w):
        m = _coupling.coupling_matrix(w, lmax, fast=fast, nthreads=nthreads)
        return _reduce_rows(m, p, binning.ell_min)

    what = "binned mode-coupling matrix"
    pm11 = pm_of(w11)
    ainv11, cond11 = _binned_operator(pm11, f1, binning, lmax, inp.max_condition_number, what)
    if inp.mask2 is None:
        pm12 = pm22 = None
        if same_factor:
            ainv12 = ainv22 = None
        else:
            ainv12, _ = _binned_operator(pm11, f12, binning, lmax, inp.max_condition_number, what + " of map 1 x map 2")
            ainv22, _ = _binned_operator(pm11, f2, binning, lmax, inp.max_condition_number, what + " of map 2")
    else:
        pm12 = pm_of(w12)
        pm22 = pm_of(w22)
        ainv12, _ = _binned_operator(pm12, f12, binning, lmax, inp.max_condition_number, what + " of map 1 x map 2")
        ainv22, _ = _binned_operator(pm22, f2, binning, lmax, inp.max_condition_number, what + " of map 2")

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
            g12 = None if same_factor else _covariance_kernel(m2.copy(), f12, binning, lmax)
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
    }
