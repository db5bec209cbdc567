"""``cmbtools spectrum``: bandpowers of a masked map (or the cross-spectrum of two maps)."""

from __future__ import annotations

import argparse

from cmbtools.cli.common import add_force, add_overwrite, add_threads, positive_float, positive_int

HELP = "measure the angular power spectrum of a masked map (pseudo-Cl with mode-coupling correction)"
DESCRIPTION = """\
Measure the angular power spectrum of a masked HEALPix map: the monopole and
dipole are fitted and removed on the masked sky, the pseudo-Cl of the masked
map is corrected for the mask's mode coupling (MASTER), the beam and the
HEALPix pixel window are deconvolved, and the result is averaged into bins.
With two maps it measures their cross-spectrum, which has no noise bias when
the two noises are independent.  Error bars: Knox formula with the effective
sky fraction of the mask.

The table (CSV) records the inputs in '# key: value' header lines, then the
columns ell_min,ell_max,ell_eff,cl,cl_err,dl,dl_err (uK^2 by default).

Spectrum files are text tables with a header line naming the columns,
separated by commas or spaces, '#' comments.  --theory: the spectrum-table
format of cmbtools.simulate ('ell' and 'cl' or 'dl', unit as a column suffix
such as cl_k2, dl_uk2 or in a '# unit: uK^2' comment; cl without a unit is
K^2).  --noise-spectrum: 'ell' and 'nl' (or 'cl'), in K^2 unless a comment
line says '# unit: uK^2'.

Before the mask transforms and the mode-coupling matrix are computed, their
memory is estimated; the command stops if it exceeds what the machine has
available, and --force goes ahead anyway.

examples:
  cmbtools spectrum tern_map.fits --mask tern_mask.fits --beam-fwhm 25 -o tern_spectrum.csv
  cmbtools spectrum half1.fits half2.fits --mask tern_mask.fits --beam-fwhm 25 \\
      --bin-width 20 -o cross.csv --figure cross.png
"""


def add_arguments(parser):
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.add_argument("map", metavar="MAP", help="HEALPix FITS map (K_CMB or a unit named in its header)")
    parser.add_argument("map2", metavar="MAP2", nargs="?", help="second map: measure the cross-spectrum MAP x MAP2")
    parser.add_argument("--mask", metavar="MASK", required=True, help="mask (weights in [0, 1]) of MAP")
    parser.add_argument("--mask2", metavar="MASK2", help="mask of MAP2 (default: the same as MAP's)")
    parser.add_argument("--lmax", type=positive_int, metavar="N",
                        help="largest multipole of the transforms (default 3*nside-1)")
    bins = parser.add_argument_group("bins (one of; default --bin-width 16)")
    choice = bins.add_mutually_exclusive_group()
    choice.add_argument("--bin-width", type=positive_int, metavar="W", help="bins of W multipoles from --lmin to lmax")
    choice.add_argument("--bin-edges", metavar="FILE_OR_LIST",
                        help="bin edges: bin b is edge[b] <= ell < edge[b+1]; a comma-separated list or a file of numbers")
    choice.add_argument("--log-bins", type=positive_int, metavar="N", help="about N bins evenly spaced in log(ell)")
    bins.add_argument("--lmin", type=positive_int, default=2, metavar="L",
                      help="first multipole of the first bin (default 2)")
    bins.add_argument("--bin-weighting", choices=("dl", "cl"), default="dl",
                      help="average D_l (default) or C_l inside each bin")
    beam = parser.add_argument_group("beams (default: none)")
    b1 = beam.add_mutually_exclusive_group()
    b1.add_argument("--beam-fwhm", type=positive_float, metavar="ARCMIN", help="Gaussian beam of MAP, FWHM in arcmin")
    b1.add_argument("--beam", metavar="FILE", help="beam table of MAP (columns ell,b_ell)")
    b2 = beam.add_mutually_exclusive_group()
    b2.add_argument("--beam2-fwhm", type=positive_float, metavar="ARCMIN",
                    help="Gaussian beam of MAP2 (default: the same as MAP's)")
    b2.add_argument("--beam2", metavar="FILE", help="beam table of MAP2")
    parser.add_argument("--no-pixel-window", action="store_true", help="do not deconvolve the HEALPix pixel window")
    parser.add_argument("--keep-monopole-dipole", action="store_true",
                        help="do not fit and remove the monopole and dipole before the transform")
    parser.add_argument("--noise-spectrum", metavar="FILE",
                        help="noise spectrum N_l of MAP as observed (columns ell and nl or cl), subtracted from the auto-spectrum")
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


def _bin_edges(text):
    """The --bin-edges value: a file of edges (read by the library) or the edges themselves."""
    import numpy as np
    from pathlib import Path

    from cmbtools.exceptions import InvalidInputError
    from cmbtools.spectrum.binning import read_bin_edges

    if Path(text).is_file():
        return read_bin_edges(text)
    try:
        return np.array([float(c) for c in text.replace(",", " ").split()])
    except ValueError:
        raise InvalidInputError(
            f"The bin edges from --bin-edges must be whole numbers separated by commas or spaces. Got {text!r}."
        ) from None


# ----------------------------------------------------------------------------- run


def run(args) -> int:
    import os
    from pathlib import Path

    from cmbtools import maps
    from cmbtools import spectrum as sp
    from cmbtools._core.files import check_output_path, sha256_file
    from cmbtools._core.checks import check_same_nside
    from cmbtools._core.tables import read_noise_spectrum_table, read_spectrum_table
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
    if args.map2 is not None and args.noise_spectrum is not None:
        raise InvalidInputError("--noise-spectrum applies to an auto-spectrum only; a cross-spectrum has no noise bias.")

    # 2. inputs
    m1, info1 = maps.read_map(args.map, force=args.force)
    w1 = maps.read_mask(args.mask, force=args.force)
    check_same_nside(m1, w1, args.map, args.mask)
    m2 = info2 = w2 = None
    if args.map2 is not None:
        m2, info2 = maps.read_map(args.map2, force=args.force)
        w2 = maps.read_mask(args.mask2, force=args.force) if args.mask2 else w1
        check_same_nside(m2, w2, args.map2, args.mask2 or args.mask)
        check_same_nside(m1, m2, args.map, args.map2)
    nside = info1.nside
    lmax = 3 * nside - 1 if args.lmax is None else args.lmax

    def beam_of(fwhm, path):
        if fwhm is not None:
            return float(fwhm)
        if path is not None:
            return sp.read_beam(path, lmax=lmax)
        return None

    beam1 = beam_of(args.beam_fwhm, args.beam)
    beam2 = beam_of(args.beam2_fwhm, args.beam2) if args.map2 is not None else None
    noise_cl = None
    if args.noise_spectrum is not None:
        noise_cl = read_noise_spectrum_table(args.noise_spectrum)
    theory = read_spectrum_table(args.theory) if args.theory is not None else None

    if args.bin_edges is not None:
        binning = sp.Binning.from_edges(_bin_edges(args.bin_edges), weighting=args.bin_weighting)
    elif args.log_bins is not None:
        binning = sp.Binning.log_spaced(max(args.lmin, 1), lmax, args.log_bins, weighting=args.bin_weighting)
    else:
        binning = sp.Binning.uniform(args.lmin, lmax, args.bin_width or 16, weighting=args.bin_weighting)

    # missing pixels inside the mask: drop them from the mask (and say so), by the library's one rule
    w1 = drop_missing_pixels(m1, w1, args.map, "mask", stacklevel=2)
    if m2 is not None:
        w2 = drop_missing_pixels(m2, w2, args.map2, "mask2" if args.mask2 is not None else "mask", stacklevel=2)

    kwargs = dict(
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
        est = sp.SpectrumEstimator.load_or_build(args.operator_cache, w1, binning, **kwargs)
    else:
        est = sp.SpectrumEstimator(w1, binning, **kwargs)
    bp = est.estimate(m1, m2, noise_cl=noise_cl)

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
    if args.theory is not None:
        meta["theory_file"] = str(args.theory)
    bp = bp.with_metadata(**meta)

    # 4. outputs
    written = [bp.write_csv(args.output, overwrite=args.overwrite, unit=args.unit)]
    if args.fits is not None:
        written.append(bp.write_fits(args.fits, overwrite=args.overwrite, unit=args.unit))
    if args.figure is not None:
        written.append(bp.plot(args.figure, theory_cl=theory, overwrite=args.overwrite))

    kind = "cross-spectrum" if m2 is not None else "auto-spectrum"
    what = f"{args.map} x {args.map2}" if m2 is not None else str(args.map)
    print(f"{kind} of {what}: nside {nside}, lmax {est.lmax}")
    print(f"  sky fraction: f_sky {est.f_sky:.3f}, f_sky_eff {bp.metadata['f_sky_eff']:.3f}")
    widths = sorted(set(binning.n_ell.tolist()))
    width_text = f"{widths[0]}" if len(widths) == 1 else f"{widths[0]}-{widths[-1]}"
    print(f"  {binning.n_bins} bins of {width_text} multipoles (ell {binning.lmin}-{binning.lmax}), "
          f"{binning.weighting.upper()[0]}{binning.weighting[1:]} weighting")
    print(f"  beam: {bp.metadata['beam']}; pixel window: {bp.metadata['pixel_window']}; "
          f"coupling: {bp.metadata['coupling']} (condition number {est.condition_number:.3g})")
    if noise_cl is not None:
        print(f"  noise bias subtracted: {args.noise_spectrum}")
    for p in written:
        print(f"  wrote {p}")
    return 0
