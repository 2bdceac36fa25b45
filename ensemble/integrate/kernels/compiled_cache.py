"""numba's compiled files of a kernel module, checked before they are loaded.

numba keeps the machine code of a function compiled with ``cache=True`` in an index file
(``<module>.<function>-<line>.<python>.nbi``) and data files (``.nbc``) beside the module
(numba's documentation, "Notes on caching").  It trusts whatever those files hold: bad
bytes either fail to load on every run, or, where they still parse, are run as they are.
So each time numba saves them, the SHA-256 (FIPS 180-4) of every such file of the kernel
module is listed in ``<module>.sha256sums`` beside them, and they are loaded only when
every one of them is listed with that checksum.  Files that do not match, are not listed,
or fail to load all the same are deleted with a :class:`KernelCacheWarning`, and numba
compiles the function again and writes them afresh.

Processes that compile and load one kernel at once take turns through a lock on
``<module>.lock`` in the same directory (``flock``: shared to load, exclusive to save or
delete), so that a file and its listed checksum always change together.  Where the file
system cannot lock files, the check still applies; two processes saving at the same
moment may then leave a list that no longer matches, which costs one compilation more.
"""

from __future__ import annotations

import errno
import fcntl
import hashlib
import re
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from ensemble.durable import replace_atomically


class KernelCacheWarning(UserWarning):
    """The kernel cache was damaged or unusable and is being rebuilt or bypassed."""


class CheckedCompiledCache:
    """numba's disk cache of one compiled function of a kernel module, loaded only when
    the module's compiled files match their listed checksums, and rebuilt otherwise.

    It stands in for the dispatcher's own cache object (``Dispatcher._cache``, which
    numba's dispatcher asks to load and save compiled code) and hands every call on.

    Parameters
    ----------
    inner : numba's cache object of the function.
    stem : the kernel module's file name without ``.py``.
    """

    def __init__(self, inner: object, stem: str):
        self.inner = inner
        self.stem = stem

    @property
    def cache_path(self) -> str:
        return self.inner.cache_path

    def load_overload(self, sig: object, target_context: object) -> object | None:
        directory = Path(self.inner.cache_path)
        with _locked(directory / f"{self.stem}.lock", shared=True):
            listing = _read(directory / f"{self.stem}.sha256sums")
            problem = self._mismatch(directory, listing)
            if problem is None:
                try:
                    return self.inner.load_overload(sig, target_context)
                except Exception as error:  # noqa: BLE001 (any failure to load: rebuild)
                    problem = f"they could not be loaded ({type(error).__name__}: {error})"
        with _locked(directory / f"{self.stem}.lock", shared=False):
            if _read(directory / f"{self.stem}.sha256sums") == listing:  # not saved anew
                for stale in self._files(directory):
                    stale.unlink(missing_ok=True)
        warnings.warn(f"numba's compiled files of {self.stem} in {directory} were deleted "
                      f"and the kernel is compiled again: {problem}", KernelCacheWarning,
                      stacklevel=2)
        return None

    def save_overload(self, sig: object, data: object) -> None:
        directory = Path(self.inner.cache_path)
        with _locked(directory / f"{self.stem}.lock", shared=False):
            self.inner.save_overload(sig, data)
            text = "".join(f"{_checksum(path)}  {path.name}\n"
                           for path in self._files(directory))
            replace_atomically(directory / f"{self.stem}.sha256sums",
                               lambda target: target.write_text(text, encoding="ascii"))

    def enable(self) -> None:
        self.inner.enable()

    def disable(self) -> None:
        self.inner.disable()

    def flush(self) -> None:
        self.inner.flush()

    def _files(self, directory: Path) -> list[Path]:
        """numba's index and data files of the kernel module."""
        return sorted([*directory.glob(f"{self.stem}.*.nbi"),
                       *directory.glob(f"{self.stem}.*.nbc")])

    def _mismatch(self, directory: Path, listing: str | None) -> str | None:
        """Why the module's compiled files may not be loaded, or None."""
        files = self._files(directory)
        if not files:
            return None                     # nothing cached: numba compiles
        listed = {}
        for line in (listing or "").splitlines():
            found = re.fullmatch(r"([0-9a-f]{64})  (\S+)", line)
            if found:
                listed[found[2]] = found[1]
        for path in files:
            if path.name not in listed:
                return f"{path.name} is not listed with a checksum"
            try:
                if _checksum(path) != listed[path.name]:
                    return f"{path.name} does not match its checksum"
            except OSError as error:
                return f"{path.name} cannot be read ({error.strerror})"
        return None


def _read(path: Path) -> str | None:
    try:
        return path.read_text(encoding="ascii")
    except (OSError, UnicodeDecodeError):
        return None


def _checksum(path: Path) -> str:
    with open(path, "rb") as handle:
        return hashlib.file_digest(handle, "sha256").hexdigest()


@contextmanager
def _locked(path: Path, shared: bool) -> Iterator[None]:
    """Hold a shared or exclusive lock of ``path`` (created if missing) in the body; where
    the lock file cannot be made or the file system cannot lock, the body runs anyway."""
    try:
        handle = open(path, "a")
    except OSError:
        yield
        return
    with handle:
        try:
            fcntl.flock(handle, fcntl.LOCK_SH if shared else fcntl.LOCK_EX)
        except OSError as error:
            if error.errno not in (errno.ENOLCK, errno.ENOSYS, errno.EOPNOTSUPP):
                raise
        yield
