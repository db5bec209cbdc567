"""``cmbtools spectrum`` on I, Q, U maps: the six spectra TT, TE, TB, EE, EB, BB.

The spectrum command hands over here when MAP is an I, Q, U file (three map columns); temperature-only files
keep the temperature path.  The options mean the same as for temperature; ``--pol-mask``/``--pol-mask2`` give
the polarization masks (default: the temperature masks) and ``--purify-b`` the B-mode purification.  A
Gaussian ``--beam-fwhm`` gives the spin-2 Gaussian beam to E and B; a ``--beam`` table applies to both.
"""

from __future__ import annotations

__all__ = ["is_polarized_input", "add_polarization_options", "run_polarized"]


def add_polarization_options(parser):
    pol = parser.add_argument_group("polarization (MAP and MAP2 holding I, Q, U)")
    pol.add_argument("--pol-mask", metavar="MASK", help="mask of MAP's Q and U (default: --mask)")
    pol.add_argument("--pol-mask2", metavar="MASK2", help="mask of MAP2's Q and U (default: --pol-mask, else --mask2)")
    pol.add_argument("--purify-b", action="store_true",
                     help="measure B with the pure-B estimator (no E-to-B leakage from the mask; needs an apodized "
                          "polarization mask; accurate up to lmax = 2 nside)")


def is_polarized_input(path) -> bool:
    """Whether ``path`` is an I, Q, U map file (the maps package decides; unreadable files are left to it)."""
    try:
        from cmbtools.maps.polarized_fits import is_iqu_file
    except ImportError:  # the maps package reads I, Q, U files once the maps side of polarization is in place
        return False
    try:
        return bool(is_iqu_file(path))
    except Exception:  # noqa: BLE001 - an unreadable file is reported by the reader with its own message
        return False


def run_polarized(args, outputs_checked) -> int:
    """The polarized spectrum command (arguments already parsed; the output paths already checked)."""
    import dataclasses

    import numpy as np

    from cmbtools import maps
    from cmbtools import spectrum as sp
    from cmbtools._core.checks import check_same_nside
    from cmbtools.cli.common import pixel_model_from_args
    from cmbtools._core.files import sha256_file
    from cmbtools.cli.common import (
        beam_from_args, binning_from_args, bins_top, corrected_covariance_key, describe_binning, print_range_warning,
    )
    from cmbtools.exceptions import InvalidInputError
    from cmbtools.maps.polarized_fits import read_iqu
    from cmbtools.spectrum.one_call import drop_missing_pixels

    for flag, given in (("--operator-cache", args.operator_cache), ("--fast-coupling", args.fast_coupling),
                        ("--write-noise-spectrum", args.write_noise_spectrum),
                        ("--template", getattr(args, "template", None))):
        if given:
            raise InvalidInputError(f"{flag} applies to temperature maps only; MAP holds I, Q, U "
                                    "(for the noise bias of I, Q, U maps use --noise-spectrum, --noise-maps or "
                                    "--half-difference).")
    if args.errors == "knox":
        raise InvalidInputError("--errors knox applies to temperature maps only; the errors of I, Q, U maps are the "
                                "Gaussian covariance of the six spectra (or --covariance-from FILE).")
    for flag, given in (("--noise-variance", args.noise_variance), ("--noise-variance2", args.noise_variance2),
                        ("--hits", args.hits), ("--noise-depth", args.noise_depth), ("--hits2", args.hits2),
                        ("--noise-depth2", args.noise_depth2)):
        if given is not None:
            raise InvalidInputError(f"{flag} applies to temperature maps only; the covariance of I, Q, U maps takes "
                                    "the noise from the measured power of each map.")
    covariance_from = None
    if args.covariance_from is not None:  # read and checked now (its spectra were checked by the caller)
        covariance_from = sp.read_covariance(args.covariance_from)
    transfer = None
    if args.transfer is not None:  # the table of `validate --polarized` (a spectrum column)
        transfer = sp.PolarizedBandpowerTransfer.read_csv(args.transfer)
    corrected_key = corrected_covariance_key(covariance_from, transfer, args.covariance_from, args.transfer)
    m1, info1 = read_iqu(args.map, force=args.force)
    w1 = maps.read_mask(args.mask, force=args.force)
    p1 = maps.read_mask(args.pol_mask, force=args.force) if args.pol_mask else w1
    check_same_nside(m1[0], w1, args.map, args.mask)
    check_same_nside(m1[0], p1, args.map, args.pol_mask or args.mask)
    m2 = info2 = w2 = p2 = None
    if args.map2 is not None:
        m2, info2 = read_iqu(args.map2, force=args.force)
        check_same_nside(m1[0], m2[0], args.map, args.map2)
        w2 = maps.read_mask(args.mask2, force=args.force) if args.mask2 else w1
        if args.pol_mask2:
            p2 = maps.read_mask(args.pol_mask2, force=args.force)
        else:
            p2 = p1 if (args.pol_mask or not args.mask2) else w2
    nside = int(round(np.sqrt(m1.shape[1] / 12)))
    lmax = 3 * nside - 1 if args.lmax is None else args.lmax
    beam1 = beam_from_args(args.beam_fwhm, args.beam, lmax)
    beam2 = beam_from_args(args.beam2_fwhm, args.beam2, lmax) if args.map2 is not None else None
    binning = binning_from_args(args, bins_top(args, nside, lmax, beam1, beam2), float(np.mean(p1)))
    if binning.lmin < 2:
        raise InvalidInputError(f"The bins start at ell={binning.lmin}; polarized spectra need bins from ell >= 2.")
    if covariance_from is not None and not covariance_from.matches(binning):
        raise InvalidInputError(f"{args.covariance_from}: the covariance has other bins than the bandpowers "
                                f"({covariance_from.n_bins} bins from ell {int(covariance_from.ell_min[0])}, against "
                                f"{binning.n_bins} from ell {binning.lmin}); use the same binning.")
    if transfer is not None:
        try:
            transfer.check_bins(binning)
        except InvalidInputError as exc:
            raise InvalidInputError(f"{args.transfer}: {exc}") from None
    theory = None
    if args.theory is not None:  # read and checked now: a command writes all of its outputs or none
        from cmbtools.simulate import read_polarized_spectrum_table

        theory = {k: v for k, v in read_polarized_spectrum_table(args.theory).items() if k in sp.SPECTRA}
        if theory["TT"].size < binning.lmax + 1:
            raise InvalidInputError(
                f"The theory table {str(args.theory)!r} stops at ell={theory['TT'].size - 1}; the bins go to "
                f"ell={binning.lmax} (give a longer table or end the bins lower)."
            )

    # missing pixels inside a mask: dropped from that mask, with a warning (the library's one rule)
    w1 = drop_missing_pixels(m1[0], w1, f"{args.map} (I)", "mask", stacklevel=2)
    for k, f in ((1, "Q"), (2, "U")):
        p1 = drop_missing_pixels(m1[k], p1, f"{args.map} ({f})", "pol-mask", stacklevel=2)
    if m2 is not None:
        w2 = drop_missing_pixels(m2[0], w2, f"{args.map2} (I)", "mask2", stacklevel=2)
        for k, f in ((1, "Q"), (2, "U")):
            p2 = drop_missing_pixels(m2[k], p2, f"{args.map2} ({f})", "pol-mask2", stacklevel=2)

    noise_maps = noise_cl = None
    if args.noise_spectrum is not None:  # the noise spectra as observed, e.g. `simulate --polarized --write-noise-spectrum`
        from cmbtools.simulate import read_polarized_spectrum_table

        noise_cl = read_polarized_spectrum_table(args.noise_spectrum)
        if noise_cl["TT"].size < lmax + 1:
            raise InvalidInputError(
                f"The noise spectrum table {str(args.noise_spectrum)!r} stops at ell={noise_cl['TT'].size - 1}; the "
                f"transforms go to ell={lmax} (give a longer table, or a lower --lmax).")
        noise_cl = {k: v[: lmax + 1] for k, v in noise_cl.items()}
    elif args.noise_maps:
        noise_maps = [read_iqu(p, force=args.force)[0] for p in args.noise_maps]
    elif args.half_difference:
        h1, h2 = (read_iqu(p, force=args.force)[0] for p in args.half_difference)
        noise_maps = [0.5 * (h1 - h2)]
    for n in noise_maps or ():
        if n.shape != m1.shape:
            raise InvalidInputError(f"The noise maps must be I, Q, U maps of nside {nside} like MAP.")

    sky_lmax = lmax if args.sky_lmax is None else args.sky_lmax
    if sky_lmax < lmax or sky_lmax > 8 * nside:
        raise InvalidInputError(f"--sky-lmax must be in [{lmax}, {8 * nside}] (lmax to 8 nside). Got {sky_lmax} instead.")
    est = sp.PolarizedSpectrumEstimator(
        w1, binning, pol_mask=p1, lmax=lmax, mask2=w2, pol_mask2=p2, beam=beam1, beam2=beam2,
        pixel_window=not args.no_pixel_window, remove_monopole_dipole=not args.keep_monopole_dipole,
        sky_lmax=sky_lmax, guess_cl=theory if theory is not None and theory["TT"].size > sky_lmax else None,
        correct_deprojection_bias=not args.no_deprojection_correction,
        purify_b=args.purify_b, averaged_pixels=pixel_model_from_args(args), nthreads=args.threads or None,
    )
    bp = est.estimate(m1, m2, noise_maps=noise_maps, noise_cl=noise_cl)
    meta = dict(bp.metadata)
    meta.update({"map": str(args.map), "map_sha256": info1.sha256, "mask_file": str(args.mask),
                 "mask_file_sha256": sha256_file(args.mask)})
    if args.pol_mask:
        meta.update({"pol_mask_file": str(args.pol_mask), "pol_mask_file_sha256": sha256_file(args.pol_mask)})
    if m2 is not None:
        meta.update({"map2": str(args.map2), "map2_sha256": info2.sha256})
    # the files, recorded as for temperature maps
    for key, path in (("mask2_file", args.mask2 if m2 is not None else None),
                      ("pol_mask2_file", args.pol_mask2 if m2 is not None else None)):
        if path:
            meta.update({key: str(path), key + "_sha256": sha256_file(path)})
    for key, path in (("beam_file", args.beam), ("beam2_file", args.beam2 if m2 is not None else None),
                      ("theory_file", args.theory)):
        if path is not None:
            meta[key] = str(path)
    if args.noise_spectrum is not None:
        meta.update({"noise_spectrum_file": str(args.noise_spectrum),
                     "noise_spectrum_file_sha256": sha256_file(args.noise_spectrum)})
    cross = m2 is not None
    windows = est.cross_bandpower_windows if cross else est.bandpower_windows
    if covariance_from is not None:
        # the errors and covariance of the file (e.g. a simulated one: its inverse takes the Hartlap factor)
        covariance = covariance_from
        errors_text = f"{covariance.kind} covariance from {args.covariance_from}"
        meta["errors"] = errors_text
        err = covariance.errors.reshape(len(sp.SPECTRA), binning.n_bins)
        bp = type(bp)(bp.ell_min, bp.ell_max, bp.ell_eff, bp.cl, err, bp.dl, err * binning.dl_factor,
                      np.array(covariance.matrix), meta)
        if covariance.windows is None:
            covariance = dataclasses.replace(covariance, windows=windows)
    else:
        bp = type(bp)(bp.ell_min, bp.ell_max, bp.ell_eff, bp.cl, bp.cl_err, bp.dl, bp.dl_err, bp.covariance, meta)
        errors_text = "Gaussian covariance of the measured pseudo-spectra (every block of the six spectra)"
        covariance = sp.BandpowerCovariance(
            bp.ell_min, bp.ell_max, bp.ell_eff, bp.covariance, windows, kind="gaussian", spectra=sp.SPECTRA,
            settings={"spectrum": "polarized cross" if cross else "polarized auto", "map": str(args.map),
                      "map_sha256": info1.sha256, **({"map2": str(args.map2)} if cross else {}),
                      "b_mode_purification": "yes" if args.purify_b else "no", "lmax": int(est.lmax)})
    if transfer is not None:  # the errors and covariance of a corrected covariance file are kept as they are
        errors_kept, covariance_kept = bp.cl_err, bp.covariance
        bp = transfer.apply(bp)
        bp = type(bp)(bp.ell_min, bp.ell_max, bp.ell_eff, bp.cl, bp.cl_err, bp.dl, bp.dl_err, bp.covariance,
                      {**bp.metadata, "transfer_file": str(args.transfer),
                       "transfer_file_sha256": sha256_file(args.transfer)})
        if corrected_key is not None:
            bp = type(bp)(bp.ell_min, bp.ell_max, bp.ell_eff, bp.cl, errors_kept, bp.dl,
                          errors_kept * binning.dl_factor, covariance_kept, bp.metadata)
        else:
            covariance = transfer.apply_to_covariance(covariance)

    from cmbtools._core.files import OutputGroup

    ow = args.overwrite
    with OutputGroup() as outputs:  # all of the outputs or none
        outputs.write(args.output, lambda p: bp.write_csv(p, overwrite=True, unit=args.unit), overwrite=ow)
        if args.fits is not None:
            outputs.write(args.fits, lambda p: bp.write_fits(p, overwrite=True, unit=args.unit), overwrite=ow)
        if args.figure is not None:
            outputs.write(args.figure, lambda p: bp.plot(p, theory=theory, overwrite=True), overwrite=ow)
        if args.covariance is not None:
            outputs.write(args.covariance, lambda p: covariance.write(p, overwrite=True), overwrite=ow)
    written = outputs.paths

    kind = "polarized cross-spectra" if m2 is not None else "polarized spectra"
    what = f"{args.map} x {args.map2}" if m2 is not None else str(args.map)
    print(f"{kind} (TT, TE, TB, EE, EB, BB) of {what}: nside {nside}, lmax {est.lmax}")
    print(f"  sky fraction: temperature f_sky {est.f_sky:.3f}, polarization f_sky {est.pol_f_sky:.3f}")
    print(f"  {describe_binning(binning)}")
    print(f"  beam: {meta['beam']}; polarization beam: {meta['pol_beam']}; pixel window: {meta['pixel_window']}")
    print(f"  B-mode purification: {'yes' if args.purify_b else 'no'}; condition number {est.condition_number:.3g}")
    if noise_maps is not None or noise_cl is not None:
        source = f"noise spectra of {args.noise_spectrum}" if noise_cl is not None else meta["noise_bias_subtracted"]
        print(f"  noise bias subtracted: {source}")
    print(f"  errors: {errors_text}")
    if transfer is not None:
        f = transfer.factors
        print(f"  transfer: bandpowers, errors and covariance divided by F_b of {args.transfer} "
              f"({float(f.min()):.4g} to {float(f.max()):.4g}; TE, TB, EB by sqrt(F_XX F_YY))")
    for p in written:
        print(f"  wrote {p}")
    print_range_warning(args)
    return 0
