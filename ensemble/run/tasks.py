"""One task of a run: a chunk of members drawn and integrated, and saved by the worker
that computed it when it sees the work directory.

:func:`compute_chunk` is a pure function of its arguments (the scenario, the variant's
lowered model, the member range, the backend), so a task that is rerun (its worker died,
the run was resumed) gives the same bits.  This module does not import dask: the run
engine submits these functions to dask workers, and :func:`ensemble.simulate` calls
:func:`compute_chunk` directly.
"""

from __future__ import annotations

import copyreg
import dataclasses
import threading
import types
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from ensemble.integrate.chunk import integrate_chunk
from ensemble.integrate.kernels.blocks import block_size
from ensemble.methods import METHODS
from ensemble.model.lower import LoweredModel
from ensemble.records import ChunkKey, ChunkResult
from ensemble.run.journal import WorkJournal
from ensemble.sampling import make_design
from ensemble.sampling.design import design_from_uniforms
from ensemble.scenario.schema import Scenario

DEFAULT_BACKEND = "compiled"
"""Integration backend used when none is asked for (by :func:`ensemble.run` and
:func:`ensemble.simulate` alike, so that their fingerprints agree): the generated numba
kernels, which run 5 to 13 times faster than the numpy reference and are cached on disk
after their first compilation (``scripts/benchmark.py``).  ``--backend numpy`` selects
the readable reference; the two agree to 1e-12 relative
(``tests/test_compiled_backend.py``)."""


def read_only(items: dict) -> types.MappingProxyType:
    """A read-only view of ``items`` (what a pickled read-only mapping becomes again)."""
    return types.MappingProxyType(items)


def _reduce_mappingproxy(proxy: types.MappingProxyType) -> tuple:
    return read_only, (dict(proxy),)


# The validated scenario keeps its tables in read-only mappings; let tasks carry it.
copyreg.pickle(types.MappingProxyType, _reduce_mappingproxy)


Uniforms = Mapping[tuple[str, int], np.ndarray]
"""The uniform draws of a chunk's members: each drawn column (parameter, element) of
:func:`~ensemble.sampling.uniform.uncertain_columns` -> (members,) values in (0, 1)."""


def chunk_uniforms(uniforms: Uniforms | None, key: ChunkKey) -> Uniforms | None:
    """The draws of chunk ``key``'s members, out of the draws of every member of a
    variant (the same for every variant); None stays None."""
    if uniforms is None:
        return None
    _, start, end = key
    return {column: np.ascontiguousarray(values[start:end])
            for column, values in uniforms.items()}


@dataclass(frozen=True)
class ChunkOutput:
    """What one task hands back to the driver."""

    key: ChunkKey
    result: ChunkResult
    reported: Mapping[str, np.ndarray]


@dataclass(frozen=True)
class ChunkSaved:
    """What a task that saved its own chunk hands back."""

    key: ChunkKey


def compute_chunk(scenario: Scenario, model: LoweredModel, key: ChunkKey,
                  backend: str = DEFAULT_BACKEND,
                  kernel_threads: int | None = None, buffers=None,
                  uniforms: Uniforms | None = None) -> ChunkOutput:
    """Draw and integrate members ``key[1] .. key[2] - 1`` of variant ``key[0]``.

    A pure function of its arguments: the same key gives the same bits in any process
    (:func:`~ensemble.sampling.make_design` depends on the member index alone, and
    :func:`~ensemble.integrate.chunk.integrate_chunk` treats members independently).
    ``kernel_threads`` sets the threads of the compiled backend's kernels in the calling
    thread (1 in a dask worker, whose siblings already use the other cores); None leaves
    numba's default.  With ``buffers`` (see
    :func:`~ensemble.integrate.chunk.integrate_chunk`) the trajectories are views of
    them, to be used before the next chunk.  With ``uniforms``, the chunk's members take
    those uniform draws instead of their own (the posterior members of a fit,
    :func:`~ensemble.sampling.design.design_from_uniforms`).
    """
    if kernel_threads is not None and backend == "compiled":
        from ensemble.integrate.kernels.launch import set_kernel_threads

        set_kernel_threads(kernel_threads)
    variant, start, end = key
    member_index = np.arange(start, end, dtype=np.int64)
    if uniforms is None:
        design = make_design(scenario, scenario.variants[variant], model, member_index)
    else:
        drawn = design_from_uniforms(scenario, scenario.variants[variant], model, uniforms)
        design = dataclasses.replace(drawn, member_index=member_index)
    result = integrate_chunk(model, design, scenario.solver, scenario.n_reports, backend,
                             buffers)
    return ChunkOutput(key, result, dict(design.reported))


def compute_and_save_chunk(scenario: Scenario, model: LoweredModel, key: ChunkKey,
                           journal: WorkJournal, token: str,
                           backend: str = DEFAULT_BACKEND,
                           kernel_threads: int | None = None, candidates: bool = False,
                           uniforms: Uniforms | None = None) -> ChunkOutput | ChunkSaved:
    """:func:`compute_chunk` (with ``uniforms``, of members given their draws), then save
    the chunk into ``journal`` here (as candidates for the quantiles when ``candidates``
    and its pilot is in, :meth:`WorkJournal.save`) when this process sees the journal's
    directory (it reads back ``token``, from :meth:`WorkJournal.mark`), else hand the
    whole chunk back for the driver to save."""
    if not journal.shares_directory(token):
        return compute_chunk(scenario, model, key, backend, kernel_threads,
                             uniforms=uniforms)
    output = compute_chunk(scenario, model, key, backend, kernel_threads,
                           thread_buffers(backend), uniforms)
    journal.save(output.key, output.result, output.reported, candidates)
    return ChunkSaved(key)


_workspace = threading.local()
"""Each thread's report buffers (:func:`thread_buffers`), kept from task to task."""


def thread_buffers(backend: str):
    """This thread's :class:`~ensemble.integrate.kernels.launch.ReportBuffers` (None for
    the numpy backend): a worker's chunks are saved one after another, each before the
    next is computed, so they can all be written into the same arrays."""
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
