"""Who may touch a run's work directory: the mark that says the program made it, and
the lock that one run at a time holds on it.

The program recognises a work directory ``<result>.partial`` as its own only by the mark
file it writes into it when it creates it (:data:`OWNER_MARK`, whose first line is
:data:`OWNER_SIGNATURE`).  A directory of that name without the mark belongs to someone
else: the program neither writes into it nor removes it.  The directory is made under a
temporary name with its mark inside and renamed into place, so it never exists unmarked.

The lock is an advisory lock on the file :data:`LOCK_FILE` inside the directory
(``flock``; Linux manual page flock(2)), which also records the holder (process id, host,
the process's start time) so that a second run can name it.  The operating system drops
the lock of a process that ends, however it ends, so the lock of a dead run is simply
taken over, and the record it left names the run taken over from.  Where the file system
cannot lock files (``flock`` fails with ``ENOLCK``, ``ENOSYS`` or ``EOPNOTSUPP``, as on
some network and parallel file systems) the record alone decides: a holder on this host
holds the lock while a process with its id and start time runs; a holder on another host
is taken to hold it until its record is removed by hand.
"""

from __future__ import annotations

import errno
import fcntl
import json
import os
import shutil
import socket
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

import psutil

from ensemble.durable import fsync_directory, replace_atomically
from ensemble.errors import WorkLocked

OWNER_MARK = "made-by-ensemble"
"""File the program writes into every work directory it creates."""

OWNER_SIGNATURE = "ensemble work directory"
"""First line of :data:`OWNER_MARK`."""

OWNER_TEXT = (f"{OWNER_SIGNATURE}\n"
              "This directory holds the unfinished work of an ensemble run. The run removes "
              "it when it finishes; `ensemble run --force` discards it.\n")

LOCK_FILE = "run.lock"
"""File of the work directory whose lock the running run holds; it records the holder."""

NO_LOCKING = (errno.ENOLCK, errno.ENOSYS, errno.EOPNOTSUPP, errno.ENOTSUP)
"""Errors of ``flock`` on a file system that cannot lock files."""


def is_owned(work: Path) -> bool:
    """True when ``work`` is a directory that holds the program's mark."""
    try:
        with open(work / OWNER_MARK, encoding="utf-8") as mark:
            return mark.readline().rstrip("\n") == OWNER_SIGNATURE
    except (OSError, UnicodeDecodeError):
        return False


def create_owned(work: Path) -> bool:
    """Create the work directory ``work`` with its mark, whole: made under a temporary
    name beside it and renamed into place.  Returns False, creating nothing, when
    something of that name exists already (or appears meanwhile)."""
    if os.path.lexists(work):
        return False
    work.parent.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(dir=work.parent, prefix=f".{work.name}.new-"))
    try:
        (staging / OWNER_MARK).write_text(OWNER_TEXT, encoding="utf-8")
        if os.path.lexists(work):
            return False
        try:
            os.rename(staging, work)
        except OSError as error:
            if error.errno in (errno.EEXIST, errno.ENOTEMPTY, errno.ENOTDIR):
                return False
            raise
        fsync_directory(work.parent)
        return True
    finally:
        shutil.rmtree(staging, ignore_errors=True)


@dataclass(frozen=True)
class Holder:
    """A process that holds (or held) a work directory's lock."""

    pid: int
    host: str
    started: float
    """The process's start time (seconds since the epoch), which tells it from a later
    process given the same id."""

    @classmethod
    def this_process(cls) -> Holder:
        return cls(os.getpid(), socket.gethostname(), psutil.Process().create_time())

    @classmethod
    def parse(cls, text: str) -> Holder | None:
        """The holder a lock file records, or None for an empty or unreadable record."""
        try:
            record = json.loads(text)
            return cls(int(record["pid"]), str(record["host"]), float(record["started"]))
        except (ValueError, TypeError, KeyError):
            return None

    def text(self) -> str:
        return json.dumps({"pid": self.pid, "host": self.host, "started": self.started})

    def is_running(self) -> bool:
        """Whether the process still runs: on this host, a process of this id and start
        time; a process on another host cannot be looked at, and counts as running."""
        if self.host != socket.gethostname():
            return True
        try:
            return abs(psutil.Process(self.pid).create_time() - self.started) < 1.0
        except psutil.Error:
            return False

    def __str__(self) -> str:
        mine = " (this process)" if self == Holder.this_process() else ""
        return f"process {self.pid} on {self.host}{mine}"


class WorkLock:
    """The lock of one work directory, held from :meth:`acquire` to :meth:`release`.

    Attributes
    ----------
    previous : the holder recorded by a run that ended without releasing the lock
        (killed, or its machine stopped), now taken over; None otherwise.
    """

    def __init__(self, work: Path, handle: BinaryIO | None, previous: Holder | None):
        self.work = work
        self._handle = handle
        self.previous = previous
        self._holder = Holder.this_process()

    @classmethod
    def acquire(cls, work: Path) -> WorkLock | None:
        """Take the lock of ``work``.

        Returns
        -------
        The lock, or None when ``work`` was removed meanwhile (a run that held it
        finished): the caller starts over.

        Raises
        ------
        WorkLocked : another process holds it (the message names it).
        OSError : the lock file cannot be opened or written.
        """
        path = work / LOCK_FILE
        try:
            handle = open(os.open(path, os.O_RDWR | os.O_CREAT, 0o644), "r+b")
        except FileNotFoundError:
            return None
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _recorded(handle)
            handle.close()
            raise _locked(work, holder) from None
        except OSError as error:
            handle.close()
            if error.errno not in NO_LOCKING:
                raise
            return cls._acquire_by_record(work)
        try:
            if not _still_linked(handle, path):
                handle.close()
                return None
            previous = _recorded(handle)
            lock = cls(work, handle, previous)
            _rewrite(handle, lock._holder.text())
        except BaseException:
            handle.close()
            raise
        return lock

    @classmethod
    def _acquire_by_record(cls, work: Path) -> WorkLock | None:
        """Where files cannot be locked: take the lock when its record names no running
        process, by writing this process's record."""
        path = work / LOCK_FILE
        try:
            holder = Holder.parse(path.read_text(encoding="utf-8", errors="replace"))
        except FileNotFoundError:
            return None
        if holder is not None and holder.is_running():
            raise _locked(work, holder)
        lock = cls(work, None, holder)
        replace_atomically(path, lambda target: target.write_text(lock._holder.text()))
        return lock

    def release(self) -> None:
        """Give up the lock (its record is cleared); nothing happens if it is not held."""
        if self._handle is not None:
            try:
                _rewrite(self._handle, "")
            except OSError:
                pass                        # the directory is gone: nothing to clear
            self._handle.close()
            self._handle = None
        elif self._record_is_ours():
            (self.work / LOCK_FILE).write_text("")

    def _record_is_ours(self) -> bool:
        try:
            recorded = (self.work / LOCK_FILE).read_text(encoding="utf-8", errors="replace")
        except OSError:
            return False
        return Holder.parse(recorded) == self._holder


def _recorded(handle: BinaryIO) -> Holder | None:
    handle.seek(0)
    return Holder.parse(handle.read().decode("utf-8", errors="replace"))


def _rewrite(handle: BinaryIO, text: str) -> None:
    handle.seek(0)
    handle.truncate()
    handle.write(text.encode("utf-8"))
    handle.flush()


def _still_linked(handle: BinaryIO, path: Path) -> bool:
    """Whether ``path`` still names the open file (a run that finished meanwhile removes
    the directory, lock file included)."""
    try:
        return os.stat(path).st_ino == os.fstat(handle.fileno()).st_ino
    except FileNotFoundError:
        return False


def _locked(work: Path, holder: Holder | None) -> WorkLocked:
    who = str(holder) if holder is not None else "another process"
    return WorkLocked(str(work), "", None,
                      f"is in use by {who}, which is writing the same result",
                      "wait for that run to end or stop it; two runs must not write the "
                      "same output (give this one another with -o)")
