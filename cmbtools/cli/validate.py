"""``cmbtools validate``: check the spectrum estimator end to end on simulated skies."""

from __future__ import annotations

import argparse
import sys

from cmbtools.cli.common import (
    MAX_SIMULATIONS, MAX_THREADS, add_binning, add_force, add_overwrite, binning_from_args, bins_top, bounded_int,
    add_monopole_dipole, add_pixel_model, monopole_dipole_from_args, describe_binning, non_negative_int, pixel_model_from_args, positive_float,
    beam_from_args, noise_model_from_args, positive_int, print_range_warning,
)

HELP = "check the spectrum estimator on simulated skies with your mask, beam and noise (Monte Carlo)"
DESCRIPTION = """\
Check the spectrum estimator end to end on simulations made for your survey:
Gaussian skies drawn from a spectrum (the built-in fiducial spectrum unless
--spectrum is given) with power up to 4*nside-1 as real skies (--sky-lmax),
convolved with the beam and the HEALPix pixel window, plus noise (white at
--noise-depth, shaped by a hits map, optionally with a 1/f knee), are masked
and measured exactly as 'cmbtools spectrum' would measure the real map.  The
mean of the recovered bandpowers is compared with the input (the bins of
'cmbtools spectrum', by default ending at the same default top of the range,
see --bin-width): the bias of each bin in units of its standard error, the
ratio of the scatter over the simulations to the reported (analytic) error
bars, and the transfer function (mean / expected) per bin.

The simulations run in parallel: on all cores of this machine by default
(--workers), or on a dask cluster (--scheduler, needs the 'dask' extra).  Each
finished simulation is saved in the run directory at once, so an interrupted
run continues where it stopped when the same command is run again (--restart
starts over).  Simulation i always uses the same random numbers for a given
--seed, whatever the number of workers.

--polarized checks the polarized estimator the same way: I, Q, U skies drawn
from TT, EE, BB, TE (the built-in spectra with lensing-like B modes and
--tensor-ratio, or a polarized --spectrum table), Q and U noise sqrt(2) times
the I noise per pixel, the temperature MASK and the polarization mask
--pol-mask (--pol-mask2 for the second split), optionally --purify-b; the
bias and the error ratio are reported per spectrum and bin, the table gains a
'spectrum' column, summary.json per-spectrum keys under "spectra", and the
figure one panel per spectrum; covariance.npz holds the six spectra's
simulated covariance (spectrum-major) and transfer.csv gains a 'spectrum'
column (TB and EB: nan), both read by 'cmbtools spectrum' on I, Q, U maps.
--harmonic-filter and --transfer work as below: the filter multiplies the T,
E and B coefficients of every sky alike (I, Q and U filtered the same way),
and --transfer takes such a polarized transfer.csv (TT, EE, BB divided by
their F_b; TE, TB, EB by sqrt(F_XX F_YY)).

Outputs (by default in the run directory): summary.csv (one row per bin, a
'# key: value' header with the settings), summary.json (the headline numbers
n_sims, max_abs_bias_sigma, median_error_ratio, ... and the per-bin columns),
validation.png (input against the mean recovered D_l with scatter bands,
and the bias per bin), transfer.csv (the per-bin transfer function F_b = mean /
expected with its standard error, which 'cmbtools spectrum --transfer' divides
out; not written, with a warning line, when a bin's measured transfer is not
positive: such a bin keeps no signal) and covariance.npz (the simulated
covariance of the bandpowers).

Filtering: --harmonic-filter FILE multiplies every simulated sky's harmonic
coefficients by a factor per multipole (a table with columns ell,factor from
ell 0), a stand-in for the filtering of a real survey's maps; transfer.csv
then measures what it does to each bin.  --transfer FILE divides such a table
out of every simulation's bandpowers and errors (as 'cmbtools spectrum
--transfer' does), to check the corrected pipeline with another --seed: the
bias and the transfer column then describe what is left, transfer.csv still
holds the whole F_b and covariance.npz is of the corrected bandpowers.

The memory of the estimator and of the simulations (one per local worker at
a time) is estimated before they start; the command stops if it exceeds what
the machine has available, and --force goes ahead anyway.

examples:
  cmbtools validate tern_mask.fits --beam-fwhm 60 --noise-depth 35 --hits tern_hits.fits \\
      --sims 200 --seed 1 --run-dir tern_validation
  cmbtools validate mask.fits --lmax 300 --bin-width 20 --spectrum model.csv --sims 500 \\
      --scheduler tcp://10.0.0.5:8786 --run-dir big_run
  cmbtools validate tern_mask.fits --polarized --pol-mask tern_pol_mask.fits --purify-b --beam-fwhm 60 \\
      --noise-depth 35 --hits tern_hits.fits --lmax 255 --bin-width 16 --sims 200 --run-dir tern_pol_validation
  cmbtools validate tern_mask.fits --beam-fwhm 60 --harmonic-filter high_pass.csv --sims 100 \\
      --run-dir filtered   # then: cmbtools spectrum ... --transfer filtered/transfer.csv
"""


def add_arguments(parser):
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.add_argument("mask", metavar="MASK", help="mask (weights in [0, 1]) as a HEALPix FITS file; sets nside")
    parser.add_argument("--lmax", type=positive_int, metavar="N",
                        help="largest multipole of the transforms and of the bins (default: transforms to 3*nside-1, "
                             "bins to the default top of the range, see --bin-width)")
    parser.add_argument("--mask2", metavar="MASK2",
                        help="mask of a second split: check the cross-spectrum of two splits (implies --cross)")
    parser.add_argument("--cross", action="store_true",
                        help="check the cross-spectrum of two splits of the same sky with independent noise "
                             "(as 'cmbtools spectrum MAP MAP2' measures), instead of the auto-spectrum")
    add_binning(parser)
    beam = parser.add_argument_group("beam (default: none)").add_mutually_exclusive_group()
    beam.add_argument("--beam-fwhm", type=positive_float, metavar="ARCMIN", help="Gaussian beam, FWHM in arcmin")
    beam.add_argument("--beam", metavar="FILE", help="beam table (columns ell,b_ell)")
    parser.add_argument("--no-pixel-window", action="store_true", help="neither simulate nor deconvolve the pixel window")
    parser.add_argument("--keep-monopole-dipole", action="store_true",
                        help="do not fit and remove the monopole and dipole before the transform")
    parser.add_argument("--sky-lmax", type=positive_int, metavar="N",
                        help="band limit of the simulated skies, whose power above the bins the estimator models "
                             "(default 4 nside - 1, as real skies, for both splits with --cross; at most 4 nside - 1, 8 nside - 1 "
                             "with --pixelise)")
    add_pixel_model(parser, "Default: the model of the simulated skies (averaged with --pixelise, pixel centres "
                            "without it).")
    parser.add_argument("--pixelise", action="store_true",
                        help="average every sky over the area of each pixel, as a detector's map does (instead of the "
                             "pixel window at the pixel centres)")
    add_monopole_dipole(parser, "default 100; 0 with --keep-monopole-dipole",
                        "default 3000; 0 with --keep-monopole-dipole")
    parser.add_argument("--fast-coupling", action="store_true",
                        help="approximate the mode-coupling matrix (faster at large lmax; exact when lmax > 2 nside, where the approximation fails)")
    noise = parser.add_argument_group("noise (default: none)")
    noise.add_argument("--noise-depth", type=positive_float, metavar="UK_ARCMIN",
                       help="white-noise depth in uK-arcmin (the rms over observed pixels with --hits)")
    noise.add_argument("--hits", metavar="FILE", help="hits map (HEALPix FITS): noise standard deviation ~ 1/sqrt(hits)")
    noise.add_argument("--noise-knee", type=positive_float, metavar="ELL",
                       help="knee multipole of correlated noise N_l = N_white (1 + (ELL/l)^SLOPE)")
    noise.add_argument("--noise-slope", type=positive_float, metavar="SLOPE", help="slope of the correlated noise")
    parser.add_argument("--harmonic-filter", metavar="FILE",
                        help="multiply every simulated sky's harmonic coefficients (with --polarized: T, E and B "
                             "alike) by a factor per multipole (table with columns ell,factor from ell 0 to the skies' "
                             "band limit): a stand-in for the filtering of the real maps, measured in transfer.csv")
    parser.add_argument("--transfer", metavar="FILE",
                        help="per-bin transfer function table (transfer.csv of an earlier run, same bins; with "
                             "--polarized the one with a 'spectrum' column) divided out of every simulation's "
                             "bandpowers, as 'cmbtools spectrum --transfer' does: checks the corrected pipeline (use "
                             "another --seed)")
    parser.add_argument("--spectrum", metavar="FILE",
                        help="input sky spectrum table (columns ell and cl or dl; default: the built-in fiducial spectrum)")
    sims = parser.add_argument_group("simulations")
    sims.add_argument("--sims", type=bounded_int(MAX_SIMULATIONS), default=100, metavar="N", help="number of simulations (default 100)")
    sims.add_argument("--seed", type=non_negative_int, metavar="S",
                      help="master seed (default: the one recorded in the run directory, else a fresh one, printed)")
    where = sims.add_mutually_exclusive_group()
    where.add_argument("--workers", type=bounded_int(MAX_THREADS), default=0, metavar="N",
                       help="local worker processes (default 0: one per core)")
    where.add_argument("--scheduler", metavar="ADDRESS", help="run on the dask cluster whose scheduler is at ADDRESS")
    sims.add_argument("--threads", type=bounded_int(MAX_THREADS), default=0, metavar="N",
                      help="transform threads per local worker (default: cores / workers)")
    sims.add_argument("--run-dir", default="validation_run", metavar="DIR",
                      help="directory of the run's simulations and outputs (default ./validation_run); "
                           "running the same command again resumes")
    sims.add_argument("--restart", action="store_true",
                      help="delete the simulations already in the run directory and start again")
    sims.add_argument("--no-progress", action="store_true", help="no progress bar")
    out = parser.add_argument_group("outputs (default: in the run directory)")
    out.add_argument("--table", metavar="FILE.csv", help="per-bin table (default RUN_DIR/summary.csv)")
    out.add_argument("--json-file", metavar="FILE.json", help="summary as JSON (default RUN_DIR/summary.json)")
    out.add_argument("--figure", metavar="FIG.png", help="figure, PNG or PDF (default RUN_DIR/validation.png)")
    out.add_argument("--transfer-table", metavar="FILE.csv",
                     help="per-bin transfer function table, read by 'cmbtools spectrum --transfer' "
                          "(default RUN_DIR/transfer.csv)")
    out.add_argument("--unit", choices=("uK", "K"), default="uK", help="unit of the table's spectra: uK^2 (default) or K^2")
    from cmbtools.cli.polarized_validate import add_polarization_options

    add_polarization_options(parser)
    add_overwrite(parser)
    add_force(parser)


def _dask_client(address):
    from cmbtools.exceptions import InvalidInputError

    try:
        import distributed
    except ImportError:
        raise InvalidInputError(
            "--scheduler needs the optional dask extra (pip install 'cmbtools[dask]')."
        ) from None
    try:
        return distributed.Client(address, timeout="20s")
    except (OSError, TimeoutError, ValueError) as exc:
        raise InvalidInputError(f"Cannot connect to the dask scheduler at {address!r}: {exc}") from None


def run(args) -> int:
    import os
    from pathlib import Path

    import numpy as np

    from cmbtools import maps
    from cmbtools import spectrum as sp
    from cmbtools._core.files import check_output_path, sha256_file
    from cmbtools.simulate import validate_estimator
    from cmbtools._core.checks import resolve_nthreads
    from cmbtools.exceptions import InvalidInputError, OutputPathError

    # 1. outputs first: nothing is computed for a run that could not be written
    run_dir = Path(args.run_dir)
    if run_dir.exists() and not run_dir.is_dir():
        raise OutputPathError(run_dir, "exists and is not a directory")
    parent = run_dir.parent if str(run_dir.parent) else Path(".")
    if not parent.is_dir():
        raise OutputPathError(run_dir, f"directory {str(parent)!r} does not exist")
    # the run directory (or, if it is to be made, its parent) must be writable: found now, not after the estimator
    check_output_path(run_dir / "run.json" if run_dir.is_dir() else run_dir, overwrite=True)
    outputs = []
    seen = {}
    for what, given, default in (("table", args.table, "summary.csv"), ("JSON summary", args.json_file, "summary.json"),
                                 ("figure", args.figure, "validation.png"),
                                 ("transfer table", args.transfer_table, "transfer.csv")):
        # files inside the run directory belong to the run and are rewritten on every run
        path = Path(given) if given is not None else run_dir / default
        overwrite = args.overwrite or given is None
        if given is not None:
            check_output_path(path, overwrite=overwrite)
        key = os.path.abspath(path)
        if key in seen:
            raise InvalidInputError(f"The {what} and the {seen[key]} would both be written to {str(path)!r}.")
        seen[key] = what
        outputs.append((what, path, overwrite))
    for given in (args.transfer, args.harmonic_filter, args.spectrum):
        # inputs are never replaced: not even by the files a run writes in its own directory
        if given is not None and os.path.abspath(given) in seen:
            raise InvalidInputError(f"{given} is an input, but this run would write its {seen[os.path.abspath(given)]} "
                                    "there; copy it elsewhere or use another --run-dir.")
    if Path(outputs[2][1]).suffix.lower() not in (".png", ".pdf"):
        raise InvalidInputError(f"The figure file must end in .png or .pdf. Got {str(outputs[2][1])!r} instead.")
    if args.hits is not None and args.noise_depth is None:
        raise InvalidInputError("--hits needs --noise-depth (the depth that the hits map shapes).")
    if (args.noise_knee is None) != (args.noise_slope is None):
        raise InvalidInputError("--noise-knee and --noise-slope must be given together.")
    if args.noise_knee is not None and args.noise_depth is None:
        raise InvalidInputError("--noise-knee needs --noise-depth (the white level of the noise).")
    if args.sims < 2:
        raise InvalidInputError(f"--sims must be at least 2 to measure a scatter. Got {args.sims} instead.")
    from cmbtools.cli.polarized_validate import check_polarization_options, run_polarized

    check_polarization_options(args)
    if args.polarized:
        client = None
        if args.scheduler is not None:
            client = _dask_client(args.scheduler)
            n_workers = len(client.scheduler_info(n_workers=-1).get("workers", {}))
            where = (client, None, f"the dask cluster at {args.scheduler} ({n_workers} workers)")
        else:
            n_workers = args.workers or resolve_nthreads(None)
            where = (None, n_workers, f"{n_workers} local worker process{'es' if n_workers != 1 else ''}")
        try:
            return run_polarized(args, outputs, run_dir, where)
        finally:
            if client is not None:
                client.close()

    # 2. inputs
    mask = maps.read_mask(args.mask, force=args.force)
    nside = int(round(np.sqrt(mask.size / 12)))
    lmax = 3 * nside - 1 if args.lmax is None else args.lmax
    if args.lmin > lmax:
        raise InvalidInputError(f"--lmin ({args.lmin}) must not exceed lmax ({lmax}).")
    beam = beam_from_args(args.beam_fwhm, args.beam, lmax)
    noise = noise_model_from_args(args)
    if args.spectrum is not None:
        from cmbtools._core.spectrum_tables import read_spectrum_table

        cl = np.asarray(read_spectrum_table(args.spectrum), dtype=np.float64)
        if cl.size < lmax + 1:
            raise InvalidInputError(
                f"The spectrum table {args.spectrum!r} stops at ell={cl.size - 1}; the simulations need ell up to {lmax} "
                f"(use --lmax {cl.size - 1} or a longer table)."
            )
        spectrum_text = f"{args.spectrum} (sha256 {sha256_file(args.spectrum)[:16]}...)"
    else:
        from cmbtools.simulate.theory_spectrum import FIDUCIAL_LABEL, fiducial_cl

        cl = fiducial_cl(lmax)
        spectrum_text = FIDUCIAL_LABEL

    cross = args.cross or args.mask2 is not None
    mask2 = None
    if args.mask2 is not None:
        from cmbtools._core.checks import check_same_nside

        mask2 = maps.read_mask(args.mask2, force=args.force)
        check_same_nside(mask, mask2, args.mask, args.mask2)
    binning = binning_from_args(args, bins_top(args, nside, lmax, beam), float(np.mean(mask)))
    transfer = None
    if args.transfer is not None:
        transfer = sp.BandpowerTransfer.read_csv(args.transfer)
        try:
            transfer.check_bins(binning, "the validation")
        except InvalidInputError as exc:
            raise InvalidInputError(f"{args.transfer}: {exc}") from None
    # real skies have power above lmax: simulated to 4 nside - 1 by default, and modelled by the estimator
    sky_lmax = max(lmax, 4 * nside - 1) if args.sky_lmax is None else args.sky_lmax
    top = (8 if args.pixelise else 4) * nside - 1
    if sky_lmax < lmax or sky_lmax > top:
        raise InvalidInputError(f"--sky-lmax must be in [{lmax}, {top}]. Got {sky_lmax} instead.")
    if args.sky_lmax is None and args.spectrum is not None and cl.size < sky_lmax + 1:
        sky_lmax = max(lmax, cl.size - 1)  # a user spectrum that stops earlier sets the default band limit
    if cl.size < sky_lmax + 1:
        if args.spectrum is not None:
            raise InvalidInputError(
                f"The spectrum table {args.spectrum!r} stops at ell={cl.size - 1}; the skies go to --sky-lmax "
                f"{sky_lmax} (give a longer table or a lower --sky-lmax)."
            )
        cl = fiducial_cl(sky_lmax)
    harmonic_filter = None
    if args.harmonic_filter is not None:
        from cmbtools._core.binned_tables import read_filter_table

        harmonic_filter = read_filter_table(args.harmonic_filter)
        if args.sky_lmax is None and lmax + 1 <= harmonic_filter.size < sky_lmax + 1:
            sky_lmax = harmonic_filter.size - 1  # a filter that stops earlier sets the default band limit
            cl = cl[: sky_lmax + 1]
        if harmonic_filter.size < sky_lmax + 1:
            raise InvalidInputError(
                f"The filter table {args.harmonic_filter!r} stops at ell={harmonic_filter.size - 1}; the skies go "
                f"to ell={sky_lmax} (give the factor up to there, or a lower --sky-lmax)."
            )
    removal = not args.keep_monopole_dipole
    monopole, dipole = monopole_dipole_from_args(args, 100.0 if removal else 0.0, 3000.0 if removal else 0.0)
    # the model of the skies simulated: averaged pixels with --pixelise, pixel centres without (unless told)
    averaged = pixel_model_from_args(args, default=bool(args.pixelise) and not args.no_pixel_window)
    if averaged and args.no_pixel_window:
        raise InvalidInputError("--averaged-pixels needs the pixel window (leave out --no-pixel-window).")
    est = sp.SpectrumEstimator(
        mask, binning, lmax=lmax, mask2=mask2, beam=beam, pixel_window=not args.no_pixel_window,
        sky_lmax=sky_lmax, guess_cl=cl, averaged_pixels=averaged,
        remove_monopole_dipole=not args.keep_monopole_dipole, coupling="fast" if args.fast_coupling else "exact",
        force=args.force,
    )

    # 3. the simulations
    client = None
    if args.scheduler is not None:
        client = _dask_client(args.scheduler)
        n_workers = len(client.scheduler_info(n_workers=-1).get("workers", {}))
        where_text = f"the dask cluster at {args.scheduler} ({n_workers} workers)"
    else:
        n_workers = args.workers or resolve_nthreads(None)
        where_text = f"{n_workers} local worker process{'es' if n_workers != 1 else ''}"
    try:
        result = validate_estimator(
            est, cl, n_sims=args.sims, seed=args.seed, noise=noise, run_dir=run_dir, executor=client,
            workers=None if client is not None else n_workers, threads_per_worker=args.threads or None,
            progress=False if args.no_progress else None, restart=args.restart, force=args.force, cross=cross,
            monopole=monopole, dipole=dipole, harmonic_filter=harmonic_filter, bandpower_transfer=transfer,
            sky_lmax=sky_lmax, pixelise=bool(args.pixelise),
        )
    finally:
        if client is not None:
            client.close()

    # 4. outputs
    meta = dict(result.metadata)
    if args.mask2 is not None:
        meta.update({"mask2_file": str(args.mask2), "mask2_file_sha256": sha256_file(args.mask2)})
    meta.update({"mask_file": str(args.mask), "mask_file_sha256": sha256_file(args.mask), "input_spectrum": spectrum_text,
                 "beam": f"Gaussian FWHM {args.beam_fwhm:g} arcmin" if args.beam_fwhm is not None
                 else (f"table {args.beam}" if args.beam is not None else "none"),
                 "pixel_window": "no" if args.no_pixel_window else "yes"})
    if args.hits is not None:
        meta["hits_file"] = str(args.hits)
    if args.harmonic_filter is not None:
        meta["harmonic_filter_file"] = str(args.harmonic_filter)
        meta["harmonic_filter_file_sha256"] = sha256_file(args.harmonic_filter)
    if args.transfer is not None:
        meta["transfer_file"] = str(args.transfer)
    import dataclasses

    result = dataclasses.replace(result, metadata=meta)
    def transfer_table(p):
        measured = sp.BandpowerTransfer.from_validation(result)
        if transfer is not None:  # the whole F_b of the pipeline: what is left times what was divided out
            measured = dataclasses.replace(
                measured, transfer=measured.transfer * transfer.transfer,
                transfer_error=measured.transfer_error * transfer.transfer,
                metadata={**measured.metadata, "measured_by": "Monte Carlo validation (mean / expected per bin, "
                          f"with {args.transfer} divided out and multiplied back)"})
        return measured.write_csv(p, overwrite=True)

    # the simulated covariance of the bandpowers, usable by `cmbtools spectrum --covariance-from`
    from cmbtools._core.files import OutputGroup
    from cmbtools.spectrum.bandpower_covariance import simulated_covariance

    windows = est.cross_bandpower_windows if cross else est.bandpower_windows
    simulated = simulated_covariance(
        result.samples, ell_min=result.ell_min, ell_max=result.ell_max, ell_eff=result.ell_eff, windows=windows,
        settings={"spectrum": "cross" if cross else "auto", "seed": int(result.seed),
                  "estimator_key": meta.get("estimator_key", ""),
                  **({} if transfer is None else {"bandpower_transfer_key": transfer.key,
                                                  "bandpower_transfer": f"divided out ({args.transfer})"})})
    writers = {"table": lambda p: result.write_csv(p, overwrite=True, unit=args.unit),
               "JSON summary": lambda p: result.write_json(p, overwrite=True),
               "transfer table": transfer_table,
               "figure": lambda p: result.plot(p, overwrite=True)}
    # a bin whose measured transfer is not positive (no signal left there: e.g. bins set above the beam's reach)
    # cannot be divided out: the run's other outputs are written, the transfer table is not (one warning line)
    f_b = np.asarray(result.transfer, dtype=np.float64)
    skipped = None
    if not np.all(np.isfinite(f_b) & (f_b > 0)):
        b = int(np.argmax(~(np.isfinite(f_b) & (f_b > 0))))
        skipped = [o for o in outputs if o[0] == "transfer table"][0][1]
        outputs = [o for o in outputs if o[0] != "transfer table"]
        skipped = (f"{skipped} not written: the measured transfer (mean / expected) is {f_b[b]:.3g} in bin {b} "
                   f"(ell {int(result.ell_min[b])}-{int(result.ell_max[b])}), a bin that keeps no signal and "
                   "cannot be corrected")
    with OutputGroup() as group:  # all of the outputs or none
        for what, path, overwrite in outputs:
            group.write(path, writers[what], overwrite=overwrite)
        group.write(run_dir / "covariance.npz", lambda p: simulated.write(p, overwrite=True), overwrite=True)
    written = group.paths

    s = result.summary()
    # a null run (zero spectrum, no noise) has no scatter: its ratios are not numbers (None in the summary)
    worst = int(np.argmax(np.where(np.isfinite(result.bias_sigma), np.abs(result.bias_sigma), -1.0)))

    def num(key, spec):
        return "n/a" if s[key] is None else format(s[key], spec)

    ran = result.n_sims - int(meta.get("n_resumed", 0))
    print(f"validated the spectrum estimator on {result.n_sims} simulations (seed {result.seed}) on {where_text}")
    if meta.get("n_resumed"):
        print(f"  resumed {meta['n_resumed']} finished simulations from {run_dir}; ran {ran}")
    if cross:
        masks_text = (f"mask 1 f_sky {est.f_sky:.3f}, mask 2 f_sky {float(np.mean(mask2)):.3f}; "
                      if mask2 is not None else f"f_sky {est.f_sky:.3f}, ")
        sky_text = f"{masks_text}cross-spectrum of two splits, f_sky_eff {est.f_sky_eff_cross:.3f}"
    else:
        sky_text = f"f_sky {est.f_sky:.3f}, f_sky_eff {est.f_sky_eff:.3f}"
    print(f"  nside {nside}, lmax {lmax}, {describe_binning(binning)}")
    print(f"  sky fraction: {sky_text}")
    noise_text = "none" if noise is None else (
        f"{args.noise_depth:g} uK-arcmin" + (" shaped by the hits map" if args.hits else "")
        + (f", knee at ell {args.noise_knee:g} (slope {args.noise_slope:g})" if args.noise_knee else ""))
    print(f"  input: {spectrum_text} to ell {sky_lmax}" + (" (pixelised)" if args.pixelise else "")
          + f"; beam: {meta['beam']}; noise: {noise_text}")
    if not args.no_pixel_window:
        skies = "averaged over each pixel" if args.pixelise else "sampled at the pixel centres"
        model = ("averaged pixels (pixel window + the pixel shapes' correction)" if averaged
                 else "pixel centres (pixel window only)")
        print(f"  pixels: skies {skies}; estimator's model: {model}")
    print(f"  bias: max |bias| {num('max_abs_bias_sigma', '.2f')} sigma (ell {int(result.ell_min[worst])}-"
          f"{int(result.ell_max[worst])}), rms {num('rms_bias_sigma', '.2f')} sigma over {s['n_bins']} bins")
    print(f"  error bars ({meta.get('error_model', 'analytic')}): scatter / error = "
          f"{num('median_error_ratio', '.3f')} (median; {num('min_error_ratio', '.3f')} to "
          f"{num('max_error_ratio', '.3f')} over the bins)")
    if transfer is not None:
        print(f"  bandpowers and errors divided by F_b of {args.transfer} "
              f"({float(transfer.transfer.min()):.4g} to {float(transfer.transfer.max()):.4g})")
    print(f"  transfer (mean / expected): median {num('median_transfer', '.4f')}"
          + (f", from {float(np.nanmin(result.transfer)):.4f} to {float(np.nanmax(result.transfer)):.4f} "
             f"(harmonic filter {args.harmonic_filter})" if args.harmonic_filter else ""))
    print("  wrote " + ", ".join(str(p) for p in written))
    if skipped is not None:
        print(f"cmbtools: warning: {skipped}", file=sys.stderr)
    print_range_warning(args)
    return 0
