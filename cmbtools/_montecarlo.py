"""Monte Carlo runs: many simulations on any executor, streamed to disk, resumable.

Two layers:

* :func:`run_simulations` runs any per-simulation function ``fn(index, rng,
  context) -> {name: array}`` ``n_sims`` times and stacks the results.  It is
  generic: it knows nothing about maps or spectra.
* :func:`validate_estimator` (and :func:`validate_pipeline`, which also builds
  the estimator) uses it to check a :class:`~cmbtools.spectrum.SpectrumEstimator`
  end to end on simulated skies and returns a :class:`ValidationResult`.

Reproducibility
---------------
Simulation ``i`` draws its random numbers only from
:func:`cmbtools.simulate.simulation_rng` ``(seed, i)``, i.e. from
``SeedSequence(seed, spawn_key=(i,))``.  It therefore does not depend on which
worker runs it, in what order, or how many workers there are; the results of a
run are the same on a local process pool, a dask cluster or a thread pool (up
to the rounding of multi-threaded transforms, ~1e-15 relative).

Executors
---------
``executor=None`` (the default) runs a local :class:`~concurrent.futures.ProcessPoolExecutor`
(``spawn`` start method) with ``workers`` processes (default: all cores) and
gives every worker ``threads_per_worker`` threads for its transforms (default
``cores // workers``) through ``$CMBTOOLS_NUM_THREADS``, which
:func:`cmbtools._validation.resolve_nthreads` reads, so nothing oversubscribes.
The function and its context (the estimator, the mask, ...) are sent to each
worker once, through the pool's ``initializer``; a task carries only the
simulation index and the seed.  A worker that dies (the pool raises
``BrokenProcessPool``) costs only the simulations it was running: the pool is
recreated and the unfinished simulations are resubmitted, at most
``max_restarts`` times.

A :class:`distributed.Client` (the optional ``dask`` extra), or the executor
returned by its ``get_executor()``, runs the simulations on a dask cluster: the
function and context are scattered to every worker once
(``client.scatter(..., broadcast=True)``), tasks carry the index and the seed,
and dask itself retries failed tasks (``retries=max_restarts``) and reschedules
the tasks of workers that die.  On each dask worker process the engine sets
``$CMBTOOLS_NUM_THREADS`` to the host's cores divided by the threads of all
the workers on that host (found with ``client.run`` before the run), unless
the variable was set by someone else.

Any other :class:`concurrent.futures.Executor` (a thread pool, a pool you
created yourself, ...) is the fallback: each task then carries the function
and its context, which is free for threads (shared memory) but pickles the
context once per task for executors that run elsewhere.  Such an executor is
not recreated if it breaks: the run stops with
:class:`~cmbtools.exceptions.WorkerLostError` and a rerun resumes.

Run directory
-------------
With ``run_dir``, results stream to disk as each simulation finishes: the
manifest ``run.json`` (format, cmbtools version, hash of the inputs, seed,
number of simulations, function name) is written first, then one small file
``sim_NNNNNN.npz`` per simulation (written atomically by the parent process
through :func:`cmbtools._io.atomic_output`, with ``allow_pickle=False`` data,
the index, the input hash and a SHA-256 checksum of the arrays).  Rerunning the
same call resumes: finished simulations are read back (checked) and only the
others run.  A rerun with different inputs, seed or cmbtools version raises
:class:`~cmbtools.exceptions.CacheError` unless ``restart=True``, which deletes
the old records.  Asking for more simulations than a run holds extends it;
asking for fewer uses the first ``n_sims``.  Nothing is ever pickled to disk.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import dataclasses
import datetime
import functools
import hashlib
import inspect
import json
import math
import os
import pickle
import re
import types
import uuid
import warnings
from pathlib import Path

import numpy as np

from ._io import atomic_output, sha256_arrays
from ._validation import check_int, resolve_nthreads
from ._version import __version__
from .exceptions import CacheError, CmbtoolsWarning, InvalidInputError, OutputPathError, WorkerLostError

__all__ = [
    "SimulationSet",
    "run_simulations",
    "ValidationResult",
    "validate_estimator",
    "validate_pipeline",
    "transfer_from_pseudo_spectrum",
]

RUN_FORMAT = "cmbtools simulation run"
RUN_FORMAT_VERSION = 1
MANIFEST_NAME = "run.json"
_RECORD_RE = re.compile(r"^sim_(\d+)\.npz$")
_TEMP_RE = re.compile(r"^\.sim_\d+\.npz\..*\.tmp\.npz$")
_RESERVED_PREFIX = "_"
_THREADS_ENV = "CMBTOOLS_NUM_THREADS"


# --------------------------------------------------------------------------- hashing of inputs


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


# --------------------------------------------------------------------------- what runs in the workers


class _Job:
    """The function and context of a run (sent to each worker once)."""

    __slots__ = ("function", "context")

    def __init__(self, function, context):
        self.function = function
        self.context = context

    def __getstate__(self):
        return (self.function, self.context)

    def __setstate__(self, state):
        self.function, self.context = state


class _Shared:
    """(job, thread budget) scattered to dask workers as one object (a plain tuple would be split)."""

    __slots__ = ("job", "budget")

    def __init__(self, job, budget):
        self.job = job
        self.budget = budget

    def __reduce__(self):
        return (_Shared, (self.job, self.budget))


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


def _execute(job, index, seed) -> dict:
    from ._skies import simulation_rng

    return _clean_result(job.function(index, simulation_rng(seed, index), job.context), index)


_WORKER_JOB = None


def _init_pool_worker(job_bytes, nthreads):
    """ProcessPoolExecutor initializer: thread budget and the job, once per worker process."""
    global _WORKER_JOB
    os.environ[_THREADS_ENV] = str(int(nthreads))
    _WORKER_JOB = pickle.loads(job_bytes)


def _pool_task(index, seed):
    return _execute(_WORKER_JOB, index, seed)


#: Largest number of simulations in one run (a bound that keeps a typo from exhausting memory).
MAX_SIMULATIONS = 10_000_000

#: The thread count this module put into $CMBTOOLS_NUM_THREADS of a dask worker
#: (None: not set by us, so a value found there was set by the user and is kept).
_DASK_THREADS_SET = None


def _available_cores():
    """Cores available to this process (run on every dask worker)."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not on Linux
        return os.cpu_count() or 1


def _dask_thread_budget(client) -> dict:
    """Transform threads per task for every dask worker: host cores // all worker threads on that host."""
    workers = client.scheduler_info(n_workers=-1).get("workers", {})
    cores = client.run(_available_cores, on_error="ignore")
    per_host = {}
    for info in workers.values():
        host = info.get("host")
        per_host[host] = per_host.get(host, 0) + int(info.get("nthreads", 1) or 1)
    budget = {}
    for addr, info in workers.items():
        n_cores = cores.get(addr)
        if isinstance(n_cores, int):
            budget[addr] = max(1, n_cores // max(1, per_host[info.get("host")]))
    return budget


def _dask_task(shared, index, seed):
    global _DASK_THREADS_SET
    job, budget = shared.job, shared.budget
    current = os.environ.get(_THREADS_ENV)
    if current is None or (_DASK_THREADS_SET is not None and current == str(_DASK_THREADS_SET)):
        try:
            from distributed import get_worker

            worker = get_worker()
            n = budget.get(worker.address)
            if n is None:  # a worker that joined after the run started
                n = max(1, _available_cores() // max(1, int(getattr(worker.state, "nthreads", 1))))
        except (ImportError, ValueError, AttributeError):
            n = 1
        os.environ[_THREADS_ENV] = str(n)
        _DASK_THREADS_SET = n
    return _execute(job, index, seed)


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


# --------------------------------------------------------------------------- executors


def _dask_client(executor):
    """The dask Client behind ``executor`` if it is one (or its ``get_executor()``), else None."""
    module = type(executor).__module__ or ""
    if not module.startswith("distributed"):
        return None
    from distributed import Client
    from distributed.cfexecutor import ClientExecutor

    if isinstance(executor, Client):
        return executor
    if isinstance(executor, ClientExecutor):
        return executor._client
    return None


class _Progress:
    def __init__(self, total, initial, enabled, description):
        from tqdm import tqdm

        disable = None if enabled is None else not enabled
        self._bar = tqdm(total=total, initial=initial, disable=disable, desc=description, unit="sim", dynamic_ncols=True)

    def update(self):
        self._bar.update(1)

    def close(self):
        self._bar.close()


def _run_local_pool(job, pending, seed, store, *, workers, threads_per_worker, max_restarts, n_sims):
    try:
        job_bytes = pickle.dumps(job, protocol=pickle.HIGHEST_PROTOCOL)
    except Exception as exc:
        raise InvalidInputError(
            "The per-simulation function and its context must be picklable to run in worker processes "
            f"(a module-level function; no lambdas or local functions): {type(exc).__name__}: {exc}. "
            "Pass a thread pool as executor= to run unpicklable functions."
        ) from None
    import multiprocessing

    ctx = multiprocessing.get_context("spawn")
    pending = sorted(pending)
    restarts = 0
    while pending:
        pool = cf.ProcessPoolExecutor(
            max_workers=max(1, min(workers, len(pending))),
            mp_context=ctx,
            initializer=_init_pool_worker,
            initargs=(job_bytes, threads_per_worker),
        )
        broken = None
        try:
            futures = {pool.submit(_pool_task, i, seed): i for i in pending}
            for fut in cf.as_completed(futures):
                try:
                    result = fut.result()
                except cf.process.BrokenProcessPool as exc:
                    broken = exc
                    continue
                store(futures[fut], result)
        finally:
            pool.shutdown(wait=True, cancel_futures=True)
        pending = [i for i in pending if i not in store.done]
        if broken is not None and pending:
            restarts += 1
            if restarts > max_restarts:
                n_finished = n_sims - len(pending)
                raise WorkerLostError(
                    f"Worker processes died {restarts} times ({broken}); {n_finished} of {n_sims} simulations "
                    "are finished and saved in the run directory. Run the same call again to resume.",
                    n_finished,
                    n_sims,
                )
            warnings.warn(
                f"A worker process died ({broken}); restarting the pool for the {len(pending)} unfinished "
                f"simulations (restart {restarts} of at most {max_restarts}).",
                CmbtoolsWarning,
                stacklevel=3,
            )


def _run_dask(client, job, pending, seed, store, *, max_restarts, n_sims):
    from distributed import KilledWorker
    from distributed import as_completed as dask_as_completed

    token = uuid.uuid4().hex[:12]
    job_future = client.scatter(_Shared(job, _dask_thread_budget(client)), broadcast=True, hash=False)
    futures = []
    try:
        keys = {}
        for i in sorted(pending):
            fut = client.submit(
                _dask_task, job_future, i, seed, key=f"cmbtools-sim-{token}-{i:06d}", pure=False, retries=max_restarts
            )
            keys[fut.key] = i
            futures.append(fut)
        for fut in dask_as_completed(futures):
            try:
                result = fut.result()
            except KilledWorker as exc:
                n_finished = len(store.done)
                raise WorkerLostError(
                    f"dask gave up on a simulation after its workers died ({exc}); {n_finished} of {n_sims} "
                    "simulations are finished and saved. Run the same call again to resume.",
                    n_finished,
                    n_sims,
                ) from None
            store(keys[fut.key], result)
    finally:
        unfinished = [f for f in futures if not f.done()]
        if unfinished:
            client.cancel(unfinished)
        job_future.release()


def _run_generic(executor, job, pending, seed, store, *, n_sims):
    futures = {executor.submit(_execute, job, i, seed): i for i in sorted(pending)}
    try:
        for fut in cf.as_completed(futures):
            try:
                result = fut.result()
            except cf.BrokenExecutor as exc:
                n_finished = len(store.done)
                raise WorkerLostError(
                    f"The executor broke ({type(exc).__name__}: {exc}); {n_finished} of {n_sims} simulations are "
                    "finished and saved. Run the same call again (with a working executor) to resume.",
                    n_finished,
                    n_sims,
                ) from None
            store(futures[fut], result)
    finally:
        for fut in futures:
            fut.cancel()


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


# --------------------------------------------------------------------------- memory of a run

_SKIP_TYPES = (type, types.ModuleType, types.FunctionType, types.BuiltinFunctionType, types.MethodType)


def _approx_nbytes(obj, seen=None, depth=0) -> int:
    """Bytes of the numpy arrays (and strings) reachable from ``obj``, each counted once.

    Follows dicts, sequences, instance attributes and slots (so dataclasses
    and the spectrum estimator are covered); skips modules, classes and
    functions.  Used as the size of a run's context, which each worker holds.
    """
    if seen is None:
        seen = set()
    if depth > 30 or id(obj) in seen or len(seen) > 100_000 or isinstance(obj, _SKIP_TYPES):
        return 0
    seen.add(id(obj))
    if isinstance(obj, np.ndarray):
        return int(obj.nbytes)
    if isinstance(obj, (str, bytes, bytearray)):
        return len(obj)
    if isinstance(obj, dict):
        items = [*obj.keys(), *obj.values()]
    elif isinstance(obj, (list, tuple, set, frozenset)):
        items = list(obj)
    else:
        attrs = getattr(obj, "__dict__", None)
        items = list(attrs.values()) if isinstance(attrs, dict) else []
        for cls in type(obj).__mro__:
            slots = cls.__dict__.get("__slots__", ())
            for name in (slots,) if isinstance(slots, str) else slots:
                if name not in ("__dict__", "__weakref__"):
                    items.append(getattr(obj, name, None))
    return sum(_approx_nbytes(x, seen, depth + 1) for x in items)


def _check_run_memory(context, per_simulation, n_sims, executor, client, workers, force):
    """Refuse a run whose workers together would need more memory than the machine has, before any starts.

    Local pool: every worker process holds the pickled job and its unpickled
    copy (twice the context) plus one simulation; the parent holds one more
    pickle.  Other executors: as many simulations at once as the executor has
    workers (threads share the context).  dask workers run on their own hosts
    under dask's own memory limits and are not checked.
    """
    from ._resources import check_memory, format_bytes

    if client is not None:
        return None
    per_sim = 0 if per_simulation is None else per_simulation
    if executor is None:
        n = max(1, min(workers, n_sims))
        shared = _approx_nbytes(context)
        need = n * (2 * shared + per_sim) + shared
        where = f"{n} worker process{'es' if n != 1 else ''}"
    else:
        n = max(1, min(int(getattr(executor, "_max_workers", 1) or 1), n_sims))
        shared = 0 if isinstance(executor, cf.ThreadPoolExecutor) else _approx_nbytes(context)
        need = n * (shared + per_sim)
        where = f"{n} concurrent task{'s' if n != 1 else ''}"
    return check_memory(
        need, f"Running {n_sims} simulations on {where} (about {format_bytes(need / n)} each)", force=force
    )


# --------------------------------------------------------------------------- public: generic runs


@dataclasses.dataclass(frozen=True, eq=False)
class SimulationSet:
    """The stacked results of :func:`run_simulations`.

    Attributes
    ----------
    n_sims : int
        Number of simulations.
    seed : int
        Master seed; simulation ``i`` used ``simulation_rng(seed, i)``.
    arrays : dict of str -> ndarray
        For every name the per-simulation function returned, the values of all
        simulations stacked along a first axis of length ``n_sims``, in index order.
    run_dir : pathlib.Path or None
        Where the records are, if the run streamed to disk.
    n_resumed : int
        How many simulations were read back from the run directory instead of run.
    """

    n_sims: int
    seed: int
    arrays: dict
    run_dir: Path | None = None
    n_resumed: int = 0

    def __getitem__(self, name) -> np.ndarray:
        return self.arrays[name]


def _stack(results: dict, n_sims: int) -> dict:
    first = results[0]
    keys = sorted(first)
    stacked = {}
    for key in keys:
        shape = first[key].shape
        for i in range(n_sims):
            r = results[i]
            if sorted(r) != keys:
                raise InvalidInputError(
                    f"Simulation {i} returned the keys {sorted(r)}, but simulation 0 returned {keys}; "
                    "a per-simulation function must always return the same names."
                )
            if r[key].shape != shape:
                raise InvalidInputError(
                    f"Simulation {i} returned {key!r} of shape {r[key].shape}, but simulation 0 returned shape {shape}."
                )
        stacked[key] = np.stack([results[i][key] for i in range(n_sims)])
    return stacked


def run_simulations(
    simulate_one,
    n_sims,
    *,
    seed=None,
    context=None,
    run_dir=None,
    executor=None,
    workers=None,
    threads_per_worker=None,
    progress=None,
    restart=False,
    max_restarts=3,
    input_hash=None,
    description="simulations",
    memory_per_simulation=None,
    force=False,
) -> SimulationSet:
    """Run a per-simulation function many times, in parallel, streaming to disk.

    Parameters
    ----------
    simulate_one : callable
        ``simulate_one(index, rng, context) -> dict`` of name -> numeric array
        (the same names and shapes for every simulation; names must not start
        with ``_``).  ``rng`` is the :class:`numpy.random.Generator` of
        simulation ``index`` (:func:`cmbtools.simulate.simulation_rng`); the
        function must draw all its random numbers from it.  For the local
        process pool it must be a module-level (picklable) function.
    n_sims : int
        Number of simulations (>= 1).
    seed : int, optional
        Master seed (>= 0).  ``None`` reuses the seed recorded in ``run_dir``
        when resuming, else draws a fresh one (returned in the result).
    context : object, optional
        Read-only data for ``simulate_one`` (an estimator, a mask, a spectrum);
        sent to each worker once.
    run_dir : str or path-like, optional
        Directory that receives the manifest and one record per simulation as
        it finishes (created if missing; its parent must exist).  Rerunning
        with the same inputs resumes.  Without it, results stay in memory.
    executor : concurrent.futures.Executor or distributed.Client, optional
        Where to run (see the module notes).  Default: a local process pool.
    workers : int, optional
        Processes of the local pool (default: all cores).  Ignored with ``executor``.
    threads_per_worker : int, optional
        Transform threads per local worker (default ``cores // workers``).
    progress : bool, optional
        Show a progress bar; default (``None``): only when standard error is a terminal.
    restart : bool, default=False
        Delete the records of ``run_dir`` if they do not belong to this run
        (or in any case) and start again, instead of raising ``CacheError``.
    max_restarts : int, default=3
        How many times a broken local pool is recreated (dask: task retries).
    input_hash : str, optional
        Your own description of the inputs, mixed into the run's identity
        (use it when ``context`` does not determine the results alone).
        The identity always covers the function's name, the hash of
        ``context`` (arrays by content; objects with a ``cache_key`` by it) and
        the cmbtools version.
    description : str, default='simulations'
        Label of the progress bar.
    memory_per_simulation : int, optional
        Bytes one call of ``simulate_one`` allocates at its peak (your
        estimate).  Before any worker starts, this plus the size of
        ``context`` is multiplied by the number of workers that run at once
        and compared with the memory available
        (:func:`cmbtools._resources.check_memory`); without it only the
        copies of the context are counted.  dask clusters are not checked.
    force : bool, default=False
        Run even when that estimate exceeds the memory available (warn
        instead of raising).

    Returns
    -------
    SimulationSet

    Raises
    ------
    CacheError
        ``run_dir`` holds another run (other inputs, seed or version) and
        ``restart`` is false.
    WorkerLostError
        Workers kept dying (more than ``max_restarts`` times) or a
        user-supplied executor broke; finished simulations are saved.
    InvalidInputError
        Bad arguments, or a per-simulation function that returns something
        other than a dict of numeric arrays.
    MemoryLimitError
        The workers together would need more memory than the machine has
        available (unless ``force``); nothing is run or written.

    Examples
    --------
    >>> import numpy as np
    >>> from concurrent.futures import ThreadPoolExecutor
    >>> def draw(index, rng, context):
    ...     return {"x": rng.normal(context["mean"], 1.0, size=3)}
    >>> with ThreadPoolExecutor(2) as pool:
    ...     sims = run_simulations(draw, 4, seed=7, context={"mean": 1.0}, executor=pool, progress=False)
    >>> sims["x"].shape
    (4, 3)
    """
    if not callable(simulate_one):
        raise InvalidInputError(f"The 'simulate_one' parameter must be a callable. Got {simulate_one!r} instead.")
    n_sims = check_int(n_sims, "n_sims", minimum=1, maximum=MAX_SIMULATIONS)
    if seed is not None:
        seed = check_int(seed, "seed", minimum=0)
    max_restarts = check_int(max_restarts, "max_restarts", minimum=0)
    if progress is not None and not isinstance(progress, (bool, np.bool_)):
        raise InvalidInputError(f"The 'progress' parameter must be True, False or None. Got {progress!r} instead.")
    if input_hash is not None and not isinstance(input_hash, str):
        raise InvalidInputError(f"The 'input_hash' parameter must be a string. Got {input_hash!r} instead.")
    client = None
    if executor is not None:
        client = _dask_client(executor)
        if client is None and not isinstance(executor, cf.Executor):
            raise InvalidInputError(
                "The 'executor' parameter must be a concurrent.futures.Executor or a distributed.Client. "
                f"Got {type(executor).__name__} instead."
            )
    cores = resolve_nthreads(None)
    if executor is None:
        workers = cores if workers is None else check_int(workers, "workers", minimum=1)
        if threads_per_worker is None:
            threads_per_worker = max(1, cores // workers)
        threads_per_worker = check_int(threads_per_worker, "threads_per_worker", minimum=1)
    if memory_per_simulation is not None:
        memory_per_simulation = check_int(memory_per_simulation, "memory_per_simulation", minimum=0)
    _check_run_memory(context, memory_per_simulation, n_sims, executor, client, workers, force)

    job = _Job(simulate_one, context)
    identity = _inputs_hash(simulate_one, context, input_hash)
    results = {}
    n_resumed = 0
    if run_dir is not None:
        run_dir, seed, records = _prepare_run_dir(
            run_dir, input_hash=identity, seed=seed, n_sims=n_sims,
            function_name=_function_name(simulate_one), restart=restart,
        )
        for index in sorted(records):
            if index >= n_sims:
                continue
            data, problem = _read_record(records[index], index, identity)
            if data is None:
                warnings.warn(f"{records[index]}: {problem}; simulation {index} is run again.", CmbtoolsWarning, stacklevel=2)
                continue
            results[index] = data
        n_resumed = len(results)
    elif seed is None:
        seed = int(np.random.SeedSequence().entropy)

    pending = [i for i in range(n_sims) if i not in results]
    bar = _Progress(n_sims, len(results), progress, description)
    store = _Store(run_dir, identity, bar)
    store.results = results
    try:
        if pending:
            if client is not None:
                _run_dask(client, job, pending, seed, store, max_restarts=max_restarts, n_sims=n_sims)
            elif executor is not None:
                _run_generic(executor, job, pending, seed, store, n_sims=n_sims)
            else:
                _run_local_pool(
                    job, pending, seed, store, workers=workers, threads_per_worker=threads_per_worker,
                    max_restarts=max_restarts, n_sims=n_sims,
                )
    finally:
        bar.close()
    return SimulationSet(
        n_sims=n_sims, seed=seed, arrays=_stack(results, n_sims), run_dir=run_dir, n_resumed=n_resumed
    )


# --------------------------------------------------------------------------- validation of the estimator

_UNITS = {"uK": 1.0e12, "K": 1.0}
_TABLE_COLUMNS = (
    "ell_min", "ell_max", "ell_eff", "expected", "mean", "std", "analytic_error", "bias_sigma", "error_ratio", "transfer",
)
_POWER_COLUMNS = ("expected", "mean", "std", "analytic_error")


def _plain_value(value):
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else str(value)
    return " ".join(str(value).splitlines())


def _frozen_float(a, name, shape=None):
    arr = np.array(a, dtype=np.float64)
    if shape is not None and arr.shape != shape:
        raise InvalidInputError(f"ValidationResult.{name} must have shape {shape}. Got {arr.shape} instead.")
    arr.setflags(write=False)
    return arr


@dataclasses.dataclass(frozen=True, eq=False)
class ValidationResult:
    """What a Monte Carlo validation of the spectrum estimator found, bin by bin.

    Build it with :func:`validate_estimator` / :func:`validate_pipeline`, or
    from bandpowers you simulated yourself with :meth:`from_samples`.  All
    spectra are ``C_l`` bandpowers in K^2.

    Attributes
    ----------
    n_sims : int
        Number of simulations (>= 2).
    ell_min, ell_max : ndarray of int, shape (n_bins,)
        First and last multipole of each bin (inclusive).
    ell_eff : ndarray of shape (n_bins,)
        Effective multipole of each bin.
    expected : ndarray of shape (n_bins,)
        The input spectrum as the estimator should return it on average (the
        input ``C_l`` through the bandpower windows).
    samples : ndarray of shape (n_sims, n_bins)
        The recovered bandpowers of every simulation, in simulation order.
    mean, std : ndarray of shape (n_bins,)
        Mean and standard deviation (``ddof=1``) of the recovered bandpowers.
    covariance : ndarray of shape (n_bins, n_bins)
        Sample covariance of the recovered bandpowers (``ddof=1``).
    analytic_error : ndarray of shape (n_bins,)
        The estimator's reported error bar ``cl_err``, averaged over the simulations.
    bias_sigma : ndarray of shape (n_bins,)
        ``(mean - expected) / (std / sqrt(n_sims))``: the bias in units of the
        standard error of the mean.  For an unbiased estimator each value is
        drawn from Student's t distribution with ``n_sims - 1`` degrees of
        freedom (about N(0, 1)).
    error_ratio : ndarray of shape (n_bins,)
        ``std / analytic_error``: 1 when the reported errors match the scatter.
        Its own relative uncertainty is about ``1/sqrt(2 (n_sims - 1))``.
    transfer : ndarray of shape (n_bins,)
        ``mean / expected``, the per-bin transfer function of the whole
        pipeline (1 when nothing filters the signal).
    dl_factor : ndarray of shape (n_bins,)
        The factor that turns the ``C_l`` bandpowers into ``D_l`` ones (for tables and figures).
    seed : int
        Master seed of the simulations.
    mean_pseudo_cl : ndarray of shape (lmax+1,) or None
        Mean pseudo-spectrum of the masked, filtered skies (before noise), if recorded.
    metadata : dict
        Settings of the run (nside, lmax, sky fractions, beam, noise, ...), str or number values.
    """

    n_sims: int
    ell_min: np.ndarray
    ell_max: np.ndarray
    ell_eff: np.ndarray
    expected: np.ndarray
    samples: np.ndarray
    mean: np.ndarray
    std: np.ndarray
    covariance: np.ndarray
    analytic_error: np.ndarray
    bias_sigma: np.ndarray
    error_ratio: np.ndarray
    transfer: np.ndarray
    dl_factor: np.ndarray
    seed: int = 0
    mean_pseudo_cl: np.ndarray | None = None
    metadata: dict = dataclasses.field(default_factory=dict)

    def __post_init__(self):
        n_sims = check_int(self.n_sims, "n_sims", minimum=2)
        object.__setattr__(self, "n_sims", n_sims)
        ell_min = np.array(self.ell_min, dtype=np.int64)
        if ell_min.ndim != 1 or ell_min.size == 0:
            raise InvalidInputError("ValidationResult.ell_min must be a non-empty 1-d array.")
        ell_min.setflags(write=False)
        object.__setattr__(self, "ell_min", ell_min)
        nb = ell_min.size
        ell_max = np.array(self.ell_max, dtype=np.int64)
        if ell_max.shape != (nb,):
            raise InvalidInputError(f"ValidationResult.ell_max must have shape ({nb},). Got {ell_max.shape} instead.")
        ell_max.setflags(write=False)
        object.__setattr__(self, "ell_max", ell_max)
        for name in ("ell_eff", "expected", "mean", "std", "analytic_error", "bias_sigma", "error_ratio", "transfer", "dl_factor"):
            object.__setattr__(self, name, _frozen_float(getattr(self, name), name, (nb,)))
        object.__setattr__(self, "samples", _frozen_float(self.samples, "samples", (n_sims, nb)))
        object.__setattr__(self, "covariance", _frozen_float(self.covariance, "covariance", (nb, nb)))
        if self.mean_pseudo_cl is not None:
            object.__setattr__(self, "mean_pseudo_cl", _frozen_float(self.mean_pseudo_cl, "mean_pseudo_cl"))
        object.__setattr__(self, "seed", int(self.seed))
        if not isinstance(self.metadata, dict):
            raise InvalidInputError("ValidationResult.metadata must be a dict of str to str or number.")
        object.__setattr__(self, "metadata", {str(k): _plain_value(v) for k, v in self.metadata.items()})

    @classmethod
    def from_samples(cls, samples, errors, expected, *, ell_min, ell_max, ell_eff, dl_factor=None, seed=0,
                     mean_pseudo_cl=None, metadata=None) -> "ValidationResult":
        """Compute the statistics from per-simulation bandpowers and their reported errors.

        Parameters
        ----------
        samples, errors : array_like of shape (n_sims, n_bins)
            Recovered bandpowers ``cl`` and reported errors ``cl_err`` of each simulation (K^2).
        expected : array_like of shape (n_bins,)
            The expected bandpowers (``SpectrumEstimator.expected_bandpowers`` of the input).
        ell_min, ell_max, ell_eff : array_like of shape (n_bins,)
        dl_factor : array_like of shape (n_bins,), optional
            ``D_l / C_l`` of each bin (default ``ell_eff (ell_eff + 1) / 2 pi``).
        seed : int, default=0
        mean_pseudo_cl : array_like, optional
        metadata : dict, optional
        """
        x = np.array(samples, dtype=np.float64)
        if x.ndim != 2 or x.shape[0] < 2:
            raise InvalidInputError(
                f"The 'samples' must have shape (n_sims, n_bins) with n_sims >= 2. Got shape {x.shape} instead."
            )
        err = np.array(errors, dtype=np.float64)
        if err.shape != x.shape:
            raise InvalidInputError(f"The 'errors' must have the shape of 'samples' {x.shape}. Got {err.shape} instead.")
        n = x.shape[0]
        expected = np.array(expected, dtype=np.float64)
        mean = x.mean(axis=0)
        std = x.std(axis=0, ddof=1)
        cov = np.atleast_2d(np.cov(x, rowvar=False, ddof=1))
        analytic = err.mean(axis=0)
        with np.errstate(divide="ignore", invalid="ignore"):
            bias = (mean - expected) / (std / math.sqrt(n))
            ratio = std / analytic
            transfer = mean / expected
        ell_eff = np.asarray(ell_eff, dtype=np.float64)
        if dl_factor is None:
            dl_factor = ell_eff * (ell_eff + 1.0) / (2.0 * np.pi)
        return cls(
            n_sims=n, ell_min=ell_min, ell_max=ell_max, ell_eff=ell_eff, expected=expected, samples=x, mean=mean,
            std=std, covariance=cov, analytic_error=analytic, bias_sigma=bias, error_ratio=ratio,
            transfer=transfer, dl_factor=dl_factor, seed=seed, mean_pseudo_cl=mean_pseudo_cl,
            metadata=dict(metadata or {}),
        )

    @property
    def n_bins(self) -> int:
        return int(self.ell_min.size)

    def summary(self) -> dict:
        """The headline numbers, as a dict of plain Python numbers.

        Keys: ``nsims``, ``n_bins``, ``seed``, ``max_abs_bias_sigma``,
        ``rms_bias_sigma``, ``median_error_ratio``, ``min_error_ratio``,
        ``max_error_ratio``, ``median_transfer``.

        With ``n_bins`` independent bins of an unbiased estimator,
        ``max_abs_bias_sigma`` exceeds 3 with probability about
        ``1 - 0.9973**n_bins`` (for example 8% for 30 bins): judge it with the
        number of bins in mind.  ``rms_bias_sigma`` should be near 1.
        """
        def f(v):
            v = float(v)
            return v if math.isfinite(v) else None

        return {
            "nsims": int(self.n_sims),
            "n_bins": self.n_bins,
            "seed": int(self.seed),
            "max_abs_bias_sigma": f(np.max(np.abs(self.bias_sigma))),
            "rms_bias_sigma": f(np.sqrt(np.mean(self.bias_sigma**2))),
            "median_error_ratio": f(np.median(self.error_ratio)),
            "min_error_ratio": f(np.min(self.error_ratio)),
            "max_error_ratio": f(np.max(self.error_ratio)),
            "median_transfer": f(np.median(self.transfer)),
        }

    def _header_lines(self, unit):
        lines = [f"# cmbtools {__version__}: Monte Carlo validation of the spectrum estimator"]
        for key, value in {**self.summary(), **self.metadata}.items():
            text = " ".join(str(value).splitlines())
            lines.append(f"# {key}: {text}")
        lines.append(f"# unit: {unit}^2 (columns expected, mean, std, analytic_error; C_l bandpowers)")
        lines.append("# bias_sigma = (mean - expected) / (std / sqrt(nsims)); error_ratio = std / analytic_error;"
                     " transfer = mean / expected")
        return lines

    def write_csv(self, path, *, overwrite=False, unit="uK") -> Path:
        """Write the per-bin table as CSV with a commented header (``# key: value`` lines).

        Columns: ``ell_min, ell_max, ell_eff, expected, mean, std,
        analytic_error, bias_sigma, error_ratio, transfer``; the power columns
        are in ``unit``^2 (``'uK'`` default, or ``'K'``).  Written atomically.
        """
        if unit not in _UNITS:
            raise InvalidInputError(f"The 'unit' parameter must be 'uK' or 'K'. Got {unit!r} instead.")
        out = _check_output(path, overwrite)
        scale = _UNITS[unit]
        lines = self._header_lines(unit)
        lines.append(",".join(_TABLE_COLUMNS))
        for b in range(self.n_bins):
            row = [str(int(self.ell_min[b])), str(int(self.ell_max[b])), f"{self.ell_eff[b]:.6g}"]
            for name in _TABLE_COLUMNS[3:]:
                v = getattr(self, name)[b] * (scale if name in _POWER_COLUMNS else 1.0)
                row.append(f"{v:.10g}")
            lines.append(",".join(row))
        with atomic_output(out, overwrite=overwrite) as tmp:
            tmp.write_text("\n".join(lines) + "\n")
        return out

    def write_json(self, path, *, overwrite=False) -> Path:
        """Write :meth:`summary`, the settings and the per-bin columns (C_l in K^2) as JSON, atomically."""
        out = _check_output(path, overwrite)

        def clean(a):
            return [None if not math.isfinite(float(v)) else float(v) for v in np.asarray(a).ravel()]

        doc = dict(self.summary())
        doc["software"] = f"cmbtools {__version__}"
        doc["settings"] = dict(self.metadata)
        doc["bins"] = {
            "ell_min": [int(v) for v in self.ell_min],
            "ell_max": [int(v) for v in self.ell_max],
            **{name: clean(getattr(self, name)) for name in _TABLE_COLUMNS[2:]},
        }
        doc["unit"] = "K^2"
        with atomic_output(out, overwrite=overwrite) as tmp:
            tmp.write_text(json.dumps(doc, indent=2) + "\n")
        return out

    def plot(self, path, *, overwrite=False, title=None) -> Path:
        """Draw the input against the mean recovered ``D_l`` with scatter bands, and the bias per bin below.

        Upper panel: the expected bandpowers (line), the mean of the recovered
        ones (points with the standard error of the mean) and the scatter of a
        single simulation (shaded: +-1 and +-2 standard deviations).  Lower
        panel: ``bias_sigma`` per bin with the +-1, +-2 and +-3 levels.

        Parameters
        ----------
        path : str or path-like
            ``.png`` or ``.pdf``; written atomically.
        overwrite : bool, default=False
        title : str, optional
        """
        suffix = Path(path).suffix.lower()
        if suffix not in (".png", ".pdf"):
            raise InvalidInputError(f"The figure file must end in .png or .pdf. Got {str(path)!r} instead.")
        out = _check_output(path, overwrite)
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        uk2 = 1.0e12
        ink, accent, soft, band = "#1b2a41", "#c8553d", "#8d99ae", "#9fb4c7"
        fig = Figure(figsize=(7.5, 6.0), dpi=130)
        FigureCanvasAgg(fig)
        gs = fig.add_gridspec(2, 1, height_ratios=(3, 1.4), hspace=0.07)
        ax = fig.add_subplot(gs[0])
        bx = fig.add_subplot(gs[1], sharex=ax)
        x = self.ell_eff
        k = self.dl_factor * uk2
        half = 0.5 * (self.ell_max - self.ell_min + 1)
        ax.fill_between(x, (self.expected - 2 * self.std) * k, (self.expected + 2 * self.std) * k,
                        color=band, alpha=0.25, lw=0, label=r"$\pm2\sigma$ scatter of one simulation")
        ax.fill_between(x, (self.expected - self.std) * k, (self.expected + self.std) * k,
                        color=band, alpha=0.45, lw=0, label=r"$\pm1\sigma$ scatter of one simulation")
        ax.plot(x, self.expected * k, color=ink, lw=1.3, label="input (through the bandpower windows)")
        ax.errorbar(x, self.mean * k, yerr=self.std / math.sqrt(self.n_sims) * k, xerr=half, fmt="o", ms=3.8,
                    color=accent, ecolor=accent, elinewidth=1.0, capsize=0,
                    label=f"mean of {self.n_sims} simulations")
        ax.set_ylabel(r"$D_\ell = \ell(\ell+1)C_\ell/2\pi$  [$\mu$K$^2$]")
        ax.legend(frameon=False, fontsize=7.5, loc="best")
        for level, alpha in ((3, 0.10), (2, 0.16), (1, 0.24)):
            bx.axhspan(-level, level, color=band, alpha=alpha, lw=0)
        bx.axhline(0.0, color=soft, lw=0.9)
        bx.plot(x, self.bias_sigma, "o", ms=3.8, color=accent)
        lim = max(3.5, float(np.nanmax(np.abs(self.bias_sigma), initial=0.0)) * 1.15)
        bx.set_ylim(-lim, lim)
        bx.set_ylabel(r"bias [$\sigma/\sqrt{N}$]")
        bx.set_xlabel(r"multipole $\ell$")
        for lab in ax.get_xticklabels():
            lab.set_visible(False)
        for a in (ax, bx):
            a.grid(True, color="#e5e8ec", lw=0.6)
            a.set_axisbelow(True)
            for side in ("top", "right"):
                a.spines[side].set_visible(False)
        s = self.summary()
        if title is None:
            def num(key, spec):  # None: not a number (a null run has no scatter)
                return "n/a" if s[key] is None else format(s[key], spec)

            title = (f"{self.n_sims} simulations: max |bias| {num('max_abs_bias_sigma', '.2f')} sigma, "
                     f"median error ratio {num('median_error_ratio', '.3f')}")
        ax.set_title(title, fontsize=10, loc="left", color=ink)
        fig.text(0.99, 0.005, f"cmbtools {__version__}", ha="right", va="bottom", fontsize=6, color=soft)
        with atomic_output(out, overwrite=overwrite) as tmp:
            fig.savefig(tmp, format=suffix[1:], bbox_inches="tight")
        return out

    def __repr__(self):
        s = self.summary()
        return (f"ValidationResult(n_sims={self.n_sims}, n_bins={self.n_bins}, "
                f"max_abs_bias_sigma={s['max_abs_bias_sigma']:.3g}, median_error_ratio={s['median_error_ratio']:.3g})")


def _check_output(path, overwrite):
    from ._io import check_output_path

    return check_output_path(path, overwrite=overwrite)


def transfer_from_pseudo_spectrum(mean_pseudo_cl, cl, mask, *, beam=None, pixel_window=None, iterations=5,
                                  nthreads=None) -> np.ndarray:
    r"""Per-multipole transfer function of a processing step, measured on simulations.

    The transfer function ``T_l`` says how much of the sky's power at each
    multipole survives a processing step that the estimator does not model
    (a filter applied to the maps, for example), on top of the beam ``B_l``
    and the pixel window ``p_l``.  It is the ``transfer=`` input of
    :class:`~cmbtools.spectrum.SpectrumEstimator`, which then corrects for it
    exactly as it does for ``B_l^2 p_l^2``.  It is defined by the MASTER model
    of the mean pseudo-spectrum (Hivon et al. 2002, ApJ 567, 2, section 2)::

        <C~_l> = sum_l' M_ll' T_l' B_l'^2 p_l'^2 C_l'

    with ``M`` the mode-coupling matrix of ``mask``, ``C_l`` the spectrum the
    simulations were drawn from and ``<C~_l>`` the mean pseudo-spectrum of the
    masked, processed simulated skies (without noise).  The first estimate is
    the ratio ``T_l = <C~_l> / (w2 B_l^2 p_l^2 C_l)`` (``w2`` the mean of the
    squared mask; each row of ``M`` sums to ``w2``, so this is exact for a
    spectrum that is flat across the mask's coupling kernel); each of the
    ``iterations`` refinements adds
    ``(<C~_l> - sum_l' M_ll' T_l' B_l'^2 p_l'^2 C_l') / (w2 B_l^2 p_l^2 C_l)``
    (the iterative scheme of Hivon et al. 2002, from memory).  Where
    ``B_l^2 p_l^2 C_l`` is zero (``l = 0, 1`` of a spectrum without monopole
    and dipole) ``T_l`` is set to 1, which leaves those multipoles as they are.

    A pipeline that does nothing to the sky gives ``T_l = 1`` up to the
    Monte Carlo noise of ``<C~_l>`` (relative ``sqrt(2 / ((2l+1) f_sky N))``
    for N simulations).  Measure it from noise-free simulations with the same
    mask, beam and pixel window as the estimator, for example
    ``validate_estimator(est, cl, noise=None, sky_filter=f, record_pseudo_spectra=True)``
    and ``transfer_from_pseudo_spectrum(result.mean_pseudo_cl, cl, est.mask,
    beam=est.beam, pixel_window=est.pixel_window)`` with an estimator built
    without a transfer function.

    Parameters
    ----------
    mean_pseudo_cl : array_like of shape (lmax+1,)
        Mean pseudo-spectrum of the masked, processed skies, K^2, from ell = 0.
    cl : array_like of shape (>= lmax+1,)
        Spectrum the skies were drawn from, K^2.
    mask : ndarray of shape (12*nside**2,)
        The mask the pseudo-spectra were measured with.
    beam, pixel_window : array_like of shape (>= lmax+1,), optional
        ``B_l`` and ``p_l`` the skies were convolved with (default: none).
    iterations : int, default=5
        Refinements with the mode-coupling matrix (0: the plain ratio; each
        costs one matrix-vector product after one coupling matrix).  On a
        noiseless input the refinements converge quickly for large sky
        fractions (0.75 of the sky: 12% error of the plain ratio at l = 2, 1e-4
        after 5 steps) and slowly for small ones (0.2 of the sky: 35%, then 8%);
        on Monte Carlo input many steps also amplify the noise, so keep a few.
    nthreads : int, optional
        Threads for the mask transform and the coupling kernel.

    Returns
    -------
    ndarray of shape (lmax+1,)
        ``T_l``, dimensionless.
    """
    from . import _coupling
    from ._validation import check_cl, check_mask

    pseudo = check_cl(mean_pseudo_cl, "mean_pseudo_cl", allow_negative=True)
    lmax = pseudo.size - 1
    cl = check_cl(cl, "cl", lmax=lmax)[: lmax + 1]
    w = check_mask(mask)
    iterations = check_int(iterations, "iterations", minimum=0)
    factor = np.ones(lmax + 1)
    for name, table in (("beam", beam), ("pixel_window", pixel_window)):
        if table is not None:
            t = check_cl(table, name, lmax=lmax, allow_negative=True)[: lmax + 1]
            factor = factor * t**2
    signal = factor * cl
    w2 = float(np.mean(w**2))
    ok = signal > 0
    denom = np.where(ok, w2 * signal, 1.0)
    t = np.where(ok, pseudo / denom, 1.0)
    if iterations:
        m = _coupling.coupling_matrix(_coupling.mask_spectrum(w, lmax=lmax, nthreads=nthreads), lmax, nthreads=nthreads)
        for _ in range(iterations):
            t = np.where(ok, t + (pseudo - m @ (t * signal)) / denom, 1.0)
    return t


@dataclasses.dataclass(frozen=True, eq=False)
class _ValidationSetup:
    """Everything a validation simulation needs (sent to each worker once)."""

    estimator: object
    cl: np.ndarray
    sky_beam: np.ndarray
    noise: object
    noise_cl: np.ndarray | None
    monopole: float
    dipole: object
    sky_filter: object
    record_pseudo: bool


def _validation_memory(estimator, noise, with_dipole, with_filter) -> int:
    """Peak bytes of one :func:`_simulate_and_estimate` (the phases run one after the other; the largest wins).

    The optional pseudo-spectrum is one more measurement of the same size.
    """
    from ._resources import estimate_alm_bytes, estimate_map_bytes
    from ._skies import _noise_bytes, _sky_bytes

    nside, lmax = int(estimator.nside), int(estimator.lmax)
    one = estimate_map_bytes(nside)
    alm = estimate_alm_bytes(lmax)
    # a measurement: the filled and the masked copies of the map, the coefficients and the larger of
    # the transform's ring buffer and the temporaries of the spectrum
    measure = 3 * one + alm + max(16 * (4 * nside - 1) * (lmax + 1), 3 * alm)
    phases = [_sky_bytes(nside, lmax, with_dipole), one + measure]
    if with_filter:  # the sky, the filtered sky and its float64 copy
        phases.append(3 * one)
    if noise is not None:  # the sky while its noise is drawn; then the sky, the noise and their sum
        phases += [one + _noise_bytes(noise, nside, lmax), 3 * one]
    return max(phases)


def _simulate_and_estimate(index, rng, setup):
    """One validation simulation: sky (+ filter) (+ noise) -> bandpowers."""
    from ._skies import _ALREADY_CHECKED, gaussian_sky, noise_map

    est = setup.estimator
    sky = gaussian_sky(
        setup.cl, est.nside, lmax=est.lmax, beam=setup.sky_beam, pixel_window=False,
        monopole=setup.monopole, dipole=setup.dipole, rng=rng, force=_ALREADY_CHECKED,
    )
    if setup.sky_filter is not None:
        filtered = np.asarray(setup.sky_filter(sky), dtype=np.float64)
        if filtered.shape != sky.shape:
            raise InvalidInputError(
                f"The 'sky_filter' must return a map of shape {sky.shape}. Got shape {filtered.shape} instead."
            )
        sky = filtered
    out = {}
    if setup.record_pseudo:
        out["pseudo_cl"] = est.pseudo_spectrum(sky)
    if setup.noise is not None:
        sky = sky + noise_map(setup.noise, est.nside, rng=rng, force=_ALREADY_CHECKED)
    bp = est.estimate(sky, noise_cl=setup.noise_cl)
    out["cl"] = bp.cl
    out["cl_err"] = bp.cl_err
    return out


def validate_estimator(
    estimator,
    cl=None,
    *,
    n_sims=100,
    seed=None,
    noise=None,
    monopole=0.0,
    dipole=None,
    sky_filter=None,
    record_pseudo_spectra=False,
    run_dir=None,
    executor=None,
    workers=None,
    threads_per_worker=None,
    progress=None,
    restart=False,
    max_restarts=3,
    force=False,
) -> ValidationResult:
    """Check a spectrum estimator on simulated skies: bias, error bars and transfer per bin.

    Each simulation draws a Gaussian sky from ``cl``, convolves it with the
    estimator's own beam and pixel window, adds the optional monopole and
    dipole, applies the optional ``sky_filter``, adds noise drawn from
    ``noise``, and measures the bandpowers with ``estimator`` (subtracting the
    model noise spectrum :func:`cmbtools.simulate.noise_spectrum`).  The mean
    over simulations is compared with ``estimator.expected_bandpowers(cl)``.
    Simulation ``i`` draws its sky and then its noise from
    ``simulation_rng(seed, i)``.

    Parameters
    ----------
    estimator : SpectrumEstimator
        The estimator to check (auto-spectra).  Build it with ``nthreads=None``
        so that each worker uses its share of the cores.
    cl : array_like of shape (>= lmax+1,), optional
        Input sky spectrum C_l in K^2 from ell = 0; default: the built-in
        fiducial spectrum :func:`cmbtools.simulate.fiducial_cl`.
    n_sims : int, default=100
        Number of simulations (>= 2).
    seed : int, optional
        Master seed (default: the one recorded in ``run_dir``, else fresh).
    noise : NoiseModel, optional
        Instrument noise added after the beam; its hits map (if any) must be
        positive wherever the mask is.
    monopole : float, default=0
        Constant (K) added to every simulated sky.
    dipole : array_like of shape (3,) or Dipole, optional
        Dipole added to every simulated sky (see :func:`cmbtools.simulate.gaussian_sky`).
    sky_filter : callable, optional
        ``sky_filter(map) -> map`` applied to the sky before noise is added:
        a stand-in for processing the estimator does not know about.  The
        per-bin ``transfer`` of the result then measures its effect, and
        ``record_pseudo_spectra`` lets :func:`transfer_from_pseudo_spectrum`
        measure it per multipole.  Must be picklable for process workers.
    record_pseudo_spectra : bool, default=False
        Also record the pseudo-spectrum of each masked sky before noise (one
        more transform per simulation); the result's ``mean_pseudo_cl``.
    run_dir, executor, workers, threads_per_worker, progress, restart, max_restarts
        As in :func:`run_simulations`.
    force : bool, default=False
        Run even when the memory estimate (one simulated sky, its noise and
        its measurement per worker, times the workers that run at once)
        exceeds what the machine has available: warn instead of raising
        :class:`~cmbtools.exceptions.MemoryLimitError`.

    Returns
    -------
    ValidationResult

    See Also
    --------
    validate_pipeline : builds the estimator from a mask and bins, then calls this.
    run_simulations : the engine, for any per-simulation function.
    """
    from ._skies import NoiseModel, noise_spectrum
    from ._validation import check_cl

    for attr in ("estimate", "expected_bandpowers", "pseudo_spectrum", "mask", "beam", "pixel_window", "nside", "lmax"):
        if not hasattr(estimator, attr):
            raise InvalidInputError(
                f"The 'estimator' parameter must be a cmbtools.spectrum.SpectrumEstimator. Got {type(estimator).__name__} instead."
            )
    lmax, nside = int(estimator.lmax), int(estimator.nside)
    n_sims = check_int(n_sims, "n_sims", minimum=2, maximum=MAX_SIMULATIONS)
    if cl is None:
        from ._fiducial import fiducial_cl

        cl = fiducial_cl(lmax)
        cl_source = "built-in fiducial spectrum"
    else:
        cl_source = "user spectrum"
    cl = check_cl(cl, "cl", lmax=lmax)[: lmax + 1].copy()
    cl.setflags(write=False)
    noise_cl = None
    if noise is not None:
        if not isinstance(noise, NoiseModel):
            raise InvalidInputError(
                f"The 'noise' parameter must be a cmbtools.simulate.NoiseModel or None. Got {type(noise).__name__} instead."
            )
        if noise.hits is not None:
            hits = np.asarray(noise.hits)
            if hits.size != estimator.mask.size:
                noise_map_nside = int(round(math.sqrt(hits.size / 12)))
                from .exceptions import ResolutionMismatchError

                raise ResolutionMismatchError(
                    f"The noise model's hits map has nside {noise_map_nside} but the estimator's mask has nside {nside}.",
                    noise_map_nside, nside,
                )
            uncovered = int(np.count_nonzero((np.asarray(estimator.mask) > 0) & ~(hits > 0)))
            if uncovered:
                raise InvalidInputError(
                    f"The mask is non-zero in {uncovered} pixels that the noise model's hits map does not cover "
                    "(hits <= 0); zero the mask there (e.g. multiply it by hits > 0) and build the estimator again."
                )
        noise_cl = noise_spectrum(noise, lmax, nside)
    if sky_filter is not None and not callable(sky_filter):
        raise InvalidInputError(f"The 'sky_filter' parameter must be a callable or None. Got {sky_filter!r} instead.")
    sky_beam = np.asarray(estimator.beam, dtype=np.float64)[: lmax + 1] * np.asarray(estimator.pixel_window, dtype=np.float64)[: lmax + 1]
    setup = _ValidationSetup(
        estimator=estimator, cl=cl, sky_beam=sky_beam, noise=noise, noise_cl=noise_cl,
        monopole=float(monopole), dipole=None if dipole is None else dipole, sky_filter=sky_filter,
        record_pseudo=bool(record_pseudo_spectra),
    )
    sims = run_simulations(
        _simulate_and_estimate, n_sims, seed=seed, context=setup, run_dir=run_dir, executor=executor,
        workers=workers, threads_per_worker=threads_per_worker, progress=progress, restart=restart,
        max_restarts=max_restarts, description="validation",
        memory_per_simulation=_validation_memory(estimator, noise, dipole is not None, sky_filter is not None),
        force=force,
    )
    binning = estimator.binning
    metadata = {
        "nside": nside,
        "lmax": lmax,
        "n_bins": int(binning.n_bins),
        "f_sky": float(estimator.f_sky) if hasattr(estimator, "f_sky") else "",
        "f_sky_eff": float(estimator.f_sky_eff) if hasattr(estimator, "f_sky_eff") else "",
        "input_spectrum": cl_source,
        "noise": "none" if noise is None else repr(noise),
        "monopole_K": float(monopole),
        "dipole": "none" if dipole is None else repr(dipole),
        "sky_filter": "none" if sky_filter is None else _function_name(sky_filter),
        "estimator_key": getattr(estimator, "cache_key", ""),
        "n_resumed": sims.n_resumed,
        "run_dir": "" if sims.run_dir is None else str(sims.run_dir),
    }
    return ValidationResult.from_samples(
        sims["cl"], sims["cl_err"], estimator.expected_bandpowers(cl),
        ell_min=binning.ell_min, ell_max=binning.ell_max, ell_eff=binning.ell_eff, dl_factor=binning.dl_factor,
        seed=sims.seed, mean_pseudo_cl=sims["pseudo_cl"].mean(axis=0) if record_pseudo_spectra else None,
        metadata=metadata,
    )


def validate_pipeline(mask, binning, cl=None, *, beam=None, noise=None, pixel_window=True, n_sims=100, seed=None,
                      estimator_options=None, force=False, **run_options) -> ValidationResult:
    """Build a spectrum estimator and check it on simulated skies, in one call.

    Equivalent to ``validate_estimator(SpectrumEstimator(mask, binning,
    beam=beam, pixel_window=pixel_window, **estimator_options), cl,
    noise=noise, n_sims=n_sims, seed=seed, **run_options)``.

    Parameters
    ----------
    mask : ndarray of shape (12*nside**2,)
        Weights in [0, 1], RING.
    binning : Binning
        Bins of the bandpowers.
    cl : array_like, optional
        Input sky spectrum (K^2); default: the built-in fiducial spectrum.
    beam : None, float or ndarray, optional
        Beam (Gaussian FWHM in arcmin, or a table B_l) of both the simulated
        skies and the estimator.
    noise : NoiseModel, optional
    pixel_window : bool, default=True
    n_sims : int, default=100
    seed : int, optional
    estimator_options : dict, optional
        More keyword arguments of :class:`~cmbtools.spectrum.SpectrumEstimator`
        (``lmax``, ``coupling``, ``remove_monopole_dipole``, ...).
    force : bool, default=False
        Go ahead even when the memory estimate of the estimator or of the
        simulations exceeds what the machine has available (both steps).
    **run_options
        Keyword arguments of :func:`validate_estimator` (``run_dir``,
        ``executor``, ``workers``, ``progress``, ``monopole``, ...).

    Returns
    -------
    ValidationResult
    """
    from ._estimator import SpectrumEstimator

    options = dict(estimator_options or {})
    options.setdefault("force", force)
    est = SpectrumEstimator(mask, binning, beam=beam, pixel_window=pixel_window, **options)
    return validate_estimator(est, cl, noise=noise, n_sims=n_sims, seed=seed, force=force, **run_options)
