"""Generated kernels on disk, and the modules loaded from them in this process.

The kernel text of a (model, method) is written to ``kernel_<sha256 of the text>.py`` in
the cache's directory and imported from there, so numba's own ``cache=True`` keeps the
machine code next to it: a second process running the same model loads it without
compiling.  Files are written whole or not at all (:func:`ensemble.durable.replace_atomically`),
so processes compiling at once never see half a file, and an existing file is never
rewritten (numba keys its cache on the file's modification time).

The directory is the one named by ``ENSEMBLE_KERNEL_CACHE``, else
``$XDG_CACHE_HOME/ensemble/kernels``, else ``~/.cache/ensemble/kernels``.  A process holds
one :class:`KernelCache` per directory (:meth:`KernelCache.for_environment`), which
remembers the modules it loaded.
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import sys
import threading
from pathlib import Path
from types import ModuleType
from typing import ClassVar

from ensemble.durable import replace_atomically
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
        path = self.path(source)
        with self._loading:
            module = self._modules.get(path.stem)
            if module is None:
                if not path.exists():
                    replace_atomically(path, lambda temporary: temporary.write_text(
                        source.text, encoding="utf-8"), suffix=".py")
                module = self._modules[path.stem] = _import(path)
            if len(self._recent) >= RECENT_PAIRS:
                self._recent.clear()
            self._recent[(id(model), method.name)] = (model, module, source)
        return module, source


def _import(path: Path) -> ModuleType:
    """Import the kernel file ``path`` as ``ensemble_kernels.<its stem>``."""
    spec = importlib.util.spec_from_file_location(f"ensemble_kernels.{path.stem}", path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return module
