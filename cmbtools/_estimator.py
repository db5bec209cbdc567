"""The reusable masked-sky spectrum estimator (pseudo-Cl with MASTER correction).

:class:`SpectrumEstimator` does all the expensive work once, in its
constructor: the mask's harmonic transform up to ``2*lmax``, the mode-coupling
matrix (through :mod:`cmbtools._coupling`), its binned form and that matrix's
inverse, the bandpower windows and (optionally) the covariance kernel.  It keeps
only the mask(s) and small ``(n_bins, lmax+1)`` or ``(n_bins, n_bins)`` arrays,
so it is cheap to pickle and send to Monte Carlo workers; applying it to a map
costs one monopole/dipole fit and one harmonic transform.

Notation (Hivon et al. 2002, ApJ 567, 2): the pseudo-spectrum of the masked map
is ``C~_l``; its expectation is ``sum_l' M_ll' F_l' C_l'`` with ``M`` the
mode-coupling matrix and ``F_l = B_l^2 p_l^2 T_l`` (beam, pixel window,
transfer function).  With the averaging operator ``P`` and the piecewise-flat
model ``Q`` of the binning, the bandpowers are ``(P M F Q)^-1 P C~``.
"""

from __future__ import annotations

import dataclasses
import json
import warnings
from pathlib import Path

import numpy as np

from . import _coupling, _io, _sht
from ._binning import Binning
from ._validation import (
    as_map,
    check_cl,
    check_int,
    check_lmax,
    check_mask,
    check_positive,
    check_same_nside,
    missing_pixels,
    nside_from_npix,
    resolve_nthreads,
)
from ._version import __version__
from .exceptions import CacheError, CmbtoolsWarning, IllConditionedError, InvalidInputError

__all__ = ["SpectrumEstimator", "estimate_spectrum", "MAX_CONDITION_NUMBER"]

#: Largest accepted 2-norm condition number of the binned coupling matrix (with
#: the beam, pixel window and transfer function divided out).  For masks of
#: sky fraction >= 0.2 with a few degrees of apodization and bins of >= 5
#: multipoles it stays below ~10; it passes 1e3 only when bins are so narrow
#: that neighbouring bandpowers can no longer be told apart on the masked sky,
#: where the inversion amplifies the noise of each bandpower by about the
#: condition number (common practice: treat such a binning as a mistake).
MAX_CONDITION_NUMBER = 1.0e3

_FILE_FORMAT = "cmbtools-spectrum-estimator-1"
_COUPLING_MODES = ("exact", "fast")


# ----------------------------------------------------------------------------- inputs


def _beam_array(beam, lmax, name):
    """B_l for ell = 0..lmax from None, a FWHM in arcmin or an array; and a description."""
    from ._beams import gaussian_beam

    if beam is None:
        return np.ones(lmax + 1), "none"
    if np.ndim(beam) == 0:
        fwhm = check_positive(beam, f"{name} (FWHM in arcmin)", allow_zero=True)
        return gaussian_beam(fwhm, lmax), f"gaussian fwhm_arcmin={fwhm:g}"
    b = check_cl(beam, name, lmax=lmax, allow_negative=True)[: lmax + 1].copy()
    if abs(b[0] - 1.0) > 1e-3:
        warnings.warn(
            f"The {name!r} has B_0 = {b[0]:.6g}, not 1; it is used as given (not renormalised).",
            CmbtoolsWarning,
            stacklevel=4,
        )
    return b, f"table sha256={_io.sha256_arrays(b)[:16]}"


def _window_array(pixel_window, nside, lmax, nthreads):
    if pixel_window is True:
        from ._pixwin import pixel_window as _pw

        return np.asarray(_pw(nside, lmax, nthreads=nthreads), dtype=np.float64)[: lmax + 1].copy(), f"healpix nside={nside}"
    if pixel_window is False or pixel_window is None:
        return np.ones(lmax + 1), "none"
    w = check_cl(pixel_window, "pixel_window", lmax=lmax, allow_negative=True)[: lmax + 1].copy()
    return w, f"table sha256={_io.sha256_arrays(w)[:16]}"


def _transfer_array(transfer, lmax, name):
    if transfer is None:
        return np.ones(lmax + 1), "none"
    t = check_cl(transfer, name, lmax=lmax)[: lmax + 1].copy()
    return t, f"table sha256={_io.sha256_arrays(t)[:16]}"


@dataclasses.dataclass(frozen=True, eq=False)
class _Inputs:
    """Everything the operator is built from, checked and normalised."""

    mask1: np.ndarray
    mask2: np.ndarray | None
    binning: Binning
    nside: int
    lmax: int
    beam1: np.ndarray
    beam2: np.ndarray
    pixwin: np.ndarray
    transfer1: np.ndarray
    transfer2: np.ndarray
    remove_monopole_dipole: bool
    coupling: str
    fast: tuple | None
    n_iter: int
    covariance: bool
    max_condition_number: float
    descriptions: dict
    mask1_sha256: str
    mask2_sha256: str | None

    @property
    def cache_key(self) -> str:
        return _io.sha256_arrays(
            _FILE_FORMAT,
            __version__,
            self.mask1_sha256,
            self.mask2_sha256,
            self.binning.ell_min,
            self.binning.ell_max,
            self.binning.weighting,
            self.nside,
            self.lmax,
            self.beam1,
            self.beam2,
            self.pixwin,
            self.transfer1,
            self.transfer2,
            bool(self.remove_monopole_dipole),
            self.coupling,
            None if self.fast is None else tuple(int(v) for v in self.fast),
            int(self.n_iter),
            bool(self.covariance),
            float(self.max_condition_number),
        )


def _resolve_inputs(
    mask,
    binning,
    *,
    lmax=None,
    mask2=None,
    beam=None,
    beam2=None,
    pixel_window=True,
    transfer=None,
    transfer2=None,
    remove_monopole_dipole=True,
    coupling="exact",
    fast_l_exact=None,
    fast_l_toeplitz=None,
    fast_band=None,
    n_iter=0,
    nthreads=None,
    covariance=False,
    max_condition_number=MAX_CONDITION_NUMBER,
) -> _Inputs:
    w1 = check_mask(mask, "mask").copy()
    nside = nside_from_npix(w1.size, "mask")
    w2 = None
    if mask2 is not None:
        w2 = check_mask(mask2, "mask2").copy()
        check_same_nside(w1, w2, "mask", "mask2")
        if np.array_equal(w1, w2):
            w2 = None
    if not isinstance(binning, Binning):
        raise InvalidInputError(
            f"The 'binning' parameter must be a cmbtools.spectrum.Binning. Got {type(binning).__name__} instead."
        )
    lmax = 3 * nside - 1 if lmax is None else check_lmax(lmax, nside)
    if lmax > 3 * nside - 1:
        warnings.warn(
            f"lmax={lmax} is above 3*nside-1={3 * nside - 1}: the HEALPix grid of nside {nside} does not "
            f"resolve these multipoles well (aliasing); the highest bandpowers may be biased.",
            CmbtoolsWarning,
            stacklevel=3,
        )
    if binning.lmax > lmax:
        raise InvalidInputError(
            f"The binning reaches ell={binning.lmax} but lmax is {lmax}; end the bins at or below lmax "
            f"(or raise lmax, up to {4 * nside - 1} at nside {nside})."
        )
    if not isinstance(remove_monopole_dipole, (bool, np.bool_)):
        raise InvalidInputError(
            f"The 'remove_monopole_dipole' parameter must be True or False. Got {remove_monopole_dipole!r} instead."
        )
    if remove_monopole_dipole and binning.lmin < 2:
        warnings.warn(
            f"The first bin starts at ell={binning.lmin} but the monopole and dipole are removed: "
            f"bandpowers at ell < 2 carry no signal (start the bins at ell=2 or keep the monopole and dipole).",
            CmbtoolsWarning,
            stacklevel=3,
        )
    if coupling not in _COUPLING_MODES:
        raise InvalidInputError(f"The 'coupling' parameter must be 'exact' or 'fast'. Got {coupling!r} instead.")
    fast = None
    explicit = fast_l_exact is not None or fast_l_toeplitz is not None or fast_band is not None
    if coupling == "fast" and not explicit and lmax > _coupling.fast_lmax_limit(nside):
        pass  # the banded form cannot represent the grid's aliasing up there: the exact matrix it is
    elif coupling == "fast":
        if lmax > _coupling.fast_lmax_limit(nside):
            warnings.warn(
                f"The fast coupling approximation with lmax={lmax} above 2*nside={2 * nside} misses the "
                f"HEALPix grid's aliasing: the highest bandpowers may be off by several percent "
                f"(leave the fast_* settings unset to get the exact matrix there).",
                CmbtoolsWarning,
                stacklevel=3,
            )
        d_exact, d_toep, d_band = _coupling.default_fast_settings(lmax)
        l_exact = d_exact if fast_l_exact is None else check_int(fast_l_exact, "fast_l_exact", minimum=0, maximum=lmax)
        l_toep = (
            max(d_toep, l_exact)
            if fast_l_toeplitz is None
            else check_int(fast_l_toeplitz, "fast_l_toeplitz", minimum=l_exact, maximum=lmax)
        )
        band = d_band if fast_band is None else check_int(fast_band, "fast_band", minimum=1)
        fast = (l_exact, l_toep, band)
    elif fast_l_exact is not None or fast_l_toeplitz is not None or fast_band is not None:
        raise InvalidInputError(
            "The 'fast_l_exact', 'fast_l_toeplitz' and 'fast_band' parameters only apply with coupling='fast'."
        )
    n_iter = check_int(n_iter, "n_iter", minimum=0, maximum=20)
    if not isinstance(covariance, (bool, np.bool_)):
        raise InvalidInputError(f"The 'covariance' parameter must be True or False. Got {covariance!r} instead.")
    max_cond = check_positive(max_condition_number, "max_condition_number")
    if max_cond < 1:
        raise InvalidInputError(f"The 'max_condition_number' parameter must be >= 1. Got {max_condition_number!r} instead.")

    b1, d_b1 = _beam_array(beam, lmax, "beam")
    if beam2 is None:
        b2, d_b2 = b1, d_b1
    else:
        b2, d_b2 = _beam_array(beam2, lmax, "beam2")
    pw, d_pw = _window_array(pixel_window, nside, lmax, nthreads)
    t1, d_t1 = _transfer_array(transfer, lmax, "transfer")
    if transfer2 is None:
        t2, d_t2 = t1, d_t1
    else:
        t2, d_t2 = _transfer_array(transfer2, lmax, "transfer2")
    for a in (w1, w2, b1, b2, pw, t1, t2):
        if a is not None:
            a.setflags(write=False)
    descriptions = {
        "beam": d_b1,
        "beam2": d_b2,
        "pixel_window": d_pw,
        "transfer": d_t1,
        "transfer2": d_t2,
    }
    return _Inputs(
        mask1=w1,
        mask2=w2,
        binning=binning,
        nside=nside,
        lmax=lmax,
        beam1=b1,
        beam2=b2,
        pixwin=pw,
        transfer1=t1,
        transfer2=t2,
        remove_monopole_dipole=bool(remove_monopole_dipole),
        coupling=coupling,
        fast=fast,
        n_iter=n_iter,
        covariance=bool(covariance),
        max_condition_number=max_cond,
        descriptions=descriptions,
        mask1_sha256=_io.sha256_arrays(w1),
        mask2_sha256=None if w2 is None else _io.sha256_arrays(w2),
    )


def _check_estimator_memory(mask, binning, *, lmax, mask2, n_iter, covariance, force) -> int | None:
    """Refuse, before any large allocation, an estimator whose construction would not fit in memory.

    Estimates the peak of :meth:`SpectrumEstimator._build` phase by phase (the
    largest wins; see :mod:`cmbtools._resources`): the copies of the masks; a
    mask transform up to ``2*lmax`` (the coefficients of every mask and
    ducc0's ring buffer of ``(4 nside - 1) x (2 lmax + 1)`` complex values, or,
    for large transforms, the pieces of the split transform of
    :func:`cmbtools._sht.map_spectra`); the dense
    ``(lmax+1) x (lmax+1)`` coupling matrix (one at a time; two for the
    covariance of an auto-spectrum; ``coupling='fast'`` fills a dense matrix
    too); and the binned ``(n_bins, lmax+1)`` and ``(n_bins, n_bins)``
    results.  Returns the estimate in bytes, or None for inputs that
    :func:`_resolve_inputs` will refuse with its own message.
    """
    from ._resources import check_memory, estimate_alm_bytes, estimate_coupling_bytes, estimate_map_bytes
    from .exceptions import CmbtoolsError

    try:
        nside = nside_from_npix(np.size(mask), "mask")
        lmax = 3 * nside - 1 if lmax is None else check_lmax(lmax, nside)
        refine = check_int(n_iter, "n_iter", minimum=0, maximum=20) > 0
    except CmbtoolsError:
        return None
    n_bins = binning.n_bins if isinstance(binning, Binning) else lmax + 1
    covariance = isinstance(covariance, (bool, np.bool_)) and bool(covariance)
    cross = mask2 is not None
    lw = _coupling.mask_lmax(lmax, nside, 1 if refine else 0)
    masks = estimate_map_bytes(nside, 2 if cross else 1)
    alm = estimate_alm_bytes(lw)
    n_masks = 2 if cross else 1
    leg = _sht._leg_bytes(nside, lw)  # ducc0's buffer of Legendre coefficients
    if refine:  # full coefficients of every mask, plus a synthesized map, the residual and the correction
        transform = n_masks * alm + leg + estimate_map_bytes(nside, 2) + alm
    elif leg + n_masks * alm <= 2 * _sht.LEG_BUFFER_BYTES:  # one call per mask (see _sht.map_spectra)
        transform = n_masks * alm + leg
    else:  # split: one group of m per mask, its partial sum and one group of rings' buffer
        transform = (n_masks + 2) * _sht.LEG_BUFFER_BYTES
    matrix = estimate_coupling_bytes(lmax)
    row, square = 8 * n_bins * (lmax + 1), 8 * n_bins * n_bins
    results = (3 if cross else 1) * row + (5 if covariance else 3) * square
    phases = [
        masks + transform,  # the transforms of the masks
        masks + matrix + results + row + 4 * square,  # one coupling matrix, then its binned inverse
    ]
    if covariance:  # the squared mask (and mask1 * mask2): a map, its transform, one or two matrices
        extra = estimate_map_bytes(nside, 1)
        phases += [masks + extra + transform + results, masks + extra + (1 if cross else 2) * matrix + results + row]
    return check_memory(max(phases), f"Building the spectrum estimator at nside {nside} with lmax {lmax}", force=force)


# ----------------------------------------------------------------------------- building blocks


def _reduce_rows(matrix, weights, starts):
    """``P @ matrix`` for a bin-averaging ``P`` given by per-ell weights and bin starts (in place on ``matrix``)."""
    matrix *= weights[:, None]
    return np.add.reduceat(matrix, starts, axis=0)


def _reduce_cols(matrix, weights, starts):
    return np.add.reduceat(matrix * weights[None, :], starts, axis=1)


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


def _covariance_kernel(m2_scaled, factor, binning, lmax):
    """``G[b, b'] = sum_{l in b, l' in b'} (f_l/n_b) M2_ll'/(2l'+1) (f_l'/n_b')`` (narrow-kernel covariance)."""
    u = np.zeros(lmax + 1)
    idx = binning.bin_index
    sel = np.nonzero(idx >= 0)[0]
    u[sel] = 1.0 / binning.n_ell[idx[sel]]
    r = factor * u
    rows = _reduce_rows(m2_scaled, r, binning.ell_min)
    g = _reduce_cols(rows, r, binning.ell_min)
    return 0.5 * (g + g.T)


def _freeze(a):
    if a is not None:
        a = np.ascontiguousarray(a)
        a.setflags(write=False)
    return a


# ----------------------------------------------------------------------------- the estimator


class SpectrumEstimator:
    r"""Masked-sky angular power spectrum estimator (pseudo-Cl with MASTER correction), built once.

    The constructor computes everything that depends on the mask, the bins,
    the beams and the other settings; :meth:`estimate` then measures the
    bandpowers of any number of maps with one harmonic transform each.  The
    object is immutable and picklable.

    Parameters
    ----------
    mask : ndarray of shape (12*nside**2,)
        Weights in [0, 1] (apodized or binary) for map 1, RING ordering.
    binning : Binning
        The bins of the bandpowers (all within ``0..lmax``).
    lmax : int, optional
        Largest multipole of the transforms and of the coupling matrix.
        Default ``3*nside - 1``; above it a :class:`~cmbtools.exceptions.CmbtoolsWarning`,
        above ``4*nside - 1`` an error.
    mask2 : ndarray of shape (12*nside**2,), optional
        Weights for map 2 of cross-spectra (default: ``mask``).  The coupling
        of a cross-spectrum uses the cross-spectrum of the two masks.
    beam, beam2 : None, float or ndarray of shape (>= lmax+1,), optional
        Beam of map 1 / map 2: ``None`` (no beam), a Gaussian FWHM in arcmin or
        a table ``B_l``.  ``beam2=None`` means "the same as map 1".
    pixel_window : bool or ndarray of shape (>= lmax+1,), default=True
        Deconvolve the HEALPix pixel window of nside (computed by cmbtools,
        no download), or a table ``p_l``; ``False`` for none.  It applies to
        both maps.
    transfer, transfer2 : ndarray of shape (>= lmax+1,), optional
        Per-multipole transfer function ``T_l`` of each map's power spectrum
        (e.g. from filtering); ``transfer2=None`` means "the same as map 1".
    remove_monopole_dipole : bool, default=True
        Fit the monopole and dipole on the masked sky (weights = mask) and
        subtract them before the transform.
    coupling : {'exact', 'fast'}, default='exact'
        ``'fast'`` uses the approximation of Louis et al. 2020 (PRD 102,
        123538) for large lmax: exact below ``fast_l_exact``, a band of
        half-width ``fast_band`` around the diagonal up to ``fast_l_toeplitz``,
        Toeplitz above.  Defaults: :func:`cmbtools._coupling.default_fast_settings`.
        With ``lmax`` above ``2 nside`` the exact matrix is computed instead
        (unless the settings below are given): there the coupling is dominated
        by the HEALPix grid's aliasing, which a banded form cannot represent
        (bandpowers off by 0.5% at 2.5 nside and 14% at 3 nside, against a few
        1e-6 up to 2.4 nside).
        It agrees with ``'exact'`` to < 1e-3 for bins up to ``2 nside``; above,
        it misses the quadrature-aliasing part of the exact matrix (percent
        level near ``3 nside``).
    fast_l_exact, fast_l_toeplitz, fast_band : int, optional
        Settings of the fast coupling.
    n_iter : int, default=0
        Refinement steps of every harmonic transform (maps and mask).  With 0
        the pseudo-Cl is the plain quadrature of the masked map and the
        coupling matrix, built from the same quadrature of the mask up to
        ``2 lmax``, is its exact expectation for a sky band-limited at lmax:
        the result is unbiased up to lmax, even above ``2 nside`` where the
        plain HEALPix quadrature is not.  Each step costs two more transforms
        per map and brings the coefficients closer to the continuum ones; the
        mask spectrum is then refined too but only up to ``3 nside - 1``
        (refinement diverges above), so use ``n_iter > 0`` with smooth
        (apodized) masks.
    nthreads : int, optional
        Threads of the transforms and the coupling kernel (default: all cores
        or ``$CMBTOOLS_NUM_THREADS``), resolved at every call so that a
        pickled estimator follows the settings of the process it runs in.
    covariance : bool, default=False
        Also prepare the full bandpower covariance (one more coupling matrix,
        of the squared mask); :meth:`estimate` then fills
        ``Bandpowers.covariance``.
    max_condition_number : float, default=MAX_CONDITION_NUMBER (1e3)
        Largest accepted condition number of the binned coupling matrix.
    force : bool, default=False
        Build even when the memory estimate (mask transforms up to ``2*lmax``,
        coupling matrices), made before any large allocation, exceeds what the
        machine has available: warn instead of raising (see
        :func:`cmbtools._resources.check_memory`).

    Attributes
    ----------
    nside, lmax : int
    binning : Binning
    f_sky : float
        Mean of the mask (weighted sky fraction).
    f_sky_eff : float
        ``w2**2 / w4`` of the mask (of ``sqrt(mask*mask2)`` for cross-spectra),
        the sky fraction used by the Knox errors.
    bandpower_windows : ndarray of shape (n_bins, lmax+1)
        ``E[cl] = bandpower_windows @ C_l`` for auto-spectra of map 1.
    condition_number : float
        Of the binned coupling matrix of map 1 (beam etc. divided out).
    cache_key : str
        Hex SHA-256 of every input (mask hashes, lmax, bins, beams, pixel
        window, transfer, coupling mode, settings, version).

    Raises
    ------
    InvalidInputError, ResolutionMismatchError
        Bad settings, or mask and mask2 of different nside.
    IllConditionedError
        If the binned coupling matrix cannot be inverted reliably.
    MemoryLimitError
        If building would need more memory than the machine has available
        (unless ``force``); the message gives the estimate.

    Notes
    -----
    Error bars are the Knox formula (Knox 1995, PRD 52, 4307) with the
    effective sky fraction ``w2**2/w4`` (Hivon et al. 2002): for an
    auto-spectrum ``sigma_b^2 = 2 C_b^2 / (f_sky_eff nu_b)``, for a
    cross-spectrum ``(C12_b^2 + C11_b C22_b) / (f_sky_eff nu_b)``, with
    ``nu_b = sum_{l in b} (2l+1)`` and ``C`` the measured total (signal plus
    noise) bandpowers with the beam deconvolved.

    The optional covariance uses the narrow-kernel approximation of the
    pseudo-Cl covariance, ``Cov(C~_l, C~_l') ~ 2 O_l O_l' M2_ll' / (2l'+1)``
    with ``O_l`` the observed total spectrum and ``M2`` the coupling matrix of
    the squared mask (Efstathiou 2004, MNRAS 349, 603, from memory), with the
    spectrum taken as flat (in the weighting's quantity) inside each bin and
    propagated through the binned inverse coupling.  It is an approximation,
    good where the spectrum varies slowly over the mask's kernel width.

    Examples
    --------
    >>> import numpy as np
    >>> from cmbtools import _sht
    >>> from cmbtools.spectrum import Binning, SpectrumEstimator
    >>> nside, lmax = 16, 47
    >>> ell = np.arange(lmax + 1)
    >>> cl = np.where(ell >= 2, 1e-10 / (ell + 1.0) ** 2, 0.0)
    >>> rng = np.random.default_rng(1)
    >>> alm = (rng.standard_normal(_sht.alm_size(lmax)) + 1j * rng.standard_normal(_sht.alm_size(lmax)))
    >>> alm *= np.sqrt(cl[_sht.alm_ell(lmax)] / 2); alm[: lmax + 1] = alm[: lmax + 1].real * np.sqrt(2)
    >>> sky = _sht.alm2map(alm, nside, lmax, nthreads=1)
    >>> mask = np.ones(12 * nside**2); mask[: 12 * nside**2 // 4] = 0.0
    >>> est = SpectrumEstimator(mask, Binning.uniform(2, lmax, 9), pixel_window=False, nthreads=1)
    >>> bp = est.estimate(sky)
    >>> bp.cl.shape, round(est.f_sky, 2)
    ((5,), 0.75)
    """

    # ------------------------------------------------------------------ construction
    def __init__(
        self,
        mask,
        binning,
        *,
        lmax=None,
        mask2=None,
        beam=None,
        beam2=None,
        pixel_window=True,
        transfer=None,
        transfer2=None,
        remove_monopole_dipole=True,
        coupling="exact",
        fast_l_exact=None,
        fast_l_toeplitz=None,
        fast_band=None,
        n_iter=0,
        nthreads=None,
        covariance=False,
        max_condition_number=MAX_CONDITION_NUMBER,
        force=False,
    ):
        _check_estimator_memory(
            mask, binning, lmax=lmax, mask2=mask2, n_iter=n_iter, covariance=covariance, force=force
        )
        inputs = _resolve_inputs(
            mask,
            binning,
            lmax=lmax,
            mask2=mask2,
            beam=beam,
            beam2=beam2,
            pixel_window=pixel_window,
            transfer=transfer,
            transfer2=transfer2,
            remove_monopole_dipole=remove_monopole_dipole,
            coupling=coupling,
            fast_l_exact=fast_l_exact,
            fast_l_toeplitz=fast_l_toeplitz,
            fast_band=fast_band,
            n_iter=n_iter,
            nthreads=nthreads,
            covariance=covariance,
            max_condition_number=max_condition_number,
        )
        state = self._build(inputs, nthreads)
        self._set_state(state)
        object.__setattr__(self, "_nthreads", nthreads)

    @staticmethod
    def _build(inp: _Inputs, nthreads) -> dict:
        nthreads = resolve_nthreads(nthreads)
        lmax, binning = inp.lmax, inp.binning
        lw = _coupling.mask_lmax(lmax, inp.nside, inp.n_iter)
        p = binning.averaging_weights(lmax)
        fast = inp.fast

        f1 = inp.beam1**2 * inp.pixwin**2 * inp.transfer1
        f2 = inp.beam2**2 * inp.pixwin**2 * inp.transfer2
        f12 = inp.beam1 * inp.beam2 * inp.pixwin**2 * np.sqrt(inp.transfer1 * inp.transfer2)
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

        from ._masks import mask_moments

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

    def _set_state(self, state):
        for k, v in state.items():
            if isinstance(v, np.ndarray):
                v = _freeze(v)
            object.__setattr__(self, "_" + k, v)
        object.__setattr__(self, "_frozen", True)

    def __setattr__(self, name, value):
        raise AttributeError(f"SpectrumEstimator is immutable; cannot set {name!r}")

    def __delattr__(self, name):
        raise AttributeError(f"SpectrumEstimator is immutable; cannot delete {name!r}")

    def __getstate__(self):
        # the thread count belongs to the process: an estimator sent to a worker process uses that
        # worker's budget ($CMBTOOLS_NUM_THREADS, set by the Monte Carlo engine), never oversubscribes
        state = dict(self.__dict__)
        state["_nthreads"] = None
        return state

    def __setstate__(self, state):
        for k, v in state.items():
            if isinstance(v, np.ndarray):
                v = _freeze(v)
            object.__setattr__(self, k, v)

    # ------------------------------------------------------------------ properties
    @property
    def nside(self) -> int:
        return self._inputs.nside

    @property
    def lmax(self) -> int:
        return self._inputs.lmax

    @property
    def binning(self) -> Binning:
        return self._inputs.binning

    @property
    def mask(self) -> np.ndarray:
        """The mask of map 1 (read-only)."""
        return self._inputs.mask1

    @property
    def mask2(self) -> np.ndarray:
        """The mask of map 2 (read-only; the same array as :attr:`mask` when not given)."""
        return self._inputs.mask1 if self._inputs.mask2 is None else self._inputs.mask2

    @property
    def f_sky(self) -> float:
        return float(self._f_sky)

    @property
    def f_sky_eff(self) -> float:
        return float(self._f_sky_eff)

    @property
    def f_sky_eff_cross(self) -> float:
        """``w2**2/w4`` of ``sqrt(mask*mask2)``: the sky fraction of cross-spectrum errors."""
        return float(self._f_sky_eff_cross)

    @property
    def condition_number(self) -> float:
        return float(self._condition_number)

    @property
    def cache_key(self) -> str:
        return self._inputs.cache_key

    @property
    def remove_monopole_dipole(self) -> bool:
        return self._inputs.remove_monopole_dipole

    @property
    def coupling(self) -> str:
        return self._inputs.coupling

    @property
    def has_covariance(self) -> bool:
        return self._g11 is not None

    @property
    def beam(self) -> np.ndarray:
        """B_l of map 1, ell = 0..lmax."""
        return self._inputs.beam1

    @property
    def beam2(self) -> np.ndarray:
        return self._inputs.beam2

    @property
    def pixel_window(self) -> np.ndarray:
        """p_l deconvolved from both maps (ones when disabled)."""
        return self._inputs.pixwin

    def _pair(self, cross: bool):
        """(P M, F, A^-1) of the auto-spectrum of map 1, or of the cross-spectrum."""
        if not cross:
            return self._pm11, self._f1, self._ainv11
        pm = self._pm11 if self._pm12 is None else self._pm12
        ainv = self._ainv11 if self._ainv12 is None else self._ainv12
        return pm, self._f12, ainv

    def _pair22(self):
        pm = self._pm11 if self._pm22 is None else self._pm22
        ainv = self._ainv11 if self._ainv22 is None else self._ainv22
        return pm, self._f2, ainv

    def _to_cl(self, x):
        """Bandpowers in the binning's quantity -> the C_l column."""
        b = self.binning
        return x / (b.dl_factor if b.weighting == "dl" else 1.0)

    def _windows(self, cross: bool) -> np.ndarray:
        pm, f, ainv = self._pair(cross)
        w = ainv @ (pm * f[None, :])
        if self.binning.weighting == "dl":
            w /= self.binning.dl_factor[:, None]
        return w

    @property
    def bandpower_windows(self) -> np.ndarray:
        """``W`` of shape (n_bins, lmax+1) with ``E[bp.cl] = W @ C_l`` (auto-spectrum of map 1).

        ``C_l`` is the sky spectrum (before beam, pixel window and transfer).
        Rows sum over ell to about 1 for ``'cl'`` weighting.
        """
        return self._windows(False)

    @property
    def cross_bandpower_windows(self) -> np.ndarray:
        """As :attr:`bandpower_windows`, for the cross-spectrum map 1 x map 2."""
        return self._windows(True)

    def expected_bandpowers(self, cl_theory, *, cross=False, kind="cl") -> np.ndarray:
        """What :meth:`estimate` returns on average for a sky with spectrum ``cl_theory``.

        Parameters
        ----------
        cl_theory : array_like of shape (>= lmax+1,)
            Sky spectrum ``C_l`` in K^2 from ell = 0 (before beam and pixel window).
            When the monopole and dipole are removed, its ell = 0 and 1 values
            are ignored.
        cross : bool, default=False
            Use the windows of the cross-spectrum map 1 x map 2.
        kind : {'cl', 'dl'}, default='cl'
            Return the ``cl`` column (K^2) or the ``dl`` column.

        Returns
        -------
        ndarray of shape (n_bins,)
        """
        cl = check_cl(cl_theory, "cl_theory", lmax=self.lmax, allow_negative=True)[: self.lmax + 1].copy()
        if self.remove_monopole_dipole:
            cl[:2] = 0.0
        out = self._windows(bool(cross)) @ cl
        if kind == "dl":
            return out * self.binning.dl_factor
        if kind != "cl":
            raise InvalidInputError(f"The 'kind' parameter must be 'cl' or 'dl'. Got {kind!r} instead.")
        return out

    # ------------------------------------------------------------------ applying
    def _prepare(self, m, name, mask, is_second=False):
        """Check a map against the mask, fill missing pixels outside it, remove monopole/dipole, apply the mask."""
        a = as_map(m, name)
        check_same_nside(a, mask, name, "mask2" if is_second else "mask")
        bad = missing_pixels(a)
        if bad.any():
            inside = bad & (mask > 0)
            n_in = int(inside.sum())
            if n_in:
                raise InvalidInputError(
                    f"The {name!r} has {n_in} missing (UNSEEN/NaN/inf) pixels where the mask is non-zero; "
                    f"the precomputed coupling matrix would be wrong. Zero the mask there and build a new "
                    f"estimator, or use cmbtools.spectrum.estimate_spectrum, which does that for you."
                )
            a = np.where(bad, 0.0, a)
        peak = float(np.max(np.abs(a[mask > 0]), initial=0.0))
        if peak > _LARGEST_MAP_VALUE:
            raise InvalidInputError(
                f"The {name!r} has values up to {peak:.3g} inside the mask; the transforms square and sum them, "
                f"which overflows double precision beyond {_LARGEST_MAP_VALUE:g} (K). Check the map's unit."
            )
        if self.remove_monopole_dipole:
            from ._dipole import masked_without_monopole_dipole, weight_sums

            key = "_weight_sums2" if is_second else "_weight_sums1"
            sums = self._cached(key, lambda: weight_sums(mask, nthreads=self._nthreads))
            return masked_without_monopole_dipole(a, mask, nthreads=self._nthreads, sums_of_weights=sums)
        return a * mask

    def _cached(self, key, make):
        """A small derived quantity of the masks, computed on first use and kept."""
        value = self.__dict__.get(key)
        if value is None:
            value = make()
            object.__setattr__(self, key, value)
        return value

    def _alm(self, masked, is_second=False):
        if self._inputs.n_iter:
            return _sht.map2alm(masked, self.lmax, n_iter=self._inputs.n_iter, nthreads=self._nthreads)
        # the masked map is zero on the rings the mask does not touch: the transform skips them
        mask = self.mask2 if is_second else self.mask
        rings = self._cached("_rings2" if is_second else "_rings1", lambda: _sht.occupied_rings(mask))
        return _sht.map2alm(masked, self.lmax, nthreads=self._nthreads, rings=rings)

    def pseudo_spectrum(self, map1, map2=None) -> np.ndarray:
        """Pseudo-Cl (ell = 0..lmax, K^2) of the masked map(s), after the monopole/dipole removal."""
        a1 = self._alm(self._prepare(map1, "map1", self.mask))
        if map2 is None:
            return _sht.alm2cl(a1, lmax=self.lmax)
        a2 = self._alm(self._prepare(map2, "map2", self.mask2, True), True)
        return _sht.alm2cl(a1, a2, lmax=self.lmax)

    def estimate(self, map1, map2=None, *, noise_cl=None, noise_maps=None):
        """Bandpowers of one map (auto-spectrum) or of two maps (cross-spectrum).

        Parameters
        ----------
        map1 : ndarray of shape (12*nside**2,)
            RING map in K_CMB, observed through ``beam`` and ``mask``.
        map2 : ndarray of shape (12*nside**2,), optional
            Second map (``beam2``, ``mask2``); gives the cross-spectrum, which
            carries no noise bias when the two maps' noises are independent.
        noise_cl : array_like of shape (>= lmax+1,), optional
            Noise spectrum ``N_l`` of ``map1`` as observed (K^2, not beam
            deconvolved), subtracted from an auto-spectrum.  Above lmax it is
            taken as constant (white, like pixel noise, whose pseudo-spectrum
            on any pixel grid is exactly ``mean(w^2) N``).
        noise_maps : sequence of ndarray, optional
            Noise-only maps like ``map1``'s noise; the mean of their pseudo
            spectra is the noise bias subtracted from an auto-spectrum.

        Returns
        -------
        Bandpowers
            ``cl``/``dl`` with Knox errors; ``covariance`` when the estimator
            was built with ``covariance=True``.

        Raises
        ------
        InvalidInputError
            Malformed map, missing pixels inside the mask, or noise options
            with a cross-spectrum.
        ResolutionMismatchError
            A map whose nside differs from the mask's.
        """
        from ._bandpowers import Bandpowers

        cross = map2 is not None
        if cross and (noise_cl is not None or noise_maps is not None):
            raise InvalidInputError(
                "The 'noise_cl' and 'noise_maps' parameters apply to auto-spectra only; a cross-spectrum of "
                "maps with independent noise has no noise bias."
            )
        if noise_cl is not None and noise_maps is not None:
            raise InvalidInputError("Give either 'noise_cl' or 'noise_maps', not both.")
        lmax = self.lmax
        a1 = self._alm(self._prepare(map1, "map1", self.mask))
        pseudo11 = _sht.alm2cl(a1, lmax=lmax)
        pm11, f11, ainv11 = self._pair(False)
        total11 = ainv11 @ self._bin_pseudo(pseudo11)
        noise_b = None
        if cross:
            a2 = self._alm(self._prepare(map2, "map2", self.mask2, True), True)
            pseudo12 = _sht.alm2cl(a1, a2, lmax=lmax)
            pseudo22 = _sht.alm2cl(a2, lmax=lmax)
            _, _, ainv12 = self._pair(True)
            _, _, ainv22 = self._pair22()
            value = ainv12 @ self._bin_pseudo(pseudo12)
            total22 = ainv22 @ self._bin_pseudo(pseudo22)
            var = (value**2 + np.clip(total11 * total22, 0.0, None)) / self._modes(True)
            tot_for_cov = (value, total11, total22)
        else:
            value = total11
            if noise_cl is not None:
                n = check_cl(noise_cl, "noise_cl", lmax=lmax)[: lmax + 1]
                noise_b = ainv11 @ self._pseudo_noise(n)
            elif noise_maps is not None:
                if isinstance(noise_maps, np.ndarray) and noise_maps.ndim == 1:
                    raise InvalidInputError("The 'noise_maps' parameter must be a list of maps, not a single map.")
                acc = np.zeros(lmax + 1)
                count = 0
                for i, nm in enumerate(noise_maps):
                    an = self._alm(self._prepare(nm, f"noise_maps[{i}]", self.mask))
                    acc += _sht.alm2cl(an, lmax=lmax)
                    count += 1
                if count == 0:
                    raise InvalidInputError("The 'noise_maps' parameter is empty; give at least one noise map.")
                noise_b = ainv11 @ self._bin_pseudo(acc / count)
            if noise_b is not None:
                value = total11 - noise_b
            var = 2.0 * total11**2 / self._modes(False)
            tot_for_cov = (total11, total11, total11)

        cov = None
        if self.has_covariance:
            cov = self._covariance(cross, *tot_for_cov)

        b = self.binning
        conv = b.dl_factor if b.weighting == "dl" else np.ones(b.n_bins)
        cl = value / conv if b.weighting == "dl" else value
        cl_err = np.sqrt(var) / conv if b.weighting == "dl" else np.sqrt(var)
        if cov is not None:
            cov = cov / np.outer(conv, conv) if b.weighting == "dl" else cov
        dl = cl * b.dl_factor
        dl_err = cl_err * b.dl_factor
        meta = self._metadata(cross, noise_cl is not None, noise_maps is not None)
        if noise_b is not None:
            meta["noise_bias_subtracted"] = "spectrum" if noise_cl is not None else f"{count} noise maps"
        return Bandpowers(
            ell_min=b.ell_min,
            ell_max=b.ell_max,
            ell_eff=b.ell_eff,
            cl=cl,
            cl_err=cl_err,
            dl=dl,
            dl_err=dl_err,
            covariance=cov,
            metadata=meta,
        )

    def _pseudo_noise(self, n):
        """Binned pseudo-spectrum ``P <N~>`` of noise with spectrum ``n`` (ell = 0..lmax), constant above lmax.

        ``P M N`` for the multipoles up to lmax, plus the rest of each row of the
        coupling (up to the total ``mean(w^2)`` that a white noise gives on any
        pixel grid, exactly) times ``N_lmax``: the noise is taken as white beyond
        lmax, where it is not band-limited (pixel noise), unlike the sky.
        """
        pm = self._pm11
        row_weight = np.add.reduceat(self._p_vector, self.binning.ell_min)
        missing = self._w2 * row_weight - pm.sum(axis=1)
        return pm @ n + missing * n[-1]

    def _bin_pseudo(self, pseudo):
        """``P @ pseudo`` (bin averages in the binning's quantity)."""
        b = self.binning
        return np.add.reduceat(self._p_vector * pseudo, b.ell_min)

    @property
    def _p_vector(self):
        return self.binning.averaging_weights(self.lmax)

    def _modes(self, cross: bool) -> np.ndarray:
        """``f_sky_eff * sum_{l in b} (2l+1)``, the effective number of modes per bin."""
        b = self.binning
        nu = (b.ell_max + 1) ** 2 - b.ell_min**2  # sum of (2l+1) over the bin
        return (self.f_sky_eff_cross if cross else self.f_sky_eff) * nu

    def _covariance(self, cross, c12, c11, c22):
        if cross:
            g = self._g11 if self._g12 is None else self._g12
            _, _, ainv = self._pair(True)
            s = np.sqrt(np.clip(c11 * c22, 0.0, None))
            inner = (np.outer(c12, c12) + np.outer(s, s)) * g
        else:
            g = self._g11
            ainv = self._ainv11
            inner = 2.0 * np.outer(c11, c11) * g
        cov = ainv @ inner @ ainv.T
        return 0.5 * (cov + cov.T)

    def _metadata(self, cross, has_noise_cl, has_noise_maps) -> dict:
        inp = self._inputs
        b = self.binning
        meta = {
            "software": f"cmbtools {__version__}",
            "spectrum": "cross" if cross else "auto",
            "nside": inp.nside,
            "lmax": inp.lmax,
            "mask_sha256": inp.mask1_sha256,
            "f_sky": round(self.f_sky, 6),
            "f_sky_eff": round(self.f_sky_eff_cross if cross else self.f_sky_eff, 6),
        }
        if cross:
            meta["mask2_sha256"] = inp.mask1_sha256 if inp.mask2_sha256 is None else inp.mask2_sha256
        meta.update(b.as_dict())
        meta["beam"] = inp.descriptions["beam"]
        if cross:
            meta["beam2"] = inp.descriptions["beam2"]
        meta["pixel_window"] = inp.descriptions["pixel_window"]
        meta["transfer"] = inp.descriptions["transfer"]
        if cross:
            meta["transfer2"] = inp.descriptions["transfer2"]
        meta["monopole_dipole_removed"] = "yes" if inp.remove_monopole_dipole else "no"
        if inp.fast is not None:
            meta["coupling"] = "fast l_exact={} l_toeplitz={} band={}".format(*inp.fast)
        elif inp.coupling == "fast":
            meta["coupling"] = "fast (exact matrix: lmax above 2 nside)"
        else:
            meta["coupling"] = inp.coupling
        meta["n_iter"] = inp.n_iter
        meta["condition_number"] = float(f"{self.condition_number:.6g}")
        meta["errors"] = "Knox formula with f_sky_eff = w2^2/w4"
        meta["noise_bias_subtracted"] = "no"
        meta["estimator_key"] = inp.cache_key
        return meta

    # ------------------------------------------------------------------ persistence
    _ARRAYS = ("f1", "f2", "f12", "pm11", "pm12", "pm22", "ainv11", "ainv12", "ainv22", "g11", "g12")

    def save(self, path, *, overwrite=False) -> Path:
        """Write the estimator to a ``.npz`` file (no pickle) that :meth:`load` reads back.

        The file stores the mask(s), every setting, the precomputed matrices,
        the :attr:`cache_key`, the cmbtools version and a SHA-256 checksum of
        its contents.  Written atomically; an existing file is only replaced
        with ``overwrite=True``.
        """
        inp = self._inputs
        arrays = {
            "mask1": inp.mask1,
            "ell_min": inp.binning.ell_min,
            "ell_max": inp.binning.ell_max,
            "beam1": inp.beam1,
            "beam2": inp.beam2,
            "pixwin": inp.pixwin,
            "transfer1": inp.transfer1,
            "transfer2": inp.transfer2,
        }
        if inp.mask2 is not None:
            arrays["mask2"] = inp.mask2
        for name in self._ARRAYS:
            v = getattr(self, "_" + name)
            if v is not None:
                arrays[name] = v
        settings = {
            "format": _FILE_FORMAT,
            "version": __version__,
            "cache_key": inp.cache_key,
            "nside": inp.nside,
            "lmax": inp.lmax,
            "weighting": inp.binning.weighting,
            "remove_monopole_dipole": inp.remove_monopole_dipole,
            "coupling": inp.coupling,
            "fast": None if inp.fast is None else [int(v) for v in inp.fast],
            "n_iter": inp.n_iter,
            "covariance": inp.covariance,
            "max_condition_number": inp.max_condition_number,
            "descriptions": inp.descriptions,
            "mask1_sha256": inp.mask1_sha256,
            "mask2_sha256": inp.mask2_sha256,
            "condition_number": float(self._condition_number),
            "f_sky": float(self._f_sky),
            "f_sky_eff": float(self._f_sky_eff),
            "f_sky_eff_cross": float(self._f_sky_eff_cross),
            "w2": float(self._w2),
        }
        text = json.dumps(settings, sort_keys=True)
        checksum = _checksum(arrays, text)
        out = _io.check_output_path(path, overwrite=overwrite)
        with _io.atomic_output(out, overwrite=overwrite, suffix=".npz") as tmp:
            with open(tmp, "wb") as fh:
                np.savez_compressed(
                    fh, settings=np.array(text), checksum=np.array(checksum), **arrays
                )
        return out

    @classmethod
    def load(cls, path, *, nthreads=None) -> "SpectrumEstimator":
        """Read an estimator written by :meth:`save`.

        Raises
        ------
        InputFileError
            If the file is missing or unreadable.
        CacheError
            If the file is corrupt (checksum mismatch, truncated, not an
            estimator file) or was written by another cmbtools version.
        """
        p = _io.check_input_file(path)
        try:
            # open the file here: np.load leaves its own handle open when the zip is damaged
            with open(p, "rb") as fh, np.load(fh, allow_pickle=False) as z:
                data = {k: z[k] for k in z.files}
        except Exception as exc:  # noqa: BLE001 - any decoding failure means a corrupt file
            raise CacheError(f"{p}: cannot read the estimator file ({type(exc).__name__}: {exc}); it is corrupt") from None
        try:
            text = str(data.pop("settings")[()])
            checksum = str(data.pop("checksum")[()])
            settings = json.loads(text)
        except (KeyError, ValueError) as exc:
            raise CacheError(f"{p}: not a cmbtools estimator file ({exc})") from None
        if settings.get("format") != _FILE_FORMAT:
            raise CacheError(f"{p}: not a cmbtools estimator file (format {settings.get('format')!r})")
        if _checksum(data, text) != checksum:
            raise CacheError(f"{p}: checksum mismatch; the estimator file is corrupt")
        if settings["version"] != __version__:
            raise CacheError(
                f"{p}: written by cmbtools {settings['version']}, this is {__version__}; rebuild the estimator"
            )
        binning = Binning(data["ell_min"], data["ell_max"], settings["weighting"])
        for k in ("mask1", "mask2", "beam1", "beam2", "pixwin", "transfer1", "transfer2"):
            if k in data:
                data[k].setflags(write=False)
        inp = _Inputs(
            mask1=data["mask1"],
            mask2=data.get("mask2"),
            binning=binning,
            nside=int(settings["nside"]),
            lmax=int(settings["lmax"]),
            beam1=data["beam1"],
            beam2=data["beam2"],
            pixwin=data["pixwin"],
            transfer1=data["transfer1"],
            transfer2=data["transfer2"],
            remove_monopole_dipole=bool(settings["remove_monopole_dipole"]),
            coupling=settings["coupling"],
            fast=None if settings["fast"] is None else tuple(settings["fast"]),
            n_iter=int(settings["n_iter"]),
            covariance=bool(settings["covariance"]),
            max_condition_number=float(settings["max_condition_number"]),
            descriptions=dict(settings["descriptions"]),
            mask1_sha256=settings["mask1_sha256"],
            mask2_sha256=settings["mask2_sha256"],
        )
        if inp.cache_key != settings["cache_key"]:
            raise CacheError(f"{p}: the stored inputs do not match the stored key; the estimator file is corrupt")
        state = {"inputs": inp}
        for name in cls._ARRAYS:
            state[name] = data.get(name)
        for name in ("condition_number", "f_sky", "f_sky_eff", "f_sky_eff_cross", "w2"):
            state[name] = float(settings[name])
        obj = cls.__new__(cls)
        obj._set_state(state)
        object.__setattr__(obj, "_nthreads", nthreads)
        return obj

    @classmethod
    def load_or_build(cls, path, mask, binning, *, force=False, **kwargs) -> "SpectrumEstimator":
        """Load the estimator saved at ``path`` if it was built from these inputs, else build and save it.

        The inputs are identified by their hash (:attr:`cache_key`).  A file
        built from other inputs (stale) or a corrupt file is reported with a
        :class:`~cmbtools.exceptions.CmbtoolsWarning` and replaced,
        atomically, by a freshly built estimator.  A file that is not a
        ``.npz`` archive at all (a map given as the cache path by mistake,
        ...) is never replaced.

        Parameters
        ----------
        path : str or path-like
            The ``.npz`` cache file.
        mask, binning, **kwargs
            As for :class:`SpectrumEstimator`.
        force : bool, default=False
            When building: go ahead even if the memory estimate exceeds what
            the machine has available (as for :class:`SpectrumEstimator`).

        Raises
        ------
        CacheError
            If ``path`` holds a file that is not a ``.npz`` archive.
        """
        p = Path(path)
        nthreads = kwargs.get("nthreads")
        if p.exists():
            if not _may_replace_as_cache(p):
                raise CacheError(
                    f"{p}: is not an estimator cache (not a .npz archive) and is left alone; "
                    "choose another cache path or delete the file"
                )
            key = _resolve_inputs(mask, binning, **kwargs).cache_key
            try:
                est = cls.load(p, nthreads=nthreads)
            except CacheError as exc:
                warnings.warn(f"{exc}; rebuilding it.", CmbtoolsWarning, stacklevel=2)
            else:
                if est.cache_key == key:
                    return est
                warnings.warn(
                    f"{p}: the cached estimator was built from other inputs (stale: key "
                    f"{est.cache_key[:12]}..., expected {key[:12]}...); rebuilding it.",
                    CmbtoolsWarning,
                    stacklevel=2,
                )
        else:
            _io.check_output_path(p)
        est = cls(mask, binning, force=force, **kwargs)
        est.save(p, overwrite=True)
        return est

    def __repr__(self):
        return (
            f"SpectrumEstimator(nside={self.nside}, lmax={self.lmax}, {self.binning!r}, "
            f"f_sky={self.f_sky:.3f}, coupling={self.coupling!r})"
        )


#: Largest |map value| (K) the estimator accepts: squares summed over up to 12 * 2**58 pixels stay finite.
_LARGEST_MAP_VALUE = 1e100


def _may_replace_as_cache(p: Path) -> bool:
    """Whether an existing file may be replaced by a cache: an empty file or a zip archive (.npz), damaged or not."""
    try:
        with open(p, "rb") as fh:
            head = fh.read(2)
    except OSError:
        return True  # not a readable file: load() reports it
    return head in (b"", b"PK")


def _checksum(arrays: dict, text: str) -> str:
    keys = sorted(arrays)
    return _io.sha256_arrays(text, *[x for k in keys for x in (k, np.asarray(arrays[k]))])


# ----------------------------------------------------------------------------- one call


def estimate_spectrum(map1, mask, binning, *, map2=None, mask2=None, noise_cl=None, noise_maps=None, **estimator_kwargs):
    """Bandpowers of a map (or the cross-spectrum of two maps) in one call.

    Builds a :class:`SpectrumEstimator` and applies it once.  Unlike a
    prebuilt estimator, missing pixels (UNSEEN/NaN/inf) inside the mask are
    allowed: the effective mask becomes ``mask * (pixel valid)`` and a
    :class:`~cmbtools.exceptions.CmbtoolsWarning` says how many pixels were
    dropped.  To analyse many maps with the same mask, build the estimator
    once instead.

    Parameters
    ----------
    map1 : ndarray of shape (12*nside**2,)
        RING map, K_CMB.
    mask : ndarray of shape (12*nside**2,)
        Weights of map 1.
    binning : Binning
    map2, mask2 : ndarray of shape (12*nside**2,), optional
        Second map for a cross-spectrum, and its mask (default ``mask``).
    noise_cl, noise_maps : optional
        Noise bias of an auto-spectrum (see :meth:`SpectrumEstimator.estimate`).
    **estimator_kwargs
        Any keyword of :class:`SpectrumEstimator` (lmax, beam, beam2,
        pixel_window, transfer, coupling, nthreads, ...).

    Returns
    -------
    Bandpowers

    Examples
    --------
    >>> import numpy as np
    >>> from cmbtools.spectrum import Binning, estimate_spectrum
    >>> rng = np.random.default_rng(3)
    >>> m = rng.standard_normal(12 * 16**2) * 1e-5
    >>> mask = np.ones(m.size); mask[:768] = 0.0
    >>> m[1000] = np.nan            # a missing pixel inside the mask
    >>> import warnings
    >>> with warnings.catch_warnings(record=True) as caught:
    ...     warnings.simplefilter("always")
    ...     bp = estimate_spectrum(m, mask, Binning.uniform(2, 47, 8), pixel_window=False, nthreads=1)
    >>> "1 missing pixel" in str(caught[0].message)
    True
    """
    a1 = as_map(map1, "map1")
    w1 = check_mask(mask, "mask")
    check_same_nside(a1, w1, "map1", "mask")
    w1 = _drop_missing(a1, w1, "map1", "mask")
    if map2 is not None:
        a2 = as_map(map2, "map2")
        w2 = check_mask(mask if mask2 is None else mask2, "mask2")
        check_same_nside(a2, w2, "map2", "mask2")
        w2 = _drop_missing(a2, w2, "map2", "mask2")
    else:
        a2 = None
        w2 = None if mask2 is None else check_mask(mask2, "mask2")
    est = SpectrumEstimator(w1, binning, mask2=w2, **estimator_kwargs)
    return est.estimate(a1, a2, noise_cl=noise_cl, noise_maps=noise_maps)


def _drop_missing(m, w, map_name, mask_name):
    inside = missing_pixels(m) & (w > 0)
    n = int(inside.sum())
    if n:
        warnings.warn(
            f"The {map_name!r} has {n} missing pixel{'s' if n != 1 else ''} (UNSEEN/NaN/inf) where the "
            f"{mask_name!r} is non-zero; they are left out (the mask is set to zero there).",
            CmbtoolsWarning,
            stacklevel=3,
        )
        w = np.where(inside, 0.0, w)
        if not np.any(w > 0):
            raise InvalidInputError(f"Every pixel of {map_name!r} inside the {mask_name!r} is missing.")
    return w
