"""The streaming store: finished chunks on disk as they complete, then one atomic
result file.

Work in progress lives in the directory ``<path>.partial``::

    <path>.partial/
        manifest.json              fingerprint and shape of the run (written first)
        driver-marker              token of the running driver (:meth:`WorkStore.mark`)
        durable-chunks             names of the chunks known to be on stable storage
        chunk-v0-0000000000-0000000500/
                                   one directory per saved chunk of members
            state.npy              (n_reports, n_states, M) float64, time-major
            flow_count.npy         (n_reports, n_flow_elements, M) float64
            members.npz            step_error, observed_order, status, param_<name>,
                                   and the per-member metrics of :mod:`.summary`
            boot                   the boot of the operating system that wrote it

A chunk is written under a temporary name and renamed into place when complete, so a
process killed at any instant leaves either the whole chunk or none of it (a stray
temporary is removed on resume).  Chunks are not fsynced one by one: a killed process
loses nothing the operating system has accepted, and syncing every chunk would make the
disk, not the cores, set the pace of a run (4 GB for 200,000 SEIR members over a year).
Only a crash of the operating system itself can lose written data, so a chunk is trusted
on resume when it was written in the current boot (``boot``) or was later made durable
(:meth:`WorkStore.make_durable`, which the run engine calls every minute and which lists
the chunk in ``durable-chunks``); any other chunk is recomputed.

The result file is written under a temporary name in its destination directory, fsynced
and renamed into place when complete.  Trajectories are stored time-major so that the
quantiles over members are computed block of times by block of times, reading every
chunk file once, whatever the number of members.
"""

from __future__ import annotations

import errno
import json
import os
import math
import shutil
import socket
import threading
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import BinaryIO

import netCDF4
import numpy as np
import psutil

from ensemble.errors import (FingerprintMismatch, IncompleteWork, NotAResult, ResultExists,
                             StoreWriteError)
from ensemble.records import ChunkKey, ChunkResult
from ensemble.output.layout import STREAMED, ParameterInfo, ResultLayout
from ensemble.output.selection import (PILOT_MEMBERS, Brackets, Candidates,
                                       chunk_candidates, merged_brackets, pilot_ranges,
                                       recut, refined_brackets, select)
from ensemble.output.metrics import member_metrics, summary_quantiles
from ensemble.output.quantiles import in_summary, quantiles

__all__ = ["ParameterInfo", "ResultLayout", "WorkStore", "partial_path", "result_fingerprint"]

"""(variant index, first member, end member): members ``first .. end - 1`` of a variant."""

MANIFEST = "manifest.json"
MARKER = "driver-marker"
"""File in the work directory holding a token of the running driver: a process that reads
the same token back sees the same directory, and may save chunks there itself."""
CHUNK_PREFIX = "chunk-"
TEMP_PREFIX = ".tmp-"
MEMBER_FILE = "members.npz"
BOOT_FILE = "boot"
"""File in each chunk directory naming the boot of the system that wrote it."""
CANDIDATE_PARTS = ("below", "nans", "offsets", "values")
"""Files ``<name>-<part>.npy`` of a chunk kept as candidates (:class:`Candidates`)."""
JOURNAL = "durable-chunks"
"""File in the work directory listing, a name a line, the chunks made durable."""
DEFAULT_BLOCK_BYTES = 128 * 2**20
"""Memory for one block of trajectories gathered over all members in :meth:`finish`."""
FINISH_THREADS = min(4, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                     else os.cpu_count() or 1)
"""Blocks of trajectories reduced to quantiles at once in :meth:`finish`: one per core
(the run's workers are done by then), at most 4 so that memory stays within a few
blocks."""


_derived_brackets: dict[tuple[str, str, int], dict[str, Brackets]] = {}
"""Brackets derived in this process, by (work directory, fingerprint, variant): tasks work
on copies of the store, and a saved pilot gives the same brackets every time."""

_unrefined: set[tuple[str, str, int, str]] = set()
"""Variants (keys as in :data:`_derived_brackets`) whose first members include a chunk cut
with brackets other than the pilot's (not expected): they keep the pilot's brackets."""

_deriving = threading.Lock()
"""Held while a thread derives brackets: the others wait for its result rather than
derive the same again."""

_saving = threading.local()
"""Each thread's buffers for saving chunks, reused from chunk to chunk."""


def partial_path(path: str | os.PathLike[str]) -> Path:
    """The work-in-progress directory of result ``path``."""
    return Path(f"{os.fspath(path)}.partial")


class WorkStore:
    """Finished chunks of one run on disk, and the result file made from them.

    Use :meth:`open`, then :meth:`pending` to learn what is left, :meth:`save` for each
    finished chunk (in any order, from any process that sees the work directory: see
    :meth:`mark`), and :meth:`finish`.
    """

    def __init__(self, path: Path, layout: ResultLayout, *,
                 block_bytes: int = DEFAULT_BLOCK_BYTES):
        self.path = path
        self.layout = layout
        self.work = partial_path(path)
        self.block_bytes = block_bytes
        self.block_count = 0
        """Blocks of trajectories gathered by :meth:`finish` (for tests and tuning)."""
        self.largest_block_bytes = 0
        """Size of the largest of those blocks."""

    # ------------------------------------------------------------------ opening

    @staticmethod
    def is_complete(path: str | os.PathLike[str], fingerprint: str) -> bool:
        """True when ``path`` is a complete result file with this ``fingerprint`` (a
        resumed run then has nothing to do)."""
        try:
            return result_fingerprint(path) == fingerprint
        except NotAResult:
            return False

    @classmethod
    def open(cls, path: str | os.PathLike[str], layout: ResultLayout, *, resume: bool,
             force: bool, block_bytes: int = DEFAULT_BLOCK_BYTES) -> WorkStore:
        """Open the work in progress of result ``path``.

        Parameters
        ----------
        path : the final result file; work in progress goes to ``<path>.partial``.
            Missing parent directories are created.
        layout : the result's layout; its fingerprint is recorded in the manifest.
        resume : keep the chunks of an existing ``.partial`` (whose fingerprint must
            equal ``layout.fingerprint``) and remove stray temporaries; without it, an
            existing ``.partial`` is discarded.  A ``.partial`` without a readable
            manifest is started afresh either way.
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
        path = Path(path)
        if path.exists() and not force:
            raise ResultExists(str(path), "", None, "already exists",
                               "use --force to replace it")
        store = cls(path, layout, block_bytes=block_bytes)
        try:
            store._prepare(resume)
        except OSError as error:
            raise StoreWriteError(_describe(error, store.work)) from error
        return store

    def _prepare(self, resume: bool) -> None:
        """Adopt or create the work directory (see :meth:`open`)."""
        if self.work.exists() and not self.work.is_dir():
            raise StoreWriteError(f"{self.work} exists and is not a work directory")
        strays = [*self.path.parent.glob(f"{TEMP_PREFIX}{self.path.name}-*"),
                  *self.path.parent.glob(f"{TEMP_PREFIX}{self.work.name}-*")]
        for stray in strays:
            # a result file or work directory of a killed run, never renamed into place
            if stray.is_dir():
                shutil.rmtree(stray, ignore_errors=True)
            else:
                stray.unlink(missing_ok=True)
        manifest = self._read_manifest()
        if resume and manifest is not None:
            if manifest.get("fingerprint") != self.layout.fingerprint:
                raise FingerprintMismatch(
                    str(self.work), "", None,
                    "holds work of a different scenario or settings (fingerprint "
                    f"{str(manifest.get('fingerprint'))[:12]}..., this run "
                    f"{self.layout.fingerprint[:12]}...)",
                    "run without --resume to start afresh")
            for stray in self.work.glob(f"{TEMP_PREFIX}*"):
                shutil.rmtree(stray, ignore_errors=True)
            self._drop_untrusted_chunks()
            return
        if self.work.exists():
            shutil.rmtree(self.work)
        self.work.parent.mkdir(parents=True, exist_ok=True)
        temporary = self.work.parent / f"{TEMP_PREFIX}{self.work.name}-{os.getpid()}"
        shutil.rmtree(temporary, ignore_errors=True)
        temporary.mkdir()
        text = json.dumps(self._manifest(), indent=1).encode()
        _write_durably(temporary / MANIFEST, lambda f: f.write(text))
        _fsync_directory(temporary)
        os.rename(temporary, self.work)
        _fsync_directory(self.work.parent)

    def _manifest(self) -> dict[str, object]:
        layout = self.layout
        return {"format": 1, "fingerprint": layout.fingerprint,
                "variants": list(layout.variants), "members": layout.members,
                "n_states": layout.n_states, "n_flow_elements": layout.n_flow_elements,
                "n_reports": layout.n_reports, "parameters": list(layout.parameters)}

    def _drop_untrusted_chunks(self) -> None:
        """Remove the chunks that a crash of the operating system may have left
        incomplete: those neither written in this boot nor listed as durable."""
        durable = set(self._journal())
        current = boot_identity()
        for directory in self.work.glob(f"{CHUNK_PREFIX}v*"):
            if directory.name in durable:
                continue
            try:
                written_in = (directory / BOOT_FILE).read_text()
            except OSError:
                written_in = None
            if written_in != current:
                shutil.rmtree(directory, ignore_errors=True)

    def _journal(self) -> list[str]:
        """Names of the chunk directories made durable."""
        try:
            return (self.work / JOURNAL).read_text().split()
        except OSError:
            return []

    def _read_manifest(self) -> dict[str, object] | None:
        try:
            manifest = json.loads((self.work / MANIFEST).read_text())
        except (OSError, ValueError):
            return None
        return manifest if isinstance(manifest, dict) else None

    # ------------------------------------------------------------------ sharing

    def mark(self) -> str:
        """Write a fresh token to the work directory's marker file and return it.

        A process (a dask worker on another host) that finds the same token with
        :meth:`shares_directory` sees this work directory, so it may :meth:`save` chunks
        into it itself instead of sending them to the driver.
        """
        token = os.urandom(16).hex()
        temporary = self.work / f"{TEMP_PREFIX}{MARKER}-{os.getpid()}"
        try:
            temporary.write_text(token)
            os.replace(temporary, self.work / MARKER)
        except OSError as error:
            raise StoreWriteError(_describe(error, self.work)) from error
        return token

    def shares_directory(self, token: str) -> bool:
        """True when this process reads ``token`` (from :meth:`mark`) in the marker file."""
        try:
            return (self.work / MARKER).read_text() == token
        except OSError:
            return False

    # ------------------------------------------------------------------ chunks

    def _chunk_directory(self, key: ChunkKey) -> Path:
        variant, first, end = key
        return self.work / f"{CHUNK_PREFIX}v{variant}-{first:010d}-{end:010d}"

    def saved(self) -> list[ChunkKey]:
        """Keys of the chunks on disk, sorted."""
        keys = []
        for entry in self.work.glob(f"{CHUNK_PREFIX}v*"):
            variant, first, end = entry.name.removeprefix(f"{CHUNK_PREFIX}v").split("-")
            keys.append((int(variant), int(first), int(end)))
        return sorted(keys)

    def _covered(self) -> dict[int, list[tuple[int, int]]]:
        """Per variant, the merged member ranges already saved."""
        ranges: dict[int, list[tuple[int, int]]] = {}
        for variant, first, end in self.saved():
            ranges.setdefault(variant, []).append((first, end))
        return {variant: _merge(spans) for variant, spans in ranges.items()}

    def pending(self, chunks: Sequence[ChunkKey]) -> list[ChunkKey]:
        """The member ranges of ``chunks`` not yet saved.

        A requested chunk fully covered by saved chunks is dropped; one partly covered
        (the chunk size changed between the interrupted run and its resumption) is cut
        to the ranges still missing, so the keys returned may be sub-ranges of those
        asked for.  Order follows ``chunks``.
        """
        covered = self._covered()
        missing: list[ChunkKey] = []
        for variant, first, end in chunks:
            cursor = first
            for start, stop in covered.get(variant, []):
                if stop <= cursor:
                    continue
                if start >= end:
                    break
                if start > cursor:
                    missing.append((variant, cursor, start))
                cursor = max(cursor, stop)
            if cursor < end:
                missing.append((variant, cursor, end))
        return missing

    def _check_key(self, key: ChunkKey) -> int:
        """Validate ``key`` against the layout and the saved chunks; its member count."""
        variant, first, end = key
        if not (0 <= variant < len(self.layout.variants) and 0 <= first < end
                <= self.layout.members):
            raise ValueError(f"chunk {key} is outside {len(self.layout.variants)} variants "
                             f"x {self.layout.members} members")
        for other in self.saved():
            if other != key and other[0] == variant and other[1] < end and first < other[2]:
                raise ValueError(f"chunk {key} overlaps the saved chunk {other}")
        return end - first

    def save(self, key: ChunkKey, result: ChunkResult,
             reported: Mapping[str, np.ndarray], candidates: bool = False) -> None:
        """Store one finished chunk (temporary name, then rename; see the module's note on
        durability and :meth:`make_durable`).

        Saving the same key again replaces the chunk.  Processes may save different
        keys at once; when two save the same key at once (a task rerun while its first
        worker was still alive), one copy is kept: a chunk's bits depend on its key only.

        Parameters
        ----------
        key : (variant index, first, end); ``result.members`` must be ``first .. end-1``.
        result : the chunk's trajectories and diagnostics.
        reported : ``Design.reported`` of the chunk: name -> (M,) or (n_groups, M); every
            name in ``layout.parameters`` must be present (others are ignored).
        candidates : keep of each trajectory only the candidates for the quantiles
            (:mod:`.selection`) when the chunk is past its variant's pilot and the pilot is
            saved (:meth:`brackets`); otherwise, and by default, every value.

        Raises
        ------
        ValueError : shapes or members do not match the key and layout, or the key
            overlaps a different saved chunk.
        StoreWriteError : the chunk could not be written (nothing half-written stays).
        """
        layout = self.layout
        count = self._check_key(key)
        brackets = self._cutting_brackets(key) if candidates else None
        if not np.array_equal(result.members, np.arange(key[1], key[2])):
            raise ValueError(f"chunk {key} holds members {result.members[:3]}...")
        expected = {"state": (count, layout.n_states, layout.n_reports),
                    "flow_count": (count, layout.n_flow_elements, layout.n_reports),
                    "step_error": (count,), "observed_order": (count,), "status": (count,)}
        for name, shape in expected.items():
            if getattr(result, name).shape != shape:
                raise ValueError(f"chunk {key}: {name} has shape "
                                 f"{getattr(result, name).shape}, expected {shape}")
        per_member = {"step_error": result.step_error, "observed_order": result.observed_order,
                      "status": result.status.astype(np.uint8)}
        for name in layout.parameters:
            if name not in reported:
                raise ValueError(f"chunk {key}: parameter {name!r} is not reported")
            values = np.asarray(reported[name], dtype=np.float64)
            shape = ((layout.n_groups, count) if layout.parameters[name].shape == "vector"
                     and layout.groups else (count,))
            if values.shape != shape:
                raise ValueError(f"chunk {key}: parameter {name!r} has shape "
                                 f"{values.shape}, expected {shape}")
            per_member[f"param_{name}"] = values.T if values.ndim == 2 else values
        per_member.update(member_metrics(result.state, result.flow_count, layout.times))
        final = self._chunk_directory(key)
        temporary = self.work / f"{TEMP_PREFIX}{final.name}-{os.getpid()}"
        try:
            shutil.rmtree(temporary, ignore_errors=True)
            temporary.mkdir()
            for name in STREAMED:
                time_major = np.ascontiguousarray(getattr(result, name).transpose(2, 1, 0))
                if brackets is None:
                    _write_npy(temporary / f"{name}.npy", time_major)
                    continue
                kept = chunk_candidates(time_major.reshape(-1, count),
                                        in_summary(result.status), brackets[name],
                                        _reusable(_saving, "kept", (time_major.size + 1,)))
                for part in CANDIDATE_PARTS:
                    _write_npy(temporary / f"{name}-{part}.npy", getattr(kept, part))
                (temporary / f"{name}-brackets").write_text(brackets[name].digest())
            np.savez(temporary / MEMBER_FILE, **per_member)
            (temporary / BOOT_FILE).write_text(boot_identity())
            if final.exists():
                shutil.rmtree(final)
            try:
                os.rename(temporary, final)
            except OSError as error:
                if error.errno not in (errno.EEXIST, errno.ENOTEMPTY):
                    raise
                shutil.rmtree(temporary)    # another process saved this key meanwhile
        except OSError as error:
            shutil.rmtree(temporary, ignore_errors=True)
            raise StoreWriteError(_describe(error, self.work)) from error

    def pilot_members(self) -> int:
        """Members at the start of each variant whose trajectories are kept whole and
        give the brackets of the quantiles (:mod:`.selection`); the members after them
        may be saved as candidates only.  0 (every member kept whole) when the result
        holds the members' trajectories, when the ensemble is too small to gain, or when
        the pilot's trajectories would take more than :data:`PILOT_BYTES`."""
        layout = self.layout
        cells = (layout.n_states + layout.n_flow_elements) * layout.n_reports
        if (layout.scenario.output.members or layout.members < 4 * PILOT_MEMBERS
                or cells * PILOT_MEMBERS * 8 > PILOT_BYTES):
            return 0
        return PILOT_MEMBERS

    def brackets(self, variant: int) -> dict[str, Brackets] | None:
        """The brackets of each trajectory's quantiles for ``variant``, from its pilot
        members (the included ones); None while a pilot member is not saved, or without
        a pilot.  The same saved pilot gives the same brackets, so every process that
        saves chunks into this directory derives them once (:data:`_derived_brackets`)."""
        known = (str(self.work.resolve()), self.layout.fingerprint, variant)
        if known in _derived_brackets:
            return _derived_brackets[known]
        pilot = self.pilot_members()
        if not pilot or self.pending([(variant, 0, pilot)]):
            return None
        with _deriving:
            if known not in _derived_brackets:
                _derived_brackets[known] = {name: self._pilot_brackets(name, variant, pilot)
                                            for name in STREAMED}
        return _derived_brackets[known]

    def refine_members(self) -> int:
        """Members at the start of each variant whose candidates give refined brackets
        (:func:`.selection.refined_brackets`, half as wide as the pilot's); the chunks
        that start after them are cut with those.  0 (the pilot's brackets throughout)
        without a pilot or when the ensemble is too small to gain."""
        refine = REFINE_PILOTS * self.pilot_members()
        return refine if refine and self.layout.members >= 2 * refine else 0

    def _refined_path(self, variant: int) -> Path:
        return self.work / f"{REFINED_PREFIX}v{variant}.npz"

    def _refined_key(self, variant: int) -> tuple[str, str, int, str]:
        return (str(self.work.resolve()), self.layout.fingerprint, variant, "refined")

    def refined(self, variant: int) -> dict[str, Brackets] | None:
        """The refined brackets of ``variant`` if they are in the work directory."""
        known = self._refined_key(variant)
        if known not in _derived_brackets:
            try:
                with np.load(self._refined_path(variant)) as stored:
                    _derived_brackets[known] = {
                        name: Brackets(stored[f"{name}_lower"], stored[f"{name}_upper"])
                        for name in STREAMED}
            except FileNotFoundError:
                return None
        return _derived_brackets[known]

    def _cutting_brackets(self, key: ChunkKey) -> dict[str, Brackets] | None:
        """The brackets to cut chunk ``key`` with: None (keep it whole) in its variant's
        pilot or while the pilot is not saved; the refined brackets past
        :meth:`refine_members` once they are known or can be derived without waiting
        (the first members all saved, no other thread deriving); else the pilot's."""
        variant, first, _ = key
        pilot = self.pilot_members()
        if not 0 < pilot <= first:
            return None
        coarse = self.brackets(variant)
        refine = self.refine_members()
        if coarse is None or not 0 < refine <= first:
            return coarse
        known = self.refined(variant)
        if known is not None:
            return known
        if (self._refined_key(variant) in _unrefined or self.pending([(variant, 0, refine)])
                or not _deriving.acquire(blocking=False)):
            return coarse
        try:
            if self.refined(variant) is None:
                self._derive_refined(variant, refine, coarse)
        finally:
            _deriving.release()
        return self.refined(variant) or coarse

    def _derive_refined(self, variant: int, refine: int, coarse: dict[str, Brackets]
                        ) -> None:
        """Derive ``variant``'s refined brackets from its chunks that start before member
        ``refine`` and store them in the work directory (synced, written aside and linked
        into place, so that the first process to finish wins and every process uses the
        same brackets, also after a resume or a crash of the machine)."""
        keys = [key for key in self.saved() if key[0] == variant and key[1] < refine]
        usable = {None, *(brackets.digest() for brackets in coarse.values())}
        if any((None if self._kept_whole(key) else
                (self._chunk_directory(key) / f"{name}-brackets").read_text()) not in usable
               for key in keys for name in STREAMED):
            _unrefined.add(self._refined_key(variant))  # cut with other brackets: keep these
            return
        included = np.zeros(self.layout.members, bool)
        for key in keys:
            included[key[1]:key[2]] = self._included(key)
        count = int(included.sum())
        workspace = threading.local()
        arrays = {}
        for name in STREAMED:
            parts, read = self._candidate_parts(name, keys, included, coarse[name],
                                                coarse[name], workspace, None)
            below, nans, inside = _summed_counts(parts, coarse[name])
            fine = refined_brackets(parts, count, nans, below, inside, coarse[name],
                                    self.layout.scenario.output.quantiles,
                                    self._cells_per_block(inside), None, read)
            arrays[f"{name}_lower"], arrays[f"{name}_upper"] = fine.lower, fine.upper
        final = self._refined_path(variant)
        temporary = self.work / f"{TEMP_PREFIX}{final.name}-{os.getpid()}"
        try:
            _write_durably(temporary, lambda handle: np.savez(handle, **arrays))
            try:
                os.link(temporary, final)
                _fsync_directory(self.work)
            except FileExistsError:
                pass                # another process stored them first
        except OSError as error:
            raise StoreWriteError(_describe(error, self.work)) from error
        finally:
            temporary.unlink(missing_ok=True)

    def _included(self, key: ChunkKey) -> np.ndarray:
        """The members of chunk ``key`` behind the quantiles."""
        with np.load(self._chunk_directory(key) / MEMBER_FILE) as members:
            return in_summary(members["status"])

    def _pilot_brackets(self, name: str, variant: int, pilot: int) -> Brackets:
        """The brackets of trajectory ``name`` from the saved pilot of ``variant``, cells
        in blocks of about :data:`PILOT_BLOCK_BYTES` (excluded members' values are read
        as NaN, which the brackets ignore)."""
        keys = [key for key in self.saved() if key[0] == variant and key[1] < pilot]
        included = {key: self._included(key) for key in keys}
        cells = self._cells(name)
        step = max(1, PILOT_BLOCK_BYTES // (8 * pilot))
        workspace = threading.local()
        pieces = []
        for first in range(0, cells, step):
            stop = min(first + step, cells)
            block = _reusable(workspace, "pilot", (stop - first, pilot))
            for key in keys:
                span = slice(key[1], min(key[2], pilot))
                stored = _read_range(self._chunk_directory(key) / f"{name}.npy",
                                     first * (key[2] - key[1]),
                                     _reusable(workspace, "chunk", (stop - first,
                                                                    key[2] - key[1])))
                block[:, span] = stored[:, :span.stop - span.start]
                block[:, span][:, ~included[key][:span.stop - span.start]] = np.nan
            pieces.append(pilot_ranges(block, self.layout.scenario.output.quantiles))
        return merged_brackets(np.concatenate([low for low, _ in pieces]),
                               np.concatenate([high for _, high in pieces]))

    def make_durable(self, keys: Sequence[ChunkKey]) -> None:
        """Put the saved chunks ``keys`` on stable storage (fsync every file) and list them
        in the journal, so that a resume after a crash of the operating system keeps
        them.  Safe to call from a thread while other chunks are being saved.

        Raises
        ------
        StoreWriteError : a file could not be synced or the journal written.
        """
        names = []
        try:
            for key in keys:
                directory = self._chunk_directory(key)
                for file in directory.iterdir():
                    with open(file, "rb") as handle:
                        os.fsync(handle.fileno())
                _fsync_directory(directory)
                names.append(directory.name)
            _fsync_directory(self.work)
            with open(self.work / JOURNAL, "a") as journal:
                journal.write("".join(f"{name}\n" for name in names))
                journal.flush()
                os.fsync(journal.fileno())
        except OSError as error:
            raise StoreWriteError(_describe(error, self.work)) from error

    def load(self, key: ChunkKey) -> tuple[ChunkResult, dict[str, np.ndarray]]:
        """Read a saved chunk back as (result, reported), e.g. to copy it to another
        store."""
        directory = self._chunk_directory(key)
        if not directory.is_dir():
            raise KeyError(f"chunk {key} is not saved in {self.work}")
        if not self._kept_whole(key):
            raise KeyError(f"chunk {key} keeps candidates for the quantiles only")
        trajectories = {name: np.load(directory / f"{name}.npy").transpose(2, 1, 0)
                        for name in STREAMED}
        with np.load(directory / MEMBER_FILE) as members:
            result = ChunkResult(members=np.arange(key[1], key[2], dtype=np.int64),
                                 step_error=members["step_error"],
                                 observed_order=members["observed_order"],
                                 status=members["status"], **trajectories)
            reported = {name: members[f"param_{name}"].T for name in self.layout.parameters}
        return result, reported

    # ------------------------------------------------------------------ finishing

    def _check_complete(self) -> list[ChunkKey]:
        """The saved keys, after checking that they cover every member of every variant."""
        gaps = []
        for index, variant in enumerate(self.layout.variants):
            holes = self.pending([(index, 0, self.layout.members)])
            gaps.extend(f"members {first}-{end - 1} of variant {variant!r}"
                        for _, first, end in holes)
        if gaps:
            raise IncompleteWork(f"{self.work} is not complete: " + "; ".join(gaps)
                                 + " not saved")
        return self.saved()

    def finish(self, recompute: Callable[[ChunkKey], ChunkResult] | None = None) -> Path:
        """Write the result file and remove the work in progress.

        Every member of every variant must be saved.  Per-member metrics come from the
        chunks; quantiles over members (numpy's default, linear, definition; members with
        the non-finite or invalid-start bits left out) are computed in blocks of at most
        ``block_bytes``, reading each chunk's trajectories once.  The netCDF-4 file is
        written to a temporary name in the destination directory, fsynced and renamed to
        ``path`` with :func:`os.replace`; then ``<path>.partial`` is removed.  With
        ``output.members`` false the file leaves out ``state`` and ``flow_count``.
        Chunks saved as candidates (:meth:`brackets`) give the same quantiles; for the
        rare time and row whose ranks the pilot's brackets missed, ``recompute(key)``
        (the chunk computed again, same bits) supplies the whole trajectories.

        Raises
        ------
        IncompleteWork : members are missing (the message names the ranges).
        StoreWriteError : the file could not be written; the chunks are kept.
        """
        keys = self._check_complete()
        temporary = self.path.parent / f"{TEMP_PREFIX}{self.path.name}-{os.getpid()}"
        try:
            self._write_result(keys, temporary, recompute)
            os.replace(temporary, self.path)
            _fsync_directory(self.path.parent)
        except OSError as error:
            temporary.unlink(missing_ok=True)
            raise StoreWriteError(_describe(error, self.path)) from error
        except RuntimeError as error:       # the netCDF library's write errors
            temporary.unlink(missing_ok=True)
            free = shutil.disk_usage(self.path.parent).free / 2**20
            raise StoreWriteError(
                f"cannot write {self.path}: {error} ({free:.0f} MiB free in "
                f"{self.path.parent}; finished chunks are kept in {self.work} for "
                "--resume)") from error
        except BaseException:
            temporary.unlink(missing_ok=True)
            raise
        # the result is complete; a leftover work directory is only clutter
        shutil.rmtree(self.work, ignore_errors=True)
        return self.path

    def _write_result(self, keys: list[ChunkKey], target: Path,
                      recompute: Callable[[ChunkKey], ChunkResult] | None) -> None:
        """Write the complete result file to ``target`` and fsync it."""
        from ensemble.output.dataset import (append_variables, build_dataset,  # xarray
                                             encoding)                         # here only

        layout = self.layout
        variables = self._gather_members(keys)
        status = variables["status"]
        included = in_summary(status)
        variables.update(summary_quantiles(variables, status,
                                           layout.scenario.output.quantiles,
                                           layout.compare_index))
        dataset = build_dataset(layout, variables)
        del variables
        # the file is written (netCDF releases the interpreter lock while it compresses)
        # while the trajectories' quantiles are selected, then they are added to it
        with ThreadPoolExecutor(1, "ensemble-result-writer") as writer:
            written = writer.submit(dataset.to_netcdf, target, format="NETCDF4",
                                    engine="netcdf4", encoding=encoding(layout, dataset))
            trajectory_quantiles = self._trajectory_quantiles(keys, included, recompute)
            written.result()
        dataset.close()
        append_variables(target, layout, trajectory_quantiles)
        if layout.scenario.output.members:
            self._stream_trajectories(keys, target)
        with open(target, "rb") as handle:
            os.fsync(handle.fileno())

    def _gather_members(self, keys: list[ChunkKey]) -> dict[str, np.ndarray]:
        """Every per-member array of every chunk, as (variant, member, ...) arrays."""
        layout = self.layout
        gathered: dict[str, np.ndarray] = {}
        for key in keys:
            variant, first, end = key
            with np.load(self._chunk_directory(key) / MEMBER_FILE) as members:
                for name in members.files:
                    values = members[name]
                    if name not in gathered:
                        gathered[name] = np.empty(
                            (len(layout.variants), layout.members, *values.shape[1:]),
                            dtype=values.dtype)
                    gathered[name][variant, first:end] = values
        return gathered

    def _trajectory_quantiles(self, keys: list[ChunkKey], included: np.ndarray,
                              recompute: Callable[[ChunkKey], ChunkResult] | None = None
                              ) -> dict[str, np.ndarray]:
        """``<name>_quantile`` of each trajectory ``name``: (variant, quantile, rows,
        time) quantiles over the included members, gathered in blocks of times (and
        rows) of at most ``block_bytes``; each chunk file is read once.

        Blocks are independent, so :data:`FINISH_THREADS` threads gather and reduce one
        each at a time (numpy's sort, most of the work, releases the GIL); each thread
        reuses its buffers from block to block, so memory stays within about
        ``FINISH_THREADS * block_bytes`` and is touched once, not once a block.
        """
        layout = self.layout
        probabilities = layout.scenario.output.quantiles
        rows = {"state": layout.n_states, "flow_count": layout.n_flow_elements}
        results = {name: np.empty((len(layout.variants), len(probabilities), rows[name],
                                   layout.n_reports)) for name in STREAMED}

        workspace = threading.local()

        def reduce_block(name: str, variant: int, times: slice, row_range: slice) -> int:
            """Quantiles of one block into ``results``; the block's size in bytes."""
            count = int(included[variant].sum())
            shape = (times.stop - times.start, row_range.stop - row_range.start)
            block = _reusable(workspace, "block", (*shape, count))
            position = 0
            for v, first, end in keys:
                if v != variant:
                    continue
                chosen = included[variant, first:end]
                size = int(chosen.sum())
                stored = _reusable(workspace, "stored", (*shape, end - first))
                _read_slab(self._chunk_directory((variant, first, end)) / f"{name}.npy",
                           times, row_range, stored)
                block[..., position:position + size] = (
                    stored if size == end - first else stored[..., chosen])
                position += size
            values = quantiles(block, probabilities, axis=-1, overwrite_input=True)
            results[name][variant, :, row_range, times] = values.transpose(0, 2, 1)
            return block.nbytes

        whole = [variant for variant in range(len(layout.variants))
                 if all(self._kept_whole(key) for key in keys if key[0] == variant)]
        blocks = [(name, variant, times, row_range)
                  for name in STREAMED
                  for variant in whole
                  for times, row_range in block_plan(int(included[variant].sum()),
                                                     rows[name], layout.n_reports,
                                                     self.block_bytes)]
        with ThreadPoolExecutor(FINISH_THREADS) as pool:
            sizes = list(pool.map(lambda block: reduce_block(*block), blocks))
            for variant in set(range(len(layout.variants))) - set(whole):
                for name in STREAMED:
                    results[name][variant] = self._selected_quantiles(
                        name, [key for key in keys if key[0] == variant],
                        included[variant], pool, recompute)
        self.block_count += len(sizes)
        self.largest_block_bytes = max([self.largest_block_bytes, *sizes])
        return {f"{name}_quantile": result for name, result in results.items()}

    def _cells(self, name: str) -> int:
        """Times times rows of trajectory ``name``."""
        layout = self.layout
        rows = layout.n_states if name == "state" else layout.n_flow_elements
        return rows * layout.n_reports

    @staticmethod
    def _recomputed(key: ChunkKey, name: str,
                    recompute: Callable[[ChunkKey], ChunkResult] | None) -> np.ndarray:
        """(cells, members) values of trajectory ``name`` of chunk ``key``, computed
        again (the chunk keeps candidates only)."""
        if recompute is None:
            raise IncompleteWork(f"chunk {key} keeps candidates only and must be computed "
                                 "again to finish; finish the run with the run engine")
        values = getattr(recompute(key), name)
        return np.ascontiguousarray(values.transpose(2, 1, 0)).reshape(-1, values.shape[0])

    def _kept_whole(self, key: ChunkKey) -> bool:
        """True when the chunk holds every value of its trajectories (not candidates)."""
        return (self._chunk_directory(key) / f"{STREAMED[0]}.npy").exists()

    def _selected_quantiles(self, name: str, keys: list[ChunkKey], included: np.ndarray,
                            pool: ThreadPoolExecutor,
                            recompute: Callable[[ChunkKey], ChunkResult] | None
                            ) -> np.ndarray:
        """(quantile, rows, time) quantiles of trajectory ``name`` of one variant whose
        chunks past the pilot are kept as candidates (:func:`.selection.select`), cut with
        the refined brackets where there are some, cells in blocks of about
        ``block_bytes`` of candidates, on the pool's threads."""
        layout = self.layout
        probabilities = layout.scenario.output.quantiles
        variant = keys[0][0]
        coarse = self.brackets(variant)[name]
        refined = self.refined(variant)
        brackets = refined[name] if refined is not None else coarse
        workspace = threading.local()
        parts, read = self._candidate_parts(name, keys, included, brackets, coarse,
                                            workspace, recompute, pool)
        below, nans, inside = _summed_counts(parts, brackets)
        cells = brackets.lower.shape[0]
        count = int(included.sum())
        step = self._cells_per_block(inside)
        spans = [slice(first, min(first + step, cells)) for first in range(0, cells, step)]

        def select_block(span: slice) -> tuple[np.ndarray, np.ndarray]:
            buffer = _reusable(workspace, "candidates", (int(inside[span].sum()),))
            return select(parts, span, count, nans, below, inside, probabilities, buffer,
                          read)

        selected = list(pool.map(select_block, spans))
        values = np.concatenate([block for block, _ in selected], axis=1)
        missed = np.flatnonzero(np.concatenate([lost for _, lost in selected]))
        if missed.size:
            values[:, missed] = self._recomputed_quantiles(name, keys, included, missed,
                                                           recompute)
        rows = layout.n_states if name == "state" else layout.n_flow_elements
        return values.reshape(len(probabilities), layout.n_reports, rows).transpose(0, 2, 1)

    def _cells_per_block(self, inside: np.ndarray) -> int:
        """Cells whose candidates (``inside``: (cells, K) counts) take about
        ``block_bytes``."""
        per_cell = 8 * max(1, int(inside.sum()) // len(inside))
        return max(1, self.block_bytes // per_cell)

    def _candidate_parts(self, name: str, keys: list[ChunkKey], included: np.ndarray,
                         brackets: Brackets, coarse: Brackets, workspace: threading.local,
                         recompute: Callable[[ChunkKey], ChunkResult] | None,
                         pool: ThreadPoolExecutor | None = None
                         ) -> tuple[list[Candidates],
                                    Callable[[int, int, int], np.ndarray]]:
        """Every chunk of ``keys`` (of one variant, whose members behind the quantiles
        ``included`` marks) as candidates cut with ``brackets``, and the ``read`` of
        :func:`.selection.order_statistics`: chunks cut with them stay on disk, those cut
        with the ``coarse`` brackets are cut again, whole ones are cut here, and any other
        (not expected) is computed again; on the ``pool``'s threads if given."""
        cells = self._cells(name)
        digest = brackets.digest()

        def prepare(key: ChunkKey) -> tuple[Candidates, Path | None]:
            directory = self._chunk_directory(key)
            cut_with = (None if self._kept_whole(key)
                        else (directory / f"{name}-brackets").read_text())
            if cut_with == digest:
                return (Candidates(*(np.load(directory / f"{name}-{part}.npy")
                                     for part in CANDIDATE_PARTS[:-1]), values=None),
                        directory / f"{name}-values.npy")
            if cut_with is not None and cut_with == coarse.digest():
                return recut(Candidates(*(np.load(directory / f"{name}-{part}.npy")
                                          for part in CANDIDATE_PARTS)),
                             coarse, brackets), None
            whole = (_read_range(directory / f"{name}.npy", 0,
                                 _reusable(workspace, "whole", (cells, key[2] - key[1])))
                     if cut_with is None else self._recomputed(key, name, recompute))
            return chunk_candidates(whole, included[key[1]:key[2]], brackets), None

        prepared = list(pool.map(prepare, keys) if pool is not None else map(prepare, keys))
        parts = [part for part, _ in prepared]
        sources = [source for _, source in prepared]

        def read(index: int, start: int, stop: int) -> np.ndarray:
            """Values ``start .. stop - 1`` of part ``index``, read into this thread's
            buffer."""
            if sources[index] is None:
                return parts[index].values[start:stop]
            return _read_range(sources[index], start,
                               _reusable(workspace, "read", (stop - start,)))

        return parts, read

    def _recomputed_quantiles(self, name: str, keys: list[ChunkKey], included: np.ndarray,
                              cells: np.ndarray,
                              recompute: Callable[[ChunkKey], ChunkResult] | None
                              ) -> np.ndarray:
        """Quantiles of the cells whose ranks the brackets missed, from whole
        trajectories: saved ones, and the others computed again."""
        values = []
        for key in keys:
            if self._kept_whole(key):
                stored = np.load(self._chunk_directory(key) / f"{name}.npy", mmap_mode="r")
                values.append(np.asarray(stored.reshape(-1, key[2] - key[1])[cells]))
            else:
                values.append(self._recomputed(key, name, recompute)[cells])
        chosen = np.concatenate(values, axis=1)[:, included]
        return quantiles(chosen, self.layout.scenario.output.quantiles, axis=1,
                         overwrite_input=True)

    def _stream_trajectories(self, keys: list[ChunkKey], target: Path) -> None:
        """Append ``state`` and ``flow_count`` of every member to the file, chunk by
        chunk."""
        from ensemble.output.dataset import create_variable, file_shape

        with netCDF4.Dataset(target, "a") as nc:
            for name in STREAMED:
                variable = create_variable(nc, self.layout, name)
                for key in keys:
                    variant, first, end = key
                    stored = np.load(self._chunk_directory(key) / f"{name}.npy")
                    member_major = stored.transpose(2, 1, 0)[np.newaxis]
                    variable[variant, first:end] = file_shape(self.layout, name,
                                                              member_major)[0]
                    del stored, member_major


def _reusable(workspace: threading.local, name: str, shape: tuple[int, ...]) -> np.ndarray:
    """A float64 array of ``shape`` over the thread's buffer ``name``, grown as needed."""
    size = math.prod(shape)
    buffer = getattr(workspace, name, None)
    if buffer is None or buffer.size < size:
        buffer = np.empty(size)
        setattr(workspace, name, buffer)
    return buffer[:size].reshape(shape)


def _npy_shape(handle: BinaryIO) -> tuple[int, ...]:
    """Read the header of the ``.npy`` file open in ``handle`` (which is left at the
    start of the data) and return the array's shape."""
    version = np.lib.format.read_magic(handle)
    shape, _, _ = (np.lib.format.read_array_header_1_0(handle) if version == (1, 0)
                   else np.lib.format.read_array_header_2_0(handle))
    return shape


def _read_into(handle: BinaryIO, path: Path, first: int, out: np.ndarray) -> None:
    """Read ``out.size`` float64 values of the open ``.npy`` file from flat index
    ``first`` into the contiguous ``out`` (a read into memory already in use, rather
    than a mapping of the file: cheaper where mapping pages costs, as on the test
    machines)."""
    handle.seek(handle.tell() + first * 8)
    if handle.readinto(memoryview(out).cast("B")) != out.nbytes:
        raise OSError(errno.EIO, f"{path} is shorter than its header says")


def _read_slab(path: Path, times: slice, rows: slice, out: np.ndarray) -> None:
    """Read ``[times, rows]`` of the time-major float64 ``.npy`` file ``path`` into the
    contiguous ``out``: one read, as the slab is contiguous in the file when it spans
    whole rows or a single time (the blocks of :func:`block_plan`)."""
    with open(path, "rb") as handle:
        _, n_rows, members = _npy_shape(handle)
        _read_into(handle, path, (times.start * n_rows + rows.start) * members, out)


def _read_range(path: Path, first: int, out: np.ndarray) -> np.ndarray:
    """``out`` filled with the flat values ``first ..`` of the ``.npy`` file ``path``."""
    with open(path, "rb") as handle:
        _npy_shape(handle)
        _read_into(handle, path, first, out)
    return out


def block_plan(members: int, rows: int, times: int, block_bytes: int
               ) -> list[tuple[slice, slice]]:
    """Blocks (times, rows) of a (times, rows, members) float64 array, each of at most
    ``block_bytes`` (or a single row and time when even that is larger): whole row
    ranges while they fit, else single times split by rows."""
    per_row_time = max(members, 1) * 8
    if rows * per_row_time <= block_bytes:
        step = max(1, block_bytes // (rows * per_row_time))
        return [(slice(t, min(t + step, times)), slice(0, rows))
                for t in range(0, times, step)]
    step = max(1, block_bytes // per_row_time)
    return [(slice(t, t + 1), slice(r, min(r + step, rows)))
            for t in range(times) for r in range(0, rows, step)]


# ---------------------------------------------------------------------- result files

def result_fingerprint(path: str | os.PathLike[str]) -> str:
    """The fingerprint of the complete result file at ``path``.

    A complete result is a netCDF file with the global attribute ``fingerprint`` and the
    variable ``members_in_summary`` (which only :meth:`WorkStore.finish` writes), and
    without the ``ensemble_part`` attribute of a shard's part file.

    Raises
    ------
    NotAResult : missing, a work-in-progress directory, not netCDF, or not complete.
    """
    path = Path(path)
    if path.is_dir() or path.name.endswith(".partial"):
        raise NotAResult(str(path), "", None, "is the work in progress of an unfinished "
                         "run, not a result", "finish it by running again with --resume")
    if not path.is_file():
        raise NotAResult(str(path), "", None, "does not exist")
    try:
        with netCDF4.Dataset(path) as nc:
            fingerprint = getattr(nc, "fingerprint", None)
            complete = "members_in_summary" in nc.variables
            part = "ensemble_part" in nc.ncattrs()
    except OSError as error:
        raise NotAResult(str(path), "", None, f"is not a netCDF file ({error})") from error
    if part:
        raise NotAResult(str(path), "", None, "is a part file (one shard of a run), not a "
                         "result", "join the parts with ensemble merge")
    if fingerprint is None or not complete:
        raise NotAResult(str(path), "", None, "is not a complete ensemble result (a part "
                         "file, or another netCDF file)")
    return str(fingerprint)


# ---------------------------------------------------------------------- helpers

def _merge(spans: list[tuple[int, int]]) -> list[tuple[int, int]]:
    """Sorted, merged half-open ranges."""
    merged: list[tuple[int, int]] = []
    for start, stop in sorted(spans):
        if merged and start <= merged[-1][1]:
            merged[-1] = (merged[-1][0], max(merged[-1][1], stop))
        else:
            merged.append((start, stop))
    return merged


PILOT_BYTES = 512 * 2**20
"""Largest size of a pilot's trajectories (:meth:`WorkStore.pilot_members`)."""

REFINE_PILOTS = 4
"""The refined brackets come from the first ``REFINE_PILOTS`` pilots' worth of members
(:meth:`WorkStore.refine_members`): half as wide as the pilot's."""

REFINED_PREFIX = "refined-brackets-"

PILOT_BLOCK_BYTES = 16 * 2**20
"""Pilot values sorted at once when brackets are derived (:meth:`WorkStore.brackets`)."""

NPY_HEADER_ROOM = 4096
"""Bytes reserved for the header of an ``.npy`` file beyond its data."""


def _preallocate(handle: BinaryIO, size: int) -> None:
    """Reserve ``size`` bytes for a file about to be written in full.

    Writing into reserved blocks avoids allocating them piecemeal as the data arrives,
    which on this project's test machines (ext4) made writing a chunk 10 times slower
    (70 ms against 5 ms for 31 MB).  Where the system cannot reserve space the file is
    written as it is; a full disk shows in the write that follows.
    """
    reserve = getattr(os, "posix_fallocate", None)
    if reserve is None:
        return
    try:
        reserve(handle.fileno(), 0, size)
    except OSError:
        pass


def _summed_counts(parts: Sequence[Candidates], brackets: Brackets
                   ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(below, nans, inside) of the chunks' candidates summed: (cells, K), (cells,) and
    (cells, K)."""
    cells, intervals = brackets.lower.shape
    return (sum(np.asarray(part.below) for part in parts),
            sum(np.asarray(part.nans) for part in parts),
            sum(np.diff(part.offsets).reshape(cells, intervals) for part in parts))


def _write_npy(path: Path, array: np.ndarray) -> None:
    """``array`` as an ``.npy`` file, into space reserved at once."""
    with open(path, "wb") as handle:
        _preallocate(handle, array.nbytes + NPY_HEADER_ROOM)
        np.save(handle, array)
        handle.truncate()


def boot_identity() -> str:
    """An identifier of the running boot of this machine's operating system: data
    written in this boot and not lost to a crash is still there."""
    try:
        return Path("/proc/sys/kernel/random/boot_id").read_text().strip()
    except OSError:
        return f"{socket.gethostname()}-{psutil.boot_time():.0f}"


def _write_durably(path: Path, write: Callable[[BinaryIO], object]) -> None:
    """Create ``path`` with ``write(handle)`` and fsync it."""
    with open(path, "wb") as handle:
        write(handle)
        handle.flush()
        os.fsync(handle.fileno())


def _fsync_directory(path: Path) -> None:
    """Make a rename or new entry in directory ``path`` durable."""
    descriptor = os.open(path, os.O_RDONLY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)


def _describe(error: OSError, where: Path) -> str:
    """One clear line for a failed write."""
    reason = error.strerror or str(error)
    name = error.filename or where
    return (f"cannot write {name}: {reason} (finished chunks are kept in "
            f"{where if where.name.endswith('.partial') else partial_path(where)} "
            "for --resume)")
