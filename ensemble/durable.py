"""Files that appear whole or not at all, and stay after a crash of the machine.

Every file the project writes under its final name goes through :func:`replace_atomically`
(a temporary name in the same directory, written, flushed and fsynced, renamed over the
final name, then the directory fsynced), so that a reader never sees half a file and a
power cut leaves either the old or the new one.  The rename is atomic on POSIX file
systems (IEEE Std 1003.1, ``rename()``); the fsync of the directory makes the new entry
itself durable (a common practice on Linux, e.g. ext4 and XFS, with no single source).
"""

from __future__ import annotations

import os
import tempfile
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import BinaryIO

__all__ = ["fsync_directory", "replace_atomically", "temporary_beside", "write_durably"]


def write_durably(path: Path, write: Callable[[BinaryIO], object]) -> None:
    """Create ``path`` with ``write(handle)``, flush it and fsync it."""
    with open(path, "wb") as handle:
        write(handle)
        handle.flush()
        os.fsync(handle.fileno())


def fsync_directory(path: Path) -> None:
    """Make a rename or a new entry in directory ``path`` durable."""
    descriptor = os.open(path, os.O_RDONLY)
    try:
        os.fsync(descriptor)
    finally:
        os.close(descriptor)


@contextmanager
def temporary_beside(path: Path, suffix: str = "") -> Iterator[Path]:
    """A fresh temporary path in ``path``'s directory, removed on the way out unless it
    was renamed away; the directory is created if missing."""
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=suffix)
    os.close(handle)
    temporary = Path(name)
    try:
        yield temporary
    finally:
        temporary.unlink(missing_ok=True)


def replace_atomically(path: str | os.PathLike[str], write: Callable[[Path], object],
                       suffix: str = "") -> Path:
    """Write ``path`` whole or not at all.

    Parameters
    ----------
    path : the final name; an existing file of that name is replaced.
    write : called with a temporary path in the same directory, which it fills (the
        temporary file exists, empty, when it is called).
    suffix : ending of the temporary name (some writers choose the format by it).

    Returns
    -------
    The final path.
    """
    final = Path(path)
    with temporary_beside(final, suffix) as temporary:
        write(temporary)
        with open(temporary, "rb+") as handle:
            os.fsync(handle.fileno())
        os.replace(temporary, final)
    fsync_directory(final.parent)
    return final
