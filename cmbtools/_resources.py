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

from ._validation import check_int, check_nside
from .exceptions import CmbtoolsWarning, InvalidInputError, MemoryLimitError

__all__ = [
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
