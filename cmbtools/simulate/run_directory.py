"""The run directory of a Monte Carlo run: its manifest and one checksummed record per simulation.

The identity of a run (:func:`_inputs_hash` of its function, context and
settings) and its store are kept apart from the execution
(:mod:`cmbtools.simulate.engine`): the engine hands each finished result to a
:class:`_Store`, which keeps it in memory and, with a run directory, writes it
to disk.  Layout: ``run.json``
(format, cmbtools version, hash of the inputs, seed, number of simulations,
function name), then ``sim_NNNNNN.npz`` per simulation, written atomically by
the parent process with ``allow_pickle=False`` data, the index, the input hash
and a SHA-256 checksum of the arrays.  Nothing is ever pickled to disk.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime
import functools
import hashlib
import inspect
import json
import os
import pickle
import re
from pathlib import Path

import numpy as np

from cmbtools._core.files import atomic_output, sha256_arrays
from cmbtools._version import __version__
from cmbtools.exceptions import CacheError, InvalidInputError, OutputPathError

RUN_FORMAT = "cmbtools simulation run"
RUN_FORMAT_VERSION = 1
MANIFEST_NAME = "run.json"
_RECORD_RE = re.compile(r"^sim_(\d+)\.npz$")
_TEMP_RE = re.compile(r"^\.sim_\d+\.npz\..*\.tmp\.npz$")
_RESERVED_PREFIX = "_"

# --------------------------------------------------------------------------- the run directory


def _record_path(run_dir: Path, index: int) -> Path:
    return run_dir / f"sim_{index:06d}.npz"


def _record_checksum(arrays: dict) -> str:
    items = []
    for key in sorted(arrays):
        items += [key, arrays[key]]
    return sha256_arrays(*items)


def _write_record(run_dir: Path, index: int, arrays: dict, input_hash: str) -> None:
    payload = dict(arrays)
    payload["_index"] = np.int64(index)
    payload["_input_hash"] = np.str_(input_hash)
    payload["_checksum"] = np.str_(_record_checksum(arrays))
    with atomic_output(_record_path(run_dir, index), overwrite=True) as tmp:
        with open(tmp, "wb") as fh:
            np.savez(fh, **payload)


def _read_record(path: Path, index: int, input_hash: str):
    """Return (arrays, None) for a good record, or (None, problem)."""
    try:
        # open the file here: np.load leaves its own handle open when the zip is damaged
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as z:
            data = {k: z[k] for k in z.files}
    except Exception as exc:  # any unreadable file is treated the same way: redo it
        return None, f"cannot be read ({type(exc).__name__}: {exc})"
    try:
        rec_index = int(data.pop("_index"))
        rec_hash = str(data.pop("_input_hash"))
        rec_sum = str(data.pop("_checksum"))
    except KeyError:
        return None, "is not a simulation record (missing index, input hash or checksum)"
    if rec_index != index:
        return None, f"holds simulation {rec_index}, not {index}"
    if rec_hash != input_hash:
        return None, "was made from other inputs"
    if not data or rec_sum != _record_checksum(data):
        return None, "fails its checksum (corrupt)"
    return data, None


def _read_manifest(run_dir: Path):
    path = run_dir / MANIFEST_NAME
    try:
        manifest = json.loads(path.read_text())
    except (OSError, ValueError) as exc:
        raise CacheError(
            f"{path}: the run manifest cannot be read ({exc}); pass restart=True (CLI: --restart) to start the run again."
        ) from None
    if not isinstance(manifest, dict) or manifest.get("format") != RUN_FORMAT:
        raise CacheError(f"{path}: not a cmbtools simulation run manifest; use another run directory.")
    return manifest


def _write_manifest(run_dir: Path, manifest: dict) -> None:
    with atomic_output(run_dir / MANIFEST_NAME, overwrite=True) as tmp:
        tmp.write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n")


def _existing_records(run_dir: Path) -> dict:
    found = {}
    for p in run_dir.iterdir():
        m = _RECORD_RE.match(p.name)
        if m and p.is_file():
            found[int(m.group(1))] = p
    return found


def _remove_leftover_temporaries(run_dir: Path) -> None:
    """Delete temporary files of records whose writer was killed (they are never valid data)."""
    for p in run_dir.iterdir():
        if _TEMP_RE.match(p.name) and p.is_file():
            with contextlib.suppress(OSError):
                p.unlink()


def _prepare_run_dir(run_dir, *, input_hash, seed, n_sims, function_name, restart):
    """Create or check the run directory; return the seed to use and the finished records."""
    run_dir = Path(run_dir)
    if run_dir.exists() and not run_dir.is_dir():
        raise OutputPathError(run_dir, "exists and is not a directory")
    if not run_dir.exists():
        if not run_dir.parent.is_dir():
            raise OutputPathError(run_dir, f"directory {str(run_dir.parent)!r} does not exist")
        run_dir.mkdir()
    if not os.access(run_dir, os.W_OK | os.X_OK):
        raise OutputPathError(run_dir, "the run directory is not writable")
    manifest_path = run_dir / MANIFEST_NAME
    records = _existing_records(run_dir)
    if manifest_path.exists() and restart:
        # a restart deletes the run whatever its manifest holds (even an unreadable one)
        records = _delete_run(run_dir, records)
    if manifest_path.exists():
        manifest = _read_manifest(run_dir)
        if seed is None:
            seed = manifest.get("seed")
        problems = []
        if manifest.get("cmbtools_version") != __version__:
            problems.append(f"it was written by cmbtools {manifest.get('cmbtools_version')}, this is {__version__}")
        if manifest.get("seed") != seed:
            problems.append(f"it was started with seed {manifest.get('seed')}, this call uses seed {seed}")
        if manifest.get("input_hash") != input_hash:
            problems.append("it was started from other inputs (the hash of the function and its inputs differs)")
        if problems and not restart:
            raise CacheError(
                f"{run_dir}: this run directory holds another run: {'; '.join(problems)}. "
                "Use another directory, or pass restart=True (CLI: --restart) to delete its simulations and start again."
            )
        if problems or restart:
            records = _delete_run(run_dir, records)
    elif records:
        if not restart:
            raise CacheError(
                f"{run_dir}: holds {len(records)} simulation files but no {MANIFEST_NAME}; "
                "pass restart=True (CLI: --restart) to delete them and start again, or use another directory."
            )
        records = _delete_run(run_dir, records)
    if seed is None:
        seed = int(np.random.SeedSequence().entropy)
    _remove_leftover_temporaries(run_dir)
    manifest = {
        "format": RUN_FORMAT,
        "format_version": RUN_FORMAT_VERSION,
        "cmbtools_version": __version__,
        "input_hash": input_hash,
        "seed": seed,
        "n_sims": n_sims,
        "function": function_name,
        "updated_utc": datetime.datetime.now(datetime.timezone.utc).isoformat(timespec="seconds"),
    }
    _write_manifest(run_dir, manifest)
    return run_dir, seed, records


def _delete_run(run_dir: Path, records: dict) -> dict:
    for p in records.values():
        p.unlink()
    with contextlib.suppress(FileNotFoundError):
        (run_dir / MANIFEST_NAME).unlink()
    return {}

class _Store:
    """Keeps finished results in memory and, with a run directory, on disk."""

    def __init__(self, run_dir, input_hash, progress):
        self.run_dir = run_dir
        self.input_hash = input_hash
        self.results = {}
        self.progress = progress

    @property
    def done(self):
        return self.results

    def __call__(self, index, result):
        result = _clean_result(result, index)
        if self.run_dir is not None:
            _write_record(self.run_dir, index, result, self.input_hash)
        self.results[index] = result
        self.progress.update()

def _clean_result(out, index) -> dict:
    """Check and convert what a per-simulation function returned: a mapping of names to numeric arrays."""
    if not isinstance(out, dict):
        try:
            out = dict(out)
        except (TypeError, ValueError):
            raise InvalidInputError(
                f"The per-simulation function must return a dict of name -> array. "
                f"Simulation {index} returned {type(out).__name__} instead."
            ) from None
    if not out:
        raise InvalidInputError(f"The per-simulation function returned an empty dict for simulation {index}.")
    clean = {}
    for key, value in out.items():
        if not isinstance(key, str) or not key or key.startswith(_RESERVED_PREFIX):
            raise InvalidInputError(
                f"The per-simulation function returned the key {key!r}; keys must be non-empty strings "
                f"that do not start with {_RESERVED_PREFIX!r}."
            )
        a = np.asarray(value)
        if a.dtype.kind not in "biufc":
            raise InvalidInputError(
                f"The per-simulation function returned {key!r} of dtype {a.dtype} for simulation {index}; "
                "only numeric arrays can be stored."
            )
        clean[key] = a
    return clean


# --------------------------------------------------------------------------- the identity of a run's inputs


def _hash_update(h, obj, depth=0):
    """Feed a description of ``obj`` into the hash ``h`` (arrays by content, objects by their parts)."""
    if depth > 50:
        raise InvalidInputError("The simulation context is nested too deeply to be hashed; pass input_hash=.")
    if obj is None or isinstance(obj, (bool, int, float, complex, str, bytes)):
        h.update(f"{type(obj).__name__}:{obj!r};".encode())
    elif isinstance(obj, (np.ndarray, np.generic)):
        h.update(sha256_arrays(np.asarray(obj)).encode())
    elif isinstance(obj, Path):
        h.update(f"path:{obj};".encode())
    elif isinstance(obj, (list, tuple)):
        h.update(f"{type(obj).__name__}[{len(obj)}](".encode())
        for item in obj:
            _hash_update(h, item, depth + 1)
        h.update(b")")
    elif isinstance(obj, dict):
        h.update(f"dict[{len(obj)}](".encode())
        for key in sorted(obj, key=repr):
            _hash_update(h, key, depth + 1)
            _hash_update(h, obj[key], depth + 1)
        h.update(b")")
    elif isinstance(obj, functools.partial):
        h.update(b"partial(")
        _hash_update(h, (obj.func, obj.args, obj.keywords), depth + 1)
        h.update(b")")
    elif inspect.ismethod(obj):
        h.update(b"method(")
        _hash_update(h, (obj.__func__, obj.__self__), depth + 1)
        h.update(b")")
    elif isinstance(getattr(obj, "cache_key", None), str):
        # Objects that hash their own inputs (the spectrum estimator) say so.
        h.update(f"{type(obj).__module__}.{type(obj).__qualname__}:{obj.cache_key};".encode())
    elif isinstance(obj, type) or callable(obj) and hasattr(obj, "__qualname__"):
        h.update(f"callable:{getattr(obj, '__module__', '?')}.{obj.__qualname__};".encode())
    elif dataclasses.is_dataclass(obj):
        h.update(f"{type(obj).__module__}.{type(obj).__qualname__}(".encode())
        for f in dataclasses.fields(obj):
            _hash_update(h, f.name, depth + 1)
            _hash_update(h, getattr(obj, f.name), depth + 1)
        h.update(b")")
    elif hasattr(obj, "__dict__"):
        cls = type(obj)
        lazy = {n for n in dir(cls) if isinstance(getattr(cls, n, None), functools.cached_property)}
        state = {k: v for k, v in vars(obj).items() if k not in lazy}
        h.update(f"{cls.__module__}.{cls.__qualname__}".encode())
        _hash_update(h, state, depth + 1)
    else:
        h.update(hashlib.sha256(pickle.dumps(obj, protocol=4)).hexdigest().encode())


def _inputs_hash(function, context, extra) -> str:
    h = hashlib.sha256()
    _hash_update(h, (RUN_FORMAT, RUN_FORMAT_VERSION, __version__))
    _hash_update(h, function)
    _hash_update(h, context)
    _hash_update(h, extra)
    return h.hexdigest()


def _function_name(function) -> str:
    return f"{getattr(function, '__module__', '?')}.{getattr(function, '__qualname__', type(function).__name__)}"
