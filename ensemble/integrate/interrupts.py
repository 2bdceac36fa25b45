"""A request to stop integrating, made when the run is interrupted and honoured between
pieces of work.

A signal handler runs in the main thread only, and only between two steps of the
interpreter: a compiled kernel that integrates a whole chunk in one call, or a dask
worker thread of this process, would not notice it until the chunk is done.  So the
integrators work in pieces (the compiled backend a batch of blocks of members at a time,
:mod:`ensemble.integrate.kernels.launch`; the numpy reference one report interval at a
time, :mod:`ensemble.integrate.reference`) and call :func:`stop_if_requested` between
them; the command line's signal handler and the run engine call :func:`request_stop`.
"""

from __future__ import annotations

import threading

_requested = threading.Event()


class StopRequested(Exception):
    """The run this thread integrates for was interrupted: its chunk is abandoned.

    Raised in threads other than the main one (a dask worker thread), where a
    :class:`KeyboardInterrupt` would bring down the worker rather than end the task."""


def request_stop() -> None:
    """Ask every integration of this process to stop at its next piece of work."""
    _requested.set()


def clear_stop_request() -> None:
    """Forget an earlier request (a new run starts in the same process)."""
    _requested.clear()


def stop_requested() -> bool:
    """Whether :func:`request_stop` was called since the last clearing."""
    return _requested.is_set()


def stop_if_requested() -> None:
    """End the calling integration if a stop was requested: :class:`KeyboardInterrupt` in
    the main thread (as Ctrl-C), :class:`StopRequested` in any other thread."""
    if _requested.is_set():
        if threading.current_thread() is threading.main_thread():
            raise KeyboardInterrupt
        raise StopRequested("the run was interrupted")
