"""Argument helpers shared by the subcommands."""

from __future__ import annotations

import argparse

__all__ = [
    "add_overwrite", "add_force", "add_threads", "positive_float", "positive_int", "non_negative_int", "finite_float",
    "bounded_int", "add_pixel_model", "pixel_model_from_args", "add_binning", "binning_from_args", "bins_top", "print_range_warning", "bin_edges", "deprecated_alias",
    "corrected_covariance_key", "MAX_THREADS", "MAX_SIMULATIONS",
]


#: Upper bounds of counts given on the command line.
MAX_THREADS = 1024
from cmbtools._core.checks import MAX_SIMULATIONS  # noqa: E402  (one bound for the library and the CLI)


def add_overwrite(parser):
    parser.add_argument("--overwrite", action="store_true", help="replace output files that already exist")


def add_force(parser):
    parser.add_argument(
        "--force", action="store_true",
        help="go ahead even when the memory estimate exceeds what the machine has available",
    )


def add_threads(parser):
    parser.add_argument(
        "--threads", type=bounded_int(MAX_THREADS), default=0, metavar="N",
        help="threads for the transforms (default: all cores)",
    )


def positive_float(text):
    v = finite_float(text)
    if not v > 0:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return v


def non_negative_int(text):
    """An argparse type: a whole number >= 0 (seeds, indices, counts where 0 means 'the default')."""
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"expected a non-negative whole number, got {text!r}")
    return v


def positive_int(text):
    """An argparse type: a whole number >= 1 (widths, numbers of bins, nside, lmax)."""
    v = non_negative_int(text)
    if v < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number of at least 1, got {text!r}")
    return v


def bounded_int(maximum):
    """An argparse type: a whole number in [0, maximum] (a bound that keeps a typo from exhausting memory)."""
    def parse(text):
        v = non_negative_int(text)
        if v > maximum:
            raise argparse.ArgumentTypeError(f"expected at most {maximum}, got {text!r}")
        return v

    parse.__name__ = "whole number"
    return parse


def finite_float(text):
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if v != v or v in (float("inf"), float("-inf")):
        raise argparse.ArgumentTypeError(f"expected a finite number, got {text!r}")
    return v


class _DeprecatedAlias(argparse.Action):
    """Store under the new option's name and warn that the old spelling goes away."""

    def __init__(self, option_strings, dest, new_name=None, **kwargs):
        self.new_name = new_name
        super().__init__(option_strings, dest, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        import sys

        print(f"cmbtools: warning: {option_string} is deprecated and will be removed; use {self.new_name}",
              file=sys.stderr)
        setattr(namespace, self.dest, True if self.nargs == 0 else values)


def deprecated_alias(parser, old, new, dest, **kwargs):
    """Accept the option ``old`` as a hidden, deprecated spelling of ``new`` (same destination)."""
    parser.add_argument(old, dest=dest, action=_DeprecatedAlias, new_name=new, help=argparse.SUPPRESS, **kwargs)


# ----------------------------------------------------------------------------- monopole and dipole (simulate, validate)

#: Direction of a dipole given by its amplitude alone (``--dipole UK``): galactic-style (lon, lat) in degrees.
DIPOLE_DIRECTION = (60.0, 30.0)


def add_monopole_dipole(parser, monopole_default, dipole_default):
    """``--monopole UK`` and ``--dipole UK [LON LAT]``: the same options for every command that adds them."""
    parser.add_argument("--monopole", type=finite_float, metavar="UK",
                        help=f"monopole added to every sky, uK ({monopole_default})")
    parser.add_argument("--dipole", type=finite_float, nargs="+", metavar=("UK", "LON LAT"),
                        help=f"dipole of amplitude UK added to every sky, towards (LON, LAT) degrees, by default "
                             f"({DIPOLE_DIRECTION[0]:g}, {DIPOLE_DIRECTION[1]:g}) ({dipole_default})")


def monopole_dipole_from_args(args, monopole_default, dipole_default):
    """(monopole in K, :class:`~cmbtools.simulate.Dipole` or None) from ``--monopole`` and ``--dipole``.

    Raises InvalidInputError (one line, exit status 2) for a count of dipole values other than 1 or 3 and for
    values beyond 1e9 uK.
    """
    from cmbtools.exceptions import InvalidInputError
    from cmbtools.simulate import Dipole

    monopole = monopole_default if args.monopole is None else args.monopole
    values = [dipole_default] if args.dipole is None else list(args.dipole)
    if len(values) not in (1, 3):
        raise InvalidInputError(f"--dipole takes UK or UK LON LAT (amplitude in uK, direction in degrees). "
                                f"Got {len(values)} values instead.")
    amplitude, (lon, lat) = values[0], (values[1:] if len(values) == 3 else DIPOLE_DIRECTION)
    for name, value in (("--monopole", monopole), ("--dipole", amplitude)):
        if abs(value) > 1e9:
            raise InvalidInputError(f"{name} must be a finite number of uK below 1e9. Got {value!r} instead.")
    dipole = Dipole(amplitude * 1e-6, lon, lat) if amplitude else None
    return monopole * 1e-6, dipole


def beam_from_args(fwhm, path, lmax):
    """The beam of a ``--beam-fwhm``/``--beam`` pair (or ``--beam2-fwhm``/``--beam2``): the FWHM in arcmin, the
    table's B_l to ``lmax``, or None when neither is given."""
    if fwhm is not None:
        return float(fwhm)
    if path is not None:
        from cmbtools.spectrum.beams import read_beam

        return read_beam(path, lmax=lmax)
    return None


def noise_model_from_args(args):
    """The :class:`~cmbtools.simulate.NoiseModel` of ``--noise-depth``, ``--hits`` (relative weights with no unit:
    the map's values as they are), ``--noise-knee`` and ``--noise-slope``; None without ``--noise-depth``
    (``simulate`` and ``validate``, both kinds)."""
    if args.noise_depth is None:
        return None
    from cmbtools.maps import read_sky_map
    from cmbtools.simulate import NoiseModel

    hits = None if args.hits is None else read_sky_map(args.hits, unit="K", force=args.force)[0]
    return NoiseModel(args.noise_depth, hits=hits, ell_knee=args.noise_knee, alpha=args.noise_slope)


# ----------------------------------------------------------------------------- pixels (spectrum and validate)


def add_pixel_model(parser, default_text):
    """What the maps' pixels hold (``spectrum`` and ``validate``): ``--averaged-pixels`` / ``--pixel-centre-maps``."""
    group = parser.add_mutually_exclusive_group()
    group.add_argument("--averaged-pixels", dest="pixel_model", action="store_const", const="averaged",
                       help="the maps hold the sky averaged over each pixel (a detector's map): correct, from the "
                            "guess spectrum, what the isotropic pixel window leaves out (the shapes of the pixels "
                            "under the mask, about 1 %% near 1.5-2.5 nside). " + default_text)
    group.add_argument("--pixel-centre-maps", dest="pixel_model", action="store_const", const="centres",
                       help="the maps hold the sky sampled at the pixel centres (maps synthesised from "
                            "coefficients, e.g. cmbtools simulate without --pixelise): the isotropic pixel window alone, no averaged-pixel "
                            "correction")


def pixel_model_from_args(args, default=None):
    """``averaged_pixels`` of the estimator from ``--averaged-pixels`` / ``--pixel-centre-maps`` (else ``default``)."""
    model = getattr(args, "pixel_model", None)
    if model is None:
        return default
    return model == "averaged"


# ----------------------------------------------------------------------------- bins (spectrum and validate)


def add_binning(parser):
    """The bin options shared by ``spectrum`` and ``validate``."""
    bins = parser.add_argument_group("bins (one of; default --bin-width 16)")
    choice = bins.add_mutually_exclusive_group()
    choice.add_argument("--bin-width", type=positive_int, metavar="W",
                        help="bins of W multipoles from --lmin to --lmax; without --lmax they end at the default top "
                             "of the range: 2.5 nside, or earlier where the beam keeps less than 1e-3 of the sky's "
                             "power (B_l^2), or 2 nside for a beam narrower than two pixels or none")
    choice.add_argument("--bin-edges", metavar="FILE_OR_LIST",
                        help="bin edges: bin b is edge[b] <= ell < edge[b+1]; a comma-separated list or a file of numbers")
    choice.add_argument("--log-bins", type=positive_int, metavar="N",
                        help="about N bins evenly spaced in log(ell) from --lmin to --lmax (without --lmax: to the "
                             "default top of the range, as --bin-width), none narrower than --min-bin-width")
    bins.add_argument("--min-bin-width", type=positive_int, metavar="W",
                      help="smallest width of --log-bins bins (default: 1/(2 f_sky) of the mask, at least 2)")
    bins.add_argument("--lmin", type=non_negative_int, default=2, metavar="L",
                      help="first multipole of the first bin (default 2)")
    bins.add_argument("--bin-weighting", choices=("dl", "cl"), default="dl",
                      help="average D_l (default) or C_l inside each bin")


def bin_edges(text):
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


def bins_top(args, nside, lmax, beam, beam2=None):
    """Where the bins of --bin-width/--log-bins end: lmax when --lmax is given, else the default top of the range.

    The default top (:func:`cmbtools.spectrum.sampling.default_bins_lmax`) is where the grid and the beam keep
    the estimator exact: 2.5 nside, or where B_l^2 falls below 1e-3, or 2 nside for a beam narrower than two
    pixels (or none).  Such a beam also gets one warning line, whatever the range (the aliasing is in the map):
    kept in ``args`` and printed by :func:`print_range_warning` once the command has succeeded (bad input stays
    one error line).  An explicit --lmax or --bin-edges always wins over the default.  ``beam2``: the second
    map's beam when it has its own (the narrower beam decides).
    """
    from cmbtools.exceptions import InvalidInputError
    from cmbtools.spectrum.sampling import default_bins_lmax, narrow_beam_message

    explicit = None
    if getattr(args, "bin_edges", None) is not None:
        explicit = "--bin-edges"
    elif args.lmax is not None:
        explicit = f"--lmax {lmax}"
    beams = [beam] if beam2 is None else [beam, beam2]
    message = next((m for m in (narrow_beam_message(nside, b) for b in beams) if m is not None), None)
    if message is not None:
        args.range_warning = message + ("" if explicit is None else f" (the bins of {explicit} are used)")
    if explicit is not None:
        return lmax
    top = min(default_bins_lmax(nside, b, lmax) for b in beams)
    if args.lmin > top:
        raise InvalidInputError(
            f"--lmin ({args.lmin}) is above the default top of the bins ({top}, see --bin-width); give --lmax to "
            "set the range yourself."
        )
    return top


def print_range_warning(args):
    """The narrow-beam warning line of :func:`bins_top`, if any, on standard error (at the end of a command)."""
    import sys

    message = getattr(args, "range_warning", None)
    if message is not None:
        print(f"cmbtools: warning: {message}", file=sys.stderr)


def binning_from_args(args, lmax, f_sky):
    """The Binning the options of :func:`add_binning` ask for; ``f_sky`` sets the default smallest log-bin width.

    ``lmax`` is where the bins end (:func:`bins_top`).
    """
    import math

    from cmbtools.exceptions import InvalidInputError
    from cmbtools.spectrum import Binning

    if args.min_bin_width is not None and args.log_bins is None:
        raise InvalidInputError("--min-bin-width applies to --log-bins only.")
    if args.bin_edges is not None:
        return Binning.from_edges(bin_edges(args.bin_edges), weighting=args.bin_weighting)
    if args.log_bins is not None:
        lmin = max(args.lmin, 1)
        width = args.min_bin_width
        if width is None:
            width = max(2, math.ceil(0.5 / f_sky)) if f_sky > 0 else 2
            width = min(width, max(1, lmax - lmin + 1))
        return Binning.log_spaced(lmin, lmax, args.log_bins, min_width=width, weighting=args.bin_weighting)
    return Binning.uniform(args.lmin, lmax, 16 if args.bin_width is None else args.bin_width,
                           weighting=args.bin_weighting)


def describe_binning(binning) -> str:
    """'16 bins of 22-24 multipoles (ell 2-383), Dl weighting'."""
    widths = sorted(set(binning.n_ell.tolist()))
    width_text = f"{widths[0]}" if len(widths) == 1 else f"{widths[0]}-{widths[-1]}"
    return (f"{binning.n_bins} bins of {width_text} multipoles (ell {binning.lmin}-{binning.lmax}), "
            f"{binning.weighting.upper()[0]}{binning.weighting[1:]} weighting")


# ----------------------------------------------------------------------------- covariance and transfer files


def corrected_covariance_key(covariance, transfer, covariance_path, transfer_path=None):
    """The transfer key recorded by a covariance of corrected bandpowers (None for a covariance of measured ones).

    A covariance of bandpowers already divided by a transfer function (``validate --transfer``, or ``spectrum
    --transfer --covariance``) records ``bandpower_transfer_key``; it is used with the same transfer table only,
    else one error line (``spectrum`` on temperature and on I, Q, U maps).

    Parameters
    ----------
    covariance : BandpowerCovariance or None
        The covariance (as read from ``covariance_path``).
    transfer : BandpowerTransfer, PolarizedBandpowerTransfer or None
        The table given with ``--transfer``.
    covariance_path : str
        The covariance file, for the message.
    """
    from cmbtools.exceptions import InvalidInputError

    key = None if covariance is None else covariance.settings.get("bandpower_transfer_key")
    if key is not None and (transfer is None or key != transfer.key):
        raise InvalidInputError(
            f"{covariance_path}: the covariance is of bandpowers divided by a transfer function (key {key}); give "
            "the same table with --transfer"
            + ("." if transfer is None else f" (the --transfer table{' ' + str(transfer_path) if transfer_path else ''} "
               f"has key {transfer.key}).")
        )
    return key
