"""The brackets of the quantiles of one run's trajectory variables, variant by variant:
from the pilot (the first members, kept whole), then refined from the candidates of the
first few pilots' worth of members (:mod:`.selection` for the method).

Brackets are a function of saved members alone, so whoever derives them first stores
them in the work directory (written aside, synced, and linked into place, so the first
copy wins) and every task, thread and process reads them from there.  Each
:class:`BracketCache` keeps what it has read; a copy sent to another task starts empty
and reads the directory again.  One derivation at a time runs, whatever the process (a
lock on a file of the work directory): the pilot's brackets are awaited, the refinement
is skipped while another runs.
"""

from __future__ import annotations

import errno
import fcntl
import functools
import os
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from ensemble.durable import fsync_directory, temporary_beside, write_durably
from ensemble.errors import StoreWriteError
from ensemble.output import selection
from ensemble.output.candidates import (candidate_parts, cells_per_block, reusable,
                                        summed_counts)
from ensemble.output.layout import ResultLayout
from ensemble.output.quantiles import in_summary
from ensemble.output.selection import PILOT_MEMBER_COUNT, Brackets, merged_brackets
from ensemble.output.sources import MemberSource
from ensemble.output.measures import trajectory_variables
from ensemble.output.variables import TrajectoryVariable
from ensemble.records import ChunkKey

PILOT_BYTES = 512 * 2**20
"""Largest size of a pilot's trajectories (:meth:`BracketCache.pilot_member_count`)."""

SMALLEST_PILOT = 1024
"""Fewest pilot members worth deriving brackets from; below it every member is kept whole
(with fewer, the brackets would be too wide to save much; common practice, no source)."""

REFINE_PILOTS = 4
"""The refined brackets come from the first ``REFINE_PILOTS`` pilots' worth of members at
least (:meth:`BracketCache.refining_member_count`): half as wide as the pilot's."""

REFINE_SHARE = 20
"""A large ensemble's refined brackets come from about ``1 / REFINE_SHARE`` of its members
(up to :data:`MOST_REFINE_PILOTS` pilots' worth): brackets from S members are about
1 / sqrt(S) wide, so the many chunks after them keep fewer candidates, while the chunks
before them keep the pilot's wider share.  With a twentieth, the work directory of a
million members of a 16-group model over a year comes to about 60 GB against 115 GB with
four pilots (estimated from the chunks of a 30,000-member run; an estimate, not a
measurement)."""

MOST_REFINE_PILOTS = 32
"""Most pilots' worth of members the refined brackets come from: their derivation, in
one task, holds the counts of every chunk among them."""

PILOT_BLOCK_BYTES = 16 * 2**20
"""Pilot values sorted at once when brackets are derived."""

LOADED_BRACKETS = 32
"""Bracket files a process keeps read (:func:`_load_brackets`): two kinds for each of
up to 16 variants at once."""

FILE_PREFIX = {"pilot": "pilot-brackets-", "refined": "refined-brackets-"}
"""Files ``<prefix>v<variant>.npz`` of the work directory holding each kind of brackets."""

LOCK_FILE = "brackets.lock"
"""File of the work directory locked while brackets are derived."""

Kind = str
"""``"pilot"`` or ``"refined"``."""


class BracketCache:
    """The brackets of one run, read from (or derived into) its work directory.

    Parameters
    ----------
    layout : the result's layout.
    source : the saved chunks of the run.
    directory : the work directory, where the brackets are stored.
    block_bytes : memory for the candidates of one block of cells when refining.
    """

    def __init__(self, layout: ResultLayout, source: MemberSource, directory: Path,
                 block_bytes: int):
        self.layout = layout
        self.source = source
        self.directory = directory
        self.block_bytes = block_bytes
        self._known: dict[tuple[Kind, int], dict[str, Brackets]] = {}
        self._unrefined: set[int] = set()

    def __getstate__(self) -> dict[str, object]:
        """A copy for another task keeps no brackets: it reads the directory."""
        return {**self.__dict__, "_known": {}, "_unrefined": set()}

    def pilot_member_count(self) -> int:
        """Members at the start of each variant whose trajectories are kept whole and
        give the brackets; the members after them may be saved as candidates only.

        :data:`PILOT_MEMBER_COUNT`, or fewer for a large model, so that the pilot's
        trajectories take at most :data:`PILOT_BYTES` (a smaller pilot gives wider
        brackets, so more candidates, never other quantiles).  0 (every member kept
        whole) when the result holds the members' trajectories, when such a pilot would
        hold fewer than :data:`SMALLEST_PILOT` members, or when the ensemble is too small
        to gain."""
        layout = self.layout
        cells = sum(layout.cell_count(variable) for variable in trajectory_variables(layout))
        pilot = min(PILOT_MEMBER_COUNT, PILOT_BYTES // max(8 * cells, 1))
        if (layout.keep_members or pilot < min(SMALLEST_PILOT, PILOT_MEMBER_COUNT)
                or layout.member_count < 4 * pilot):
            return 0
        return pilot

    def refining_member_count(self) -> int:
        """Members at the start of each variant whose candidates give refined brackets
        (:data:`REFINE_PILOTS` pilots' worth, half as wide as the pilot's, or for a large
        ensemble about a :data:`REFINE_SHARE`-th of its members, narrower still); the
        chunks that start after them are cut with those.  0 (the pilot's brackets throughout) without a pilot or when the ensemble
        is too small to gain."""
        pilot = self.pilot_member_count()
        pilots = max(REFINE_PILOTS, min(MOST_REFINE_PILOTS, self.layout.member_count
                                        // (REFINE_SHARE * max(pilot, 1))))
        refine = pilots * pilot
        return refine if refine and self.layout.member_count >= 2 * refine else 0

    def pilot(self, variant: int) -> dict[str, Brackets] | None:
        """The brackets of each trajectory variable of ``variant`` from its pilot (the
        included members); None while a pilot member is not saved, or without a pilot."""
        known = self._read("pilot", variant)
        if known is not None:
            return known
        pilot = self.pilot_member_count()
        if not pilot or not self.source.covers(variant, pilot):
            return None
        with self._exclusive(wait=True):
            if self._read("pilot", variant) is None:
                self._store("pilot", variant, {
                    variable.name: self._pilot_brackets(variable, variant, pilot)
                    for variable in trajectory_variables(self.layout)})
        return self._read("pilot", variant)

    def refined(self, variant: int) -> dict[str, Brackets] | None:
        """The refined brackets of ``variant`` if they are stored."""
        return self._read("refined", variant)

    def cutting(self, key: ChunkKey) -> dict[str, Brackets] | None:
        """The brackets to cut chunk ``key`` with: None (keep it whole) in its variant's
        pilot or while the pilot is not saved; the refined brackets past
        :meth:`refining_member_count` once they are stored or can be derived without waiting
        (the first members all saved, no other derivation running); else the pilot's."""
        variant, first, _ = key
        pilot = self.pilot_member_count()
        if not 0 < pilot <= first:
            return None
        coarse = self.pilot(variant)
        refine = self.refining_member_count()
        if coarse is None or not 0 < refine <= first:
            return coarse
        known = self.refined(variant)
        if known is not None or variant in self._unrefined or not self.source.covers(
                variant, refine):
            return known or coarse
        with self._exclusive(wait=False) as acquired:
            if acquired and self.refined(variant) is None:
                self._derive_refined(variant, refine, coarse)
        return self.refined(variant) or coarse

    # ------------------------------------------------------------------ deriving

    def _included(self, key: ChunkKey) -> np.ndarray:
        """The members of chunk ``key`` behind the quantiles."""
        return in_summary(self.source.member_arrays(key)["status"])

    def _pilot_brackets(self, variable: TrajectoryVariable, variant: int,
                        pilot: int) -> Brackets:
        """The brackets of ``variable`` from the saved pilot of ``variant``, cells in
        blocks of about :data:`PILOT_BLOCK_BYTES` (excluded members' values are read as
        NaN, which the brackets ignore)."""
        keys = [key for key in self.source.saved() if key[0] == variant and key[1] < pilot]
        included = {key: self._included(key) for key in keys}
        cells = self.layout.cell_count(variable)
        step = max(1, PILOT_BLOCK_BYTES // (8 * pilot))
        workspace = threading.local()
        pieces = []
        for first in range(0, cells, step):
            stop = min(first + step, cells)
            block = reusable(workspace, "pilot", (stop - first, pilot))
            for key in keys:
                span = slice(key[1], min(key[2], pilot))
                stored = self.source.read_cells(
                    key, variable.name, first,
                    reusable(workspace, "chunk", (stop - first, key[2] - key[1])))
                block[:, span] = stored[:, :span.stop - span.start]
                block[:, span][:, ~included[key][:span.stop - span.start]] = np.nan
            pieces.append(selection.pilot_ranges(block, self.layout.scenario.output.quantiles))
        return merged_brackets(np.concatenate([low for low, _ in pieces]),
                               np.concatenate([high for _, high in pieces]))

    def _derive_refined(self, variant: int, refine: int, coarse: dict[str, Brackets]
                        ) -> None:
        """Derive ``variant``'s refined brackets from its chunks that start before member
        ``refine`` and store them; a variant whose first members include a chunk cut
        with other brackets (not expected) keeps the pilot's."""
        keys = [key for key in self.source.saved() if key[0] == variant and key[1] < refine]
        usable = {None, *(brackets.digest() for brackets in coarse.values())}
        if any(self.source.cut_with(key, name) not in usable
               for key in keys for name in self._names()):
            self._unrefined.add(variant)
            return
        included = np.zeros(self.layout.member_count, bool)
        for key in keys:
            included[key[1]:key[2]] = self._included(key)
        count = int(included.sum())
        workspace = threading.local()
        refined = {}
        for variable in trajectory_variables(self.layout):
            brackets = coarse[variable.name]
            parts, read = candidate_parts(self.source, variable.name, keys, included,
                                          brackets, brackets,
                                          self.layout.cell_count(variable), workspace)
            below, nans, inside = summed_counts(parts, brackets.lower.shape[1])
            refined[variable.name] = selection.refined_brackets(
                parts, count, nans, below, inside, brackets,
                self.layout.scenario.output.quantiles,
                cells_per_block(inside, self.block_bytes), None, read)
        self._store("refined", variant, refined)

    # ------------------------------------------------------------------ the directory

    def _names(self) -> tuple[str, ...]:
        """Names of the trajectory variables with brackets."""
        return tuple(variable.name for variable in trajectory_variables(self.layout))

    def _path(self, kind: Kind, variant: int) -> Path:
        return self.directory / f"{FILE_PREFIX[kind]}v{variant}.npz"

    def _read(self, kind: Kind, variant: int) -> dict[str, Brackets] | None:
        """The stored brackets of this kind, or None."""
        if (kind, variant) not in self._known:
            path = self._path(kind, variant)
            try:
                found = os.stat(path)
            except FileNotFoundError:
                return None
            self._known[kind, variant] = _load_brackets(
                str(path), (found.st_dev, found.st_ino, found.st_mtime_ns, found.st_size),
                self._names())
        return self._known[kind, variant]

    def _store(self, kind: Kind, variant: int, brackets: dict[str, Brackets]) -> None:
        """Write the brackets aside, sync them and link them into place; the first copy
        stored wins (chunks cut with it record its digest)."""
        arrays = {}
        for name, found in brackets.items():
            arrays[f"{name}_lower"], arrays[f"{name}_upper"] = found.lower, found.upper
        final = self._path(kind, variant)
        try:
            with temporary_beside(final) as temporary:
                write_durably(temporary, lambda handle: np.savez(handle, **arrays))
                try:
                    os.link(temporary, final)
                    fsync_directory(self.directory)
                except FileExistsError:
                    pass                # another task stored them first
        except OSError as error:
            raise StoreWriteError.from_os_error(error, final) from error

    @contextmanager
    def _exclusive(self, wait: bool) -> Iterator[bool]:
        """Hold the derivation lock while in the body, which receives whether it holds it
        (without ``wait``, not while another task holds it).  Where the file system
        cannot lock, the body runs anyway: the link of :meth:`_store` still keeps the
        first copy.  Closing the file releases the lock."""
        with open(self.directory / LOCK_FILE, "a") as handle:
            try:
                fcntl.flock(handle, fcntl.LOCK_EX | (0 if wait else fcntl.LOCK_NB))
                held = True
            except BlockingIOError:
                held = False
            except OSError as error:
                if error.errno != errno.ENOLCK:
                    raise
                held = True
            yield held


@functools.lru_cache(maxsize=LOADED_BRACKETS)
def _load_brackets(path: str, identity: tuple[int, int, int, int],
                   names: tuple[str, ...]) -> dict[str, Brackets]:
    """The brackets stored in the file ``path``, read once per process for each
    ``identity`` (device, inode, modification time and size: a file replaced by a new
    run of the same work directory is read again).

    Every task of a run carries its own copy of the run's :class:`BracketCache`, and
    dask keeps the messages of recent tasks for its logs, so per-copy arrays would add
    up to gigabytes over a large run (measured: 2.5 GB over 100,000 members of a
    16-group model); the copies of one process share these instead, and only read them."""
    del identity    # part of the cache's key only
    with np.load(path) as stored:
        return {name: Brackets(stored[f"{name}_lower"], stored[f"{name}_upper"])
                for name in names}
