"""The Monte Carlo validation of the polarized spectrum estimator: IQU skies measured, compared per spectrum and bin.

:func:`validate_polarized_estimator` runs :func:`cmbtools.simulate.engine.run_simulations` with
:func:`_simulate_and_estimate_iqu` (one correlated Gaussian I, Q, U sky, its noise, the estimator applied) and
summarises the runs in a :class:`~cmbtools.simulate.PolarizedValidationResult` (one
:class:`~cmbtools.simulate.ValidationResult` per spectrum).  :func:`validate_estimator` hands a
:class:`~cmbtools.spectrum.PolarizedSpectrumEstimator` to it.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math

import numpy as np

from cmbtools._core.checks import UNSEEN, check_int
from cmbtools.exceptions import InvalidInputError
from cmbtools.simulate.engine import MAX_SIMULATIONS, run_simulations
from cmbtools.simulate.polarized_validation_result import PolarizedValidationResult

__all__ = ["validate_polarized_estimator"]

_SIX = ("TT", "TE", "TB", "EE", "EB", "BB")


@dataclasses.dataclass(frozen=True, eq=False)
class _PolarizedSetup:
    """Everything a polarized validation simulation needs (sent to each worker once)."""

    estimator: object
    spectra: dict  # name -> C_l (K^2) to sky_lmax
    amplitude_t: np.ndarray  # B_T times the pixel window of the synthesis grid, to sky_lmax
    amplitude_p: np.ndarray  # B_P times the polarization pixel window of the synthesis grid
    noise: object
    noise_cl: dict | None
    monopole: float
    dipole: object
    cross: bool
    sky_lmax: int
    pixelise: bool
    dipole_factor: float = 1.0  # f_1 of the harmonic filter (T's), which multiplies the dipole as every a_1m

    @property
    def cache_key(self) -> str:
        """A hash of what determines the simulations (the run directory's identity)."""
        from cmbtools._core.files import sha256_arrays

        est = self.estimator
        h = hashlib.sha256()
        parts = [
            "polarized-validation-2", est.nside, est.lmax, est.purify_b, est.remove_monopole_dipole,
            sorted(est._hashes.items()), sorted(est.descriptions.items()), sorted(est.binning.as_dict().items()),
            sorted((k, sha256_arrays(v)) for k, v in est._factors.items()),
            sorted((k, sha256_arrays(v)) for k, v in est._transfer.items()),
            sorted((k, sha256_arrays(v)) for k, v in self.spectra.items()),
            sha256_arrays(self.amplitude_t), sha256_arrays(self.amplitude_p),
            repr(self.noise), None if self.noise is None or self.noise.hits is None else sha256_arrays(self.noise.hits),
            self.monopole, repr(self.dipole), self.cross, self.sky_lmax, self.pixelise,
        ]
        if self.dipole_factor != 1.0:  # a filtered dipole (the runs without a filter keep their identity)
            parts.append(("dipole_factor", self.dipole_factor))
        h.update(repr(parts).encode())
        return h.hexdigest()


def _simulate_and_estimate_iqu(index, rng, setup):
    """One polarized validation simulation: I, Q, U sky (+ noise) -> the six bandpowers."""
    from cmbtools._core import sht
    from cmbtools.simulate.noise import _noise_map
    from cmbtools.simulate.polarized_skies import gaussian_iqu_alm
    from cmbtools.simulate.skies import _dipole_map, _dipole_vector

    est = setup.estimator
    nside, lmax = int(est.nside), int(setup.sky_lmax)
    alm = gaussian_iqu_alm(setup.spectra, lmax, rng=rng)
    sky = np.empty((3, 12 * nside * nside))
    t_alm = sht.almxfl(alm[0], setup.amplitude_t, lmax)
    e_alm, b_alm = sht.almxfl(alm[1], setup.amplitude_p, lmax), sht.almxfl(alm[2], setup.amplitude_p, lmax)
    del alm
    if setup.pixelise:
        from cmbtools.simulate.pixel_averaging import pixel_averaged_map

        # I, Q, U averaged over each pixel's area (Q, U as components in each point's own frame: the
        # definition of the polarization pixel window)
        sky[0] = pixel_averaged_map(t_alm, nside, lmax)
        sky[1:] = pixel_averaged_map(np.stack([e_alm, b_alm]), nside, lmax, spin=2)
    else:
        sky[0] = sht.alm2map(t_alm, nside, lmax)
        sky[1], sky[2] = sht.alm2map_spin2(e_alm, b_alm, nside, lmax)
    del t_alm, e_alm, b_alm
    if setup.monopole:
        sky[0] += setup.monopole
    if setup.dipole is not None:
        sky[0] += setup.dipole_factor * _dipole_map(nside, _dipole_vector(setup.dipole))

    def noisy(maps):
        if setup.noise is None:
            return maps
        out = maps.copy()
        for k in range(3):  # I, then Q, then U (Q and U sqrt(2) times noisier: the same detectors, differenced)
            n = _noise_map(setup.noise, nside, 3 * nside - 1, rng, None)
            n[n == UNSEEN] = 0.0  # unobserved pixels lie outside the mask (checked before the run)
            out[k] += n if k == 0 else math.sqrt(2.0) * n
        return out

    if setup.cross:
        bp = est.estimate(noisy(sky), noisy(sky))
    else:
        bp = est.estimate(noisy(sky), noise_cl=setup.noise_cl)
    return {"cl": np.asarray(bp.cl, dtype=np.float64), "cl_err": np.asarray(bp.cl_err, dtype=np.float64)}


def _sky_amplitudes(estimator, sky_beam, sky_lmax, pixelise):
    """B_T w_T and B_P w_P of the simulated skies to ``sky_lmax`` (B_T and B_P alone with ``pixelise``).

    Up to the estimator's lmax they must be what the estimator divides out (its beams times its pixel windows);
    without ``sky_beam`` and with ``sky_lmax == lmax`` they are exactly that.
    """
    from cmbtools.simulate.polarized_skies import _field_beams
    from cmbtools.spectrum.pixel_windows import pixel_window, polarization_pixel_window

    nside, lmax = int(estimator.nside), int(estimator.lmax)
    f_t = np.asarray(estimator._factors["t1"], dtype=np.float64)
    f_p = np.asarray(estimator._factors["p1"], dtype=np.float64)
    if sky_beam is None:
        if sky_lmax > lmax or pixelise:
            raise InvalidInputError(
                "The skies go beyond the estimator's lmax (sky_lmax) or are pixelised: give 'sky_beam' (the beam "
                "of the estimator, to sky_lmax), since the estimator holds its beam only to lmax."
            )
        return f_t.copy(), f_p.copy()
    b_t, b_p = _field_beams(sky_beam, sky_lmax, "sky_beam")
    w_t = np.asarray(pixel_window(nside, sky_lmax), dtype=np.float64)[: sky_lmax + 1]
    w_p = np.asarray(polarization_pixel_window(nside, sky_lmax), dtype=np.float64)[: sky_lmax + 1]
    window = None
    for candidate in ((w_t, w_p), (np.ones(sky_lmax + 1), np.ones(sky_lmax + 1))):
        if (np.allclose(b_t[: lmax + 1] * candidate[0][: lmax + 1], f_t, rtol=1e-9, atol=1e-300)
                and np.allclose(b_p[2: lmax + 1] * candidate[1][2: lmax + 1], f_p[2:], rtol=1e-9, atol=1e-300)):
            window = candidate
            break
    if window is None:
        raise InvalidInputError(
            "The 'sky_beam' does not match the estimator's beams (times its pixel windows) up to its lmax; give "
            "the beam the estimator was built with."
        )
    if pixelise:
        if window[0] is not w_t:
            raise InvalidInputError(
                "The 'pixelise' parameter needs an estimator that deconvolves the HEALPix pixel windows of its nside."
            )
        return b_t, b_p  # averaging over each pixel applies the pixel's own response
    return b_t * window[0], b_p * window[1]


def _filter_pair(harmonic_filter, lmax):
    """(f_T, f_P) to lmax from one f_l (I, Q, U alike) or a pair of tables (T; E and B)."""
    from cmbtools._core.checks import check_cl

    pair = harmonic_filter
    if not (isinstance(pair, (tuple, list)) and len(pair) == 2 and np.ndim(pair[0]) == 1):
        pair = (harmonic_filter, harmonic_filter)
    return tuple(check_cl(f, "harmonic_filter", lmax=lmax, allow_negative=True)[: lmax + 1].copy() for f in pair)


def _masked_noise_spectra(spectra, noise, estimator):
    """The model noise spectra at the level the masks see: exact for white noise shaped by hits.

    Pixel noise ``r_p n_p`` (``r`` the hits' relative standard deviation) seen through weights ``w`` has the
    white pseudo-spectrum ``mean(w^2 r^2) N``; the estimator's noise bias is ``mean(w^2) N'`` for a white
    ``N'``, so ``N' = N sum(w^2 r^2) / sum(w^2)`` (temperature mask for TT, polarization mask for EE, BB).
    With a knee the same factor scales the whole spectrum (a narrow-kernel approximation).
    """
    r = noise.relative_sigma
    if r is None:
        return spectra
    out = dict(spectra)
    for names, key in ((("TT",), "t1"), (("EE", "BB"), "p1")):
        w2 = np.asarray(estimator.masks[key], dtype=np.float64) ** 2
        factor = float(np.sum(w2 * r**2) / np.sum(w2))
        for name in names:
            out[name] = spectra[name] * factor
    return out


def _memory_per_simulation(estimator, sky_lmax, pixelise, noise, cross):
    """Peak bytes of one simulation: the sky's coefficients and synthesis, its maps, noise, the measurement."""
    from cmbtools._core.memory import estimate_alm_bytes, estimate_map_bytes

    nside, lmax = int(estimator.nside), int(estimator.lmax)
    sky = 6 * estimate_alm_bytes(sky_lmax) + estimate_map_bytes(nside, 4)
    if pixelise:  # the averaging rule (kept by the worker) and the values at its nodes (Q and U at once)
        from cmbtools.simulate.pixel_averaging import averaging_order

        sky += 12 * nside * nside * averaging_order(nside, sky_lmax) ** 2 * (8 * 2 + 8 + 8 + 8 * 3)
    maps = estimate_map_bytes(nside, 3 * (3 if cross else 2))
    measure = estimate_map_bytes(nside, 4) + estimate_alm_bytes(lmax, 6) + 16 * (4 * nside - 1) * (lmax + 1) * 2
    extra = estimate_map_bytes(nside, 2) if noise is not None else 0
    return max(sky, maps + measure + extra)


def validate_polarized_estimator(
    estimator,
    spectra=None,
    *,
    n_sims=100,
    seed=None,
    noise=None,
    monopole=0.0,
    dipole=None,
    run_dir=None,
    executor=None,
    workers=None,
    threads_per_worker=None,
    progress=None,
    restart=False,
    max_restarts=3,
    force=False,
    cross=False,
    sky_lmax=None,
    sky_beam=None,
    pixelise=False,
    harmonic_filter=None,
    bandpower_transfer=None,
) -> PolarizedValidationResult:
    """Check a polarized spectrum estimator on simulated I, Q, U skies: bias and error ratio per spectrum and bin.

    Each simulation draws a correlated Gaussian T, E, B sky from ``spectra``
    (:func:`~cmbtools.simulate.gaussian_iqu_alm`), applies the beams and the
    temperature and polarization pixel windows, synthesizes I, Q, U (with
    ``pixelise``: the beam-convolved sky averaged over each pixel's area instead
    of the windows), adds the
    optional monopole and dipole to I, and noise drawn from ``noise`` (I as
    :func:`~cmbtools.simulate.noise_map`, Q and U each sqrt(2) times that,
    independent: common practice for the same detectors), and measures the
    six spectra with ``estimator`` (subtracting from auto-spectra the model
    noise spectra :func:`~cmbtools.simulate.polarized_noise_spectra`, scaled
    by the mask-weighted mean of the pixel variance of a hits map: exact for
    white noise).
    The mean over simulations is compared, per spectrum and bin, with
    ``estimator.expected_bandpowers`` of the input to lmax: power above lmax
    (``sky_lmax``) and the pixelisation are not in that expectation, so the
    bias they cause shows.  Simulation ``i`` draws its sky, then the noise of
    I, Q, U (then that of the second split), from ``simulation_rng(seed, i)``.

    Parameters
    ----------
    estimator : PolarizedSpectrumEstimator
        The estimator to check.  Build it with ``nthreads=None`` so that each
        worker uses its share of the cores.
    spectra : dict, optional
        Input sky spectra C_l in K^2 from ell = 0 under the keys TT, EE, BB,
        TE (optionally TB, EB), to ``sky_lmax`` at least; default: the built-in
        :func:`~cmbtools.simulate.fiducial_spectra` with the lensing-like BB
        template.
    n_sims : int, default=100
        Number of simulations (>= 2).
    seed : int, optional
        Master seed (default: the one recorded in ``run_dir``, else fresh).
    noise : NoiseModel, optional
        The temperature noise; its hits map (if any) must be positive wherever
        a mask is non-zero.
    monopole : float, default=0
        Constant (K) added to every simulated I map.
    dipole : array_like of shape (3,) or Dipole, optional
        Dipole added to every simulated I map.
    run_dir, executor, workers, threads_per_worker, progress, restart, max_restarts
        As in :func:`~cmbtools.simulate.run_simulations`.
    force : bool, default=False
        Run even when the memory estimate exceeds what the machine has available.
    cross : bool, default=False
        Check the cross-spectra of two splits of each sky with independent
        noise (masks ``mask``/``pol_mask`` and ``mask2``/``pol_mask2`` of the
        estimator; both splits see map 1's beams); no noise bias is subtracted.
    sky_lmax : int, optional
        Band limit of the simulated skies (default: the estimator's lmax; at
        most ``4 nside - 1``, ``8 nside - 1`` with ``pixelise``).  Needs
        ``sky_beam``.
    sky_beam : float, array_like or (array_like, array_like), optional
        The beam of the skies to ``sky_lmax``: a Gaussian FWHM in arcmin (its
        spin-2 form for E and B), one table, or a (B_T, B_P) pair.  Up to the
        estimator's lmax it must equal the beams the estimator divides out.
        Needed when ``sky_lmax`` exceeds lmax or with ``pixelise``.
    pixelise : bool, default=False
        Average I, Q, U of every beam-convolved sky over the area of each
        pixel (Q, U as components in each point's own frame; a 16-node
        Gauss-Legendre rule per pixel,
        :func:`cmbtools.simulate.pixel_averaging.pixel_averaged_map`), as a
        detector's map is made.
    harmonic_filter : array_like or (array_like, array_like), optional
        A filter in harmonic space from ell = 0 to ``sky_lmax`` (a stand-in
        for the filtering of a real survey's maps): one ``f_l`` for T, E and
        B (the same filter on I and on Q, U), or a pair ``(f_T, f_P)``.
        Every ``a_lm`` of the sky (T's monopole and dipole included) is
        multiplied by it before noise is added, so the power becomes
        ``f^X_l f^Y_l C^XY_l``; folded into the synthesis amplitudes, it costs
        nothing.  The per-spectrum ``transfer`` of the result measures its
        effect; :meth:`cmbtools.spectrum.PolarizedBandpowerTransfer.from_validation`
        turns it into the correction of bandpowers of maps filtered alike.
    bandpower_transfer : PolarizedBandpowerTransfer, optional
        Per-bin transfer functions (the estimator's bins) divided out of
        every simulation's bandpowers and errors, spectrum by spectrum by
        their ``factors`` (as ``cmbtools spectrum --transfer`` does on I, Q, U
        maps): checks the corrected pipeline (use another ``seed`` than the
        run that measured them).  The result's ``transfer`` is then what is
        left (1 when the correction is right); the simulation records on disk
        keep the measured bandpowers.

    Returns
    -------
    PolarizedValidationResult
        One :class:`~cmbtools.simulate.ValidationResult` per spectrum; the
        analytic errors are the estimator's reported ``cl_err`` averaged over
        the simulations.
    """
    from cmbtools.simulate.noise import NoiseModel
    from cmbtools.simulate.polarized_skies import check_spectra, polarized_noise_spectra
    from cmbtools.spectrum.polarization import PolarizedSpectrumEstimator

    if not isinstance(estimator, PolarizedSpectrumEstimator):
        raise InvalidInputError(
            "The 'estimator' parameter must be a cmbtools.spectrum.PolarizedSpectrumEstimator. "
            f"Got {type(estimator).__name__} instead."
        )
    nside, lmax = int(estimator.nside), int(estimator.lmax)
    n_sims = check_int(n_sims, "n_sims", minimum=2, maximum=MAX_SIMULATIONS)
    for flag, name in ((pixelise, "pixelise"), (cross, "cross")):
        if not isinstance(flag, (bool, np.bool_)):
            raise InvalidInputError(f"The {name!r} parameter must be True or False. Got {flag!r} instead.")
    sky_lmax = lmax if sky_lmax is None else check_int(
        sky_lmax, "sky_lmax", minimum=lmax, maximum=(8 if pixelise else 4) * nside - 1
    )
    if spectra is None:
        from cmbtools.simulate.polarized_theory import fiducial_spectra
        from cmbtools.simulate.theory_spectrum import FIDUCIAL_MODEL

        spectra = fiducial_spectra(sky_lmax, lensing_bb=True)
        source = f"built-in fiducial spectra ({FIDUCIAL_MODEL}; r = 0, lensing-like BB)"
    else:
        source = "user spectra"
    spectra = check_spectra(spectra, sky_lmax)
    spectra = {k: np.array(v[: sky_lmax + 1], dtype=np.float64) for k, v in spectra.items()}
    amp_t, amp_p = _sky_amplitudes(estimator, sky_beam, sky_lmax, bool(pixelise))
    filter_text, dipole_factor = "none", 1.0
    if harmonic_filter is not None:  # every a_lm times f_l: the synthesis amplitudes, T's monopole and dipole
        from cmbtools._core.files import sha256_arrays

        f_t, f_p = _filter_pair(harmonic_filter, sky_lmax)
        amp_t, amp_p = amp_t * f_t, amp_p * f_p
        dipole_factor = float(f_t[1]) if sky_lmax >= 1 else 0.0
        filter_text = (f"f_l table sha256={sha256_arrays(f_t, f_p)[:16]} (T: f_l from {float(f_t.min()):.4g} to "
                       f"{float(f_t.max()):.4g}; E, B: from {float(f_p.min()):.4g} to {float(f_p.max()):.4g})")
    if bandpower_transfer is not None:
        from cmbtools.spectrum.transfer import PolarizedBandpowerTransfer

        if not isinstance(bandpower_transfer, PolarizedBandpowerTransfer):
            raise InvalidInputError(
                "The 'bandpower_transfer' parameter must be a cmbtools.spectrum.PolarizedBandpowerTransfer or None "
                f"for a polarized estimator. Got {type(bandpower_transfer).__name__} instead.")
        bandpower_transfer.check_bins(estimator.binning, "the estimator")
    try:
        monopole = float(monopole)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The 'monopole' parameter must be a number in K. Got {monopole!r} instead.") from None
    if not math.isfinite(monopole):
        raise InvalidInputError(f"The 'monopole' parameter must be finite. Got {monopole!r} instead.")
    sky_monopole = monopole if harmonic_filter is None else monopole * float(f_t[0])
    noise_cl = None
    if noise is not None:
        if not isinstance(noise, NoiseModel):
            raise InvalidInputError(
                f"The 'noise' parameter must be a cmbtools.simulate.NoiseModel or None. Got {type(noise).__name__} instead."
            )
        if noise.hits is not None:
            hits = np.asarray(noise.hits)
            if hits.size != 12 * nside * nside:
                from cmbtools.exceptions import ResolutionMismatchError

                other = int(round(math.sqrt(hits.size / 12)))
                raise ResolutionMismatchError(
                    f"The noise model's hits map has nside {other} but the estimator's masks have nside {nside}.",
                    other, nside,
                )
            observed = np.zeros(hits.size, dtype=bool)
            for key in (("t1", "p1", "t2", "p2") if cross else ("t1", "p1")):
                observed |= np.asarray(estimator.masks[key]) > 0
            uncovered = int(np.count_nonzero(observed & ~(hits > 0)))
            if uncovered:
                raise InvalidInputError(
                    f"The masks are non-zero in {uncovered} pixels that the noise model's hits map does not cover "
                    "(hits <= 0); zero the masks there (e.g. multiply them by hits > 0) and build the estimator again."
                )
        if not cross:
            noise_cl = _masked_noise_spectra(polarized_noise_spectra(noise, lmax, nside), noise, estimator)
    setup = _PolarizedSetup(
        estimator=estimator, spectra=spectra, amplitude_t=amp_t, amplitude_p=amp_p, noise=noise, noise_cl=noise_cl,
        monopole=sky_monopole, dipole=dipole, cross=bool(cross), sky_lmax=int(sky_lmax), pixelise=bool(pixelise),
        dipole_factor=dipole_factor,
    )
    sims = run_simulations(
        _simulate_and_estimate_iqu, n_sims, seed=seed, context=setup, run_dir=run_dir, executor=executor,
        workers=workers, threads_per_worker=threads_per_worker, progress=progress, restart=restart,
        max_restarts=max_restarts, description="polarized validation",
        memory_per_simulation=_memory_per_simulation(estimator, sky_lmax, bool(pixelise), noise, bool(cross)),
        force=force,
    )
    expected = estimator.expected_bandpowers({k: v[: lmax + 1] for k, v in spectra.items()}, cross=bool(cross))
    binning = estimator.binning
    metadata = {
        "nside": nside,
        "lmax": lmax,
        "n_bins": int(binning.n_bins),
        "f_sky": float(estimator.f_sky),
        "f_sky_eff": float(estimator.f_sky_eff),
        "pol_f_sky": float(estimator.pol_f_sky),
        "pol_f_sky_eff": float(estimator.pol_f_sky_eff),
        "spectrum_kind": "polarized cross" if cross else "polarized auto",
        "b_mode_purification": "yes" if estimator.purify_b else "no",
        "input_spectrum": source,
        "noise": "none" if noise is None else repr(noise) + "; Q and U sqrt(2) times noisier",
        "monopole_K": monopole,
        "dipole": "none" if dipole is None else repr(dipole),
        "sky_lmax": int(sky_lmax),
        "pixelised": "yes (averaged over each pixel's area)" if pixelise else "no",
        "harmonic_filter": filter_text,
        "expected": "the input to lmax through the estimator's bandpower windows",
        "error_model": "the estimator's reported errors, averaged over the simulations",
        "n_resumed": sims.n_resumed,
        "run_dir": "" if sims.run_dir is None else str(sims.run_dir),
    }
    samples, reported = sims["cl"], sims["cl_err"]
    if bandpower_transfer is not None:  # each spectrum over its factor (TE, TB, EB over sqrt(F_XX F_YY))
        samples = samples / bandpower_transfer.factors
        reported = reported / bandpower_transfer.factors
        metadata.update(bandpower_transfer.record())
    return PolarizedValidationResult.from_samples(
        samples, reported, np.array([expected[s] for s in _SIX]),
        ell_min=binning.ell_min, ell_max=binning.ell_max, ell_eff=binning.ell_eff, dl_factor=binning.dl_factor,
        seed=sims.seed, metadata=metadata,
    )
