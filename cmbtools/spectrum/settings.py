"""The settings of a spectrum estimator: checked once, frozen, carrying the cache key.

:func:`resolve_settings` holds the one signature of the estimator's settings
(mask, binning, lmax, second mask, beams, pixel window, transfer functions,
monopole/dipole removal, coupling mode and its fast-mode settings, refinement
iterations, covariance, condition-number limit); :class:`SpectrumEstimator`
and :meth:`SpectrumEstimator.load_or_build` pass their keywords through it.
The result, :class:`EstimatorSettings`, is what the estimator is built from
and what :mod:`cmbtools.spectrum.storage` writes and reads back.
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np

from cmbtools._core import files as _io
from cmbtools._core.checks import (
    check_cl,
    check_int,
    check_lmax,
    check_mask,
    check_positive,
    check_same_nside,
    nside_from_npix,
    renamed_keywords,
)
from cmbtools._version import __version__
from cmbtools.exceptions import CmbtoolsWarning, InvalidInputError
from cmbtools.spectrum import coupling as _coupling
from cmbtools.spectrum.binning import Binning

__all__ = ["EstimatorSettings", "resolve_settings", "bandpower_record", "MAX_CONDITION_NUMBER"]

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




def _beam_array(beam, lmax, name, short_ok=False):
    """B_l for ell = 0..lmax from None, a FWHM in arcmin or an array; and a description."""
    from cmbtools.spectrum.beams import gaussian_beam

    from cmbtools.spectrum.beams import GaussianBeam

    if beam is None:
        return np.ones(lmax + 1), "none"
    if isinstance(beam, GaussianBeam):
        beam = beam.fwhm_arcmin
    if np.ndim(beam) == 0:
        fwhm = check_positive(beam, f"{name} (FWHM in arcmin)", allow_zero=True)
        return gaussian_beam(fwhm, lmax), f"gaussian fwhm_arcmin={fwhm:g}"
    b = check_cl(beam, name, lmax=None if short_ok else lmax, allow_negative=True)[: lmax + 1].copy()
    if short_ok:
        return b, ""
    if abs(b[0] - 1.0) > 1e-3:
        warnings.warn(
            f"The {name!r} has B_0 = {b[0]:.6g}, not 1; it is used as given (not renormalised).",
            CmbtoolsWarning,
            stacklevel=4,
        )
    return b, f"table sha256={_io.sha256_arrays(b)[:16]}"


def _window_array(pixel_window, nside, lmax, nthreads):
    if pixel_window is True:
        from cmbtools.spectrum.pixel_windows import pixel_window as _pw

        return np.asarray(_pw(nside, lmax, nthreads=nthreads), dtype=np.float64)[: lmax + 1].copy(), f"healpix nside={nside}"
    if pixel_window is False or pixel_window is None:
        return np.ones(lmax + 1), "none"
    w = check_cl(pixel_window, "pixel_window", lmax=lmax, allow_negative=True)[: lmax + 1].copy()
    return w, f"table sha256={_io.sha256_arrays(w)[:16]}"


def _transfer_array(transfer, lmax, name):
    if transfer is None:
        return np.ones(lmax + 1), "none"
    if hasattr(transfer, "apply") and hasattr(transfer, "ell_min"):  # a BandpowerTransfer: per bin, not per l
        raise InvalidInputError(
            f"The {name!r} parameter is a per-multipole T_l; a per-bin transfer (BandpowerTransfer) corrects "
            "the bandpowers instead: transfer.apply(estimator.estimate(map))."
        )
    t = check_cl(transfer, name, lmax=lmax)[: lmax + 1].copy()
    return t, f"table sha256={_io.sha256_arrays(t)[:16]}"


@dataclasses.dataclass(frozen=True, eq=False)
class EstimatorSettings:
    """Everything a :class:`~cmbtools.spectrum.SpectrumEstimator` is built from, checked and normalised once.

    Frozen; built by :func:`resolve_settings` (which holds the one signature of the
    estimator's settings) or read back by :mod:`cmbtools.spectrum.storage`.
    :attr:`cache_key` identifies the inputs (the hash an estimator cache is checked against).
    """

    mask1: np.ndarray
    mask2: np.ndarray | None
    binning: Binning
    nside: int
    lmax: int
    beam1: np.ndarray
    beam2: np.ndarray
    pixel_window: np.ndarray
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
    templates: tuple = ()
    guess_cl: np.ndarray | None = None
    sky_lmax: int | None = None
    correct_deprojection_bias: bool = True
    averaged_pixels: bool = False  # maps averaged into pixels: the pixel shapes' bias is corrected
    sky_factors: tuple | None = None  # (F1, F2, F12) from ell 0 to sky_lmax: the corrections' spectra on the grid

    @property
    def deprojects(self) -> bool:
        """Whether maps go through a template deprojection (monopole/dipole and/or user templates)."""
        return bool(self.remove_monopole_dipole or self.templates)

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
            self.pixel_window,
            self.transfer1,
            self.transfer2,
            bool(self.remove_monopole_dipole),
            self.coupling,
            None if self.fast is None else tuple(int(v) for v in self.fast),
            int(self.n_iter),
            bool(self.covariance),
            float(self.max_condition_number),
            *self.templates,
            self.guess_cl,
            self.sky_lmax,
            bool(self.correct_deprojection_bias),
            *(("averaged_pixels",) if self.averaged_pixels else ()),
        )


def default_averaged_pixels(nside, pixel_window=True) -> bool:
    """Whether ``averaged_pixels=None`` means averaged maps: whenever the HEALPix pixel window is divided out
    (at every nside; the correction's pair sums cost about the same at every nside and run on a thread beside
    the coupling kernel, DEVELOPERS.md "pixel averages")."""
    return pixel_window is True


@renamed_keywords(fast_l_exact="fast_exact_below", fast_l_toeplitz="fast_banded_below",
                  fast_band="fast_band_half_width")
def resolve_settings(
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
    fast_exact_below=None,
    fast_banded_below=None,
    fast_band_half_width=None,
    n_iter=0,
    nthreads=None,
    covariance=False,
    max_condition_number=MAX_CONDITION_NUMBER,
    templates=None,
    guess_cl=None,
    sky_lmax=None,
    correct_deprojection_bias=True,
    averaged_pixels=None,
) -> EstimatorSettings:
    """Check and normalise the settings of a spectrum estimator (see :class:`~cmbtools.spectrum.SpectrumEstimator`)."""
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
    explicit = fast_exact_below is not None or fast_banded_below is not None or fast_band_half_width is not None
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
        l_exact = d_exact if fast_exact_below is None else check_int(fast_exact_below, "fast_exact_below", minimum=0, maximum=lmax)
        l_toep = (
            max(d_toep, l_exact)
            if fast_banded_below is None
            else check_int(fast_banded_below, "fast_banded_below", minimum=l_exact, maximum=lmax)
        )
        band = d_band if fast_band_half_width is None else check_int(fast_band_half_width, "fast_band_half_width", minimum=1)
        fast = (l_exact, l_toep, band)
    elif fast_exact_below is not None or fast_banded_below is not None or fast_band_half_width is not None:
        raise InvalidInputError(
            "The 'fast_exact_below', 'fast_banded_below' and 'fast_band_half_width' parameters only apply with coupling='fast'."
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
    if averaged_pixels is None:  # the default: maps averaged into pixels, where the correction is cheap
        averaged_pixels = default_averaged_pixels(nside, pixel_window)
    if not isinstance(averaged_pixels, (bool, np.bool_)):
        raise InvalidInputError(
            f"The 'averaged_pixels' parameter must be True, False or None (the default). Got {averaged_pixels!r} instead."
        )
    if averaged_pixels and pixel_window is not True:
        raise InvalidInputError(
            "The 'averaged_pixels' parameter needs the HEALPix pixel window (pixel_window=True): it corrects what "
            "that window leaves out of maps averaged into pixels."
        )
    temps, guess, sky_lmax, factors = _resolve_corrections(
        w1, w2, binning, nside, lmax, templates, guess_cl, sky_lmax, correct_deprojection_bias,
        remove_monopole_dipole, (beam, beam2, pixel_window, t1, t2), nthreads, bool(averaged_pixels),
    )
    descriptions = {
        "beam": d_b1,
        "beam2": d_b2,
        "pixel_window": d_pw,
        "transfer": d_t1,
        "transfer2": d_t2,
        "templates": str(len(temps)),
        "guess_cl": "none" if guess is None else (
            _fiducial_label() if guess_cl is None else f"table sha256={_io.sha256_arrays(guess)[:16]}"
        ),
    }
    return EstimatorSettings(
        mask1=w1,
        mask2=w2,
        binning=binning,
        nside=nside,
        lmax=lmax,
        beam1=b1,
        beam2=b2,
        pixel_window=pw,
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
        templates=temps,
        guess_cl=guess,
        sky_lmax=sky_lmax,
        correct_deprojection_bias=bool(correct_deprojection_bias),
        averaged_pixels=bool(averaged_pixels),
        sky_factors=factors,
    )


def _padded(a, n):
    out = np.zeros(n)
    k = min(n, a.size)
    out[:k] = a[:k]
    return out


def _fiducial_label() -> str:
    from cmbtools.simulate.theory_spectrum import FIDUCIAL_LABEL

    return FIDUCIAL_LABEL


def _resolve_corrections(w1, w2, binning, nside, lmax, templates, guess_cl, sky_lmax, correct, remove_md, raw,
                         nthreads, averaged=False):
    """Templates, guess spectrum, sky band limit and the spectra on the grid that the corrections need."""
    if templates is None:
        temps = ()
    else:
        if isinstance(templates, np.ndarray) and templates.ndim == 1:
            raise InvalidInputError("The 'templates' parameter must be a list of maps, not a single map.")
        temps = []
        for i, t in enumerate(templates):
            try:
                a = np.array(t, dtype=np.float64)
            except (TypeError, ValueError):
                raise InvalidInputError(f"The 'templates[{i}]' must be a map (an array of numbers).") from None
            if a.shape != w1.shape:
                raise InvalidInputError(
                    f"The 'templates[{i}]' has shape {a.shape} but the mask has {w1.shape}; give every template "
                    f"at the mask's nside ({nside}), RING ordering."
                )
            inside = w1 > 0 if w2 is None else (w1 > 0) | (w2 > 0)
            if not np.all(np.isfinite(a[inside])):
                raise InvalidInputError(f"The 'templates[{i}]' has missing or non-finite pixels inside the mask.")
            a[~inside] = 0.0
            a.setflags(write=False)
            temps.append(a)
        temps = tuple(temps)
    if not isinstance(correct, (bool, np.bool_)):
        raise InvalidInputError(
            f"The 'correct_deprojection_bias' parameter must be True or False. Got {correct!r} instead."
        )
    if sky_lmax is None:
        sky_lmax = lmax
    else:
        sky_lmax = check_int(sky_lmax, "sky_lmax", minimum=lmax, maximum=8 * nside)
    deprojects = bool(remove_md or temps)
    needs = (deprojects and correct) or sky_lmax > binning.lmax or averaged
    if not needs:
        if guess_cl is not None:
            check_cl(guess_cl, "guess_cl")
        return temps, None, sky_lmax, None
    if guess_cl is None:
        from cmbtools.simulate.theory_spectrum import fiducial_cl

        guess = np.asarray(fiducial_cl(sky_lmax), dtype=np.float64)
    else:
        guess = check_cl(guess_cl, "guess_cl", lmax=sky_lmax)[: sky_lmax + 1].copy()
    guess.setflags(write=False)
    beam, beam2, pixel_window, t1, t2 = raw
    b1 = _padded(_beam_array(beam, sky_lmax, "beam", short_ok=True)[0], sky_lmax + 1)
    b2 = b1 if beam2 is None else _padded(_beam_array(beam2, sky_lmax, "beam2", short_ok=True)[0], sky_lmax + 1)
    if pixel_window is True:
        pw = _window_array(True, nside, sky_lmax, nthreads)[0]
    elif pixel_window is False or pixel_window is None:
        pw = np.ones(sky_lmax + 1)
    else:
        pw = _padded(np.asarray(pixel_window, dtype=np.float64), sky_lmax + 1)
    tt1 = np.concatenate([t1, np.full(sky_lmax - lmax, t1[-1])])
    tt2 = np.concatenate([t2, np.full(sky_lmax - lmax, t2[-1])])
    factors = (b1**2 * pw**2 * tt1, b2**2 * pw**2 * tt2, b1 * b2 * pw**2 * np.sqrt(tt1 * tt2))
    for f in factors:
        f.setflags(write=False)
    return temps, guess, sky_lmax, factors


def bandpower_record(inp, *, cross, f_sky, f_sky_eff, condition_number) -> dict:
    """The record of how bandpowers were measured (the metadata of :class:`~cmbtools.spectrum.Bandpowers`).

    Parameters
    ----------
    inp : EstimatorSettings
        The estimator's settings.
    cross : bool
        A cross-spectrum (else an auto-spectrum).
    f_sky, f_sky_eff : float
        Sky fraction of the mask and the effective one of the spectrum.
    condition_number : float
        Condition number of the binned coupling matrix.

    Returns
    -------
    dict
        Key to str or number, in the order the table headers show them.
    """
    b = inp.binning
    meta = {
        "software": f"cmbtools {__version__}",
        "spectrum": "cross" if cross else "auto",
        "nside": inp.nside,
        "lmax": inp.lmax,
        "mask_sha256": inp.mask1_sha256,
        "f_sky": round(f_sky, 6),
        "f_sky_eff": round(f_sky_eff, 6),
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
    meta["templates_removed"] = int(inp.descriptions.get("templates", "0"))
    if inp.deprojects:
        meta["deprojection_bias"] = (
            "corrected (Elsner, Leistedt & Peiris 2016) with the guess spectrum" if inp.correct_deprojection_bias
            else "not corrected"
        )
    meta["sky_lmax"] = inp.sky_lmax
    if inp.averaged_pixels:
        meta["pixels"] = "averaged: the pixel shapes' bias corrected with the guess spectrum"
    elif inp.descriptions["pixel_window"].startswith("healpix"):
        meta["pixels"] = "sampled at the pixel centres: pixel window only"
    meta["guess_spectrum"] = inp.descriptions.get("guess_cl", "none")
    if inp.fast is not None:
        meta["coupling"] = "fast l_exact={} l_toeplitz={} band={}".format(*inp.fast)
    elif inp.coupling == "fast":
        meta["coupling"] = "fast (exact matrix: lmax above 2 nside)"
    else:
        meta["coupling"] = inp.coupling
    meta["n_iter"] = inp.n_iter
    meta["condition_number"] = float(f"{condition_number:.6g}")
    meta["errors"] = "Knox formula with f_sky_eff = w2^2/w4"
    meta["noise_bias_subtracted"] = "no"
    meta["estimator_key"] = inp.cache_key
    return meta
