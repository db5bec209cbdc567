"""``cmbtools mask``: build, apodize and describe masks."""

from __future__ import annotations

import argparse

from cmbtools.cli.common import add_force, add_overwrite, deprecated_alias, finite_float, non_negative_int, positive_float, positive_int

HELP = "build a mask (caps, latitude cut, holes, thresholds, apodization) or describe one"
DESCRIPTION = """\
Build a mask and write it as a HEALPix FITS file, or describe an existing one.

Building starts from the full sky (or from --from-mask) and multiplies in every
piece that is asked for: a kept circular patch, a latitude cut, holes around
listed positions, a threshold on a map.  The result can then be apodized.
The sky fraction and weight moments (f_sky = mean(w), w2 = mean(w^2),
w4 = mean(w^4), f_sky_eff = w2^2/w4) are printed.

--from-mask and --from-map keep their own resolution unless --nside asks for
another one (the change is then reported); two inputs of different nside
need --nside.  Before building, the memory the mask needs is compared with
what the machine has available; --force goes ahead anyway.

examples:
  cmbtools mask --nside 128 --keep-cap 250,-55,50 --holes sources.csv --hole-radius 1 \\
                --apodize cosine --apodize-width 3 -o mask.fits
  cmbtools mask --nside 64 --cut-latitude 20 -o galcut.fits
  cmbtools mask --from-map hits.fits --threshold 10 --keep-where above -o observed.fits
  cmbtools mask --info mask.fits
"""


def _cap(text):
    parts = text.split(",")
    if len(parts) != 3:
        raise argparse.ArgumentTypeError(f"expected LON,LAT,RADIUS in degrees, got {text!r}")
    try:
        lon, lat, radius = (float(p) for p in parts)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected three numbers LON,LAT,RADIUS, got {text!r}") from None
    return lon, lat, radius


def _nonneg_float(text):
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not 0 <= v < float("inf"):
        raise argparse.ArgumentTypeError(f"expected a non-negative number, got {text!r}")
    return v


def add_arguments(parser):
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    what = parser.add_argument_group("describe an existing mask")
    what.add_argument("--info", metavar="MASK", help="print the sky fraction and moments of MASK and stop")

    build = parser.add_argument_group("build a mask")
    build.add_argument("--nside", type=positive_int, help="resolution of the mask (default: that of --from-mask or --from-map)")
    build.add_argument("--coord", default="G", choices=["G", "C", "E"],
                       help="coordinate system of the mask and of the positions given (default: G, galactic)")
    build.add_argument("--from-mask", metavar="MASK", help="start from this mask file instead of the full sky")
    build.add_argument("--keep-cap", type=_cap, metavar="LON,LAT,RADIUS",
                       help="keep only the circular patch of RADIUS degrees around (LON, LAT) degrees")
    build.add_argument("--cut-latitude", type=_nonneg_float, metavar="DEG",
                       help="remove the band |latitude| < DEG")
    build.add_argument("--latitude-coord", default="G", choices=["G", "C", "E"],
                       help="system in which --cut-latitude measures latitude (default: G, galactic)")
    build.add_argument("--holes", metavar="CSV",
                       help="remove discs around the positions of a CSV file with columns lon_deg, lat_deg "
                            "and optionally radius_deg")
    build.add_argument("--hole-radius", type=positive_float, metavar="DEG",
                       help="radius of the holes, for rows of --holes without radius_deg")
    build.add_argument("--from-map", metavar="MAP", help="keep the pixels of MAP on one side of --threshold")
    build.add_argument("--field", type=non_negative_int, default=0, metavar="N",
                       help="column of --from-map to use, numbered from 0 (default 0)")
    deprecated_alias(build, "--map-field", "--field", "field", type=non_negative_int)
    build.add_argument("--threshold", type=finite_float, metavar="X",
                       help="threshold for --from-map, in the units stored in that file")
    build.add_argument("--keep-where", choices=["below", "above"], default="below",
                       help="keep pixels of --from-map below (default) or above the threshold")
    build.add_argument("--apodize", choices=["cosine", "gaussian"],
                       help="taper the mask edges: 'cosine' (smooth ramp over the true distance to the edge) "
                            "or 'gaussian' (smoothed, then zeroed outside the mask)")
    build.add_argument("--apodize-width", type=positive_float, metavar="DEG", help="width of the taper in degrees")
    build.add_argument("-o", "--output", metavar="FILE", help="FITS file to write")
    add_overwrite(parser)
    add_force(parser)


_BUILD_OPTIONS = ("nside", "from_mask", "keep_cap", "cut_latitude", "holes", "hole_radius", "from_map",
                  "threshold", "apodize", "apodize_width", "output")


def _print_moments(mom):
    print(f"{'nside':<16}{mom.nside}")
    print(f"{'pixels used':<16}{mom.n_pixels_used} of {mom.n_pixels}")
    print(f"{'f_sky':<16}{mom.f_sky:.6f}")
    print(f"{'w2':<16}{mom.w2:.6f}")
    print(f"{'w4':<16}{mom.w4:.6f}")
    print(f"{'f_sky_eff':<16}{mom.f_sky_eff:.6f}")


def _usage_error(message):
    from cmbtools.exceptions import InvalidInputError

    raise InvalidInputError(message)


def run(args) -> int:
    import warnings

    from cmbtools import maps
    from cmbtools._core.files import check_output_path
    from cmbtools._core.checks import check_nside
    from cmbtools.exceptions import CmbtoolsWarning

    if args.info is not None:
        used = [o for o in _BUILD_OPTIONS if getattr(args, o) is not None]
        if used:
            _usage_error(f"--info describes a mask and cannot be combined with --{used[0].replace('_', '-')}")
        w = maps.read_mask(args.info, force=args.force)
        print(f"{'file':<16}{args.info}")
        _print_moments(maps.mask_moments(w))
        binary = bool(((w == 0) | (w == 1)).all())
        print(f"{'weights':<16}{'binary (0 or 1)' if binary else f'weighted, {int(((w > 0) & (w < 1)).sum())} pixels strictly between 0 and 1'}")
        return 0

    if args.output is None:
        _usage_error("give -o/--output FILE for the new mask (or --info MASK to describe one)")
    if (args.from_map is None) != (args.threshold is None):
        _usage_error("--from-map and --threshold go together")
    if (args.apodize is None) != (args.apodize_width is None):
        _usage_error("--apodize and --apodize-width go together")
    if args.hole_radius is not None and args.holes is None:
        _usage_error("--hole-radius needs --holes CSV")
    check_output_path(args.output, overwrite=args.overwrite)

    # the memory check comes before reading or building anything big
    nside = None if args.nside is None else check_nside(args.nside, "--nside")
    if nside is not None:
        _check_build_memory(nside, args)
    sources = []  # (option, weights) read from files, at their own resolution
    if args.from_mask is not None:
        sources.append(("--from-mask", maps.read_mask(args.from_mask, force=args.force)))
    if args.from_map is not None:
        from cmbtools.maps.fits import read_map_values

        values = read_map_values(args.from_map, column=args.field, force=args.force)
        sources.append(("--from-map", maps.threshold_mask(values, args.threshold, keep=args.keep_where)))
    if nside is None:
        if not sources:
            _usage_error("give --nside (or --from-mask / --from-map to take the resolution from)")
        found = {option: _nside(w) for option, w in sources}
        if len(set(found.values())) > 1:
            from cmbtools.exceptions import ResolutionMismatchError

            (a, na), (b, nb) = found.items()
            raise ResolutionMismatchError(
                f"{a} has nside {na} but {b} has nside {nb}; give --nside N to build the mask at one "
                f"resolution (both are then changed to it)", na, nb,
            )
        nside = next(iter(found.values()))
        _check_build_memory(nside, args)

    with warnings.catch_warnings():
        if args.force:  # the estimate above covers the whole build: warn once, not once per step
            warnings.filterwarnings("ignore", message=".*would need about .* going ahead", category=CmbtoolsWarning)
        notes = []
        pieces = []
        for option, w in sources:
            if _nside(w) != nside:
                notes.append(f"{option} changed from nside {_nside(w)} to {nside}")
                w = maps.change_mask_resolution(w, nside, force=args.force)
            pieces.append(w)
        if args.keep_cap is not None:
            lon, lat, radius = args.keep_cap
            pieces.append(maps.cap_mask(nside, lon, lat, radius, coord=args.coord, map_coord=args.coord, force=args.force))
        if args.cut_latitude is not None:
            pieces.append(maps.latitude_cut_mask(nside, args.cut_latitude, coord=args.latitude_coord,
                                                 map_coord=args.coord, force=args.force))
        if args.holes is not None:
            pieces.append(maps.disc_mask(nside, args.holes, args.hole_radius, coord=args.coord, map_coord=args.coord,
                                         force=args.force))
        if not pieces:
            import numpy as np

            pieces.append(np.ones(12 * nside**2))
        w = maps.combine_masks(*pieces)
        del pieces
        if args.apodize is not None:
            w = maps.apodize_mask(w, args.apodize_width, taper=args.apodize)
    extra = {"MASKAPOD": (args.apodize or "none", "apodization taper")}
    if args.apodize:
        extra["MASKAPW"] = (args.apodize_width, "apodization width [deg]")
    maps.write_mask(args.output, w, coordinates=args.coord, overwrite=args.overwrite, header=extra)
    for note in notes:
        print(f"{'resolution':<16}{note}")
    print(f"{'wrote':<16}{args.output}")
    _print_moments(maps.mask_moments(w))
    return 0


def _check_build_memory(nside, args):
    """Refuse (MemoryLimitError) a build whose maps would not fit in memory, before any is allocated.

    Counted at ``nside``: one map per piece, the product, two for the pixel
    lists of the geometric pieces, three while writing, five for the cosine
    taper (distances and index lists) or a transform round trip for the
    Gaussian one.
    """
    from cmbtools._core.memory import check_memory, estimate_map_bytes, estimate_transform_bytes

    n_pieces = sum(getattr(args, o) is not None for o in ("from_mask", "from_map", "keep_cap", "cut_latitude", "holes"))
    need = estimate_map_bytes(nside, max(n_pieces, 1) + 1 + 2 + 3)
    if args.apodize == "cosine":
        need += estimate_map_bytes(nside, 5)
    elif args.apodize == "gaussian":
        need += estimate_transform_bytes(nside, 3 * nside - 1)
    check_memory(need, f"Building this mask at nside {nside}", force=args.force)


def _nside(w):
    return int(round((w.size / 12) ** 0.5))
