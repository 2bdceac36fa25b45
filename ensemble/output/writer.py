"""The two forms of a finished result, made by the same code: the result file, written
whole or not at all, and the same dataset in memory (:func:`ensemble.simulate`).

Both take their variables from a :class:`~ensemble.output.finish.Finisher` and their
names, dimensions and attributes from :mod:`.dataset`.  The file is netCDF-4: the
per-member variables are written by xarray and let go (for a million members of a
16-group model they hold 2.4 GB), then the quantiles of the trajectories are selected
and added with netCDF4, and, when the result keeps them, every member's trajectories
chunk by chunk.  It is written under a temporary name beside its final one and renamed into
place once complete (:func:`ensemble.durable.replace_atomically`); what makes a file a
complete result is in :mod:`.result_file`.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import netCDF4
import numpy as np
import xarray as xr

from ensemble.durable import replace_atomically
from ensemble.errors import StoreWriteError
from ensemble.output.dataset import (append_variables, build_dataset, create_variable,
                                     encoding, file_shape)
from ensemble.output.finish import Finisher
from ensemble.output.quantiles import in_summary
from ensemble.output.result_file import UNFINISHED_SUFFIX
from ensemble.output.variables import TRAJECTORY_NAMES

def result_dataset(finisher: Finisher) -> xr.Dataset:
    """Every variable of the result as one dataset in memory (not yet decoded): the
    values, names and attributes of the file :func:`write_result` writes."""
    variables = finisher.member_variables()
    variables.update(finisher.trajectory_quantiles(in_summary(variables["status"])))
    if finisher.layout.keep_members:
        variables.update((name, finisher.trajectories(name)) for name in TRAJECTORY_NAMES)
    return build_dataset(finisher.layout, variables)


FULL_DISK_BYTES = 64 * 2 ** 20
"""Free space below which a write error of the netCDF library (which reports a full disk
as "NetCDF: HDF error", without the system's reason) is taken for a full disk."""


def write_result(path: Path, finisher: Finisher) -> Path:
    """Write the result file ``path`` (replacing one there) from ``finisher``'s chunks.

    Raises
    ------
    StoreWriteError : the file could not be written ("No space left on device" when
        the disk is full, the netCDF library's reason otherwise, with the free space);
        no temporary is left.
    """
    try:
        replace_atomically(path, lambda target: _write_file(target, finisher),
                           suffix=UNFINISHED_SUFFIX)
    except OSError as error:
        raise StoreWriteError.from_os_error(error, path) from error
    except RuntimeError as error:       # the netCDF library's write errors
        free = shutil.disk_usage(path.parent).free
        reason = (f"No space left on device (the netCDF library reported: {error})"
                  if free < FULL_DISK_BYTES else str(error))
        raise StoreWriteError(f"cannot write {path}: {reason} ({free / 2**20:.0f} MiB free "
                              f"in {path.parent})") from error
    return path


def _write_file(target: Path, finisher: Finisher) -> None:
    """Write every variable of the result into the file ``target``."""
    layout = finisher.layout
    variables = finisher.member_variables()
    included = in_summary(variables["status"])
    with build_dataset(layout, variables) as dataset:
        dataset.to_netcdf(target, format="NETCDF4", engine="netcdf4",
                          encoding=encoding(layout, dataset))
    del variables, dataset      # the per-member arrays, before the quantiles' blocks
    append_variables(target, layout, finisher.trajectory_quantiles(included))
    if layout.keep_members:
        write_trajectories(target, finisher)


def write_trajectories(target: Path, finisher: Finisher) -> None:
    """Add every member's values of each trajectory variable to the file, chunk by
    chunk."""
    layout = finisher.layout
    with netCDF4.Dataset(target, "a") as nc:
        for name in TRAJECTORY_NAMES:
            variable = create_variable(nc, layout, name)
            for key in finisher.keys:
                variant, first, end = key
                member_major = finisher.source.trajectory(key, name)[np.newaxis]
                variable[variant, first:end] = file_shape(layout, name, member_major)[0]
                del member_major
