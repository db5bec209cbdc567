"""Validation at the public boundary.

Every public function checks its inputs once, here, and turns them into plain
float64 arrays; internal helpers trust what has been checked.  Messages follow
one template: ``The 'lmax' parameter must be ... Got 4096 instead.``
"""

from __future__ import annotations

import os
import numbers

import numpy as np

from cmbtools.exceptions import InvalidInputError, ResolutionMismatchError

#: Largest number of simulations in one run, in the library and on the command line (a bound that keeps a typo
#: from exhausting memory and disk).
MAX_SIMULATIONS = 1_000_000

__all__ = [
    "UNSEEN",
    "check_nside",
    "nside_from_npix",
    "check_lmax",
    "warn_lmax_above_band_limit",
    "check_int",
    "check_positive",
    "as_map",
    "missing_pixels",
    "check_mask",
    "check_same_nside",
    "check_cl",
    "resolve_nthreads",
]

#: The HEALPix sentinel for a missing pixel (the value healpy uses).
UNSEEN = -1.6375e30


def _fail(name, requirement, value):
    raise InvalidInputError(f"The {name!r} parameter must be {requirement}. Got {value!r} instead.")


def check_int(value, name, *, minimum=None, maximum=None) -> int:
    """Return ``value`` as an int after checking it is an integer within bounds."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        if isinstance(value, float) and value.is_integer():
            value = int(value)
        else:
            _fail(name, "an integer", value)
    value = int(value)
    lo = "-inf" if minimum is None else minimum
    hi = "inf" if maximum is None else maximum
    if (minimum is not None and value < minimum) or (maximum is not None and value > maximum):
        _fail(name, f"an int in [{lo}, {hi}]", value)
    return value


def check_positive(value, name, *, allow_zero=False) -> float:
    """Return ``value`` as a finite float that is > 0 (or >= 0)."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        _fail(name, "a number", value)
    if not np.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        _fail(name, "a finite number " + (">= 0" if allow_zero else "> 0"), value)
    return v


def check_nside(nside, name="nside") -> int:
    """Check that ``nside`` is a power of two between 1 and 2**29."""
    n = check_int(nside, name, minimum=1, maximum=2**29)
    if n & (n - 1):
        _fail(name, "a power of two (HEALPix nside)", nside)
    return n


def nside_from_npix(npix, name="map") -> int:
    """nside of a full-sky HEALPix map with ``npix`` pixels (12 nside^2)."""
    npix = int(npix)
    nside = int(round(np.sqrt(npix / 12.0)))
    if nside < 1 or 12 * nside * nside != npix or nside & (nside - 1):
        raise InvalidInputError(
            f"The {name!r} has {npix} pixels, which is not 12*nside**2 for a power-of-two nside."
        )
    return nside


def check_lmax(lmax, nside=None, name="lmax", *, limit_factor=4) -> int:
    """Check ``lmax`` is a non-negative int; with ``nside``, at most ``limit_factor*nside - 1``."""
    maximum = None if nside is None else limit_factor * nside - 1
    return check_int(lmax, name, minimum=0, maximum=maximum)


def warn_lmax_above_band_limit(lmax, nside, *, stacklevel=3):
    """Warn (CmbtoolsWarning) when ``lmax > 3*nside - 1``.

    Above ``3 nside - 1`` a HEALPix map no longer determines its harmonic
    coefficients (there are more coefficients than the rings can resolve), so
    transforms alias power between multipoles (common practice: ``3 nside - 1``
    is healpy's default band limit).
    """
    if lmax > 3 * nside - 1:
        import warnings

        from cmbtools.exceptions import CmbtoolsWarning

        warnings.warn(
            f"lmax = {lmax} is above 3*nside - 1 = {3 * nside - 1} for nside {nside}: a HEALPix map does not "
            f"determine multipoles that high, so the transforms alias power; use lmax <= {3 * nside - 1} "
            f"or a higher nside",
            CmbtoolsWarning,
            stacklevel=stacklevel,
        )


_CHUNK = 1 << 20


def missing_pixels(m) -> np.ndarray:
    """Boolean array, true where a map pixel is missing (UNSEEN sentinel, NaN or +-inf).

    Values within a relative 1e-5 of the UNSEEN sentinel count as missing, as
    in healpy, so float32 files are handled too.

    Parameters
    ----------
    m : array_like
        Map values.

    Returns
    -------
    ndarray of bool
        True where the pixel is missing, shaped like ``m``.
    """
    m = np.asarray(m)
    if m.ndim != 1 or m.size <= _CHUNK:
        return ~np.isfinite(m) | (np.abs(m - UNSEEN) <= 1e-5 * abs(UNSEEN))
    # in blocks: the vectorised test holds two map-sized float temporaries (800 MB at nside 2048)
    out = np.empty(m.shape, dtype=bool)
    for start in range(0, m.size, _CHUNK):
        block = m[start:start + _CHUNK]
        out[start:start + _CHUNK] = ~np.isfinite(block) | (np.abs(block - UNSEEN) <= 1e-5 * abs(UNSEEN))
    return out


def as_map(m, name="map", *, allow_missing=True) -> np.ndarray:
    """Return a 1-d float64 full-sky map; check its length is 12 nside^2.

    Missing pixels are kept as they are (the caller decides what to do) unless
    ``allow_missing`` is false, in which case any missing pixel is an error.
    """
    try:
        a = np.asarray(m, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The {name!r} must be an array of numbers.") from None
    if a.ndim != 1:
        raise InvalidInputError(f"The {name!r} must be a 1-d HEALPix map. Got shape {a.shape} instead.")
    nside_from_npix(a.size, name)
    if not allow_missing:
        n_bad = int(missing_pixels(a).sum())
        if n_bad:
            raise InvalidInputError(f"The {name!r} has {n_bad} missing (UNSEEN/NaN/inf) pixels.")
    return a


def check_mask(mask, name="mask") -> np.ndarray:
    """Return a float64 mask after checking values are finite, in [0, 1] and not all zero."""
    w = as_map(mask, name)
    lo, hi = float(w.min()), float(w.max())  # NaN propagates: no map-sized temporary when all is well
    if not (np.isfinite(lo) and np.isfinite(hi)):
        raise InvalidInputError(f"The {name!r} has {int((~np.isfinite(w)).sum())} NaN or infinite values.")
    if lo < 0 or hi > 1:
        raise InvalidInputError(f"The {name!r} must have values in [0, 1]. Got values in [{lo:g}, {hi:g}] instead.")
    if hi == 0:
        raise InvalidInputError(f"The {name!r} is zero everywhere: no sky is left to analyse.")
    return w


def check_same_nside(a, b, name_a="map", name_b="mask") -> int:
    """Check two maps have the same number of pixels; return their nside."""
    na = nside_from_npix(np.size(a), name_a)
    nb = nside_from_npix(np.size(b), name_b)
    if na != nb:
        raise ResolutionMismatchError(
            f"The {name_a!r} has nside {na} but the {name_b!r} has nside {nb}; "
            f"change the resolution of one of them first (cmbtools.maps.change_resolution or "
            f"cmbtools.maps.change_mask_resolution).",
            na,
            nb,
        )
    return na


def check_cl(cl, name="cl", *, lmax=None, allow_negative=False) -> np.ndarray:
    """Return a 1-d float64 power spectrum indexed by ell, checked finite (and >= 0)."""
    try:
        a = np.asarray(cl, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInputError(f"The {name!r} must be an array of numbers.") from None
    if a.ndim != 1 or a.size == 0:
        raise InvalidInputError(f"The {name!r} must be a 1-d array indexed by ell. Got shape {a.shape} instead.")
    if not np.all(np.isfinite(a)):
        raise InvalidInputError(f"The {name!r} has non-finite values.")
    if not allow_negative and np.any(a < 0):
        raise InvalidInputError(f"The {name!r} has negative values (first at ell={int(np.argmax(a < 0))}).")
    if lmax is not None and a.size < lmax + 1:
        raise InvalidInputError(f"The {name!r} must extend to ell={lmax}. Got ell up to {a.size - 1} instead.")
    return a


def resolve_nthreads(nthreads=None) -> int:
    """Thread count for compiled kernels: ``None`` or 0 means all cores available to this process.

    ``$CMBTOOLS_NUM_THREADS`` overrides the default (the Monte Carlo engine
    sets it in worker processes so that they do not oversubscribe).
    """
    if nthreads is None or nthreads == 0:
        env = os.environ.get("CMBTOOLS_NUM_THREADS")
        if env:
            return max(1, int(env))
        try:
            return max(1, len(os.sched_getaffinity(0)))
        except AttributeError:  # pragma: no cover - not on Linux
            return max(1, os.cpu_count() or 1)
    return check_int(nthreads, "nthreads", minimum=1, maximum=4096)


def renamed_keywords(**renamed):
    """Accept the keywords a function had before its parameters were renamed (old name -> new name).

    The old names are deprecated and stay for one release; they are not shown in the signature.
    """
    import functools

    def wrap(function):
        @functools.wraps(function)
        def call(*args, **kwargs):
            for old, new in renamed.items():
                if old in kwargs:
                    if new in kwargs:
                        raise InvalidInputError(f"Give {new!r} or its old name {old!r}, not both.")
                    kwargs[new] = kwargs.pop(old)
            return function(*args, **kwargs)

        return call

    return wrap
