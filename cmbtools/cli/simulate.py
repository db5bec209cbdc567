"""``cmbtools simulate``: write simulated CMB maps (and the fiducial spectrum table)."""

from __future__ import annotations

import argparse
import contextlib

from cmbtools.cli.common import (
    MAX_SIMULATIONS, add_force, add_monopole_dipole, add_overwrite, add_threads, beam_from_args, bounded_int,
    deprecated_alias, finite_float, monopole_dipole_from_args, noise_model_from_args, non_negative_int, positive_float,
    positive_int,
)

HELP = "write simulated Gaussian CMB maps with beam, pixel window and noise"
DESCRIPTION = """\
Write simulated temperature maps as HEALPix FITS files (K_CMB, RING).

Each map is a Gaussian sky drawn from a spectrum (the built-in fiducial
spectrum by default, or a spectrum table), smoothed by the beam and the pixel
window (sampled at the pixel centres; --pixelise averages it over each
pixel's area instead, as a detector's map holds it), plus optional noise (white at a depth, shaped by a hits map, with a
1/f knee) and an optional monopole and dipole.  Map i of a run with seed S
depends only on (S, i): runs split over several calls (--first-index) or
machines give the same maps.  Every file records CMBSEED and CMBSIMID in its
header.  Nothing is overwritten without --overwrite.  If one map with its
noise would need more memory than the machine has available, the command
stops before computing anything; --force goes ahead anyway.

examples:
  cmbtools simulate --nside 128 --beam-fwhm 60 --noise-depth 35 --seed 1 --sims 10 \\
                    --output-dir sims --prefix sky
  cmbtools simulate --spectrum my_cl.csv --nside 64 --seed 7 --output-dir sims
  cmbtools simulate --write-spectrum fiducial_cl.csv --lmax 2000 --sims 0
"""


def add_arguments(parser):
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    sky = parser.add_argument_group("sky")
    source = sky.add_mutually_exclusive_group()
    source.add_argument("--fiducial", action="store_true",
                        help="draw from the built-in fiducial spectrum (the default)")
    source.add_argument("--spectrum", metavar="TABLE",
                        help="draw from this spectrum table (columns ell and cl/dl, see cmbtools.simulate)")
    sky.add_argument("--nside", type=positive_int, metavar="N", help="HEALPix resolution of the maps")
    sky.add_argument("--polarized", action="store_true",
                     help="write I, Q, U maps (HEALPix angle convention) from TT, EE, BB, TE: the built-in fiducial "
                          "spectra or a polarized --spectrum table (columns cl_tt_k2, cl_ee_k2, cl_bb_k2, cl_te_k2); "
                          "Q and U noise is sqrt(2) times the temperature noise")
    sky.add_argument("--tensor-ratio", type=finite_float, default=0.0, metavar="R",
                     help="with --polarized and the built-in spectra: tensor-to-scalar ratio of the B modes (default 0)")
    sky.add_argument("--lmax", type=positive_int, metavar="L",
                     help="largest multipole simulated (default 3*nside-1; with --sims 0, the length "
                          "of the --write-spectrum table, default 2500)")
    beam = sky.add_mutually_exclusive_group()
    beam.add_argument("--beam-fwhm", type=positive_float, metavar="ARCMIN", help="Gaussian beam FWHM in arcmin")
    beam.add_argument("--beam", metavar="FILE", help="beam table B_l (columns ell,b_ell)")
    deprecated_alias(beam, "--beam-file", "--beam", "beam")
    sky.add_argument("--no-pixel-window", action="store_true", help="do not apply the HEALPix pixel window")
    sky.add_argument("--pixelise", action="store_true",
                     help="average every sky over the area of each pixel, as a detector's map does (instead of the "
                          "pixel window at the pixel centres): the maps the spectrum estimator assumes by default "
                          "(about 0.8 s a map at nside 128)")
    add_monopole_dipole(sky, "default 0", "default none")
    deprecated_alias(sky, "--monopole-uk", "--monopole", "monopole", type=finite_float)
    deprecated_alias(sky, "--dipole-uk", "--dipole", "dipole", type=finite_float, nargs=3)

    noise = parser.add_argument_group("noise")
    noise.add_argument("--noise-depth", type=positive_float, metavar="UK_ARCMIN",
                       help="white-noise depth in uK-arcmin (no noise if absent)")
    noise.add_argument("--hits", metavar="MAP",
                       help="hits map (FITS): noise sigma ~ 1/sqrt(hits), the depth is the rms over observed "
                            "pixels; unobserved pixels are written as missing")
    noise.add_argument("--noise-knee", type=positive_float, metavar="ELL",
                       help="knee multipole of correlated noise N_l = N_white (1 + (ELL/l)^SLOPE)")
    noise.add_argument("--noise-slope", type=positive_float, metavar="SLOPE", help="slope of the correlated noise")
    deprecated_alias(noise, "--knee-ell", "--noise-knee", "noise_knee", type=positive_float)
    deprecated_alias(noise, "--knee-slope", "--noise-slope", "noise_slope", type=positive_float)
    noise.add_argument("--splits", type=positive_int, metavar="K",
                       help="write K split maps per simulation: the same sky, each with its own independent noise "
                            "(PREFIX_IIII_split1.fits ...), for cross-spectra free of noise bias")

    run = parser.add_argument_group("run and output")
    run.add_argument("--seed", type=non_negative_int, metavar="S",
                     help="master seed (default: drawn at random and printed)")
    run.add_argument("--sims", type=bounded_int(MAX_SIMULATIONS), default=1, metavar="N",
                     help="number of simulations (default 1)")
    deprecated_alias(run, "--count", "--sims", "sims", type=bounded_int(MAX_SIMULATIONS))
    run.add_argument("--first-index", type=bounded_int(10**9), default=0, metavar="I",
                     help="index of the first map (default 0); map i is sky_{i:04d}.fits")
    run.add_argument("--output-dir", default=".", metavar="DIR", help="directory for the maps (default: .)")
    run.add_argument("--prefix", default="sky", help="file-name prefix (default: sky)")
    run.add_argument("--coord", choices=["G", "C", "E"], help="coordinate system to record in the headers")
    run.add_argument("--float32", action="store_true", help="write single-precision maps (half the size)")
    run.add_argument("--write-spectrum", metavar="TABLE",
                     help="also write the input spectrum (fiducial or --spectrum) as a table")
    run.add_argument("--write-noise-spectrum", metavar="TABLE",
                     help="also write the noise spectrum N_l of the noise options (white level and knee, as observed; "
                          "what 'cmbtools spectrum --noise-spectrum' subtracts) as a spectrum table")
    add_threads(run)
    add_overwrite(parser)
    add_force(parser)


def _check_map_memory(args, nside, lmax):
    """Refuse (MemoryLimitError) maps that would not fit in memory, before the spectrum or any map is computed.

    One map at a time: the sky (draws, synthesis, dipole), its noise and their
    sum, then the copies made to write it and to report its rms; with hits,
    the hits map and the noise model's copy are held throughout.
    """
    from cmbtools._core.memory import check_memory, estimate_map_bytes, estimate_simulated_maps_bytes

    need = estimate_simulated_maps_bytes(
        nside, lmax, with_dipole=args.dipole is not None, with_noise=args.noise_depth is not None,
        correlated_noise=args.noise_knee is not None, with_hits=args.hits is not None,
    )
    if args.splits:  # the sky and every split are kept until the split maps are written
        need += estimate_map_bytes(nside, args.splits)
    if args.pixelise:
        from cmbtools.simulate.skies import _averaging_bytes

        need = max(need, _averaging_bytes(nside, lmax, 2 if args.polarized else 1) + estimate_map_bytes(nside, 3))
    check_memory(need, f"Simulating maps at nside {nside} with lmax {lmax}", force=args.force)


def _remove_stale_temporaries(out_dir, prefix):
    """Delete temporary map files of this prefix that a killed run left behind (hidden, cmbtools' own naming)."""
    import contextlib
    import os
    import re

    pattern = re.compile(r"^\.\.?" + re.escape(prefix) + r"_\d{4,}(?:_split\d+)?\.fits\.[A-Za-z0-9_]{8}\.(?:tmp\.fits.*|probe)$")
    for name in os.listdir(out_dir):
        if pattern.match(name):
            with contextlib.suppress(OSError):
                (out_dir / name).unlink()


def run(args) -> int:
    from cmbtools._core.files import OutputGroup

    created = []
    printed = []  # the "wrote ..." lines, printed once every file is in place
    try:
        with OutputGroup() as group:  # every map and table of the run, or none of them
            status = _run(args, created, group, printed)
        for line in printed:
            print(line)
        return status
    except BaseException:
        for d in created:  # a directory this run made and left empty goes away again
            with contextlib.suppress(OSError):
                d.rmdir()
        raise


def _run(args, created, group, printed) -> int:
    import os
    import re
    import warnings
    from pathlib import Path

    import numpy as np

    from cmbtools import simulate
    from cmbtools._core.files import check_input_file, check_output_path
    from cmbtools._core.checks import check_lmax, check_nside, missing_pixels
    from cmbtools.exceptions import CmbtoolsWarning, InvalidInputError

    if args.sims > 0 and args.nside is None:
        raise InvalidInputError("--nside is required to simulate maps (or pass --sims 0 with --write-spectrum)")
    if args.sims == 0 and args.write_spectrum is None and args.write_noise_spectrum is None:
        raise InvalidInputError("nothing to do: --sims is 0 and neither --write-spectrum nor --write-noise-spectrum "
                                "is given")
    if args.write_noise_spectrum is not None and args.noise_depth is None:
        raise InvalidInputError("--write-noise-spectrum needs --noise-depth (the noise it describes)")
    if (args.noise_knee is None) != (args.noise_slope is None):
        raise InvalidInputError("--noise-knee and --noise-slope must be given together")
    if args.noise_depth is None and (args.hits is not None or args.noise_knee is not None or args.splits):
        raise InvalidInputError("--hits, --noise-knee and --splits need --noise-depth")
    if not re.fullmatch(r"[A-Za-z0-9._+-]+", args.prefix):
        raise InvalidInputError(f"--prefix must be a plain file-name part (letters, digits, . _ + -). Got {args.prefix!r}.")
    nside = None if args.nside is None else check_nside(args.nside, "--nside")
    if args.lmax is not None:
        lmax = check_lmax(args.lmax, nside, "--lmax")
    else:
        lmax = 3 * nside - 1 if nside is not None else 2500
    seed = args.seed if args.seed is not None else int(np.random.SeedSequence().entropy % (2**63))

    # check every input and output before any work
    if args.spectrum is not None:
        check_input_file(args.spectrum)
    if args.beam is not None:
        check_input_file(args.beam)
    if args.hits is not None:
        check_input_file(args.hits)
    if args.pixelise and args.no_pixel_window:
        raise InvalidInputError("--pixelise averages the sky over each pixel, which is the pixel window: leave out "
                                "--no-pixel-window")
    if args.sims > 0:  # before the output directory is created
        _check_map_memory(args, nside, lmax)
    outputs = []
    if args.sims > 0:
        out_dir = Path(args.output_dir)
        if not out_dir.exists():
            if not out_dir.parent.exists():
                raise InvalidInputError(f"--output-dir {str(out_dir)!r}: its parent directory does not exist")
            out_dir.mkdir()
            created.append(out_dir)
        names = [f"{args.prefix}_{i:04d}" for i in range(args.first_index, args.first_index + args.sims)]
        if args.splits:
            outputs = [[out_dir / f"{n}_split{k}.fits" for k in range(1, args.splits + 1)] for n in names]
        else:
            outputs = [[out_dir / f"{n}.fits"] for n in names]
        for paths in outputs:
            for p in paths:
                check_output_path(p, overwrite=args.overwrite)
        _remove_stale_temporaries(out_dir, args.prefix)
    if args.write_spectrum is not None:
        check_output_path(args.write_spectrum, overwrite=args.overwrite)
    if args.write_noise_spectrum is not None:
        check_output_path(args.write_noise_spectrum, overwrite=args.overwrite)
        if args.write_spectrum is not None and os.path.abspath(args.write_spectrum) == os.path.abspath(
                args.write_noise_spectrum):
            raise InvalidInputError("--write-spectrum and --write-noise-spectrum name the same file")

    noise = noise_model_from_args(args)
    if noise is not None and noise.nside is not None and nside is not None and noise.nside != nside:
        raise InvalidInputError(f"--hits has nside {noise.nside} but --nside is {nside}")
    if args.tensor_ratio and not args.polarized:
        raise InvalidInputError("--tensor-ratio needs --polarized")
    if args.polarized:
        return _run_polarized(args, simulate, nside, lmax, seed, noise, outputs, group, printed)
    if args.spectrum is not None:
        cl = simulate.read_spectrum_table(args.spectrum)
        if cl.size < lmax + 1:
            raise InvalidInputError(
                f"{args.spectrum}: the table ends at ell = {cl.size - 1}, but --lmax is {lmax}; "
                "pass a smaller --lmax or a longer table"
            )
        source = f"table {args.spectrum}"
    else:
        from cmbtools.simulate.theory_spectrum import FIDUCIAL_LABEL

        cl = simulate.fiducial_cl(lmax)
        source = FIDUCIAL_LABEL
    cl = cl[: lmax + 1]
    if args.write_spectrum is not None:
        group.write(args.write_spectrum, lambda p: simulate.write_spectrum_table(
            p, cl, overwrite=True, header={"source": source}), overwrite=args.overwrite)
        printed.append(f"wrote {args.write_spectrum} (ell 0..{lmax})")
    if args.write_noise_spectrum is not None:
        nl = simulate.noise_spectrum(noise, lmax, nside)
        knee = f", knee {args.noise_knee:g}, slope {args.noise_slope:g}" if args.noise_knee else ""
        group.write(args.write_noise_spectrum, lambda p: simulate.write_spectrum_table(
            p, nl, overwrite=True,
            header={"source": f"noise model: {args.noise_depth:g} uK-arcmin{knee}" + (f", hits {args.hits}" if args.hits else ""),
                    "meaning": "noise spectrum N_l as observed (not beam-deconvolved)"}), overwrite=args.overwrite)
        printed.append(f"wrote {args.write_noise_spectrum} (noise spectrum, ell 0..{lmax})")
    if args.sims == 0:
        return 0

    beam, beam_text = _beam_from_args(args, lmax)
    monopole, dipole = monopole_dipole_from_args(args, 0.0, 0.0)
    nthreads = args.threads or None

    from cmbtools.maps import write_sky_map

    print(f"simulating {args.sims} map(s): nside {nside}, lmax {lmax}, seed {seed}, spectrum: {source}")
    print(f"  beam: {beam_text}; pixel window: {_pixel_text(args)}; "
          f"noise: {'none' if noise is None else f'{args.noise_depth:g} uK-arcmin' + (' with hits' if noise.hits is not None else '') + (f', knee {args.noise_knee:g}, slope {args.noise_slope:g}' if args.noise_knee else '')}")
    if args.splits:
        print(f"  {args.splits} splits per simulation: the same sky, independent noise in each")
    for i, paths in zip(range(args.first_index, args.first_index + args.sims), outputs):
        rng = simulate.simulation_rng(seed, i)
        with warnings.catch_warnings():
            if args.force:  # the estimate above covers every map: warn once, not once per map
                warnings.filterwarnings("ignore", message=".*would need about .* going ahead", category=CmbtoolsWarning)
            sky = simulate.gaussian_sky(cl, nside, lmax=lmax, beam=beam, pixel_window=not args.no_pixel_window,
                                        pixelise=args.pixelise, monopole=monopole, dipole=dipole, rng=rng,
                                        nthreads=nthreads, force=args.force)
            # split k's noise is the k-th draw after the sky: split 1 is the map a run without --splits writes
            split_maps = []
            for _path in paths:
                m = sky
                if noise is not None:
                    m = sky + simulate.noise_map(noise, nside, rng=rng, nthreads=nthreads, force=args.force)
                split_maps.append(m)
        for k, (path, m) in enumerate(zip(paths, split_maps), start=1):
            _write_one(path, m, i, k if args.splits else None, args, seed, lmax, beam_text, noise, write_sky_map,
                       missing_pixels, group, printed)
    return 0


def _beam_from_args(args, lmax):
    """(beam for the skies: FWHM in arcmin, B_l or None; its description) from --beam-fwhm or --beam."""
    text = (f"Gaussian {args.beam_fwhm:g} arcmin" if args.beam_fwhm is not None
            else f"table {args.beam}" if args.beam is not None else "none")
    return beam_from_args(args.beam_fwhm, args.beam, lmax), text


def _pixel_text(args):
    """How the pixels are made, for the summary line."""
    if args.no_pixel_window:
        return "no"
    return "yes, averaged over each pixel's area" if args.pixelise else "yes"


def _write_one(path, m, i, split, args, seed, lmax, beam_text, noise, write_sky_map, missing_pixels, group, printed):
    import math

    import numpy as np

    header = [
        ("CMBSEED", seed, "master seed of the simulation set"),
        ("CMBSIMID", i, "index of this simulation in the set"),
        ("CMBLMAX", lmax, "largest multipole simulated"),
        ("CMBBEAM", beam_text[:60], "beam"),
        ("CMBPIXWN", not args.no_pixel_window, "pixel window applied"),
        ("CMBPIXAV", bool(args.pixelise), "averaged over each pixel's area"),
        ("CMBNOISE", 0.0 if noise is None else float(args.noise_depth), "white-noise depth, uK-arcmin"),
    ]
    if split is not None:
        header.append(("CMBSPLIT", split, "split number: same sky, independent noise"))
    group.write(path, lambda p: write_sky_map(p, m, coordinates=args.coord, overwrite=True, header=header,
                                              dtype="float32" if args.float32 else None,
                                              observed_only=noise is not None and noise.hits is not None),
                overwrite=args.overwrite)
    good = m[~missing_pixels(m)]  # the observed pixels
    peak = float(np.max(np.abs(good), initial=0.0))
    rms = peak * math.sqrt(float(np.mean((good / peak) ** 2))) if peak > 0 else 0.0  # no overflow in m**2
    printed.append(f"wrote {path}  (rms {rms * 1e6:.1f} uK)")


def _run_polarized(args, simulate, nside, lmax, seed, noise, outputs, group, printed) -> int:
    """The --polarized branch: I, Q, U maps from TT, EE, BB, TE (same seeds, beams, noise and splits)."""
    import warnings

    import numpy as np

    from cmbtools._core.checks import UNSEEN, missing_pixels
    from cmbtools.exceptions import CmbtoolsWarning, InvalidInputError
    from cmbtools.maps import write_iqu

    if args.spectrum is not None:
        spectra = simulate.read_polarized_spectrum_table(args.spectrum)
        if spectra["TT"].size < lmax + 1:
            raise InvalidInputError(
                f"{args.spectrum}: the table ends at ell = {spectra['TT'].size - 1}, but --lmax is {lmax}; "
                "pass a smaller --lmax or a longer table"
            )
        source = f"table {args.spectrum}"
    else:
        if not 0.0 <= args.tensor_ratio <= 10.0:
            raise InvalidInputError(f"--tensor-ratio must be in [0, 10]. Got {args.tensor_ratio!r} instead.")
        from cmbtools.simulate.theory_spectrum import FIDUCIAL_MODEL

        spectra = simulate.fiducial_spectra(lmax, tensor_ratio=args.tensor_ratio)
        source = f"built-in fiducial spectra ({FIDUCIAL_MODEL}; r = {args.tensor_ratio:g})"
    spectra = simulate.check_spectra(spectra, lmax)
    if args.write_spectrum is not None:
        group.write(args.write_spectrum, lambda p: simulate.write_spectrum_table(
            p, spectra, overwrite=True, header={"source": source}), overwrite=args.overwrite)
        printed.append(f"wrote {args.write_spectrum} (TT, EE, BB, TE; ell 0..{lmax})")
    if args.write_noise_spectrum is not None:
        noise_spectra = simulate.polarized_noise_spectra(noise, lmax, nside)
        group.write(args.write_noise_spectrum, lambda p: simulate.write_spectrum_table(
            p, noise_spectra, overwrite=True, header={"source": f"noise model: {args.noise_depth:g} uK-arcmin",
                                                      "meaning": "noise spectra as observed (not beam-deconvolved)"}),
            overwrite=args.overwrite)
        printed.append(f"wrote {args.write_noise_spectrum} (noise spectra, ell 0..{lmax})")
    if args.sims == 0:
        return 0
    beam, beam_text = _beam_from_args(args, lmax)
    monopole, dipole = monopole_dipole_from_args(args, 0.0, 0.0)
    nthreads = args.threads or None
    print(f"simulating {args.sims} I, Q, U map(s): nside {nside}, lmax {lmax}, seed {seed}, spectra: {source}")
    for i, paths in zip(range(args.first_index, args.first_index + args.sims), outputs):
        rng = simulate.simulation_rng(seed, i)
        with warnings.catch_warnings():
            if args.force:
                warnings.filterwarnings("ignore", message=".*would need about .* going ahead", category=CmbtoolsWarning)
            sky = simulate.gaussian_iqu_sky(spectra, nside, lmax=lmax, beam=beam,
                                            pixel_window=not args.no_pixel_window, pixelise=args.pixelise,
                                            monopole=monopole,
                                            dipole=dipole, rng=rng, nthreads=nthreads, force=args.force)
            split_maps = []
            for _path in paths:
                m = sky
                if noise is not None:
                    m = sky + simulate.iqu_noise_map(noise, nside, rng=rng, nthreads=nthreads, force=args.force)
                    m[missing_pixels(m)] = UNSEEN
                split_maps.append(m)
        for k, (path, m) in enumerate(zip(paths, split_maps), start=1):
            header = [
                ("CMBSEED", seed, "master seed of the simulation set"),
                ("CMBSIMID", i, "index of this simulation in the set"),
                ("CMBLMAX", lmax, "largest multipole simulated"),
                ("CMBBEAM", beam_text[:60], "beam"),
                ("CMBPIXWN", not args.no_pixel_window, "pixel window applied"),
                ("CMBPIXAV", bool(args.pixelise), "averaged over each pixel's area"),
                ("CMBNOISE", 0.0 if noise is None else float(args.noise_depth), "white-noise depth (I), uK-arcmin"),
            ]
            if args.splits:
                header.append(("CMBSPLIT", k, "split number: same sky, independent noise"))
            group.write(path, lambda p: write_iqu(p, m, coordinates=args.coord, overwrite=True, header=header,
                                                  dtype="float32" if args.float32 else None,
                                                  observed_only=noise is not None and noise.hits is not None),
                        overwrite=args.overwrite)
            good = m[:, ~missing_pixels(m[0])]
            rms = [float(np.sqrt(np.mean(x**2))) * 1e6 if x.size else 0.0 for x in good]
            printed.append(f"wrote {path}  (rms I {rms[0]:.1f} uK, Q {rms[1]:.2f} uK, U {rms[2]:.2f} uK)")
    return 0
