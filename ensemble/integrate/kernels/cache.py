"""Generated kernels on disk, and the modules loaded from them in this process.

The kernel text of a (model, method) is written to ``kernel_<sha256 of the text>.py`` in
the cache's directory and imported from there, so numba's own ``cache=True`` keeps the
machine code next to it: a second process running the same model loads it without
compiling.  The text depends on the model's structure only, so the variants of a scenario
that differ in their values share one file.  Files are written whole or not at all (:func:`ensemble.durable.replace_atomically`),
so processes compiling at once never see half a file, and an existing file is never
rewritten (numba keys its cache on the file's modification time).

A damaged cache is rebuilt, never trusted.  A kernel file is checked against the text it
should hold before it is imported (its name is the digest of that text; an empty or
edited file, as a crash or a full disk can leave, is written again).  numba's own files
of the kernel (``__pycache__/kernel_*.nbi`` and ``.nbc``) are loaded only when they match
the checksums listed when they were saved, and otherwise deleted and compiled again
(:mod:`.compiled_cache`).  When the directory
cannot be used (a file stands where it should be, or it cannot be written), the process
keeps its kernels in a temporary directory of its own, removed when it exits.  Each of
these says so with a :class:`KernelCacheWarning`.

The directory is the one named by ``ENSEMBLE_KERNEL_CACHE``, else
``$XDG_CACHE_HOME/ensemble/kernels``, else ``~/.cache/ensemble/kernels``.  A process holds
one :class:`KernelCache` per directory (:meth:`KernelCache.for_environment`), which
remembers the modules it loaded.
"""

from __future__ import annotations

import atexit
import hashlib
import importlib.util
import os
import shutil
import sys
import tempfile
import threading
import warnings
from pathlib import Path
from types import ModuleType
from typing import ClassVar

from numba.core.caching import FunctionCache
from numba.core.dispatcher import Dispatcher

from ensemble.durable import replace_atomically
from ensemble.integrate.kernels.compiled_cache import CheckedCompiledCache, KernelCacheWarning
from ensemble.integrate.kernels.source import KernelSource
from ensemble.methods import Method
from ensemble.model.lower import LoweredModel

CACHE_ENVIRONMENT = "ENSEMBLE_KERNEL_CACHE"
"""Environment variable naming the kernel cache directory (overrides the XDG default)."""

RECENT_PAIRS = 16
"""(model, method) pairs whose kernel a cache finds without generating its text again."""


def cache_directory() -> Path:
    """Where generated kernels live: ``$ENSEMBLE_KERNEL_CACHE``, else
    ``$XDG_CACHE_HOME/ensemble/kernels``, else ``~/.cache/ensemble/kernels``."""
    explicit = os.environ.get(CACHE_ENVIRONMENT)
    if explicit:
        return Path(explicit)
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "ensemble" / "kernels"


class KernelCache:
    """The kernels of one directory: their files, and the modules this process loaded
    from them.

    Thread-safe: threads of one process that ask for the same kernel at once get the
    same module, generated, written and imported once.
    """

    _shared: ClassVar[dict[Path, KernelCache]] = {}
    _sharing: ClassVar[threading.Lock] = threading.Lock()

    def __init__(self, directory: Path):
        self.directory = Path(directory)
        self._modules: dict[str, ModuleType] = {}
        self._recent: dict[tuple[int, str], tuple[LoweredModel, ModuleType,
                                                  KernelSource]] = {}
        self._loading = threading.Lock()

    @classmethod
    def for_environment(cls) -> KernelCache:
        """The process's cache of the directory :func:`cache_directory` names now."""
        directory = cache_directory()
        with cls._sharing:
            cache = cls._shared.get(directory)
            if cache is None:
                cache = cls._shared[directory] = cls(directory)
        return cache

    def path(self, source: KernelSource) -> Path:
        """The file of a kernel's text."""
        digest = hashlib.sha256(source.text.encode()).hexdigest()[:32]
        return self.directory / f"kernel_{digest}.py"

    def load(self, model: LoweredModel, method: Method) -> tuple[ModuleType, KernelSource]:
        """The kernel module of ``model`` and ``method`` (generated, written and imported
        on first use; numba compiles it on first call unless its disk cache has it).  The
        last few (model, method) pairs are remembered, so chunks of one run skip the
        generation."""
        known = self._recent.get((id(model), method.name))
        if known is not None and known[0] is model:
            return known[1], known[2]
        source = KernelSource(model, method)
        with self._loading:
            module = self._modules.get(self.path(source).stem)
            if module is None:
                path = self._kernel_file(source)
                module = self._modules[path.stem] = _import(path)
            if len(self._recent) >= RECENT_PAIRS:
                self._recent.clear()
            self._recent[(id(model), method.name)] = (model, module, source)
        return module, source


    def _kernel_file(self, source: KernelSource) -> Path:
        """The file of a kernel's text, written unless it holds that text already; in a
        temporary directory from now on when this cache's directory cannot be used."""
        path = self.path(source)
        try:
            return _written(path, source.text)
        except OSError as error:
            self.directory = _fallback_directory(self.directory, error)
            return _written(self.path(source), source.text)


def _written(path: Path, text: str) -> Path:
    """``path``, holding ``text``: written (whole) when it is missing or holds anything
    else, as a damaged file does."""
    expected = text.encode("utf-8")
    try:
        found = path.read_bytes()
    except FileNotFoundError:
        found = None
    except OSError:
        found = b""
    if found == expected:
        return path
    if found is not None:
        warnings.warn(f"the kernel file {path} was damaged ({len(found)} bytes instead of "
                      f"{len(expected)}, or other bytes); writing it again",
                      KernelCacheWarning, stacklevel=4)
    replace_atomically(path, lambda temporary: temporary.write_bytes(expected), suffix=".py")
    return path


_fallback_lock = threading.Lock()
_fallback: list[Path] = []
"""The temporary kernel directory of this process, once made (removed at exit)."""


def _fallback_directory(unusable: Path, error: OSError) -> Path:
    """This process's temporary kernel directory, made (with a warning) on first use."""
    with _fallback_lock:
        if not _fallback:
            made = Path(tempfile.mkdtemp(prefix="ensemble-kernels-"))
            atexit.register(shutil.rmtree, made, ignore_errors=True)
            _fallback.append(made)
        reason = error.strerror or str(error)
        warnings.warn(f"the kernel cache {unusable} cannot be used ({reason}); this process "
                      f"keeps its kernels in {_fallback[0]} and compiles them again. Set "
                      f"{CACHE_ENVIRONMENT} to a directory you can write", KernelCacheWarning,
                      stacklevel=5)
        return _fallback[0]


def _import(path: Path) -> ModuleType:
    """Import the kernel file ``path`` as ``ensemble_kernels.<its stem>``, its compiled
    functions' disk caches checked (:class:`.compiled_cache.CheckedCompiledCache`)."""
    spec = importlib.util.spec_from_file_location(f"ensemble_kernels.{path.stem}", path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    for value in vars(module).values():
        inner = getattr(value, "_cache", None)
        if isinstance(value, Dispatcher) and isinstance(inner, FunctionCache):
            value._cache = CheckedCompiledCache(inner, path.stem)
    return module
