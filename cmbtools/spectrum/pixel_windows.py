"""The HEALPix pixel window, computed from its definition and cached on disk.

healpy reads its pixel-window tables from files it downloads on demand, which
fails on a machine without a network.  cmbtools computes the window itself.

Definition (Gorski et al. 2005, ApJ 622, 759, section 4.1)::

    w_l**2 = (1/Npix) sum_p (4 pi / (2l+1)) sum_m |<Y_lm>_p|**2

where ``<Y_lm>_p`` is the average of Y_lm over pixel p.  By the addition
theorem this is the average over pixels of the mean of ``P_l(n . n')`` over
pairs of points n, n' of the same pixel; :func:`pixel_window` returns
``w_l = sqrt(w_l**2)`` (the amplitude, which multiplies the harmonic
coefficients of a pixelised map).

Method
------
1. *Geometry.*  Inside each of the 12 base faces, HEALPix maps the face
   coordinates (x, y) in [0, 1]^2 to the sphere with an equal-area map that is
   analytic in the equatorial zone (|z| < 2/3) and in each polar cap; a pixel
   at ``nside`` is the square [ix, ix+1] x [iy, iy+1] / nside.  Uniform
   weights in (x, y) are therefore the exact surface measure.
2. *Quadrature.*  Each pixel is integrated with an n x n Gauss-Legendre rule
   in its face coordinates (spectral accuracy; n = 5 for lmax <= 4 nside,
   n = 8 up to 8 nside).
   The two kinds of pixel where the map is not analytic get their own rule:
   the pixels of rings nside and 3 nside, cut along their diagonal by the
   |z| = 2/3 boundary, are split into two triangles with a collapsed
   Gauss-Legendre rule each; the pixels touching a pole (where the face map
   has a corner singularity) are refined recursively towards the pole.
3. *Symmetry.*  Pixels of one equatorial-zone ring are rotations of each
   other; polar-cap pixels repeat under the 4 quarter-turns, the mirror about
   the face's central meridian and the north/south reflection.  Only one
   representative of each class is integrated (about nside**2/4 + nside of
   them) and weighted by the size of its class.
4. *Pair histogram.*  For every representative, the chords |n_i - n_j| of
   all node pairs are accumulated, with the product of the node weights, in
   a fine histogram with linear (cloud-in-cell) assignment; then
   ``w_l**2 = sum_k H_k P_l(1 - c_k**2/2) / sum_k H_k`` with P_l from the
   three-term Legendre recurrence.

Accuracy (``scripts/pixwin_accuracy.py`` measures it): against a refined
rule (order 8 or 12, twice the bins, deeper pole refinement) the relative
error of w_l is below 5e-8 for l <= 3 nside and below 1.3e-6 up to
l = 4 nside, and below 5e-7 up to 8 nside (where order 8 is used), for every
nside from 1 to 512 (the error depends on l/nside only).  An independent
midpoint-rule integration of Y_lm over healpy sub-pixels of nside 1 and 2
agrees to a few 1e-6, the accuracy of that reference itself.

Cache
-----
Tables live in ``cmbtools._core.files.cache_dir()/pixel_window_nside{N}_v{ALGORITHM_VERSION}.npz``
with the inputs (nside, lmax, algorithm version), a hash of the inputs and a
SHA-256 checksum of the table; a file that does not match is recomputed with
a :class:`~cmbtools.exceptions.CmbtoolsWarning`.
"""

from __future__ import annotations

import collections
import functools
import math
import warnings
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

from cmbtools._core import files as _io
from cmbtools._core.checks import check_int, check_nside, resolve_nthreads
from cmbtools.exceptions import CmbtoolsWarning

__all__ = ["pixel_window", "pixel_quadrature", "ALGORITHM_VERSION"]

#: Version of the algorithm; part of the cache file name and checked on load.
ALGORITHM_VERSION = 1

#: The largest lmax supported, in units of nside.
MAX_LMAX_FACTOR = 8

# Ring index (in units of nside) of each base face's southernmost corner, and
# longitude index (in units of pi/4) of its centre: the HEALPix face layout.
_FACE_RING = np.array([2, 2, 2, 2, 3, 3, 3, 3, 4, 4, 4, 4])
_FACE_LONGITUDE = np.array([1, 3, 5, 7, 0, 2, 4, 6, 1, 3, 5, 7])

#: Levels of recursive refinement of a pixel towards the pole it touches.
_POLE_DEPTH = 10

#: Elements (representatives x node pairs) handled per block of the pair tally.
_BLOCK_ELEMENTS = 1 << 20


# --------------------------------------------------------------------------- geometry


def face_to_vectors(x, y, face) -> np.ndarray:
    """Unit vectors of points given by continuous face coordinates.

    Parameters
    ----------
    x, y : array_like
        Coordinates in [0, 1] inside the base face (pixel (ix, iy) at nside is
        ``[ix, ix+1] x [iy, iy+1] / nside``; its centre is at ``(ix+0.5)/nside``).
    face : int or array_like of int
        Base face, 0..11 (0-3 north, 4-7 equatorial, 8-11 south).

    Returns
    -------
    ndarray of shape broadcast(x, y, face).shape + (3,)
        Cartesian unit vectors.
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    face = np.asarray(face)
    ring = _FACE_RING[face] - x - y  # ring position in units of nside, 0 (N pole) .. 4 (S pole)
    north = ring < 1.0
    south = ring > 3.0
    cap = north | south
    nr = np.where(north, ring, np.where(south, 4.0 - ring, 1.0))
    one_minus_absz = nr * nr / 3.0
    z = np.where(north, 1.0 - one_minus_absz, np.where(south, one_minus_absz - 1.0, (2.0 - ring) * (2.0 / 3.0)))
    sin_theta = np.where(
        cap,
        np.sqrt(one_minus_absz * (2.0 - one_minus_absz)),
        np.sqrt(np.maximum((1.0 - z) * (1.0 + z), 0.0)),
    )
    safe_nr = np.where(nr > 1e-15, nr, 1.0)
    phi = np.where(nr > 1e-15, (np.pi / 4.0) * (_FACE_LONGITUDE[face] * nr + x - y) / safe_nr, 0.0)
    return np.stack(np.broadcast_arrays(sin_theta * np.cos(phi), sin_theta * np.sin(phi), z), axis=-1)


# --------------------------------------------------------------------------- quadrature rules


@functools.lru_cache(maxsize=8)
def _gauss_unit(n: int):
    """Gauss-Legendre nodes and weights on [0, 1]."""
    t, w = np.polynomial.legendre.leggauss(n)
    return 0.5 * (t + 1.0), 0.5 * w


def _square_rule(n: int):
    """n x n tensor Gauss-Legendre rule on the unit square; weights sum to 1."""
    u, wu = _gauss_unit(n)
    a, b = np.meshgrid(u, u, indexing="ij")
    return a.ravel(), b.ravel(), np.outer(wu, wu).ravel()


def _split_square_rule(n: int):
    """Rule on the unit square cut along the diagonal a + b = 1: a collapsed rule per triangle.

    The triangle a, b >= 0, a + b <= 1 is the image of the unit square under
    (u, v) -> (u, (1-u) v), Jacobian 1 - u; the other triangle is its mirror
    (a, b) -> (1-a, 1-b).  Weights sum to 1.
    """
    u, wu = _gauss_unit(n)
    uu, vv = np.meshgrid(u, u, indexing="ij")
    a = uu.ravel()
    b = ((1.0 - uu) * vv).ravel()
    w = np.outer(wu * (1.0 - u), wu).ravel()
    return np.concatenate([a, 1.0 - a]), np.concatenate([b, 1.0 - b]), np.concatenate([w, w])


def _cell_rule(x0: float, y0: float, size: float, n: int, depth: int):
    """Nodes (x, y) and weights (summing to size**2) for a square cell of north face 0.

    Cells touching the north pole (face corner x = y = 1) are split into four
    down to ``depth`` levels; cells cut by the |z| = 2/3 line x + y = 1 get
    the split-square rule; others the square rule.
    """
    if depth > 0 and x0 + size >= 1.0 - 1e-12 and y0 + size >= 1.0 - 1e-12:
        h = 0.5 * size
        parts = [_cell_rule(x0 + i * h, y0 + j * h, h, n, depth - 1) for i in (0, 1) for j in (0, 1)]
        return tuple(np.concatenate(z) for z in zip(*parts))
    if abs(x0 + y0 + size - 1.0) < 1e-12:
        a, b, w = _split_square_rule(n)
    else:
        a, b, w = _square_rule(n)
    return x0 + size * a, y0 + size * b, w * size * size


def _gauss_order(lmax: int, nside: int) -> int:
    """Gauss-Legendre order per pixel side for multipoles up to ``lmax``."""
    return 5 if lmax <= 4 * nside else 8


def _bins_per_unit(lmax: int, nside: int) -> int:
    """Histogram bins per unit of (chord x nside); the binning error scales as (lmax/nside / bins)**2."""
    return 1024 * max(4, math.ceil(lmax / nside))


# --------------------------------------------------------------------------- representatives


def _representatives(nside: int):
    """Groups of representative pixels sharing a quadrature rule and a multiplicity.

    Yields ``(face, ix, iy, multiplicity, kind)`` with integer arrays ``ix``,
    ``iy`` (at most about ``_BLOCK_ELEMENTS // 16`` long), an int
    ``multiplicity`` (the number of pixels each representative stands for)
    and ``kind`` one of ``"square"``, ``"split"`` (pixels of ring nside, cut
    along their diagonal by |z| = 2/3) or ``"pole"`` (the pixel touching the
    pole; for nside 1 it is also cut).  The multiplicities add up to
    12 nside**2.
    """
    n = nside
    # Polar cap of face 0 (x + y > 1), one of each mirror pair ix > iy; each stands
    # for 4 faces x 2 hemispheres x 2 mirror images.  Generated a few rows at a time.
    rows_per_group = max(1, (_BLOCK_ELEMENTS // 16) // max(1, n))
    for iy0 in range(0, n, rows_per_group):
        ix_list, iy_list = [], []
        for iy in range(iy0, min(n, iy0 + rows_per_group)):
            start = max(iy + 1, n - iy)
            if start < n:
                ix_list.append(np.arange(start, n))
                iy_list.append(np.full(n - start, iy))
        if ix_list:
            yield 0, np.concatenate(ix_list), np.concatenate(iy_list), 16, "square"
    # The mirror-symmetric pixels ix == iy of the cap (4 faces x 2 hemispheres), but the pole's.
    diag = np.arange((n + 1) // 2, n - 1)
    if diag.size:
        yield 0, diag, diag, 8, "square"
    # Ring nside (ix + iy = nside - 1, ix > iy): cut along the diagonal by |z| = 2/3.
    if n > 1:
        ix = np.arange(n // 2, n)
        yield 0, ix, n - 1 - ix, 16, "split"
    # The pixel at the pole.
    yield 0, np.array([n - 1]), np.array([n - 1]), 8, "pole"
    # Equatorial zone: rings nside+1 .. 2 nside-1 (and their southern mirrors)
    # from face 0, 4 nside identical pixels each; ring 2 nside from face 4.
    if n > 1:
        ix = np.arange(0, n - 1)
        yield 0, ix, np.zeros_like(ix), 8 * n, "square"
    yield 4, np.array([n - 1]), np.array([0]), 4 * n, "square"


def _local_rule(kind: str, nside: int, order: int, pole_depth: int):
    """Nodes (a, b) in a pixel's local coordinates [0, 1]^2 and weights summing to 1."""
    if kind == "square":
        return _square_rule(order)
    if kind == "split":
        return _split_square_rule(order)
    x, y, w = _cell_rule((nside - 1) / nside, (nside - 1) / nside, 1.0 / nside, order, pole_depth)
    return x * nside - (nside - 1), y * nside - (nside - 1), w * nside * nside


# --------------------------------------------------------------------------- pair histogram


def centred_chords(vectors, pair_i, pair_j, scale):
    """``(r, c)``: node vectors minus their pixel's mean, shape (B, K, 3), and ``scale |r_i - r_j|`` per pair, (B, P).

    The chords of a pixel's node pairs from the Gram matrix of the centred vectors (the centring keeps the
    differences of nearly equal unit vectors accurate).
    """
    r = vectors - vectors.mean(axis=1, keepdims=True)
    k = r.shape[1]
    gram = np.matmul(r, r.transpose(0, 2, 1)).reshape(r.shape[0], k * k)
    sq = np.einsum("bkc,bkc->bk", r, r)
    c = gram[:, pair_i * k + pair_j]  # |r_i - r_j|^2 = |r_i|^2 + |r_j|^2 - 2 r_i.r_j
    c *= -2.0
    c += sq[:, pair_i]
    c += sq[:, pair_j]
    np.maximum(c, 0.0, out=c)
    np.sqrt(c, out=c)
    c *= scale
    return r, c


def _tally_block(vectors, pair_i, pair_j, pair_weight, scale):
    """Cloud-in-cell histogram of scaled chords of node pairs i < j for a block of pixels.

    Parameters
    ----------
    vectors : ndarray of shape (B, K, 3)
        Node unit vectors of B pixels.
    pair_i, pair_j : ndarray of shape (P,)
        Node indices of the pairs.
    pair_weight : ndarray of shape (B*P,)
        ``2 w_i w_j`` of each pair, repeated for the B pixels.
    scale : float
        Bins per unit chord.

    Returns
    -------
    ndarray
        ``hist[k]``: the weight assigned to chord ``k / scale``.
    """
    _, c = centred_chords(vectors, pair_i, pair_j, scale)
    idx = c.astype(np.intp).ravel()
    c = c.ravel()
    c -= idx  # fractional position inside the bin
    c *= pair_weight
    s0 = np.bincount(idx, weights=pair_weight)
    s1 = np.bincount(idx, weights=c)
    hist = np.zeros(s0.size + 1)
    hist[:-1] += s0 - s1
    hist[1:] += s1
    return hist


def _add_into(total, part, factor):
    if part.size > total.size:
        total = np.concatenate([total, np.zeros(part.size - total.size)])
    total[: part.size] += factor * part
    return total


def _blocks(nside, order, pole_depth):
    """Work items ``(face, ix, iy, multiplicity, a, b, pairs_i, pairs_j, tiled_pair_weights)``."""
    rules = {}
    for face, ix, iy, mult, kind in _representatives(nside):
        if kind not in rules:
            a, b, w = _local_rule(kind, nside, order, pole_depth)
            pi, pj = np.triu_indices(a.size, 1)
            per_block = max(1, _BLOCK_ELEMENTS // max(1, pi.size))
            # the pair weights repeated for a full block; shorter blocks use its start
            tiled = np.tile(2.0 * w[pi] * w[pj], per_block)
            rules[kind] = (a, b, pi, pj, per_block, tiled)
        a, b, pi, pj, per_block, tiled = rules[kind]
        for start in range(0, ix.size, per_block):
            bx, by = ix[start : start + per_block], iy[start : start + per_block]
            yield face, bx, by, mult, a, b, pi, pj, tiled[: bx.size * pi.size]


def _diagonal_weight(nside, order, pole_depth) -> float:
    """Total weight of the pairs i == j (chord 0), sum over pixels of sum_i w_i**2."""
    total = 0.0
    for _, ix, _, mult, kind in _representatives(nside):
        w = _local_rule(kind, nside, order, pole_depth)[2]
        total += float(np.sum(w * w)) * mult * ix.size
    return total


def pair_histograms(nside, order, bins_per_unit, pole_depth, nthreads, tally):
    """Chord histograms over all pixels, in bins of width 1/(bins_per_unit * nside).

    ``tally(vectors, pair_i, pair_j, pair_weight, scale)`` returns the histograms of one block (a tuple:
    the plain pair weights first, then any weighted ones); every histogram gets the weight of the points
    paired with themselves (chord 0, where chi = 0 too).  Blocks are summed in a fixed order, so the result
    does not depend on thread timing; at most ``2 * nthreads`` blocks are in flight.
    """
    scale = float(bins_per_unit * nside)

    def run(item):
        face, bx, by, mult, a, b, pi, pj, pw = item
        vec = face_to_vectors((bx[:, None] + a[None, :]) / nside, (by[:, None] + b[None, :]) / nside, face)
        return mult, tally(vec, pi, pj, pw, scale)

    totals = None

    def add(mult, hists):
        nonlocal totals
        if totals is None:
            totals = [np.zeros(2) for _ in hists]
        for i, hist in enumerate(hists):
            totals[i] = _add_into(totals[i], hist, mult)

    if nthreads > 1:
        with ThreadPoolExecutor(max_workers=nthreads) as pool:
            pending = collections.deque()
            for item in _blocks(nside, order, pole_depth):
                pending.append(pool.submit(run, item))
                while len(pending) >= 2 * nthreads:
                    add(*pending.popleft().result())
            for future in pending:
                add(*future.result())
    else:
        for item in _blocks(nside, order, pole_depth):
            add(*run(item))
    diag = _diagonal_weight(nside, order, pole_depth)
    for total in totals:
        total[0] += diag
    return totals


def _legendre_sums(hist: np.ndarray, chord: np.ndarray, lmax: int) -> np.ndarray:
    """``sum_k hist_k P_l(1 - chord_k**2/2) / sum_k hist_k`` for l = 0..lmax."""
    nz = np.nonzero(hist)[0]
    h = hist[: nz[-1] + 1] / hist.sum()
    x = 1.0 - 0.5 * chord[: h.size] ** 2
    out = np.empty(lmax + 1)
    out[0] = 1.0
    if lmax == 0:
        return out
    p_prev = np.ones_like(x)
    p = x.copy()
    out[1] = h @ p
    for ell in range(1, lmax):
        p_next = ((2.0 * ell + 1.0) * x * p - ell * p_prev) / (ell + 1.0)
        p_prev, p = p, p_next
        out[ell + 1] = h @ p
    return out


def _compute_window_squared(nside, lmax, *, order=None, bins_per_unit=None, pole_depth=_POLE_DEPTH, nthreads=1):
    """w_l**2 for l = 0..lmax by the method of the module docstring (no cache, no checks)."""
    order = _gauss_order(lmax, nside) if order is None else order
    bins_per_unit = _bins_per_unit(lmax, nside) if bins_per_unit is None else bins_per_unit
    (hist,) = pair_histograms(nside, order, bins_per_unit, pole_depth, nthreads,
                              lambda *block: (_tally_block(*block),))
    chord = np.arange(hist.size) / (bins_per_unit * nside)
    return _legendre_sums(hist, chord, lmax)


# --------------------------------------------------------------------------- cache


def cache_path(nside: int) -> Path:
    """Path of the cached pixel-window table for ``nside``."""
    return _io.cache_dir() / f"pixel_window_nside{int(nside)}_v{ALGORITHM_VERSION}.npz"


def load_cached_window(path: Path, nside: int, lmax: int, *, kind: str, version: int, what: str):
    """The cached window sliced to ``lmax``, or None (with a warning if the file is bad or stale).

    ``kind`` names the window in the inputs hash, ``version`` is its ALGORITHM_VERSION, ``what`` names it
    in the warnings ('pixel-window', 'polarization pixel-window').
    """
    if not path.exists():
        return None
    try:
        # open the file here: np.load leaves its own handle open when the zip is damaged
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as data:
            window = np.array(data["window"], dtype=np.float64)
            f_nside = int(data["nside"])
            f_lmax = int(data["lmax"])
            f_version = int(data["version"])
            f_inputs = str(data["inputs_sha256"])
            f_checksum = str(data["checksum_sha256"])
    except Exception as exc:  # any file that cannot be parsed is corrupt (BadZipFile, KeyError, ...)
        warnings.warn(f"{path}: corrupt {what} cache ({type(exc).__name__}: {exc}); recomputing.", CmbtoolsWarning,
                      stacklevel=4)
        return None
    problem = None
    if f_version != version:
        problem = f"written by algorithm version {f_version}, not {version}"
    elif f_nside != nside:
        problem = f"holds nside {f_nside}, not {nside}"
    elif f_inputs != _io.sha256_arrays(kind, int(f_nside), int(f_lmax), int(version)):
        problem = "its recorded inputs do not match their hash"
    elif window.shape != (f_lmax + 1,) or _io.sha256_arrays(window) != f_checksum:
        problem = "its contents do not match their checksum"
    if problem is not None:
        warnings.warn(f"{path}: stale or corrupt {what} cache ({problem}); recomputing.", CmbtoolsWarning, stacklevel=4)
        return None
    if f_lmax < lmax:
        return None  # valid but too short: recompute to the larger lmax
    return window[: lmax + 1].copy()


def store_window(path: Path, nside: int, lmax: int, window: np.ndarray, *, kind: str, version: int, what: str) -> None:
    """Write a window table to the cache (atomically; a failure only warns).  Arguments as for the loader."""
    try:
        with _io.atomic_output(path, overwrite=True) as tmp:
            with open(tmp, "wb") as fh:
                np.savez(
                    fh,
                    window=window,
                    nside=np.int64(nside),
                    lmax=np.int64(lmax),
                    version=np.int64(version),
                    inputs_sha256=np.str_(_io.sha256_arrays(kind, int(nside), int(lmax), int(version))),
                    checksum_sha256=np.str_(_io.sha256_arrays(window)),
                )
    except OSError as exc:
        warnings.warn(f"could not write the {what} cache {path} ({exc}); the result is not cached.", CmbtoolsWarning,
                      stacklevel=4)


def cached_window(nside, lmax, use_cache, nthreads, *, path_of, compute_squared, kind, version, what):
    """The body of a public window function: check the arguments, read the cache or compute and store.

    ``path_of(nside)`` is the cache file, ``compute_squared(nside, lmax, nthreads=...)`` the squared window.
    The table is always computed to at least ``4 * nside`` and sliced.
    """
    nside = check_nside(nside)
    lmax = 4 * nside if lmax is None else check_int(lmax, "lmax", minimum=0, maximum=MAX_LMAX_FACTOR * nside)
    nthreads = resolve_nthreads(nthreads)
    lmax_table = max(lmax, 4 * nside)
    path = None
    if use_cache:
        try:
            path = path_of(nside)
        except OSError as exc:
            warnings.warn(f"the cache directory is not usable ({exc}); the pixel window is not cached.", CmbtoolsWarning,
                          stacklevel=3)
        if path is not None:
            cached = load_cached_window(path, nside, lmax, kind=kind, version=version, what=what)
            if cached is not None:
                return cached
    window = np.sqrt(np.maximum(compute_squared(nside, lmax_table, nthreads=nthreads), 0.0))
    if path is not None:
        store_window(path, nside, lmax_table, window, kind=kind, version=version, what=what)
    return window[: lmax + 1].copy()


# --------------------------------------------------------------------------- every pixel's own rule


def pixel_quadrature(nside, pixels=None, *, order=4, pole_depth=6):
    """Quadrature nodes and weights over each pixel: the continuous average of a field over a pixel.

    Each pixel gets the rule of the window computation (an ``order`` x ``order`` Gauss-Legendre rule in its
    face coordinates, exact surface measure; the pixels of rings nside and 3 nside, cut by |z| = 2/3, one
    collapsed rule per triangle; the pixels at the poles refined ``pole_depth`` times towards the pole), so
    ``sum_k weight_k f(node_k)`` over the nodes of pixel p is the mean of f over p.  For a field band-limited
    at 4 nside, order 4 averages to a relative error of a few 1e-5 (order 6 for 8 nside).

    Parameters
    ----------
    nside : int
        HEALPix resolution (a power of two).
    pixels : array_like of int, optional
        RING indices of the pixels (default: all of them).
    order : int, default=4
        Gauss-Legendre nodes per side of a pixel.
    pole_depth : int, default=6
        Levels of refinement of the pixels that touch a pole.

    Returns
    -------
    owner : ndarray of int
        For each node, its position in ``pixels``.
    theta_phi : ndarray of shape (n_nodes, 2)
        Colatitude and longitude of the nodes, radians.
    weight : ndarray of shape (n_nodes,)
        Weights; those of each pixel add up to 1.
    """
    import ducc0

    nside = check_nside(nside)
    order = check_int(order, "order", minimum=1, maximum=16)
    npix = 12 * nside * nside
    pixels = np.arange(npix) if pixels is None else np.asarray(pixels, dtype=np.int64).ravel()
    xyf = ducc0.healpix.Healpix_Base(nside, "RING").pix2xyf(pixels)
    ix, iy, face = xyf[:, 0], xyf[:, 1], xyf[:, 2]
    cap = (face < 4) | (face >= 8)
    north_pole = (face < 4) & (ix == nside - 1) & (iy == nside - 1)
    south_pole = (face >= 8) & (ix == 0) & (iy == 0)
    pole = north_pole | south_pole
    split = cap & (ix + iy == nside - 1) & ~pole
    owners, angles, weights = [], [], []
    for selected, kind in ((~(pole | split), "square"), (split, "split"), (pole, "pole")):
        where = np.nonzero(selected)[0]
        if where.size == 0:
            continue
        a, b, w = _local_rule(kind, nside, order, pole_depth)
        a, b = np.broadcast_to(a, (where.size, a.size)), np.broadcast_to(b, (where.size, b.size))
        if kind == "pole":  # the rule refines towards the corner x = y = 1 (north); the south pole is at x = y = 0
            flip = south_pole[where][:, None]
            a, b = np.where(flip, 1.0 - a, a), np.where(flip, 1.0 - b, b)
        for start in range(0, where.size, max(1, _BLOCK_ELEMENTS // w.size)):
            part = where[start : start + max(1, _BLOCK_ELEMENTS // w.size)]
            rows = slice(start, start + part.size)
            vec = face_to_vectors((ix[part][:, None] + a[rows]) / nside, (iy[part][:, None] + b[rows]) / nside,
                                  face[part][:, None]).reshape(-1, 3)
            theta = np.arccos(np.clip(vec[:, 2], -1.0, 1.0))
            phi = np.mod(np.arctan2(vec[:, 1], vec[:, 0]), 2.0 * np.pi)
            owners.append(np.repeat(part, w.size))
            angles.append(np.stack([theta, phi], axis=1))
            weights.append(np.tile(w, part.size))
    return np.concatenate(owners), np.concatenate(angles), np.concatenate(weights)


# --------------------------------------------------------------------------- public


def pixel_window(nside, lmax=None, *, use_cache=True, nthreads=None) -> np.ndarray:
    """HEALPix pixel window w_l, computed from its definition (no network needed).

    Parameters
    ----------
    nside : int
        HEALPix resolution (a power of two).
    lmax : int, optional
        Largest multipole, at most ``8 * nside``.  Default ``4 * nside``.
    use_cache : bool, default=True
        Read the table from, and store it in, ``cmbtools._core.files.cache_dir()``.
        The table is always computed to at least ``4 * nside`` and sliced.
    nthreads : int, optional
        Threads for the first computation (default: all cores, or
        ``$CMBTOOLS_NUM_THREADS``).

    Returns
    -------
    ndarray of shape (lmax+1,), float64
        ``w_l``, with ``w_0 = 1``; the harmonic coefficients of a map
        averaged over pixels are ``w_l`` times those of the sky.

    Warns
    -----
    CmbtoolsWarning
        If a cache file is corrupt or stale (it is recomputed), or cannot be written.

    Notes
    -----
    The relative error of w_l is below 5e-8 for l <= 3 nside, 1.3e-6 up to
    4 nside and 5e-7 up to 8 nside (see the module docstring).  A first
    computation takes under 1 s for nside <= 256, about 3 s at nside 1024 and
    15 s at nside 2048 on two cores (cost grows as nside**2); later calls
    read the cache.

    Examples
    --------
    >>> w = pixel_window(16)
    >>> round(float(w[32]), 6)
    0.822523
    """
    return cached_window(nside, lmax, use_cache, nthreads, path_of=cache_path, compute_squared=_compute_window_squared,
                         kind="pixel_window", version=ALGORITHM_VERSION, what="pixel-window")


# The polarization window lives in its own module (it reuses the quadrature above); its name is
# available here too.
from cmbtools.spectrum.spin2_pixel_window import polarization_pixel_window  # noqa: E402
