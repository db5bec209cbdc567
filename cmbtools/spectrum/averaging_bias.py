"""The bias of maps averaged into HEALPix pixels: what the isotropic pixel window leaves out.

A detector's map holds, in pixel p, the mean of the beam-convolved sky T over
the pixel's area.  The estimator's model is the sky convolved with the
isotropic pixel window w_l (Gorski et al. 2005, ApJ 622, 759, section 4.1:
the all-sky mean of every pixel's response) and sampled at the pixel
centres.  With the plain quadrature of the analysis, the expected
pseudo-spectrum of a map m weighted by masks W_a, W_b is exactly::

    E[C~_l] = (Omega^2 / 4 pi) sum_{p,q} W_a(p) W_b(q) P_l(n_p . n_q) Cov(m_p, m_q)

(the addition theorem; Omega = 4 pi / Npix).  For the model,
``Cov = xi_w(n_p . n_q)``, the correlation function of the spectrum
``C_l B_l^2 w_l^2``; for averaged pixels it is ``<xi(n . n')>_{n in p,
n' in q}``, the mean over both pixels of the correlation function of
``C_l B_l^2``.  Their difference is confined to pairs a few pixels (or beam
widths) apart, because it comes from the shapes of the pixels: pixels change
shape across the sphere (so the pixels under a mask do not respond as the
all-sky mean), and the averaging changes how the grid aliases power near
2-3 nside.  :func:`averaging_bias` sums the difference over the pairs
within a radius (:func:`pair_radius`; when the beam sets it, above l ~ 10 / radius
with the pairs' weights tapered towards it, see :data:`TAPER_FRACTION`), for a guess spectrum, as the formula above (pixel means by
each pixel's Gauss-Legendre rule, the correlation functions from tables made
by ducc0's m = 0 transforms, the Legendre sums of the pair histogram by its
adjoint), over every pixel p of the mask when it has at most
``MAX_CENTRES``, else over a stratified sample of that many (the mask's pixels
grouped by their place on the grid, bands of rings and, in the polar caps, the
folded azimuth within a ring's quarter, where the pixels' shapes change; one
pixel drawn from each of ``MAX_CENTRES`` runs of the grouped list: the sum is
unbiased, and its sampling error is measured in DEVELOPERS.md, "pixel
averages").  The operator folds it into the
binned matrix's coupling rows like the leakage of power above the bins, so
it is exact when the sky has the shape of the guess.

Cost: about 2 s for 4096 centres (0.4-0.7 ms each, with the pair radius of
7 pixels; quiet 2-core machine) whatever the nside, growing as the radius
squared (twice that with a beam of 2.2 pixels); below 4096 pixels in the
mask, less (an auto-spectrum then sums each unordered pair once).  The
estimator runs it on a thread beside the mask's transform and the coupling
kernel, and applies it by default at every nside
(:func:`cmbtools.spectrum.settings.default_averaged_pixels`).  Results are
kept, keyed by a hash of every input's values and of the code that computes
them: the last :data:`CACHE_SIZE` in memory, and each one on disk in
``cmbtools._core.files.cache_dir()`` (a file of ``8 (lmax + 1)`` bytes, see
:func:`averaging_bias`), so estimators built again with the same mask,
spectrum, window and lmax skip the sums, in this process or a later one (each
command of the CLI is a new process).
A cheaper path through the grid's symmetries (the pair sum of a pixel
depends only on its ring and, in the polar caps, its folded azimuth and the
ring's parity) was tried and left out: with ~300 representative pixels its
error stayed at 0.5-2e-3 of the pseudo-power at nside 256.

Measured (paired skies: averaged maps against pixel-centre maps with the
window, whose pseudo-spectrum the coupling gives exactly), nside 32, beam of
2.2 pixels, bins of 8 multipoles up to 2.7 nside: a cap beyond colatitude
120 degrees, an equatorial band and the full sky differ from the model by up
to -1.1 %, +1.1 % and +0.6 %; the bias computed here reproduces every bin
within 0.1 % (0.36 % in the full sky's bin at 2.4 nside).
"""

from __future__ import annotations

import collections
import contextlib
import functools
import hashlib
import math
import os
import tempfile
import threading
import warnings

import numpy as np

from cmbtools._core import files as _io
from cmbtools._core.checks import check_nside
from cmbtools.exceptions import CmbtoolsWarning

__all__ = ["averaging_bias", "clear_averaging_bias_cache", "pair_radius"]

#: The pairs are summed to this many pixel sizes at least ...
MIN_RADIUS_PIXELS = 7.0
#: ... and to this many times the beam's FWHM (estimated from where B_l^2 falls to one half) ...
RADIUS_BEAMS = 3.0
#: ... and to this many times FWHM^2 / pixel (the e-folding length in l of the beamed pseudo-power near the top of
#: the default bins, 2.5 nside, is about 1.1 pixel / FWHM^2 in 1/radians: the cut pair sum smooths the bias over
#: a few 1/radius in l, which must stay well inside it; a beam of 2.2 pixels then sums to 10 pixels) ...
RADIUS_BEAM_AREAS = 2.1
#: ... but not beyond this many pixels (a beam of 2.8 pixels or more; the cost grows as the radius squared).
MAX_RADIUS_PIXELS = 16.0
#: Above l ~ 10 / radius the pairs' weights fall as cos^2 over this outer fraction of the radius: a sharp cut of
#: the pair sums smooths the bias over l with a ringing kernel, which matters where the pseudo-power falls steeply
#: (on the demo survey, 2.4 nside with a 2.2-pixel beam, a sharp cut at 7 pixels put the top bin's bias at -2.0 %
#: of its pseudo-power against -1.14 % by brute force), while at low l the taper's loss of distant pairs costs more
#: (0.2-0.3 % of the pseudo-power at l < 10 / radius, nside 16).  See DEVELOPERS.md, "pixel averages".  At the
#: minimum radius (:data:`MIN_RADIUS_PIXELS`), where it did not help, and for a radius covering the sphere, every
#: pair is summed at full weight at every l.
TAPER_FRACTION = 0.5
#: The result is the sharp cut's below l = TAPER_FROM / radius, the tapered one's above l = TAPER_FULL / radius,
#: linear in l between.
TAPER_FROM, TAPER_FULL = 10.0, 15.0
#: The pairs of every pixel of the mask are summed when it has at most this many; above it, the pairs of a
#: stratified sample of this many of its pixels, each weighted by the number of pixels it stands for (see
#: :func:`averaging_bias`).
MAX_CENTRES = 4096
#: Above :data:`LARGE_NSIDE` the estimators sum the pairs of this many (W1: 4096 centres at nside 1024 made the
#: first call 1.42 times the bare kernels, against a target of 1.15; the sample's error, DEVELOPERS.md "pixel
#: averages", is then about 1e-3 of the pseudo-power instead of 2-7e-4).
LARGE_NSIDE_CENTRES = 1024
LARGE_NSIDE = 512


def default_centres(nside) -> int:
    """The sample size the estimators use at ``nside``: :data:`MAX_CENTRES`, or :data:`LARGE_NSIDE_CENTRES` above
    :data:`LARGE_NSIDE`."""
    return MAX_CENTRES if int(nside) <= LARGE_NSIDE else LARGE_NSIDE_CENTRES
#: Gauss-Legendre nodes per pixel side for the means over pixel pairs.
ORDER = 3
#: Intervals of the correlation-function tables (uniform in chord^2, cubic interpolation).
_TABLE_POINTS = 1 << 13
#: Bins of the pair-separation histogram (linear assignment).
_HIST_BINS = 1 << 11
#: Seed of the stratified sample of centres (fixed: the same inputs give the same result).
_SAMPLE_SEED = 20261203


def pair_radius(nside, sky_factor) -> float:
    """Angular radius of the pair sums: ``max(7 pixels, 3 FWHM, 2.1 FWHM^2 / pixel)``, at most 16 pixels.

    Parameters
    ----------
    nside : int
        Resolution of the map.
    sky_factor : array_like
        B_l^2 T_l (no pixel window) from l = 0; the FWHM is that of the Gaussian
        beam with the same half-power multipole, counted from the first multipole where the factor is
        positive (l = 2 for the spin-2 fields, whose factors vanish below; none: 7 pixels).

    Returns
    -------
    float
        Radians.
    """
    pixel = math.sqrt(4.0 * math.pi / (12 * nside * nside))
    f = np.asarray(sky_factor, dtype=np.float64)
    # the half power is found from the first multipole where the factor is positive: l = 0 for temperature, l = 2
    # for the spin-2 fields (their factors vanish below)
    positive = np.flatnonzero(f > 0)
    below = np.zeros(0, int)
    if positive.size:
        first = int(positive[0])
        below = first + np.nonzero(f[first:] <= 0.5 * f[first])[0]
    radius = MIN_RADIUS_PIXELS * pixel
    if below.size and below[0] > 1:
        l_half = float(below[0])
        sigma = math.sqrt(math.log(2.0)) / math.sqrt(l_half * (l_half + 1.0))
        fwhm = 2.0 * math.sqrt(2.0 * math.log(2.0)) * sigma
        radius = max(radius, min(max(RADIUS_BEAMS * fwhm, RADIUS_BEAM_AREAS * fwhm * fwhm / pixel),
                                 MAX_RADIUS_PIXELS * pixel))
    return radius


def _correlation_tables(spectra, chord_max, nthreads):
    """xi = sum_l (2l+1)/(4 pi) C_l P_l(1 - chord^2/2) on a grid uniform in chord^2, for each spectrum.

    Returns the grid step in chord^2 and, per spectrum, the (4, n) coefficients of the cubic through four
    neighbouring points (local Lagrange) on each interval, for :func:`_lookup`.
    """
    from cmbtools._core.sht import legendre_series

    step, u = _table_grid(chord_max)
    theta = 2.0 * np.arcsin(np.clip(np.sqrt(u) / 2.0, 0.0, 1.0))
    coeffs = np.array([(2.0 * np.arange(cl.size) + 1.0) / (4.0 * np.pi) * cl for cl in spectra])
    values = legendre_series(coeffs, theta, nthreads=nthreads)
    return step, [_cubic_table(v) for v in values]


def _table_grid(chord_max):
    """The tables' step in chord^2 and their points u = chord^2 (``_TABLE_POINTS + 3`` of them)."""
    step = chord_max**2 / _TABLE_POINTS
    return step, step * np.arange(_TABLE_POINTS + 3)


def _cubic_table(v):
    """(4, n) coefficients of the local cubics through the values ``v`` at the points of :func:`_table_grid`
    (shared with the spin-2 tables of :mod:`polarized_averaging_bias`)."""
    # interval i (from u_i to u_i+1) takes the points i-1 .. i+2; the first one 0 .. 3
    f0, f1, f2, f3 = v[:-3], v[1:-2], v[2:-1], v[3:]
    c = np.stack([f1, (-2 * f0 - 3 * f1 + 6 * f2 - f3) / 6.0, (f0 - 2 * f1 + f2) / 2.0,
                  (-f0 + 3 * f1 - 3 * f2 + f3) / 6.0])
    first = np.array([f0[0], (-11 * f0[0] + 18 * f1[0] - 9 * f2[0] + 2 * f3[0]) / 6.0,
                      (2 * f0[0] - 5 * f1[0] + 4 * f2[0] - f3[0]) / 2.0, c[3, 0]])
    return np.ascontiguousarray(np.concatenate([first[:, None], c], axis=1))


def _lookup(table, step, chord2):
    """Cubic interpolation of a table of :func:`_correlation_tables` at squared chords (overwrites ``chord2``)."""
    chord2 *= 1.0 / step
    i = chord2.astype(np.intp)
    np.minimum(i, table.shape[1] - 1, out=i)
    chord2 -= i
    out = table[3][i]
    for k in (2, 1, 0):
        out *= chord2
        out += table[k][i]
    return out


def _pixel_nodes(nside, pixels, order):
    """Unit vectors (n, order^2, 3) of each pixel's square Gauss-Legendre nodes and their weights (sum 1)."""
    import ducc0

    from cmbtools.spectrum.pixel_windows import face_to_vectors

    t, w = np.polynomial.legendre.leggauss(order)
    u, wu = 0.5 * (t + 1.0), 0.5 * w
    a, b = np.meshgrid(u, u, indexing="ij")
    weight = np.outer(wu, wu).ravel()
    pixels = np.asarray(pixels, dtype=np.int64)
    base = ducc0.healpix.Healpix_Base(nside, "RING")
    vec = np.empty((pixels.size, order * order, 3))
    for s in range(0, pixels.size, 1 << 14):  # in pieces: the face-to-sphere step holds ~5 times the result
        xyf = base.pix2xyf(pixels[s : s + (1 << 14)])
        vec[s : s + (1 << 14)] = face_to_vectors((xyf[:, 0:1] + a.ravel()[None, :]) / nside,
                                                  (xyf[:, 1:2] + b.ravel()[None, :]) / nside, xyf[:, 2:3])
    return vec, weight


def _centres(w_a, max_centres):
    """The pixels whose pairs are summed and the number of the mask's pixels each one stands for.

    Every pixel of mask a when it has at most ``max_centres``; else a stratified sample.  The mask's pixels are
    grouped by where they sit on the grid, so that each group holds pixels of nearly the same shape and
    latitude: bands of rings (``sqrt(max_centres)`` of them) and, in the polar caps, where a ring's pixels
    change shape along the ring, the folded azimuth within the ring's quarter (the shape repeats every quarter
    and is mirrored about its middle) cut into as many classes; in RING order within a group.  The list is
    cut into ``max_centres`` runs of consecutive pixels and one pixel drawn from each run (a fixed seed)
    stands for the run's pixels.  Every pixel of the mask is drawn with the chance of one over the count it
    stands for, so the sum is unbiased; the grouping makes it 2-8 times more accurate than runs in plain RING
    order (measured in DEVELOPERS.md, "pixel averages").
    """
    total = int(np.count_nonzero(w_a))
    if total <= max_centres:
        return np.flatnonzero(w_a), np.ones(total)
    nside = int(round(math.sqrt(w_a.size / 12)))
    bands = max(1, min(int(math.sqrt(max_centres)), 4 * nside - 1))
    # the rings: 4 i pixels in ring i of the north cap (i < nside), 4 nside in the belt, mirrored in the south;
    # a band of rings is a run of RING indices, so the sorted list is built (and held) one band at a time
    i = np.arange(1, 4 * nside, dtype=np.int64)
    ring_size = 4 * np.minimum(np.minimum(i, 4 * nside - i), nside)
    ring_start = np.concatenate([[0], np.cumsum(ring_size)])
    first_ring = np.searchsorted(np.arange(4 * nside - 1) * bands // (4 * nside - 1), np.arange(bands + 1))
    band_start = ring_start[first_ring]
    in_band = np.array([np.count_nonzero(w_a[a:b]) for a, b in zip(band_start[:-1], band_start[1:])])
    edges = np.linspace(0, total, max_centres + 1).astype(np.intp)
    count = np.diff(edges)
    rank = edges[:-1] + np.floor(np.random.default_rng(_SAMPLE_SEED).random(max_centres) * count).astype(np.intp)
    band_rank = np.concatenate([[0], np.cumsum(in_band)])
    centres = np.empty(max_centres, dtype=np.int64)
    for b in range(bands):
        lo, hi = np.searchsorted(rank, band_rank[b : b + 2])
        if lo == hi:
            continue
        a = band_start[b]
        # (32-bit offsets within the band, in place where possible: a band of nside 2048 holds ~2 million pixels,
        # and this runs beside the coupling kernel, whose memory peaks at the same time)
        pix = np.flatnonzero(w_a[a : band_start[b + 1]]).astype(np.int32)
        rings = first_ring[b] + np.arange(first_ring[b + 1] - first_ring[b])
        per_ring = np.diff(np.searchsorted(pix, ring_start[first_ring[b] : first_ring[b + 1] + 1] - a))
        quarter = np.repeat((ring_size[rings] // 4).astype(np.int32), per_ring)
        k = pix - np.repeat((ring_start[rings] - a).astype(np.int32), per_ring)
        k %= quarter
        other = quarter - 1
        other -= k
        np.minimum(k, other, out=k)
        del other
        k *= 2 * bands
        k //= quarter  # folded azimuth class, 0 .. bands - 1
        k[quarter == nside] = 0  # the belt: a ring's pixels have one shape
        del quarter
        centres[lo:hi] = a + pix[np.argsort(k, kind="stable")[rank[lo:hi] - band_rank[b]]]
    return centres, count.astype(np.float64)


#: Results kept in memory by :func:`averaging_bias` (least recently used dropped first; each is lmax + 1
#: numbers): a process that builds several estimators with one mask, guess spectrum, beam and lmax (a
#: notebook, a script trying bins, the test suite) pays for the pair sums once.
CACHE_SIZE = 8
_cache: "collections.OrderedDict[str, np.ndarray]" = collections.OrderedDict()
_cache_lock = threading.Lock()

#: Version of the disk cache's file layout; part of every file name.
DISK_CACHE_VERSION = 1
#: Disk cache files: ``averaging_bias_<first 32 hex digits of the key>_v<DISK_CACHE_VERSION>.npz``.
_DISK_PREFIX = "averaging_bias_"


def clear_averaging_bias_cache() -> None:
    """Forget every result kept by :func:`averaging_bias`, in memory and on disk, and by the polarized one (the
    next call computes again).

    The disk files are those of ``cmbtools._core.files.cache_dir()`` (the directory as it is named now); used
    by the benchmark before every timed first call, and by tests that count the computations.
    """
    import sys

    with _cache_lock:
        _cache.clear()
    polarized = sys.modules.get("cmbtools.spectrum.polarized_averaging_bias")
    if polarized is not None:
        polarized.clear_polarized_averaging_bias_cache()
    try:
        directory = _io.cache_dir()
        names = os.listdir(directory)
    except OSError:
        return
    for name in names:
        if name.startswith(_DISK_PREFIX) and name.endswith(".npz"):
            with contextlib.suppress(OSError):  # another process may have removed it first
                os.unlink(os.path.join(directory, name))


@functools.lru_cache(maxsize=1)
def _code_hash() -> str:
    """Hash of what the sums' numbers depend on besides the inputs: the source of this module, of the pixel
    rules (``spectrum.pixel_windows``) and of the transforms (``_core.sht``), and the versions of ducc0 and
    numpy."""
    from pathlib import Path

    import ducc0

    import cmbtools._core.sht as sht
    import cmbtools.spectrum.pixel_windows as pixel_windows

    sources = [Path(f).read_bytes() for f in (__file__, pixel_windows.__file__, sht.__file__)]
    return _io.sha256_arrays(*[s.decode("utf-8", "replace") for s in sources], ducc0.__version__, np.__version__)


def _cache_key(w_a, w_b, sky, win, lmax, radius, max_centres, order, nthreads) -> str:
    """A hash of everything the result depends on: both masks' values, the spectrum, the window, the settings,
    the code (:func:`_code_hash`).

    The nside is the masks' length; the module's table and histogram sizes are constants of the code.
    """
    return _digest(_code_hash(), (("mask", w_a), ("mask2", w_b), ("sky", sky), ("window", win)),
                   _settings(lmax, radius, max_centres, order, nthreads))


def _settings(lmax, radius, max_centres, order, *extra):
    """The pair sums' settings as both modules' keys hold them (``extra``: the temperature sums' nthreads), with
    the module's constants behind the numbers."""
    return (int(lmax), None if radius is None else float(radius).hex(), int(max_centres), int(order), *extra,
            MIN_RADIUS_PIXELS, TAPER_FRACTION, TAPER_FROM, TAPER_FULL, _TABLE_POINTS, _HIST_BINS)


def _digest(head, arrays, settings) -> str:
    """blake2b (32 bytes, hex) of ``head``, each (name, array or None) of ``arrays`` (name, shape, float64 bytes)
    and ``settings``' repr: the cache keys of this module and of :mod:`polarized_averaging_bias`."""
    h = hashlib.blake2b(digest_size=32)
    h.update(head.encode())
    for name, arr in arrays:
        h.update(name.encode())
        if arr is None:
            h.update(b"none")
            continue
        a = np.ascontiguousarray(arr, dtype=np.float64)
        h.update(repr(a.shape).encode())
        h.update(a.view(np.uint8).reshape(-1) if a.size else b"")
    h.update(repr(settings).encode())
    return h.hexdigest()


def _disk_path(key):
    return _io.cache_dir() / f"{_DISK_PREFIX}{key[:32]}_v{DISK_CACHE_VERSION}.npz"


def _read_disk(key, lmax):
    """The result stored for ``key``, or None (no file, an unusable cache directory, or a file that is not
    this key's intact result: computed again and rewritten)."""
    try:
        path = _disk_path(key)
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as data:
            result = np.array(data["bias"], dtype=np.float64)
            ok = str(data["key"]) == key and str(data["checksum_sha256"]) == _io.sha256_arrays(result)
    except Exception:  # missing, unreadable or foreign: the sums are done again
        return None
    if not ok or result.shape != (lmax + 1,):
        return None
    return result


def _write_disk(key, result):
    """Store ``result`` for ``key``: written to a temporary file of this process, then renamed over the final
    name (atomic: a reader sees the whole file or none; processes computing the same key at once each
    rename their own complete copy).  A failure only warns."""
    tmp = None
    try:
        path = _disk_path(key)
        fd, tmp = tempfile.mkstemp(prefix=f"{_DISK_PREFIX}writing_", suffix=".tmp", dir=path.parent)
        with os.fdopen(fd, "wb") as fh:
            np.savez(fh, bias=result, key=np.str_(key), checksum_sha256=np.str_(_io.sha256_arrays(result)))
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, 0o666 & ~_io._umask())
        os.replace(tmp, path)
        tmp = None
    except OSError as exc:
        warnings.warn(f"could not write the averaged-pixel cache ({exc}); the result is not cached.",
                      CmbtoolsWarning, stacklevel=3)
    finally:
        if tmp is not None:
            with contextlib.suppress(OSError):
                os.unlink(tmp)


def averaging_bias(mask, sky_cl, window, lmax, *, mask2=None, radius=None, max_centres=MAX_CENTRES,
                   order=ORDER, nthreads=1, use_cache=True) -> np.ndarray:
    """Expected pseudo-spectrum of pixel-averaged maps minus that of the window model, for one sky spectrum.

    With at most ``max_centres`` pixels in the mask, the pair sum of the module's formula is done over every
    pixel p of the mask and every pixel q of the second mask within ``radius`` (exact up to the radius and the
    pixel quadrature).  Above it, the sum over p is estimated from a stratified sample: the mask's pixels,
    grouped by band of rings and (in the polar caps) folded azimuth within the ring's quarter, are cut into
    ``max_centres`` runs, one pixel p drawn from each run (a fixed seed) has its pairs summed exactly
    (``W_a(p) W_b(q)`` for every q within the radius) and stands for the run's pixels, weighted by their number;
    the estimate is unbiased and the groups put pixels of nearly one shape and latitude in each run (measured
    accuracy in DEVELOPERS.md, "pixel averages").

    Parameters
    ----------
    mask : ndarray of shape (12 nside^2,)
        Weights of the map (RING).
    sky_cl : array_like
        Spectrum of the beam-convolved sky, C_l B_l^2 T_l, from l = 0 to the sky's band limit (no pixel window).
    window : array_like
        The pixel window w_l the estimator divides out, to the same band limit.
    lmax : int
        Largest multipole of the result.
    mask2 : ndarray, optional
        Weights of the second map of a cross-spectrum.
    radius : float, optional
        Largest pair separation, radians (default 7 pixels; the estimator passes :func:`pair_radius`).
    max_centres : int
        Pixels whose pairs are summed (all of the mask's when it has fewer; else a stratified sample).
    order : int
        Gauss-Legendre nodes per pixel side.
    nthreads : int
        Threads of the Legendre sums.
    use_cache : bool, default=True
        Read the result from, and store it in, the disk cache (``cmbtools._core.files.cache_dir()``); the
        memory cache is used either way.

    Returns
    -------
    ndarray of shape (lmax+1,)
        ``E[C~_l](averaged) - E[C~_l](model)``, in the units of ``sky_cl``: a new array on every call.

    Warns
    -----
    CmbtoolsWarning
        If the result cannot be written to the disk cache (it is returned all the same).

    Notes
    -----
    Results are keyed by a hash of every input's values (masks, spectrum, window to the spectrum's band limit,
    ``lmax``, ``radius``, ``max_centres``, ``order``, ``nthreads``) and of the code behind the numbers (this
    module, ``spectrum.pixel_windows``, ``_core.sht``, the ducc0 and numpy versions).  The last
    :data:`CACHE_SIZE` are kept in memory; every one is also stored on disk, as
    ``averaging_bias_<key>_v<DISK_CACHE_VERSION>.npz`` in ``cmbtools._core.files.cache_dir()`` (the result,
    the full key and a checksum; a file that does not match is ignored and rewritten), written to a
    temporary file of its own and renamed, so that processes sharing the directory never read a partial file.
    A repeated call returns a copy of the kept result (hashing a mask of nside 512 takes about 10 ms against
    1-3 s for the sums; reading the file about 1 ms).  :func:`clear_averaging_bias_cache` empties both.
    """
    w_a = np.asarray(mask, dtype=np.float64)
    w_b = None if mask2 is None else np.asarray(mask2, dtype=np.float64)
    sky = np.asarray(sky_cl, dtype=np.float64)
    win = np.asarray(window, dtype=np.float64)[: sky.size]
    key = _cache_key(w_a, w_b, sky, win, lmax, radius, max_centres, order, nthreads)
    with _cache_lock:
        kept = _cache.get(key)
        if kept is not None:
            _cache.move_to_end(key)
            return kept.copy()
    result = _read_disk(key, lmax) if use_cache else None
    if result is None:
        result = _pair_sums(w_a, w_b, sky, win, lmax, radius, max_centres, order, nthreads)
        if use_cache:
            _write_disk(key, result)
    kept = result.copy()
    kept.setflags(write=False)
    with _cache_lock:
        _cache[key] = kept
        _cache.move_to_end(key)
        while len(_cache) > CACHE_SIZE:
            _cache.popitem(last=False)
    return result


def _pair_grid(npix, radius):
    """The sums' grid: nside, the HEALPix base (RING), the radius (default :data:`MIN_RADIUS_PIXELS` pixels), the
    tables' largest chord (the radius plus two pixel radii), the pair histogram's bins per unit chord, and the
    radius of the taper (both modules): None (a sharp cut at every l) at the minimum radius, where the taper
    does not help (measured in DEVELOPERS.md, "pixel averages"), and for a radius covering the sphere."""
    import ducc0

    nside = check_nside(int(round(math.sqrt(npix / 12))))
    if radius is None:
        radius = MIN_RADIUS_PIXELS * math.sqrt(4.0 * math.pi / npix)
    base = ducc0.healpix.Healpix_Base(nside, "RING")
    reach = radius + 2.0 * base.max_pixrad()
    chord_max = 2.0 * math.sin(min(reach, math.pi) / 2.0) * 1.0001
    hist_chord_max = 2.0 * math.sin(min(radius, math.pi) / 2.0) * 1.0001
    pixel = math.sqrt(4.0 * math.pi / npix)
    tapered = TAPER_FRACTION > 0.0 and MIN_RADIUS_PIXELS * pixel * (1.0 + 1e-9) < radius < math.pi
    return nside, base, radius, chord_max, _HIST_BINS / hist_chord_max, (radius if tapered else None)


def _pixel_pairs(base, w_a, w_b, centres, share, radius, symmetric):
    """Every pair (p, q) of a centre p and a pixel q of the second mask within the radius, and its weight.

    ``share``: the pixels each centre stands for (:func:`_centres`).  ``symmetric`` (an auto-spectrum with every
    pixel of the mask a centre): the pair (q, p) is (p, q) again, so each unordered pair is kept once, counted
    twice.  Returns the pixels involved (sorted, once each), the index of p and of q into them, and the weights
    ``share W_a(p) W_b(q)``.
    """
    theta, phi = base.pix2ang(centres).T
    pairs_p, pairs_q, pairs_w = [], [], []
    for k, (p, th, ph) in enumerate(zip(centres, theta, phi)):
        ranges = base.query_disc(np.array([th, ph]), radius)
        q = np.concatenate([np.arange(a, b) for a, b in ranges])
        q = q[w_b[q] != 0.0]
        if symmetric:
            q = q[q >= p]
            pairs_w.append(np.where(q > p, 2.0, 1.0) * (w_a[p] * w_b[q]))
        else:
            pairs_w.append(share[k] * w_a[p] * w_b[q])
        pairs_p.append(np.full(q.size, p))
        pairs_q.append(q)
    pairs_p, pairs_q, pairs_w = np.concatenate(pairs_p), np.concatenate(pairs_q), np.concatenate(pairs_w)
    used, index = np.unique(np.concatenate([pairs_p, pairs_q]), return_inverse=True)
    return used, index[: pairs_p.size], index[pairs_p.size :], pairs_w


def _histogram_place(centre2, scale, taper_radius):
    """Bin and fraction of the linear assignment of squared centre chords to the pair histogram, and the pairs'
    taper (:data:`TAPER_FRACTION`: 1 to ``(1 - TAPER_FRACTION) taper_radius``, cos^2 to 0 there), or None
    (``taper_radius`` None: :func:`_pair_grid`)."""
    chord = np.sqrt(centre2)
    pos = chord * scale
    i = np.minimum(pos.astype(np.intp), _HIST_BINS)
    if taper_radius is None:
        return i, pos - i, None
    t = (2.0 * np.arcsin(np.minimum(chord / 2.0, 1.0)) / taper_radius - (1.0 - TAPER_FRACTION)) / TAPER_FRACTION
    taper = np.cos(0.5 * np.pi * np.clip(t, 0.0, 1.0)) ** 2
    return i, pos - i, taper


def _taper_share(lmax, taper_radius):
    """(lmax+1,) share of the tapered sums in the result: 0 below l = TAPER_FROM / radius, 1 above TAPER_FULL /
    radius (all 0 without a taper)."""
    if taper_radius is None:
        return np.zeros(lmax + 1)
    x = np.arange(lmax + 1) * taper_radius
    return np.clip((x - TAPER_FROM) / (TAPER_FULL - TAPER_FROM), 0.0, 1.0)


def _histograms_add(sharp, tapered, i, f, taper, weight):
    """Add ``weight`` to the sharp-cut histogram and ``weight * taper`` to the tapered one (None: no taper)."""
    _histogram_add(sharp, i, f, weight)
    if taper is not None:
        _histogram_add(tapered, i, f, weight * taper)


def _blend(adjoint, sharp, tapered, lmax, taper_radius):
    """The result from the two histograms (:func:`_taper_share`): ``adjoint(h)`` maps a histogram to l = 0..lmax."""
    out = adjoint(sharp)
    share = _taper_share(lmax, taper_radius)
    if np.any(share > 0.0):
        out += share * adjoint(tapered - sharp)
    return out


def _histogram_add(hist, i, f, weight):
    """Add ``weight`` to the histogram (``_HIST_BINS + 2`` bins) at the places of :func:`_histogram_place`."""
    hist += np.bincount(i, weights=weight * (1.0 - f), minlength=_HIST_BINS + 2)[: _HIST_BINS + 2]
    hist[1:] += np.bincount(i, weights=weight * f, minlength=_HIST_BINS + 1)[: _HIST_BINS + 1]


def _pair_sums(w_a, w_b, sky, win, lmax, radius, max_centres, order, nthreads):
    """:func:`averaging_bias` without the cache (``w_b`` None: the auto-spectrum)."""
    from cmbtools._core.sht import legendre_adjoint

    w_b = w_a if w_b is None else w_b
    npix = w_a.size
    nside, base, radius, chord_max, scale, taper_radius = _pair_grid(npix, radius)
    if not np.any(w_a != 0.0) or not np.any(w_b != 0.0):
        return np.zeros(lmax + 1)
    step, (xi_avg, xi_model) = _correlation_tables([sky, sky * win**2], chord_max, nthreads)

    centres, share = _centres(w_a, max_centres)
    hist, hist_t = np.zeros(_HIST_BINS + 2), np.zeros(_HIST_BINS + 2)
    block = max(1, (1 << 19) // (order**4))  # node pairs per block: ~20 MB of temporaries (they run beside the kernel)
    # for an auto-spectrum with every pixel of the mask a centre, each unordered pair once, counted twice (half
    # the work at small nside; the same sum to rounding)
    symmetric = w_b is w_a and centres.size == np.count_nonzero(w_a)
    used, index_p, index_q, pairs_w = _pixel_pairs(base, w_a, w_b, centres, share, radius, symmetric)
    # the nodes of every pixel involved, once
    nodes, wt = _pixel_nodes(nside, used, order)
    centre_vec = base.pix2vec(used)
    weight2 = np.outer(wt, wt).ravel()
    for s in range(0, pairs_w.size, block):
        ip, iq = index_p[s : s + block], index_q[s : s + block]
        c2 = np.matmul(nodes[ip], nodes[iq].transpose(0, 2, 1)).reshape(ip.size, -1)
        c2 *= -2.0
        c2 += 2.0
        np.clip(c2, 0.0, None, out=c2)
        mean = _lookup(xi_avg, step, c2) @ weight2
        centre2 = np.sum((centre_vec[ip] - centre_vec[iq]) ** 2, axis=1)
        i, f, taper = _histogram_place(centre2, scale, taper_radius)
        delta = mean - _lookup(xi_model, step, centre2)
        _histograms_add(hist, hist_t, i, f, taper, pairs_w[s : s + block] * delta)
    chord = np.arange(_HIST_BINS + 2) / scale
    omega = 4.0 * np.pi / npix
    angle = 2.0 * np.arcsin(np.clip(chord / 2.0, 0.0, 1.0))
    return omega**2 / (4.0 * np.pi) * _blend(lambda h: legendre_adjoint(h, angle, lmax, nthreads=nthreads),
                                            hist, hist_t, lmax, taper_radius)
