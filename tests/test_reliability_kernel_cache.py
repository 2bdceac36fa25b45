"""A damaged kernel cache is rebuilt, never trusted and never fatal: an empty or edited
generated module is written again, numba's compiled files that do not match the checksums
listed when they were saved (or fail to load) are deleted and compiled again -- bad bytes
that still parse included, which numba alone would run -- and a cache directory that
cannot be used (a file in its place) gives
way to a temporary directory of the process, removed when it exits; each case says so
with a KernelCacheWarning (ensemble/integrate/kernels/cache.py).

Each check runs a fresh Python process (a process imports a kernel once) that computes
one chunk with the compiled backend, and compares its numbers with those of the same
chunk computed from an intact cache (the same bits: the kernel's text is the same).
numba's own counters of disk-cache hits and misses (``Dispatcher.stats``, numba's
documentation on caching) tell a compiled file that was loaded from one that was rebuilt.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import textwrap
from dataclasses import dataclass
from pathlib import Path

import pytest

from support import write_scenario

PROGRAM = textwrap.dedent("""
    import hashlib, sys
    from numba.core.dispatcher import Dispatcher
    from ensemble.run.layout import lowered_models
    from ensemble.run.tasks import compute_chunk
    from ensemble.scenario.load import load_scenario

    scenario = load_scenario(sys.argv[1])
    output = compute_chunk(scenario, lowered_models(scenario)[0], (0, 0, 4), "compiled")
    compiled = [value for name, module in list(sys.modules.items())
                if name.startswith("ensemble_kernels.") for value in vars(module).values()
                if isinstance(value, Dispatcher)]
    print(hashlib.sha256(output.result.state.tobytes()).hexdigest(),
          sum(sum(f.stats.cache_hits.values()) for f in compiled),
          sum(sum(f.stats.cache_misses.values()) for f in compiled))
""")
"""Compute members 0..3 of the first variant with the compiled backend; print a digest of
their states and numba's disk-cache hits and misses."""


@dataclass(frozen=True)
class Outcome:
    digest: str
    hits: int
    misses: int
    stderr: str


def compute(scenario: Path, cache: Path, **environment: str) -> Outcome:
    done = subprocess.run([sys.executable, "-c", PROGRAM, scenario],
                          env={**os.environ, "ENSEMBLE_KERNEL_CACHE": str(cache),
                               **environment},
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    digest, hits, misses = done.stdout.split()
    return Outcome(digest, int(hits), int(misses), done.stderr)


@pytest.fixture(scope="module")
def primed(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, Outcome]:
    """A scenario, a kernel cache filled by computing its chunk, and that outcome."""
    directory = tmp_path_factory.mktemp("primed")
    scenario = write_scenario(directory, members=4, days=5)
    cache = directory / "kernels"
    outcome = compute(scenario, cache)
    assert outcome.misses >= 1 and "KernelCacheWarning" not in outcome.stderr
    again = compute(scenario, cache)
    assert (again.digest, again.misses) == (outcome.digest, 0) and again.hits >= 1
    return scenario, cache, outcome


def copy_of(primed, tmp_path: Path) -> Path:
    """A copy of the primed cache (modification times kept: numba checks them)."""
    return Path(shutil.copytree(primed[1], tmp_path / "kernels"))


def test_an_empty_kernel_module_is_written_again(primed, tmp_path):
    """As a crash between creating and filling the file could leave it."""
    scenario, _, intact = primed
    cache = copy_of(primed, tmp_path)
    (module,) = cache.glob("kernel_*.py")
    text = module.read_bytes()
    module.write_bytes(b"")
    outcome = compute(scenario, cache)
    assert outcome.digest == intact.digest
    assert "KernelCacheWarning" in outcome.stderr and "was damaged" in outcome.stderr
    assert module.read_bytes() == text


def garble(path: Path) -> None:
    path.write_bytes(b"\x80\x04 these are not the bytes numba wrote " * 10)


def flip_middle(path: Path) -> None:
    data = bytearray(path.read_bytes())
    middle = len(data) // 2
    data[middle:middle + 200] = bytes(byte ^ 0xFF for byte in data[middle:middle + 200])
    path.write_bytes(bytes(data))


DAMAGES = {
    "index garbled": ("*.nbi", garble),
    "code garbled": ("*.nbc", garble),
    "code bits flipped": ("*.nbc", flip_middle),
    "code emptied": ("*.nbc", lambda path: path.write_bytes(b"")),
}


@pytest.mark.parametrize("pattern, damage", DAMAGES.values(), ids=DAMAGES.keys())
def test_numba_files_that_fail_to_load_are_rebuilt(primed, tmp_path, pattern, damage):
    """Bad bytes in numba's compiled cache: the kernel is compiled again (a miss, same
    numbers, a warning), and the next process loads the rebuilt files (a hit)."""
    scenario, _, intact = primed
    cache = copy_of(primed, tmp_path)
    damaged = sorted((cache / "__pycache__").glob(pattern))
    assert damaged
    for path in damaged:
        damage(path)
    rebuilt = compute(scenario, cache)
    assert rebuilt.digest == intact.digest and rebuilt.misses >= 1
    assert "KernelCacheWarning" in rebuilt.stderr and "compiled again" in rebuilt.stderr
    after = compute(scenario, cache)
    assert (after.digest, after.misses) == (intact.digest, 0) and after.hits >= 1
    assert "KernelCacheWarning" not in after.stderr


@pytest.mark.parametrize("where", ["kernels", "kernels/inside"], ids=["itself", "a parent"])
def test_a_file_where_the_cache_directory_should_be(primed, tmp_path, where):
    """The process keeps its kernels in a temporary directory (under TMPDIR), says so,
    leaves the file alone and removes the temporary directory when it exits."""
    scenario, _, intact = primed
    blocking = tmp_path / "kernels"
    blocking.write_text("a file where the cache directory should be")
    temporary = tmp_path / "tmp"
    temporary.mkdir()
    outcome = compute(scenario, tmp_path / where, TMPDIR=str(temporary))
    assert outcome.digest == intact.digest
    assert "KernelCacheWarning" in outcome.stderr and "cannot be used" in outcome.stderr
    assert str(temporary) in outcome.stderr
    assert blocking.read_text() == "a file where the cache directory should be"
    assert list(temporary.iterdir()) == []
