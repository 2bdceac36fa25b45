"""The variables of a result from its saved chunks of members: per-member values and
their quantiles, and the quantiles of every trajectory variable over members, computed
in blocks of bounded memory.

Quantiles over members use numpy's default (linear) definition (Hyndman and Fan 1996,
"Sample quantiles in statistical packages", definition 7) over the members without the
non-finite or invalid-start bits.  A variant whose chunks all keep every value is reduced
block of times by block of times, each chunk read once; a variant whose chunks past the
pilot keep candidates only gets the same numbers by selection (:mod:`.selection`), and
the rare cell whose ranks the brackets missed is computed from every value, which the
source supplies.
"""

from __future__ import annotations

import os
import threading
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from ensemble.output import selection
from ensemble.output.brackets import BracketCache
from ensemble.output.candidates import (block_candidates, candidates_per_cell, reusable,
                                        summed_counts)
from ensemble.output.layout import ResultLayout
from ensemble.output.measure_results import finish_measures
from ensemble.output.measures import (find_trajectory, measure_trajectories,
                                      trajectory_variables)
from ensemble.output.metrics import summary_quantiles
from ensemble.output.quantiles import quantiles
from ensemble.output.sources import MemberSource
from ensemble.output.variables import TrajectoryVariable
from ensemble.records import ChunkKey

DEFAULT_BLOCK_BYTES = 384 * 2**20
"""Memory for one block of trajectories (or of candidates) gathered over all members.
Each block reads a piece of every chunk's files, so with thousands of chunks larger
blocks mean fewer, larger reads (measured on a million members of a 16-group model,
3,907 chunks: the selection was limited by opening files and reading a few kilobytes at
a time with blocks of 128 MB); a thread holds about two blocks at a time."""

FINISH_THREADS = min(4, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                     else os.cpu_count() or 1)
"""Blocks of trajectories reduced to quantiles at once: one per core (the run's workers
are done by then), at most 4 so that memory stays within a few blocks."""


def block_plan(member_count: int, rows: int, times: int, block_bytes: int
               ) -> list[tuple[slice, slice]]:
    """Blocks (times, rows) of a (times, rows, members) float64 array, each of at most
    ``block_bytes`` (or a single row and time when even that is larger): whole row
    ranges while they fit, else single times split by rows."""
    per_row_time = max(member_count, 1) * 8
    if rows * per_row_time <= block_bytes:
        step = max(1, block_bytes // (rows * per_row_time))
        return [(slice(t, min(t + step, times)), slice(0, rows))
                for t in range(0, times, step)]
    step = max(1, block_bytes // per_row_time)
    return [(slice(t, t + 1), slice(r, min(r + step, rows)))
            for t in range(times) for r in range(0, rows, step)]


class Finisher:
    """The variables of a result from every member's saved chunks.

    Parameters
    ----------
    layout : the result's layout.
    source : the saved chunks; together they hold every member of every variant.
    brackets : the run's brackets, needed when chunks keep candidates only.
    block_bytes : memory for one block of trajectories (or of candidates).
    """

    def __init__(self, layout: ResultLayout, source: MemberSource,
                 brackets: BracketCache | None = None,
                 block_bytes: int = DEFAULT_BLOCK_BYTES):
        self.layout = layout
        self.source = source
        self.brackets = brackets
        self.block_bytes = block_bytes
        self.keys = source.saved()
        self.block_count = 0
        """Blocks of trajectories gathered (for tests and tuning)."""
        self.largest_block_bytes = 0
        """Size of the largest of those blocks."""

    def member_variables(self) -> dict[str, np.ndarray]:
        """Every per-member array of every chunk as (variant, member, ...) arrays, with
        ``members_in_summary`` and the quantiles of the metrics and of their
        differences (:func:`.metrics.summary_quantiles`), the measures' summaries
        (:func:`.measure_results.finish_measures`) and, when the result keeps members,
        every member's series of each measure; a constant parameter's values once per
        variant ((variant, [group]))."""
        layout = self.layout
        gathered: dict[str, np.ndarray] = {}
        for key in self.keys:
            variant, first, end = key
            for name, values in self.source.member_arrays(key).items():
                if name not in gathered:
                    gathered[name] = np.empty(
                        (len(layout.variants), layout.member_count, *values.shape[1:]),
                        dtype=values.dtype)
                gathered[name][variant, first:end] = values
        for name, info in layout.parameters.items():
            if info.constant:       # the same for every member: stored once per variant
                gathered[f"param_{name}"] = gathered[f"param_{name}"][:, 0].copy()
        gathered.update(summary_quantiles(gathered, gathered["status"],
                                          layout.scenario.output.quantiles,
                                          layout.compare_index))
        finish_measures(layout, gathered, layout.scenario.output.quantiles)
        if layout.keep_members:
            gathered.update((variable.name, self.trajectories(variable.name))
                            for variable in measure_trajectories(layout))
        return gathered

    def trajectories(self, name: str) -> np.ndarray:
        """(variant, member, rows, time) every member's values of trajectory variable
        ``name``, in memory."""
        layout = self.layout
        variable = find_trajectory(layout, name)
        values = np.empty((len(layout.variants), layout.member_count,
                           layout.row_count(variable), layout.time_count(variable)))
        for key in self.keys:
            values[key[0], key[1]:key[2]] = self.source.trajectory(key, name)
        return values

    def trajectory_quantiles(self, included: np.ndarray) -> dict[str, np.ndarray]:
        """``<name>_quantile`` of each trajectory variable: (variant, quantile, rows,
        time) quantiles over the members ``included`` marks ((variant, member)).

        Variants whose chunks keep every value go in blocks of times (and rows) of at
        most ``block_bytes``, each chunk read once; :data:`FINISH_THREADS` threads
        gather and reduce one block each at a time (numpy's sort, most of the work,
        releases the interpreter lock), reusing their buffers from block to block, so
        memory stays within about ``FINISH_THREADS * block_bytes``.
        """
        layout = self.layout
        probabilities = layout.scenario.output.quantiles
        variables = trajectory_variables(layout)
        results = {variable.name: np.empty((len(layout.variants), len(probabilities),
                                            layout.row_count(variable),
                                            layout.time_count(variable)))
                   for variable in variables}
        workspace = threading.local()

        def reduce_block(variable: TrajectoryVariable, variant: int, times: slice,
                         rows: slice) -> int:
            """Quantiles of one block into ``results``; the block's size in bytes."""
            block = self._gathered_block(variable.name, variant, times, rows,
                                         included[variant], workspace)
            values = quantiles(block, probabilities, axis=-1, overwrite_input=True)
            results[variable.name][variant, :, rows, times] = values.transpose(0, 2, 1)
            return block.nbytes

        whole = [variant for variant in range(len(layout.variants))
                 if all(self._kept_whole(key) for key in self.keys if key[0] == variant)]
        blocks = [(variable, variant, times, rows)
                  for variable in variables
                  for variant in whole
                  for times, rows in block_plan(int(included[variant].sum()),
                                                layout.row_count(variable),
                                                layout.time_count(variable),
                                                self.block_bytes)]
        with ThreadPoolExecutor(FINISH_THREADS) as pool:
            sizes = list(pool.map(lambda block: reduce_block(*block), blocks))
            for variant in set(range(len(layout.variants))) - set(whole):
                for variable in variables:
                    results[variable.name][variant] = self._selected_quantiles(
                        variable, [key for key in self.keys if key[0] == variant],
                        included[variant], pool)
        self.block_count += len(sizes)
        self.largest_block_bytes = max([self.largest_block_bytes, *sizes])
        return {f"{name}_quantile": result for name, result in results.items()}

    def _gathered_block(self, name: str, variant: int, times: slice, rows: slice,
                        included: np.ndarray, workspace: threading.local) -> np.ndarray:
        """(times, rows, included members) values of one block of a variant whose chunks
        keep every value, in this thread's buffer."""
        shape = (times.stop - times.start, rows.stop - rows.start)
        block = reusable(workspace, "block", (*shape, int(included.sum())))
        position = 0
        for key in self.keys:
            if key[0] != variant:
                continue
            _, first, end = key
            chosen = included[first:end]
            size = int(chosen.sum())
            stored = reusable(workspace, "stored", (*shape, end - first))
            self.source.read_slab(key, name, times, rows, stored)
            block[..., position:position + size] = (
                stored if size == end - first else stored[..., chosen])
            position += size
        return block

    def _kept_whole(self, key: ChunkKey) -> bool:
        """True when the chunk keeps every value of its trajectories (not candidates)."""
        return all(self.source.cut_with(key, variable.name) is None
                   for variable in trajectory_variables(self.layout))

    def _selected_quantiles(self, variable: TrajectoryVariable, keys: list[ChunkKey],
                            included: np.ndarray, pool: ThreadPoolExecutor) -> np.ndarray:
        """(quantile, rows, time) quantiles of ``variable`` of one variant whose chunks
        past the pilot keep candidates (:func:`.selection.select`), cut with the refined
        brackets where there are some, on the pool's threads.

        Cells go in blocks of about ``block_bytes`` of candidates, and each block reads
        from every chunk only its own cells (:func:`.candidates.block_candidates`), so
        memory stays within a few blocks whatever the number of chunks."""
        if self.brackets is None:
            raise ValueError("chunks keep candidates only, and no brackets were given")
        layout = self.layout
        probabilities = layout.scenario.output.quantiles
        variant = keys[0][0]
        coarse = self.brackets.pilot(variant)[variable.name]
        refined = self.brackets.refined(variant)
        brackets = refined[variable.name] if refined is not None else coarse
        workspace = threading.local()
        count = int(included.sum())
        cells = brackets.lower.shape[0]
        known = {coarse.digest(): coarse, brackets.digest(): brackets}
        cuts = {key: self.source.cut_with(key, variable.name) for key in keys}
        step = max(1, self.block_bytes // max(1, 8 * candidates_per_cell(
            self.source, variable.name, cuts, known, cells)))
        spans = [slice(first, min(first + step, cells)) for first in range(0, cells, step)]

        def select_block(span: slice) -> tuple[np.ndarray, np.ndarray]:
            parts = [block_candidates(self.source, variable.name, key, cuts[key],
                                      included[key[1]:key[2]], span, brackets, known,
                                      workspace) for key in keys]
            below, nans, inside = summed_counts(parts, brackets.lower.shape[1])
            buffer = reusable(workspace, "candidates", (int(inside.sum()),))
            return selection.select(parts, slice(0, span.stop - span.start), count, nans,
                                    below, inside, probabilities, buffer)

        selected = list(pool.map(select_block, spans))
        values = np.concatenate([block for block, _ in selected], axis=1)
        missed = np.flatnonzero(np.concatenate([lost for _, lost in selected]))
        if missed.size:
            values[:, missed] = self._recomputed_quantiles(variable.name, keys, included,
                                                           missed)
        return values.reshape(len(probabilities), layout.time_count(variable),
                              layout.row_count(variable)).transpose(0, 2, 1)

    def _recomputed_quantiles(self, name: str, keys: list[ChunkKey], included: np.ndarray,
                              cells: np.ndarray) -> np.ndarray:
        """Quantiles of the cells whose ranks the brackets missed, from every value of
        every chunk (which the source reads or has computed again)."""
        values = [np.asarray(self.source.whole(key, name)[cells]) for key in keys]
        chosen = np.concatenate(values, axis=1)[:, included]
        return quantiles(chosen, self.layout.scenario.output.quantiles, axis=1,
                         overwrite_input=True)
