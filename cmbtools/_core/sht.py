"""Spherical-harmonic transforms on HEALPix maps, through ducc0.

This is the only module that imports :mod:`ducc0.sht`.  Coefficients use
healpy's layout (m-major, ``index = m*(2*lmax+1-m)//2 + l``), so they can be
passed to healpy functions unchanged.  Maps are in RING ordering.

``map2alm`` is the adjoint synthesis scaled by the pixel area, optionally
followed by ``n_iter`` Jacobi refinements ``alm += A^T W (m - A alm)``, the
same scheme as healpy's ``map2alm(iter=...)`` (so results agree with healpy to
rounding for the same ``n_iter``).

Memory.  ducc0's one-call adjoint transform holds a buffer of Legendre
coefficients of ``n_rings x (lmax+1)`` complex values (805 MB at nside 2048,
lmax 6143; 1.6 GB for the mask transform to 2 lmax), on top of the result.
When that buffer and the result together would exceed
:data:`ONE_CALL_BYTES` (768 MB: nside 1024 with lmax 3071, and its mask
spectrum to 2 lmax, still run in one call, the fastest way), the transform
runs in pieces through ducc0's two halves (``map2leg``, ``leg2alm``): groups
of rings (each with its north-south mirror, so ducc0 keeps its symmetry
speed-up), and groups of m whose partial coefficients are added into the
result, each piece at most :data:`LEG_BUFFER_BYTES` (32 MB) and freed as soon
as it is added.  :func:`map_spectra` goes one step further for power spectra:
it loops over groups of m outermost and keeps only one group's coefficients,
so a mask spectrum to ``2 lmax`` never holds its full set of coefficients
(1.2 GB at nside 2048).  Every group of m transforms its rings again (ducc0's
ring FFTs): small pieces cost time (about 10% of a first call at nside 2048)
and save memory (the first call there peaks under 2 GB with its map and mask
loaded).  The pieces add up the same sums in another order (differences at
the 1e-15 level).
"""

from __future__ import annotations

import functools

import numpy as np
import ducc0

from cmbtools._core.checks import resolve_nthreads

__all__ = ["RingBlocks", "runs_in_pieces", "ring_geometry", "occupied_rings", "ring_pixel_ranges", "adjoint_sums", "synthesis_on_rings", "map2alm", "map_spectra", "alm2map", "alm2cl", "almxfl", "alm_size", "alm_ell",
           "map2alm_spin", "alm2map_spin", "map2alm_spin2", "alm2map_spin2", "synthesis_at_points"]

#: Largest work buffer (bytes: ducc0's Legendre coefficients plus the result) of a transform run in one
#: call; larger transforms run in pieces (see the module notes).
ONE_CALL_BYTES = 768 * 2**20

#: Largest buffer of Legendre coefficients (bytes), and largest group of coefficients, of one piece of a
#: split transform.
LEG_BUFFER_BYTES = 32 * 2**20


@functools.lru_cache(maxsize=16)
def ring_geometry(nside: int) -> dict:
    """Ring layout of a RING-ordered HEALPix map (theta, phi0, nphi, ringstart), cached."""
    info = ducc0.healpix.Healpix_Base(int(nside), "RING").sht_info()
    for v in info.values():
        v.setflags(write=False)
    return info


def alm_size(lmax: int, mmax: int | None = None) -> int:
    """Number of complex coefficients for ``lmax`` (and ``mmax``, default lmax)."""
    mmax = lmax if mmax is None else mmax
    return (mmax + 1) * (lmax + 1) - (mmax * (mmax + 1)) // 2


@functools.lru_cache(maxsize=8)
def alm_ell(lmax: int) -> np.ndarray:
    """ell of every coefficient in healpy's layout (read-only, cached)."""
    ell = np.concatenate([np.arange(m, lmax + 1) for m in range(lmax + 1)])
    ell.setflags(write=False)
    return ell


@functools.lru_cache(maxsize=8)
def _m_weights(lmax: int) -> np.ndarray:
    """1 for m = 0 coefficients, 2 for m > 0 (the m < 0 half is implied)."""
    w = np.full(alm_size(lmax), 2.0)
    w[: lmax + 1] = 1.0
    w.setflags(write=False)
    return w


def alm2map(alm, nside: int, lmax: int, *, nthreads: int | None = None, rings=None) -> np.ndarray:
    """Synthesize a RING-ordered map of ``nside`` from coefficients up to ``lmax``.

    ``rings`` (boolean over the rings, e.g. :func:`occupied_rings` of a mask)
    synthesizes only those rings and leaves the other pixels at 0: less work
    for a map that will be multiplied by that mask.
    """
    geom = ring_geometry(nside)
    alm = np.asarray(alm).reshape(1, -1)
    nthreads = resolve_nthreads(nthreads)
    if rings is None:
        return ducc0.sht.experimental.synthesis(alm=alm, lmax=lmax, spin=0, nthreads=nthreads, **geom)[0]
    out = np.zeros((1, 12 * int(nside) ** 2))
    if np.any(rings):
        ducc0.sht.experimental.synthesis(alm=alm, lmax=lmax, spin=0, nthreads=nthreads, map=out, **_subset(geom, rings))
    return out[0]


def ring_pixel_ranges(nside: int, rings) -> tuple[np.ndarray, np.ndarray]:
    """First and one-past-last pixel of every ring marked true in ``rings`` (RING ordering)."""
    geom = ring_geometry(nside)
    starts = geom["ringstart"].astype(np.int64)
    stops = starts + geom["nphi"].astype(np.int64)
    rings = np.asarray(rings, dtype=bool)
    return starts[rings], stops[rings]


def occupied_rings(m) -> np.ndarray:
    """Boolean array over the rings of a RING map: true where the ring has a non-zero pixel (read-only)."""
    m = np.asarray(m)
    nside = int(round(np.sqrt(m.size / 12)))
    starts = ring_geometry(nside)["ringstart"].astype(np.intp)
    out = np.zeros(starts.size, dtype=bool)
    bounds = np.append(starts, m.size)
    step = 64  # rings per block: no map-sized temporary
    for r0 in range(0, starts.size, step):
        r1 = min(starts.size, r0 + step)
        block = m[bounds[r0]:bounds[r1]] != 0
        out[r0:r1] = np.logical_or.reduceat(block, starts[r0:r1] - bounds[r0])
    out.setflags(write=False)
    return out


def _subset(geom: dict, rings) -> dict:
    if rings is None:
        return geom
    return {k: np.ascontiguousarray(v[rings]) for k, v in geom.items()}


def map2alm(m, lmax: int, *, n_iter: int = 0, nthreads: int | None = None, rings=None) -> np.ndarray:
    """Harmonic coefficients of a RING-ordered map up to ``lmax``.

    Parameters
    ----------
    m : ndarray of shape (12*nside**2,)
        The map (float32 or float64; float64 is used internally).
    lmax : int
        Largest multipole.
    n_iter : int, default=0
        Jacobi refinement steps (healpy's ``iter``); each costs one synthesis
        and one adjoint synthesis and reduces the quadrature error of the
        HEALPix grid.
    nthreads : int, optional
        Threads for ducc0 (default: all cores).
    rings : ndarray of bool, optional
        :func:`occupied_rings` of the map (or of a mask that zeroes it): the
        transform skips the rings known to be zero (same result, less work).
        Only with ``n_iter=0``.
    """
    m = np.asarray(m, dtype=np.float64)
    npix = m.size
    nside = int(round(np.sqrt(npix / 12)))
    geom = ring_geometry(nside)
    nthreads = resolve_nthreads(nthreads)
    scale = 4.0 * np.pi / npix
    if rings is not None and n_iter:
        raise ValueError("a ring subset only applies to the plain quadrature (n_iter=0)")
    if _leg_bytes(nside, lmax) + 16 * alm_size(lmax) <= ONE_CALL_BYTES:
        alm = ducc0.sht.experimental.adjoint_synthesis(
            map=m.reshape(1, -1), lmax=lmax, spin=0, nthreads=nthreads, **_subset(geom, rings)
        )
    else:
        alm = np.zeros((1, alm_size(lmax)), dtype=np.complex128)
        for m0, m1 in _m_groups(lmax, lmax + 1):
            start, stop = _m_block(lmax, m0, m1)
            _adjoint_add(alm[0, start:stop], m, nside, lmax, m0, m1, nthreads, rings)
    alm *= scale
    for _ in range(n_iter):
        resid = m - ducc0.sht.experimental.synthesis(alm=alm, lmax=lmax, spin=0, nthreads=nthreads, **geom)[0]
        corr = ducc0.sht.experimental.adjoint_synthesis(
            map=resid.reshape(1, -1), lmax=lmax, spin=0, nthreads=nthreads, **geom
        )
        alm += scale * corr
    return alm[0]


def runs_in_pieces(nside: int, lmax: int, n_maps: int = 1) -> bool:
    """Whether :func:`map_spectra` of ``n_maps`` maps transforms them in pieces (see the module notes)."""
    return _leg_bytes(nside, lmax) + 16 * alm_size(lmax) * n_maps > ONE_CALL_BYTES


def _leg_bytes(nside: int, lmax: int) -> int:
    return (4 * int(nside) - 1) * (int(lmax) + 1) * 16


def _m_block(lmax: int, m0: int, m1: int) -> tuple[int, int]:
    """Slice ``[start, stop)`` of the coefficients with ``m0 <= m < m1`` in healpy's layout."""
    start = m0 * (2 * lmax + 1 - m0) // 2 + m0
    stop = (m1 - 1) * (2 * lmax + 1 - (m1 - 1)) // 2 + lmax + 1
    return start, stop


def _m_groups(lmax: int, n_m: int, budget: int | None = None):
    """Consecutive ranges ``(m0, m1)`` of m up to ``n_m - 1`` whose coefficients fit in ``budget`` bytes each."""
    budget = LEG_BUFFER_BYTES if budget is None else budget
    m0 = 0
    while m0 < n_m:
        m1, size = m0, 0
        while m1 < n_m and (m1 == m0 or size + 16 * (lmax + 1 - m1) <= budget):
            size += 16 * (lmax + 1 - m1)
            m1 += 1
        yield m0, m1
        m0 = m1


def _ring_groups(nside: int, n_m: int, pixels_too: bool = False):
    """Groups of ring indices (north rings with their southern mirrors) whose Legendre buffer fits the budget.

    ``pixels_too``: their pixels (float64) fit in the budget too (for a map made group by group).
    """
    n_rings = 4 * int(nside) - 1
    half = (n_rings + 1) // 2  # the northern rings and the equator
    per_ring = 2 * 16 * n_m  # a ring and its mirror
    if pixels_too:
        per_ring = max(per_ring, 2 * 8 * 4 * int(nside))  # (at most 4 nside pixels a ring)
    step = max(1, LEG_BUFFER_BYTES // per_ring)
    for a in range(0, half, step):
        b = min(half, a + step)
        north = np.arange(a, b)
        south = n_rings - 1 - north
        yield np.concatenate([north, south[south >= half][::-1]])


class RingBlocks:
    """A RING map made on demand, a run of rings at a time, instead of held whole.

    ``values(r0, r1)`` returns the pixels of rings ``r0 .. r1-1`` (a new float64
    array).  The split transforms of :func:`map_spectra` take it in place of a
    map: each group of rings is made when it is transformed, so the map never
    exists whole (it is made once per group of m: cheap pixel work, against a
    map-sized array saved).  :meth:`full` makes the whole map.
    """

    def __init__(self, nside: int, values):
        self.nside = int(nside)
        self.size = 12 * self.nside**2
        self._values = values

    def block(self, rings):
        """Pixels of the (sorted) ring indices ``rings``, concatenated, and where each ring starts in them."""
        geom = ring_geometry(self.nside)
        rings = np.asarray(rings)
        cut = np.flatnonzero(np.diff(rings) != 1) + 1
        nphi = geom["nphi"][rings].astype(np.int64)
        starts = np.cumsum(nphi) - nphi
        runs = np.split(rings, cut)
        if len(runs) == 1:
            out = self._values(int(rings[0]), int(rings[-1]) + 1)
        else:
            out = np.empty(int(nphi.sum()))
            at = 0
            for run in runs:
                piece = self._values(int(run[0]), int(run[-1]) + 1)
                out[at:at + piece.size] = piece
                at += piece.size
                del piece
        return out.reshape(1, -1), starts.astype(np.uintp)

    def full(self) -> np.ndarray:
        """The whole map."""
        return self._values(0, 4 * self.nside - 1)


def _adjoint_add(acc, m, nside, lmax, m0, m1, nthreads, occupied=None):
    """Add the adjoint transform's coefficients with ``m0 <= m < m1`` (no area factor) into ``acc``.

    One group of rings at a time; the Legendre buffer is freed before the
    piece of coefficients is added, and the piece right after, so at most one
    of each is alive besides ``acc``.  ``m`` is a map or a :class:`RingBlocks`.
    """
    geom = ring_geometry(nside)
    mval = np.arange(m0, m1, dtype=np.uintp)
    start, _ = _m_block(lmax, m0, m1)
    mstart = (np.arange(m0, m1) * (2 * lmax + 1 - np.arange(m0, m1)) // 2 - start).astype(np.uintp)
    blocks = isinstance(m, RingBlocks)
    flat = None if blocks else m.reshape(1, -1)
    for rings in _ring_groups(nside, m1, pixels_too=blocks):
        if occupied is not None:
            rings = rings[occupied[rings]]
            if rings.size == 0:
                continue
        if blocks:
            flat, ringstart = m.block(rings)
        else:
            ringstart = geom["ringstart"][rings]
        leg = ducc0.sht.experimental.map2leg(
            map=flat, nphi=geom["nphi"][rings], phi0=geom["phi0"][rings], ringstart=ringstart,
            mmax=m1 - 1, nthreads=nthreads,
        )
        part = ducc0.sht.experimental.leg2alm(
            leg=leg[:, :, m0:m1], lmax=lmax, theta=geom["theta"][rings], mval=mval,
            mstart=mstart, nthreads=nthreads,
        )
        del leg
        acc += part[0]
        del part


def map_spectra(maps, lmax: int, *, nthreads: int | None = None, rings=None) -> list:
    """Auto- and cross-spectra of one or two RING maps (plain quadrature, no refinement), lean on memory.

    Returns ``[C11]`` for one map and ``[C11, C22, C12]`` for two, each of
    shape ``(lmax+1,)``; equal to ``alm2cl`` of ``map2alm(..., n_iter=0)``
    to rounding.  A map may be a :class:`RingBlocks` (made a group of rings at
    a time by the split transforms, whole for a transform in one call).  When the transform is large the coefficients are made one
    group of m at a time and reduced at once (see the module notes).
    ``rings`` (from :func:`occupied_rings`) lets the transforms skip rings
    that are zero in every map.
    """
    maps = [x if isinstance(x, RingBlocks) else np.asarray(x, dtype=np.float64) for x in maps]
    nside = int(round(np.sqrt(maps[0].size / 12)))
    nthreads = resolve_nthreads(nthreads)
    if not runs_in_pieces(nside, lmax, len(maps)):
        maps = [x.full() if isinstance(x, RingBlocks) else x for x in maps]
        alms = [map2alm(x, lmax, nthreads=nthreads, rings=rings) for x in maps]
        out = [alm2cl(a, lmax=lmax) for a in alms]
        if len(alms) == 2:
            out.append(alm2cl(alms[0], alms[1], lmax=lmax))
        return out
    scale = 4.0 * np.pi / maps[0].size
    cls = [np.zeros(lmax + 1) for _ in range(1 if len(maps) == 1 else 3)]
    for m0, m1 in _m_groups(lmax, lmax + 1):
        start, stop = _m_block(lmax, m0, m1)
        blocks = []
        for x in maps:
            acc = np.zeros(stop - start, dtype=np.complex128)
            _adjoint_add(acc, x, nside, lmax, m0, m1, nthreads, rings)
            acc *= scale
            blocks.append(acc)
        pairs = [(0, 0)] if len(maps) == 1 else [(0, 0), (1, 1), (0, 1)]
        for cl, (i, j) in zip(cls, pairs):
            a, b = blocks[i], blocks[j]
            offset = 0
            for mm in range(m0, m1):
                n = lmax + 1 - mm
                x, y = a[offset:offset + n], b[offset:offset + n]
                p = x.real * y.real + x.imag * y.imag
                if mm:
                    p *= 2.0
                cl[mm:] += p
                offset += n
    norm = 2.0 * np.arange(lmax + 1) + 1.0
    return [cl / norm for cl in cls]


#: Coefficients summed per step by alm2cl.
_CL_CHUNK = 1 << 16


def alm2cl(alm1, alm2=None, lmax: int | None = None) -> np.ndarray:
    """Angular (cross-)power spectrum ``C_l = sum_m a1_lm a2*_lm / (2l+1)`` (real part)."""
    alm1 = np.asarray(alm1)
    if lmax is None:
        lmax = int(round((np.sqrt(8 * alm1.size + 1) - 3) / 2))
    if alm1.size != alm_size(lmax):
        raise ValueError(f"alm has {alm1.size} coefficients, not the {alm_size(lmax)} of lmax={lmax}")
    if alm2 is not None:
        alm2 = np.asarray(alm2)
        if alm2.size != alm1.size:
            raise ValueError(f"the two alm have {alm1.size} and {alm2.size} coefficients")
    # groups of m-blocks (healpy's layout stores l = m..lmax of each m contiguously), each summed into ell
    # with one bincount: temporaries of at most _CL_CHUNK coefficients, few Python steps
    cl = np.zeros(lmax + 1)
    m = 0
    start = 0
    while m <= lmax:
        m_stop, stop = m, start
        while m_stop <= lmax and (stop - start < _CL_CHUNK or m_stop == m):
            stop += lmax + 1 - m_stop
            m_stop += 1
        a = alm1[start:stop]
        if alm2 is None:
            p = a.real * a.real + a.imag * a.imag
        else:
            b = alm2[start:stop]
            p = a.real * b.real + a.imag * b.imag
        ms = np.arange(m, m_stop)
        sizes = lmax + 1 - ms
        offsets = np.cumsum(sizes) - sizes
        ell = np.arange(stop - start) + np.repeat(ms - offsets, sizes)
        if m == 0:
            p[sizes[0]:] *= 2.0  # the m < 0 half
        else:
            p *= 2.0
        cl += np.bincount(ell, weights=p, minlength=lmax + 1)
        m, start = m_stop, stop
    return cl / (2.0 * np.arange(lmax + 1) + 1.0)


def almxfl(alm, fl, lmax: int) -> np.ndarray:
    """Multiply coefficients by a function of ell (a beam, a window, ...)."""
    fl = np.asarray(fl, dtype=np.float64)
    f = np.zeros(lmax + 1)
    n = min(fl.size, lmax + 1)
    f[:n] = fl[:n]
    alm = np.asarray(alm)
    out = np.empty(alm.shape, dtype=np.result_type(alm.dtype, np.float64))
    start = 0
    for m in range(lmax + 1):  # m-block by m-block: no coefficient-sized index or factor array
        stop = start + lmax + 1 - m
        np.multiply(alm[start:stop], f[m:], out=out[start:stop])
        start = stop
    return out


def adjoint_sums(m, lmax: int, *, nthreads: int, rings=None) -> np.ndarray:
    """Coefficients ``sum_p m_p Y*_lm(n_p)`` up to ``lmax`` (healpy's layout) of a RING map: the adjoint synthesis.

    Unlike :func:`map2alm` there is no quadrature weight: these are exact pixel sums.  ``rings`` (see
    :func:`occupied_rings`) skips the rings known to be zero.
    """
    nside = int(round(np.sqrt(m.size / 12)))
    return ducc0.sht.experimental.adjoint_synthesis(
        map=np.asarray(m).reshape(1, -1), lmax=lmax, spin=0, nthreads=nthreads, **_subset(ring_geometry(nside), rings)
    )[0]


def synthesis_on_rings(alm, lmax: int, nside: int, r0: int, r1: int, *, nthreads: int) -> np.ndarray:
    """The RING-map pixels of rings ``r0 .. r1-1`` synthesized from ``alm`` (shape (1, n), healpy's layout)."""
    geom = ring_geometry(nside)
    return ducc0.sht.experimental.synthesis(
        alm=alm, lmax=lmax, spin=0, nthreads=nthreads, theta=geom["theta"][r0:r1], phi0=geom["phi0"][r0:r1],
        nphi=geom["nphi"][r0:r1], ringstart=(geom["ringstart"][r0:r1] - geom["ringstart"][r0]),
    )[0]


def _axis_geometry(theta) -> dict:
    """One single-pixel ring per colatitude: the points (theta, 0) of the m = 0 transforms below."""
    theta = np.ascontiguousarray(theta, dtype=np.float64)
    n = theta.size
    return dict(theta=theta, nphi=np.ones(n, dtype=np.uintp), phi0=np.zeros(n), ringstart=np.arange(n, dtype=np.uintp))


def legendre_series(coeffs, theta, *, nthreads: int = 1) -> np.ndarray:
    """``sum_l c_l P_l(cos theta)`` at every colatitude ``theta``, for each row of ``coeffs`` (shape (k, lmax+1)).

    The m = 0 synthesis (``Y_l0 = sqrt((2l+1)/4pi) P_l``), so a degree-lmax series costs ducc0's Legendre
    recursion, not a Python loop over l.
    """
    c = np.atleast_2d(np.asarray(coeffs, dtype=np.float64))
    lmax = c.shape[1] - 1
    ell = np.arange(lmax + 1)
    alm = (c * np.sqrt(4.0 * np.pi / (2.0 * ell + 1.0))).astype(np.complex128)[:, None, :]
    out = ducc0.sht.experimental.synthesis(alm=alm, lmax=lmax, mmax=0, spin=0, nthreads=nthreads,
                                           **_axis_geometry(theta))
    return out[:, 0, :]


def legendre_adjoint(values, theta, lmax: int, *, nthreads: int = 1) -> np.ndarray:
    """``sum_k v_k P_l(cos theta_k)`` for l = 0..lmax: the adjoint of :func:`legendre_series`."""
    v = np.ascontiguousarray(values, dtype=np.float64).reshape(1, -1)
    out = ducc0.sht.experimental.adjoint_synthesis(map=v, lmax=lmax, mmax=0, spin=0, nthreads=nthreads,
                                                   **_axis_geometry(theta))[0]
    ell = np.arange(lmax + 1)
    return out.real * np.sqrt(4.0 * np.pi / (2.0 * ell + 1.0))



# ----------------------------------------------------------------------------- spin-weighted fields
# A spin-s field (s > 0) is a pair of real maps, the real and imaginary parts of sF (for s = 2: Q and U in
# the HEALPix polarization convention), with gradient and curl coefficients G, C (for s = 2: E and B) in
# healpy's layout and sign convention, sF = -sum (G + i C) sY_lm (healpy.map2alm(pol=True), ducc0).


def _adjoint_add_spin(acc, maps, nside, lmax, m0, m1, nthreads, spin, occupied=None):
    """:func:`_adjoint_add` for a pair of maps of spin ``spin``: adds into ``acc`` of shape (2, n)."""
    geom = ring_geometry(nside)
    mval = np.arange(m0, m1, dtype=np.uintp)
    start, _ = _m_block(lmax, m0, m1)
    mstart = (np.arange(m0, m1) * (2 * lmax + 1 - np.arange(m0, m1)) // 2 - start).astype(np.uintp)
    for rings in _ring_groups(nside, 2 * m1):
        if occupied is not None:
            rings = rings[occupied[rings]]
            if rings.size == 0:
                continue
        leg = ducc0.sht.experimental.map2leg(
            map=maps, nphi=geom["nphi"][rings], phi0=geom["phi0"][rings], ringstart=geom["ringstart"][rings],
            mmax=m1 - 1, nthreads=nthreads,
        )
        part = ducc0.sht.experimental.leg2alm(
            leg=np.ascontiguousarray(leg[:, :, m0:m1]), lmax=lmax, theta=geom["theta"][rings], spin=spin,
            mval=mval, mstart=mstart, nthreads=nthreads,
        )
        del leg
        acc += part
        del part


def map2alm_spin(maps, spin: int, lmax: int, *, n_iter: int = 0, nthreads: int | None = None, rings=None):
    """Gradient and curl coefficients of a spin-``spin`` field given as two real maps.

    Parameters
    ----------
    maps : ndarray of shape (2, 12*nside**2)
        Real and imaginary parts of the field (Q and U for spin 2), RING.
    spin : int
        The spin, >= 1.
    lmax : int
        Largest multipole.
    n_iter : int, default=0
        Jacobi refinement steps, as for :func:`map2alm`.
    nthreads : int, optional
        Threads for ducc0.
    rings : ndarray of bool, optional
        Rings known to be zero in both maps are skipped (``n_iter=0`` only).

    Returns
    -------
    ndarray of shape (2, alm_size(lmax)), complex
        G and C (E and B for spin 2), healpy's layout and signs.
    """
    maps = np.ascontiguousarray(np.asarray(maps, dtype=np.float64).reshape(2, -1))
    npix = maps.shape[1]
    nside = int(round(np.sqrt(npix / 12)))
    geom = ring_geometry(nside)
    nthreads = resolve_nthreads(nthreads)
    scale = 4.0 * np.pi / npix
    if rings is not None and n_iter:
        raise ValueError("a ring subset only applies to the plain quadrature (n_iter=0)")
    if 2 * (_leg_bytes(nside, lmax) + 16 * alm_size(lmax)) <= ONE_CALL_BYTES:
        alm = ducc0.sht.experimental.adjoint_synthesis(
            map=maps, lmax=lmax, spin=spin, nthreads=nthreads, **_subset(geom, rings)
        )
    else:
        alm = np.zeros((2, alm_size(lmax)), dtype=np.complex128)
        for m0, m1 in _m_groups(lmax, lmax + 1, LEG_BUFFER_BYTES // 2):
            start, stop = _m_block(lmax, m0, m1)
            _adjoint_add_spin(alm[:, start:stop], maps, nside, lmax, m0, m1, nthreads, spin, rings)
    alm *= scale
    for _ in range(n_iter):
        resid = maps - ducc0.sht.experimental.synthesis(alm=alm, lmax=lmax, spin=spin, nthreads=nthreads, **geom)
        alm += scale * ducc0.sht.experimental.adjoint_synthesis(
            map=resid, lmax=lmax, spin=spin, nthreads=nthreads, **geom
        )
    return alm


def alm2map_spin(alms, spin: int, nside: int, lmax: int, *, nthreads: int | None = None) -> np.ndarray:
    """The two real maps, shape (2, 12 nside^2), of a spin-``spin`` field from its G and C coefficients."""
    alms = np.ascontiguousarray(np.asarray(alms, dtype=np.complex128).reshape(2, -1))
    return ducc0.sht.experimental.synthesis(
        alm=alms, lmax=lmax, spin=spin, nthreads=resolve_nthreads(nthreads), **ring_geometry(nside)
    )


def map2alm_spin2(q, u, lmax: int, *, n_iter: int = 0, nthreads: int | None = None, rings=None):
    """E and B coefficients of Stokes Q, U (HEALPix convention; == healpy.map2alm(pol=True)[1:] to rounding)."""
    alm = map2alm_spin(np.stack([np.asarray(q, dtype=np.float64), np.asarray(u, dtype=np.float64)]), 2, lmax,
                       n_iter=n_iter, nthreads=nthreads, rings=rings)
    return alm[0], alm[1]


def alm2map_spin2(alm_e, alm_b, nside: int, lmax: int, *, nthreads: int | None = None):
    """Q and U maps (RING, HEALPix convention) of E and B coefficients (== healpy.alm2map(pol=True)[1:])."""
    out = alm2map_spin(np.stack([np.asarray(alm_e), np.asarray(alm_b)]), 2, nside, lmax, nthreads=nthreads)
    return out[0], out[1]


def synthesis_at_points(alms, spin: int, lmax: int, theta_phi, *, nthreads: int | None = None) -> np.ndarray:
    """Values of a band-limited field at arbitrary points (ducc0's non-uniform synthesis, accuracy 1e-10).

    ``alms`` has shape (1, n) for spin 0 and (2, n) (E, B) for spin 2; ``theta_phi`` has shape (k, 2).
    Returns shape (1, k) or (2, k): T, or Q and U in each point's own (theta, phi) frame, in the same
    conventions as :func:`alm2map` and :func:`alm2map_spin2` (equal to them at the pixel centres).
    """
    alms = np.ascontiguousarray(np.asarray(alms, dtype=np.complex128))
    loc = np.ascontiguousarray(np.asarray(theta_phi, dtype=np.float64))
    return ducc0.sht.experimental.synthesis_general(alm=alms, spin=int(spin), lmax=int(lmax), loc=loc,
                                                    epsilon=1e-10, nthreads=resolve_nthreads(nthreads))


def gauss_legendre_grid(lmax: int) -> tuple[int, int, np.ndarray]:
    """``(ntheta, nphi, weights)`` of the Gauss-Legendre grid that integrates products of degree ``4 lmax`` exactly.

    ``weights`` (shape (ntheta,)) is the area of one point of each ring: ``sum weights[:, None] * f``
    over the grid is the integral of ``f`` over the sphere.
    """
    ntheta, nphi = 2 * int(lmax) + 1, ducc0.fft.good_size(4 * int(lmax) + 1)  # a fast FFT length
    return ntheta, nphi, ducc0.misc.GL_weights(ntheta, nphi)


def gauss_legendre_synthesis(alm, lmax: int, ntheta: int, nphi: int, *, nthreads: int) -> np.ndarray:
    """The values, shape (ntheta, nphi), of coefficients up to ``lmax`` (healpy's layout) on a Gauss-Legendre grid."""
    return ducc0.sht.experimental.synthesis_2d(
        alm=np.asarray(alm).reshape(1, -1), lmax=lmax, spin=0, ntheta=ntheta, nphi=nphi, geometry="GL",
        nthreads=nthreads,
    )[0]


def gauss_legendre_projection(values, weights, lmax: int, *, nthreads: int) -> np.ndarray:
    """``int f Y*_lm`` up to ``lmax`` of a function given on a Gauss-Legendre grid with its ring ``weights``.

    Exact when the grid integrates ``f Y_lm`` exactly (see :func:`gauss_legendre_grid`).
    """
    v = np.asarray(values, dtype=np.float64) * np.reshape(weights, (-1, 1))
    return ducc0.sht.experimental.adjoint_synthesis_2d(
        map=v.reshape(1, *v.shape), lmax=lmax, spin=0, geometry="GL", nthreads=nthreads,
    )[0]
