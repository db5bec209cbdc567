"""The polarized branch of ``cmbtools validate`` (``--polarized``): I, Q, U skies, the six spectra checked.

The options mean what they mean for temperature; ``--pol-mask``/``--pol-mask2`` give the polarization masks
(default: the temperature masks), ``--purify-b`` the B-mode purification, ``--tensor-ratio`` the tensor part of
the built-in spectra, ``--spectrum`` a polarized spectrum table.  ``--harmonic-filter`` multiplies T, E and B
of every sky by the table's factor (I, Q, U filtered alike) and ``--transfer`` takes the polarized transfer table
(a ``spectrum`` column) of an earlier run, as ``cmbtools spectrum --transfer`` does on I, Q, U maps.
"""

from __future__ import annotations

__all__ = ["add_polarization_options", "check_polarization_options", "run_polarized"]

_POLARIZED_ONLY = ("--pol-mask", "--pol-mask2", "--purify-b", "--tensor-ratio")


def add_polarization_options(parser):
    from cmbtools.cli.common import finite_float

    pol = parser.add_argument_group("polarization (--polarized: I, Q, U skies, the six spectra)")
    pol.add_argument("--polarized", action="store_true",
                     help="simulate I, Q, U skies (Q, U noise sqrt(2) times the I noise) and check TT, TE, TB, EE, "
                          "EB, BB per bin")
    pol.add_argument("--pol-mask", metavar="MASK", help="mask of Q and U (default: MASK)")
    pol.add_argument("--pol-mask2", metavar="MASK2", help="mask of the second split's Q and U (default: --pol-mask, "
                                                         "else --mask2)")
    pol.add_argument("--purify-b", action="store_true",
                     help="measure B with the pure-B estimator (the polarization mask must be apodized; accurate "
                          "up to lmax = 2 nside)")
    pol.add_argument("--tensor-ratio", type=finite_float, default=None, metavar="R",
                     help="tensor-to-scalar ratio of the built-in spectra's B modes (default 0; their lensing-like "
                          "B modes are always in)")


def check_polarization_options(args):
    """Refuse the polarized options without --polarized, and the temperature-only ones with it (before any work)."""
    from cmbtools.exceptions import InvalidInputError

    if not args.polarized:
        given = [flag for flag, v in zip(_POLARIZED_ONLY, (args.pol_mask, args.pol_mask2, args.purify_b,
                                                            args.tensor_ratio is not None)) if v]
        if given:
            raise InvalidInputError(f"{', '.join(given)} need{'s' if len(given) == 1 else ''} --polarized.")
        return
    if args.fast_coupling:
        raise InvalidInputError("--fast-coupling is not available with --polarized (its couplings are exact).")
    if args.tensor_ratio is not None:
        if args.spectrum is not None:
            raise InvalidInputError("--tensor-ratio sets the built-in spectra; it cannot be combined with --spectrum.")
        if not 0.0 <= args.tensor_ratio <= 10.0:
            raise InvalidInputError(f"--tensor-ratio must be in [0, 10]. Got {args.tensor_ratio!r} instead.")


def run_polarized(args, outputs, run_dir, where) -> int:
    """Read and check the inputs, run the polarized validation, write ``outputs`` and print the summary.

    ``outputs``: (what, path, overwrite) of the table, the JSON summary and the figure, already checked;
    ``where``: (executor, workers, description) of the simulations.
    """
    import dataclasses

    import numpy as np

    from cmbtools import maps
    from cmbtools import spectrum as sp
    from cmbtools._core.checks import check_same_nside
    from cmbtools._core.files import sha256_file
    from cmbtools.cli.common import (
        binning_from_args, bins_top, describe_binning, monopole_dipole_from_args, noise_model_from_args,
        pixel_model_from_args, print_range_warning,
    )
    from cmbtools.exceptions import InvalidInputError
    from cmbtools.simulate import validate_polarized_estimator

    # inputs, all read and checked before the estimator is built
    mask = maps.read_mask(args.mask, force=args.force)
    nside = int(round(np.sqrt(mask.size / 12)))
    pol_mask = None
    if args.pol_mask is not None:
        pol_mask = maps.read_mask(args.pol_mask, force=args.force)
        check_same_nside(mask, pol_mask, args.mask, args.pol_mask)
    cross = args.cross or args.mask2 is not None or args.pol_mask2 is not None
    mask2 = pol_mask2 = None
    if args.mask2 is not None:
        mask2 = maps.read_mask(args.mask2, force=args.force)
        check_same_nside(mask, mask2, args.mask, args.mask2)
    if args.pol_mask2 is not None:
        pol_mask2 = maps.read_mask(args.pol_mask2, force=args.force)
        check_same_nside(mask, pol_mask2, args.mask, args.pol_mask2)
    lmax = 3 * nside - 1 if args.lmax is None else args.lmax
    if lmax > 4 * nside - 1:
        raise InvalidInputError(f"--lmax must be at most 4*nside-1 = {4 * nside - 1}. Got {lmax} instead.")
    if args.lmin > lmax:
        raise InvalidInputError(f"--lmin ({args.lmin}) must not exceed lmax ({lmax}).")
    top = (8 if args.pixelise else 4) * nside - 1
    # real skies have power above lmax: 4 nside - 1 by default (a cross-spectrum's splits stop at lmax)
    sky_lmax = (lmax if cross else max(lmax, 4 * nside - 1)) if args.sky_lmax is None else args.sky_lmax
    if cross and (args.sky_lmax is not None or args.pixelise):
        raise InvalidInputError("--sky-lmax and --pixelise are not available with a cross-spectrum (--cross, --mask2).")
    if sky_lmax < lmax or sky_lmax > top:
        raise InvalidInputError(f"--sky-lmax must be in [{lmax}, {top}]. Got {sky_lmax} instead.")
    beam = sky_beam = None
    beam_text = "none"
    if args.beam_fwhm is not None:
        beam = sky_beam = float(args.beam_fwhm)
        beam_text = f"Gaussian FWHM {args.beam_fwhm:g} arcmin (spin-2 form for E and B)"
    elif args.beam is not None:
        sky_beam = np.asarray(sp.read_beam(args.beam, lmax=sky_lmax), dtype=np.float64)
        beam = sky_beam[: lmax + 1]
        beam_text = f"table {args.beam} (for I and for Q, U)"
    elif sky_lmax > lmax or args.pixelise:
        sky_beam = np.ones(sky_lmax + 1)
    binning = binning_from_args(args, bins_top(args, nside, lmax, beam),
                                float(np.mean(mask if pol_mask is None else np.minimum(mask, pol_mask))))
    if binning.lmin < 2:
        raise InvalidInputError(f"The bins start at ell={binning.lmin}; polarized spectra need bins from ell >= 2.")
    noise = noise_model_from_args(args)
    if args.spectrum is not None:
        from cmbtools._core.spectrum_tables import read_polarized_spectrum_table

        spectra = read_polarized_spectrum_table(args.spectrum)
        if args.sky_lmax is None and not cross and lmax + 1 <= spectra["TT"].size < sky_lmax + 1:
            sky_lmax = spectra["TT"].size - 1  # a user spectrum that stops earlier sets the default band limit
            if isinstance(sky_beam, np.ndarray):
                sky_beam = sky_beam[: sky_lmax + 1]
        if spectra["TT"].size < sky_lmax + 1:
            raise InvalidInputError(
                f"The spectrum table {args.spectrum!r} stops at ell={spectra['TT'].size - 1}; the skies go to ell "
                f"{sky_lmax} (give a longer table, or a lower --lmax / --sky-lmax)."
            )
        spectrum_text = f"{args.spectrum} (sha256 {sha256_file(args.spectrum)[:16]}...)"
    else:
        from cmbtools.simulate import fiducial_spectra

        r = 0.0 if args.tensor_ratio is None else float(args.tensor_ratio)
        spectra = fiducial_spectra(sky_lmax, tensor_ratio=r, lensing_bb=True)
        from cmbtools.simulate.theory_spectrum import FIDUCIAL_MODEL

        spectrum_text = f"built-in fiducial spectra ({FIDUCIAL_MODEL}; r = {r:g}, lensing-like BB)"
    harmonic_filter = None
    if args.harmonic_filter is not None:  # one f_l for T, E and B: the same filtering of I and of Q, U
        from cmbtools._core.binned_tables import read_filter_table

        harmonic_filter = read_filter_table(args.harmonic_filter)
        if args.sky_lmax is None and not cross and lmax + 1 <= harmonic_filter.size < sky_lmax + 1:
            sky_lmax = harmonic_filter.size - 1  # a filter that stops earlier sets the default band limit
            if isinstance(sky_beam, np.ndarray):
                sky_beam = sky_beam[: sky_lmax + 1]
        if harmonic_filter.size < sky_lmax + 1:
            raise InvalidInputError(
                f"The filter table {args.harmonic_filter!r} stops at ell={harmonic_filter.size - 1}; the skies go "
                f"to ell={sky_lmax} (give the factor up to there, or a lower --sky-lmax)."
            )
        harmonic_filter = harmonic_filter[: sky_lmax + 1]
    transfer = None
    if args.transfer is not None:  # the table of an earlier `validate --polarized` (a spectrum column)
        transfer = sp.PolarizedBandpowerTransfer.read_csv(args.transfer)
        try:
            transfer.check_bins(binning, "the validation")
        except InvalidInputError as exc:
            raise InvalidInputError(f"{args.transfer}: {exc}") from None
    from cmbtools.simulate import check_spectra

    spectra = check_spectra(spectra, sky_lmax)
    removal = not args.keep_monopole_dipole
    monopole, dipole = monopole_dipole_from_args(args, 100.0 if removal else 0.0, 3000.0 if removal else 0.0)
    # the model of the skies simulated: averaged pixels with --pixelise, pixel centres without (unless told)
    averaged = pixel_model_from_args(args, default=bool(args.pixelise) and not args.no_pixel_window)
    if averaged and args.no_pixel_window:
        raise InvalidInputError("--averaged-pixels needs the pixel window (leave out --no-pixel-window).")
    est = sp.PolarizedSpectrumEstimator(
        mask, binning, pol_mask=pol_mask, lmax=lmax, mask2=mask2, pol_mask2=pol_mask2, beam=beam,
        pixel_window=not args.no_pixel_window, remove_monopole_dipole=removal, purify_b=args.purify_b,
        sky_lmax=sky_lmax, guess_cl=spectra, averaged_pixels=averaged, force=args.force,
    )

    executor, workers, where_text = where
    result = validate_polarized_estimator(
        est, spectra, n_sims=args.sims, seed=args.seed, noise=noise, run_dir=run_dir, executor=executor,
        workers=workers, threads_per_worker=args.threads or None, progress=False if args.no_progress else None,
        restart=args.restart, force=args.force, cross=cross, monopole=monopole, dipole=dipole,
        sky_lmax=sky_lmax, sky_beam=sky_beam, pixelise=bool(args.pixelise), harmonic_filter=harmonic_filter,
        bandpower_transfer=transfer,
    )

    meta = dict(result.metadata)
    meta.update({"mask_file": str(args.mask), "mask_file_sha256": sha256_file(args.mask),
                 "input_spectrum": spectrum_text, "beam": beam_text,
                 "pixel_window": "no" if args.no_pixel_window else "yes"})
    for key, path in (("pol_mask_file", args.pol_mask), ("mask2_file", args.mask2), ("pol_mask2_file", args.pol_mask2)):
        if path is not None:
            meta.update({key: str(path), key + "_sha256": sha256_file(path)})
    if args.hits is not None:
        meta["hits_file"] = str(args.hits)
    if args.harmonic_filter is not None:
        meta.update({"harmonic_filter_file": str(args.harmonic_filter),
                     "harmonic_filter_file_sha256": sha256_file(args.harmonic_filter)})
    if args.transfer is not None:
        meta["transfer_file"] = str(args.transfer)
    result = dataclasses.replace(result, metadata=meta)
    from cmbtools._core.files import OutputGroup

    # the simulated covariance of the six spectra's bandpowers (spectrum-major, as the bandpowers'
    # cl.ravel()), usable by `cmbtools spectrum --covariance-from` on I, Q, U maps
    samples = np.concatenate([result[s].samples for s in sp.SPECTRA], axis=1)
    simulated = sp.simulated_covariance(
        samples, ell_min=result.ell_min, ell_max=result.ell_max, ell_eff=result.ell_eff,
        windows=est.cross_bandpower_windows if cross else est.bandpower_windows, spectra=sp.SPECTRA,
        settings={"spectrum": "polarized cross" if cross else "polarized auto", "seed": int(result.seed),
                  "b_mode_purification": "yes" if args.purify_b else "no",
                  **({} if transfer is None else {"bandpower_transfer_key": transfer.key,
                                                  "bandpower_transfer": f"divided out ({args.transfer})"})})
    skipped = measured = None
    try:
        measured = sp.PolarizedBandpowerTransfer.from_validation(result)
    except InvalidInputError as exc:  # TT, EE or BB keeps no signal in some bin: the table cannot correct it
        path = [o for o in outputs if o[0] == "transfer table"][0][1]
        skipped = f"{path} not written: {exc}"
        outputs = [o for o in outputs if o[0] != "transfer table"]
    if measured is not None and transfer is not None:
        # the whole F_b of the pipeline: what is left times what was divided out (TE, TB, EB: sqrt(F_XX F_YY))
        f = transfer.factors
        measured = dataclasses.replace(
            measured, transfer=measured.transfer * f, transfer_error=measured.transfer_error * f,
            metadata={**measured.metadata, "measured_by": "Monte Carlo validation of the polarized estimator (mean "
                      f"/ expected per spectrum and bin, with {args.transfer} divided out and multiplied back)"})
    writers = {"table": lambda p: result.write_csv(p, overwrite=True, unit=args.unit),
               "JSON summary": lambda p: result.write_json(p, overwrite=True),
               "figure": lambda p: result.plot(p, overwrite=True),
               "transfer table": lambda p: measured.write_csv(p, overwrite=True)}
    with OutputGroup() as group:  # all of the outputs or none
        for what, path, overwrite in outputs:
            group.write(path, writers[what], overwrite=overwrite)
        group.write(run_dir / "covariance.npz", lambda p: simulated.write(p, overwrite=True), overwrite=True)
    written = group.paths

    s = result.summary()

    def num(v, spec):
        return "n/a" if v is None else format(v, spec)

    ran = result.n_sims - int(meta.get("n_resumed", 0))
    print(f"validated the polarized spectrum estimator on {result.n_sims} simulations (seed {result.seed}) "
          f"on {where_text}")
    if meta.get("n_resumed"):
        print(f"  resumed {meta['n_resumed']} finished simulations from {run_dir}; ran {ran}")
    print(f"  nside {nside}, lmax {lmax}, {describe_binning(binning)}")
    sky = f"temperature f_sky {est.f_sky:.3f}, polarization f_sky {est.pol_f_sky:.3f}"
    print(f"  sky fraction: {sky}" + ("; cross-spectra of two splits" if cross else ""))
    noise_text = "none" if noise is None else (
        f"{args.noise_depth:g} uK-arcmin in I" + (" shaped by the hits map" if args.hits else "")
        + (f", knee at ell {args.noise_knee:g} (slope {args.noise_slope:g})" if args.noise_knee else "")
        + ", sqrt(2) times that in Q and U")
    print(f"  input: {spectrum_text}; beam: {beam_text}; noise: {noise_text}")
    print(f"  skies to ell {sky_lmax}" + (", pixelised (averaged over each pixel)" if args.pixelise else "")
          + f"; B-mode purification: {'yes' if args.purify_b else 'no'}")
    if not args.no_pixel_window:
        skies = "averaged over each pixel" if args.pixelise else "sampled at the pixel centres"
        model = (("averaged pixels (pixel windows + the pixel shapes' correction of TT, TE, EE"
                  + (")" if args.purify_b else ", BB)")) if averaged
                 else "pixel centres (pixel windows only)")
        print(f"  pixels: skies {skies}; estimator's model: {model}")
    worst = result.worst_bin()
    where_worst = "" if worst is None else (
        f" ({worst[0]}, ell {int(result.ell_min[worst[1]])}-{int(result.ell_max[worst[1]])})")
    print(f"  bias: max |bias| {num(s['max_abs_bias_sigma'], '.2f')} sigma{where_worst}, rms "
          f"{num(s['rms_bias_sigma'], '.2f')} sigma over {6 * s['n_bins']} bins; scatter / reported error "
          f"{num(s['min_error_ratio'], '.3f')} to {num(s['max_error_ratio'], '.3f')}")
    for name, v in s["spectra"].items():
        print(f"    {name}: max |bias| {num(v['max_abs_bias_sigma'], '5.2f')} sigma, rms "
              f"{num(v['rms_bias_sigma'], '4.2f')}; scatter / error {num(v['min_error_ratio'], '.3f')} to "
              f"{num(v['max_error_ratio'], '.3f')} (median {num(v['median_error_ratio'], '.3f')})")
    if transfer is not None:
        f = transfer.factors
        print(f"  bandpowers and errors divided by F_b of {args.transfer} ({float(f.min()):.4g} to "
              f"{float(f.max()):.4g}; TE, TB, EB by sqrt(F_XX F_YY))")
    if transfer is not None or harmonic_filter is not None:
        auto = np.array([result[x].transfer for x in ("TT", "EE", "BB")])
        print(f"  transfer (mean / expected) of TT, EE, BB: from {float(np.nanmin(auto)):.4f} to "
              f"{float(np.nanmax(auto)):.4f}"
              + (f" (harmonic filter {args.harmonic_filter})" if args.harmonic_filter else ""))
    print("  wrote " + ", ".join(str(p) for p in written))
    if skipped is not None:
        import sys

        print(f"cmbtools: warning: {skipped}", file=sys.stderr)
    print_range_warning(args)
    return 0
