"""Write the bundled demo data of the (invented) Tern Sky Survey into maps/.

The Tern Sky Survey is a fictional ground-based survey at 145 GHz that maps
one circular patch, the Tern Field: radius 50 degrees around galactic
(l, b) = (250, -55) degrees, nside 128, Gaussian beam of FWHM 60 arcmin (about two 27.5-arcmin pixels), white
noise of 35 uK-arcmin, deeper towards the centre (from a hits map), with 15
invented point sources cut out by 1-degree discs.  Everything is drawn from
one fixed seed, so the files are reproducible (to float32 precision on any
machine).  Files written:

  tern_sky.fits        the survey map: fiducial CMB and point sources through the
                       beam, averaged over each pixel's area (as a detector's
                       map holds them), inhomogeneous noise (the mean of the
                       two halves), a 100 uK monopole and a 150 uK dipole
  tern_half1.fits      the first half of the data: same sky, independent noise
  tern_half2.fits      the second half (for cross-spectra)
  tern_hits.fits       relative hits (0 outside the field)
  tern_mask.fits       the analysis mask: cap, source holes, 3-degree cosine apodization
  tern_sources.csv     the 15 invented sources (lon_deg, lat_deg, peak_uk)
  tern_beam.csv        the beam transfer function B_l, l = 0..511
  fiducial_cl.csv      the built-in fiducial spectrum, l = 0..511
  tern_iqu_half1.fits  the first half as I, Q, U maps (HEALPix angle convention): I is tern_half1.fits;
                       Q and U hold the polarized sky (the built-in TE, EE and lensing-like BB), averaged
                       over each pixel in each point's own frame, with noise sqrt(2) times that of I per pixel
                       (the same detectors, differenced)
  tern_iqu_half2.fits  the second half as I, Q, U maps
  tern_pol_mask.fits   the polarization mask: the same cap without source holes (the invented sources are not
                       polarized), with a 6-degree cosine taper (smooth enough for B-mode purification)
  fiducial_pol_cl.csv  the built-in polarized spectra of the demo sky (TT, EE, BB, TE), l = 0..511

Maps are float32; the survey maps and the hits map are partial-sky files
(only the observed pixels, with an explicit pixel index), so the whole set is
about 3.5 MB.

usage: python scripts/make_demo_data.py [--output-dir maps] [--overwrite]
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np

#: The fixed seed of the demo data.
SEED = 1450
NSIDE = 128
LMAX = 4 * NSIDE - 1
FIELD_LON, FIELD_LAT, FIELD_RADIUS = 250.0, -55.0, 50.0
BEAM_FWHM_ARCMIN = 60.0
DEPTH_UK_ARCMIN = 35.0
N_SOURCES = 15
HOLE_RADIUS_DEG = 1.0
APODIZATION_DEG = 3.0
MONOPOLE_UK = 100.0
DIPOLE_UK = (150.0, 60.0, 30.0)  # amplitude, lon, lat (galactic)

#: Random streams (simulation indices of simulation_rng(SEED, i)).
STREAM_SKY, STREAM_NOISE_1, STREAM_NOISE_2, STREAM_SOURCES = 0, 1, 2, 3

#: Random streams of the Q and U noise of each half (I keeps the noise of the temperature halves).
STREAM_POL_NOISE_1, STREAM_POL_NOISE_2 = 4, 5
POL_APODIZATION_DEG = 6.0
#: Q and U averaged over each pixel too (the polarized estimator models pixel centres only; on the demo's polarized
#: example, lmax 191, the two kinds of map differ by at most 0.09 of an error bar in TE, EE and BB).
PIXELISE_POLARIZED = True

FILES = ("tern_sky.fits", "tern_half1.fits", "tern_half2.fits", "tern_hits.fits", "tern_mask.fits",
         "tern_sources.csv", "tern_beam.csv", "fiducial_cl.csv", "tern_iqu_half1.fits", "tern_iqu_half2.fits",
         "tern_pol_mask.fits", "fiducial_pol_cl.csv")


def _angle_to_centre(nside):
    import healpy as hp

    centre = hp.ang2vec(FIELD_LON, FIELD_LAT, lonlat=True)
    x, y, z = hp.pix2vec(nside, np.arange(12 * nside * nside))
    return np.degrees(np.arccos(np.clip(centre[0] * x + centre[1] * y + centre[2] * z, -1.0, 1.0)))


def hits_map(nside):
    """Relative hits: 1 at the centre, 0.25 at the edge (cos^2 profile), 0 outside the field."""
    theta = _angle_to_centre(nside)
    inside = theta <= FIELD_RADIUS
    hits = np.zeros(theta.size)
    hits[inside] = 0.25 + 0.75 * np.cos(0.5 * np.pi * theta[inside] / FIELD_RADIUS) ** 2
    return hits


def invent_sources(rng):
    """15 positions at least 2 degrees inside the field and 4 degrees apart, with peak amplitudes."""
    import healpy as hp

    centre = hp.ang2vec(FIELD_LON, FIELD_LAT, lonlat=True)
    # a local frame at the centre
    east = np.cross([0.0, 0.0, 1.0], centre)
    east /= np.linalg.norm(east)
    north = np.cross(centre, east)
    chosen = []
    while len(chosen) < N_SOURCES:
        r = np.radians(FIELD_RADIUS - 2.0 - APODIZATION_DEG) * math.sqrt(rng.uniform())
        phi = rng.uniform(0.0, 2.0 * np.pi)
        v = np.cos(r) * centre + np.sin(r) * (np.cos(phi) * east + np.sin(phi) * north)
        if all(np.degrees(np.arccos(np.clip(v @ w, -1, 1))) > 4.0 for w in chosen):
            chosen.append(v)
    lon, lat = hp.vec2ang(np.array(chosen), lonlat=True)
    peak = rng.uniform(300.0, 1500.0, N_SOURCES)
    return np.round(lon % 360.0, 4), np.round(lat, 4), np.round(peak, 1)


def source_map(nside, lon, lat, peak_uk):
    """Point sources smoothed by the Gaussian beam (flat-sky profile), averaged over each pixel, in K."""
    import healpy as hp

    from cmbtools.spectrum.pixel_windows import pixel_quadrature

    sigma = math.radians(BEAM_FWHM_ARCMIN / 60.0) / math.sqrt(8.0 * math.log(2.0))
    m = np.zeros(12 * nside * nside)
    for lo, la, a in zip(lon, lat, peak_uk):
        v = hp.ang2vec(lo, la, lonlat=True)
        pix = hp.query_disc(nside, v, 6.0 * sigma, inclusive=True)
        owner, theta_phi, weight = pixel_quadrature(nside, pix, order=4)  # 16 nodes in every pixel's own area
        x, y, z = hp.ang2vec(theta_phi[:, 0], theta_phi[:, 1]).T
        d = np.arccos(np.clip(v[0] * x + v[1] * y + v[2] * z, -1.0, 1.0))
        m[pix] += np.bincount(owner, weights=weight * a * 1e-6 * np.exp(-0.5 * (d / sigma) ** 2), minlength=pix.size)
    return m


def write_sources_csv(path, lon, lat, peak, overwrite):
    from cmbtools._core.files import atomic_output

    lines = ["# invented point sources of the Tern Field (Tern Sky Survey demo data; not real objects)",
             "# lon_deg, lat_deg: galactic position; peak_uk: peak brightness after the 60' beam, uK_CMB",
             "lon_deg,lat_deg,peak_uk"]
    lines += [f"{a:.4f},{b:.4f},{c:.1f}" for a, b, c in zip(lon, lat, peak)]
    with atomic_output(path, overwrite=overwrite) as tmp:
        tmp.write_text("\n".join(lines) + "\n", encoding="utf-8")


def make_demo_data(output_dir, *, overwrite=False, nthreads=None, log=print):
    """Write every demo file into ``output_dir`` (which must exist)."""
    from cmbtools import maps, simulate
    from cmbtools.spectrum.beams import gaussian_beam, write_beam
    from cmbtools._core.files import check_output_path

    out = Path(output_dir)
    paths = {name: out / name for name in FILES}
    for p in paths.values():
        check_output_path(p, overwrite=overwrite)

    header = [("SURVEY", "Tern Sky Survey (invented demo data)"), ("FREQ", 145.0, "GHz (fictional)"),
              ("CMBSEED", SEED, "master seed of the demo data")]

    cl = simulate.fiducial_cl(LMAX)
    simulate.write_spectrum_table(paths["fiducial_cl.csv"], cl, overwrite=overwrite,
                                  header={"source": f"cmbtools {simulate.theory_spectrum.FIDUCIAL_LABEL}"})
    beam = gaussian_beam(BEAM_FWHM_ARCMIN, LMAX)
    write_beam(paths["tern_beam.csv"], beam, overwrite=overwrite,
               header=f"Tern Sky Survey (invented demo data): Gaussian beam, FWHM {BEAM_FWHM_ARCMIN:g} arcmin")

    lon, lat, peak = invent_sources(simulate.simulation_rng(SEED, STREAM_SOURCES))
    write_sources_csv(paths["tern_sources.csv"], lon, lat, peak, overwrite)

    hits = hits_map(NSIDE)
    hits_out = np.where(hits > 0, hits, np.nan)  # unobserved pixels are left out of the partial file
    maps.write_sky_map(paths["tern_hits.fits"], hits_out, unit=None, coordinates="G", overwrite=overwrite,
                   header=header, dtype="float32", observed_only=True, column_name="HITS")

    field = maps.cap_mask(NSIDE, FIELD_LON, FIELD_LAT, FIELD_RADIUS)
    holes = maps.disc_mask(NSIDE, np.column_stack([lon, lat]), HOLE_RADIUS_DEG)
    mask = maps.apodize_mask(maps.combine_masks(field, holes), APODIZATION_DEG, taper="cosine", nthreads=nthreads)
    maps.write_mask(paths["tern_mask.fits"], mask, coordinates="G", overwrite=overwrite, header=header,
                    dtype="float32")

    sky = simulate.gaussian_sky(
        cl, NSIDE, lmax=LMAX, beam=beam, pixelise=True, monopole=MONOPOLE_UK * 1e-6,
        dipole=simulate.Dipole(DIPOLE_UK[0] * 1e-6, DIPOLE_UK[1], DIPOLE_UK[2]),
        rng=simulate.simulation_rng(SEED, STREAM_SKY), nthreads=nthreads,
    )
    sky += source_map(NSIDE, lon, lat, peak)
    half_noise = simulate.NoiseModel(DEPTH_UK_ARCMIN * math.sqrt(2.0), hits=hits)
    n1 = simulate.noise_map(half_noise, NSIDE, rng=simulate.simulation_rng(SEED, STREAM_NOISE_1))
    n2 = simulate.noise_map(half_noise, NSIDE, rng=simulate.simulation_rng(SEED, STREAM_NOISE_2))
    seen = hits > 0
    for name, noise in (("tern_half1.fits", n1), ("tern_half2.fits", n2), ("tern_sky.fits", 0.5 * (n1 + n2))):
        m = np.full(sky.size, np.nan)
        m[seen] = sky[seen] + noise[seen]
        depth = DEPTH_UK_ARCMIN * (1.0 if name == "tern_sky.fits" else math.sqrt(2.0))
        maps.write_sky_map(paths[name], m, coordinates="G", overwrite=overwrite, dtype="float32", observed_only=True,
                       header=header + [("CMBDEPTH", round(depth, 4), "white-noise depth, uK-arcmin")])
    _write_polarized(paths, header, hits, n1, n2, source_map(NSIDE, lon, lat, peak), half_noise, overwrite, nthreads)
    for p in paths.values():
        log(f"wrote {p} ({p.stat().st_size / 1024:.0f} KiB)")
    return paths


def _write_polarized(paths, header, hits, n1, n2, sources, half_noise, overwrite, nthreads):
    """The I, Q, U halves, the polarization mask and the polarized spectra.

    The T, E, B coefficients come from the temperature sky's random stream (:func:`gaussian_iqu_alm` draws its
    first field exactly as the temperature sky does, and the built-in TT is the temperature spectrum), so I is
    the temperature half map; Q and U get their own noise streams.
    """
    from cmbtools import maps, simulate

    spectra = simulate.fiducial_spectra(LMAX, lensing_bb=True)
    simulate.write_spectrum_table(paths["fiducial_pol_cl.csv"], {k: spectra[k] for k in ("TT", "EE", "BB", "TE")},
                                  overwrite=overwrite,
                                  header={"source": "cmbtools built-in fiducial spectra "
                                                    f"({simulate.theory_spectrum.FIDUCIAL_MODEL}; r = 0, "
                                                    "lensing-like BB template)"})
    iqu = simulate.gaussian_iqu_sky(
        spectra, NSIDE, lmax=LMAX, beam=BEAM_FWHM_ARCMIN, pixelise=PIXELISE_POLARIZED, monopole=MONOPOLE_UK * 1e-6,
        dipole=simulate.Dipole(DIPOLE_UK[0] * 1e-6, DIPOLE_UK[1], DIPOLE_UK[2]),
        rng=simulate.simulation_rng(SEED, STREAM_SKY), nthreads=nthreads,
    )
    iqu[0] += sources
    seen = hits > 0
    for name, n_i, stream in (("tern_iqu_half1.fits", n1, STREAM_POL_NOISE_1),
                              ("tern_iqu_half2.fits", n2, STREAM_POL_NOISE_2)):
        rng = simulate.simulation_rng(SEED, stream)
        m = np.full(iqu.shape, np.nan)
        m[0, seen] = iqu[0, seen] + n_i[seen]
        for k in (1, 2):  # Q, then U: sqrt(2) times the temperature noise of the half, per pixel
            n_p = simulate.noise_map(half_noise, NSIDE, rng=rng)
            m[k, seen] = iqu[k, seen] + math.sqrt(2.0) * n_p[seen]
        maps.write_iqu(paths[name], m, coordinates="G", overwrite=overwrite, dtype="float32", observed_only=True,
                       header=header + [("CMBDEPTH", round(DEPTH_UK_ARCMIN * math.sqrt(2.0), 4),
                                         "I noise, uK-arcmin; Q, U: sqrt(2) x")])
    field = maps.cap_mask(NSIDE, FIELD_LON, FIELD_LAT, FIELD_RADIUS)
    pol_mask = maps.apodize_mask(field, POL_APODIZATION_DEG, taper="cosine", nthreads=nthreads)
    maps.write_mask(paths["tern_pol_mask.fits"], pol_mask, coordinates="G", overwrite=overwrite, header=header,
                    dtype="float32")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description="Write the Tern Sky Survey demo data (invented) from a fixed seed.")
    parser.add_argument("--output-dir", default=str(Path(__file__).resolve().parent.parent / "maps"),
                        help="directory to write into (default: the repository's maps/)")
    parser.add_argument("--overwrite", action="store_true", help="replace existing files")
    parser.add_argument("--threads", type=int, default=None, help="threads for the transforms")
    args = parser.parse_args(argv)
    from cmbtools.exceptions import CmbtoolsError

    out = Path(args.output_dir)
    if not out.is_dir():
        print(f"make_demo_data: error: {out} is not a directory", file=sys.stderr)
        return 2
    try:
        make_demo_data(out, overwrite=args.overwrite, nthreads=args.threads)
    except CmbtoolsError as exc:
        print(f"make_demo_data: error: {exc}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
