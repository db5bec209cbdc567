"""The noise-bias options of ``cmbtools spectrum``: a noise spectrum, noise maps or two halves, and its table.

An auto-spectrum carries the noise power of its map.  It is removed in one of three ways:

* ``--noise-spectrum FILE``: a spectrum table of N_l as observed (columns ``ell`` and ``nl``, ``cl`` or ``dl``, as
  ``cmbtools simulate --write-noise-spectrum`` writes for a noise model), or a bandpower table of the noise bias
  measured with the same bins, beam and pixel window (as ``--write-noise-spectrum`` writes);
* ``--noise-maps FILE ...``: noise-only maps like the map's noise (simulations); the mean of their pseudo-spectra;
* ``--half-difference HALF1 HALF2``: the map is the mean of two halves of the data with independent noise;
  ``(HALF1 - HALF2) / 2`` holds the same noise and no sky.

``--write-noise-spectrum FILE`` writes the noise bias that was subtracted as a bandpower table, which
``--noise-spectrum`` reads back.
"""

from __future__ import annotations

__all__ = ["add_noise_options", "check_noise_options", "read_noise_inputs", "subtract_noise", "noise_bias_table"]


def add_noise_options(parser):
    noise = parser.add_argument_group("noise bias of an auto-spectrum (one of)")
    choice = noise.add_mutually_exclusive_group()
    choice.add_argument(
        "--noise-spectrum", metavar="FILE",
        help="noise of MAP: a spectrum table of N_l as observed, not beam-deconvolved (columns ell and nl, cl or dl; "
             "'cmbtools simulate --write-noise-spectrum' writes one), or a bandpower table of the noise bias with the "
             "same bins, beam and pixel window (--write-noise-spectrum writes one); for I, Q, U maps a polarized "
             "table of N_l (TT, EE, BB, TE columns; 'cmbtools simulate --polarized --write-noise-spectrum' writes one)")
    choice.add_argument("--noise-maps", nargs="+", metavar="NOISE_MAP",
                        help="noise-only maps like MAP's noise (e.g. simulations): the mean of their spectra is the "
                             "noise bias")
    choice.add_argument("--half-difference", nargs=2, metavar=("HALF1", "HALF2"),
                        help="MAP is the mean of these two halves of the data (independent noise): (HALF1-HALF2)/2 "
                             "holds MAP's noise without the sky and gives the noise bias")
    noise.add_argument("--write-noise-spectrum", metavar="FILE.csv",
                       help="also write the noise bias that was subtracted, as a bandpower table (read back by "
                            "--noise-spectrum)")


def check_noise_options(args):
    """Usage errors of the noise options, before any work."""
    from cmbtools.exceptions import InvalidInputError

    given = args.noise_spectrum is not None or args.noise_maps or args.half_difference
    if args.map2 is not None and given:
        raise InvalidInputError("--noise-spectrum, --noise-maps and --half-difference apply to an auto-spectrum only; "
                                "a cross-spectrum of maps with independent noise has no noise bias.")
    if args.write_noise_spectrum is not None and not given:
        raise InvalidInputError("--write-noise-spectrum needs --noise-spectrum, --noise-maps or --half-difference.")


def _is_bandpower_table(path):
    from cmbtools._core.binned_tables import BANDPOWER_COLUMNS
    from cmbtools._core.tables import read_text_table

    table = read_text_table(path, what="a noise spectrum table", inline_comments=True)
    return table.names is not None and tuple(n.lower() for n in table.names) == tuple(BANDPOWER_COLUMNS)


def read_noise_inputs(args, nside, force):
    """('spectrum', N_l) or ('bandpowers', (ell_min, ell_max, N_b, metadata)) or ('maps', [maps]) or (None, None)."""
    import numpy as np

    from cmbtools import maps
    from cmbtools._core.checks import UNSEEN, missing_pixels
    from cmbtools._core.binned_tables import read_bandpower_table
    from cmbtools._core.spectrum_tables import read_noise_spectrum_table
    from cmbtools.exceptions import ResolutionMismatchError

    def read(path):
        m, info = maps.read_sky_map(path, force=force)
        if info.nside != nside:
            raise ResolutionMismatchError(f"{path}: has nside {info.nside} but MAP has nside {nside}.", info.nside, nside)
        return m

    if args.noise_spectrum is not None:
        if _is_bandpower_table(args.noise_spectrum):
            _path, cols, meta = read_bandpower_table(args.noise_spectrum)
            return "bandpowers", (cols["ell_min"], cols["ell_max"], cols["cl"], meta)
        return "spectrum", read_noise_spectrum_table(args.noise_spectrum)
    if args.noise_maps:
        return "maps", [read(p) for p in args.noise_maps]
    if args.half_difference:
        h1, h2 = (read(p) for p in args.half_difference)
        bad = missing_pixels(h1) | missing_pixels(h2)
        diff = np.where(bad, UNSEEN, 0.5 * (h1 - h2))
        return "maps", [diff]
    return None, None


def subtract_noise(est, m1, kind, value, args):
    """(bandpowers with the noise bias subtracted, bandpowers without) of the auto-spectrum of ``m1``."""
    import dataclasses

    import numpy as np

    from cmbtools.exceptions import InvalidInputError

    raw = est.estimate(m1)
    if kind is None:
        return raw, raw
    if kind == "spectrum":
        return est.estimate(m1, noise_cl=value), raw
    if kind == "maps":
        return est.estimate(m1, noise_maps=value), raw
    ell_min, ell_max, noise_b, meta = value
    b = est.binning
    if not (np.array_equal(ell_min, b.ell_min) and np.array_equal(ell_max, b.ell_max)):
        raise InvalidInputError(
            f"The noise bandpower table {args.noise_spectrum!r} has other bins than this spectrum "
            f"({ell_min.size} bins from ell {int(ell_min[0])} to {int(ell_max[-1])}; here {b.n_bins} bins from ell "
            f"{b.lmin} to {b.lmax}); measure it with the same bin options."
        )
    for key in ("beam", "pixel_window", "bin_weighting"):
        if key in meta and key in raw.metadata and str(meta[key]) != str(raw.metadata[key]):
            raise InvalidInputError(
                f"The noise bandpower table {args.noise_spectrum!r} was measured with {key} {meta[key]!r}, this "
                f"spectrum with {raw.metadata[key]!r}; measure the noise with the same settings."
            )
    cl = raw.cl - noise_b
    return dataclasses.replace(raw, cl=cl, dl=cl * b.dl_factor), raw


def noise_bias_table(est, bp, raw, kind, args):
    """The noise bias that was subtracted, as Bandpowers (K^2), with the error of its estimate."""
    import dataclasses

    import numpy as np

    noise_b = raw.cl - bp.cl
    with np.errstate(divide="ignore", invalid="ignore"):
        relative = np.where(raw.cl > 0, raw.cl_err / raw.cl, 0.0)  # sqrt(2 / modes) of each bin (Knox)
    if kind == "maps":
        n = len(args.noise_maps) if args.noise_maps else 1
        err = relative * np.abs(noise_b) / np.sqrt(n)
        source = (f"mean spectrum of {n} noise map(s)" if args.noise_maps
                  else f"half-difference ({args.half_difference[0]} - {args.half_difference[1]}) / 2")
    else:
        err = np.zeros_like(noise_b)  # a model or a table given as exact
        source = f"table {args.noise_spectrum}"
    meta = dict(bp.metadata)
    meta.update({"spectrum": "noise bias of an auto-spectrum", "noise_source": source})
    return dataclasses.replace(bp, cl=noise_b, cl_err=err, dl=noise_b * est.binning.dl_factor,
                               dl_err=err * est.binning.dl_factor, covariance=None, metadata=meta)
