"""Saved chunks of one variant read as candidates for the quantiles, whatever each chunk
keeps (:mod:`.selection` for the method).

Used by the finish (exact quantiles from the candidates) and by the refinement of the
brackets (:mod:`.brackets`), both working through cells in blocks of about a given
number of bytes of candidates, each thread in buffers of its own that it reuses.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from ensemble.output import selection
from ensemble.output.selection import Brackets, Candidates
from ensemble.output.sources import MemberSource
from ensemble.records import ChunkKey

ReadValues = Callable[[int, int, int], np.ndarray]
"""``read(part, start, stop)``: candidate values ``start .. stop - 1`` of part ``part``
(the ``read`` of :func:`.selection.order_statistics`)."""


def reusable(workspace: threading.local, name: str, shape: tuple[int, ...]) -> np.ndarray:
    """A float64 array of ``shape`` over the thread's buffer ``name``, grown as needed."""
    size = math.prod(shape)
    buffer = getattr(workspace, name, None)
    if buffer is None or buffer.size < size:
        buffer = np.empty(size)
        setattr(workspace, name, buffer)
    return buffer[:size].reshape(shape)


def summed_counts(parts: Sequence[Candidates], intervals: int
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(below, nans, inside) of the chunks' candidates (of the same cells, ``intervals``
    intervals each) summed: (cells, K), (cells,) and (cells, K)."""
    cells = parts[0].below.shape[0]
    return (sum(np.asarray(part.below) for part in parts),
            sum(np.asarray(part.nans) for part in parts),
            sum(np.diff(part.offsets).reshape(cells, intervals) for part in parts))


def cells_per_block(inside: np.ndarray, block_bytes: int) -> int:
    """Cells whose candidates (``inside``: (cells, K) counts) take about
    ``block_bytes``."""
    per_cell = 8 * max(1, int(inside.sum()) // len(inside))
    return max(1, block_bytes // per_cell)


def candidate_parts(source: MemberSource, name: str, keys: Sequence[ChunkKey],
                    included: np.ndarray, brackets: Brackets, coarse: Brackets,
                    cells: int, workspace: threading.local,
                    pool: ThreadPoolExecutor | None = None
                    ) -> tuple[list[Candidates], ReadValues]:
    """Every chunk of ``keys`` (of one variant, whose members behind the quantiles
    ``included`` marks) as candidates of trajectory variable ``name`` cut with
    ``brackets``, and how to read their values.

    Chunks cut with ``brackets`` stay in the source (their values read as needed), those
    cut with the ``coarse`` brackets are cut again, whole ones are cut here, and any
    other (not expected) is cut from every value, which the source supplies; on the
    ``pool``'s threads if given.
    """
    digest = brackets.digest()

    def prepare(key: ChunkKey) -> tuple[Candidates, bool]:
        cut_with = source.cut_with(key, name)
        if cut_with == digest:
            return source.candidates(key, name, with_values=False), True
        if cut_with is not None and cut_with == coarse.digest():
            return selection.recut(source.candidates(key, name, with_values=True),
                                   coarse, brackets), False
        if cut_with is None:
            values = source.read_cells(key, name, 0,
                                       reusable(workspace, "whole", (cells, key[2] - key[1])))
        else:
            values = np.ascontiguousarray(source.whole(key, name))
        return selection.chunk_candidates(values, included[key[1]:key[2]], brackets), False

    prepared = list(pool.map(prepare, keys) if pool is not None else map(prepare, keys))
    parts = [part for part, _ in prepared]
    stored = [kept for _, kept in prepared]

    def read(index: int, start: int, stop: int) -> np.ndarray:
        """Values ``start .. stop - 1`` of part ``index``, read into this thread's
        buffer when the source keeps them."""
        if not stored[index]:
            return parts[index].values[start:stop]
        return source.read_candidate_values(keys[index], name, start,
                                            reusable(workspace, "read", (stop - start,)))

    return parts, read


def candidates_per_cell(source: MemberSource, name: str,
                        cuts: Mapping[ChunkKey, str | None],
                        known: Mapping[str, Brackets], cells: int) -> int:
    """An upper bound of the candidates of one cell, on average over the cells, summed
    over the chunks of ``cuts`` (each chunk's :meth:`~.sources.MemberSource.cut_with`):
    the values a chunk cut with brackets of ``known`` (by digest) keeps (the last of its
    offsets), and every member of any other chunk."""
    total = 0
    for key, cut_with in cuts.items():
        kept_with = known.get(cut_with)
        if kept_with is None:
            total += (key[2] - key[1]) * cells
            continue
        intervals = kept_with.lower.shape[1]
        total += int(source.candidate_counts(key, name, cells - 1, cells,
                                             intervals).offsets[-1])
    return max(1, total // cells)


def block_candidates(source: MemberSource, name: str, key: ChunkKey, cut_with: str | None,
                     included: np.ndarray, span: slice, brackets: Brackets,
                     known: Mapping[str, Brackets], workspace: threading.local
                     ) -> Candidates:
    """Chunk ``key``'s candidates of trajectory variable ``name`` for the cells ``span``
    only, cut with ``brackets`` (their offsets from 0, values in memory), whatever the
    chunk keeps (``cut_with``, the digest of the brackets it was cut with, or None):
    read as saved when cut with ``brackets``, cut again when cut with other brackets of
    ``known`` (by digest: the pilot's, of which ``brackets`` are a refinement), cut here
    from every value otherwise (``included`` marks the chunk's members behind the
    quantiles)."""
    first, stop = span.start, span.stop
    block = Brackets(brackets.lower[span], brackets.upper[span])
    kept_with = known.get(cut_with) if cut_with is not None else None
    if kept_with is not None:
        counts = source.candidate_counts(key, name, first, stop, kept_with.lower.shape[1])
        start = int(counts.offsets[0])
        values = source.read_candidate_values(key, name, start,
                                              np.empty(int(counts.offsets[-1]) - start))
        part = Candidates(counts.below, counts.nans, counts.offsets - start, values)
        if kept_with is brackets:
            return part
        return selection.recut(part, Brackets(kept_with.lower[span], kept_with.upper[span]),
                               block)
    if cut_with is None:
        values = source.read_cells(key, name, first,
                                   reusable(workspace, "whole", (stop - first, key[2] - key[1])))
    else:
        values = np.ascontiguousarray(source.whole(key, name)[first:stop])
    return selection.chunk_candidates(values, included, block)
