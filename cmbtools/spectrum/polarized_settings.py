"""The inputs of the polarized spectrum estimator: beams, pixel windows, transfer functions, memory.

Each function checks one setting of :class:`~cmbtools.spectrum.PolarizedSpectrumEstimator` and returns
it as arrays over ``ell = 0..lmax`` with a description for the bandpowers' metadata; the temperature
estimator's counterparts are in :mod:`cmbtools.spectrum.settings`.
"""

from __future__ import annotations

import numpy as np

from cmbtools._core import files as _io
from cmbtools._core import sht as _sht
from cmbtools._core.checks import check_cl, check_lmax, check_positive, nside_from_npix
from cmbtools.exceptions import InvalidInputError
from cmbtools.spectrum.beams import gaussian_polarized_beam
from cmbtools.spectrum.polarized_bandpowers import SPECTRA
from cmbtools.spectrum.settings import _beam_array, _transfer_array

__all__ = []


def _pixel_windows(pixel_window, nside, lmax, nthreads):
    """(p^T_l, p^P_l, description) from True/False or a table (used for T and P alike)."""
    if pixel_window is True:
        from cmbtools.spectrum.pixel_windows import pixel_window as _pw
        from cmbtools.spectrum.spin2_pixel_window import polarization_pixel_window as _ppw

        pt = np.asarray(_pw(nside, lmax, nthreads=nthreads), dtype=np.float64)[: lmax + 1].copy()
        pp = np.asarray(_ppw(nside, lmax, nthreads=nthreads), dtype=np.float64)[: lmax + 1].copy()
        desc = f"healpix nside={nside} (T and P)"
        return pt, pp, desc
    if pixel_window is False or pixel_window is None:
        return np.ones(lmax + 1), np.ones(lmax + 1), "none"
    if isinstance(pixel_window, (tuple, list)) and len(pixel_window) == 2:
        pt = check_cl(pixel_window[0], "pixel_window[0]", lmax=lmax, allow_negative=True)[: lmax + 1].copy()
        pp = check_cl(pixel_window[1], "pixel_window[1]", lmax=lmax, allow_negative=True)[: lmax + 1].copy()
        return pt, pp, f"tables sha256={_io.sha256_arrays(pt, pp)[:16]}"
    pt = check_cl(pixel_window, "pixel_window", lmax=lmax, allow_negative=True)[: lmax + 1].copy()
    return pt, pt.copy(), f"table sha256={_io.sha256_arrays(pt)[:16]}"


def _check_memory(mask, lmax, others, purify, force):
    """Refuse, before any large allocation, an estimator that would not fit in memory (see the class doc)."""
    from cmbtools._core.memory import check_memory, estimate_alm_bytes, estimate_coupling_bytes, estimate_map_bytes
    from cmbtools.exceptions import CmbtoolsError

    try:
        nside = nside_from_npix(np.size(mask), "mask")
        lmax = 3 * nside - 1 if lmax is None else check_lmax(lmax, nside)
    except CmbtoolsError:
        return None  # refused later with its own message
    n_masks = 1 + len(others)
    masks = estimate_map_bytes(nside, 2 * n_masks)
    derivatives = estimate_map_bytes(nside, 4 * min(2, n_masks)) if purify else 0
    derivatives += estimate_map_bytes(nside, 4)  # the covariance's |eth w|, lap w and window products
    transform = 3 * estimate_alm_bytes(2 * lmax) + _sht._leg_bytes(nside, 2 * lmax)
    # the pure B's kernel matrices, or the quadrature's d-function tables (4 of (2 lmax + 1) nodes, in blocks of
    # at most 2**23 doubles each; spectrum.spin_quadrature)
    tables = 4 * 8 * (2 * lmax + 1) * min(lmax + 1, max(64, 2**23 // (2 * lmax + 1)))
    kernels = max(estimate_coupling_bytes(lmax, 2 + 4 * n_masks), tables)
    need = masks + derivatives + max(transform, kernels)
    return check_memory(need, f"Building the polarized spectrum estimator at nside {nside} with lmax {lmax}",
                        force=force)


def _pol_beam_array(beam, name, table=None, description=None, lmax=None):
    """B^P_l: for a Gaussian FWHM the spin-2 Gaussian beam (Challinor et al. 2000, PRD 62, 123002:
    ``exp(-(l(l+1) - 4) sigma^2 / 2)``); a table is used as given (``table``: already checked)."""
    if beam is None or np.ndim(beam) != 0:
        if table is not None:
            return table, description
        return _beam_array(beam, lmax, name)
    n = table.size - 1 if table is not None else lmax
    fwhm = check_positive(beam, f"{name} (FWHM in arcmin)", allow_zero=True)
    b = np.asarray(gaussian_polarized_beam(fwhm, n), dtype=np.float64)[: n + 1]
    return b, f"gaussian spin-2 fwhm_arcmin={fwhm:g}"


def _transfers(transfer, lmax):
    """Per-spectrum transfer functions T^X_l (dict of the six spectra) and a description."""
    out = {s: np.ones(lmax + 1) for s in SPECTRA}
    if transfer is None:
        return out, "none"
    if not isinstance(transfer, dict):
        t, d = _transfer_array(transfer, lmax, "transfer")
        return {s: t.copy() for s in SPECTRA}, d
    unknown = sorted(set(transfer) - set(SPECTRA))
    if unknown:
        raise InvalidInputError(
            f"The 'transfer' parameter has unknown spectra {unknown}; the keys must be among {', '.join(SPECTRA)}."
        )
    parts = []
    for s, t in transfer.items():
        out[s], d = _transfer_array(t, lmax, f"transfer[{s!r}]")
        parts.append(f"{s} {d}")
    return out, "; ".join(parts)


def _guess_spectra(guess_cl, sky_lmax, needed):
    """The guess of the sky spectra (dict of the six, K^2, to sky_lmax) for the corrections, and a description.

    None when no correction needs it (a given guess is still checked); default: the built-in polarized fiducial
    spectra with the lensing-like B modes (:func:`cmbtools.simulate.fiducial_spectra`).
    """
    if guess_cl is not None and not isinstance(guess_cl, dict):
        raise InvalidInputError(
            "The 'guess_cl' parameter must be a dict of spectra under the keys 'TT', 'TE', 'TB', 'EE', 'EB', 'BB' "
            f"(K^2, from ell 0). Got {type(guess_cl).__name__} instead."
        )
    if guess_cl is None:
        if not needed:
            return None, "none"
        from cmbtools.simulate.polarized_theory import fiducial_spectra
        from cmbtools.simulate.theory_spectrum import FIDUCIAL_MODEL

        spectra = fiducial_spectra(sky_lmax, lensing_bb=True)
        return {s: np.asarray(spectra[s], dtype=np.float64)[: sky_lmax + 1].copy() for s in SPECTRA}, \
            f"built-in fiducial spectra ({FIDUCIAL_MODEL}; lensing-like BB)"
    unknown = sorted(set(guess_cl) - set(SPECTRA))
    if unknown:
        raise InvalidInputError(f"The 'guess_cl' parameter has unknown spectra {unknown}; use {', '.join(SPECTRA)}.")
    out = {s: np.zeros(sky_lmax + 1) for s in SPECTRA}
    for s, v in guess_cl.items():
        out[s] = check_cl(v, f"guess_cl[{s!r}]", lmax=sky_lmax, allow_negative=s not in ("TT", "EE", "BB"))[
            : sky_lmax + 1].copy()
    if not needed:
        return None, "none"
    return out, f"tables sha256={_io.sha256_arrays(*(out[s] for s in SPECTRA))[:16]}"


def _padded(a, n):
    out = np.zeros(n)
    k = min(n, np.size(a))
    out[:k] = np.asarray(a, dtype=np.float64)[:k]
    return out


def _sky_factors(beams, pixel_window, nside, sky_lmax, nthreads):
    """Beam times pixel window of each mask name ('t1', 'p1', 't2', 'p2') to ``sky_lmax`` (beyond lmax).

    Gaussian beams (spin-2 for 'p') and the computed pixel windows are evaluated to ``sky_lmax``; tables
    shorter than that count as zero beyond their end (like the temperature estimator's corrections).
    """
    from cmbtools.spectrum.beams import GaussianBeam, gaussian_beam

    n = sky_lmax + 1
    if pixel_window is True:
        from cmbtools.spectrum.pixel_windows import pixel_window as _pw
        from cmbtools.spectrum.spin2_pixel_window import polarization_pixel_window as _ppw

        wt = _padded(_pw(nside, sky_lmax, nthreads=nthreads), n)
        wp = _padded(_ppw(nside, sky_lmax, nthreads=nthreads), n)
    elif pixel_window is False or pixel_window is None:
        wt = wp = np.ones(n)
    elif isinstance(pixel_window, (tuple, list)) and len(pixel_window) == 2:
        wt, wp = _padded(pixel_window[0], n), _padded(pixel_window[1], n)
    else:
        wt = wp = _padded(pixel_window, n)
    out = {}
    for key, beam in beams.items():
        if isinstance(beam, GaussianBeam):
            beam = beam.fwhm_arcmin
        if beam is None:
            b = np.ones(n)
        elif np.ndim(beam) == 0:
            fwhm = float(beam)
            b = _padded(gaussian_polarized_beam(fwhm, sky_lmax) if key[0] == "p" else gaussian_beam(fwhm, sky_lmax), n)
        else:
            b = _padded(beam, n)
        out[key] = b * (wt if key[0] == "t" else wp)
    return out
