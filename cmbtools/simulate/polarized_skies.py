"""Correlated Gaussian I, Q, U skies and polarized instrument noise.

Spectra
-------
Polarized spectra are passed as a dict of arrays in K^2 indexed by ell from 0,
with keys ``'TT'``, ``'EE'``, ``'BB'``, ``'TE'`` (required) and ``'TB'``,
``'EB'`` (optional, zero when absent): the same names the spectrum tables and
the polarized estimator use.  At each l the 3 x 3 covariance of (T, E, B)
must be positive semi-definite (|TE|^2 <= TT EE, ...).

Order of the random draws (part of the reproducibility contract; block
streams of :mod:`cmbtools.simulate.random_streams`): :func:`gaussian_iqu_alm`
draws three sets of unit-variance coefficients exactly as
:func:`~cmbtools.simulate.gaussian_alm` does (three successive children of the
seed sequence), the independent fields that the Cholesky factor of the
(T, E, B) covariance at each l then combines.  :func:`iqu_noise_map` draws
I, then Q, then U, each exactly as :func:`~cmbtools.simulate.noise_map` does
(Q and U scaled by sqrt(2)).

Polarized noise
---------------
For the same detectors, the noise of Q and of U per pixel has standard
deviation sqrt(2) times that of I (common practice: each polarization
estimate uses the difference of two orthogonal detectors), uncorrelated
between I, Q and U; a hits map scales all three alike.  So the E and B noise
power is twice the temperature noise power, ``N^EE_l = N^BB_l = 2 N^TT_l``.
"""

from __future__ import annotations

import math
import numbers

import numpy as np

from cmbtools._core import sht as _sht
from cmbtools._core.checks import UNSEEN, check_lmax, check_nside, check_positive, resolve_nthreads
from cmbtools._core.memory import check_memory, estimate_sky_bytes
from cmbtools.exceptions import InvalidInputError
from cmbtools.simulate.noise import _check_model, _check_model_nside, _noise_bytes, _noise_map, noise_spectrum
from cmbtools.simulate.random_streams import resolve_rng
from cmbtools.simulate.skies import _dipole_map, _dipole_vector, _gaussian_alm

__all__ = [
    "SPECTRUM_NAMES",
    "check_spectra",
    "gaussian_iqu_alm",
    "gaussian_iqu_sky",
    "iqu_noise_map",
    "polarized_noise_spectra",
]

#: The six spectra of a polarized sky, in the order cmbtools lists them.
SPECTRUM_NAMES = ("TT", "TE", "TB", "EE", "EB", "BB")

_REQUIRED = ("TT", "EE", "BB", "TE")


def check_spectra(spectra, lmax=None, name="spectra") -> dict:
    """Validate polarized spectra: a dict with TT, EE, BB, TE (and optionally TB, EB) arrays in K^2.

    Parameters
    ----------
    spectra : dict
        Keys TT, EE, BB, TE (required), TB, EB (optional); arrays in K^2 from ell = 0.
    lmax : int, optional
        Cut every spectrum to ``lmax + 1`` values (they must extend that far).
    name : str, default='spectra'
        The parameter name for error messages.

    Returns
    -------
    dict
        The six float64 arrays (TT, TE, TB, EE, EB, BB), all cut to a common
        length (``lmax + 1`` if given, else the shortest), TB and EB zero when absent.

    Raises
    ------
    InvalidInputError
        For a missing or unknown key, a non-finite value, a negative TT, EE
        or BB, arrays shorter than ``lmax + 1``, or a covariance that is not
        positive semi-definite at some l.
    """
    if not isinstance(spectra, dict):
        raise InvalidInputError(
            f"The {name!r} parameter must be a dict of spectra with keys TT, EE, BB, TE (optionally TB, EB). "
            f"Got {type(spectra).__name__} instead."
        )
    keys = {str(k).upper(): k for k in spectra}
    unknown = sorted(set(keys) - set(SPECTRUM_NAMES))
    if unknown:
        raise InvalidInputError(f"The {name!r} have unknown key(s) {unknown}; expected TT, EE, BB, TE, TB, EB.")
    missing = [k for k in _REQUIRED if k not in keys]
    if missing:
        raise InvalidInputError(f"The {name!r} lack the spectrum(s) {missing}; TT, EE, BB and TE are required.")
    arrays = {}
    for k in SPECTRUM_NAMES:
        if k not in keys:
            continue
        try:
            a = np.asarray(spectra[keys[k]], dtype=np.float64)
        except (TypeError, ValueError):
            raise InvalidInputError(f"The {name!r} spectrum {k} must be an array of numbers.") from None
        if a.ndim != 1 or a.size == 0:
            raise InvalidInputError(f"The {name!r} spectrum {k} must be a non-empty 1-d array. Got shape {a.shape}.")
        if not np.all(np.isfinite(a)):
            raise InvalidInputError(f"The {name!r} spectrum {k} has non-finite values (first at ell {int(np.argmax(~np.isfinite(a)))}).")
        if k in ("TT", "EE", "BB") and np.any(a < 0):
            raise InvalidInputError(f"The {name!r} spectrum {k} is negative at ell {int(np.argmax(a < 0))}.")
        arrays[k] = a
    n = min(a.size for a in arrays.values())
    if lmax is not None:
        if n < lmax + 1:
            raise InvalidInputError(f"The {name!r} must extend to ell={lmax}. Got ell up to {n - 1} instead.")
        n = lmax + 1
    out = {k: (arrays[k][:n].copy() if k in arrays else np.zeros(n)) for k in SPECTRUM_NAMES}
    _cholesky(out)  # refuses a covariance that is not positive semi-definite
    return out


def _cholesky(s):
    """Lower Cholesky factor of the (T, E, B) covariance at every l: dict of its six entries, arrays."""
    tt, ee, bb, te, tb, eb = (s[k] for k in ("TT", "EE", "BB", "TE", "TB", "EB"))
    scale = np.maximum(np.maximum(tt, ee), np.maximum(bb, 1e-300))
    tol = 1e-10 * scale

    def root(x, what):
        bad = x < -tol
        if np.any(bad):
            ell = int(np.argmax(bad))
            raise InvalidInputError(
                f"The polarized spectra are not a valid covariance at ell {ell}: {what} "
                f"(need |TE|^2 <= TT EE and the like)."
            )
        return np.sqrt(np.maximum(x, 0.0))

    def ratio(a, b):
        return np.where(b > 0, a / np.where(b > 0, b, 1.0), 0.0)

    l00 = np.sqrt(tt)
    l10 = ratio(te, l00)
    l20 = ratio(tb, l00)
    if np.any((l00 == 0) & ((te != 0) | (tb != 0))):
        ell = int(np.argmax((l00 == 0) & ((te != 0) | (tb != 0))))
        raise InvalidInputError(f"The polarized spectra are not a valid covariance at ell {ell}: TT is 0 but TE or TB is not.")
    l11 = root(ee - l10**2, "TE^2 > TT EE")
    l21 = ratio(eb - l20 * l10, l11)
    if np.any((l11 == 0) & (np.abs(eb - l20 * l10) > tol)):
        ell = int(np.argmax((l11 == 0) & (np.abs(eb - l20 * l10) > tol)))
        raise InvalidInputError(f"The polarized spectra are not a valid covariance at ell {ell}: EB does not fit TT, TE, EE.")
    l22 = root(bb - l20**2 - l21**2, "BB is too small for TB and EB")
    return {"00": l00, "10": l10, "11": l11, "20": l20, "21": l21, "22": l22}


def gaussian_iqu_alm(spectra, lmax, *, rng=None, nthreads=None) -> np.ndarray:
    """Draw the T, E, B coefficients of a correlated Gaussian polarized sky.

    Parameters
    ----------
    spectra : dict
        TT, EE, BB, TE (and optionally TB, EB) in K^2, indexed by ell from 0.
    lmax : int
        Largest multipole.
    rng : Generator, SeedSequence, int or None, optional
        Random source (see the module notes for the order of the draws).
    nthreads : int, optional
        Threads that draw the random numbers; the coefficients do not depend on it.

    Returns
    -------
    alm : ndarray of complex128, shape (3, alm_size(lmax))
        T, E, B coefficients in healpy's layout: ``(a_T, a_E, a_B)_lm = L_l g_lm``
        with ``L_l`` the lower Cholesky factor of the (T, E, B) covariance at l
        and ``g_lm`` independent unit complex normals (real at m = 0).
    """
    lmax = check_lmax(lmax)
    s = check_spectra(spectra, lmax)
    chol = {k: v[_sht.alm_ell(lmax)] for k, v in _cholesky(s).items()}
    return _combine(chol, _unit_fields(lmax, rng, nthreads))


def _unit_fields(lmax, rng, nthreads):
    """Three independent unit-variance coefficient sets (the draws of the module notes)."""
    source = resolve_rng(rng)
    ones = np.ones(lmax + 1)
    return [_gaussian_alm(ones, lmax, source, nthreads) for _ in range(3)]


def _combine(chol, g):
    alm = np.empty((3, g[0].size), dtype=np.complex128)
    alm[0] = chol["00"] * g[0]
    alm[1] = chol["10"] * g[0] + chol["11"] * g[1]
    alm[2] = chol["20"] * g[0] + chol["21"] * g[1] + chol["22"] * g[2]
    return alm


def _field_beams(beam, lmax, name="beam"):
    """(B_T, B_P) up to lmax (copies) from None, a Gaussian FWHM in arcmin, one array, or a pair of arrays;
    ``name`` is the parameter's name in the messages (``gaussian_iqu_sky``'s beam, the validation's sky_beam)."""
    from cmbtools.spectrum.beams import gaussian_beam, gaussian_polarized_beam

    if beam is None:
        return None, None
    if isinstance(beam, numbers.Real) and not isinstance(beam, bool):
        fwhm = check_positive(beam, name, allow_zero=True)
        return gaussian_beam(fwhm, lmax), gaussian_polarized_beam(fwhm, lmax)
    pair = beam if isinstance(beam, (tuple, list)) and len(beam) == 2 and np.ndim(beam[0]) == 1 else (beam, beam)
    out = []
    for b in pair:
        try:
            a = np.asarray(b, dtype=np.float64)
        except (TypeError, ValueError):
            raise InvalidInputError(
                f"The {name!r} parameter must be None, a FWHM in arcmin, an array B_l or a pair (B_T, B_P). "
                f"Got {beam!r} instead."
            ) from None
        if a.ndim != 1 or a.size < lmax + 1:
            raise InvalidInputError(f"The {name!r} arrays must be 1-d and extend to ell={lmax}. Got shape {a.shape} "
                                    "instead.")
        if not np.all(np.isfinite(a)):
            raise InvalidInputError(f"The {name!r} array has non-finite values.")
        out.append(a[: lmax + 1].copy())
    return out[0], out[1]


def gaussian_iqu_sky(spectra, nside, *, lmax=None, beam=None, pixel_window=True, monopole=0.0, dipole=None, rng=None,
                     nthreads=None, force=False, pixelise=False) -> np.ndarray:
    """Simulate correlated Gaussian I, Q, U maps as an instrument would see them.

    The coefficients of :func:`gaussian_iqu_alm` are multiplied by the beams
    (temperature for T, polarization for E and B) and the pixel windows
    (:func:`~cmbtools.spectrum.pixel_window` for T,
    :func:`~cmbtools.spectrum.polarization_pixel_window` for E and B), then
    synthesized (spin 0 for I, spin 2 for Q, U); an optional monopole and
    dipole are added to I.

    Parameters
    ----------
    spectra : dict
        TT, EE, BB, TE (optionally TB, EB) in K^2 from ell = 0.
    nside : int
        HEALPix resolution.
    lmax : int, optional
        Largest multipole simulated (default ``min(3*nside - 1, len - 1)``; at most ``4*nside - 1``).
    beam : None, float, array_like or (array_like, array_like), optional
        None, a Gaussian FWHM in arcmin (temperature beam for T, its spin-2
        form :func:`~cmbtools.spectrum.gaussian_polarized_beam` for E and B),
        one B_l for all fields, or a pair (B_T, B_P).
    pixel_window : bool, default=True
        Multiply by the temperature and polarization pixel windows of ``nside``.
    monopole : float, default=0
        Added to I, in K.
    dipole : array_like of shape (3,) or Dipole, optional
        Added to I in pixel space.
    rng : Generator, SeedSequence, int or None, optional
        Random source; use :func:`~cmbtools.simulate.simulation_rng` for sets of simulations.
    nthreads : int, optional
        Threads for the transforms.
    force : bool, default=False
        Go ahead even when the memory estimate exceeds what the machine has available.
    pixelise : bool, default=False
        Average the beam-convolved I, Q, U over the area of each pixel
        (:func:`cmbtools.simulate.pixel_averaging.pixel_averaged_map`; Q and U
        in each point's own frame) instead of sampling them, smoothed by the
        pixel windows, at the pixel centres.  Needs ``pixel_window=True``.

    Returns
    -------
    m : ndarray of float64, shape (3, 12*nside**2)
        I, Q, U in K_CMB, RING, HEALPix polarization convention.

    Raises
    ------
    InvalidInputError
        For bad spectra (see :func:`check_spectra`), nside, lmax or beams.
    MemoryLimitError
        If the maps and transforms would not fit in memory (unless ``force``).

    Examples
    --------
    >>> import numpy as np
    >>> c = np.zeros(48); c[2:] = 1e-12
    >>> m = gaussian_iqu_sky({"TT": 10 * c, "EE": c, "BB": 0 * c, "TE": 2 * c}, 16, rng=1, nthreads=1)
    >>> m.shape
    (3, 3072)
    """
    nside = check_nside(nside)
    if isinstance(spectra, dict):
        n_avail = min(np.size(v) for v in spectra.values()) if spectra else 0
    else:
        n_avail = 0
    if lmax is None:
        lmax = min(3 * nside - 1, max(n_avail - 1, 0))
    lmax = check_lmax(lmax, nside)
    s = check_spectra(spectra, lmax)
    try:
        monopole = float(monopole)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The 'monopole' parameter must be a number in K. Got {monopole!r} instead.") from None
    if not np.isfinite(monopole):
        raise InvalidInputError(f"The 'monopole' parameter must be finite. Got {monopole!r} instead.")
    if not isinstance(pixel_window, (bool, np.bool_)):
        raise InvalidInputError(f"The 'pixel_window' parameter must be True or False. Got {pixel_window!r} instead.")
    from cmbtools.simulate.skies import _averaging_bytes, _check_pixelise

    pixelise = _check_pixelise(pixelise, pixel_window)
    dip = None if dipole is None else _dipole_vector(dipole)
    check_memory(max(3 * estimate_sky_bytes(nside, lmax, dip is not None),
                     _averaging_bytes(nside, lmax, 2) if pixelise else 0),
                 f"A simulated I, Q, U sky at nside {nside} with lmax {lmax}", force=force)
    b_t, b_p = _field_beams(beam, lmax)
    t_transfer = np.ones(lmax + 1)
    p_transfer = np.ones(lmax + 1)
    if b_t is not None:
        t_transfer *= b_t
        p_transfer *= b_p
    if pixel_window and not pixelise:
        from cmbtools.spectrum.pixel_windows import pixel_window as _pixel_window
        from cmbtools.spectrum.pixel_windows import polarization_pixel_window

        t_transfer *= np.asarray(_pixel_window(nside, lmax), dtype=np.float64)[: lmax + 1]
        p_transfer *= np.asarray(polarization_pixel_window(nside, lmax), dtype=np.float64)[: lmax + 1]
    alm = gaussian_iqu_alm(s, lmax, rng=rng, nthreads=nthreads)
    out = np.empty((3, 12 * nside * nside))
    t_alm = _sht.almxfl(alm[0], t_transfer, lmax)
    e_alm, b_alm = _sht.almxfl(alm[1], p_transfer, lmax), _sht.almxfl(alm[2], p_transfer, lmax)
    if pixelise:  # I, then Q and U in each point's own frame, averaged over each pixel
        from cmbtools.simulate.pixel_averaging import pixel_averaged_map

        out[0] = pixel_averaged_map(t_alm, nside, lmax, nthreads=nthreads)
        out[1:] = pixel_averaged_map(np.stack([e_alm, b_alm]), nside, lmax, spin=2, nthreads=nthreads)
    else:
        out[0] = _sht.alm2map(t_alm, nside, lmax, nthreads=nthreads)
        out[1], out[2] = _sht.alm2map_spin2(e_alm, b_alm, nside, lmax, nthreads=nthreads)
    if monopole:
        out[0] += monopole
    if dip is not None:
        out[0] += _dipole_map(nside, dip)
    return out


def polarized_noise_spectra(model, lmax, nside=None) -> dict:
    """Expected noise power of a :class:`~cmbtools.simulate.NoiseModel` for I, Q, U maps, K^2.

    ``{'TT': N_l, 'EE': 2 N_l, 'BB': 2 N_l, 'TE': 0, 'TB': 0, 'EB': 0}`` with
    ``N_l`` from :func:`~cmbtools.simulate.noise_spectrum` (Q and U noise
    sqrt(2) times the temperature noise per pixel; see the module notes).

    Parameters
    ----------
    model : NoiseModel
        The temperature noise model.
    lmax : int
        Largest multipole.
    nside : int, optional
        Checked against the hits map's nside, as in :func:`~cmbtools.simulate.noise_spectrum`.

    Returns
    -------
    dict
        Spectrum name -> ndarray of shape (lmax+1,), K^2.
    """
    nl = noise_spectrum(model, lmax, nside)
    zero = np.zeros_like(nl)
    return {"TT": nl, "TE": zero.copy(), "TB": zero.copy(), "EE": 2.0 * nl, "EB": zero.copy(), "BB": 2.0 * nl}


def iqu_noise_map(model, nside, *, rng=None, lmax=None, nthreads=None, force=False) -> np.ndarray:
    """Draw I, Q, U noise maps from a :class:`~cmbtools.simulate.NoiseModel`.

    I gets the noise of :func:`~cmbtools.simulate.noise_map`; Q and U each
    get independent noise with sqrt(2) times its per-pixel standard deviation
    (and, with a knee, sqrt(2) times its correlated part).  A hits map shapes
    all three; unobserved pixels are UNSEEN in all three.

    Parameters
    ----------
    model : NoiseModel
        The temperature noise model (depth, hits, knee).
    nside : int
        Resolution (must match the hits map).
    rng : Generator, SeedSequence, int or None, optional
        Random source (see the module notes for the order of the draws).
    lmax : int, optional
        Largest multipole of the correlated part (default ``3*nside - 1``).
    nthreads : int, optional
        Threads for the draws and transforms.
    force : bool, default=False
        Go ahead even when the memory estimate exceeds what the machine has available.

    Returns
    -------
    n : ndarray of float64, shape (3, 12*nside**2)
        Noise in K_CMB, RING.
    """
    model = _check_model(model)
    nside = _check_model_nside(model, nside)
    lmax = 3 * nside - 1 if lmax is None else check_lmax(lmax, nside)
    check_memory(3 * _noise_bytes(model, nside, lmax), f"I, Q, U noise maps at nside {nside}", force=force)
    gen = resolve_rng(rng)
    nthreads = resolve_nthreads(nthreads)
    out = np.stack([_noise_map(model, nside, lmax, gen, nthreads) for _ in range(3)])
    bad = out[0] == UNSEEN
    out[1:] *= math.sqrt(2.0)
    out[:, bad] = UNSEEN
    return out
