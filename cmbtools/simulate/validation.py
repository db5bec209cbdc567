"""The Monte Carlo validation of the spectrum estimator: simulate skies, measure them, compare bin by bin.

:func:`validate_estimator` runs :func:`cmbtools.simulate.engine.run_simulations`
with :func:`_simulate_and_estimate` (one sky, its noise, the estimator applied)
and summarises the runs in a :class:`~cmbtools.simulate.ValidationResult`;
:func:`validate_pipeline` also builds the estimator.
"""

from __future__ import annotations

import copy
import dataclasses
import math

import numpy as np

from cmbtools._core.checks import check_int
from cmbtools.exceptions import InvalidInputError
from cmbtools.simulate.engine import MAX_SIMULATIONS, run_simulations
from cmbtools.simulate.run_directory import _function_name
from cmbtools.simulate.validation_result import ValidationResult

__all__ = ["validate_estimator", "validate_pipeline"]

@dataclasses.dataclass(frozen=True, eq=False)
class _ValidationSetup:
    """Everything a validation simulation needs (sent to each worker once)."""

    estimator: object
    cl: np.ndarray
    sky_beam: np.ndarray
    noise: object
    noise_cl: np.ndarray | None
    monopole: float
    dipole: object
    sky_filter: object
    record_pseudo: bool
    cross: bool = False
    sky_beam2: np.ndarray | None = None
    sky_lmax: int | None = None  # band limit of the skies when above the estimator's lmax (sky_beam goes there)
    pixelise: bool = False  # average the sky over each pixel (sky_beam then carries no pixel window)
    dipole_factor: float = 1.0  # a harmonic filter's f_1 (f_l is folded into sky_beam, f_0 into monopole)


def _validation_memory(estimator, noise, with_dipole, with_filter) -> int:
    """Peak bytes of one :func:`_simulate_and_estimate` (the phases run one after the other; the largest wins).

    The optional pseudo-spectrum is one more measurement of the same size.
    """
    from cmbtools._core.memory import estimate_alm_bytes, estimate_map_bytes, estimate_sky_bytes
    from cmbtools.simulate.noise import _noise_bytes

    nside, lmax = int(estimator.nside), int(estimator.lmax)
    one = estimate_map_bytes(nside)
    alm = estimate_alm_bytes(lmax)
    # a measurement: the filled and the masked copies of the map, the coefficients and the larger of
    # the transform's ring buffer and the temporaries of the spectrum
    measure = 3 * one + alm + max(16 * (4 * nside - 1) * (lmax + 1), 3 * alm)
    phases = [estimate_sky_bytes(nside, lmax, with_dipole), one + measure]
    if estimator.remove_monopole_dipole:  # the four sets of coefficients of the removal in harmonic space, kept
        phases = [p + 4 * alm for p in phases]
    if with_filter:  # the sky, the filtered sky and its float64 copy
        phases.append(3 * one)
    if noise is not None:  # the sky while its noise is drawn; then the sky, the noise and their sum
        phases += [one + _noise_bytes(noise, nside, lmax), 3 * one]
    return max(phases)


def _simulate_and_estimate(index, rng, setup):
    """One validation simulation: sky (+ filter) (+ noise) -> bandpowers."""
    from cmbtools.simulate.noise import _noise_map
    from cmbtools.simulate.skies import _dipole_vector

    # the memory of the whole run was checked once by validate_estimator: the private builders check nothing
    est = setup.estimator
    # many maps go through this estimator: it removes their monopole and dipole in harmonic space
    est._keep_removal_coefficients()
    # pixels on rings the mask does not touch never reach the bandpowers: they are not simulated (the
    # pixels that are have their full-sky values); a sky filter sees the whole sky
    rings = est._occupied_rings() if setup.sky_filter is None else None
    dip = None if setup.dipole is None else _dipole_vector(setup.dipole) * setup.dipole_factor
    rng_sky2 = copy.deepcopy(rng) if setup.cross and setup.sky_beam2 is not None else None
    sky = _draw_sky(setup, rng, setup.sky_beam, dip, rings)
    if setup.cross:
        return _simulate_and_estimate_cross(sky, rng, rng_sky2, dip, setup, rings)
    if setup.sky_filter is not None:
        filtered = np.asarray(setup.sky_filter(sky), dtype=np.float64)
        if filtered.shape != sky.shape:
            raise InvalidInputError(
                f"The 'sky_filter' must return a map of shape {sky.shape}. Got shape {filtered.shape} instead."
            )
        sky = filtered
    out = {}
    if setup.record_pseudo:
        out["pseudo_cl"] = est.pseudo_spectrum(sky)
    if setup.noise is not None:
        noise = _noise_map(setup.noise, est.nside, 3 * est.nside - 1, rng, None, rings=rings)
        if setup.sky_filter is None:
            sky += noise  # our own map
        else:
            sky = sky + noise
    bp = est.estimate(sky, noise_cl=setup.noise_cl)
    out["cl"] = bp.cl
    out["cl_err"] = bp.cl_err
    return out


def _draw_sky(setup, rng, amplitude, dip, rings):
    """One sky map to ``setup.sky_lmax`` through ``amplitude`` (averaged over each pixel with ``setup.pixelise``)."""
    from cmbtools.simulate.skies import _beam_factor, _gaussian_sky

    est = setup.estimator
    sky_lmax = est.lmax if setup.sky_lmax is None else setup.sky_lmax
    if not setup.pixelise:
        return _gaussian_sky(setup.cl, est.nside, sky_lmax, _beam_factor(amplitude, sky_lmax), False,
                             float(setup.monopole), dip, rng, None, rings=rings)
    from cmbtools.simulate.pixel_averaging import pixel_averaged_map
    from cmbtools.simulate.skies import _dipole_map, _gaussian_alm

    # the beam-convolved sky averaged over each pixel (a quadrature of every pixel's area): what a
    # detector's map holds
    alm = _gaussian_alm(setup.cl[: sky_lmax + 1], sky_lmax, rng, None, amplitude)
    sky = pixel_averaged_map(alm, est.nside, sky_lmax, rings=rings)
    del alm
    if setup.monopole:
        sky += float(setup.monopole)
    if dip is not None:
        sky += _dipole_map(est.nside, dip)
    return sky


def _simulate_and_estimate_cross(sky, rng, rng_sky2, dip, setup, rings):
    """The cross-spectrum of two splits: one sky (seen through each split's beam), independent noise in each.

    The second split's sky repeats the first one's draws (a copy of the generator taken before them) with its
    own beam; then the noise of split 1 and that of split 2 are drawn one after the other.
    """
    from cmbtools.simulate.noise import _noise_map

    est = setup.estimator
    sky2 = sky
    if rng_sky2 is not None:
        sky2 = _draw_sky(setup, rng_sky2, setup.sky_beam2, dip, rings)
    out = {}
    if setup.record_pseudo:
        out["pseudo_cl"] = est.pseudo_spectrum(sky, sky2)
    if setup.noise is not None:
        sky = sky + _noise_map(setup.noise, est.nside, 3 * est.nside - 1, rng, None, rings=rings)
        sky2 = sky2 + _noise_map(setup.noise, est.nside, 3 * est.nside - 1, rng, None, rings=rings)
    bp = est.estimate(sky, sky2)
    out["cl"] = bp.cl
    out["cl_err"] = bp.cl_err
    return out


def validate_estimator(
    estimator,
    cl=None,
    *,
    n_sims=100,
    seed=None,
    noise=None,
    monopole=0.0,
    dipole=None,
    sky_filter=None,
    harmonic_filter=None,
    bandpower_transfer=None,
    record_pseudo_spectra=False,
    run_dir=None,
    executor=None,
    workers=None,
    threads_per_worker=None,
    progress=None,
    restart=False,
    errors="gaussian",
    max_restarts=3,
    force=False,
    cross=False,
    sky_lmax=None,
    pixelise=False,
    sky_beam=None,
):
    """Check a spectrum estimator on simulated skies: bias, error bars and transfer per bin.

    Each simulation draws a Gaussian sky from ``cl``, convolves it with the
    estimator's own beam and pixel window, adds the optional monopole and
    dipole, applies the optional ``sky_filter``, adds noise drawn from
    ``noise``, and measures the bandpowers with ``estimator`` (subtracting the
    model noise spectrum :func:`cmbtools.simulate.noise_spectrum` under the
    estimator's mask, ``weights=estimator.mask``).  The mean
    over simulations is compared with ``estimator.expected_bandpowers(cl)``.
    Simulation ``i`` draws its sky and then its noise from
    ``simulation_rng(seed, i)``.

    Parameters
    ----------
    estimator : SpectrumEstimator or PolarizedSpectrumEstimator
        The estimator to check (auto-spectra).  Build it with ``nthreads=None``
        so that each worker uses its share of the cores.  A polarized one is
        checked by :func:`validate_polarized_estimator` (with ``cl`` its dict
        of spectra), which returns a :class:`PolarizedValidationResult`.
    cl : array_like of shape (>= lmax+1,), optional
        Input sky spectrum C_l in K^2 from ell = 0; default: the built-in
        fiducial spectrum :func:`cmbtools.simulate.fiducial_cl`.
    n_sims : int, default=100
        Number of simulations (>= 2).
    seed : int, optional
        Master seed (default: the one recorded in ``run_dir``, else fresh).
    noise : NoiseModel, optional
        Instrument noise added after the beam; its hits map (if any) must be
        positive wherever the mask is.
    monopole : float, default=0
        Constant (K) added to every simulated sky.
    dipole : array_like of shape (3,) or Dipole, optional
        Dipole added to every simulated sky (see :func:`cmbtools.simulate.gaussian_sky`).
    sky_filter : callable, optional
        ``sky_filter(map) -> map`` applied to the sky before noise is added:
        a stand-in for processing the estimator does not know about.  The
        per-bin ``transfer`` of the result then measures its effect, and
        ``record_pseudo_spectra`` lets :func:`transfer_from_pseudo_spectrum`
        measure it per multipole.  Must be picklable for process workers.
    harmonic_filter : array_like of shape (>= sky_lmax+1,), optional
        A filter in harmonic space, ``f_l`` from ell = 0 (a stand-in for the
        time-stream filtering of a real survey, which suppresses large scales):
        every ``a_lm`` of the sky (monopole and dipole included) is multiplied
        by ``f_l`` before noise is added, so the sky's power becomes
        ``f_l^2 C_l``.  Folded into the synthesis: it costs nothing.  The
        per-bin ``transfer`` of the result measures its effect;
        :meth:`cmbtools.spectrum.BandpowerTransfer.from_validation` turns it
        into the correction of bandpowers measured on maps filtered alike.
    bandpower_transfer : BandpowerTransfer, optional
        A per-bin transfer function (with the estimator's bins) divided out
        of every simulation's bandpowers and error bars, as
        ``cmbtools spectrum --transfer`` does: checks the corrected pipeline
        (use another ``seed`` than the run that measured it).  The result's
        ``transfer`` is then what is left after the correction (1 when it is
        right); the simulation records on disk keep the measured bandpowers.
    record_pseudo_spectra : bool, default=False
        Also record the pseudo-spectrum of each masked sky before noise (one
        more transform per simulation); the result's ``mean_pseudo_cl``.
    run_dir, executor, workers, threads_per_worker, progress, restart, max_restarts
        As in :func:`run_simulations`.
    errors : {'gaussian', 'knox'}, default='gaussian'
        The error bars the scatter is compared with (``analytic_error`` of the
        result): the diagonal of :class:`cmbtools.spectrum.GaussianCovariance`
        of the input spectrum, with the noise's variance map (the error model a
        likelihood would use), or the Knox errors each simulation reports.
    force : bool, default=False
        Run even when the memory estimate (one simulated sky, its noise and
        its measurement per worker, times the workers that run at once)
        exceeds what the machine has available: warn instead of raising
        :class:`~cmbtools.exceptions.MemoryLimitError`.
    cross : bool, default=False
        Check the cross-spectrum instead: each simulation makes two splits
        of the same sky (each seen through its beam, ``beam`` and ``beam2``
        of the estimator) with independent noise drawn from ``noise``, and
        measures ``estimator.estimate(split1, split2)`` (masks ``mask`` and
        ``mask2``), with no noise bias to subtract; the expectation is
        ``estimator.expected_bandpowers(cl, cross=True)`` (the bin averages of
        ``cl`` with ``sky_lmax`` or ``pixelise``, which apply to both splits).
    sky_lmax : int, optional
        Band limit of the simulated skies (default: the band limit the
        estimator models, its ``sky_lmax``: 4 nside - 1 for the estimators of
        ``cmbtools spectrum`` and ``validate``; the estimator's lmax if it
        models no power above it).
        Real skies have power above the analysis lmax: give ``4 * nside - 1``
        (at most ``4 nside - 1``, or ``8 nside - 1`` with ``pixelise``) to
        check that the estimator models its leakage; the estimator must then
        have been built with ``sky_lmax`` at least as large (its beam and
        pixel window are taken from there).  The mean is then compared with
        the bin averages of ``cl`` (``binning.bin_spectrum``).
    pixelise : bool, default=False
        Average every beam-convolved sky over the area of each pixel (a
        16-node Gauss-Legendre rule per pixel,
        :func:`cmbtools.simulate.pixel_averaging.pixel_averaged_map`), as a
        detector's map is made, instead of sampling the pixel centres with the
        pixel window applied.  Needs an estimator that deconvolves the HEALPix
        pixel window; the mean is compared with the bin averages of ``cl``.
        The estimator is used as given: build it with ``averaged_pixels=True``
        for pixelised skies and ``averaged_pixels=False`` for pixel-centre ones
        (its default, at every nside, is the former; ``cmbtools validate``
        chooses the matching one itself).
    sky_beam : float, array_like or (array_like, array_like), optional
        Polarized estimator only: the beam of the skies to ``sky_lmax`` (see
        :func:`validate_polarized_estimator`, which also takes
        ``harmonic_filter`` as a (f_T, f_P) pair and a
        ``PolarizedBandpowerTransfer`` as ``bandpower_transfer``).

    Returns
    -------
    ValidationResult or PolarizedValidationResult

    See Also
    --------
    validate_pipeline : builds the estimator from a mask and bins, then calls this.
    run_simulations : the engine, for any per-simulation function.
    """
    from cmbtools.simulate.noise import NoiseModel, noise_spectrum
    from cmbtools._core.checks import check_cl
    from cmbtools.spectrum.polarization import PolarizedSpectrumEstimator

    if isinstance(estimator, PolarizedSpectrumEstimator):
        from cmbtools.simulate.polarized_validation import validate_polarized_estimator

        if sky_filter is not None or record_pseudo_spectra or errors != "gaussian":
            raise InvalidInputError(
                "The 'sky_filter', 'record_pseudo_spectra' and 'errors' parameters are not available for a "
                "polarized estimator (its reported errors are compared with the scatter)."
            )
        return validate_polarized_estimator(
            estimator, cl, n_sims=n_sims, seed=seed, noise=noise, monopole=monopole, dipole=dipole, run_dir=run_dir,
            executor=executor, workers=workers, threads_per_worker=threads_per_worker, progress=progress,
            restart=restart, max_restarts=max_restarts, force=force, cross=cross, sky_lmax=sky_lmax,
            pixelise=pixelise, sky_beam=sky_beam, harmonic_filter=harmonic_filter,
            bandpower_transfer=bandpower_transfer,
        )
    if sky_beam is not None:
        raise InvalidInputError("The 'sky_beam' parameter applies to a polarized estimator only.")
    for attr in ("estimate", "expected_bandpowers", "pseudo_spectrum", "mask", "beam", "pixel_window", "nside", "lmax"):
        if not hasattr(estimator, attr):
            raise InvalidInputError(
                f"The 'estimator' parameter must be a cmbtools.spectrum.SpectrumEstimator. Got {type(estimator).__name__} instead."
            )
    lmax, nside = int(estimator.lmax), int(estimator.nside)
    n_sims = check_int(n_sims, "n_sims", minimum=2, maximum=MAX_SIMULATIONS)
    if not isinstance(pixelise, (bool, np.bool_)):
        raise InvalidInputError(f"The 'pixelise' parameter must be True or False. Got {pixelise!r} instead.")
    if sky_lmax is None:
        # an estimator built to model the sky's power above its lmax is checked on such skies by default
        own = getattr(getattr(estimator, "_inputs", None), "sky_lmax", None)
        if own is not None and int(own) > lmax:
            sky_lmax = min(int(own), (8 if pixelise else 4) * nside - 1)
    realistic = sky_lmax is not None or bool(pixelise)
    sky_lmax = lmax if sky_lmax is None else check_int(
        sky_lmax, "sky_lmax", minimum=lmax, maximum=(8 if pixelise else 4) * nside - 1
    )
    if cl is None:
        from cmbtools.simulate.theory_spectrum import FIDUCIAL_LABEL, fiducial_cl

        cl = fiducial_cl(sky_lmax)
        cl_source = FIDUCIAL_LABEL
    else:
        cl_source = "user spectrum"
    cl = check_cl(cl, "cl", lmax=sky_lmax)[: sky_lmax + 1].copy()
    cl.setflags(write=False)
    noise_cl = None
    if noise is not None:
        if not isinstance(noise, NoiseModel):
            raise InvalidInputError(
                f"The 'noise' parameter must be a cmbtools.simulate.NoiseModel or None. Got {type(noise).__name__} instead."
            )
        if noise.hits is not None:
            hits = np.asarray(noise.hits)
            if hits.size != estimator.mask.size:
                noise_map_nside = int(round(math.sqrt(hits.size / 12)))
                from cmbtools.exceptions import ResolutionMismatchError

                raise ResolutionMismatchError(
                    f"The noise model's hits map has nside {noise_map_nside} but the estimator's mask has nside {nside}.",
                    noise_map_nside, nside,
                )
            observed = np.asarray(estimator.mask) > 0
            if cross:
                observed |= np.asarray(getattr(estimator, "mask2", estimator.mask)) > 0
            uncovered = int(np.count_nonzero(observed & ~(hits > 0)))
            if uncovered:
                raise InvalidInputError(
                    f"The mask is non-zero in {uncovered} pixels that the noise model's hits map does not cover "
                    "(hits <= 0); zero the mask there (e.g. multiply it by hits > 0) and build the estimator again."
                )
        noise_cl = noise_spectrum(noise, lmax, nside, weights=estimator.mask)  # the noise bias under this mask
    if errors not in ("gaussian", "knox"):
        raise InvalidInputError(f"The 'errors' parameter must be 'gaussian' or 'knox'. Got {errors!r} instead.")
    filter_text = "none"
    if harmonic_filter is not None:
        band = sky_lmax
        harmonic_filter = check_cl(harmonic_filter, "harmonic_filter", lmax=band, allow_negative=True)[: band + 1]
        from cmbtools._core.files import sha256_arrays

        filter_text = (f"f_l table sha256={sha256_arrays(harmonic_filter)[:16]} (f_l from "
                       f"{float(np.min(harmonic_filter)):.4g} to {float(np.max(harmonic_filter)):.4g})")
    if bandpower_transfer is not None:
        from cmbtools.spectrum.transfer import BandpowerTransfer

        if not isinstance(bandpower_transfer, BandpowerTransfer):
            raise InvalidInputError("The 'bandpower_transfer' parameter must be a cmbtools.spectrum.BandpowerTransfer "
                                    f"or None. Got {type(bandpower_transfer).__name__} instead.")
        bandpower_transfer.check_bins(estimator.binning, "the estimator")
    if sky_filter is not None and not callable(sky_filter):
        raise InvalidInputError(f"The 'sky_filter' parameter must be a callable or None. Got {sky_filter!r} instead.")
    if not isinstance(cross, (bool, np.bool_)):
        raise InvalidInputError(f"The 'cross' parameter must be True or False. Got {cross!r} instead.")
    window = np.asarray(estimator.pixel_window, dtype=np.float64)[: lmax + 1]
    sky_beam = np.asarray(estimator.beam, dtype=np.float64)[: lmax + 1] * window
    sky_beam2 = None
    if cross:
        if sky_filter is not None:
            raise InvalidInputError("The 'sky_filter' parameter is not available with cross=True.")
        b2 = np.asarray(getattr(estimator, "beam2", estimator.beam), dtype=np.float64)[: lmax + 1] * window
        sky_beam2 = None if np.array_equal(b2, sky_beam) else b2
        noise_cl = None  # the noises of the two splits are independent: no bias
    if realistic:
        sky_beam = _sky_amplitude(estimator, sky_lmax, bool(pixelise))
        if cross:
            b2 = _sky_amplitude(estimator, sky_lmax, bool(pixelise), second=True)
            sky_beam2 = None if np.array_equal(b2, sky_beam) else b2
    dipole_factor, sky_monopole = 1.0, float(monopole)
    if harmonic_filter is not None:  # the filter multiplies every a_lm: the synthesis amplitude, monopole, dipole
        sky_beam = sky_beam * harmonic_filter[: sky_beam.size]
        if sky_beam2 is not None:
            sky_beam2 = sky_beam2 * harmonic_filter[: sky_beam2.size]
        sky_monopole = float(monopole) * float(harmonic_filter[0])
        dipole_factor = float(harmonic_filter[1]) if harmonic_filter.size > 1 else 0.0
    setup = _ValidationSetup(
        estimator=estimator, cl=cl, sky_beam=sky_beam, noise=noise, noise_cl=noise_cl,
        monopole=sky_monopole, dipole=None if dipole is None else dipole, sky_filter=sky_filter,
        record_pseudo=bool(record_pseudo_spectra), cross=bool(cross), sky_beam2=sky_beam2,
        sky_lmax=sky_lmax if realistic else None, pixelise=bool(pixelise), dipole_factor=dipole_factor,
    )
    sims = run_simulations(
        _simulate_and_estimate, n_sims, seed=seed, context=setup, run_dir=run_dir, executor=executor,
        workers=workers, threads_per_worker=threads_per_worker, progress=progress, restart=restart,
        max_restarts=max_restarts, description="validation",
        memory_per_simulation=_validation_memory(estimator, noise, dipole is not None, sky_filter is not None)
        * (2 if cross else 1) + (_averaging_memory(nside, sky_lmax, estimator) if pixelise else 0),
        force=force,
    )
    binning = estimator.binning
    metadata = {
        "nside": nside,
        "lmax": lmax,
        "n_bins": int(binning.n_bins),
        "f_sky": float(estimator.f_sky) if hasattr(estimator, "f_sky") else "",
        "f_sky_eff": float(estimator.f_sky_eff_cross if cross else estimator.f_sky_eff)
        if hasattr(estimator, "f_sky_eff") else "",
        "spectrum_kind": "cross" if cross else "auto",
        "input_spectrum": cl_source,
        "noise": "none" if noise is None else repr(noise),
        "monopole_K": float(monopole),
        "dipole": "none" if dipole is None else repr(dipole),
        "sky_filter": "none" if sky_filter is None else _function_name(sky_filter),
        "harmonic_filter": filter_text,
        "sky_lmax": int(sky_lmax),
        "pixelised": "yes (averaged over each pixel's area)" if pixelise else "no",
        "estimator_key": getattr(estimator, "cache_key", ""),
        "n_resumed": sims.n_resumed,
        "run_dir": "" if sims.run_dir is None else str(sims.run_dir),
    }
    reported = sims["cl_err"]
    if errors == "gaussian":
        from cmbtools.spectrum.covariance import GaussianCovariance
        from cmbtools.spectrum.pixel_noise import PixelNoise

        pixel_noise = None if noise is None else PixelNoise.from_model(noise, nside, lmax)
        gauss = GaussianCovariance(estimator, noise=pixel_noise, noise2=pixel_noise if cross else None,
                                   cross=bool(cross))
        signal = cl[: lmax + 1] if harmonic_filter is None else cl[: lmax + 1] * harmonic_filter[: lmax + 1] ** 2
        reported = np.tile(gauss.covariance(signal).errors, (sims["cl"].shape[0], 1))
    samples = sims["cl"]
    if bandpower_transfer is not None:
        samples = samples / bandpower_transfer.transfer
        reported = reported / bandpower_transfer.transfer
        metadata.update(bandpower_transfer.record())
    metadata["error_model"] = ("Knox formula" if errors != "gaussian" else "Gaussian covariance of the input spectrum"
                               + ("" if harmonic_filter is None else " times the filter's f_l^2"))
    return ValidationResult.from_samples(
        samples, reported,
        binning.bin_spectrum(cl) if realistic else estimator.expected_bandpowers(cl[: lmax + 1], cross=bool(cross)),
        ell_min=binning.ell_min, ell_max=binning.ell_max, ell_eff=binning.ell_eff, dl_factor=binning.dl_factor,
        seed=sims.seed, mean_pseudo_cl=sims["pseudo_cl"].mean(axis=0) if record_pseudo_spectra else None,
        metadata=metadata,
    )


def _averaging_memory(nside, sky_lmax, estimator) -> int:
    """Bytes of the pixel averaging: its rule (kept by the worker) and the values at its nodes, with margin."""
    from cmbtools.simulate.pixel_averaging import averaging_order

    rings = estimator._occupied_rings() if hasattr(estimator, "_occupied_rings") else None
    share = 1.0 if rings is None else float(np.mean(rings))
    nodes = 12 * nside * nside * share * averaging_order(nside, sky_lmax) ** 2
    return int(nodes * (8 * 2 + 8 + 8 + 8 + 8)) + 4 * 12 * nside * nside * 8


def _sky_amplitude(estimator, sky_lmax, pixelise, second=False):
    """``B_l`` times the pixel window of the simulated skies up to ``sky_lmax`` (``B_l`` alone with ``pixelise``).

    ``second``: the second map's (``beam2``) of a cross-spectrum estimator.
    """
    inp = getattr(estimator, "_inputs", None)
    factors = None if inp is None else inp.sky_factors
    which = 1 if second else 0
    lmax, nside = int(estimator.lmax), int(estimator.nside)
    if sky_lmax > lmax and (factors is None or inp.sky_lmax < sky_lmax):
        have = lmax if factors is None else inp.sky_lmax
        raise InvalidInputError(
            f"The skies go to sky_lmax={sky_lmax} but the estimator models the sky only to ell={have}; build it "
            f"with sky_lmax={sky_lmax} (it then models the power above its bins)."
        )
    if factors is not None and inp.sky_lmax >= sky_lmax:
        amp = np.sqrt(np.clip(factors[which][: sky_lmax + 1], 0.0, None))
    else:
        beam = getattr(estimator, "beam2", None) if second else None
        amp = np.asarray(estimator.beam if beam is None else beam, dtype=np.float64)[: lmax + 1] * np.asarray(
            estimator.pixel_window, dtype=np.float64)[: lmax + 1]
    if pixelise:
        from cmbtools.spectrum.pixel_windows import pixel_window

        own = np.asarray(pixel_window(nside, sky_lmax), dtype=np.float64)
        window = np.asarray(estimator.pixel_window, dtype=np.float64)[: lmax + 1]
        if not np.allclose(window, own[: lmax + 1], rtol=1e-12, atol=0):
            raise InvalidInputError(
                "The 'pixelise' parameter needs an estimator that deconvolves the HEALPix pixel window of its nside."
            )
        amp = amp / own[: amp.size]  # the averaging over each pixel applies the pixel's own response
    return np.ascontiguousarray(amp)


def validate_pipeline(mask, binning, cl=None, *, beam=None, noise=None, pixel_window=True, n_sims=100, seed=None,
                      estimator_options=None, force=False, **run_options) -> ValidationResult:
    """Build a spectrum estimator and check it on simulated skies, in one call.

    Equivalent to ``validate_estimator(SpectrumEstimator(mask, binning,
    beam=beam, pixel_window=pixel_window, **estimator_options), cl,
    noise=noise, n_sims=n_sims, seed=seed, **run_options)``, except that the
    estimator's pixel model follows the simulated skies unless
    ``estimator_options`` names one: ``averaged_pixels`` is the run's
    ``pixelise`` (maps averaged into pixels, or sampled at the pixel
    centres), as ``cmbtools validate`` does.

    Parameters
    ----------
    mask : ndarray of shape (12*nside**2,)
        Weights in [0, 1], RING.
    binning : Binning
        Bins of the bandpowers.
    cl : array_like, optional
        Input sky spectrum (K^2); default: the built-in fiducial spectrum.
    beam : None, float or ndarray, optional
        Beam (Gaussian FWHM in arcmin, or a table B_l) of both the simulated
        skies and the estimator.
    noise : NoiseModel, optional
        Instrument noise added to the simulated skies (default: none).
    pixel_window : bool, default=True
        Include the HEALPix pixel window, in the estimator and (with the
        beam) in the simulated skies.
    n_sims : int, default=100
        Number of simulations (>= 2).
    seed : int, optional
        Master seed of the simulations.
    estimator_options : dict, optional
        More keyword arguments of :class:`~cmbtools.spectrum.SpectrumEstimator`
        (``lmax``, ``coupling``, ``remove_monopole_dipole``, ...).
    force : bool, default=False
        Go ahead even when the memory estimate of the estimator or of the
        simulations exceeds what the machine has available (both steps).
    **run_options
        Keyword arguments of :func:`validate_estimator` (``run_dir``,
        ``executor``, ``workers``, ``progress``, ``monopole``, ...).

    Returns
    -------
    ValidationResult
    """
    from cmbtools.spectrum.estimator import SpectrumEstimator

    options = dict(estimator_options or {})
    options.setdefault("force", force)
    if pixel_window is True:  # the model of the skies simulated below (pixel-centre unless pixelise)
        options.setdefault("averaged_pixels", bool(run_options.get("pixelise", False)))
    est = SpectrumEstimator(mask, binning, beam=beam, pixel_window=pixel_window, **options)
    return validate_estimator(est, cl, noise=noise, n_sims=n_sims, seed=seed, force=force, **run_options)
