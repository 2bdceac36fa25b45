"""Where the finish reads its members from: the saved chunks of a run, or an ensemble
held in memory.

The finish (:mod:`.finish`) and the brackets of the quantiles (:mod:`.brackets`) read
chunks of members through :class:`MemberSource`: arrays of per-member values, and each
trajectory variable's values time-major, ``(n_reports, rows, members)`` flattened to
``(cells, members)`` with cell ``t * rows + r``.  A chunk keeps every value of a
trajectory variable ("whole"), or, past its variant's pilot, only the candidates for the
quantiles (:mod:`.selection`).  The run layer's work journal is one source
(:class:`ensemble.run.chunk_files.JournalMembers`); :class:`MembersInMemory`, whole chunks
in memory, is the other (:func:`ensemble.simulate`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Protocol

import numpy as np

from ensemble.output.layout import ResultLayout
from ensemble.output.measures import chunk_trajectories, member_measures
from ensemble.output.metrics import member_metrics
from ensemble.output.selection import Candidates
from ensemble.output.variables import MEMBER_VALUES, TRAJECTORIES
from ensemble.records import ChunkKey, ChunkResult


class MemberSource(Protocol):
    """Saved chunks of members, as the finish reads them."""

    def saved(self) -> list[ChunkKey]:
        """Keys of the saved chunks, sorted."""

    def covers(self, variant: int, end: int) -> bool:
        """True when members ``0 .. end - 1`` of ``variant`` are all saved."""

    def member_arrays(self, key: ChunkKey) -> Mapping[str, np.ndarray]:
        """The per-member arrays of chunk ``key`` (:func:`chunk_member_arrays`)."""

    def cut_with(self, key: ChunkKey, name: str) -> str | None:
        """The digest of the brackets trajectory variable ``name`` of chunk ``key`` was
        cut with, or None when the chunk keeps every value."""

    def read_cells(self, key: ChunkKey, name: str, first: int, out: np.ndarray
                   ) -> np.ndarray:
        """``out`` ((cells, members), contiguous) filled with cells ``first ..`` of a
        chunk that keeps every value."""

    def read_slab(self, key: ChunkKey, name: str, times: slice, rows: slice,
                  out: np.ndarray) -> None:
        """``out`` ((times, rows, members), contiguous) filled with a block of a chunk
        that keeps every value: whole row ranges, or a single time."""

    def candidates(self, key: ChunkKey, name: str, with_values: bool) -> Candidates:
        """The candidates a cut chunk keeps (``values`` None unless ``with_values``)."""

    def read_candidate_values(self, key: ChunkKey, name: str, start: int,
                              out: np.ndarray) -> np.ndarray:
        """``out`` filled with the candidate values ``start ..`` of a cut chunk."""

    def candidate_counts(self, key: ChunkKey, name: str, first: int, stop: int,
                         intervals: int) -> Candidates:
        """The counts a cut chunk keeps for cells ``first .. stop - 1`` (``values`` None):
        ``below`` and ``nans`` of those cells, and the ``offsets`` of their ``intervals``
        intervals each (with the one after the last), into the chunk's whole values."""

    def whole(self, key: ChunkKey, name: str) -> np.ndarray:
        """Every value, (cells, members), whatever the chunk keeps (a chunk that keeps
        candidates only is computed again by the source's owner)."""

    def trajectory(self, key: ChunkKey, name: str) -> np.ndarray:
        """Every member's values, (members, rows, n_reports), of a chunk that keeps every
        value."""


def check_chunk(layout: ResultLayout, key: ChunkKey, result: ChunkResult) -> int:
    """Check that ``result`` holds members ``key[1] .. key[2] - 1`` with the layout's
    shapes; its member count.

    Raises
    ------
    ValueError : the members or a shape do not match.
    """
    count = key[2] - key[1]
    if not np.array_equal(result.members, np.arange(key[1], key[2])):
        raise ValueError(f"chunk {key} holds members {result.members[:3]}...")
    expected = {variable.source: (count, layout.row_count(variable), layout.n_reports)
                for variable in TRAJECTORIES if variable.derive is None}
    expected.update({value.name: (count,) for value in MEMBER_VALUES}, status=(count,))
    for name, shape in expected.items():
        if getattr(result, name).shape != shape:
            raise ValueError(f"chunk {key}: {name} has shape "
                             f"{getattr(result, name).shape}, expected {shape}")
    return count


def chunk_member_arrays(layout: ResultLayout, key: ChunkKey, result: ChunkResult,
                        reported: Mapping[str, np.ndarray],
                        trajectories: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The per-member arrays of a chunk: each of :data:`.variables.MEMBER_VALUES`,
    ``status``, ``param_<name>`` of every reported parameter ((members,) or (members,
    groups)), the metrics of its ``trajectories`` (name -> (members, rows, times):
    :func:`.measures.chunk_trajectories`) and every measure's metrics
    (:mod:`.measures`).

    Raises
    ------
    ValueError : a parameter of the layout is missing from ``reported`` or has the wrong
        shape (``Design.reported``: (members,) or (groups, members)).
    """
    count = key[2] - key[1]
    arrays = {value.name: getattr(result, value.name) for value in MEMBER_VALUES}
    arrays["status"] = result.status.astype(np.uint8)
    for name, info in layout.parameters.items():
        if name not in reported:
            raise ValueError(f"chunk {key}: parameter {name!r} is not reported")
        values = np.asarray(reported[name], dtype=np.float64)
        shape = ((layout.n_groups, count) if info.shape == "vector" and layout.groups
                 else (count,))
        if values.shape != shape:
            raise ValueError(f"chunk {key}: parameter {name!r} has shape "
                             f"{values.shape}, expected {shape}")
        arrays[f"param_{name}"] = values.T if values.ndim == 2 else values
    arrays.update(member_metrics(trajectories, layout.times))
    arrays.update(member_measures(layout, trajectories))
    return arrays


def time_major(values: np.ndarray) -> np.ndarray:
    """(members, rows, times) values as a contiguous (times, rows, members) array."""
    return np.ascontiguousarray(values.transpose(2, 1, 0))


class MembersInMemory:
    """Whole chunks of members held in memory, as a :class:`MemberSource`.

    Parameters
    ----------
    layout : the result's layout.
    chunks : (key, result, reported) of every chunk (``Design.reported`` of its draws).
    """

    def __init__(self, layout: ResultLayout,
                 chunks: Sequence[tuple[ChunkKey, ChunkResult, Mapping[str, np.ndarray]]]):
        self.layout = layout
        self._arrays: dict[ChunkKey, dict[str, np.ndarray]] = {}
        self._values: dict[tuple[ChunkKey, str], np.ndarray] = {}
        for key, result, reported in chunks:
            check_chunk(layout, key, result)
            trajectories = chunk_trajectories(layout, result)
            self._arrays[key] = chunk_member_arrays(layout, key, result, reported,
                                                    trajectories)
            for name, values in trajectories.items():
                self._values[key, name] = time_major(values)

    def saved(self) -> list[ChunkKey]:
        return sorted(self._arrays)

    def covers(self, variant: int, end: int) -> bool:
        ranges = sorted((first, stop) for v, first, stop in self._arrays if v == variant)
        reached = 0
        for first, stop in ranges:
            if first > reached:
                break
            reached = max(reached, stop)
        return reached >= end

    def member_arrays(self, key: ChunkKey) -> Mapping[str, np.ndarray]:
        return self._arrays[key]

    def cut_with(self, key: ChunkKey, name: str) -> str | None:
        return None

    def read_cells(self, key: ChunkKey, name: str, first: int, out: np.ndarray
                   ) -> np.ndarray:
        flat = self.whole(key, name)
        out[...] = flat[first:first + out.shape[0]]
        return out

    def read_slab(self, key: ChunkKey, name: str, times: slice, rows: slice,
                  out: np.ndarray) -> None:
        out[...] = self._values[key, name][times, rows]

    def candidates(self, key: ChunkKey, name: str, with_values: bool) -> Candidates:
        raise KeyError(f"chunk {key} held in memory keeps every value")

    def read_candidate_values(self, key: ChunkKey, name: str, start: int,
                              out: np.ndarray) -> np.ndarray:
        raise KeyError(f"chunk {key} held in memory keeps every value")

    def whole(self, key: ChunkKey, name: str) -> np.ndarray:
        values = self._values[key, name]
        return values.reshape(-1, values.shape[-1])

    def trajectory(self, key: ChunkKey, name: str) -> np.ndarray:
        return self._values[key, name].transpose(2, 1, 0)
