"""Memory estimates: refuse a computation before allocating more than the machine has.

A HEALPix map of nside N holds ``12 N**2`` pixels, so the memory a job needs
grows as ``nside**2`` (maps) or ``lmax**2`` (harmonic coefficients, coupling
matrices).  A user who types one digit too many would otherwise wait for the
kernel to kill the job, or push a shared machine into swap.  The functions
here estimate the bytes a computation allocates, compare them with what the
machine offers, and raise :class:`~cmbtools.exceptions.MemoryLimitError` (with
both numbers in the message) before anything is allocated.  ``force=True``
(CLI: ``--force``) turns the refusal into a warning.

What "available" means (Linux): ``MemAvailable`` of ``/proc/meminfo`` (the
kernel's estimate of what can be allocated without swapping), else free
physical pages from :func:`os.sysconf`; if the process runs in a control group
with a memory limit (cgroup v2 ``memory.max``, or v1 ``memory.limit_in_bytes``),
the room left under that limit counts too, and the smaller number wins.
``$CMBTOOLS_MEMORY_LIMIT`` (bytes, or a number with a unit such as ``8GB``,
``512MB``, ``2GiB``) caps it further, for users who share a machine.

The estimates count the large arrays a computation holds at the same time
(maps, coefficients, matrices) and ignore bounded work buffers; they are meant
to be right within a factor of about two, which is what a refusal needs.
"""

from __future__ import annotations

import math
import os
import re
import warnings

import numpy as np

from cmbtools._core.checks import check_int, check_nside
from cmbtools.exceptions import CmbtoolsWarning, InvalidInputError, MemoryLimitError

__all__ = [
    "estimate_mask_bytes",
    "estimate_regrade_bytes",
    "estimate_map_transform_bytes",
    "estimate_simulated_maps_bytes",
    "estimate_estimator_bytes",
    "estimate_deprojection_bias_bytes",
    "estimate_synthesis_bytes",
    "estimate_sky_bytes",
    "estimate_noise_bytes",
    "estimate_dipole_map_bytes",
    "available_memory_bytes",
    "estimate_map_bytes",
    "estimate_alm_bytes",
    "estimate_transform_bytes",
    "estimate_coupling_bytes",
    "format_bytes",
    "check_memory",
]

#: Where the numbers come from (module attributes so tests can point them at files of their own).
_MEMINFO = "/proc/meminfo"
_CGROUP_V2 = ("/sys/fs/cgroup/memory.max", "/sys/fs/cgroup/memory.current")
_CGROUP_V1 = ("/sys/fs/cgroup/memory/memory.limit_in_bytes", "/sys/fs/cgroup/memory/memory.usage_in_bytes")
_ENV_LIMIT = "CMBTOOLS_MEMORY_LIMIT"

_UNITS = {
    "": 1, "B": 1,
    "K": 10**3, "KB": 10**3, "M": 10**6, "MB": 10**6, "G": 10**9, "GB": 10**9, "T": 10**12, "TB": 10**12,
    "KIB": 2**10, "MIB": 2**20, "GIB": 2**30, "TIB": 2**40,
}


def _read_int(path):
    """First whitespace-separated token of a file as an int; None if absent, unreadable or not a number."""
    try:
        with open(path, encoding="ascii") as fh:
            token = fh.read(256).split()
    except (OSError, UnicodeDecodeError):
        return None
    if not token:
        return None
    try:
        return int(token[0])
    except ValueError:  # "max" means no limit
        return None


def _meminfo_available():
    try:
        with open(_MEMINFO, encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    parts = line.split()
                    scale = 1024 if len(parts) > 2 and parts[2].lower() == "kb" else 1
                    return int(parts[1]) * scale
    except (OSError, UnicodeDecodeError, ValueError, IndexError):
        return None
    return None


def _sysconf_available():
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (AttributeError, ValueError, OSError):
        return None


def _cgroup_room():
    """Bytes left under the control group's memory limit, or None without a limit."""
    for limit_file, usage_file in (_CGROUP_V2, _CGROUP_V1):
        limit = _read_int(limit_file)
        # cgroup v1 reports "no limit" as a huge number (about 2**63)
        if limit is None or limit <= 0 or limit >= 2**60:
            continue
        usage = _read_int(usage_file) or 0
        return max(limit - usage, 0)
    return None


def _parse_size(text):
    m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+(?:[eE][+-]?[0-9]+)?)\s*([A-Za-z]*)\s*", str(text))
    unit = m.group(2).upper() if m else None
    if m is None or unit not in _UNITS:
        raise InvalidInputError(
            f"${_ENV_LIMIT} must be a number of bytes, optionally with a unit (kB, MB, GB, TB, KiB, MiB, GiB, TiB). "
            f"Got {text!r} instead."
        )
    return int(float(m.group(1)) * _UNITS[unit])


def available_memory_bytes():
    """Bytes of memory this process can still allocate without swapping.

    The smallest of: ``MemAvailable`` from ``/proc/meminfo`` (or, where that
    file does not exist, free physical pages from :func:`os.sysconf`); the room
    left under a control-group memory limit; and ``$CMBTOOLS_MEMORY_LIMIT``.

    Returns
    -------
    int or None
        None when the platform reports nothing (then no check is made).

    Raises
    ------
    InvalidInputError
        If ``$CMBTOOLS_MEMORY_LIMIT`` is set but is not a size.
    """
    found = []
    system = _meminfo_available()
    if system is None:
        system = _sysconf_available()
    if system is not None:
        found.append(system)
    room = _cgroup_room()
    if room is not None:
        found.append(room)
    env = os.environ.get(_ENV_LIMIT, "").strip()
    if env:
        found.append(_parse_size(env))
    return min(found) if found else None


def _count(value, name):
    return check_int(value, name, minimum=0)


def estimate_map_bytes(nside, n_maps=1, dtype=np.float64) -> int:
    """Bytes of ``n_maps`` full-sky HEALPix maps of ``nside`` (``12 nside**2`` pixels each).

    Examples
    --------
    >>> estimate_map_bytes(2048)        # 50 331 648 pixels of 8 bytes
    402653184
    """
    nside = check_nside(nside)
    return 12 * nside * nside * np.dtype(dtype).itemsize * _count(n_maps, "n_maps")


def estimate_alm_bytes(lmax, n=1) -> int:
    """Bytes of ``n`` sets of complex128 harmonic coefficients up to ``lmax`` (healpy's layout, m <= l).

    Examples
    --------
    >>> estimate_alm_bytes(2)           # 6 coefficients of 16 bytes
    96
    """
    lmax = check_int(lmax, "lmax", minimum=0)
    size = (lmax + 1) * (lmax + 2) // 2
    return size * 16 * _count(n, "n")


def estimate_transform_bytes(nside, lmax, n_maps=1) -> int:
    """Bytes a map -> coefficients -> map round trip holds at once, for ``n_maps`` maps.

    Counts, per map, the input, the residual of the iterative analysis and the
    synthesized output (three maps) and two sets of coefficients (the
    coefficients and their filtered copy).  This is the cost of smoothing,
    harmonic rotation or one pseudo-Cl measurement on top of the caller's data.
    """
    n = _count(n_maps, "n_maps")
    return n * (estimate_map_bytes(nside, 3) + estimate_alm_bytes(lmax, 2))


def estimate_coupling_bytes(lmax, n_matrices=1, dtype=np.float64) -> int:
    """Bytes of ``n_matrices`` dense ``(lmax+1) x (lmax+1)`` matrices (mode-coupling matrix, its inverse, ...).

    Examples
    --------
    >>> estimate_coupling_bytes(9999) / 1e9   # one float64 matrix up to ell = 9999
    0.8
    """
    lmax = check_int(lmax, "lmax", minimum=0)
    return (lmax + 1) ** 2 * np.dtype(dtype).itemsize * _count(n_matrices, "n_matrices")


def format_bytes(n) -> str:
    """A size for people: ``'512 bytes'``, ``'3.2 MB'``, ``'1.61 GB'``, ``'900 kB'``, ``'105.6 TB'`` (powers of 1000).

    Examples
    --------
    >>> format_bytes(1_610_612_736)
    '1.61 GB'
    """
    n = float(n)
    if not math.isfinite(n) or n < 0:
        raise InvalidInputError(f"A size in bytes must be a finite number >= 0. Got {n!r} instead.")
    if n < 1000:
        return f"{int(n)} bytes"
    for unit in ("kB", "MB", "GB", "TB", "PB", "EB", "ZB"):
        n /= 1000.0
        if n < 1000 or unit == "ZB":
            text = f"{n:.3g}" if n < 100 else f"{n:.1f}".removesuffix(".0")
            return f"{text} {unit}"
    raise AssertionError("unreachable")  # pragma: no cover


def check_memory(required_bytes, what, *, force=False, fraction=0.8):
    """Refuse a computation whose memory estimate exceeds what the machine has available.

    Parameters
    ----------
    required_bytes : int
        The estimate (see the ``estimate_*`` functions).
    what : str
        What needs the memory, starting with a capital letter, e.g.
        ``"A mask at nside 65536"``; it starts the error message.
    force : bool, default=False
        Go ahead anyway: warn instead of raising.
    fraction : float, default=0.8
        Share of the available memory a computation may use; the rest is left
        to the operating system and other processes.

    Returns
    -------
    int
        ``required_bytes``, unchanged.

    Raises
    ------
    MemoryLimitError
        If ``required_bytes > fraction * available_memory_bytes()`` and
        ``force`` is false.

    Warns
    -----
    CmbtoolsWarning
        If the estimate is too large and ``force`` is true.
    """
    if isinstance(required_bytes, float) and math.isfinite(required_bytes) and required_bytes >= 0:
        required_bytes = math.ceil(required_bytes)
    required = check_int(required_bytes, "required_bytes", minimum=0)
    try:
        share = float(fraction)
    except (TypeError, ValueError):
        share = float("nan")
    if not 0 < share <= 1:
        raise InvalidInputError(f"The 'fraction' parameter must be in (0, 1]. Got {fraction!r} instead.")
    available = available_memory_bytes()
    if available is None or required <= share * available:
        return required
    need, have = format_bytes(required), format_bytes(available)
    if force:
        warnings.warn(
            f"{what} would need about {need} but the machine has {have} available; going ahead because "
            f"it was forced (the job may be killed or the machine may start swapping)",
            CmbtoolsWarning,
            stacklevel=2,
        )
        return required
    raise MemoryLimitError(
        f"{what} would need about {need} but the machine has {have} available "
        f"(cmbtools uses at most {share:.0%} of it); lower nside/lmax, or pass force=True "
        f"(CLI: --force) to try anyway",
        required,
        available,
    )


# --------------------------------------------------------------------------- maps and masks


def estimate_mask_bytes(nside, n_maps, *, chunk_pixels=0) -> int:
    """Building a mask: ``n_maps`` maps, plus the work buffers of a loop over ``chunk_pixels`` pixels at a time.

    The buffers are the pixel numbers, unit vectors and their rotated copies: about 64 bytes per pixel of a chunk.
    """
    return estimate_map_bytes(nside, n_maps) + 64 * min(12 * nside * nside, chunk_pixels)


def estimate_regrade_bytes(nside_in, nside_out) -> int:
    """Changing the resolution of a map: index and value arrays at both resolutions."""
    return estimate_map_bytes(nside_in, 3) + estimate_map_bytes(nside_out, 4)


def estimate_map_transform_bytes(nside, lmax, extra_alms=0) -> int:
    """A map's round trip through harmonic space (smoothing, rotation), with ``extra_alms`` more coefficient sets."""
    return estimate_transform_bytes(nside, lmax) + estimate_alm_bytes(lmax, extra_alms)


# --------------------------------------------------------------------------- simulated maps
# Measured peaks (resident memory, nside 256-1024, lmax up to 1535) are within ~15% of these.


def estimate_synthesis_bytes(nside, lmax) -> int:
    """One synthesis: coefficients with their filtered copy's temporaries, the output map and ducc's ring buffer.

    The ring buffer holds about 1.25 x ``(4 nside - 1) x (lmax + 1)`` complex values (measured).
    """
    ring = 16 * (4 * nside - 1) * (lmax + 1)
    return estimate_map_bytes(nside) + int(1.5 * estimate_alm_bytes(lmax)) + int(1.25 * ring)


def estimate_sky_bytes(nside, lmax, with_dipole=False) -> int:
    """Peak of a simulated sky: the draws (about four sets of coefficients), the synthesis, the dipole."""
    phases = [4 * estimate_alm_bytes(lmax), estimate_synthesis_bytes(nside, lmax)]
    if with_dipole:  # the map, the pixel numbers, three coordinate maps and two temporaries
        phases.append(estimate_map_bytes(nside, 7))
    return max(phases)


def estimate_noise_bytes(nside, lmax, *, correlated=False, hits_scaling=False) -> int:
    """Peak of a noise map: the white draws, the correlated part's synthesis, the hits scaling."""
    one = estimate_map_bytes(nside)
    phases = [2 * one]  # the draws and the scaled copy
    if correlated:
        phases += [one + 4 * estimate_alm_bytes(lmax), one + estimate_synthesis_bytes(nside, lmax)]
    if hits_scaling:
        phases.append(4 * one)  # the noise, then 1/hits, its square root and the observed-pixel selection
    return max(phases)


def estimate_simulated_maps_bytes(nside, lmax, *, with_dipole=False, with_noise=False, correlated_noise=False,
                                  with_hits=False) -> int:
    """Peak bytes of simulating maps one at a time (the ``simulate`` command).

    The sky (draws, synthesis, dipole), its noise and their sum, then the
    copies made to write it and to report its rms; with hits, the hits map and
    the noise model's copy are held throughout.
    """
    one = estimate_map_bytes(nside)
    phases = [estimate_sky_bytes(nside, lmax, with_dipole), 4 * one]
    if with_noise:
        phases += [one + estimate_noise_bytes(nside, lmax, correlated=correlated_noise), 3 * one]
        if with_hits:
            phases.append(4 * one)  # the noise, then 1/hits, its square root and the observed pixels
    held = estimate_map_bytes(nside, 2) if with_hits else 0
    return held + max(phases)


def estimate_dipole_map_bytes(nside) -> int:
    """Peak of a dipole map: the map and its temporaries (about six maps)."""
    return estimate_map_bytes(nside, 6)


# --------------------------------------------------------------------------- the spectrum estimator


def estimate_deprojection_bias_bytes(nside, lmax, *, n_templates, sky_lmax=None, cross=False, grid_nside=None) -> int:
    """Peak bytes of the deprojection-bias correction of a spectrum estimator.

    Per template and map (two maps for a cross-spectrum): its pixel sums and
    their weighted copies up to the sky's band limit (three sets of
    coefficients) and two sets up to lmax, plus the template maps and two
    working maps.  ``grid_nside``: the grid the bias is computed on when it is
    coarser than the map's (then to lmax ``2 grid_nside`` and band limit
    ``3 grid_nside - 1``, and the fine mask read in chunks).
    """
    if n_templates <= 0:
        return 0
    lw = max(lmax, sky_lmax if sky_lmax is not None else lmax)
    top = lmax
    if grid_nside is not None and grid_nside < nside:
        nside, lw, top = grid_nside, 3 * grid_nside - 1, min(lmax, 2 * grid_nside)
    per_map = n_templates * (3 * estimate_alm_bytes(lw) + 2 * estimate_alm_bytes(top))
    return (2 if cross else 1) * per_map + estimate_map_bytes(nside, n_templates + 2)


def estimate_estimator_bytes(nside, lmax, *, n_bins, mask_lmax, cross=False, refine=False, covariance=False,
                             bias_bytes=0) -> int:
    """Peak bytes of building a spectrum estimator, phase by phase (the largest wins).

    The copies of the masks; a mask transform up to ``mask_lmax`` (about
    ``2*lmax``: the coefficients of every mask and ducc0's ring buffer of
    ``(4 nside - 1) x (2 lmax + 1)`` complex values, or, for large transforms,
    the pieces of the split transform of :func:`cmbtools._core.sht.map_spectra`);
    the dense ``(lmax+1) x (lmax+1)`` coupling matrix (one at a time; two for
    the covariance of an auto-spectrum; ``coupling='fast'`` fills a dense
    matrix too); the binned ``(n_bins, lmax+1)`` and ``(n_bins, n_bins)``
    results; and ``bias_bytes`` (:func:`estimate_deprojection_bias_bytes`)
    next to one coupling matrix.
    """
    from cmbtools._core import sht as _sht

    lw = mask_lmax
    masks = estimate_map_bytes(nside, 2 if cross else 1)
    alm = estimate_alm_bytes(lw)
    n_masks = 2 if cross else 1
    leg = _sht._leg_bytes(nside, lw)  # ducc0's buffer of Legendre coefficients
    if refine:  # full coefficients of every mask, plus a synthesized map, the residual and the correction
        transform = n_masks * alm + leg + estimate_map_bytes(nside, 2) + alm
    elif leg + n_masks * alm <= _sht.ONE_CALL_BYTES:  # one call per mask (see sht.map_spectra)
        transform = n_masks * alm + leg
    else:  # split: one group of m per mask, its partial sum and one group of rings' buffer
        transform = (n_masks + 2) * _sht.LEG_BUFFER_BYTES
    matrix = estimate_coupling_bytes(lmax)
    row, square = 8 * n_bins * (lmax + 1), 8 * n_bins * n_bins
    results = (3 if cross else 1) * row + (5 if covariance else 3) * square
    phases = [
        masks + transform,  # the transforms of the masks
        masks + matrix + results + row + 4 * square,  # one coupling matrix, then its binned inverse
        masks + matrix + results + bias_bytes,  # the deprojection-bias correction of its rows
    ]
    if covariance:  # the squared mask (and mask1 * mask2): a map, its transform, one or two matrices
        extra = estimate_map_bytes(nside, 1)
        phases += [masks + extra + transform + results, masks + extra + (1 if cross else 2) * matrix + results + row]
    return max(phases)

