"""``cmbtools inspect``: describe a HEALPix map file."""

from __future__ import annotations

import argparse

from cmbtools.cli.common import add_force, add_overwrite, non_negative_int

HELP = "describe a map: resolution, unit, missing pixels, monopole, dipole, range"
DESCRIPTION = """\
Describe a HEALPix map file: nside, ordering, unit and coordinate system found
in the file, the number of missing pixels, the monopole and dipole (weighted
least squares over the valid pixels, or over those a mask keeps), and the
minimum, maximum and rms of the pixels used.  Temperatures are printed in
uK_CMB.  Optionally draws the map (monopole and dipole removed) to a PNG or PDF file: the
whole sky and a close-up of the observed patch, with a labelled colour bar.

examples:
  cmbtools inspect map.fits
  cmbtools inspect map.fits --mask mask.fits --figure map.png
"""

_COORD_WORDS = {"G": "galactic", "C": "equatorial", "E": "ecliptic"}


def add_arguments(parser):
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.add_argument("map", metavar="MAP", help="HEALPix FITS map")
    parser.add_argument("--mask", metavar="MASK", help="use only the pixels this mask keeps (weighted by it)")
    parser.add_argument("--field", type=non_negative_int, default=0, metavar="N",
                        help="map column to read, numbered from 0 (default 0)")
    parser.add_argument("--unit", metavar="UNIT",
                        help="unit of the values in the file, overriding its header (K, mK, uK, K_CMB, ...)")
    parser.add_argument("--figure", metavar="PNG", help="draw the map (whole sky and a close-up of the observed patch) to this PNG or PDF file")
    add_overwrite(parser)
    add_force(parser)


def run(args) -> int:
    from pathlib import Path

    import numpy as np

    from cmbtools import maps
    from cmbtools._core.files import check_output_path
    from cmbtools._core.checks import check_same_nside
    from cmbtools.exceptions import IllConditionedError, InputFileError, ResolutionMismatchError

    if args.figure is not None:
        check_output_path(args.figure, overwrite=args.overwrite)
    m, info = maps.read_sky_map(args.map, column=args.field, unit=args.unit, force=args.force)
    missing = maps.missing_pixels(m)
    if missing.all():
        raise InputFileError(info.path, f"has no valid pixel: all {m.size} pixels are missing (UNSEEN, NaN or inf)")
    if args.mask is not None:
        w = maps.read_mask(args.mask, force=args.force)
        try:
            check_same_nside(m, w, "map", "mask")
        except ResolutionMismatchError as exc:
            raise ResolutionMismatchError(
                f"The 'map' has nside {exc.nside_a} but the 'mask' has nside {exc.nside_b}; change the mask's "
                f"resolution first: cmbtools mask --from-mask {args.mask} --nside {exc.nside_a} -o NEW_MASK.fits",
                exc.nside_a, exc.nside_b,
            ) from None
        weights = np.where(missing, 0.0, w)
    else:
        weights = np.where(missing, 0.0, 1.0)
    used = weights > 0

    print(f"{'file':<18}{info.path}")
    print(f"{'nside':<18}{info.nside} ({info.npix} pixels)")
    print(f"{'ordering':<18}{info.ordering_in_file} in the file (RING in memory)")
    unit_text = args.unit if args.unit is not None else info.unit_in_file
    print(f"{'unit':<18}{unit_text or 'none stated, K_CMB assumed'} (converted to K_CMB)")
    coord = f"{info.coord} ({_COORD_WORDS[info.coord]})" if info.coord else "not stated"
    print(f"{'coordinates':<18}{coord}")
    print(f"{'layout':<18}{'partial sky, explicit pixel list' if info.is_partial else 'full sky'}, {info.dtype_in_file}")
    print(f"{'missing pixels':<18}{info.n_missing} ({100.0 * info.n_missing / info.npix:.2f}%)")
    if not used.any():
        print(f"{'pixels used':<18}0: nothing to describe")
        return 0
    f_sky = float(weights.mean())
    print(f"{'pixels used':<18}{int(used.sum())} (f_sky {f_sky:.4f}{', weighted by the mask' if args.mask else ''})")
    fit = None
    try:
        fit = maps.fit_monopole_dipole(m, weights)
    except IllConditionedError as exc:
        print(f"{'monopole, dipole':<18}not constrained by the pixels used ({exc})")
    else:
        print(f"{'monopole':<18}{fit.monopole * 1e6:.4f} uK_CMB")
        if fit.amplitude > 0:
            print(f"{'dipole':<18}{fit.amplitude * 1e6:.4f} uK_CMB towards lon {fit.lon_deg:.2f}, "
                  f"lat {fit.lat_deg:.2f} deg")
        else:
            print(f"{'dipole':<18}0")
    v = m[used] * 1e6
    print(f"{'min / max':<18}{v.min():.4f} / {v.max():.4f} uK_CMB")
    print(f"{'rms':<18}{float(np.sqrt(np.mean(v * v))):.4f} uK_CMB (std {float(v.std()):.4f})")
    if args.figure is not None:
        from cmbtools.maps.sky_view import draw_sky_view

        where = "the pixels the mask keeps" if args.mask else "the valid pixels"
        if fit is not None:
            shown = m - fit.evaluate(info.nside)
            caption = (f"Removed before drawing: the monopole ({fit.monopole * 1e6:.2f} uK) and the dipole "
                       f"({fit.amplitude * 1e6:.2f} uK) fitted on {where}. ")
        else:
            shown = m
            caption = "Nothing removed: the monopole and dipole are not constrained by the pixels used. "
        caption += "Light grey: " + ("pixels the mask leaves out or that are missing." if args.mask
                                     else "missing pixels.")
        draw_sky_view(args.figure, shown, used, title=f"{Path(info.path).name}: nside {info.nside}",
                      caption=caption, overwrite=args.overwrite)
        print(f"{'figure':<18}{args.figure}")
    return 0
