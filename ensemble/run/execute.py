"""The run engine: chunks of members computed by dask workers, saved as they finish.

Each chunk is one task, :func:`compute_chunk`, a pure function of its arguments (the
scenario, the variant's compiled model, the member range, the backend), so a task that
is rerun (its worker died, the run was resumed) gives the same bits.  The driver keeps a
bounded window of tasks in flight.  A worker that sees the work directory (always on the
local cluster; checked by a marker file on others) saves its chunk into the
:class:`~ensemble.run.journal.WorkJournal` itself and hands back only the key, so the
trajectories never cross to the driver; otherwise the driver saves each finished chunk at
once and forgets it.  Memory stays bounded whatever the number of members.
"""

from __future__ import annotations

import concurrent.futures
import copyreg
import gc
import importlib
import sys
import threading
import time
import types
from collections.abc import Callable, Generator, Iterator, Mapping, Sequence
from contextlib import closing, contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from distributed import Client, Future, as_completed

from ensemble.integrate.chunk import integrate_chunk
from ensemble.records import ChunkResult
from ensemble.integrate.kernels.blocks import block_size
from ensemble.errors import RunFailed, StoreWriteError
from ensemble.methods import METHODS
from ensemble.model.lower import LoweredModel
from ensemble.records import ChunkKey
from ensemble.run.clusters import ClusterProfile, jobqueue_cluster
from ensemble.run.journal import Checkpoints, WorkJournal
from ensemble.run.layout import lowered_models, result_layout
from ensemble.run.local import LocalStart, available_cores
from ensemble.run.plan import default_chunk, fingerprint, plan_chunks
from ensemble.sampling import make_design
from ensemble.scenario.schema import Scenario

DEFAULT_BACKEND = "compiled"
"""Integration backend used when none is asked for: the generated numba kernels, which
run 5 to 13 times faster than the numpy reference and are cached on disk after their
first compilation (``scripts/benchmark.py``).  ``--backend numpy`` selects the readable
reference; the two agree to 1e-12 relative (``tests/test_compiled_backend.py``)."""

IN_FLIGHT_PER_THREAD = 3
"""Tasks queued or running per worker thread: enough to keep every worker busy while the
driver saves a finished chunk, few enough that unsaved results stay bounded."""

def read_only(items: dict) -> types.MappingProxyType:
    """A read-only view of ``items`` (what a pickled read-only mapping becomes again)."""
    return types.MappingProxyType(items)


def _reduce_mappingproxy(proxy: types.MappingProxyType) -> tuple:
    return read_only, (dict(proxy),)


# The validated scenario keeps its tables in read-only mappings; let tasks carry it.
copyreg.pickle(types.MappingProxyType, _reduce_mappingproxy)


@dataclass(frozen=True)
class ChunkOutput:
    """What one task hands back to the driver."""

    key: ChunkKey
    result: ChunkResult
    reported: Mapping[str, np.ndarray]


def compute_chunk(scenario: Scenario, model: LoweredModel, key: ChunkKey,
                  backend: str = DEFAULT_BACKEND,
                  kernel_threads: int | None = None, buffers=None) -> ChunkOutput:
    """Draw and integrate members ``key[1] .. key[2] - 1`` of variant ``key[0]``.

    A pure function of its arguments: the same key gives the same bits in any process
    (:func:`~ensemble.sampling.make_design` depends on the member index alone, and
    :func:`~ensemble.integrate.chunk.integrate_chunk` treats members independently).
    ``kernel_threads`` sets the threads of the compiled backend's kernels in the calling
    thread (1 in a dask worker, whose siblings already use the other cores); None leaves
    numba's default.  With ``buffers`` (see
    :func:`~ensemble.integrate.chunk.integrate_chunk`) the trajectories are views of
    them, to be used before the next chunk.
    """
    if kernel_threads is not None and backend == "compiled":
        from ensemble.integrate.kernels.launch import set_kernel_threads

        set_kernel_threads(kernel_threads)
    variant, start, end = key
    members = np.arange(start, end, dtype=np.int64)
    design = make_design(scenario, scenario.variants[variant], model, members)
    result = integrate_chunk(model, design, scenario.solver, scenario.n_reports, backend,
                             buffers)
    return ChunkOutput(key, result, dict(design.reported))


@dataclass(frozen=True)
class ChunkSaved:
    """What a task that saved its own chunk hands back."""

    key: ChunkKey


def compute_and_save_chunk(scenario: Scenario, model: LoweredModel, key: ChunkKey,
                           store: WorkJournal, token: str, backend: str = DEFAULT_BACKEND,
                           kernel_threads: int | None = None, candidates: bool = False
                           ) -> ChunkOutput | ChunkSaved:
    """:func:`compute_chunk`, then save the chunk into ``store`` here (as candidates for
    the quantiles when ``candidates`` and its pilot is in, :meth:`WorkJournal.save`) when
    this process sees the store's directory (it reads back ``token``, from
    :meth:`WorkJournal.mark`), else hand the whole chunk back for the driver to save."""
    if not store.shares_directory(token):
        return compute_chunk(scenario, model, key, backend, kernel_threads)
    output = compute_chunk(scenario, model, key, backend, kernel_threads,
                           _thread_buffers(backend))
    store.save(output.key, output.result, output.reported, candidates)
    return ChunkSaved(key)


_workspace = threading.local()


def _thread_buffers(backend: str):
    """This thread's :class:`~ensemble.integrate.kernels.launch.ReportBuffers` (None for the
    numpy backend): a worker's chunks are saved one after another, each before the next
    is computed, so they can all be written into the same arrays."""
    if backend != "compiled":
        return None
    if not hasattr(_workspace, "buffers"):
        from ensemble.integrate.kernels.launch import ReportBuffers

        _workspace.buffers = ReportBuffers()
    return _workspace.buffers


def kernel_block(model: LoweredModel, scenario: Scenario, backend: str) -> int:
    """Members per block of ``backend``'s kernels for this model and method (1 for the
    numpy backend, which works on any number of members alike)."""
    if backend != "compiled":
        return 1
    return block_size(model, METHODS[scenario.solver.method])


# --------------------------------------------------------------------------- executors


@contextmanager
def open_client(workers: int | None = None, address: str | None = None,
                cluster: ClusterProfile | None = None, started: LocalStart | None = None,
                processes: bool = False) -> Iterator[Client]:
    """A dask.distributed client for the run, closed (with its cluster) on leaving.

    Parameters
    ----------
    workers : workers of a local cluster (default: one per core): threads of this process,
        or with ``processes`` worker processes (:class:`ensemble.run.local.LocalStart`).
    address : a running scheduler to connect to instead (``tcp://host:8786``); its
        workers are used as they are.
    cluster : a batch-system profile: worker jobs started by dask-jobqueue, kept at the
        profile's size and cancelled on leaving (:mod:`ensemble.run.clusters`).
    started : a local cluster already being started (:class:`LocalStart`), used
        instead of starting one (``workers`` is then ignored); on leaving, its closing
        only begins (:meth:`LocalStart.release`): its owner closes it.
    processes : local workers in processes of their own instead of threads.
    """
    if cluster is not None:
        with jobqueue_cluster(cluster) as batch, Client(batch) as client:
            yield client
        return
    if address is not None:
        client = Client(address)
        try:
            yield client
        finally:
            client.close()
        return
    if started is not None:
        try:
            yield started.client()
        finally:
            started.release()   # its owner waits for the close
        return
    local = LocalStart(workers, processes)
    try:
        yield local.client()
    finally:
        local.close()


def _dashboard_link(client: Client) -> str | None:
    """The scheduler's dashboard address, or None when it serves none (bokeh missing)."""
    try:
        return client.dashboard_link or None
    except KeyError:  # a remote scheduler without the dashboard service
        return None


def _chunk_failed(scenario: Scenario, key: ChunkKey, error: BaseException) -> RunFailed:
    """The one-line account of a chunk that could not be computed."""
    variant, start, end = key
    return RunFailed(f"members {start}..{end - 1} of variant "
                     f"{scenario.variants[variant].name!r} failed: "
                     f"{type(error).__name__}: {error}")


Finished = ChunkOutput | ChunkSaved
"""A finished chunk: saved already, or still to be saved by the driver."""


def _in_process(scenario: Scenario, models: Sequence[LoweredModel],
                keys: Sequence[ChunkKey], backend: str) -> Generator[ChunkOutput, None, None]:
    """Compute the chunks one after another in this process, without dask.distributed;
    each output is valid until the next is asked for (they share buffers)."""
    buffers = _thread_buffers(backend)
    for key in keys:
        try:
            output = compute_chunk(scenario, models[key[0]], key, backend, None, buffers)
        except Exception as error:
            raise _chunk_failed(scenario, key, error) from error
        yield output


def _on_cluster(client: Client, scenario: Scenario, models: Sequence[LoweredModel],
                keys: Sequence[ChunkKey], backend: str, store: WorkJournal | None = None,
                candidates: bool = False) -> Generator[Finished, None, None]:
    """Compute the chunks on ``client``'s workers and yield them as they finish.

    With ``store``, a worker that sees its directory (:meth:`WorkJournal.mark`, checked by
    every task) saves its chunk there itself and yields only the key.  At most
    :data:`IN_FLIGHT_PER_THREAD` tasks per worker thread are submitted at a time
    (re-counted as workers come and go).  A task whose worker dies is rerun elsewhere by
    the scheduler; a task that raises, or that keeps killing its workers, stops the run
    with :class:`RunFailed`.
    """
    token = store.mark() if store is not None else None
    queue = iter(keys)
    running = as_completed()
    submitted: dict[Future, ChunkKey] = {}

    def top_up() -> None:
        threads = sum(client.nthreads().values())
        window = max(2, IN_FLIGHT_PER_THREAD * threads)
        while running.count() < window:
            key = next(queue, None)
            if key is None:
                return
            task_key = f"chunk-{key[0]}-{key[1]}-{key[2]}"
            if store is None:
                future = client.submit(compute_chunk, scenario, models[key[0]], key,
                                       backend, 1, key=task_key, pure=False)
            else:
                future = client.submit(compute_and_save_chunk, scenario, models[key[0]],
                                       key, store, token, backend, 1, candidates,
                                       key=task_key,
                                       pure=False)
            submitted[future] = key
            running.add(future)

    top_up()
    try:
        for future in running:
            try:
                output = future.result()
            except StoreWriteError:     # a worker could not save its chunk: as the driver
                raise
            except Exception as error:  # the task's own error, or KilledWorker
                raise _chunk_failed(scenario, submitted[future], error) from error
            del submitted[future]
            future.release()
            top_up()
            yield output
    finally:
        client.cancel(list(submitted))


# ---------------------------------------------------------------------------- progress


class Progress:
    """Reports a run's progress: a bar on a terminal, a few plain lines otherwise.

    Parameters
    ----------
    bar : draw a progress bar (rich) on standard error; None decides by whether standard
        error is a terminal.
    stream : where plain lines go (default standard error).
    """

    def __init__(self, bar: bool | None = None, stream=None):
        self.stream = stream if stream is not None else sys.stderr
        self.bar = self.stream.isatty() if bar is None else bar
        self._rich = None
        self._task = None

    def note(self, text: str) -> None:
        """One plain line of information."""
        print(f"ensemble: {text}", file=self.stream, flush=True)

    def start(self, to_compute: int, already_done: int, members: int) -> None:
        """The run is about to compute ``to_compute`` chunks (``members`` members in all);
        ``already_done`` were found finished in the work in progress."""
        if already_done:
            self.note(f"resuming: {already_done} chunks already done, "
                      f"{to_compute} to compute")
        else:
            self.note(f"{to_compute} chunks to compute")
        if self.bar and to_compute:
            from rich.console import Console
            from rich.progress import (BarColumn, MofNCompleteColumn, Progress as Bar,
                                       TextColumn, TimeElapsedColumn, TimeRemainingColumn)

            self._rich = Bar(TextColumn("members"), BarColumn(), MofNCompleteColumn(),
                             TimeElapsedColumn(), TimeRemainingColumn(),
                             console=Console(file=self.stream), transient=True)
            self._rich.start()
            self._task = self._rich.add_task("run", total=members)

    def advance(self, members: int) -> None:
        """A chunk of ``members`` members is saved."""
        if self._rich is not None:
            self._rich.advance(self._task, members)

    def close(self) -> None:
        """Remove the bar."""
        if self._rich is not None:
            self._rich.stop()
            self._rich = None


# ------------------------------------------------------------------------------ engine


COLLECTION_THRESHOLD = 50_000
"""Allocations between two collections of the youngest objects during a run (Python's
default is 700)."""


@contextmanager
def fewer_collections() -> Iterator[None]:
    """Run the body with the cyclic garbage collector mostly out of the way.

    The objects alive on entry (the imported modules of numba, scipy and dask, over a
    million) are moved out of the collector's reach (``gc.freeze``) and the youngest
    generation is collected every :data:`COLLECTION_THRESHOLD` allocations: a run's tasks
    allocate many short-lived objects, and each collection holds the interpreter lock
    that the threads saving chunks need (measured: 0.5 s of collections in a
    200,000-member run, 0.15 s this way).  Both settings are restored on exit.
    """
    thresholds = gc.get_threshold()
    gc.freeze()
    gc.set_threshold(COLLECTION_THRESHOLD, *thresholds[1:])
    try:
        yield
    finally:
        gc.set_threshold(*thresholds)
        gc.unfreeze()


def run_scenario(scenario: Scenario, *, history: str, backend: str = DEFAULT_BACKEND,
                 chunk: int | None = None, workers: int | None = None,
                 address: str | None = None, cluster: ClusterProfile | None = None,
                 resume: bool = False, force: bool = False,
                 progress: Progress | None = None, members: tuple[int, int] | None = None,
                 finish: Callable[[WorkJournal], Path] | None = None,
                 started: LocalStart | None = None, processes: bool = False) -> Path:
    """Run every variant of ``scenario`` and write the result file.

    Work in progress lives in ``<path>.partial`` (see
    :class:`~ensemble.run.journal.WorkJournal`); each finished chunk is saved there as
    it arrives, and the result appears under ``scenario.output.path`` by an atomic rename
    when every chunk is in.

    Parameters
    ----------
    scenario : the validated scenario, command-line overrides applied.
    history : the result's ``history`` attribute (command and time).
    backend : integration backend, ``"numpy"`` or ``"compiled"``.
    chunk : members per task; default from the file's ``[compute] chunk``, else
        :func:`~ensemble.run.plan.default_chunk`.
    workers : workers of the local cluster (default one per core); ``0`` runs
        every chunk in this process, without dask.distributed.
    address : a running dask scheduler to use instead of a local cluster.
    cluster : a batch-system profile whose worker jobs do the work instead of a local
        cluster (:mod:`ensemble.run.clusters`).
    resume : continue from ``<path>.partial`` (afresh if there is none; nothing to do if
        the result is already complete with the same fingerprint).
    force : replace an existing result.
    progress : where progress goes (default: :class:`Progress` deciding by terminal).
    members : ``(start, end)``: compute only those members of every variant (a shard,
        :mod:`ensemble.run.shards`); default all.
    finish : what to make of the store once every planned chunk is saved (default
        :meth:`WorkJournal.finish`, the result file; a shard writes its part file).
    started : the local cluster, already being started by the caller, to use when the
        run goes to a local cluster (the caller closes it).
    processes : local workers in processes of their own instead of threads of this one
        (:mod:`ensemble.run.local`).

    Returns
    -------
    The result's path.

    Raises
    ------
    ensemble.errors.ResultExists : the result exists and neither ``force`` nor a
        matching ``resume`` was given (nothing is computed).
    ensemble.errors.FingerprintMismatch : ``resume`` of work from a different
        scenario, member count, seed, version or backend.
    RunFailed : a chunk failed; finished chunks are kept.
    OSError : the work in progress or the result could not be written; finished chunks
        are kept.
    """
    progress = progress if progress is not None else Progress()
    path = Path(scenario.output.path)
    models = lowered_models(scenario)
    run_fingerprint = fingerprint(scenario, backend)
    if resume and not force and WorkJournal.is_complete(path, run_fingerprint):
        progress.note(f"{path} is already complete; nothing to do")
        return path
    layout = result_layout(scenario, models, run_fingerprint, history)
    store = WorkJournal.open(path, layout, resume=resume, force=force)

    workers = workers if workers is not None else scenario.compute.workers
    address = address if address is not None else scenario.compute.address
    if chunk is None:
        chunk = scenario.compute.chunk or default_chunk(
            scenario, models[0].n_states, models[0].n_flow_elements,
            cluster.max_workers if cluster else workers or available_cores(), backend,
            kernel_block(models[0], scenario, backend))
    keys = store.pending(plan_chunks(scenario, chunk, members=members))
    candidates = finish is None     # a shard's part file needs every value
    # the result writer (xarray) is imported while the chunks compute, not after
    threading.Thread(target=importlib.import_module, args=("ensemble.output.dataset",),
                     name="ensemble-import-writer", daemon=True).start()
    progress.start(len(keys), len(store.saved()), sum(end - start for _, start, end in keys))
    try:
        if keys:
            if workers == 0 and address is None and cluster is None:
                _save_all(store, _in_process(scenario, models, keys, backend), progress,
                          candidates)
            else:
                with open_client(workers, address, cluster, started, processes) as client:
                    local = address is None and cluster is None
                    dashboard = (_dashboard_link(client) if not local or started is not None
                                 and started.dashboard else None)
                    if dashboard:
                        progress.note(f"dask dashboard at {dashboard}")
                    _save_all(store, _on_cluster(client, scenario, models, keys, backend,
                                                 store, candidates), progress, candidates)
    except RunFailed as failure:
        raise RunFailed(f"{failure} (finished chunks are kept in {store.work}; continue "
                        "with --resume)") from failure.__cause__
    finally:
        progress.close()
    progress.note(f"every chunk saved; writing {path}")
    if finish is not None:
        return finish(store)
    return store.finish(lambda key: compute_chunk(scenario, models[key[0]], key,
                                                  backend).result)


def _save_all(store: WorkJournal, outputs: Generator[Finished, None, None],
              progress: Progress, candidates: bool = False) -> None:
    """Save each finished chunk as it arrives (unless its worker saved it; as candidates
    for the quantiles with ``candidates``, :meth:`WorkJournal.save`), making the saved
    chunks durable every :data:`CHECKPOINT_SECONDS` in a background thread; on any
    exit (an interrupt, a failed save) close ``outputs`` at once, so that tasks still
    queued are cancelled while the client is open."""
    with closing(outputs), Checkpoints(store) as checkpoints:
        for output in outputs:
            if isinstance(output, ChunkOutput):
                store.save(output.key, output.result, output.reported, candidates)
            checkpoints.add(output.key)
            progress.advance(output.key[2] - output.key[1])
