"""File-system helpers shared by every reader and writer.

* :func:`check_input_file` turns "no such file", "is a directory" and
  "permission denied" into one :class:`~cmbtools.exceptions.InputFileError`.
* :func:`atomic_output` is the only way cmbtools writes a file: it writes to a
  temporary file in the destination directory and renames it into place, so a
  process killed mid-write leaves either the old file or the new one, never a
  partial one.  Existing files are only replaced when ``overwrite=True``.
* :class:`OutputGroup` stages the several files of one command and publishes
  them together at the end, so a command writes all of its outputs or none.
* :func:`sha256_file` and :func:`sha256_arrays` give the content hashes that
  output headers and caches record.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import stat
import tempfile
import warnings
from pathlib import Path

import numpy as np

from cmbtools.exceptions import InputFileError, OutputExistsError, OutputPathError

__all__ = [
    "check_input_file",
    "check_output_path",
    "atomic_output",
    "OutputGroup",
    "sha256_file",
    "sha256_arrays",
    "cache_dir",
    "remove_stale_temporaries",
]


def check_input_file(path) -> Path:
    """Return ``path`` as a :class:`~pathlib.Path` after checking it is a readable file.

    Raises
    ------
    InputFileError
        If the path does not exist, is a directory or cannot be read.
    """
    if not str(path).strip():
        raise InputFileError(repr(str(path)), "is an empty file name")
    if "\x00" in str(path):
        raise InputFileError(repr(str(path)), "contains a NUL character, which no file name can hold")
    p = Path(path)
    try:
        os.stat(p)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise InputFileError(p, "is a loop of symbolic links (a link that points back to itself)") from None
        if p.is_symlink():
            raise InputFileError(p, f"is a symbolic link to {os.readlink(p)!r}, which does not exist") from None
        if exc.errno not in (errno.ENOENT, errno.ENOTDIR):
            raise InputFileError(p, f"cannot be opened ({exc.strerror or exc})") from None
        raise InputFileError(p, "no such file") from None
    if p.is_dir():
        raise InputFileError(p, "is a directory, expected a file")
    if not os.access(p, os.R_OK):
        raise InputFileError(p, "permission denied (cannot read)")
    return p


def check_output_path(path, *, overwrite: bool = False) -> Path:
    """Check that ``path`` can be written, before any work is done.

    Raises
    ------
    OutputExistsError
        If the file exists and ``overwrite`` is false.
    OutputPathError
        If the parent directory does not exist or is not writable (checked
        by creating and removing a hidden probe file), or the path is a
        directory.
    """
    if not str(path).strip():
        raise OutputPathError(repr(str(path)), "is an empty file name")
    if "\x00" in str(path):
        raise OutputPathError(repr(str(path)), "contains a NUL character, which no file name can hold")
    p = Path(path)
    parent = p.parent if str(p.parent) else Path(".")
    if p.is_dir():
        raise OutputPathError(p, "is a directory, expected a file name")
    if not parent.exists():
        raise OutputPathError(p, f"directory {str(parent)!r} does not exist")
    if not parent.is_dir():
        raise OutputPathError(p, f"{str(parent)!r} is not a directory")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise OutputPathError(p, f"directory {str(parent)!r} is not writable")
    if p.exists() and not overwrite:
        raise OutputExistsError(p)
    # os.access answers for the permission bits only (and always "yes" for root); creating a
    # file is the one test that also covers read-only file systems, ACLs and pseudo-file systems
    try:
        fd, probe = tempfile.mkstemp(prefix=f".{p.name}.", suffix=".probe", dir=parent)
    except OSError as exc:
        # /proc answers "no such file" to a new name: the reason is not worth showing then
        detail = "" if exc.errno == errno.ENOENT else f" ({exc.strerror or exc})"
        raise OutputPathError(p, f"directory {str(parent)!r} is not writable{detail}") from None
    os.close(fd)
    with contextlib.suppress(OSError):
        os.unlink(probe)
    return p


@contextlib.contextmanager
def atomic_output(path, *, overwrite: bool = False, suffix: str | None = None):
    """Context manager yielding a temporary path that is renamed to ``path`` on success.

    The temporary file lives in the destination directory (so the final
    :func:`os.replace` is atomic on POSIX file systems) and keeps the
    destination's suffix (writers such as matplotlib and astropy choose the
    format from it).  On any exception the temporary file is removed and the
    destination is left untouched.

    Parameters
    ----------
    path : str or path-like
        Final destination.
    overwrite : bool, default=False
        Allow replacing an existing file.
    suffix : str, optional
        Suffix of the temporary file; defaults to the destination's.

    Examples
    --------
    >>> with atomic_output("table.csv", overwrite=True) as tmp:  # doctest: +SKIP
    ...     tmp.write_text("a,b\\n1,2\\n")
    """
    final = check_output_path(path, overwrite=overwrite)
    parent = final.parent if str(final.parent) else Path(".")
    suffix = final.suffix if suffix is None else suffix
    remove_stale_temporaries(final)
    fd, tmp_name = tempfile.mkstemp(prefix=f".{final.name}.", suffix=f".tmp{suffix}", dir=parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        yield tmp
        # Re-check just before the rename: another process may have created it.
        if final.exists() and not overwrite:
            raise OutputExistsError(final)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        # mkstemp makes the file private (0600); give it the mode a plainly
        # created file would have: the old file's, or 0666 less the umask.
        try:
            mode = stat.S_IMODE(final.stat().st_mode)
        except FileNotFoundError:
            mode = 0o666 & ~_umask()
        os.chmod(tmp, mode)
        os.replace(tmp, final)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()
        raise


class OutputGroup:
    """The outputs of one command, published together: all of them or none.

    Each :meth:`write` runs a writer on a hidden temporary file beside its
    destination (cmbtools' own temporary-name pattern, so
    :func:`remove_stale_temporaries` cleans up after a killed process).
    Leaving the ``with`` block normally renames every temporary file into
    place; an exception (including ``KeyboardInterrupt``) raised anywhere in
    the block removes them all and leaves every destination untouched.  The
    renames themselves are a few system calls at the very end: only a process
    killed between two of them publishes part of the group.

    Examples
    --------
    >>> with OutputGroup() as outputs:  # doctest: +SKIP
    ...     outputs.write("table.csv", lambda tmp: bp.write_csv(tmp, overwrite=True))
    ...     outputs.write("figure.png", lambda tmp: bp.plot(tmp, overwrite=True))
    >>> outputs.paths  # doctest: +SKIP
    [PosixPath('table.csv'), PosixPath('figure.png')]
    """

    def __init__(self):
        self._staged = []  # (temporary, final, overwrite)
        self.paths = []  # the published destinations, in the order written

    def write(self, path, writer, *, overwrite: bool = False) -> Path:
        """Run ``writer(temporary_path)`` now; ``path`` receives the file when the group is published.

        ``writer`` must write the file at the path it is given (which keeps the
        destination's suffix and already exists, empty: writers get
        ``overwrite=True``).  Returns the destination.
        """
        final = check_output_path(path, overwrite=overwrite)
        if any(f == final for _, f, _ in self._staged):
            raise OutputPathError(final, "is written twice by this command")
        parent = final.parent if str(final.parent) else Path(".")
        remove_stale_temporaries(final)
        fd, tmp_name = tempfile.mkstemp(prefix=f".{final.name}.", suffix=f".tmp{final.suffix}", dir=parent)
        os.close(fd)
        tmp = Path(tmp_name)
        self._staged.append((tmp, final, overwrite))
        writer(tmp)
        return final

    def _discard(self):
        for tmp, _, _ in self._staged:
            with contextlib.suppress(FileNotFoundError):
                tmp.unlink()
        self._staged = []

    def _publish(self):
        for _, final, overwrite in self._staged:  # another process may have created one meanwhile
            if final.exists() and not overwrite:
                raise OutputExistsError(final)
        for tmp, final, _ in self._staged:
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
            try:
                mode = stat.S_IMODE(final.stat().st_mode)
            except FileNotFoundError:
                mode = 0o666 & ~_umask()
            os.chmod(tmp, mode)
        for tmp, final, _ in self._staged:
            os.replace(tmp, final)
            self.paths.append(final)
        self._staged = []

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            try:
                self._publish()
            except BaseException:
                self._discard()
                raise
        else:
            self._discard()
        return False


def remove_stale_temporaries(path) -> int:
    """Delete the temporary files :func:`atomic_output` left beside ``path`` when a writer was killed.

    Only names of cmbtools' own pattern for this destination are touched
    (``.NAME.<8 random characters>.tmpSUFFIX``, the same with a second leading dot, and the ``.probe`` files of
    :func:`check_output_path`); returns how many were removed.
    """
    import re

    final = Path(path)
    parent = final.parent if str(final.parent) else Path(".")
    # a second leading dot: the temporary file of a writer that was itself writing an OutputGroup's staged file
    pattern = re.compile(r"^\.\.?" + re.escape(final.name) + r"\.[A-Za-z0-9_]{8}\.(?:tmp.*|probe)$")
    removed = 0
    try:
        names = os.listdir(parent)
    except OSError:
        return 0
    for name in names:
        if pattern.match(name):
            with contextlib.suppress(OSError):
                (parent / name).unlink()
                removed += 1
    return removed


def _umask() -> int:
    """The process's file-creation mask, read without changing it where Linux allows."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    current = os.umask(0o022)  # elsewhere: set and restore (not thread-safe, but brief)
    os.umask(current)
    return current


def sha256_file(path, *, chunk_bytes: int = 1 << 20) -> str:
    """Hex SHA-256 of a file's contents."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(chunk_bytes), b""):
            h.update(block)
    return h.hexdigest()


def sha256_arrays(*items) -> str:
    """Hex SHA-256 of arrays and scalars, independent of memory layout.

    Arrays are hashed by dtype, shape and little-endian contiguous bytes;
    ``None``, strings and numbers by their ``repr``.
    """
    h = hashlib.sha256()
    for item in items:
        if isinstance(item, np.ndarray):
            a = np.ascontiguousarray(item)
            a = a.astype(a.dtype.newbyteorder("<"), copy=False)
            h.update(f"ndarray:{a.dtype.str}:{a.shape}:".encode())
            flat = a.reshape(-1)
            for start in range(0, flat.size, 1 << 20):  # in blocks: no copy of a large array
                h.update(flat[start:start + (1 << 20)].view(np.uint8))
        else:
            h.update(f"{type(item).__name__}:{item!r};".encode())
    return h.hexdigest()


def cache_dir() -> Path:
    """Directory of cmbtools' on-disk caches (created on first use).

    ``$CMBTOOLS_CACHE_DIR`` if set, else ``$XDG_CACHE_HOME/cmbtools``, else
    ``~/.cache/cmbtools``.
    """
    env = os.environ.get("CMBTOOLS_CACHE_DIR")
    if env:
        d = Path(env)
    else:
        base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        d = Path(base) / "cmbtools"
    d.mkdir(parents=True, exist_ok=True)
    return d


@contextlib.contextmanager
def open_fits(path):
    """Context manager yielding ``(path, hdul)`` with every HDU read into memory.

    Any failure becomes :class:`InputFileError`.  cmbtools opens the file itself
    and always closes it: astropy leaves its own handle open when it gives up
    on a damaged header.
    """
    from astropy.io import fits

    p = check_input_file(path)
    with open(p, "rb") as fh:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            # astropy reports damaged files with many exception types (OSError, ValueError,
            # VerifyError for unparsable cards, KeyError for missing ones, MemoryError for absurd sizes, ...)
            try:
                hdul = fits.open(fh, memmap=False, lazy_load_hdus=False)
            except Exception as exc:
                if "No SIMPLE card" in str(exc):  # astropy's advice in that message is not for cmbtools users
                    raise InputFileError(p, "cannot be read as FITS (it does not start with a FITS header)") from None
                raise InputFileError(p, f"cannot be read as FITS ({short_message(exc)})") from None
            try:
                try:
                    for hdu in hdul:
                        _ = hdu.data  # force reading now so a short file fails here
                except Exception as exc:
                    raise InputFileError(
                        p, f"FITS data cannot be read, the file may be truncated or damaged ({short_message(exc)})"
                    ) from None
                for w in caught:
                    text = str(w.message)
                    if "truncat" in text.lower() or "smaller than the expected" in text.lower():
                        raise InputFileError(p, f"the FITS file is truncated ({short_message(text)})")
            except BaseException:
                hdul.close()
                raise
        try:
            yield p, hdul
        finally:
            hdul.close()


def short_message(exc, limit=200):
    """An exception's message on one line, at most ``limit`` characters."""
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= limit else text[: limit - 3] + "..."
