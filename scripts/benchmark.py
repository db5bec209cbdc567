"""Speed and memory of cmbtools, as ratios against reference runs in the same process.

Every workload builds its inputs from a fixed seed, times cmbtools and a
reference on the same inputs side by side (the median of several repeats;
these machines are noisy) and reports the ratio, with the target it must
meet.  One JSON object is printed on stdout (progress goes to stderr).

W1  nside 1024, lmax 3071, a galactic-latitude cut apodized to f_sky ~ 0.6,
    bins of width 30.  *First call*: building the estimator (mask transform,
    coupling matrix, binning, inversion) and estimating one map, against
    healpy's full-sky spectrum (``anafast``, its default 3 iterations) of the
    masked map at the same lmax; with the exact coupling matrix and with the
    fast approximation.  The exact first call is also measured against the
    floor of its own kernels, called bare in the same process (ducc0's
    analysis of the map at lmax, ducc0's analysis of the mask to 2 lmax,
    ducc0's coupling kernel; target 1.15) and against ``anafast`` with no
    iteration (one transform; reported, no target); ``first_call_profile``:
    where one first call spends its time (cProfile; each step in seconds and
    as a fraction of the bare kernels).  *Reuse*: the built
    estimator applied to a new map.  *Coupling build*: cmbtools' coupling
    matrix against ducc0's compiled kernel called directly on the same mask
    spectrum.  *Fast accuracy*: largest relative bandpower difference, fast vs
    exact, over all bins and over the bins below 2 nside.  At this lmax
    (above 2 nside) ``'fast'`` computes the exact matrix (see
    ``cmbtools.spectrum.coupling.fast_lmax_limit``); the banded approximation
    forced at the same lmax is reported too (``banded_*``), to show why.
W2  One Monte Carlo validation simulation at nside 512 (what every worker of
    ``cmbtools.simulate.validate_estimator`` runs: sky synthesis, noise,
    mask, monopole/dipole removal, analysis, binning) against one bare ducc0
    synthesis plus one bare ducc0 analysis at the same nside and lmax; also
    the time of drawing the simulation's random numbers alone, and
    ``profile``: where one simulation spends its time (cProfile; each step in
    seconds and as a fraction of the bare transforms, the floor).  W2':
    simulations per second of the local process pool with 2 workers over 1
    worker (one thread each, 48 simulations, counted once every worker has
    finished its first one; target at least 1.8).
W3  (``--large``) nside 2048, lmax 6143, fast approximation, first call,
    against healpy's full-sky spectrum; peak resident memory of the first
    call, measured in a fresh child process that holds the map and the mask
    (target 2 GB).
W4  Comoving distance at 1e6 redshifts between 0 and 1100 (building the
    table included) against astropy's ``comoving_distance`` (measured on 1e4
    redshifts and scaled by 100); largest relative difference from astropy.
W5  nside 512, lmax 1535, the W1 mask: the polarized estimator (TT, TE, TB, EE, EB, BB; first call and
    reuse on an I, Q, U map) against the temperature estimator on the same mask and bins (target 3.5x), both
    with the pixel-centre model (the polarized estimator's only one; the temperature estimator's default at this
    nside, the averaged-pixel model, is timed once beside it and reported without a target).
W6  nside 1024, lmax 3071, the W1 mask: the Gaussian bandpower covariance (``GaussianCovariance``
    built and applied to measured bandpowers, the estimator built and used before) of an
    auto-spectrum with per-pixel noise, and of a cross-spectrum (two masks, two noises), against one
    coupling-matrix computation of a weight map (its transform to 2 lmax plus ducc0's kernel; target 3,
    issue 12: "at most 3 coupling-matrix computations more than the estimator's first call"); the
    ratios against the kernel alone are reported too.

The pixel window of an nside is computed once and then read from the disk
cache (``cmbtools._core.files.cache_dir()``); the first calls above are timed with it
cached, and the time of a first computation is reported on its own.  The caches of the
averaged-pixel model (``spectrum.averaging_bias``, in memory and on disk) are emptied before every timed
first call, so a repeat never reuses the previous one's pair sums.

Usage::

    python scripts/benchmark.py              # W1, W2, W4 (a few minutes)
    python scripts/benchmark.py --large      # also W3 (about ten more minutes, 3 GB)
    python scripts/benchmark.py --quick      # tiny sizes, to check the script itself
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import statistics
import subprocess
import sys
import time
import warnings

import numpy as np


def _log(*args):
    print(*args, file=sys.stderr, flush=True)


def _median_time(fn, repeats):
    """Median wall time of ``fn()`` over ``repeats`` calls, and the last result."""
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), out


def _paired(ours, reference, repeats):
    """Median times of two functions measured alternately (so slow phases of the machine hit both)."""
    t_ours, t_ref, out = [], [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = ours()
        t_ours.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        reference()
        t_ref.append(time.perf_counter() - t0)
    return statistics.median(t_ours), statistics.median(t_ref), out


def _machine(threads):
    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo", encoding="ascii", errors="replace") as fh:
            for line in fh:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    import ducc0
    import healpy
    import numpy

    return {
        "cpu": cpu,
        "cores": os.cpu_count(),
        "threads": threads,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "ducc0": ducc0.__version__,
        "healpy": healpy.__version__,
    }


def _survey_inputs(nside, lmax, seed, n_maps=2):
    """Apodized latitude-cut mask (f_sky ~ 0.6) and ``n_maps`` beamed sky + white-noise maps."""
    import numpy as np

    from cmbtools import maps, simulate

    mask = maps.apodize_mask(maps.latitude_cut_mask(nside, 22.0), 2.0)
    cl = simulate.fiducial_cl(lmax)
    noise = simulate.NoiseModel(depth_uk_arcmin=30.0)
    skies = []
    for k in range(n_maps):
        rng = simulate.simulation_rng(seed, k)
        sky = simulate.gaussian_sky(cl, nside, lmax=lmax, beam=5.0, rng=rng)
        sky += simulate.noise_map(noise, nside, rng=rng)
        skies.append(sky)
    return mask, skies, float(np.mean(mask))


def _pixel_window_first(nside, lmax, threads):
    """Time of one pixel-window computation without the cache (then stored in it for the timed runs)."""
    from cmbtools import spectrum

    t0 = time.perf_counter()
    spectrum.pixel_window(nside, lmax, use_cache=False, nthreads=threads)
    first = time.perf_counter() - t0
    spectrum.pixel_window(nside, lmax, nthreads=threads)  # make sure the cache holds it
    return first


def workload_1(nside, repeats, threads, seed):
    import ducc0
    import healpy as hp
    import numpy as np

    from cmbtools import spectrum
    from cmbtools._core import sht as _sht
    from cmbtools.spectrum import coupling as _coupling
    from cmbtools.spectrum.averaging_bias import clear_averaging_bias_cache
    from cmbtools.exceptions import CmbtoolsWarning

    lmax = 3 * nside - 1
    _log(f"W1: inputs at nside {nside}")
    mask, (map1, map2), fsky = _survey_inputs(nside, lmax, seed)
    binning = spectrum.Binning.uniform(2, lmax, 30)
    pixwin_first = _pixel_window_first(nside, lmax, threads)
    masked = map1 * mask

    def anafast():
        return hp.anafast(masked, lmax=lmax)

    def anafast_no_iteration():
        return hp.anafast(masked, lmax=lmax, iter=0)

    geom = _sht.ring_geometry(nside)
    w_bare = np.zeros((1, 2 * lmax + 1))
    w_bare[0, :] = 1.0 / (1.0 + np.arange(2 * lmax + 1)) ** 2  # any spectrum: the kernel's time does not depend on it

    def bare_kernels():  # the floor of a first call: what no estimator can skip, called directly
        ducc0.sht.experimental.adjoint_synthesis(map=masked.reshape(1, -1), lmax=lmax, spin=0, nthreads=threads, **geom)
        ducc0.sht.experimental.adjoint_synthesis(map=mask.reshape(1, -1), lmax=2 * lmax, spin=0, nthreads=threads, **geom)
        out = np.empty((1, lmax + 1, lmax + 1))
        return ducc0.misc.experimental.coupling_matrix_rect(w_bare, (0,), out, nthreads=threads)

    def first_call(coupling):
        def run():
            clear_averaging_bias_cache()  # a first call: nothing kept from the previous repeat
            est = spectrum.SpectrumEstimator(mask, binning, lmax=lmax, coupling=coupling, nthreads=threads)
            return est, est.estimate(map1)
        return run

    _log("W1: first calls (exact, fast) against anafast")
    t_exact, t_ref1, (est_exact, bp_exact) = _paired(first_call("exact"), anafast, repeats)
    t_fast, t_ref2, (est_fast, bp_fast) = _paired(first_call("fast"), anafast, repeats)
    t_ref = statistics.median([t_ref1, t_ref2])

    _log("W1: first call (exact) against the bare kernels, and against anafast without iterations")
    t_exact_k, t_kernels, _ = _paired(first_call("exact"), bare_kernels, repeats)
    t_exact_0, t_anafast0, _ = _paired(first_call("exact"), anafast_no_iteration, repeats)

    _log("W1: profile of one first call (exact)")
    profile = _first_call_profile(first_call("exact"), t_kernels)

    _log("W1: reuse")
    t_reuse, t_ref3, _ = _paired(lambda: est_exact.estimate(map2), anafast, repeats)

    _log("W1: coupling build against the bare kernel")
    w_l = _coupling.mask_spectrum(mask, lmax=lmax, nthreads=threads)

    def ours_coupling():
        return _coupling.coupling_matrix(w_l, lmax, nthreads=threads)

    def bare_coupling():
        spec = np.zeros((1, 2 * lmax + 1))
        spec[0, :] = w_l[: 2 * lmax + 1]
        out = np.empty((1, lmax + 1, lmax + 1))
        return ducc0.misc.experimental.coupling_matrix_rect(spec, (0,), out, nthreads=threads)

    t_coupling, t_bare, _ = _paired(ours_coupling, bare_coupling, repeats)

    _log("W1: the banded approximation forced at this lmax")
    settings = _coupling.default_fast_settings(lmax)

    def banded_call():
        clear_averaging_bias_cache()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", CmbtoolsWarning)  # "above 2*nside": we know
            est = spectrum.SpectrumEstimator(
                mask, binning, lmax=lmax, coupling="fast", fast_exact_below=settings[0],
                fast_banded_below=settings[1], fast_band_half_width=settings[2], nthreads=threads,
            )
        return est.estimate(map1)

    t_banded, bp_banded = _median_time(banded_call, 1)

    low = bp_exact.ell_max < 2 * nside
    rel = np.abs(bp_fast.cl / bp_exact.cl - 1.0)
    rel_banded = np.abs(bp_banded.cl / bp_exact.cl - 1.0)
    return {
        "nside": nside,
        "lmax": lmax,
        "f_sky": round(fsky, 4),
        "n_bins": int(binning.n_bins),
        "repeats": repeats,
        "anafast_s": round(t_ref, 3),
        "first_call_exact_s": round(t_exact, 3),
        "first_call_fast_s": round(t_fast, 3),
        "first_call_exact_ratio": round(t_exact / t_ref1, 3),
        "bare_kernels_s": round(t_kernels, 3),
        "first_call_exact_vs_kernels_s": round(t_exact_k, 3),
        "first_call_vs_kernels_ratio": round(t_exact_k / t_kernels, 3),
        "anafast_no_iteration_s": round(t_anafast0, 3),
        "first_call_vs_anafast_no_iteration_ratio": round(t_exact_0 / t_anafast0, 3),
        "first_call_fast_ratio": round(t_fast / t_ref2, 3),
        "reuse_s": round(t_reuse, 3),
        "reuse_ratio": round(t_reuse / t_ref3, 3),
        "coupling_s": round(t_coupling, 3),
        "bare_kernel_s": round(t_bare, 3),
        "coupling_ratio": round(t_coupling / t_bare, 3),
        "fast_max_rel_diff_all_bins": float(f"{rel.max():.3g}"),
        "fast_max_rel_diff_below_2nside": float(f"{rel[low].max():.3g}"),
        "first_call_banded_s": round(t_banded, 3),
        "banded_max_rel_diff_all_bins": float(f"{rel_banded.max():.3g}"),
        "banded_max_rel_diff_below_2nside": float(f"{rel_banded[low].max():.3g}"),
        "pixel_window_first_computation_s": round(pixwin_first, 3),
        "first_call_profile": profile,
    }


#: Where a first call (exact coupling) spends its time: (label, function in the profile).  Indented labels are
#: parts of the step above them.
_FIRST_CALL_STEPS = (
    ("settings", "resolve_settings"),  # checks, hashes, pixel window (cached), guess spectrum
    ("settings.guess_spectrum", "fiducial_cl"),
    ("operator", "build_operator"),
    ("operator.mask_spectrum", "map_spectra"),  # (also counts the map's pseudo-spectrum in estimate)
    ("operator.coupling_kernel", "<built-in method ducc0.misc.experimental.coupling_matrix_rect>"),
    ("operator.deprojection_bias_and_row_factors", "_correction_rows"),
    ("operator.binned_inverse", "_binned_operator"),
    ("estimate", "estimate"),
    ("estimate.monopole_dipole_removal", "masked_without_monopole_dipole"),
)


def _first_call_profile(run_first_call, t_kernels):
    """Seconds of one first call in each step (cProfile, cumulative), and as a fraction of the bare kernels."""
    import cProfile
    import pstats

    prof = cProfile.Profile()
    t0 = time.perf_counter()
    prof.enable()
    run_first_call()
    prof.disable()
    wall = time.perf_counter() - t0
    stats = pstats.Stats(prof).stats
    out = {"first_call_s": round(wall, 3), "floor_bare_kernels_s": round(t_kernels, 3)}
    for label, name in _FIRST_CALL_STEPS:
        cum = sum(v[3] for k, v in stats.items() if k[2] == name)
        out[f"{label}_s"] = round(cum, 3)
        out[f"{label}_of_floor"] = round(cum / t_kernels, 3)
    return out


def workload_2(nside, repeats, threads, seed, n_pool_sims):
    import ducc0

    from cmbtools import maps, simulate, spectrum
    from cmbtools._core import sht as _sht
    from cmbtools.simulate.noise import _noise_map
    from cmbtools.simulate.validation import _simulate_and_estimate, _ValidationSetup

    lmax = 3 * nside - 1
    _log(f"W2: one simulation at nside {nside}")
    mask = maps.apodize_mask(maps.latitude_cut_mask(nside, 22.0), 2.0)
    binning = spectrum.Binning.uniform(2, lmax, 30)
    cl = simulate.fiducial_cl(lmax)
    noise = simulate.NoiseModel(depth_uk_arcmin=30.0)
    setups = {}
    for removal in (True, False):
        est = spectrum.SpectrumEstimator(
            mask, binning, lmax=lmax, pixel_window=False, remove_monopole_dipole=removal, nthreads=threads
        )
        setups[removal] = _ValidationSetup(
            estimator=est, cl=cl, sky_beam=np.asarray(est.beam), noise=noise,
            noise_cl=simulate.noise_spectrum(noise, lmax, nside), monopole=0.0, dipole=None,
            sky_filter=None, record_pseudo=False,
        )
    geom = _sht.ring_geometry(nside)
    alm = simulate.gaussian_alm(cl, lmax, rng=seed).reshape(1, -1)

    def bare():
        m = ducc0.sht.experimental.synthesis(alm=alm, lmax=lmax, spin=0, nthreads=threads, **geom)
        return ducc0.sht.experimental.adjoint_synthesis(map=m, lmax=lmax, spin=0, nthreads=threads, **geom)

    counter = iter(range(10**6))

    def one(removal):
        return lambda: _simulate_and_estimate(next(counter), simulate.simulation_rng(seed, 0), setups[removal])

    reps = max(repeats, 5)
    for _ in range(2):  # warm-up: first-use caches (ring geometry, coefficient layouts)
        one(True)()
        bare()
    t_sim, t_bare, _ = _paired(one(True), bare, reps)
    t_plain, t_bare2, _ = _paired(one(False), bare, reps)

    def random_numbers():  # the normal deviates one simulation draws: sky coefficients and pixel noise
        rng = simulate.simulation_rng(seed, 1)
        simulate.gaussian_alm(cl, lmax, rng=rng, nthreads=threads)
        return _noise_map(noise, nside, lmax, rng, threads, rings=setups[True].estimator._occupied_rings())

    t_random, t_bare3, _ = _paired(random_numbers, bare, reps)

    _log("W2: profile of one simulation")
    profile = _simulation_profile(one(True), reps, t_bare)

    _log("W2': simulations per second with 1 and 2 local worker processes")
    workers = _workers_speedup(setups[True], seed, n_sims=n_pool_sims)
    return {
        "nside": nside,
        "lmax": lmax,
        "repeats": reps,
        "simulation_s": round(t_sim, 4),
        "bare_synthesis_analysis_s": round(t_bare, 4),
        "simulation_ratio": round(t_sim / t_bare, 3),
        "simulation_without_monopole_dipole_removal_s": round(t_plain, 4),
        "simulation_without_monopole_dipole_removal_ratio": round(t_plain / t_bare2, 3),
        "random_numbers_s": round(t_random, 4),
        "random_numbers_ratio": round(t_random / t_bare3, 3),
        **workers,
        "profile": profile,
    }


#: Where one validation simulation spends its time: (label, how to find it in the profile, what it is).
_PROFILE_STEPS = (
    ("random_numbers", "block_normals", "normal deviates of the sky coefficients and the noise (block streams, threads)"),
    ("sky_synthesis", "<built-in method ducc0.sht.experimental.synthesis>", "ducc0 synthesis of the sky"),
    ("analysis", "<built-in method ducc0.sht.experimental.adjoint_synthesis>", "ducc0 analysis of the masked map"),
    ("monopole_dipole_removal", "subtract_fitted_coefficients", "fit and removal in harmonic space"),
    ("pseudo_spectrum", "alm2cl", "power spectrum of the coefficients"),
    ("map_checks_and_mask", "_checked_map", "value checks of the map (two reductions)"),
)


def _simulation_profile(run_one, repeats, t_bare):
    """Seconds per simulation in each step (cProfile, cumulative; the threads' work counts in block_normals' wait).

    ``rest`` is the wall time of the simulation minus the steps (masking, noise
    scaling, binning, Python); ``floor`` is the bare synthesis + analysis.
    """
    import cProfile
    import pstats

    prof = cProfile.Profile()
    t0 = time.perf_counter()
    prof.enable()
    for _ in range(repeats):
        run_one()
    prof.disable()
    wall = (time.perf_counter() - t0) / repeats
    stats = pstats.Stats(prof).stats
    out = {"simulation_s": round(wall, 4), "floor_bare_synthesis_analysis_s": round(t_bare, 4)}
    accounted = 0.0
    for label, name, _ in _PROFILE_STEPS:
        cum = sum(v[3] for k, v in stats.items() if k[2] == name) / repeats
        accounted += cum
        out[f"{label}_s"] = round(cum, 4)
        out[f"{label}_of_floor"] = round(cum / t_bare, 3)
    out["rest_s"] = round(max(0.0, wall - accounted), 4)
    out["rest_of_floor"] = round(max(0.0, wall - accounted) / t_bare, 3)
    return out


def _timed_validation_simulation(index, rng, setup):
    """A validation simulation that also returns when it finished (for the throughput of a pool)."""
    from cmbtools.simulate.validation import _simulate_and_estimate

    out = _simulate_and_estimate(index, rng, setup)
    out["finished_at"] = np.float64(time.time())
    out["worker"] = np.int64(os.getpid())
    return out


def _pool_rate(setup, seed, n_sims, workers):
    """Simulations per second of a local pool of ``workers`` processes with one thread each, once it runs.

    The rate from the moment every worker has finished its first simulation
    to the last one: the pool's start (spawning, imports, sending the
    estimator, first-use caches) is left out, as it comes once per run of
    hundreds of simulations.
    """
    from cmbtools import simulate

    sims = simulate.run_simulations(
        _timed_validation_simulation, n_sims, seed=seed, context=setup, workers=workers, threads_per_worker=1,
        progress=False,
    )
    done = np.asarray(sims["finished_at"])
    who = np.asarray(sims["worker"])
    # from the moment every worker has finished one simulation (start-up and first-use caches behind it)
    start = max(done[who == w].min() for w in np.unique(who))
    later = np.sort(done[done > start])
    if later.size < 2:  # (tiny runs: one worker did nearly everything) the whole run's rate
        return (done.size - 1) / max(done.max() - done.min(), 1e-9)
    return later.size / (later[-1] - start)


def _workers_speedup(setup, seed, n_sims):
    one = _pool_rate(setup, seed, n_sims, 1)
    two = _pool_rate(setup, seed, n_sims, 2)
    return {
        "pool_simulations": n_sims,
        "simulations_per_second_1_worker": round(one, 3),
        "simulations_per_second_2_workers": round(two, 3),
        "workers_speedup": round(two / one, 3),
    }


def _peak_rss_kb():
    """High-water mark of this process's resident memory in kB (VmHWM).

    Not ``getrusage``: on Linux its ``ru_maxrss`` carries over the parent's
    resident size from before ``exec`` (a forked copy of a large parent).
    """
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1])
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss


def _child_first_call(inputs_dir, threads, coupling):
    """In a fresh process: one first call on the inputs saved in ``inputs_dir``; prints time and peak memory."""
    import numpy as np

    from cmbtools import spectrum

    mask = np.load(os.path.join(inputs_dir, "mask.npy"))
    map1 = np.load(os.path.join(inputs_dir, "map.npy"))
    nside = int(round((mask.size / 12) ** 0.5))
    lmax = 3 * nside - 1
    binning = spectrum.Binning.uniform(2, lmax, 30)
    spectrum.pixel_window(nside, lmax, nthreads=threads)  # cached by the parent
    from cmbtools.spectrum.averaging_bias import clear_averaging_bias_cache

    clear_averaging_bias_cache()  # a first call: the parent's pair sums (on disk) not reused
    before = _peak_rss_kb()
    t0 = time.perf_counter()
    est = spectrum.SpectrumEstimator(mask, binning, lmax=lmax, coupling=coupling, nthreads=threads)
    est.estimate(map1)
    elapsed = time.perf_counter() - t0
    peak = _peak_rss_kb()
    print(json.dumps({"seconds": elapsed, "peak_rss_kb": peak, "rss_before_kb": before}))


def _peak_memory(mask, map1, threads, coupling):
    """Peak resident memory of a first call in a fresh process that holds only the mask and the map."""
    import tempfile

    import numpy as np

    with tempfile.TemporaryDirectory(prefix="cmbtools-benchmark-") as tmp:
        np.save(os.path.join(tmp, "mask.npy"), mask)
        np.save(os.path.join(tmp, "map.npy"), map1)
        cmd = [sys.executable, __file__, "--child-first-call", tmp, "--threads", str(threads), "--coupling", coupling]
        res = subprocess.run(cmd, capture_output=True, text=True, check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def workload_3(nside, repeats, threads, seed):
    import healpy as hp

    from cmbtools import spectrum
    from cmbtools.spectrum.averaging_bias import clear_averaging_bias_cache

    lmax = 3 * nside - 1
    _log(f"W3: inputs at nside {nside}")
    mask, (map1,), fsky = _survey_inputs(nside, lmax, seed, n_maps=1)
    binning = spectrum.Binning.uniform(2, lmax, 30)
    pixwin_first = _pixel_window_first(nside, lmax, threads)
    masked = map1 * mask

    def ours():
        clear_averaging_bias_cache()  # a first call: nothing kept from the previous repeat
        est = spectrum.SpectrumEstimator(mask, binning, lmax=lmax, coupling="fast", nthreads=threads)
        return est.estimate(map1)

    _log("W3: first call (fast) against anafast")
    t_fast, t_ref, _ = _paired(ours, lambda: hp.anafast(masked, lmax=lmax), repeats)
    masked = None  # free the copy before the child process runs
    _log("W3: peak memory in a fresh process")
    mem = _peak_memory(mask, map1, threads, "fast")
    return {
        "nside": nside,
        "lmax": lmax,
        "f_sky": round(fsky, 4),
        "repeats": repeats,
        "anafast_s": round(t_ref, 3),
        "first_call_fast_s": round(t_fast, 3),
        "first_call_fast_ratio": round(t_fast / t_ref, 3),
        "peak_rss_gb": round(mem["peak_rss_kb"] * 1024 / 1e9, 3),
        "rss_with_inputs_loaded_gb": round(mem["rss_before_kb"] * 1024 / 1e9, 3),
        "first_call_fast_in_child_s": round(mem["seconds"], 3),
        "pixel_window_first_computation_s": round(pixwin_first, 3),
    }


def workload_4(n_z, n_ref, repeats):
    import numpy as np
    from astropy.cosmology import Planck18

    from cmbtools import physics

    _log(f"W4: comoving distance at {n_z} redshifts")
    rng = np.random.default_rng(4)
    z = np.sort(rng.uniform(0.0, 1100.0, n_z))
    z_ref = z[:: max(1, n_z // n_ref)][:n_ref]
    t_ours, d = _median_time(lambda: physics.comoving_distance(z, Planck18), repeats)
    t_astropy, d_ref = _median_time(lambda: Planck18.comoving_distance(z_ref).to_value("Mpc"), max(1, repeats // 2))
    ours_on_ref = physics.comoving_distance(z_ref, Planck18)
    mask = d_ref > 0
    err = float(np.max(np.abs(ours_on_ref[mask] / d_ref[mask] - 1.0)))
    scaled = t_astropy * (n_z / z_ref.size)
    return {
        "n_redshifts": int(n_z),
        "n_astropy": int(z_ref.size),
        "cmbtools_s": round(t_ours, 4),
        "astropy_s": round(t_astropy, 4),
        "astropy_scaled_s": round(scaled, 3),
        "ratio": float(f"{t_ours / scaled:.3g}"),
        "max_rel_diff": float(f"{err:.3g}"),
    }


def workload_5(nside, repeats, threads, seed):
    """The polarized estimator (TT, TE, TB, EE, EB, BB) against the temperature one, same nside, lmax, mask."""
    import numpy as np

    from cmbtools import spectrum
    from cmbtools.spectrum.averaging_bias import clear_averaging_bias_cache

    lmax = 3 * nside - 1
    _log(f"W5: polarized inputs at nside {nside}")
    mask, (t1, t2), _ = _survey_inputs(nside, lmax, seed)
    rng = np.random.default_rng(seed)
    iqu = np.array([t1, 0.1 * t2, 0.1 * rng.permutation(t2)])  # Q, U: any maps of the right size and scale
    binning = spectrum.Binning.uniform(2, lmax, 30)
    spectrum.pixel_window(nside, lmax, nthreads=threads)  # cached before timing, as in W1

    def temperature_first(averaged_pixels=False):
        # the same pixel model as the polarized estimator timed (pixel centres): like for like
        clear_averaging_bias_cache()  # a first call: the averaged-pixel model's sums not kept from an earlier one
        est = spectrum.SpectrumEstimator(mask, binning, lmax=lmax, averaged_pixels=averaged_pixels, nthreads=threads)
        return est, est.estimate(t1)

    def polarized_first(purify=False):
        def run():
            # pixel centres like the temperature reference (the default at this nside is averaged pixels for TT)
            est = spectrum.PolarizedSpectrumEstimator(mask, binning, lmax=lmax, purify_b=purify, averaged_pixels=False,
                                                      nthreads=threads)
            return est, est.estimate(iqu)
        return run

    _log("W5: first calls, polarized against temperature")
    t_pol, t_temp, (est_pol, _) = _paired(polarized_first(), temperature_first, repeats)
    est_temp, _ = temperature_first()
    t_temp_avg, _ = _median_time(lambda: temperature_first(None), 1)  # the default pixel model at this nside
    _log("W5: reuse")
    t_pol_re, t_temp_re, _ = _paired(lambda: est_pol.estimate(iqu), lambda: est_temp.estimate(t1), repeats)
    return {
        "nside": nside,
        "lmax": lmax,
        "repeats": repeats,
        "temperature_first_call_s": round(t_temp, 3),
        "polarized_first_call_s": round(t_pol, 3),
        "first_call_ratio": round(t_pol / t_temp, 3),
        "temperature_first_call_default_pixel_model_s": round(t_temp_avg, 3),
        "temperature_reuse_s": round(t_temp_re, 3),
        "polarized_reuse_s": round(t_pol_re, 3),
        "reuse_ratio": round(t_pol_re / t_temp_re, 3),
    }


def workload_6(nside, repeats, threads, seed):
    """The Gaussian bandpower covariance (issue 12) against coupling-matrix computations, same lmax.

    The issue asks that the covariance cost "at most 3 coupling-matrix computations more than the
    estimator's first call": the estimator is built and has estimated a map before the covariance is
    timed, and the unit is one coupling-matrix computation of a weight map as the first call does it
    (the map's transform to 2 lmax and ducc0's kernel on its spectrum), since every matrix the covariance
    needs is of a weight map (mask products, noise-weighted masks) whose spectrum is not known beforehand.
    The ratios against the kernel alone (the unit used before 2026-12-03) are reported too.
    """
    import ducc0
    import numpy as np

    from cmbtools import spectrum
    from cmbtools.spectrum import coupling as _coupling

    lmax = 3 * nside - 1
    _log(f"W6: covariance inputs at nside {nside}")
    mask, (t1, t2), _ = _survey_inputs(nside, lmax, seed)
    binning = spectrum.Binning.uniform(2, lmax, 30)
    spectrum.pixel_window(nside, lmax, nthreads=threads)
    est = spectrum.SpectrumEstimator(mask, binning, lmax=lmax, nthreads=threads)
    est_x = spectrum.SpectrumEstimator(mask, binning, lmax=lmax, mask2=np.roll(mask, 7), nthreads=threads)
    hits = 0.5 + np.abs(np.cos(np.arange(mask.size) * 1e-4))
    noise = spectrum.PixelNoise.from_hits(hits, 30.0)
    noise2 = spectrum.PixelNoise.from_hits(hits[::-1].copy(), 40.0)
    bp = est.estimate(t1)
    parts = {"transform": [], "kernel": []}

    def coupling_computation():  # one coupling matrix of a weight map: its spectrum to 2 lmax, then the kernel
        t0 = time.perf_counter()
        w_l = _coupling.mask_spectrum(mask, lmax=lmax, nthreads=threads)
        t1_ = time.perf_counter()
        spec = np.zeros((1, 2 * lmax + 1))
        spec[0, :] = w_l[: 2 * lmax + 1]
        out = np.empty((1, lmax + 1, lmax + 1))
        ducc0.misc.experimental.coupling_matrix_rect(spec, (0,), out, nthreads=threads)
        parts["transform"].append(t1_ - t0)
        parts["kernel"].append(time.perf_counter() - t1_)
        return out

    def auto():
        return spectrum.GaussianCovariance(est, noise=noise, nthreads=threads).covariance(bp)

    def cross():
        return spectrum.GaussianCovariance(est_x, noise=noise, noise2=noise2, cross=True,
                                           nthreads=threads).covariance(bp)

    _log("W6: auto-spectrum covariance with per-pixel noise against one coupling-matrix computation")
    t_auto, t_unit, _ = _paired(auto, coupling_computation, repeats)
    _log("W6: cross-spectrum covariance (two masks, two noises)")
    t_cross, t_unit2, _ = _paired(cross, coupling_computation, repeats)
    t_kernel = statistics.median(parts["kernel"])
    t_transform = statistics.median(parts["transform"])
    gauss = spectrum.GaussianCovariance(est, noise=noise, nthreads=threads)
    _log("W6: a covariance for a new spectrum with the matrices built")
    t_again, _ = _median_time(lambda: gauss.covariance(bp), repeats)
    return {
        "nside": nside,
        "lmax": lmax,
        "repeats": repeats,
        "coupling_computation_s": round(statistics.median([t_unit, t_unit2]), 3),
        "mask_transform_s": round(t_transform, 3),
        "coupling_kernel_s": round(t_kernel, 3),
        "auto_covariance_s": round(t_auto, 3),
        "auto_in_coupling_matrices": round(t_auto / t_unit, 3),
        "auto_in_kernel_calls": round(t_auto / t_kernel, 3),
        "cross_covariance_s": round(t_cross, 3),
        "cross_in_coupling_matrices": round(t_cross / t_unit2, 3),
        "cross_in_kernel_calls": round(t_cross / t_kernel, 3),
        "new_spectrum_s": round(t_again, 3),
    }


TARGETS = {
    # (workload, key): upper limit -- issues 6 and 16
    ("W1", "first_call_exact_ratio"): 2.0,
    ("W1", "first_call_fast_ratio"): 1.2,
    ("W1", "first_call_vs_kernels_ratio"): 1.15,
    ("W1", "reuse_ratio"): 0.6,
    ("W1", "coupling_ratio"): 1.15,
    ("W1", "fast_max_rel_diff_all_bins"): 1e-3,
    ("W2", "simulation_ratio"): 1.2,
    ("W3", "first_call_fast_ratio"): 1.3,
    ("W3", "peak_rss_gb"): 2.0,
    ("W4", "ratio"): 0.01,
    ("W4", "max_rel_diff"): 1e-6,
    ("W5", "first_call_ratio"): 3.5,  # issue 14: polarized within 3.5x of temperature-only
    ("W5", "reuse_ratio"): 3.5,
    ("W6", "auto_in_coupling_matrices"): 3.0,  # issue 12: at most 3 coupling matrices beyond the first call
    ("W6", "cross_in_coupling_matrices"): 3.0,
}

#: Figures that must reach at least their target (issue 16).
LOWER_LIMITS = {
    ("W2", "workers_speedup"): 1.8,
}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--large", action="store_true", help="also run W3 (nside 2048)")
    parser.add_argument("--quick", action="store_true", help="tiny sizes, to check the script runs")
    parser.add_argument("--repeats", type=int, default=3, help="repeats per timing (median; default 3)")
    parser.add_argument("--threads", type=int, default=os.cpu_count() or 1, help="threads (default: all cores)")
    parser.add_argument("--seed", type=int, default=2026, help="seed of the inputs (default 2026)")
    parser.add_argument("--only", choices=["W1", "W2", "W3", "W4", "W5", "W6"], action="append", help="run only these workloads")
    parser.add_argument("--child-first-call", metavar="DIR", help=argparse.SUPPRESS)
    parser.add_argument("--coupling", default="fast", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    # healpy's transforms take their thread count from the environment, read when it is first used;
    # cmbtools' default thread count (the simulations' transforms and random numbers) too
    os.environ["OMP_NUM_THREADS"] = str(args.threads)
    os.environ["CMBTOOLS_NUM_THREADS"] = str(args.threads)

    if args.child_first_call:
        _child_first_call(args.child_first_call, args.threads, args.coupling)
        return 0

    sizes = {"W1": 1024, "W2": 512, "W3": 2048, "W4": (10**6, 10**4), "W5": 512, "W6": 1024}
    if args.quick:
        sizes = {"W1": 32, "W2": 32, "W3": 64, "W4": (10**4, 100), "W5": 32, "W6": 32}
    wanted = args.only or ["W1", "W2", "W4", "W5", "W6"] + (["W3"] if args.large else [])
    if args.quick and not args.only:
        wanted = ["W1", "W2", "W3", "W4", "W5", "W6"]
    repeats = 1 if args.quick else args.repeats

    report = {"machine": _machine(args.threads), "quick": bool(args.quick)}
    if "W1" in wanted:
        report["W1"] = workload_1(sizes["W1"], repeats, args.threads, args.seed)
    if "W2" in wanted:
        report["W2"] = workload_2(sizes["W2"], repeats, args.threads, args.seed, 12 if args.quick else 48)
    if "W3" in wanted:
        report["W3"] = workload_3(sizes["W3"], max(1, repeats - 2) if not args.quick else 1, args.threads, args.seed)
    if "W4" in wanted:
        report["W4"] = workload_4(*sizes["W4"], repeats)
    if "W5" in wanted:
        report["W5"] = workload_5(sizes["W5"], repeats, args.threads, args.seed)
    if "W6" in wanted:
        report["W6"] = workload_6(sizes["W6"], repeats, args.threads, args.seed)
    targets = {}
    for (name, key), limit in TARGETS.items():
        if name in report:
            value = report[name][key]
            targets[f"{name}.{key}"] = {"value": value, "target": limit, "met": bool(value <= limit)}
    for (name, key), limit in LOWER_LIMITS.items():
        if name in report:
            value = report[name][key]
            targets[f"{name}.{key}"] = {"value": value, "at_least": limit, "met": bool(value >= limit)}
    report["targets"] = targets
    print(json.dumps(report, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
