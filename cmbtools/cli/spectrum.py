"""``cmbtools spectrum``: bandpowers of a masked map (or the cross-spectrum of two maps)."""

from __future__ import annotations

import argparse

from cmbtools.cli.error_model import add_error_options
from cmbtools.cli.noise_bias import add_noise_options
from cmbtools.cli.polarized_spectrum import add_polarization_options
from cmbtools.cli.common import (
    add_binning, add_force, add_overwrite, add_pixel_model, add_threads, beam_from_args, binning_from_args, bins_top,
    corrected_covariance_key, describe_binning,
    pixel_model_from_args, positive_float, positive_int, print_range_warning,
)

HELP = "measure the angular power spectrum of a masked map (pseudo-Cl with mode-coupling correction)"
DESCRIPTION = """\
Measure the angular power spectrum of a masked HEALPix map: the monopole and
dipole are fitted and removed on the masked sky, the pseudo-Cl of the masked
map is corrected for the mask's mode coupling (MASTER), the beam and the
HEALPix pixel window are deconvolved, and the result is averaged into bins.
With two maps it measures their cross-spectrum, which has no noise bias when
the two noises are independent.  Error bars: the Gaussian covariance of the
bandpowers (narrow-kernel approximation with the mask, beam, pixel window,
the monopole/dipole removal and, with --noise-variance or --hits, the noise
per pixel); --errors knox gives the cheaper Knox formula with the effective
sky fraction, --covariance-from a simulated covariance.

Top of the range: the transforms go to 3*nside-1, but without --lmax the
bins end at 2.5 nside, or earlier where the beam keeps less than 1e-3 of the
sky's power, or at 2 nside under a beam narrower than two pixels (or none,
with one warning line): above that the grid's aliasing makes the error bars
too small.  --lmax N or --bin-edges set the range yourself.

On I, Q, U maps (three map columns) it measures the six spectra TT, TE, TB,
EE, EB, BB with the polarized mode-coupling correction (E/B mixing undone),
optional B-mode purification (--purify-b), and writes one table with a
'spectrum' column; --pol-mask gives the polarization mask.

The table (CSV) records the inputs in '# key: value' header lines, then the
columns ell_min,ell_max,ell_eff,cl,cl_err,dl,dl_err (uK^2 by default).

Spectrum files are text tables with a header line naming the columns,
separated by commas or spaces, '#' comments.  --theory: a spectrum table
('ell' and 'cl' or 'dl', unit as a column suffix such as cl_k2, dl_uk2 or in
a '# unit: uK^2' comment; cl without a unit is K^2), as 'cmbtools simulate
--write-spectrum' writes.  Noise bias of an auto-spectrum: --noise-spectrum
(a spectrum table of N_l as observed, e.g. from 'cmbtools simulate
--write-noise-spectrum', or a noise bandpower table from
--write-noise-spectrum), --noise-maps (noise-only maps) or --half-difference
(two halves of the data whose mean is MAP).  On I, Q, U maps --theory and
--noise-spectrum take polarized tables (cl_tt_k2, cl_ee_k2, cl_bb_k2,
cl_te_k2 ..., as 'cmbtools simulate --polarized' writes them, or the table
of this command on I, Q, U maps, constant over each bin).

Before the mask transforms and the mode-coupling matrix are computed, their
memory is estimated; the command stops if it exceeds what the machine has
available, and --force goes ahead anyway.

examples:
  cmbtools spectrum tern_map.fits --mask tern_mask.fits --beam-fwhm 60 -o tern_spectrum.csv
  cmbtools spectrum half1.fits half2.fits --mask tern_mask.fits --beam-fwhm 60 \\
      --bin-width 20 -o cross.csv --figure cross.png
  cmbtools spectrum tern_map.fits --mask tern_mask.fits --beam-fwhm 60 \\
      --half-difference half1.fits half2.fits --write-noise-spectrum noise.csv -o auto.csv
"""


def add_arguments(parser):
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.add_argument("map", metavar="MAP", help="HEALPix FITS map (K_CMB or a unit named in its header)")
    parser.add_argument("map2", metavar="MAP2", nargs="?", help="second map: measure the cross-spectrum MAP x MAP2")
    parser.add_argument("--mask", metavar="MASK", required=True, help="mask (weights in [0, 1]) of MAP")
    parser.add_argument("--mask2", metavar="MASK2", help="mask of MAP2 (default: the same as MAP's)")
    parser.add_argument("--lmax", type=positive_int, metavar="N",
                        help="largest multipole of the transforms and of the bins (default: transforms to "
                             "3*nside-1, bins to the default top of the range, see --bin-width)")
    add_binning(parser)
    beam = parser.add_argument_group("beams (default: none)")
    b1 = beam.add_mutually_exclusive_group()
    b1.add_argument("--beam-fwhm", type=positive_float, metavar="ARCMIN", help="Gaussian beam of MAP, FWHM in arcmin")
    b1.add_argument("--beam", metavar="FILE", help="beam table of MAP (columns ell,b_ell)")
    b2 = beam.add_mutually_exclusive_group()
    b2.add_argument("--beam2-fwhm", type=positive_float, metavar="ARCMIN",
                    help="Gaussian beam of MAP2 (default: the same as MAP's)")
    b2.add_argument("--beam2", metavar="FILE", help="beam table of MAP2")
    parser.add_argument("--no-pixel-window", action="store_true", help="do not deconvolve the HEALPix pixel window")
    add_pixel_model(parser, "The default with the pixel window, at every nside (for I, Q, U maps it corrects TT; "
                            "it costs about 2 s of pair sums, run beside the coupling kernel).")
    parser.add_argument("--keep-monopole-dipole", action="store_true",
                        help="do not fit and remove the monopole and dipole before the transform")
    add_noise_options(parser)
    parser.add_argument("--template", metavar="FILE", action="append",
                        help="template map (HEALPix FITS) fitted on the masked sky and removed with the monopole and "
                             "dipole, its bias on the spectrum corrected; repeat for several")
    parser.add_argument("--no-deprojection-correction", action="store_true",
                        help="do not correct the bias that removing the monopole, dipole and templates causes")
    parser.add_argument("--sky-lmax", type=positive_int, metavar="N",
                        help="band limit of the sky whose power above the bins is modelled from the guess spectrum "
                             "(--theory, else the built-in fiducial one); real skies: 4 nside - 1 (default: lmax; "
                             "the multipoles between the last bin and lmax are modelled in any case)")
    parser.add_argument("--transfer", metavar="FILE",
                        help="per-bin transfer function table (transfer.csv of `cmbtools validate`, same bins; for "
                             "I, Q, U maps that of `validate --polarized`, with a spectrum column): "
                             "divide the bandpowers, their errors and covariance by it, undoing a filtering of the "
                             "map that the estimator does not model")
    add_error_options(parser)
    add_polarization_options(parser)
    parser.add_argument("--fast-coupling", action="store_true",
                        help="approximate the mode-coupling matrix (faster at large lmax; exact when lmax > 2 nside, where the approximation fails)")
    parser.add_argument("--theory", metavar="FILE", help="theory spectrum to draw in the figure (columns ell and cl or dl)")
    parser.add_argument("--operator-cache", metavar="PATH",
                        help="reuse (or create) the precomputed estimator in this .npz file")
    parser.add_argument("-o", "--output", metavar="TABLE.csv", required=True, help="output table (CSV)")
    parser.add_argument("--fits", metavar="TABLE.fits", help="also write the table as a FITS binary table")
    parser.add_argument("--figure", metavar="FIG.png", help="also draw D_l with error bars (PNG or PDF)")
    parser.add_argument("--unit", choices=("uK", "K"), default="uK", help="unit of the written spectra: uK^2 (default) or K^2")
    add_overwrite(parser)
    add_threads(parser)
    add_force(parser)


# ----------------------------------------------------------------------------- spectrum files


# ----------------------------------------------------------------------------- run


def _file_identity(path):
    """(device, inode, size, mtime) of a file, or None: tells whether a cache file was replaced."""
    import os

    try:
        st = os.stat(path)
    except OSError:
        return None
    return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)


def run(args) -> int:
    import dataclasses
    import os
    from pathlib import Path

    import numpy as np

    from cmbtools import maps
    from cmbtools import spectrum as sp
    from cmbtools._core.files import check_output_path, sha256_file
    from cmbtools._core.checks import check_same_nside
    from cmbtools._core.spectrum_tables import read_spectrum_table
    from cmbtools.cli.noise_bias import (
        check_noise_options, noise_bias_table, read_noise_inputs, subtract_noise,
    )
    from cmbtools.spectrum.one_call import drop_missing_pixels
    from cmbtools.exceptions import InvalidInputError

    # 1. every output path, before any work
    outputs = [("table", args.output), ("FITS table", args.fits), ("figure", args.figure)]
    seen = {}
    for what, path in outputs:
        if path is None:
            continue
        check_output_path(path, overwrite=args.overwrite)
        key = os.path.abspath(path)
        if key in seen:
            raise InvalidInputError(f"The {what} and the {seen[key]} would both be written to {path!r}.")
        seen[key] = what
    if args.figure is not None and Path(args.figure).suffix.lower() not in (".png", ".pdf"):
        raise InvalidInputError(f"The figure file must end in .png or .pdf. Got {args.figure!r} instead.")
    if args.operator_cache is not None:
        check_output_path(args.operator_cache, overwrite=True)
    if args.map2 is None and (args.mask2 or args.beam2 or args.beam2_fwhm):
        raise InvalidInputError("--mask2, --beam2 and --beam2-fwhm need a second map (MAP2).")
    check_noise_options(args)
    from cmbtools.cli.error_model import apply_error_model, check_error_options

    check_error_options(args)
    if args.covariance is not None:
        key = os.path.abspath(args.covariance)
        if key in seen:
            raise InvalidInputError(f"The covariance and the {seen[key]} would both be written to {args.covariance!r}.")
        seen[key] = "covariance"
    if args.write_noise_spectrum is not None:
        check_output_path(args.write_noise_spectrum, overwrite=args.overwrite)
        key = os.path.abspath(args.write_noise_spectrum)
        if key in seen:
            raise InvalidInputError(f"The noise table and the {seen[key]} would both be written to "
                                    f"{args.write_noise_spectrum!r}.")

    # 2. inputs (I, Q, U files: the six polarized spectra)
    from cmbtools.cli.polarized_spectrum import is_polarized_input, run_polarized

    polarized = is_polarized_input(args.map)
    if args.covariance_from is not None:  # a covariance of the other kind of map is refused before any work
        from cmbtools.spectrum.bandpower_covariance import check_covariance_spectra, read_covariance

        check_covariance_spectra(read_covariance(args.covariance_from), polarized, args.covariance_from)
    if polarized:
        return run_polarized(args, seen)
    if args.pol_mask or args.pol_mask2 or args.purify_b:
        raise InvalidInputError(f"--pol-mask, --pol-mask2 and --purify-b need I, Q, U maps; {args.map} holds one map.")
    m1, info1 = maps.read_sky_map(args.map, force=args.force)
    w1 = maps.read_mask(args.mask, force=args.force)
    check_same_nside(m1, w1, args.map, args.mask)
    m2 = info2 = w2 = None
    if args.map2 is not None:
        m2, info2 = maps.read_sky_map(args.map2, force=args.force)
        w2 = maps.read_mask(args.mask2, force=args.force) if args.mask2 else w1
        check_same_nside(m2, w2, args.map2, args.mask2 or args.mask)
        check_same_nside(m1, m2, args.map, args.map2)
    nside = info1.nside
    lmax = 3 * nside - 1 if args.lmax is None else args.lmax
    beam1 = beam_from_args(args.beam_fwhm, args.beam, lmax)
    beam2 = beam_from_args(args.beam2_fwhm, args.beam2, lmax) if args.map2 is not None else None
    noise_kind, noise_value = read_noise_inputs(args, nside, args.force)
    theory = read_spectrum_table(args.theory) if args.theory is not None else None

    binning = binning_from_args(args, bins_top(args, nside, lmax, beam1, beam2), float(np.mean(w1)))
    transfer = None
    if args.transfer is not None:
        transfer = sp.BandpowerTransfer.read_csv(args.transfer)
        try:
            transfer.check_bins(binning)
        except InvalidInputError as exc:
            raise InvalidInputError(f"{args.transfer}: {exc}") from None
    if theory is not None and theory.size < binning.lmax + 1:
        # the figure needs it: found now, before any work, not after the table is written
        raise InvalidInputError(
            f"The --theory table {args.theory!r} stops at ell={theory.size - 1}; the bins reach ell={binning.lmax} "
            "(give a longer table, or a lower --lmax)."
        )

    # missing pixels inside the mask: drop them from the mask (and say so), by the library's one rule
    w1 = drop_missing_pixels(m1, w1, args.map, "mask", stacklevel=2)
    if m2 is not None:
        w2 = drop_missing_pixels(m2, w2, args.map2, "mask2" if args.mask2 is not None else "mask", stacklevel=2)

    templates = None
    if args.template:
        templates = []
        for path in args.template:
            t, _info = maps.read_sky_map(path, unit="K", force=args.force)
            check_same_nside(t, w1, path, args.mask)
            templates.append(t)
    sky_lmax = lmax if args.sky_lmax is None else args.sky_lmax
    if sky_lmax < lmax or sky_lmax > 8 * nside:
        raise InvalidInputError(f"--sky-lmax must be in [{lmax}, {8 * nside}] (lmax to 8 nside). Got {sky_lmax} instead.")
    kwargs = dict(
        templates=templates,
        sky_lmax=sky_lmax,
        guess_cl=theory if theory is not None and theory.size > sky_lmax else None,
        correct_deprojection_bias=not args.no_deprojection_correction,
        averaged_pixels=pixel_model_from_args(args),
        lmax=lmax,
        mask2=w2,
        beam=beam1,
        beam2=beam2,
        pixel_window=not args.no_pixel_window,
        remove_monopole_dipole=not args.keep_monopole_dipole,
        coupling="fast" if args.fast_coupling else "exact",
        nthreads=args.threads or None,
        force=args.force,
    )
    if args.operator_cache is not None:
        cache_before = _file_identity(args.operator_cache)
        est = sp.SpectrumEstimator.load_or_build(args.operator_cache, w1, binning, **kwargs)
        if cache_before is None:
            cache_text = f"built and saved ({args.operator_cache})"
        elif cache_before == _file_identity(args.operator_cache):
            cache_text = f"reused ({args.operator_cache})"
        else:
            cache_text = f"rebuilt, the file held another estimator ({args.operator_cache})"
    else:
        est = sp.SpectrumEstimator(w1, binning, **kwargs)
    raw = None
    if m2 is not None:
        bp = est.estimate(m1, m2)
    else:
        bp, raw = subtract_noise(est, m1, noise_kind, noise_value, args)
    noise_maps_for_errors = noise_value if noise_kind == "maps" else None
    filtered_theory = theory
    if transfer is not None and theory is not None:
        # the error model describes the measured (filtered) bandpowers: its signal is the theory times F_b
        filtered_theory = theory.copy()
        for lo, hi, f in zip(transfer.ell_min, transfer.ell_max, transfer.transfer):
            filtered_theory[lo: hi + 1] *= f
    bp, covariance, errors_text = apply_error_model(args, est, bp, raw, filtered_theory, noise_maps_for_errors,
                                                    cross=m2 is not None, nside=nside)
    measured = bp  # before the transfer correction: the noise bias table is of the measured power
    # a simulated covariance of `validate --transfer`: already of corrected bandpowers
    corrected_key = corrected_covariance_key(covariance, transfer, args.covariance_from, args.transfer)
    if transfer is not None:
        bp = transfer.apply(bp).with_metadata(transfer_file=str(args.transfer),
                                              transfer_file_sha256=sha256_file(args.transfer))
        if corrected_key is not None:  # the errors and covariance describe the corrected bandpowers already
            bp = dataclasses.replace(bp, cl_err=measured.cl_err, dl_err=measured.dl_err,
                                     covariance=measured.covariance)
        elif covariance is not None:
            covariance = transfer.apply_to_covariance(covariance)

    # 3. record the files
    meta = {"map": str(args.map), "map_sha256": info1.sha256, "mask_file": str(args.mask),
            "mask_file_sha256": sha256_file(args.mask)}
    if m2 is not None:
        meta.update({"map2": str(args.map2), "map2_sha256": info2.sha256})
        if args.mask2:
            meta.update({"mask2_file": str(args.mask2), "mask2_file_sha256": sha256_file(args.mask2)})
    if args.beam is not None:
        meta["beam_file"] = str(args.beam)
    if args.beam2 is not None:
        meta["beam2_file"] = str(args.beam2)
    if args.noise_spectrum is not None:
        meta["noise_spectrum_file"] = str(args.noise_spectrum)
        meta["noise_spectrum_file_sha256"] = sha256_file(args.noise_spectrum)
    for i, path in enumerate(args.noise_maps or args.half_difference or (), start=1):
        meta[f"noise_map{i}"] = str(path)
        meta[f"noise_map{i}_sha256"] = sha256_file(path)
    if args.theory is not None:
        meta["theory_file"] = str(args.theory)
    bp = bp.with_metadata(**meta)

    # 4. outputs: all of them or none (staged beside their destinations, published together at the end)
    from cmbtools._core.files import OutputGroup

    ow = args.overwrite
    with OutputGroup() as outputs:
        outputs.write(args.output, lambda p: bp.write_csv(p, overwrite=True, unit=args.unit), overwrite=ow)
        if args.fits is not None:
            outputs.write(args.fits, lambda p: bp.write_fits(p, overwrite=True, unit=args.unit), overwrite=ow)
        if args.figure is not None:
            outputs.write(args.figure, lambda p: bp.plot(p, theory_cl=theory, overwrite=True), overwrite=ow)
        if args.covariance is not None:
            if covariance is None:
                from cmbtools.spectrum import BandpowerCovariance

                covariance = BandpowerCovariance(bp.ell_min, bp.ell_max, bp.ell_eff, np.diag(bp.cl_err**2),
                                                 kind="knox")
            if covariance.windows is None:
                windows = est.cross_bandpower_windows if m2 is not None else est.bandpower_windows
                covariance = dataclasses.replace(covariance, windows=windows)
            outputs.write(args.covariance, lambda p: covariance.write(p, overwrite=True), overwrite=ow)
        if args.write_noise_spectrum is not None:
            table = noise_bias_table(est, measured, raw, noise_kind, args)
            outputs.write(args.write_noise_spectrum, lambda p: table.write_csv(p, overwrite=True, unit=args.unit),
                          overwrite=ow)
    written = outputs.paths

    kind = "cross-spectrum" if m2 is not None else "auto-spectrum"
    what = f"{args.map} x {args.map2}" if m2 is not None else str(args.map)
    print(f"{kind} of {what}: nside {nside}, lmax {est.lmax}")
    if w2 is not None and args.mask2:
        print(f"  sky fraction: mask 1 f_sky {est.f_sky:.3f}, mask 2 f_sky {float(np.mean(w2)):.3f}; "
              f"cross-spectrum f_sky_eff {est.f_sky_eff_cross:.3f}")
    else:
        print(f"  sky fraction: f_sky {est.f_sky:.3f}, f_sky_eff {bp.metadata['f_sky_eff']:.3f}")
    print(f"  {describe_binning(binning)}")
    print(f"  beam: {bp.metadata['beam']}; pixel window: {bp.metadata['pixel_window']}; "
          f"coupling: {bp.metadata['coupling']} (condition number {est.condition_number:.3g})")
    if noise_kind is not None:
        source = (args.noise_spectrum if args.noise_spectrum is not None else
                  f"{len(args.noise_maps)} noise map(s)" if args.noise_maps else
                  f"half-difference of {args.half_difference[0]} and {args.half_difference[1]}")
        print(f"  noise bias subtracted: {source}")
    print(f"  errors: {errors_text}")
    if transfer is not None:
        print(f"  transfer: bandpowers, errors and covariance divided by F_b of {args.transfer} "
              f"({float(transfer.transfer.min()):.4g} to {float(transfer.transfer.max()):.4g})")
    if args.operator_cache is not None:
        print(f"  operator cache: {cache_text}")
    for p in written:
        print(f"  wrote {p}")
    print_range_warning(args)
    return 0
