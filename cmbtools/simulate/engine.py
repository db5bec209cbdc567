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
:func:`cmbtools._core.checks.resolve_nthreads` reads, so nothing oversubscribes.
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
through :func:`cmbtools._core.files.atomic_output`, with ``allow_pickle=False`` data,
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
import os
import pickle
import types
import uuid
import warnings
from pathlib import Path

import numpy as np

from cmbtools._core.checks import check_int, resolve_nthreads
from cmbtools.exceptions import CmbtoolsWarning, InvalidInputError, WorkerLostError
from cmbtools.simulate.run_directory import (
    _clean_result,
    _function_name,
    _inputs_hash,
    _prepare_run_dir,
    _read_record,
    _Store,
)

__all__ = [
    "SimulationSet",
    "run_simulations",
]

_THREADS_ENV = "CMBTOOLS_NUM_THREADS"


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



def _execute(job, index, seed) -> dict:
    from cmbtools.simulate.random_streams import simulation_rng

    return _clean_result(job.function(index, simulation_rng(seed, index), job.context), index)


_WORKER_JOB = None


def _init_pool_worker(job_bytes, nthreads, parent_pid):
    """ProcessPoolExecutor initializer: thread budget and the job, once per worker process.

    A worker leaves Ctrl-C to its parent (the terminal sends SIGINT to the whole
    process group; the parent stops the run and reports it in one line) and
    exits when its parent dies (see :func:`cmbtools.simulate.worker_processes.exit_with_parent`).
    """
    global _WORKER_JOB
    from cmbtools.simulate.worker_processes import exit_with_parent, ignore_interrupts

    ignore_interrupts()
    exit_with_parent(parent_pid)
    os.environ[_THREADS_ENV] = str(int(nthreads))
    _WORKER_JOB = pickle.loads(job_bytes)


def _pool_task(index, seed):
    return _execute(_WORKER_JOB, index, seed)


from cmbtools._core.checks import MAX_SIMULATIONS  # noqa: E402  (the one bound, shared with the command line)

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
    from cmbtools.simulate.worker_processes import dead_workers, main_module_needed, spawn_context

    needs_main = main_module_needed(job_bytes)
    ctx = spawn_context(import_main=needs_main)
    pending = sorted(pending)
    restarts = 0
    while pending:
        pool = cf.ProcessPoolExecutor(
            max_workers=max(1, min(workers, len(pending))),
            mp_context=ctx,
            initializer=_init_pool_worker,
            initargs=(job_bytes, threads_per_worker, os.getpid()),
        )
        broken = None
        n_before = len(store.done)
        try:
            futures = {pool.submit(_pool_task, i, seed): i for i in pending}
            waiting = set(futures)
            while waiting:
                # poll: a worker that dies while it starts can leave the pool waiting forever
                done, waiting = cf.wait(waiting, timeout=0.5, return_when=cf.FIRST_COMPLETED)
                for fut in done:
                    try:
                        result = fut.result()
                    except cf.process.BrokenProcessPool as exc:
                        broken = exc
                        continue
                    store(futures[fut], result)
                if broken is None and waiting:
                    dead = dead_workers(pool)
                    if dead:
                        broken = cf.process.BrokenProcessPool(dead)
                if broken is not None:
                    break
            if broken is not None and needs_main and len(store.done) == n_before:
                raise InvalidInputError(
                    "The worker processes died while starting. They import the script that called "
                    "run_simulations (its per-simulation function is defined there), so a script must call "
                    "it under 'if __name__ == \"__main__\":', or pass "
                    "executor=concurrent.futures.ThreadPoolExecutor()."
                )
        except BaseException:  # Ctrl-C, an error: the workers' current simulations are not waited for
            _shutdown_pool(pool, True)
            raise
        _shutdown_pool(pool, broken is not None)
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


def _shutdown_pool(pool, broken):
    """Stop a local pool; a broken one (or an interrupted run) does not wait for its workers."""
    processes = list((getattr(pool, "_processes", None) or {}).values())
    interrupted = broken
    try:
        pool.shutdown(wait=not interrupted, cancel_futures=True)
    except KeyboardInterrupt:  # a second Ctrl-C while waiting: stop at once
        interrupted = True
    if interrupted:
        for proc in processes:
            with contextlib.suppress(Exception):
                proc.kill()
        for proc in processes:
            with contextlib.suppress(Exception):
                proc.join(5)


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


def _run_memory(context, per_simulation, n_sims, executor, client, workers):
    """``(bytes, what)`` the workers of a run need together (None on dask), for the check before any starts.

    Local pool: every worker process holds the pickled job and its unpickled
    copy (twice the context) plus one simulation; the parent holds one more
    pickle.  Other executors: as many simulations at once as the executor has
    workers (threads share the context).  dask workers run on their own hosts
    under dask's own memory limits and are not checked.
    """
    from cmbtools._core.memory import format_bytes

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
    return need, f"Running {n_sims} simulations on {where} (about {format_bytes(need / n)} each)"


# --------------------------------------------------------------------------- public: generic runs


@dataclasses.dataclass(frozen=True, eq=False)
class SimulationSet:
    """The stacked results of :func:`run_simulations`.

    Parameters
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
        (:func:`cmbtools._core.memory.check_memory`); without it only the
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
    need = _run_memory(context, memory_per_simulation, n_sims, executor, client, workers)
    if need is not None:
        from cmbtools._core.memory import check_memory

        check_memory(*need, force=force)

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


