"""``cmbtools simulate``: write simulated CMB maps (and the fiducial spectrum table)."""

from __future__ import annotations

import argparse
import contextlib

from cmbtools.cli.common import (
    MAX_SIMULATIONS, add_force, add_overwrite, add_threads, bounded_int, finite_float, positive_float, positive_int,
)

HELP = "write simulated Gaussian CMB maps with beam, pixel window and noise"
DESCRIPTION = """\
Write simulated temperature maps as HEALPix FITS files (K_CMB, RING).

Each map is a Gaussian sky drawn from a spectrum (the built-in fiducial
spectrum by default, or a spectrum table), smoothed by the beam and the pixel
window, plus optional noise (white at a depth, shaped by a hits map, with a
1/f knee) and an optional monopole and dipole.  Map i of a run with seed S
depends only on (S, i): runs split over several calls (--first-index) or
machines give the same maps.  Every file records CMBSEED and CMBSIMID in its
header.  Nothing is overwritten without --overwrite.  If one map with its
noise would need more memory than the machine has available, the command
stops before computing anything; --force goes ahead anyway.

examples:
  cmbtools simulate --nside 128 --beam-fwhm 25 --noise-depth 35 --seed 1 --count 10 \\
                    --output-dir sims --prefix sky
  cmbtools simulate --spectrum my_cl.csv --nside 64 --seed 7 --output-dir sims
  cmbtools simulate --write-spectrum fiducial_cl.csv --lmax 2000 --count 0
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
    sky.add_argument("--lmax", type=positive_int, metavar="L",
                     help="largest multipole simulated (default 3*nside-1; with --count 0, the length "
                          "of the --write-spectrum table, default 2500)")
    beam = sky.add_mutually_exclusive_group()
    beam.add_argument("--beam-fwhm", type=positive_float, metavar="ARCMIN", help="Gaussian beam FWHM in arcmin")
    beam.add_argument("--beam-file", metavar="TABLE", help="beam transfer table B_l (columns ell, b_ell)")
    sky.add_argument("--no-pixel-window", action="store_true", help="do not apply the HEALPix pixel window")
    sky.add_argument("--monopole-uk", type=finite_float, default=0.0, metavar="UK", help="add a constant, in uK")
    sky.add_argument("--dipole-uk", type=finite_float, nargs=3, metavar=("AMPLITUDE", "LON", "LAT"),
                     help="add a dipole of AMPLITUDE uK towards (LON, LAT) degrees")

    noise = parser.add_argument_group("noise")
    noise.add_argument("--noise-depth", type=positive_float, metavar="UK_ARCMIN",
                       help="white-noise depth in uK-arcmin (no noise if absent)")
    noise.add_argument("--hits", metavar="MAP",
                       help="hits map (FITS): noise sigma ~ 1/sqrt(hits), the depth is the rms over observed "
                            "pixels; unobserved pixels are written as missing")
    noise.add_argument("--knee-ell", type=positive_float, metavar="L", help="knee multipole of 1/f noise")
    noise.add_argument("--knee-slope", type=positive_float, metavar="ALPHA",
                       help="slope of 1/f noise: N_l = N_white (1 + (knee/l)^ALPHA)")

    run = parser.add_argument_group("run and output")
    run.add_argument("--seed", type=positive_int, metavar="S",
                     help="master seed (default: drawn at random and printed)")
    run.add_argument("--count", type=bounded_int(MAX_SIMULATIONS), default=1, metavar="N", help="number of maps (default 1)")
    run.add_argument("--first-index", type=bounded_int(10**9), default=0, metavar="I",
                     help="index of the first map (default 0); map i is sky_{i:04d}.fits")
    run.add_argument("--output-dir", default=".", metavar="DIR", help="directory for the maps (default: .)")
    run.add_argument("--prefix", default="sky", help="file-name prefix (default: sky)")
    run.add_argument("--coord", choices=["G", "C", "E"], help="coordinate system to record in the headers")
    run.add_argument("--float32", action="store_true", help="write single-precision maps (half the size)")
    run.add_argument("--write-spectrum", metavar="TABLE",
                     help="also write the input spectrum (fiducial or --spectrum) as a table")
    add_threads(run)
    add_overwrite(parser)
    add_force(parser)


def _check_map_memory(args, nside, lmax):
    """Refuse (MemoryLimitError) maps that would not fit in memory, before the spectrum or any map is computed.

    One map at a time: the sky (draws, synthesis, dipole), its noise and their
    sum, then the copies made to write it and to report its rms; with hits,
    the hits map and the noise model's copy are held throughout.
    """
    from cmbtools._core.memory import check_memory, estimate_simulated_maps_bytes

    need = estimate_simulated_maps_bytes(
        nside, lmax, with_dipole=args.dipole_uk is not None, with_noise=args.noise_depth is not None,
        correlated_noise=args.knee_ell is not None, with_hits=args.hits is not None,
    )
    check_memory(need, f"Simulating maps at nside {nside} with lmax {lmax}", force=args.force)


def run(args) -> int:
    created = []
    try:
        return _run(args, created)
    except BaseException:
        for d in created:  # a directory this run made and left empty goes away again
            with contextlib.suppress(OSError):
                d.rmdir()
        raise


def _run(args, created) -> int:
    import math
    import re
    import warnings
    from pathlib import Path

    import numpy as np

    from cmbtools import simulate
    from cmbtools._core.files import check_input_file, check_output_path
    from cmbtools._core.checks import check_lmax, check_nside, missing_pixels
    from cmbtools.exceptions import CmbtoolsWarning, InvalidInputError

    if args.count > 0 and args.nside is None:
        raise InvalidInputError("--nside is required to simulate maps (or pass --count 0 with --write-spectrum)")
    if args.count == 0 and args.write_spectrum is None:
        raise InvalidInputError("nothing to do: --count is 0 and --write-spectrum is not given")
    if (args.knee_ell is None) != (args.knee_slope is None):
        raise InvalidInputError("--knee-ell and --knee-slope must be given together")
    if args.noise_depth is None and (args.hits is not None or args.knee_ell is not None):
        raise InvalidInputError("--hits and --knee-ell need --noise-depth")
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
    if args.beam_file is not None:
        check_input_file(args.beam_file)
    if args.hits is not None:
        check_input_file(args.hits)
    if args.count > 0:  # before the output directory is created
        _check_map_memory(args, nside, lmax)
    outputs = []
    if args.count > 0:
        out_dir = Path(args.output_dir)
        if not out_dir.exists():
            if not out_dir.parent.exists():
                raise InvalidInputError(f"--output-dir {str(out_dir)!r}: its parent directory does not exist")
            out_dir.mkdir()
            created.append(out_dir)
        outputs = [out_dir / f"{args.prefix}_{i:04d}.fits" for i in range(args.first_index, args.first_index + args.count)]
        for p in outputs:
            check_output_path(p, overwrite=args.overwrite)
    if args.write_spectrum is not None:
        check_output_path(args.write_spectrum, overwrite=args.overwrite)

    if args.spectrum is not None:
        cl = simulate.read_spectrum_table(args.spectrum)
        if cl.size < lmax + 1:
            raise InvalidInputError(
                f"{args.spectrum}: the table ends at ell = {cl.size - 1}, but --lmax is {lmax}; "
                "pass a smaller --lmax or a longer table"
            )
        source = f"table {args.spectrum}"
    else:
        cl = simulate.fiducial_cl(lmax)
        source = "built-in fiducial spectrum (Planck18 cosmology, default extras)"
    cl = cl[: lmax + 1]
    if args.write_spectrum is not None:
        simulate.write_spectrum_table(args.write_spectrum, cl, overwrite=args.overwrite,
                                      header={"source": source})
        print(f"wrote {args.write_spectrum} (ell 0..{lmax})")
    if args.count == 0:
        return 0

    if args.beam_fwhm is not None:
        beam, beam_text = args.beam_fwhm, f"Gaussian {args.beam_fwhm:g} arcmin"
    elif args.beam_file is not None:
        from cmbtools.spectrum.beams import read_beam

        beam, beam_text = read_beam(args.beam_file, lmax=lmax), f"table {args.beam_file}"
    else:
        beam, beam_text = None, "none"
    noise = None
    if args.noise_depth is not None:
        hits = None
        if args.hits is not None:
            from cmbtools.maps import read_map

            # hits are relative weights with no unit: read the values as they are
            hits, _ = read_map(args.hits, unit="K", force=args.force)
        noise = simulate.NoiseModel(args.noise_depth, hits=hits, ell_knee=args.knee_ell, alpha=args.knee_slope)
        if noise.nside is not None and noise.nside != nside:
            raise InvalidInputError(f"--hits has nside {noise.nside} but --nside is {nside}")
    dipole = None
    if args.dipole_uk is not None:
        amp, lon, lat = args.dipole_uk
        dipole = simulate.Dipole(amp * 1e-6, lon, lat)
    monopole = args.monopole_uk * 1e-6
    nthreads = args.threads or None

    from cmbtools.maps import write_map

    print(f"simulating {args.count} map(s): nside {nside}, lmax {lmax}, seed {seed}, spectrum: {source}")
    print(f"  beam: {beam_text}; pixel window: {'no' if args.no_pixel_window else 'yes'}; "
          f"noise: {'none' if noise is None else f'{args.noise_depth:g} uK-arcmin' + (' with hits' if noise.hits is not None else '') + (f', knee {args.knee_ell:g}, slope {args.knee_slope:g}' if args.knee_ell else '')}")
    for i, path in zip(range(args.first_index, args.first_index + args.count), outputs):
        rng = simulate.simulation_rng(seed, i)
        with warnings.catch_warnings():
            if args.force:  # the estimate above covers every map: warn once, not once per map
                warnings.filterwarnings("ignore", message=".*would need about .* going ahead", category=CmbtoolsWarning)
            m = simulate.gaussian_sky(cl, nside, lmax=lmax, beam=beam, pixel_window=not args.no_pixel_window,
                                      monopole=monopole, dipole=dipole, rng=rng, nthreads=nthreads, force=args.force)
            if noise is not None:
                m = m + simulate.noise_map(noise, nside, rng=rng, nthreads=nthreads, force=args.force)
        header = [
            ("CMBSEED", seed, "master seed of the simulation set"),
            ("CMBSIMID", i, "index of this simulation in the set"),
            ("CMBLMAX", lmax, "largest multipole simulated"),
            ("CMBBEAM", beam_text[:60], "beam"),
            ("CMBPIXWN", not args.no_pixel_window, "pixel window applied"),
            ("CMBNOISE", 0.0 if noise is None else float(args.noise_depth), "white-noise depth, uK-arcmin"),
        ]
        write_map(path, m, coord=args.coord, overwrite=args.overwrite, extra_header=header,
                  dtype="float32" if args.float32 else None, partial=noise is not None and noise.hits is not None)
        good = m[~missing_pixels(m)]  # the observed pixels
        peak = float(np.max(np.abs(good), initial=0.0))
        rms = peak * math.sqrt(float(np.mean((good / peak) ** 2))) if peak > 0 else 0.0  # no overflow in m**2
        print(f"wrote {path}  (rms {rms * 1e6:.1f} uK)")
    return 0
