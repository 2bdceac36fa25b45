"""The work journal of a run: finished chunks of members kept on disk as they complete,
so that an interrupted run resumes where it stopped, then the result file made from
them.

Work in progress lives in the directory ``<path>.partial``::

    <path>.partial/
        made-by-ensemble           the program's mark (:mod:`.work_directory`)
        run.lock                   locked by the run working in it, and naming it
        manifest.json              fingerprint and shape of the run (written first)
        driver-marker              token of the running driver (:meth:`WorkJournal.mark`)
        durable-chunks             names of the chunks known to be on stable storage
        pilot-brackets-v0.npz      brackets of the quantiles (:mod:`ensemble.output.brackets`)
        refined-brackets-v0.npz
        chunk-v0-0000000000-0000000500/
                                   one directory per saved chunk (:mod:`.chunk_files`)

Chunks are not synced one by one: a killed process loses nothing the operating system
has accepted, and syncing every chunk would make the disk, not the cores, set the pace
of a run (4 GB for 200,000 SEIR members over a year).  Only a crash of the operating
system itself can lose written data, so a chunk is trusted on resume when it was written
in the current boot or was later made durable (:meth:`WorkJournal.make_durable`, which
the run engine calls every minute through :class:`Checkpoints` and which lists the chunk
in ``durable-chunks``); any other chunk is computed again.  Every other file of the
directory and the result itself are written whole or not at all (:mod:`ensemble.durable`).

Saved work is never lost or mixed.  A run that finds saved chunks continues them only
when asked to resume, discards them only when forced, and refuses otherwise; it removes
nothing from a directory without the program's mark; it holds the directory's lock from
:meth:`WorkJournal.open` to the end, so a second run on the same result is refused.
Each chunk lists the CRC-32 of its files (:mod:`.chunk_files`): a resume, and the check
before the result is written, remove any chunk whose files do not match, to be computed
again.
"""

from __future__ import annotations

import concurrent.futures
import json
import os
import shutil
import socket
import time
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path

import numpy as np
import psutil

from ensemble.durable import fsync_directory, replace_atomically
from ensemble.errors import (FingerprintMismatch, IncompleteWork, InterruptedAfterWriting,
                             ResultExists, StoreWriteError, WorkInProgress)
from ensemble.output.brackets import FILE_PREFIX, BracketCache
from ensemble.output.finish import DEFAULT_BLOCK_BYTES, Finisher
from ensemble.output.layout import ResultLayout
from ensemble.output.measures import chunk_trajectories
from ensemble.output.quantiles import in_summary
from ensemble.output.sources import check_chunk, chunk_member_arrays
from ensemble.output.variables import MEMBER_VALUES, TRAJECTORIES
from ensemble.output.result_file import is_complete, unfinished_files
from ensemble.records import ChunkKey, ChunkResult
from ensemble.run.chunk_files import BOOT_FILE, CHUNK_PREFIX, MEMBER_FILE, ChunkFiles
from ensemble.run.work_directory import (LOCK_FILE, OWNER_MARK, WorkLock, create_owned,
                                         is_owned)

MANIFEST = "manifest.json"
MARKER = "driver-marker"
"""File in the work directory holding a token of the running driver: a process that reads
the same token back sees the same directory, and may save chunks there itself."""
DURABLE_LIST = "durable-chunks"
"""File in the work directory listing, a name a line, the chunks made durable."""
TAKE_ATTEMPTS = 5
"""Times :meth:`WorkJournal.open` looks for the work directory again when a run that
held it removes it meanwhile (it finished)."""
CHECKPOINT_SECONDS = 60.0
"""Seconds between two calls of :meth:`WorkJournal.make_durable` on the chunks saved
meanwhile: a crash of the operating system loses at most about this much work."""


def partial_path(path: str | os.PathLike[str]) -> Path:
    """The work-in-progress directory of result ``path``."""
    return Path(f"{os.fspath(path)}.partial")


def boot_identity() -> str:
    """An identifier of the running boot of this machine's operating system: data
    written in this boot and not lost to a crash is still there."""
    try:
        return Path("/proc/sys/kernel/random/boot_id").read_text().strip()
    except OSError:
        return f"{socket.gethostname()}-{psutil.boot_time():.0f}"


class WorkJournal:
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
        self.chunks = ChunkFiles(self.work, layout)
        self.brackets = BracketCache(layout, self.chunks, self.work, block_bytes)
        self.notes: list[str] = []
        """What :meth:`open` found and did that the user should hear of (a lock taken
        over, damaged chunks removed), one line each."""
        self._lock: WorkLock | None = None
        self._verified: set[ChunkKey] = set()
        """Chunks that passed :meth:`drop_damaged` and were not saved again since."""
        self.block_count = 0
        """Blocks of trajectories gathered by :meth:`finish` (for tests and tuning)."""
        self.largest_block_bytes = 0
        """Size of the largest of those blocks."""

    # ------------------------------------------------------------------ opening

    is_complete = staticmethod(is_complete)

    @classmethod
    def open(cls, path: str | os.PathLike[str], layout: ResultLayout, *, resume: bool,
             force: bool, block_bytes: int = DEFAULT_BLOCK_BYTES) -> WorkJournal:
        """Open the work in progress of result ``path``, holding its lock until
        :meth:`finish`, :meth:`discard` or :meth:`close`.

        Parameters
        ----------
        path : the final result file; work in progress goes to ``<path>.partial``.
            Missing parent directories are created.
        layout : the result's layout; its fingerprint is recorded in the manifest.
        resume : keep the chunks of an existing ``.partial`` (whose fingerprint must
            equal ``layout.fingerprint``) that pass their checks: a chunk that a crash
            of the system may have cut short, or whose files do not match their
            checksums, is removed and computed again (:attr:`notes` says so).
        force : discard the saved chunks of an existing ``.partial`` when not resuming,
            and allow replacing an existing ``path`` (only at :meth:`finish`, so the old
            file stays until the new one is complete).
        block_bytes : memory for one block of trajectories in :meth:`finish`.

        Raises
        ------
        ResultExists : ``path`` exists and ``force`` is false (callers that resume check
            :meth:`is_complete` first).
        WorkInProgress : ``<path>.partial`` holds saved chunks and neither ``resume``
            nor ``force`` was given, or it was not made by this program (it is then
            left as it is, whatever the options).
        WorkLocked : another process is running on the same ``<path>.partial``.
        FingerprintMismatch : resume of work made with a different fingerprint.
        StoreWriteError : the directory cannot be created or written.
        """
        path = Path(path)
        if path.exists() and not force:
            raise ResultExists(str(path), "", None, "already exists",
                               "use --force to replace it")
        journal = cls(path, layout, block_bytes=block_bytes)
        try:
            journal._take()
            journal._prepare(resume, force)
        except OSError as error:
            journal.close()
            raise StoreWriteError.from_os_error(error, journal.work) from error
        except BaseException:
            journal.close()
            raise
        return journal

    def _take(self) -> None:
        """Find or create the work directory and take its lock."""
        for _ in range(TAKE_ATTEMPTS):
            create_owned(self.work)
            if not is_owned(self.work):
                raise WorkInProgress(
                    str(self.work), "", None, "exists but was not made by ensemble (it has "
                    f"no {OWNER_MARK} file), so it is left as it is",
                    "move it away, or give the result another name (-o)")
            self._lock = WorkLock.acquire(self.work)
            if self._lock is not None:
                if self._lock.previous is not None:
                    self.notes.append(f"taking over {self.work} from "
                                      f"{self._lock.previous}, which is no longer running")
                return
        raise StoreWriteError(f"{self.work} keeps disappearing: another run is finishing "
                              "the same result")

    def _prepare(self, resume: bool, force: bool) -> None:
        """Adopt the work directory, or start it afresh (see :meth:`open`)."""
        for stray in unfinished_files(self.path):
            stray.unlink(missing_ok=True)       # a result file of a killed finish
        manifest = self._read_manifest()
        saved = len(self.saved())
        if resume and manifest is not None:
            if manifest.get("fingerprint") != self.layout.fingerprint:
                raise FingerprintMismatch(
                    str(self.work), "", None,
                    "holds work of a different scenario or settings (fingerprint "
                    f"{str(manifest.get('fingerprint'))[:12]}..., this run "
                    f"{self.layout.fingerprint[:12]}...)",
                    "resume with the scenario and options that made it, or discard it "
                    "with --force (without --resume)")
            self._adopt()
            return
        if saved and not force:
            why = ("holds" if not resume else
                   "has no readable manifest, so nothing tells which run made its")
            raise WorkInProgress(
                str(self.work), "", None, f"{why} {saved} saved chunk{'s' * (saved != 1)} "
                "of an unfinished run",
                "continue it with --resume, or discard it with --force" if not resume
                else "discard it with --force")
        for entry in self.work.iterdir():
            if entry.name in (OWNER_MARK, LOCK_FILE):
                continue
            if entry.is_dir() and not entry.is_symlink():
                shutil.rmtree(entry)
            else:
                entry.unlink()
        text = json.dumps(self._manifest(), indent=1)
        replace_atomically(self.work / MANIFEST, lambda target: target.write_text(text))

    def _adopt(self) -> None:
        """Keep the saved work that passes its checks: remove files and chunks
        half-written when a run was killed, chunks a crash of the system may have cut
        short, damaged chunks and unreadable brackets."""
        for stray in [*self.work.glob(".*"), *self.chunks.strays()]:
            if stray.is_dir() and not stray.is_symlink():
                shutil.rmtree(stray, ignore_errors=True)
            else:
                stray.unlink(missing_ok=True)
        self._drop_untrusted_chunks()
        self._drop_damaged(self.saved(), "computing it again")
        for stored in [path for prefix in FILE_PREFIX.values()
                       for path in self.work.glob(f"{prefix}v*.npz")]:
            try:
                with np.load(stored) as brackets:
                    for name in brackets.files:
                        brackets[name]
            except Exception:               # noqa: BLE001 (any damage: derived again)
                stored.unlink(missing_ok=True)
                self.notes.append(f"{stored} was damaged; deriving it again")

    def _drop_damaged(self, keys: Sequence[ChunkKey], then: str) -> dict[ChunkKey, str]:
        """Remove the chunks of ``keys`` whose files fail their checksums; return a line
        for each (ending in ``then``), also added to :attr:`notes`."""
        lines = {}
        for key, reason in self.chunks.damaged(keys).items():
            shutil.rmtree(self.chunks.directory(key), ignore_errors=True)
            variant, first, end = key
            lines[key] = (f"the saved chunk of members {first}..{end - 1} of variant "
                          f"{self.layout.variants[variant]!r} is damaged ({reason}); {then}")
        self.notes.extend(lines.values())
        return lines

    def drop_damaged(self) -> list[ChunkKey]:
        """Check every saved chunk against its checksums, as a run does before it
        finishes; remove those that fail (with a note each) and return their keys, for
        the caller to compute again."""
        keys = self.saved()
        damaged = self._drop_damaged(keys, "computing it again")
        self._verified.update(key for key in keys if key not in damaged)
        return list(damaged)

    def close(self) -> None:
        """Release the work directory's lock (the work in progress stays); a journal
        that does not hold it is left as it is."""
        if self._lock is not None:
            self._lock.release()
            self._lock = None

    def discard(self) -> None:
        """Remove the work in progress and release the lock (only a journal that holds
        it: a copy in another process does nothing)."""
        if self._lock is not None:
            shutil.rmtree(self.work, ignore_errors=True)
            self.close()

    def __getstate__(self) -> dict[str, object]:
        """A copy for a task in another process holds no lock and no notes."""
        return {**self.__dict__, "_lock": None, "notes": []}

    def _manifest(self) -> dict[str, object]:
        layout = self.layout
        return {"format": 2, "fingerprint": layout.fingerprint,
                "variants": list(layout.variants), "member_count": layout.member_count,
                "trajectories": {variable.name: layout.row_count(variable)
                                 for variable in TRAJECTORIES},
                "n_reports": layout.n_reports, "parameters": list(layout.parameters)}

    def _read_manifest(self) -> dict[str, object] | None:
        try:
            manifest = json.loads((self.work / MANIFEST).read_text())
        except (OSError, ValueError):
            return None
        return manifest if isinstance(manifest, dict) else None

    def _drop_untrusted_chunks(self) -> None:
        """Remove the chunks that a crash of the operating system may have left
        incomplete: those neither written in this boot nor listed as durable."""
        durable = set(self._durable_names())
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

    def _durable_names(self) -> list[str]:
        """Names of the chunk directories made durable."""
        try:
            return (self.work / DURABLE_LIST).read_text().split()
        except OSError:
            return []

    # ------------------------------------------------------------------ sharing

    def mark(self) -> str:
        """Write a fresh token to the work directory's marker file and return it.

        A process (a dask worker on another host) that finds the same token with
        :meth:`shares_directory` sees this directory, and may save the chunks it computes
        into it itself instead of sending them to the driver.
        """
        token = os.urandom(16).hex()
        try:
            replace_atomically(self.work / MARKER, lambda target: target.write_text(token))
        except OSError as error:
            raise StoreWriteError.from_os_error(error, self.work) from error
        return token

    def shares_directory(self, token: str) -> bool:
        """True when this process reads ``token`` (from :meth:`mark`) in the marker file."""
        try:
            return (self.work / MARKER).read_text() == token
        except OSError:
            return False

    # ------------------------------------------------------------------ chunks

    def saved(self) -> list[ChunkKey]:
        """Keys of the chunks on disk, sorted."""
        return self.chunks.saved()

    def pending(self, chunks: Sequence[ChunkKey]) -> list[ChunkKey]:
        """The member ranges of ``chunks`` not yet saved (:meth:`ChunkFiles.pending`)."""
        return self.chunks.pending(chunks)

    def _check_key(self, key: ChunkKey) -> None:
        """Check ``key`` against the layout and the saved chunks."""
        variant, first, end = key
        if not (0 <= variant < len(self.layout.variants) and 0 <= first < end
                <= self.layout.member_count):
            raise ValueError(f"chunk {key} is outside {len(self.layout.variants)} variants "
                             f"x {self.layout.member_count} members")
        for other in self.saved():
            if other != key and other[0] == variant and other[1] < end and first < other[2]:
                raise ValueError(f"chunk {key} overlaps the saved chunk {other}")

    def save(self, key: ChunkKey, result: ChunkResult,
             reported: Mapping[str, np.ndarray], candidates: bool = False) -> None:
        """Store one finished chunk (see the module's note on durability).

        Saving the same key again replaces the chunk.  Processes may save different
        keys at once.

        Parameters
        ----------
        key : (variant index, first, end); ``result.members`` must be ``first .. end-1``.
        result : the chunk's trajectories and diagnostics.
        reported : ``Design.reported`` of the chunk: name -> (M,) or (n_groups, M); every
            name in ``layout.parameters`` must be present (others are ignored).
        candidates : keep of each trajectory variable only the candidates for the
            quantiles when the chunk is past its variant's pilot and the pilot is saved
            (:meth:`BracketCache.cutting`); otherwise, and by default, every value.

        Raises
        ------
        ValueError : shapes or members do not match the key and layout, or the key
            overlaps a different saved chunk.
        StoreWriteError : the chunk could not be written (nothing half-written stays).
        """
        self._check_key(key)
        check_chunk(self.layout, key, result)
        trajectories = chunk_trajectories(self.layout, result)
        arrays = chunk_member_arrays(self.layout, key, result, reported, trajectories)
        brackets = self.brackets.cutting(key) if candidates else None
        self._verified.discard(key)
        self.chunks.write(key, trajectories, arrays, brackets, in_summary(result.status),
                          boot_identity())

    def make_durable(self, keys: Sequence[ChunkKey]) -> None:
        """Put the saved chunks ``keys`` on stable storage (fsync every file) and list them
        in ``durable-chunks``, so that a resume after a crash of the operating system
        keeps them.  Safe to call from a thread while other chunks are being saved.

        Raises
        ------
        StoreWriteError : a file could not be synced or the list written.
        """
        names = []
        try:
            for key in keys:
                directory = self.chunks.directory(key)
                for file in directory.iterdir():
                    with open(file, "rb") as handle:
                        os.fsync(handle.fileno())
                fsync_directory(directory)
                names.append(directory.name)
            fsync_directory(self.work)
            with open(self.work / DURABLE_LIST, "a") as listing:
                listing.write("".join(f"{name}\n" for name in names))
                listing.flush()
                os.fsync(listing.fileno())
        except OSError as error:
            raise StoreWriteError.from_os_error(error, self.work) from error

    def load(self, key: ChunkKey) -> tuple[ChunkResult, dict[str, np.ndarray]]:
        """Read a saved chunk back as (result, reported), e.g. to copy it to another
        journal or a part file."""
        directory = self.chunks.directory(key)
        if not directory.is_dir():
            raise KeyError(f"chunk {key} is not saved in {self.work}")
        if self.chunks.cut_with(key, TRAJECTORIES[0].name) is not None:
            raise KeyError(f"chunk {key} keeps candidates for the quantiles only")
        series = {variable.source: self.chunks.trajectory(key, variable.name)
                  for variable in TRAJECTORIES if variable.derive is None}
        with np.load(directory / MEMBER_FILE) as members:
            reported = {name: members[f"param_{name}"].T for name in self.layout.parameters}
            result = ChunkResult(members=np.arange(key[1], key[2], dtype=np.int64),
                                 status=members["status"], **series,
                                 **{value.name: members[value.name]
                                    for value in MEMBER_VALUES}, reported=reported)
        return result, reported

    # ------------------------------------------------------------------ finishing

    def _check_complete(self) -> None:
        """Check that the saved chunks cover every member of every variant."""
        gaps = []
        for index, variant in enumerate(self.layout.variants):
            holes = self.pending([(index, 0, self.layout.member_count)])
            gaps.extend(f"members {first}-{end - 1} of variant {variant!r}"
                        for _, first, end in holes)
        if gaps:
            raise IncompleteWork(f"{self.work} is not complete: " + "; ".join(gaps)
                                 + " not saved")

    def finish(self, recompute: Callable[[ChunkKey], ChunkResult] | None = None) -> Path:
        """Write the result file (:func:`ensemble.output.writer.write_result`), remove
        the work in progress and release its lock (which is released also when the
        finish fails: the chunks are kept for a resume).

        Every member of every variant must be saved, in chunks whose files match their
        checksums (those not checked by :meth:`drop_damaged` since they were saved are
        checked here).  Chunks saved as candidates give the quantiles they would give
        whole; for the rare cell whose ranks the brackets missed, and for a chunk cut
        with other brackets (not expected), ``recompute(key)`` (the chunk computed again,
        same bits) supplies every value.

        Raises
        ------
        IncompleteWork : members are missing (the message names the ranges), a chunk is
            damaged (it is removed, for a resume to compute it again), or a chunk must be
            computed again and ``recompute`` is None.
        StoreWriteError : the file could not be written; the chunks are kept.
        """
        from ensemble.output.writer import write_result   # xarray: only to write a result

        try:
            damaged = self._drop_damaged(
                [key for key in self.saved() if key not in self._verified],
                "continue with --resume to compute it again")
            if damaged:
                raise IncompleteWork("\n".join(damaged.values()))
            self._check_complete()
            chunks = ChunkFiles(self.work, self.layout, recompute)
            finisher = Finisher(self.layout, chunks,
                                BracketCache(self.layout, chunks, self.work, self.block_bytes),
                                self.block_bytes)
            write_result(self.path, finisher)
            self.block_count += finisher.block_count
            self.largest_block_bytes = max(self.largest_block_bytes,
                                           finisher.largest_block_bytes)
            # the result is complete; a leftover work directory is only clutter
            try:
                shutil.rmtree(self.work, ignore_errors=True)
            except KeyboardInterrupt:
                raise InterruptedAfterWriting(self.path, self.work) from None
        finally:
            self.close()
        return self.path


class Checkpoints:
    """Makes saved chunks durable (:meth:`WorkJournal.make_durable`) in a background
    thread, at most one batch at a time and at most every ``interval`` seconds, so that
    syncing never holds up the driver.  Leaving the context waits for the batch in
    progress and raises its error, if any; chunks not yet synced stay trusted within this
    boot."""

    def __init__(self, journal: WorkJournal, interval: float | None = None):
        self.journal = journal
        self.interval = CHECKPOINT_SECONDS if interval is None else interval
        self.waiting: list[ChunkKey] = []
        self.started = time.monotonic()
        self.running: concurrent.futures.Future | None = None
        self.pool = concurrent.futures.ThreadPoolExecutor(1, "ensemble-checkpoint")

    def __enter__(self) -> Checkpoints:
        return self

    def add(self, key: ChunkKey) -> None:
        """Chunk ``key`` is saved; start a batch if it is time."""
        self.waiting.append(key)
        if self.running is not None:
            if not self.running.done():
                return
            self.running.result()
            self.running = None
        if time.monotonic() - self.started >= self.interval:
            self.running = self.pool.submit(self.journal.make_durable, self.waiting)
            self.waiting = []
            self.started = time.monotonic()

    def __exit__(self, *exc_info) -> None:
        self.pool.shutdown(wait=True)
        if self.running is not None and exc_info[0] is None:
            self.running.result()
