"""The error-bar options of `cmbtools spectrum`: Gaussian covariance (default), Knox, or a covariance file."""

from __future__ import annotations

from cmbtools.cli.common import positive_float

__all__ = ["add_error_options", "check_error_options", "apply_error_model"]


def add_error_options(parser):
    """Add the error-model options (a group) to ``parser``."""
    g = parser.add_argument_group(
        "error bars and covariance",
        "default: the Gaussian covariance of the bandpowers (improved narrow-kernel approximation), with the noise "
        "described per pixel by --noise-variance or --hits/--noise-depth (per map of a cross-spectrum), or by "
        "--noise-maps; its diagonal gives cl_err/dl_err")
    g.add_argument("--errors", choices=("gaussian", "knox"), default="gaussian",
                   help="error model: the Gaussian covariance (default) or the Knox formula with f_sky_eff (cheaper)")
    g.add_argument("--noise-variance", metavar="MAP", help="noise variance of every pixel of MAP (K^2, FITS map)")
    g.add_argument("--noise-variance2", metavar="MAP", help="noise variance of every pixel of MAP2")
    g.add_argument("--hits", metavar="MAP", help="hits map shaping the noise of MAP (with --noise-depth)")
    g.add_argument("--noise-depth", type=positive_float, metavar="UK_ARCMIN",
                   help="white-noise depth of MAP in uK-arcmin (uniform, or shaped by --hits)")
    g.add_argument("--hits2", metavar="MAP", help="hits map shaping the noise of MAP2 (with --noise-depth2)")
    g.add_argument("--noise-depth2", type=positive_float, metavar="UK_ARCMIN", help="white-noise depth of MAP2")
    g.add_argument("--covariance-from", metavar="FILE",
                   help="take the errors from this covariance file (.npz/.fits, e.g. RUN_DIR/covariance.npz of "
                        "`cmbtools validate`) instead")
    g.add_argument("--covariance", metavar="OUT", help="write the full covariance and the bandpower windows (.npz or .fits)")


def check_error_options(args):
    """Refuse inconsistent error options (before any work)."""
    from pathlib import Path

    from cmbtools._core.files import check_output_path
    from cmbtools.exceptions import InvalidInputError

    for suffix in ("", "2"):
        if getattr(args, "hits" + suffix) is not None and getattr(args, "noise_depth" + suffix) is None:
            raise InvalidInputError(f"--hits{suffix} needs --noise-depth{suffix} (the depth that the hits map shapes).")
        if getattr(args, "noise_variance" + suffix) is not None and getattr(args, "noise_depth" + suffix) is not None:
            raise InvalidInputError(f"Give --noise-variance{suffix} or --noise-depth{suffix}, not both.")
    if args.map2 is None and (args.noise_variance2 or args.hits2 or args.noise_depth2):
        raise InvalidInputError("--noise-variance2, --hits2 and --noise-depth2 need a second map (MAP2).")
    if args.covariance_from is not None and args.errors == "knox":
        raise InvalidInputError("Give --covariance-from or --errors knox, not both.")
    if args.covariance is not None:
        if Path(args.covariance).suffix.lower() not in (".npz", ".fits"):
            raise InvalidInputError(f"The covariance file must end in .npz or .fits. Got {args.covariance!r} instead.")
        check_output_path(args.covariance, overwrite=args.overwrite)


def _pixel_noise(args, suffix, nside, force):
    from cmbtools import maps
    from cmbtools.spectrum import PixelNoise

    variance = getattr(args, "noise_variance" + suffix)
    if variance is not None:
        v, info = maps.read_map(variance, force=force)
        if info.nside != nside:
            from cmbtools.exceptions import ResolutionMismatchError

            raise ResolutionMismatchError(f"{variance}: the noise variance map has nside {info.nside} but the map "
                                          f"has nside {nside}.", info.nside, nside)
        return PixelNoise(v, None, f"variance map {variance}")
    depth = getattr(args, "noise_depth" + suffix)
    if depth is None:
        return None
    hits = getattr(args, "hits" + suffix)
    if hits is None:
        return PixelNoise.uniform(nside, depth)
    h, info = maps.read_map(hits, force=force)
    if info.nside != nside:
        from cmbtools.exceptions import ResolutionMismatchError

        raise ResolutionMismatchError(f"{hits}: the hits map has nside {info.nside} but the map has nside {nside}.",
                                      info.nside, nside)
    return PixelNoise.from_hits(h, depth)


def apply_error_model(args, est, bp, raw, theory, noise_maps, *, cross, nside):
    """Replace the errors of ``bp`` by the chosen model; return ``(bandpowers, covariance or None, text)``."""
    import dataclasses

    import numpy as np

    from cmbtools.exceptions import InvalidInputError
    from cmbtools.spectrum import GaussianCovariance, PixelNoise, read_covariance

    if args.errors == "knox":
        return bp, None, "Knox formula with f_sky_eff"
    if args.covariance_from is not None:
        cov = read_covariance(args.covariance_from)
        if not cov.matches(bp):
            raise InvalidInputError(f"{args.covariance_from}: the covariance has other bins than the bandpowers "
                                    f"({cov.n_bins} bins from ell {int(cov.ell_min[0])}); use the same binning.")
        text = f"{cov.kind} covariance from {args.covariance_from}"
    else:
        noise1 = _pixel_noise(args, "", nside, args.force)
        if noise1 is None and noise_maps and len(noise_maps) >= 2:
            noise1 = PixelNoise.from_noise_maps(noise_maps)
        noise2 = _pixel_noise(args, "2", nside, args.force) if cross else None
        if cross and (noise1 is None or noise2 is None):
            # the noise of each map enters a cross-spectrum's errors through its auto-spectrum: without its
            # description per pixel, the Knox formula (with the measured auto-spectra) is the better estimate
            return bp, None, "Knox formula with f_sky_eff (describe each map's noise for the Gaussian covariance)"
        gauss = GaussianCovariance(est, noise=noise1, noise2=noise2, cross=cross, nthreads=args.threads or None)
        if not cross and noise1 is None:
            # the noise is not described pixel by pixel: the measured total power stands for signal + noise
            signal, source = (bp if raw is None else raw), "the measured bandpowers with their noise"
        elif theory is not None:
            signal, source = theory, "the --theory spectrum"
        elif not cross and (raw is None or raw is bp):  # the described noise is still in the measured power
            signal = dataclasses.replace(bp, cl=bp.cl - gauss.noise_bandpowers())
            source = "the measured bandpowers less the described noise"
        else:
            signal, source = bp, "the measured bandpowers"
        cov = gauss.covariance(signal)
        noise_text = "; ".join(n.description for n in (noise1, noise2) if n is not None)
        text = f"Gaussian covariance of {source}" + (f" (noise: {noise_text})" if noise_text else "")
    b = est.binning
    err = cov.errors
    out = dataclasses.replace(bp, cl_err=err, dl_err=err * b.dl_factor, covariance=np.array(cov.matrix))
    out = out.with_metadata(errors=text)
    return out, cov, text
