"""The one-call forms of the estimators, and the one rule for missing pixels inside a mask.

:func:`estimate_spectrum` builds a :class:`~cmbtools.spectrum.SpectrumEstimator`
and applies it once, :func:`estimate_polarized_spectra` the same for a
:class:`~cmbtools.spectrum.PolarizedSpectrumEstimator`; unlike a prebuilt
estimator they accept missing pixels inside the mask, which
:func:`drop_missing_pixels` leaves out.
"""

from __future__ import annotations

import math
import warnings

import numpy as np

from cmbtools._core.checks import as_map, check_mask, check_same_nside, missing_pixels
from cmbtools.exceptions import CmbtoolsWarning, InvalidInputError
from cmbtools.spectrum.estimator import SpectrumEstimator

__all__ = ["estimate_spectrum", "estimate_polarized_spectra"]


def estimate_spectrum(map1, mask, binning=None, *, map2=None, mask2=None, noise_cl=None, noise_maps=None, errors="gaussian",
                      noise=None, noise2=None, theory_cl=None, **estimator_kwargs):
    """Bandpowers of a map (or the cross-spectrum of two maps) in one call.

    Builds a :class:`SpectrumEstimator` and applies it once.  The error bars
    are, as in ``cmbtools spectrum``, the diagonal of the
    :class:`~cmbtools.spectrum.GaussianCovariance` of the bandpowers (which is
    also returned as ``covariance``), or the Knox errors with ``errors="knox"``.  Unlike a
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
    binning : Binning, optional
        The bins of the bandpowers (default: :func:`~cmbtools.spectrum.sampling.default_binning`
        for the map's nside and ``beam``, which warns when the beam is narrower than two pixels).
    map2, mask2 : ndarray of shape (12*nside**2,), optional
        Second map for a cross-spectrum, and its mask (default ``mask``).
    noise_cl, noise_maps : optional
        Noise bias of an auto-spectrum (see :meth:`SpectrumEstimator.estimate`).
    errors : {'gaussian', 'knox'}, default='gaussian'
        Error model: the Gaussian covariance (with the per-pixel noise
        ``noise``/``noise2``; for an auto-spectrum without it, the measured
        power with its noise, as if uniform), or the Knox formula with
        f_sky_eff.  A cross-spectrum without both ``noise`` and ``noise2``
        keeps the Knox errors (its noise is not known).
    noise, noise2 : PixelNoise, optional
        Per-pixel noise of map 1 and map 2, for the Gaussian covariance.
    theory_cl : array_like of shape (>= lmax+1,), optional
        Sky spectrum (K^2) of the Gaussian covariance instead of the measured
        bandpowers.
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
    w1 = drop_missing_pixels(a1, w1, "map1", "mask")
    if map2 is not None:
        a2 = as_map(map2, "map2")
        w2 = check_mask(mask if mask2 is None else mask2, "mask2")
        check_same_nside(a2, w2, "map2", "mask2")
        w2 = drop_missing_pixels(a2, w2, "map2", "mask2")
    else:
        a2 = None
        w2 = None if mask2 is None else check_mask(mask2, "mask2")
    if errors not in ("gaussian", "knox"):
        raise InvalidInputError(f"The 'errors' parameter must be 'gaussian' or 'knox'. Got {errors!r} instead.")
    if binning is None:
        from cmbtools.spectrum.sampling import default_binning

        nside = int(round(math.sqrt(w1.size / 12)))
        binning = default_binning(nside, estimator_kwargs.get("beam"), lmax=estimator_kwargs.get("lmax"))
    est = SpectrumEstimator(w1, binning, mask2=w2, **estimator_kwargs)
    bp = est.estimate(a1, a2, noise_cl=noise_cl, noise_maps=noise_maps)
    cross = a2 is not None
    if errors == "knox" or (cross and (noise is None or noise2 is None)):
        return bp.with_metadata(errors="Knox formula with f_sky_eff")
    return _with_gaussian_errors(est, bp, a1, noise, noise2, theory_cl, cross, estimator_kwargs.get("nthreads"))


def _with_gaussian_errors(est, bp, map1, noise, noise2, theory_cl, cross, nthreads):
    """``bp`` with the diagonal of the Gaussian covariance as its errors and the covariance attached."""
    import dataclasses

    from cmbtools.spectrum.covariance import GaussianCovariance

    gauss = GaussianCovariance(est, noise=noise, noise2=noise2 if cross else None, cross=cross, nthreads=nthreads)
    if theory_cl is not None:
        signal, source = theory_cl, "the given theory spectrum"
    elif not cross and noise is None:
        # the measured power with its noise (the noise bias, if subtracted, is put back)
        signal, source = (est.estimate(map1) if bp.metadata.get("noise_bias_subtracted") else bp), \
            "the measured bandpowers with their noise"
    elif not cross and not bp.metadata.get("noise_bias_subtracted"):
        signal = dataclasses.replace(bp, cl=bp.cl - gauss.noise_bandpowers())
        source = "the measured bandpowers less the described noise"
    else:
        signal, source = bp, "the measured bandpowers"
    cov = gauss.covariance(signal)
    err = np.asarray(cov.errors)
    out = dataclasses.replace(bp, cl_err=err, dl_err=err * est.binning.dl_factor, covariance=np.array(cov.matrix))
    return out.with_metadata(errors=f"Gaussian covariance of {source}")


def drop_missing_pixels(m, w, map_name, mask_name, *, stacklevel=3):
    """The mask ``w`` set to zero where the map ``m`` has missing pixels (UNSEEN/NaN/inf), with a warning.

    The one rule for missing pixels inside a mask, used by
    :func:`estimate_spectrum` and the ``spectrum`` command.

    Raises
    ------
    InvalidInputError
        If every pixel of the map inside the mask is missing.
    """
    inside = missing_pixels(m) & (w > 0)
    n = int(inside.sum())
    if n:
        warnings.warn(
            f"The {map_name!r} has {n} missing pixel{'s' if n != 1 else ''} inside the mask ({mask_name!r}; "
            f"UNSEEN/NaN/inf); they are left out (the mask is set to zero there).",
            CmbtoolsWarning,
            stacklevel=stacklevel,
        )
        w = np.where(inside, 0.0, w)
        if not np.any(w > 0):
            raise InvalidInputError(f"Every pixel of {map_name!r} inside the {mask_name!r} is missing.")
    return w


def estimate_polarized_spectra(maps1, mask, binning, *, pol_mask=None, maps2=None, mask2=None, pol_mask2=None,
                               noise_cl=None, noise_maps=None, **estimator_kwargs):
    """TT, TE, TB, EE, EB, BB bandpowers of an IQU map (or the cross-spectra of two) in one call.

    Missing pixels (UNSEEN/NaN/inf) inside a mask are allowed here: the mask is set to zero there (a
    :class:`~cmbtools.exceptions.CmbtoolsWarning` says how many), as for the temperature one-call function.

    Parameters
    ----------
    maps1 : ndarray of shape (3, 12*nside**2)
        I, Q, U (K_CMB, RING, HEALPix polarization convention).
    mask : ndarray of shape (12*nside**2,)
        Temperature weights.
    binning : Binning
        The bins.
    pol_mask : ndarray, optional
        Polarization weights (default ``mask``).
    maps2 : ndarray of shape (3, 12*nside**2), optional
        Second map: cross-spectra.
    mask2, pol_mask2 : ndarray, optional
        Weights of the second map.
    noise_cl, noise_maps : optional
        Noise bias of auto-spectra (see :meth:`PolarizedSpectrumEstimator.estimate`).
    **estimator_kwargs
        Any other keyword of :class:`PolarizedSpectrumEstimator`.

    Returns
    -------
    PolarizedBandpowers
    """
    from cmbtools.spectrum.polarization import PolarizedSpectrumEstimator

    mask = np.asarray(mask, dtype=np.float64)
    pol_mask = mask if pol_mask is None else np.asarray(pol_mask, dtype=np.float64)
    m1 = np.asarray(maps1, dtype=np.float64)
    if m1.ndim == 2 and m1.shape[0] == 3 and m1.shape[1] == mask.size:
        mask = drop_missing_pixels(m1[0], mask, "maps1[I]", "mask")
        pol_mask = drop_missing_pixels(m1[1], pol_mask, "maps1[Q]", "pol_mask")
        pol_mask = drop_missing_pixels(m1[2], pol_mask, "maps1[U]", "pol_mask")
    est = PolarizedSpectrumEstimator(mask, binning, pol_mask=pol_mask, mask2=mask2, pol_mask2=pol_mask2,
                                     **estimator_kwargs)
    return est.estimate(maps1, maps2, noise_cl=noise_cl, noise_maps=noise_maps)
