"""The local dask cluster of a run: workers on this machine, started early.

By default the workers are threads of the driver's process (one per core): the compiled
kernels, numpy's sorts and the file writes release the GIL, so threads use every core
without starting processes, importing the pipeline again in each, or copying anything
between them (measured on 2 cores, 200,000 SEIR members over a year: about 10 s against 19
s with two worker processes).  Worker processes (``processes=True``) isolate the workers:
a worker that dies (killed, out of memory) loses only its task, which the scheduler runs
again elsewhere.

:class:`LocalStart` starts the cluster in a background thread before the driver imports
the rest of the pipeline; worker processes import it themselves as they start
(:class:`WarmWorker`).  Nothing it starts listens beyond the loopback address, and
dask's web pages are served only when a dashboard is asked for
(:mod:`ensemble.run.listening`).  This module imports only dask.distributed and the
standard library.
"""

from __future__ import annotations

import importlib
import logging
import os
import signal
import threading
from concurrent.futures import Future, ThreadPoolExecutor

import dask
from distributed import Client, LocalCluster, Worker
from distributed.diagnostics.plugin import WorkerPlugin

from ensemble.run.clusters import THREAD_LIMITS
from ensemble.run.listening import LOOPBACK_ANY_PORT, NO_PAGES

SINGLE_THREAD_ENV = {name: "1" for name in THREAD_LIMITS}
"""Environment of local worker processes: one worker process per core, so BLAS and numba
inside a worker use one thread each and the cores are not oversubscribed (batch worker
jobs export the same, :func:`ensemble.run.clusters.environment_lines`)."""

KEEP_FREED_MEMORY = {"distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None}
"""dask configuration for local worker processes: leave the C allocator its default
behaviour instead of dask's setting that hands freed memory back to the system at once.
A worker allocates the same large arrays task after task; handed back, every task
page-faults them in again (measured: 103 ms against 12 ms of system time per chunk of
1,536 SEIR members over a year), and the allocator's default keeps memory bounded by
the largest task."""

SHORT_LOGS = {"distributed.admin.low-level-log-length": 64}
"""dask configuration for the schedulers, clients and workers a run starts: keep the last
64 entries of dask's low-level logs instead of 1,000.  Those logs hold recent messages
whole, tasks and their arguments included, which for a large run grows the driver by
gigabytes before the oldest drop out (measured: 2.5 GB over the first 100,000 members of
a 16-group model); a few dozen still show what went on last."""

WARM_MODULES = ("ensemble.run.tasks", "ensemble.integrate.kernels.launch")
"""Modules a worker imports as it starts, before its first chunk arrives."""


def available_cores() -> int:
    """Cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not Linux
        return os.cpu_count() or 1


class WarmWorker(WorkerPlugin):
    """Prepares a local worker process: it ignores SIGINT, keeps its failed tasks out of
    its log and imports :data:`WARM_MODULES`.

    Ctrl-C on a terminal reaches every process of the foreground group; the driver
    answers it by closing the cluster, so the workers need not (and would only print
    tracebacks).  A chunk that fails is reported by the driver in one line naming its
    members and error (:class:`~ensemble.errors.RunFailed`), so the worker's own block
    for it ("Compute Failed") would only repeat it.
    """

    name = "ensemble-warm-worker"

    def setup(self, worker) -> None:
        logging.getLogger("distributed.worker").setLevel(logging.CRITICAL)
        if threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGINT, signal.SIG_IGN)
        for module in WARM_MODULES:
            importlib.import_module(module)


class LoopbackWorker(Worker):
    """A worker in the driver's process whose web server listens on the loopback address.

    A thread worker talks to the scheduler in-process and has no network address of its
    own, from which dask would otherwise take the web server's (it then listens on every
    interface).
    """

    def __init__(self, *args, dashboard_address: str | None = None, **kwargs):
        super().__init__(*args, dashboard_address=dashboard_address or LOOPBACK_ANY_PORT,
                         **kwargs)


class LocalStart:
    """A local cluster and its client, being started in a background thread.

    Parameters
    ----------
    workers : workers (default: one per core): threads of this process, or with
        ``processes`` worker processes, each with one thread and single-threaded numerical
        libraries (:data:`SINGLE_THREAD_ENV`).
    processes : workers in processes of their own instead of threads of this one.
    dashboard : where dask's dashboard listens (``HOST:PORT``, see
        :func:`ensemble.run.listening.dashboard_at`), or None for no dashboard (its web
        server and plots take about half a second to start, measured on the test
        machines: worth it for a run one watches, not for a short one).
    """

    def __init__(self, workers: int | None = None, processes: bool = False,
                 dashboard: str | None = None):
        self.dashboard = dashboard
        self._pool = ThreadPoolExecutor(1, "ensemble-local-cluster")
        self._started: Future = self._pool.submit(self._start, workers or available_cores(),
                                                  processes, dashboard)
        self._closing: Future | None = None

    @staticmethod
    def _start(workers: int, processes: bool, dashboard: str | None
               ) -> tuple[LocalCluster, Client]:
        settings = SHORT_LOGS | ({} if dashboard is not None else NO_PAGES)
        scheduler = {"dashboard": dashboard is not None,
                     "dashboard_address": dashboard or LOOPBACK_ANY_PORT}
        with dask.config.set(settings | (KEEP_FREED_MEMORY if processes else {})):
            if processes:
                cluster = LocalCluster(
                    n_workers=workers, threads_per_worker=1, processes=True,
                    scheduler_kwargs=scheduler, silence_logs=logging.ERROR,
                    env=dict(SINGLE_THREAD_ENV))
            else:
                cluster = LocalCluster(
                    n_workers=1, threads_per_worker=workers, processes=False,
                    worker_class=LoopbackWorker, scheduler_kwargs=scheduler,
                    silence_logs=logging.ERROR)
            try:
                client = Client(cluster)
                if processes:   # thread workers share the driver's imports and signals
                    client.register_plugin(WarmWorker())
            except BaseException:
                cluster.close()
                raise
        return cluster, client

    def client(self) -> Client:
        """The client, once the cluster is up (raises what starting it raised)."""
        return self._started.result()[1]

    def release(self) -> None:
        """Start closing the client and the cluster in the background thread, so that
        the driver can go on (writing the result) while the workers shut down."""
        if self._closing is None:
            self._closing = self._pool.submit(self._close_now)

    def close(self) -> None:
        """Close the client and the cluster, and wait until they are closed."""
        self.release()
        self._closing.result()
        self._pool.shutdown()

    def _close_now(self) -> None:
        try:
            cluster, client = self._started.result()
        except Exception:       # it never started; its error went to client()
            return
        client.close()
        cluster.close()
