"""Reproducible random streams: one seed sequence per simulation, normal deviates from block streams.

Random numbers
--------------
Every function takes ``rng``: a :class:`numpy.random.Generator`, a
:class:`numpy.random.SeedSequence`, an int seed, or ``None`` (fresh entropy),
resolved with :func:`numpy.random.default_rng`.  numpy's global state is never
used.  For a set of simulations, :func:`simulation_rng` gives the generator of
simulation ``index`` from one master ``seed`` as
``default_rng(SeedSequence(seed, spawn_key=(index,)))``.  Simulation ``i``
depends only on ``(seed, i)``: the maps are the same whatever order the
simulations run in, however many workers share them, however many threads
each uses, and on any machine (numpy's PCG64 bit generator and its normal
sampler are platform independent).

Block streams (part of the reproducibility contract)
----------------------------------------------------
The normal deviates of skies and noise (about 5.5 million per simulation at
nside 512) come from many independent streams, so that several threads draw
them at once and the numbers do not depend on how many do.  Every set of
draws (:func:`block_normals`) takes the *next child* of the seed sequence of
the generator passed in, ``rng.bit_generator.seed_seq.spawn(1)[0]``: the first
set drawn from simulation ``i``'s generator uses the spawn key ``(i, 0)``, the
second ``(i, 1)``, and so on.  The set is cut into blocks of
:data:`BLOCK_SIZE` (65536) values; block ``k`` holds values
``k * BLOCK_SIZE`` to ``(k + 1) * BLOCK_SIZE - 1`` and is the
``standard_normal`` output of
``Generator(PCG64(SeedSequence(seed, spawn_key=child_key + (k,))))``.  The
generator's own stream is not used (only its seed sequence's count of
children moves), so a caller that also draws from ``rng`` directly gets
numbers independent of the blocks.  An int seed ``s`` always gives the
first child of ``SeedSequence(s)``; a generator whose bit generator has no
seed sequence (one given a raw state) takes its child from 256 bits drawn
from it.

Order of the sets of draws in a simulation:

* :func:`~cmbtools.simulate.gaussian_alm` draws one set of
  ``2 alm_size(lmax)`` values: value ``2j`` is the real part of coefficient
  ``j`` (healpy's order), value ``2j + 1`` its imaginary part, each times
  ``sqrt(C_l / 2)``; for ``m = 0`` the real part is times ``sqrt(C_l)`` and the
  imaginary draw is not used.
* :func:`~cmbtools.simulate.noise_map` draws one set of ``12 nside^2`` values
  for the white part (value ``p`` is pixel ``p``, RING order), then, only
  with a knee, the coefficients of the correlated part as ``gaussian_alm``
  does.
* :func:`~cmbtools.simulate.gaussian_sky` draws only the coefficients of
  ``gaussian_alm``.

A validation simulation draws its sky first, then its noise.  Because every
block has its own stream, a simulation whose mask leaves whole rings empty
draws only the blocks that hold pixels of the other rings: the pixels it
does draw have the values of the full map.
"""

from __future__ import annotations

import numbers
import os
import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from cmbtools._core.checks import check_int
from cmbtools.exceptions import InvalidInputError

__all__ = ["simulation_seed_sequence", "simulation_rng", "simulation_rngs", "BLOCK_SIZE", "block_normals"]


def resolve_rng(rng=None, name="rng") -> np.random.Generator:
    """Return a :class:`numpy.random.Generator` from a generator, seed sequence, int seed or None."""
    if isinstance(rng, np.random.Generator):
        return rng
    if rng is None or isinstance(rng, np.random.SeedSequence):
        return np.random.default_rng(rng)
    if isinstance(rng, numbers.Integral) and not isinstance(rng, bool) and int(rng) >= 0:
        return np.random.default_rng(int(rng))
    raise InvalidInputError(
        f"The {name!r} parameter must be a numpy Generator, a SeedSequence, a non-negative int seed "
        f"or None. Got {rng!r} instead."
    )


def _check_seed(seed) -> int:
    return check_int(seed, "seed", minimum=0)


def simulation_seed_sequence(seed, index) -> np.random.SeedSequence:
    """The seed sequence of simulation ``index`` of a set started from ``seed``.

    ``SeedSequence(seed, spawn_key=(index,))``: the same stream as the
    ``index``-th child of ``SeedSequence(seed).spawn(...)``, with random access.

    Parameters
    ----------
    seed : int
        Master seed of the set (>= 0), recorded in output headers as ``CMBSEED``.
    index : int
        Simulation number (>= 0), recorded as ``CMBSIMID``.

    Returns
    -------
    numpy.random.SeedSequence
        The seed sequence of the simulation.
    """
    return np.random.SeedSequence(_check_seed(seed), spawn_key=(check_int(index, "index", minimum=0),))


def simulation_rng(seed, index) -> np.random.Generator:
    """The random generator of simulation ``index`` of a set started from ``seed``.

    Simulation ``i`` depends only on ``(seed, i)``, so any worker can produce
    any simulation and the results do not depend on the number of workers or
    the order of the work.

    Parameters
    ----------
    seed : int
        Master seed of the set (>= 0).
    index : int
        Simulation number (>= 0).

    Returns
    -------
    numpy.random.Generator
        ``default_rng(SeedSequence(seed, spawn_key=(index,)))``.

    Examples
    --------
    >>> a = simulation_rng(42, 3).standard_normal(2)
    >>> b = simulation_rngs(42, 4)[3].standard_normal(2)
    >>> bool((a == b).all())
    True
    """
    return np.random.default_rng(simulation_seed_sequence(seed, index))


def simulation_rngs(seed, n) -> list:
    """Generators of simulations ``0 .. n-1`` (see :func:`simulation_rng`).

    Parameters
    ----------
    seed : int
        Master seed of the set (>= 0).
    n : int
        Number of simulations.

    Returns
    -------
    list of numpy.random.Generator
        ``[simulation_rng(seed, i) for i in range(n)]``.
    """
    n = check_int(n, "n", minimum=0)
    seed = _check_seed(seed)
    return [simulation_rng(seed, i) for i in range(n)]


# --------------------------------------------------------------------------- block streams

#: Normal deviates per block stream (part of the reproducibility contract: changing it changes every simulation).
BLOCK_SIZE = 1 << 16

_POOL = None
_POOL_SIZE = 0
_POOL_LOCK = threading.Lock()


def _reset_pool_after_fork():  # pragma: no cover - runs in forked children only
    global _POOL, _POOL_SIZE, _POOL_LOCK
    _POOL, _POOL_SIZE, _POOL_LOCK = None, 0, threading.Lock()


if hasattr(os, "register_at_fork"):
    os.register_at_fork(after_in_child=_reset_pool_after_fork)


def _pool(nthreads: int) -> ThreadPoolExecutor:
    """A process-wide pool of at least ``nthreads`` threads (kept between calls)."""
    global _POOL, _POOL_SIZE
    with _POOL_LOCK:
        if _POOL is None or _POOL_SIZE < nthreads:
            old = _POOL
            _POOL = ThreadPoolExecutor(max_workers=nthreads, thread_name_prefix="cmbtools-normals")
            _POOL_SIZE = nthreads
            if old is not None:
                old.shutdown(wait=False)
        return _POOL


def child_seed_sequence(rng) -> np.random.SeedSequence:
    """The seed sequence of one block draw from ``rng`` (a Generator, SeedSequence, int seed or None).

    A Generator or SeedSequence gives its next child (``spawn(1)``); an int
    ``s`` gives the first child of ``SeedSequence(s)`` (so the same int gives
    the same numbers every time); None gives fresh entropy.
    """
    if isinstance(rng, np.random.Generator):
        seq = getattr(rng.bit_generator, "seed_seq", None)
        if isinstance(seq, np.random.SeedSequence):
            return seq.spawn(1)[0]
        return np.random.SeedSequence(rng.integers(0, 2**32, size=8, dtype=np.uint64).tolist())
    if isinstance(rng, np.random.SeedSequence):
        return rng.spawn(1)[0]
    return np.random.SeedSequence(rng).spawn(1)[0]


def _block_generator(child: np.random.SeedSequence, k: int) -> np.random.Generator:
    seq = np.random.SeedSequence(child.entropy, spawn_key=tuple(child.spawn_key) + (int(k),), pool_size=child.pool_size)
    return np.random.Generator(np.random.PCG64(seq))


def block_normals(rng, n: int, *, out=None, transform=None, nthreads: int = 1, blocks=None) -> np.ndarray:
    """``n`` standard normal deviates from block streams (see the module notes), drawn on ``nthreads`` threads.

    Parameters
    ----------
    rng : Generator, SeedSequence, int or None
        Random source; one child of its seed sequence is used.
    n : int
        Number of values.
    out : ndarray of float64, shape (n,), optional
        C-contiguous array to fill (default: a new one).
    transform : callable, optional
        ``transform(start, stop, values)`` is called on every block right
        after it is drawn (in the drawing thread, in place on ``values``,
        which is ``out[start:stop]``): scaling while the block is still in
        the cache.  It must only touch its own slice.
    nthreads : int, default=1
        Threads that draw the blocks; the values do not depend on it.
    blocks : iterable of int, optional
        Draw only these blocks (the others are left as they are in ``out``);
        each block has its own stream, so the values drawn are the same as
        in a full draw.

    Returns
    -------
    ndarray of float64, shape (n,)
    """
    n = int(n)
    if out is None:
        out = np.empty(n, dtype=np.float64)
    elif out.shape != (n,) or out.dtype != np.float64 or not out.flags.c_contiguous:
        raise ValueError(f"out must be a C-contiguous float64 array of shape ({n},)")
    child = child_seed_sequence(rng)
    n_blocks = -(-n // BLOCK_SIZE)
    todo = list(range(n_blocks)) if blocks is None else sorted({int(k) for k in blocks if 0 <= int(k) < n_blocks})

    def fill(k):
        start = k * BLOCK_SIZE
        stop = min(n, start + BLOCK_SIZE)
        view = out[start:stop]
        _block_generator(child, k).standard_normal(out=view)
        if transform is not None:
            transform(start, stop, view)

    nthreads = max(1, min(int(nthreads), len(todo)))
    if nthreads == 1:
        for k in todo:
            fill(k)
    else:
        # contiguous runs of blocks per task: a few tasks per thread balance a busy machine
        per_task = max(1, len(todo) // (4 * nthreads))
        tasks = [todo[i:i + per_task] for i in range(0, len(todo), per_task)]
        for _ in _pool(nthreads).map(lambda ks: [fill(k) for k in ks], tasks):
            pass
    return out


def blocks_of_pixels(starts, stops, n) -> np.ndarray:
    """Indices of the blocks of a draw of ``n`` values that hold any of the ranges ``[starts[i], stops[i])``."""
    n_blocks = -(-int(n) // BLOCK_SIZE)
    starts = np.asarray(starts, dtype=np.int64)
    stops = np.asarray(stops, dtype=np.int64)
    keep = stops > starts
    count = np.zeros(n_blocks + 1, dtype=np.int64)
    np.add.at(count, starts[keep] // BLOCK_SIZE, 1)
    np.add.at(count, (stops[keep] - 1) // BLOCK_SIZE + 1, -1)
    return np.flatnonzero(np.cumsum(count[:-1]) > 0)
