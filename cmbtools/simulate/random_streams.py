"""Reproducible random streams: one generator per simulation of a seeded set.

Random numbers
--------------
Every function takes ``rng``: a :class:`numpy.random.Generator`, a
:class:`numpy.random.SeedSequence`, an int seed, or ``None`` (fresh entropy),
resolved with :func:`numpy.random.default_rng`.  numpy's global state is never
used.  For a set of simulations, :func:`simulation_rng` gives the generator of
simulation ``index`` from one master ``seed`` as
``default_rng(SeedSequence(seed, spawn_key=(index,)))``.  Simulation ``i``
depends only on ``(seed, i)``: the maps are the same whatever order the
simulations run in, however many workers share them, and on any machine
(numpy's PCG64 bit generator and its normal sampler are platform independent).

Order of the random draws (part of the reproducibility contract):

* :func:`gaussian_alm` draws two blocks of ``alm_size(lmax)`` standard normals,
  the real parts and then the imaginary parts, in healpy's coefficient order.
* :func:`noise_map` draws ``12 nside^2`` standard normals for the white part
  (RING order), then, only with a knee, the coefficients of the correlated part
  as :func:`gaussian_alm` does.
* :func:`gaussian_sky` draws only the coefficients of :func:`gaussian_alm`.
"""

from __future__ import annotations

import numbers

import numpy as np

from cmbtools._core.checks import check_int
from cmbtools.exceptions import InvalidInputError

__all__ = ["simulation_seed_sequence", "simulation_rng", "simulation_rngs"]


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
