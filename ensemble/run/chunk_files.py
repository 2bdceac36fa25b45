"""The saved chunks of a run in its work directory: how one chunk is laid out on disk,
written and read back (as the :class:`~ensemble.output.sources.MemberSource` the
finish and the brackets read).

One directory per chunk of members::

    chunk-v0-0000000000-0000000500/
        <name>.npy            every value of trajectory variable <name>, float64,
                              (n_reports, rows, M) time-major
        <name>-below.npy      or, past the pilot, only its candidates for the quantiles
        <name>-nans.npy       (:class:`~ensemble.output.selection.Candidates`) and the
        <name>-offsets.npy    digest of the brackets they were cut with
        <name>-values.npy
        <name>-brackets
        members.npz           step_error, observed_order, status, param_<name> and the
                              per-member metrics
        boot                  the boot of the operating system that wrote it
        crc32sums             the CRC-32 of each file above (:func:`file_checksum`),
                              written last, a line ``<8 hex digits>  <name>`` each

Trajectories are time-major so that the quantiles over members are computed block of
times by block of times, reading each chunk file once whatever the number of members.
A chunk is written under a temporary name and renamed into place when complete, so a
process killed at any instant leaves the whole chunk or none of it.  Chunks are not
synced one by one (see :mod:`.journal` on durability).  A chunk whose files do not match
its checksums (:meth:`ChunkFiles.damage`: edited, truncated, replaced or missing) is not
trusted: the journal computes it again.
"""

from __future__ import annotations

import concurrent.futures
import errno
import functools
import io
import os
import re
import shutil
import threading
import zlib
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import BinaryIO

import numpy as np

from ensemble.errors import IncompleteWork, StoreWriteError
from ensemble.output import selection
from ensemble.output.candidates import reusable
from ensemble.output.layout import ResultLayout
from ensemble.output.selection import Brackets, Candidates
from ensemble.output.sources import time_major
from ensemble.output.measures import find_trajectory
from ensemble.records import ChunkKey, ChunkResult

CHUNK_PREFIX = "chunk-"
TEMP_PREFIX = ".tmp-"
"""Start of the names of chunks being written (removed on resume)."""
MEMBER_FILE = "members.npz"
BOOT_FILE = "boot"
"""File in each chunk directory naming the boot of the system that wrote it."""
CHECKSUM_FILE = "crc32sums"
"""File in each chunk directory with the CRC-32 of each of its other files."""
CHECKSUM_BLOCK = 8 * 2**20
"""Bytes of a file read at a time to compute its checksum."""
CHUNK_NAME = re.compile(rf"{CHUNK_PREFIX}v(\d+)-(\d+)-(\d+)")
"""The directory name of a saved chunk (:func:`chunk_name`)."""
CANDIDATE_PARTS = ("below", "nans", "offsets", "values")
"""Files ``<name>-<part>.npy`` of a chunk kept as candidates (:class:`Candidates`)."""
NPY_HEADER_ROOM = 4096
"""Bytes reserved for the header of an ``.npy`` file beyond its data."""

_saving = threading.local()
"""Each thread's scratch buffer for the candidates of the chunk it saves, reused from
chunk to chunk (tasks get copies of :class:`ChunkFiles`, threads keep their buffers)."""


def chunk_name(key: ChunkKey) -> str:
    """The directory name of chunk ``key``."""
    variant, first, end = key
    return f"{CHUNK_PREFIX}v{variant}-{first:010d}-{end:010d}"


def merged_ranges(spans: list[tuple[int, int]]) -> list[tuple[int, int]]:
    """Sorted, merged half-open ranges."""
    merged: list[tuple[int, int]] = []
    for start, stop in sorted(spans):
        if merged and start <= merged[-1][1]:
            merged[-1] = (merged[-1][0], max(merged[-1][1], stop))
        else:
            merged.append((start, stop))
    return merged


class ChunkFiles:
    """The chunks saved in the work directory ``work``.

    Parameters
    ----------
    work : the work directory.
    layout : the result's layout.
    recompute : computes a chunk again (the same bits), for :meth:`whole` of a chunk
        that keeps candidates only; None where that is not possible.
    """

    def __init__(self, work: Path, layout: ResultLayout,
                 recompute: Callable[[ChunkKey], ChunkResult] | None = None):
        self.work = work
        self.layout = layout
        self.recompute = recompute
        self._recomputed: tuple[ChunkKey, ChunkResult] | None = None

    def directory(self, key: ChunkKey) -> Path:
        return self.work / chunk_name(key)

    # ------------------------------------------------------------------ which chunks

    def saved(self) -> list[ChunkKey]:
        """Keys of the chunks on disk, sorted (entries whose name is not a chunk's are
        left out: :meth:`strays`)."""
        keys = []
        for entry in self.work.glob(f"{CHUNK_PREFIX}v*"):
            named = CHUNK_NAME.fullmatch(entry.name)
            if named:
                keys.append((int(named[1]), int(named[2]), int(named[3])))
        return sorted(keys)

    def strays(self) -> list[Path]:
        """Entries named like chunks whose name is not a chunk's."""
        return [entry for entry in self.work.glob(f"{CHUNK_PREFIX}*")
                if not CHUNK_NAME.fullmatch(entry.name)]

    def pending(self, chunks: Sequence[ChunkKey]) -> list[ChunkKey]:
        """The member ranges of ``chunks`` not yet saved.

        A requested chunk fully covered by saved chunks is dropped; one partly covered
        (the chunk size changed between the interrupted run and its resumption) is cut
        to the ranges still missing, so the keys returned may be sub-ranges of those
        asked for.  Order follows ``chunks``.
        """
        ranges: dict[int, list[tuple[int, int]]] = {}
        for variant, first, end in self.saved():
            ranges.setdefault(variant, []).append((first, end))
        covered = {variant: merged_ranges(spans) for variant, spans in ranges.items()}
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

    def covers(self, variant: int, end: int) -> bool:
        return not self.pending([(variant, 0, end)])

    # ------------------------------------------------------------------ writing

    def write(self, key: ChunkKey, trajectories: Mapping[str, np.ndarray],
              member_arrays: Mapping[str, np.ndarray],
              brackets: Mapping[str, Brackets] | None, included: np.ndarray,
              boot: str) -> None:
        """Write chunk ``key`` under a temporary name and rename it into place.

        ``trajectories`` maps each trajectory variable to its (members, rows, times)
        values, kept whole without ``brackets``, else cut to the candidates of the
        members ``included`` marks.  When two processes save the same key at once (a
        task rerun while its first worker was still alive), one copy is kept: a chunk's
        bits depend on its key only.

        Raises
        ------
        StoreWriteError : the chunk could not be written (nothing half-written stays).
        """
        final = self.directory(key)
        temporary = self.work / f"{TEMP_PREFIX}{final.name}-{os.getpid()}"
        try:
            shutil.rmtree(temporary, ignore_errors=True)
            temporary.mkdir()
            for name, values in trajectories.items():
                self._write_trajectory(temporary, name, time_major(values),
                                       None if brackets is None else brackets[name],
                                       included)
            np.savez(temporary / MEMBER_FILE, **member_arrays)
            (temporary / BOOT_FILE).write_text(boot)
            write_checksums(temporary)
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
            raise StoreWriteError.from_os_error(error, self.work) from error

    @staticmethod
    def _write_trajectory(directory: Path, name: str, values: np.ndarray,
                          brackets: Brackets | None, included: np.ndarray) -> None:
        """Every time-major value of one trajectory variable, or its candidates."""
        if brackets is None:
            write_npy(directory / f"{name}.npy", values)
            return
        kept = selection.chunk_candidates(values.reshape(-1, values.shape[-1]), included,
                                          brackets, reusable(_saving, "kept",
                                                             (values.size + 1,)))
        for part in CANDIDATE_PARTS:
            write_npy(directory / f"{name}-{part}.npy", getattr(kept, part))
        (directory / f"{name}-brackets").write_text(brackets.digest())

    # ------------------------------------------------------------------ checking

    def damaged(self, keys: Sequence[ChunkKey]) -> dict[ChunkKey, str]:
        """The chunks of ``keys`` that fail :meth:`damage`, with what is wrong, checked
        side by side on every core (hashing releases the interpreter lock)."""
        if not keys:
            return {}
        with concurrent.futures.ThreadPoolExecutor(
                min(len(keys), os.cpu_count() or 1), "ensemble-verify") as pool:
            reasons = dict(zip(keys, pool.map(self.damage, keys)))
        return {key: reason for key, reason in reasons.items() if reason is not None}

    def damage(self, key: ChunkKey) -> str | None:
        """What is wrong with saved chunk ``key``, or None when every file it holds is
        the one it was written with (the checksums of :func:`write_checksums`)."""
        directory = self.directory(key)
        try:
            listed = read_checksums(directory)
        except (OSError, UnicodeDecodeError, ValueError):
            return f"its list of checksums ({CHECKSUM_FILE}) is missing or unreadable"
        try:
            present = {entry.name for entry in directory.iterdir()} - {CHECKSUM_FILE}
        except OSError as error:
            return f"it cannot be read ({error.strerror})"
        if MEMBER_FILE not in listed:
            return f"its {MEMBER_FILE} is not listed"
        if present != set(listed):
            odd = sorted(present.symmetric_difference(listed))
            return f"its files are not the ones it was written with ({', '.join(odd)})"
        for name, expected in listed.items():
            try:
                if file_checksum(directory / name) != expected:
                    return f"{name} does not match its checksum"
            except OSError as error:
                return f"{name} cannot be read ({error.strerror})"
        return None

    # ------------------------------------------------------------------ reading

    def member_arrays(self, key: ChunkKey) -> dict[str, np.ndarray]:
        with np.load(self.directory(key) / MEMBER_FILE) as members:
            return {name: members[name] for name in members.files}

    def cut_with(self, key: ChunkKey, name: str) -> str | None:
        try:
            return (self.directory(key) / f"{name}-brackets").read_text()
        except FileNotFoundError:
            return None

    def read_cells(self, key: ChunkKey, name: str, first: int, out: np.ndarray
                   ) -> np.ndarray:
        return read_range(self.directory(key) / f"{name}.npy", first * out.shape[-1], out)

    def read_slab(self, key: ChunkKey, name: str, times: slice, rows: slice,
                  out: np.ndarray) -> None:
        read_slab(self.directory(key) / f"{name}.npy", times, rows, out)

    def candidates(self, key: ChunkKey, name: str, with_values: bool) -> Candidates:
        directory = self.directory(key)
        parts = CANDIDATE_PARTS if with_values else CANDIDATE_PARTS[:-1]
        arrays = [np.load(directory / f"{name}-{part}.npy") for part in parts]
        return Candidates(*arrays, **({} if with_values else {"values": None}))

    def read_candidate_values(self, key: ChunkKey, name: str, start: int,
                              out: np.ndarray) -> np.ndarray:
        return read_range(self.directory(key) / f"{name}-values.npy", start, out)

    def candidate_counts(self, key: ChunkKey, name: str, first: int, stop: int,
                         intervals: int) -> Candidates:
        directory = self.directory(key)
        cells = stop - first
        return Candidates(
            read_range(directory / f"{name}-below.npy", first * intervals,
                       np.empty((cells, intervals), np.int64)),
            read_range(directory / f"{name}-nans.npy", first, np.empty(cells, np.int64)),
            read_range(directory / f"{name}-offsets.npy", first * intervals,
                       np.empty(cells * intervals + 1, np.int64)),
            None)

    def whole(self, key: ChunkKey, name: str) -> np.ndarray:
        """Every value, (cells, members): a map of the file of a chunk kept whole, else
        the chunk computed again (the last one computed is kept for the next variable).

        Raises
        ------
        IncompleteWork : the chunk keeps candidates only and cannot be computed here.
        """
        count = key[2] - key[1]
        path = self.directory(key) / f"{name}.npy"
        if path.exists():
            return np.load(path, mmap_mode="r").reshape(-1, count)
        if self.recompute is None:
            raise IncompleteWork(f"chunk {key} keeps candidates only and must be computed "
                                 "again to finish; finish the run with the run engine")
        if self._recomputed is None or self._recomputed[0] != key:
            self._recomputed = (key, self.recompute(key))
        values = find_trajectory(self.layout, name).values(self._recomputed[1])
        return time_major(values).reshape(-1, count)

    def trajectory(self, key: ChunkKey, name: str) -> np.ndarray:
        return np.load(self.directory(key) / f"{name}.npy").transpose(2, 1, 0)


# ---------------------------------------------------------------------- checksums

def file_checksum(path: Path) -> str:
    """The CRC-32 of the file ``path`` (ISO 3309; the polynomial of zlib, gzip and PNG:
    Deutsch 1996, RFC 1952, sec. 8), 8 hexadecimal digits.

    The checksum tells a damaged chunk (edited, truncated, replaced) from the one that
    was written: it catches every burst of up to 32 flipped bits and any other change but
    one in 2^32, at about 2.5 times the speed of SHA-256 with the processor's SHA
    instructions (measured here: 3.9 against 1.6 GB/s), which mattered because every
    saved byte is checksummed twice, when saved and before the result is written.  It
    does not guard against deliberate forgery, which the work directory's owner could
    commit anyway.
    """
    checksum = 0
    buffer = bytearray(CHECKSUM_BLOCK)
    view = memoryview(buffer)
    with open(path, "rb", buffering=0) as handle:
        while read := handle.readinto(buffer):
            checksum = zlib.crc32(view[:read], checksum)
    return f"{checksum:08x}"


def write_checksums(directory: Path) -> None:
    """List the checksum of every file of ``directory`` in its :data:`CHECKSUM_FILE`."""
    lines = [f"{file_checksum(entry)}  {entry.name}\n"
             for entry in sorted(directory.iterdir()) if entry.name != CHECKSUM_FILE]
    (directory / CHECKSUM_FILE).write_text("".join(lines), encoding="ascii")


def read_checksums(directory: Path) -> dict[str, str]:
    """File name -> checksum listed in ``directory``'s :data:`CHECKSUM_FILE`.

    Raises
    ------
    OSError, UnicodeDecodeError : the list cannot be read.
    ValueError : a line is not ``<8 hexadecimal digits>  <name>``.
    """
    listed = {}
    for line in (directory / CHECKSUM_FILE).read_text(encoding="ascii").splitlines():
        digest, separator, name = line.partition("  ")
        if not separator or not re.fullmatch(r"[0-9a-f]{8}", digest) or not name:
            raise ValueError(f"not a checksum line: {line!r}")
        listed[name] = digest
    return listed


# ---------------------------------------------------------------------- .npy files

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


def write_npy(path: Path, array: np.ndarray) -> None:
    """``array`` as an ``.npy`` file, into space reserved at once."""
    with open(path, "wb") as handle:
        _preallocate(handle, array.nbytes + NPY_HEADER_ROOM)
        np.save(handle, array)
        handle.truncate()


NPY_HEADER_PEEK = 256
"""Bytes read at the start of an ``.npy`` file to find its header: numpy pads a header to
a multiple of 64 bytes, and those of chunk files (a shape of up to three numbers) take
128; a longer one is read again whole."""

@functools.lru_cache(maxsize=4096)
def _npy_header(header: bytes) -> tuple[int, ...]:
    """The shape an ``.npy`` header (magic string to the end of its dictionary) gives.

    Cached by the header's bytes: the finish of a large run reads parts of every chunk's
    files block after block, and chunks of one size have identical headers, so each
    distinct header is parsed (``ast.literal_eval`` inside numpy) once."""
    with io.BytesIO(header) as handle:
        version = np.lib.format.read_magic(handle)
        shape, _, _ = (np.lib.format.read_array_header_1_0(handle) if version == (1, 0)
                       else np.lib.format.read_array_header_2_0(handle))
    return shape


def _npy_layout(descriptor: int, path: Path) -> tuple[int, tuple[int, ...]]:
    """(where the data start, shape) of the ``.npy`` file open as ``descriptor``
    (versions 1 and 2 of the format: the header's length in 2 or 4 little-endian bytes
    after the magic string and version)."""
    start = os.pread(descriptor, NPY_HEADER_PEEK, 0)
    if len(start) < 10 or not start.startswith(np.lib.format.MAGIC_PREFIX):
        raise OSError(errno.EIO, f"{path} is not an .npy file")
    if start[6] == 1:
        data = 10 + int.from_bytes(start[8:10], "little")
    else:
        data = 12 + int.from_bytes(start[8:12], "little")
    header = start[:data] if data <= len(start) else os.pread(descriptor, data, 0)
    try:
        return data, _npy_header(header)
    except ValueError as error:
        raise OSError(errno.EIO, f"{path} has a damaged header ({error})") from error


def _read_at(path: Path, first: Callable[[tuple[int, ...]], int], out: np.ndarray) -> None:
    """Read ``out.size`` 8-byte values of the ``.npy`` file ``path`` from flat index
    ``first(shape)`` into the contiguous ``out``: one positioned read into memory already
    in use (cheaper than mapping the file where mapping pages costs, as on the test
    machines, and than a buffered file object for the many small reads of a finish)."""
    descriptor = os.open(path, os.O_RDONLY)
    try:
        data, shape = _npy_layout(descriptor, path)
        if os.preadv(descriptor, [memoryview(out).cast("B")],
                     data + first(shape) * 8) != out.nbytes:
            raise OSError(errno.EIO, f"{path} is shorter than its header says")
    finally:
        os.close(descriptor)


def read_slab(path: Path, times: slice, rows: slice, out: np.ndarray) -> None:
    """Read ``[times, rows]`` of the time-major float64 ``.npy`` file ``path`` into the
    contiguous ``out``: one read, as the slab is contiguous in the file when it spans
    whole rows or a single time (the blocks of :func:`ensemble.output.finish.block_plan`)."""
    _read_at(path, lambda shape: (times.start * shape[1] + rows.start) * shape[2], out)


def read_range(path: Path, first: int, out: np.ndarray) -> np.ndarray:
    """``out`` filled with the flat values ``first ..`` of the ``.npy`` file ``path``
    (float64 or int64: 8 bytes each, as ``out``)."""
    _read_at(path, lambda shape: first, out)
    return out
