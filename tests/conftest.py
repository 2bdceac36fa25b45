"""Settings shared by the whole test session.

One kernel cache for the session: the compiled backend keeps the numba kernels it generates
in the directory named by ``ENSEMBLE_KERNEL_CACHE`` (else ``~/.cache/ensemble/kernels``).
Before any test runs, the session points that variable at a temporary directory of its own,
so that the tests neither read kernels a developer's earlier runs left in their home nor
add to them, and so that every kernel is compiled once for the session: the test process,
the ``ensemble`` programs it starts and their dask worker processes all inherit the
variable.  The directory is removed when the session ends.  A developer who exports
``ENSEMBLE_KERNEL_CACHE`` keeps that directory instead (for example to reuse compiled kernels
across quick ``-m "not slow"`` loops).

Tests that need a cache of their own (a cold compile, a stale file) set the variable
themselves for their duration.
"""

from __future__ import annotations

import os
import shutil
import tempfile

import pytest

KERNEL_CACHE_VARIABLE = "ENSEMBLE_KERNEL_CACHE"
"""Environment variable the compiled backend reads for its kernel cache directory."""

SESSION_CACHE = pytest.StashKey[str]()
"""The temporary kernel cache this session made (absent when the developer chose one)."""


def pytest_configure(config: pytest.Config) -> None:
    """Export a session kernel cache before any test module builds a kernel."""
    if os.environ.get(KERNEL_CACHE_VARIABLE):
        return
    directory = tempfile.mkdtemp(prefix="ensemble-test-kernels-")
    config.stash[SESSION_CACHE] = directory
    os.environ[KERNEL_CACHE_VARIABLE] = directory


def pytest_unconfigure(config: pytest.Config) -> None:
    """Remove the session's kernel cache (only the directory this session made)."""
    directory = config.stash.get(SESSION_CACHE, None)
    if directory is None:
        return
    if os.environ.get(KERNEL_CACHE_VARIABLE) == directory:
        del os.environ[KERNEL_CACHE_VARIABLE]
    shutil.rmtree(directory, ignore_errors=True)
    del config.stash[SESSION_CACHE]
