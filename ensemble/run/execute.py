"""The run engine: every chunk of a scenario computed where the run's workers are
(:mod:`.executors`), saved into the work journal as it finishes (:mod:`.journal`), then
the result file written from the saved chunks.

Each chunk is one task (:mod:`.tasks`), a pure function of its key, so the result does
not depend on the chunk size, the workers, or a resume.
"""

from __future__ import annotations

import gc
import importlib
import threading
from collections.abc import Callable, Generator, Iterator, Sequence
from contextlib import closing, contextmanager
from pathlib import Path

from ensemble.errors import StoreWriteError
from ensemble.integrate.interrupts import clear_stop_request, request_stop
from ensemble.model.lower import LoweredModel
from ensemble.records import ChunkKey
from ensemble.run.clusters import ClusterProfile
from ensemble.run.executors import Finished, Workers, dashboard_link, in_process, on_cluster
from ensemble.run.journal import Checkpoints, WorkJournal
from ensemble.run.layout import lowered_models, result_layout
from ensemble.run.local import LocalStart
from ensemble.run.plan import default_chunk, fingerprint, plan_chunks
from ensemble.run.progress import Progress
from ensemble.run.tasks import DEFAULT_BACKEND, ChunkOutput, compute_chunk, kernel_block
from ensemble.scenario.schema import Scenario

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
                 progress: Progress | None = None,
                 member_range: tuple[int, int] | None = None,
                 finish: Callable[[WorkJournal], Path] | None = None,
                 started: LocalStart | None = None, processes: bool = False,
                 dashboard: str | None = None) -> Path:
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
        the result is already complete with the same fingerprint); saved chunks that
        fail their checksums are computed again, and the run says so.
    force : replace an existing result, and discard the saved chunks of a
        ``<path>.partial`` when not resuming.
    progress : where progress goes (default: :class:`Progress` deciding by terminal).
    member_range : ``(start, end)``: compute only those members of every variant (a
        shard, :mod:`ensemble.run.shards`); default all.
    finish : what to make of the journal once every planned chunk is saved (default
        :meth:`WorkJournal.finish`, the result file; a shard writes its part file).
    started : the local cluster, already being started by the caller, to use when the
        run goes to a local cluster (the caller closes it).
    processes : local workers in processes of their own instead of threads of this one
        (:mod:`ensemble.run.local`).
    dashboard : where the dashboard of a scheduler the run starts listens (``HOST:PORT``),
        or None for none (:mod:`ensemble.run.listening`).

    Returns
    -------
    The result's path.

    Raises
    ------
    ensemble.errors.ResultExists : the result exists and neither ``force`` nor a
        matching ``resume`` was given (nothing is computed).
    ensemble.errors.FingerprintMismatch : ``resume`` of work from a different
        scenario, member count, seed, version or backend.
    ensemble.errors.WorkInProgress : ``<path>.partial`` holds saved chunks and neither
        ``resume`` nor ``force`` was given, or it was not made by this program.
    ensemble.errors.WorkLocked : another run is working on the same ``<path>.partial``.
    ensemble.errors.RunFailed : a chunk failed; finished chunks are kept.
    ensemble.errors.StoreWriteError : the work in progress or the result could not be
        written; finished chunks are kept.
    """
    progress = progress if progress is not None else Progress()
    path = Path(scenario.output.path)
    run_fingerprint = fingerprint(scenario, backend)
    if resume and not force and WorkJournal.is_complete(path, run_fingerprint):
        progress.note(f"{path} is already complete; nothing to do")
        return path
    models = lowered_models(scenario)
    journal = WorkJournal.open(path, result_layout(scenario, models, run_fingerprint,
                                                   history), resume=resume, force=force)
    try:
        where = Workers(workers if workers is not None else scenario.compute.workers,
                        address if address is not None else scenario.compute.address,
                        cluster, started, processes, dashboard)
        if chunk is None:
            chunk = scenario.compute.chunk or default_chunk(
                scenario, models[0].n_states, models[0].n_flow_elements, where.count(),
                backend, kernel_block(models[0], scenario, backend))
        planned = plan_chunks(scenario, chunk, member_range=member_range)
        _import_writer_meanwhile()
        for _ in range(2):
            _compute_pending(journal, scenario, models, planned, backend, where, progress,
                             candidates=finish is None)   # a part file needs every value
            if not journal.drop_damaged():  # every chunk checked before finishing
                break
        else:
            raise StoreWriteError(f"chunks saved in {journal.work} were damaged again after "
                                  "being computed again; check the disk")
    except BaseException:
        journal.close()
        raise
    progress.note(f"every chunk saved; writing {path}")
    if finish is not None:
        return finish(journal)
    return journal.finish(lambda key: compute_chunk(scenario, models[key[0]], key,
                                                    backend).result)


def _compute_pending(journal: WorkJournal, scenario: Scenario,
                     models: Sequence[LoweredModel], planned: Sequence[ChunkKey],
                     backend: str, where: Workers, progress: Progress,
                     candidates: bool) -> None:
    """Compute and save the chunks of ``planned`` that ``journal`` lacks, after printing
    what the journal has to say (damaged chunks it removed, a lock it took over)."""
    for note in journal.notes:
        progress.note(note)
    journal.notes.clear()
    keys = journal.pending(planned)
    progress.start(len(keys), len(journal.saved()), sum(end - start for _, start, end in keys))
    clear_stop_request()
    try:
        if keys:
            _compute_and_save(journal, scenario, models, keys, backend, where, progress,
                              candidates)
    except KeyboardInterrupt:
        request_stop()      # this process's worker threads end their chunks too
        raise
    finally:
        progress.close()


def _import_writer_meanwhile() -> None:
    """Import the result writer (xarray) in a background thread while the chunks
    compute, rather than after."""
    threading.Thread(target=importlib.import_module, args=("ensemble.output.writer",),
                     name="ensemble-import-writer", daemon=True).start()


def _compute_and_save(journal: WorkJournal, scenario: Scenario,
                      models: Sequence[LoweredModel], keys: Sequence[ChunkKey],
                      backend: str, where: Workers, progress: Progress,
                      candidates: bool) -> None:
    """Compute chunks ``keys`` where the workers are and save each into ``journal`` (as
    candidates for the quantiles past the pilot with ``candidates``)."""
    if where.in_this_process:
        save_all(journal, in_process(scenario, models, keys, backend), progress, candidates)
        return
    with where.client() as client:
        dashboard = dashboard_link(client) if where.announces_dashboard() else None
        if dashboard:
            progress.note(f"dask dashboard at {dashboard}")
        save_all(journal, on_cluster(client, scenario, models, keys, backend, journal,
                                     candidates, where.capacity()), progress, candidates)


def save_all(journal: WorkJournal, outputs: Generator[Finished, None, None],
             progress: Progress, candidates: bool = False) -> None:
    """Save each finished chunk as it arrives (unless its worker saved it; as candidates
    for the quantiles with ``candidates``, :meth:`WorkJournal.save`), making the saved
    chunks durable every :data:`~ensemble.run.journal.CHECKPOINT_SECONDS` in a
    background thread; on any exit (an interrupt, a failed save) close ``outputs`` at
    once, so that tasks still queued are cancelled while the client is open."""
    with closing(outputs), Checkpoints(journal) as checkpoints:
        for output in outputs:
            if isinstance(output, ChunkOutput):
                journal.save(output.key, output.result, output.reported, candidates)
            checkpoints.add(output.key)
            progress.advance(output.key[2] - output.key[1])
