"""Arrays -> the CF-1.10 result dataset: names, dimensions, dtypes, units, attributes,
chunking and compression (the project's reference, ``ensemble/scenario/reference.md``,
result file, documents every variable).

Every variable of the result file is described here once (:func:`variable_spec`, which
reads the trajectory variables and their metrics from :mod:`.variables`), and every way
of making a result uses it: :func:`build_dataset` for the variables that fit in memory
(written by xarray, or returned whole by :func:`ensemble.simulate`), and
:func:`create_variable` for the variables added later with netCDF4 (the trajectories of
every member, chunk by chunk, and their quantiles, :func:`append_variables`).  Arrays
arrive with the model's flat rows (``c * n_groups + g`` for states, ``f * n_groups + g``
for flows) and leave with separate compartment/flow and group dimensions, ``group`` just
before ``time`` and ``time`` last (CF-1.10 section 2.4, "Dimensions": T last is
recommended).

References
----------
Eaton, B. et al. (2022), "NetCDF Climate and Forecast (CF) Metadata Conventions",
version 1.10: section 3.1 (units "1" for counts), 4.4 (time coordinate), 6.1.1
(string-valued label variables, ``coordinates`` attribute), 3.5 (flags:
``flag_masks``/``flag_meanings``), 7.3 (``cell_methods``).
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import netCDF4
import numpy as np
import xarray as xr

from ensemble.about import CAUTION
from ensemble.output.layout import ResultLayout
from ensemble.output.measure_results import (file_values, find_variable,
                                             measure_coordinates, measure_variables)
from ensemble.output.variables import (MEMBER_VALUE_NAMES, MEMBER_VALUES, METRIC_NAMES,
                                       TRAJECTORY_NAMES, member_value, metric, trajectory)
from ensemble.records import STATUS_FLAGS

LABELLED_DIMS = ("variant", "compartment", "flow", "group", "status_bit")
"""Dimensions that carry a string label variable ``<dim>_name``."""

CHUNK_BYTES = 2**20
"""Target size of a netCDF chunk of the per-member variables without a time axis (the
size of HDF5's default chunk cache)."""

@dataclass(frozen=True)
class VariableSpec:
    """How one variable of the result file looks: dimensions, dtype, attributes."""

    dims: tuple[str, ...]
    dtype: type
    attrs: dict[str, object] = field(default_factory=dict)


def rows_dims(layout: ResultLayout, rows: str) -> tuple[str, ...]:
    """The dimensions of flat model rows ``rows`` ("compartment" or "flow")."""
    return (rows, "group") if layout.groups else (rows,)


def time_attrs(layout: ResultLayout) -> dict[str, str]:
    """Attributes of ``time`` and of every variable holding times (CF section 4.4)."""
    start = layout.scenario.start
    if start is None:
        return {"units": "days", "long_name": "days since the start of the projection"}
    return {"units": f"days since {start.isoformat()}", "calendar": "standard",
            "standard_name": "time", "axis": "T", "long_name": "time"}


def _trajectory_spec(layout: ResultLayout, name: str) -> VariableSpec:
    """Every member's values of trajectory variable ``name``."""
    variable = trajectory(name)
    attrs: dict[str, object] = {"long_name": variable.long_name, "units": variable.units}
    if variable.cell_methods:
        attrs["cell_methods"] = variable.cell_methods
    return VariableSpec(("variant", "member", *rows_dims(layout, variable.rows), "time"),
                        np.float64, attrs)


def _metric_spec(layout: ResultLayout, name: str) -> VariableSpec:
    """Every member's values of metric ``name``: times for a peak time, else in the
    units of its trajectory variable."""
    found, variable = metric(name)
    if found.kind == "peak_time":
        units = {k: v for k, v in time_attrs(layout).items() if k in ("units", "calendar")}
    else:
        units = {"units": variable.units}
    return VariableSpec(("variant", "member", *rows_dims(layout, variable.rows)),
                        np.float64, {"long_name": found.long_name, **units})


def _quantile_spec(base: VariableSpec) -> VariableSpec:
    """Quantiles over members of the variable ``base`` describes."""
    attrs = {k: v for k, v in base.attrs.items() if k != "long_name"}
    return VariableSpec(("variant", "quantile", *base.dims[2:]), np.float64,
                        {"long_name": f"quantile over members of the {base.attrs['long_name']}",
                         **attrs})


def _difference_spec(layout: ResultLayout, name: str) -> VariableSpec:
    """Quantiles over members of each member's metric ``name`` minus the same member's
    in the ``compare_to`` variant (a difference of times in days)."""
    found, variable = metric(name)
    other = layout.scenario.output.compare_to
    return VariableSpec(
        ("variant", "quantile", *rows_dims(layout, variable.rows)), np.float64,
        {"long_name": f"quantile over members of the member's {found.long_name} minus the "
                      f"same member's in variant {other}",
         "units": "days" if found.kind == "peak_time" else variable.units})


def variable_spec(layout: ResultLayout, name: str) -> VariableSpec:
    """The dimensions, dtype and attributes of result variable ``name``.

    Raises
    ------
    KeyError : ``name`` is not a variable of this layout's result file.
    """
    if name in TRAJECTORY_NAMES:
        return _trajectory_spec(layout, name)
    if name in METRIC_NAMES:
        return _metric_spec(layout, name)
    base = name.removesuffix("_quantile")
    if name.endswith("_quantile") and base in TRAJECTORY_NAMES:
        return _quantile_spec(_trajectory_spec(layout, base))
    if name.endswith("_quantile") and base in METRIC_NAMES:
        return _quantile_spec(_metric_spec(layout, base))
    compared = name.removeprefix("difference_quantile_")
    if (name.startswith("difference_quantile_") and layout.scenario.output.compare_to
            and compared in METRIC_NAMES):
        return _difference_spec(layout, compared)
    if name == "members_in_summary":
        return VariableSpec(("variant",), np.int32, {
            "long_name": "number of members behind the quantiles (members without any "
                         "status bit)", "units": "1"})
    if name == "members_left_out":
        return VariableSpec(("variant", "status_bit"), np.int32, {
            "long_name": "number of members left out of the quantiles that carry each "
                         "status bit (a member may carry several)", "units": "1"})
    if name in MEMBER_VALUE_NAMES:
        value = member_value(name)
        return VariableSpec(("variant", "member"), np.float64,
                            {"long_name": value.long_name, "units": value.units})
    if name.endswith("_quantile") and base in MEMBER_VALUE_NAMES \
            and member_value(base).summarised:
        value = member_value(base)
        return VariableSpec(("variant", "quantile"), np.float64, {
            "long_name": f"quantile over members of the {value.long_name}",
            "units": value.units})
    if name == "status":
        masks, meanings = zip(*STATUS_FLAGS)
        return VariableSpec(("variant", "member"), np.uint8, {
            "long_name": "member status bit flags",
            "flag_masks": np.array(masks, dtype=np.uint8),
            "flag_meanings": " ".join(meanings)})
    measured = find_variable(layout, name, time_attrs(layout))
    if measured is not None:
        return VariableSpec(measured.dims, measured.dtype, dict(measured.attrs))
    if name.startswith("param_") and name.removeprefix("param_") in layout.parameters:
        parameter = name.removeprefix("param_")
        info = layout.parameters[parameter]
        dims = ("variant", *(() if info.constant else ("member",)),
                *(("group",) if info.shape == "vector" and layout.groups else ()))
        attrs: dict[str, object] = {"long_name": info.description or f"parameter {parameter}"}
        if info.units:
            attrs["units"] = info.units
        return VariableSpec(dims, np.float64, attrs)
    raise KeyError(f"{name!r} is not a variable of this result file")


def result_variables(layout: ResultLayout) -> tuple[str, ...]:
    """Names of every data variable of the complete result file, in file order."""
    names = [*(TRAJECTORY_NAMES if layout.keep_members else ()),
             *(f"{name}_quantile" for name in TRAJECTORY_NAMES),
             *(f"param_{p}" for p in layout.parameters),
             *METRIC_NAMES, *(f"{m}_quantile" for m in METRIC_NAMES)]
    if layout.scenario.output.compare_to:
        names.extend(f"difference_quantile_{m}" for m in METRIC_NAMES)
    names.extend(["members_in_summary", "members_left_out"])
    for value in MEMBER_VALUES:
        names.extend([value.name, f"{value.name}_quantile"] if value.summarised
                     else [value.name])
    names.append("status")
    names.extend(v.name for v in measure_variables(layout, time_attrs(layout)))
    return tuple(names)


def coordinates(layout: ResultLayout) -> dict[str, xr.Variable]:
    """The coordinate and label variables (no ``_FillValue`` on any: see
    :func:`encoding`)."""
    quantile_values = np.asarray(layout.scenario.output.quantiles, dtype=np.float64)
    coords = {
        "member": xr.Variable("member", np.arange(layout.member_count, dtype=np.int32),
                              {"long_name": "ensemble member index (0-based)"}),
        "quantile": xr.Variable("quantile", quantile_values,
                                {"long_name": "probability of the quantile over members",
                                 "units": "1"}),
        "time": xr.Variable("time", np.asarray(layout.times, dtype=np.float64),
                            time_attrs(layout)),
    }
    labels = {"variant": layout.variants, "compartment": layout.compartments,
              "flow": layout.flows, "group": layout.groups,
              "status_bit": tuple(word for _, word in STATUS_FLAGS)}
    long_names = {"variant": "scenario variant", "compartment": "model compartment",
                  "flow": "flow between compartments", "group": "population group",
                  "status_bit": "member status bit, as in the flag_meanings of status"}
    for dim, values in labels.items():
        if values:
            coords[f"{dim}_name"] = xr.Variable(dim, np.array(values, dtype=object),
                                                {"long_name": long_names[dim]})
    coords["variant_title"] = xr.Variable("variant", np.array(
        [v.title or v.name for v in layout.scenario.variants], dtype=object),
        {"long_name": "title of the scenario variant (its name when it has none)"})
    for name, (dims, values, attrs) in measure_coordinates(layout,
                                                           time_attrs(layout)).items():
        coords[name] = xr.Variable(dims, values, attrs)
    return coords


def global_attributes(layout: ResultLayout) -> dict[str, object]:
    """The global attributes of the result file."""
    scenario = layout.scenario
    attrs: dict[str, object] = {
        "Conventions": "CF-1.10",
        "title": scenario.title or scenario.name,
        "source": layout.source,
        "history": layout.history,
        "scenario": scenario.source.text,
        "fingerprint": layout.fingerprint,
        "members": np.int32(layout.member_count),
        "seed": np.int64(scenario.seed),
        "sampling": scenario.sampling,
        "solver_method": scenario.solver.method,
        "solver_step": float(scenario.solver.step),
        "time_varying_parameters": " ".join(layout.time_varying_parameters),
        "caution": CAUTION,
    }
    if scenario.description:
        attrs["comment"] = scenario.description
    return attrs


def file_shape(layout: ResultLayout, name: str, array: np.ndarray) -> np.ndarray:
    """``array`` reshaped from flat model rows to the file's dimensions of ``name``.

    The first two axes (variant and member or quantile) keep their lengths, so a chunk
    of members reshapes as well as the whole ensemble."""
    measured = find_variable(layout, name, time_attrs(layout))
    if measured is not None:
        return file_values(measured, array)
    sizes = {"time": layout.n_reports, "group": layout.n_groups,
             **{dim: len(layout.labels(dim)) for dim in ("compartment", "flow")}}
    trailing = tuple(sizes[d] for d in variable_spec(layout, name).dims[2:])
    return np.asarray(array).reshape(array.shape[:2] + trailing)


def build_dataset(layout: ResultLayout, variables: Mapping[str, np.ndarray]) -> xr.Dataset:
    """The result dataset (not yet decoded) from arrays with flat model rows.

    Parameters
    ----------
    layout : the result's layout.
    variables : name -> array; the first two axes are (variant, member) or (variant,
        quantile), or (variant,) for ``members_in_summary`` and (variant, status bit)
        for ``members_left_out``; then model rows
        (``c * n_groups + g``) and/or time as in :func:`variable_spec`.  ``param_<name>``
        of a vector parameter is (variant, member, group), of a constant one (variant,
        [group]).

    Returns
    -------
    xarray.Dataset with the coordinates, label variables and global attributes of the
    result file, the time coordinate as float days (CF-encoded).
    """
    unknown = set(variables) - set(result_variables(layout))
    if unknown:
        raise KeyError(f"not variables of this result file: {sorted(unknown)}")
    data_vars = {}
    for name in (n for n in result_variables(layout) if n in variables):
        array = variables[name]
        spec = variable_spec(layout, name)
        values = file_shape(layout, name, array) if array.ndim > 1 else np.asarray(array)
        data_vars[name] = xr.Variable(spec.dims, values.astype(spec.dtype, copy=False),
                                      dict(spec.attrs))
    return xr.Dataset(data_vars, coords=coordinates(layout), attrs=global_attributes(layout))


def _chunking(dims: tuple[str, ...], shape: tuple[int, ...]) -> tuple[int, ...]:
    """netCDF chunk shape: one variant and one member (or every quantile) with all of
    the remaining dimensions, so one member's time series or a variant's quantiles are
    one read; per-member values without time in blocks of members of about
    :data:`CHUNK_BYTES`."""
    per_member = 8 * int(np.prod([size for dim, size in zip(dims, shape)
                                  if dim not in ("variant", "member")]))
    chunks = []
    for dim, size in zip(dims, shape):
        if dim == "variant":
            chunks.append(1)
        elif dim == "member":
            chunks.append(1 if "time" in dims else min(size, CHUNK_BYTES // per_member))
        else:
            chunks.append(size)
    return tuple(max(c, 1) for c in chunks)


def variable_encoding(layout: ResultLayout, name: str, shape: tuple[int, ...]
                      ) -> dict[str, object]:
    """netCDF-4 encoding of data variable ``name``: chunks and zlib compression at level
    ``output.compression`` (none at 0)."""
    spec = variable_spec(layout, name)
    level = layout.scenario.output.compression
    encoding: dict[str, object] = {"chunksizes": _chunking(spec.dims, shape)}
    if level > 0:
        encoding.update(zlib=True, complevel=level, shuffle=True)
    if spec.dtype is np.float64:
        encoding["_FillValue"] = np.nan
    return encoding


def encoding(layout: ResultLayout, dataset: xr.Dataset) -> dict[str, dict[str, object]]:
    """Encoding for :meth:`xarray.Dataset.to_netcdf` of a dataset from
    :func:`build_dataset`: no ``_FillValue`` on coordinates, chunks and compression on
    data variables."""
    result: dict[str, dict[str, object]] = {
        name: {"_FillValue": None} for name in dataset.coords}
    for name, variable in dataset.data_vars.items():
        result[name] = variable_encoding(layout, str(name), variable.shape)
    return result


def create_variable(nc: netCDF4.Dataset, layout: ResultLayout, name: str) -> netCDF4.Variable:
    """Create data variable ``name`` in an open netCDF-4 file that already has the
    dimensions and label variables (written by xarray from :func:`build_dataset`), with
    the attributes, chunks and compression that xarray would give it."""
    spec = variable_spec(layout, name)
    shape = tuple(len(nc.dimensions[d]) for d in spec.dims)
    enc = variable_encoding(layout, name, shape)
    variable = nc.createVariable(
        name, spec.dtype, spec.dims, fill_value=enc.get("_FillValue", False),
        chunksizes=enc["chunksizes"], zlib=bool(enc.get("zlib", False)),
        complevel=int(enc.get("complevel", 4)), shuffle=bool(enc.get("shuffle", False)))
    labels = sorted(f"{d}_name" for d in spec.dims
                    if d in LABELLED_DIMS and f"{d}_name" in nc.variables)
    variable.setncatts({**spec.attrs, "coordinates": " ".join(labels)})
    return variable


def append_variables(path: str | os.PathLike[str], layout: ResultLayout,
                     variables: Mapping[str, np.ndarray]) -> None:
    """Add data variables (arrays as for :func:`build_dataset`) to a result file written
    from :func:`build_dataset` without them."""
    with netCDF4.Dataset(path, "a") as nc:
        for name, array in variables.items():
            create_variable(nc, layout, name)[:] = file_shape(layout, name, array).astype(
                variable_spec(layout, name).dtype, copy=False)


def with_label_indexes(dataset: xr.Dataset) -> xr.Dataset:
    """``dataset`` with each ``<dim>_name`` label variable as the index of ``<dim>``, so
    ``ds.sel(compartment="I", variant="distancing")`` works."""
    labels = {dim: dataset[f"{dim}_name"] for dim in LABELLED_DIMS
              if f"{dim}_name" in dataset.variables}
    return dataset.assign_coords(labels)


def decode(dataset: xr.Dataset) -> xr.Dataset:
    """An undecoded dataset from :func:`build_dataset` as :func:`ensemble.open_result`
    returns a file: CF-decoded (times as dates when the scenario has a start, durations
    kept as float days) with label indexes."""
    return with_label_indexes(xr.decode_cf(dataset, decode_timedelta=False))
