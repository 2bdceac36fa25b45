"""What a complete result file is, read without loading xarray: its fingerprint, and
the temporaries an unfinished write leaves beside it."""

from __future__ import annotations

import os
from pathlib import Path

import netCDF4

from ensemble.errors import NotAResult

UNFINISHED_SUFFIX = ".unfinished"
"""Ending of the temporary name a result file is written under (``.<name>.<random>``
before it): a leftover of a killed finish is recognised by it and removed on resume."""

COMPLETE_MARK = "members_in_summary"
"""A variable only a finished result file holds."""


def unfinished_files(path: Path) -> list[Path]:
    """Temporaries of result ``path`` left by a finish that was killed."""
    return sorted(path.parent.glob(f".{path.name}.*{UNFINISHED_SUFFIX}"))


def result_fingerprint(path: str | os.PathLike[str]) -> str:
    """The fingerprint of the complete result file at ``path``.

    A complete result is a netCDF file with the global attribute ``fingerprint`` and the
    variable :data:`COMPLETE_MARK` (written only when a result is finished), and
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
            complete = COMPLETE_MARK in nc.variables
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


def is_complete(path: str | os.PathLike[str], fingerprint: str) -> bool:
    """True when ``path`` is a complete result file with this ``fingerprint``."""
    try:
        return result_fingerprint(path) == fingerprint
    except NotAResult:
        return False
