"""Where a run's chunks are computed: in this process, on a local dask cluster (threads or
processes), on a running scheduler, or on batch-system worker jobs; and the stream of
finished chunks each gives back.

The driver keeps a bounded window of tasks in flight.  A worker that sees the work
directory (always on the local cluster; checked by a marker file on others) saves its
chunk into the :class:`~ensemble.run.journal.WorkJournal` itself and hands back only the
key, so the trajectories never cross to the driver; otherwise the driver saves each
finished chunk at once and forgets it.  Memory stays bounded whatever the number of
members.
"""

from __future__ import annotations

from collections.abc import Generator, Iterator, Sequence
from contextlib import AbstractContextManager, contextmanager
from dataclasses import dataclass

import dask
from distributed import Client, Future, as_completed

from ensemble.errors import RunFailed, StoreWriteError
from ensemble.model.lower import LoweredModel
from ensemble.records import ChunkKey
from ensemble.run.clusters import ClusterProfile
from ensemble.run.journal import WorkJournal
from ensemble.run.listening import served_dashboard
from ensemble.run.local import SHORT_LOGS, LocalStart, available_cores
from ensemble.run.tasks import (ChunkOutput, ChunkSaved, Uniforms, chunk_uniforms,
                                compute_and_save_chunk, compute_chunk, thread_buffers)
from ensemble.run.worker_jobs import jobqueue_cluster
from ensemble.scenario.schema import Scenario

IN_FLIGHT_PER_THREAD = 3
"""Tasks queued or running per worker thread: enough to keep every worker busy while the
driver saves a finished chunk, few enough that unsaved results stay bounded."""


def in_flight_window(threads: int, capacity: int = 0) -> int:
    """Tasks the driver keeps submitted: :data:`IN_FLIGHT_PER_THREAD` per worker thread,
    counting the threads the cluster may still grow to (``capacity``, an adaptive batch
    profile's largest), so that the scheduler sees the backlog that makes its adaptive
    loop ask for more worker jobs; at least 2."""
    return max(2, IN_FLIGHT_PER_THREAD * max(threads, capacity))


Finished = ChunkOutput | ChunkSaved
"""A finished chunk: saved already, or still to be saved by the driver."""


@dataclass(frozen=True)
class Workers:
    """Where a run's chunks are computed.

    Attributes
    ----------
    local_count : workers of a local cluster (None: one per core); 0 computes every chunk
        in this process, without dask.distributed.
    address : a running dask scheduler to use instead of a local cluster.
    cluster : a batch-system profile whose worker jobs do the work
        (:mod:`ensemble.run.clusters`).
    started : the local cluster, already being started by the caller (who closes it).
    processes : local workers in processes of their own instead of threads.
    dashboard : where the dashboard of a scheduler the run starts listens (``HOST:PORT``,
        :mod:`ensemble.run.listening`), or None for no dashboard.
    """

    local_count: int | None = None
    address: str | None = None
    cluster: ClusterProfile | None = None
    started: LocalStart | None = None
    processes: bool = False
    dashboard: str | None = None

    @property
    def in_this_process(self) -> bool:
        """Every chunk computed here, one after another."""
        return self.local_count == 0 and self.on_this_machine

    @property
    def on_this_machine(self) -> bool:
        """No scheduler address and no batch system: a local cluster (or none)."""
        return self.address is None and self.cluster is None

    def count(self) -> int:
        """Workers the run may use at once (the profile's largest number on a batch
        system)."""
        if self.cluster is not None:
            return self.cluster.max_workers
        return self.local_count or available_cores()

    def announces_dashboard(self) -> bool:
        """Whether the run prints the address of dask's dashboard: always for a remote
        scheduler, for a scheduler the run starts only when asked for."""
        return self.address is not None or self.dashboard is not None or (
            self.started is not None and self.started.dashboard is not None)

    def capacity(self) -> int:
        """Worker threads a batch profile may grow to (0 elsewhere: the threads are
        those already connected)."""
        return self.cluster.max_threads if self.cluster is not None else 0

    def client(self) -> AbstractContextManager[Client]:
        """:func:`open_client` for these workers."""
        return open_client(self.local_count, self.address, self.cluster, self.started,
                           self.processes, self.dashboard)


@contextmanager
def open_client(workers: int | None = None, address: str | None = None,
                cluster: ClusterProfile | None = None, started: LocalStart | None = None,
                processes: bool = False, dashboard: str | None = None) -> Iterator[Client]:
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
    dashboard : where the dashboard of the scheduler started here listens, or None for
        none (:mod:`ensemble.run.listening`).
    """
    if cluster is not None:     # workers join the scheduler here while the run goes on
        with dask.config.set(SHORT_LOGS), jobqueue_cluster(cluster, dashboard) as batch, \
                Client(batch) as client:
            yield client
        return
    if address is not None:
        with dask.config.set(SHORT_LOGS):
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
    local = LocalStart(workers, processes, dashboard)
    try:
        yield local.client()
    finally:
        local.close()


def dashboard_link(client: Client) -> str | None:
    """The scheduler's dashboard address, or None when it serves none (bokeh missing)."""
    served = served_dashboard(getattr(client.cluster, "scheduler", None))
    if served is not None:      # a scheduler of this process: where it is bound
        return served
    try:
        return client.dashboard_link or None
    except KeyError:  # a remote scheduler without the dashboard service
        return None


def chunk_failed(scenario: Scenario, key: ChunkKey, error: BaseException) -> RunFailed:
    """The one-line account of a chunk that could not be computed."""
    variant, start, end = key
    return RunFailed(f"members {start}..{end - 1} of variant "
                     f"{scenario.variants[variant].name!r} failed: "
                     f"{type(error).__name__}: {error}")


def in_process(scenario: Scenario, models: Sequence[LoweredModel],
               keys: Sequence[ChunkKey], backend: str, uniforms: Uniforms | None = None
               ) -> Generator[ChunkOutput, None, None]:
    """Compute the chunks one after another in this process, without dask.distributed
    (with ``uniforms``, every member's draws given, :func:`compute_chunk`); each output
    is valid until the next is asked for (they share buffers)."""
    buffers = thread_buffers(backend)
    for key in keys:
        try:
            output = compute_chunk(scenario, models[key[0]], key, backend, None, buffers,
                                   chunk_uniforms(uniforms, key))
        except Exception as error:
            raise chunk_failed(scenario, key, error) from error
        yield output


def on_cluster(client: Client, scenario: Scenario, models: Sequence[LoweredModel],
               keys: Sequence[ChunkKey], backend: str, journal: WorkJournal | None = None,
               candidates: bool = False, capacity: int = 0,
               uniforms: Uniforms | None = None) -> Generator[Finished, None, None]:
    """Compute the chunks on ``client``'s workers and yield them as they finish.

    With ``journal``, a worker that sees its directory (:meth:`WorkJournal.mark`, checked
    by every task) saves its chunk there itself (as candidates for the quantiles with
    ``candidates``) and yields only the key.  At most :func:`in_flight_window` tasks are
    submitted at a time (re-counted as workers come and go; ``capacity`` is the worker
    threads the cluster may grow to).  A task whose worker dies is rerun elsewhere by the
    scheduler; a task that raises, or that keeps killing its workers, stops the run with
    :class:`RunFailed`.  With ``uniforms`` every member's draws are given
    (:func:`compute_chunk`), and each task carries its chunk's.
    """
    token = journal.mark() if journal is not None else None
    queue = iter(keys)
    running = as_completed()
    submitted: dict[Future, ChunkKey] = {}

    def submit(key: ChunkKey) -> Future:
        options = {"key": f"chunk-{key[0]}-{key[1]}-{key[2]}", "pure": False}
        drawn = chunk_uniforms(uniforms, key)
        if journal is None:
            return client.submit(compute_chunk, scenario, models[key[0]], key, backend, 1,
                                 uniforms=drawn, **options)
        return client.submit(compute_and_save_chunk, scenario, models[key[0]], key,
                             journal, token, backend, 1, candidates, drawn, **options)

    def top_up() -> None:
        window = in_flight_window(sum(client.nthreads().values()), capacity)
        while running.count() < window:
            key = next(queue, None)
            if key is None:
                return
            future = submit(key)
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
                raise chunk_failed(scenario, submitted[future], error) from error
            del submitted[future]
            future.release()
            top_up()
            yield output
    finally:
        client.cancel(list(submitted))
