"""The streaming store: finished chunks on disk as they complete, then one atomic
result file.

Work in progress lives in the directory ``<path>.partial``::

    <path>.partial/
        manifest.json              fingerprint and shape of the run (written first)
        chunk-v0-0000000-0000500/  one directory per saved chunk of members
            state.npy              (n_reports, n_states, M) float64, time-major
            flow_count.npy         (n_reports, n_flow_elements, M) float64
            members.npz            step_error, observed_order, status, param_<name>,
                                   and the per-member metrics of :mod:`.summary`

A chunk is written under a temporary name, every file fsynced, then renamed into place,
so a process killed at any instant leaves either the whole chunk or none of it (a stray
temporary is removed on resume).  Trajectories are stored time-major so that the
quantiles over members are computed block of times by block of times, reading every
chunk file once, whatever the number of members.
"""

from __future__ import annotations

import json
import os
import shutil
from collections.abc import Iterator, Mapping, Sequence
from pathlib import Path

import numpy as np

from ensemble.integrate.check import ChunkResult
from ensemble.output.layout import ParameterInfo, ResultLayout

__all__ = [
    "ChunkKey", "FingerprintMismatch", "IncompleteWork", "OutputError", "ParameterInfo",
    "ResultExists", "ResultLayout", "StoreWriteError", "WorkStore",
]

ChunkKey = tuple[int, int, int]
"""(variant index, first member, end member): members ``first .. end - 1`` of a variant."""

MANIFEST = "manifest.json"
CHUNK_PREFIX = "chunk-"
TEMP_PREFIX = ".tmp-"
DEFAULT_BLOCK_BYTES = 128 * 2**20
"""Memory for one block of trajectories gathered over all members in :meth:`finish`."""


class OutputError(Exception):
    """Base of the output layer's errors."""


class ResultExists(OutputError):
    """The final result path exists and replacing it was not asked for (CLI: exit 2)."""


class FingerprintMismatch(OutputError):
    """Work in progress belongs to a different scenario or settings (CLI: exit 2)."""


class StoreWriteError(OutputError):
    """Writing failed (unwritable directory, disk full...).  Chunks already saved are
    kept for a resume (CLI: exit 1)."""


class IncompleteWork(OutputError):
    """:meth:`WorkStore.finish` was called before every member was saved (CLI: exit 1)."""


def partial_path(path: str | os.PathLike[str]) -> Path:
    """The work-in-progress directory of result ``path``."""
    return Path(f"{os.fspath(path)}.partial")


class WorkStore:
    """Finished chunks of one run on disk, and the result file made from them.

    Use :meth:`open`, then :meth:`pending` to learn what is left, :meth:`save` for each
    finished chunk (from one thread; the order does not matter), and :meth:`finish`.
    """

    def __init__(self, path: Path, layout: ResultLayout, *,
                 block_bytes: int = DEFAULT_BLOCK_BYTES):
        self.path = path
        self.layout = layout
        self.work = partial_path(path)
        self.block_bytes = block_bytes

    # ------------------------------------------------------------------ opening

    @staticmethod
    def is_complete(path: str | os.PathLike[str], fingerprint: str) -> bool:
        """True when ``path`` is a complete result file with this ``fingerprint`` (a
        resumed run then has nothing to do)."""
        raise NotImplementedError

    @classmethod
    def open(cls, path: str | os.PathLike[str], layout: ResultLayout, *, resume: bool,
             force: bool, block_bytes: int = DEFAULT_BLOCK_BYTES) -> WorkStore:
        """Open the work in progress of result ``path``.

        Parameters
        ----------
        path : the final result file; work in progress goes to ``<path>.partial``.
        layout : the result's layout; its fingerprint is recorded in the manifest.
        resume : keep the chunks of an existing ``.partial`` (whose fingerprint must
            equal ``layout.fingerprint``); without it, an existing ``.partial`` is
            discarded.  A ``.partial`` without a manifest (killed while being created)
            is started afresh either way.
        force : allow replacing an existing ``path`` (only at :meth:`finish`, so the old
            file stays until the new one is complete).
        block_bytes : memory for one block of trajectories in :meth:`finish`.

        Raises
        ------
        ResultExists : ``path`` exists and ``force`` is false (callers that resume check
            :meth:`is_complete` first).
        FingerprintMismatch : resume of work made with a different fingerprint.
        StoreWriteError : the directory cannot be created or written.
        """
        raise NotImplementedError

    # ------------------------------------------------------------------ chunks

    def saved(self) -> list[ChunkKey]:
        """Keys of the chunks on disk, sorted."""
        raise NotImplementedError

    def pending(self, chunks: Sequence[ChunkKey]) -> list[ChunkKey]:
        """The member ranges of ``chunks`` not yet saved.

        A requested chunk fully covered by saved chunks is dropped; one partly covered
        (the chunk size changed between the interrupted run and its resumption) is cut
        to the ranges still missing, so the keys returned may be sub-ranges of those
        asked for.  Order follows ``chunks``.
        """
        raise NotImplementedError

    def save(self, key: ChunkKey, result: ChunkResult,
             reported: Mapping[str, np.ndarray]) -> None:
        """Store one finished chunk durably (temporary name, fsync, rename).

        Parameters
        ----------
        key : (variant index, first, end); ``result.members`` must be ``first .. end-1``.
        result : the chunk's trajectories and diagnostics.
        reported : ``Design.reported`` of the chunk: name -> (M,) or (n_groups, M); every
            name in ``layout.parameters`` must be present (others are ignored).

        Raises
        ------
        ValueError : shapes or members do not match the key and layout.
        StoreWriteError : the chunk could not be written (nothing half-written stays).
        """
        raise NotImplementedError

    def load(self, key: ChunkKey) -> tuple[ChunkResult, dict[str, np.ndarray]]:
        """Read a saved chunk back as (result, reported), e.g. to copy it to another
        store."""
        raise NotImplementedError

    # ------------------------------------------------------------------ finishing

    def finish(self) -> Path:
        """Write the result file and remove the work in progress.

        Every member of every variant must be saved.  Per-member metrics come from the
        chunks; quantiles over members (numpy's default, linear, definition; members with
        the non-finite or invalid-start bits left out) are computed in blocks of times of
        at most ``block_bytes``.  The netCDF-4 file is written to a temporary name in the
        destination directory, fsynced and renamed to ``path`` with :func:`os.replace`;
        then ``<path>.partial`` is removed.  With ``output.members`` false the file leaves
        out ``state`` and ``flow_count``.

        Raises
        ------
        IncompleteWork : members are missing (the message names the ranges).
        StoreWriteError : the file could not be written; the chunks are kept.
        """
        raise NotImplementedError
