"""Arrays -> the CF-1.10 result dataset of SPEC section 3: names, dimensions, dtypes,
units, attributes, chunking and compression.

Every variable of the result file is described here once (:func:`variable_spec`), and
every way of making a result uses it: :func:`build_dataset` for the variables that fit
in memory (written by xarray), :func:`create_variable` for the variables added later
with netCDF4 (the trajectories of every member, chunk by chunk, and their quantiles,
:func:`append_variables`), and :func:`dataset_from_results` for
a whole ensemble held in memory (:func:`ensemble.api.simulate`).  Arrays arrive with the model's flat
rows (``c * n_groups + g`` for states, ``f * n_groups + g`` for flows) and leave with
separate compartment/flow and group dimensions, ``group`` just before ``time`` and
``time`` last (CF-1.10 section 2.4, "Dimensions": T last is recommended).

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
from ensemble.records import STATUS_FLAGS, ChunkResult
from ensemble.output.layout import STREAMED, ResultLayout
from ensemble.output.metrics import (FLOW_METRICS, METRICS, STATE_METRICS, member_metrics,
                                     summary_quantiles)
from ensemble.output.quantiles import in_summary, member_quantiles

LABELLED_DIMS = ("variant", "compartment", "flow", "group")
"""Dimensions that carry a string label variable ``<dim>_name``."""

CHUNK_BYTES = 2**20
"""Target size of a netCDF chunk of the per-member variables without a time axis (the
size of HDF5's default chunk cache)."""

_COUNT = "number of persons"
_BASE_NAMES = {
    "state": f"{_COUNT} in the compartment",
    "flow_count": f"{_COUNT} moved by the flow over the report interval ending at time",
    "peak_value": f"largest reported {_COUNT} in the compartment",
    "peak_time": f"first reported time of the largest {_COUNT} in the compartment",
    "flow_peak_value": f"largest {_COUNT} moved by the flow over one report interval",
    "flow_peak_time": f"end of the first report interval with the largest {_COUNT} "
                      "moved by the flow",
    "total_flow": f"{_COUNT} moved by the flow over the whole horizon",
}
_TIME_VALUED = ("peak_time", "flow_peak_time")


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


def _metric_attrs(layout: ResultLayout, metric: str) -> dict[str, object]:
    if metric in _TIME_VALUED:
        units = {k: v for k, v in time_attrs(layout).items() if k in ("units", "calendar")}
        return {"long_name": _BASE_NAMES[metric], **units}
    return {"long_name": _BASE_NAMES[metric], "units": "1"}


def variable_spec(layout: ResultLayout, name: str) -> VariableSpec:
    """The dimensions, dtype and attributes of result variable ``name``.

    Raises
    ------
    KeyError : ``name`` is not a variable of this layout's result file.
    """
    compartments, flows = rows_dims(layout, "compartment"), rows_dims(layout, "flow")
    rows_of = {**dict.fromkeys(STATE_METRICS, compartments),
               **dict.fromkeys(FLOW_METRICS, flows)}
    if name == "state":
        return VariableSpec(("variant", "member", *compartments, "time"), np.float64,
                            {"long_name": _BASE_NAMES["state"], "units": "1"})
    if name == "flow_count":
        return VariableSpec(("variant", "member", *flows, "time"), np.float64,
                            {"long_name": _BASE_NAMES["flow_count"], "units": "1",
                             "cell_methods": "time: sum"})
    if name in ("state_quantile", "flow_count_quantile"):
        base = variable_spec(layout, name.removesuffix("_quantile"))
        attrs = {k: v for k, v in base.attrs.items() if k != "long_name"}
        return VariableSpec(("variant", "quantile", *base.dims[2:]), np.float64,
                            {"long_name": f"quantile over members of the {base.attrs['long_name']}",
                             **attrs})
    if name in METRICS:
        return VariableSpec(("variant", "member", *rows_of[name]), np.float64,
                            _metric_attrs(layout, name))
    if name.endswith("_quantile") and name.removesuffix("_quantile") in METRICS:
        metric = name.removesuffix("_quantile")
        attrs = _metric_attrs(layout, metric)
        attrs["long_name"] = f"quantile over members of the {attrs['long_name']}"
        return VariableSpec(("variant", "quantile", *rows_of[metric]), np.float64, attrs)
    if (name.startswith("difference_quantile_") and layout.scenario.output.compare_to
            and name.removeprefix("difference_quantile_") in METRICS):
        metric = name.removeprefix("difference_quantile_")
        other = layout.scenario.output.compare_to
        return VariableSpec(
            ("variant", "quantile", *rows_of[metric]), np.float64,
            {"long_name": f"quantile over members of the member's {_BASE_NAMES[metric]} "
                          f"minus the same member's in variant {other}",
             "units": "days" if metric in _TIME_VALUED else "1"})
    if name == "members_in_summary":
        return VariableSpec(("variant",), np.int32, {
            "long_name": "number of members behind the quantiles (members without the "
                         "non-finite or impossible-start status bits)", "units": "1"})
    if name == "step_error":
        return VariableSpec(("variant", "member"), np.float64, {
            "long_name": "estimated error of the stored trajectory relative to the "
                         "tolerance (the member passes when at most 1)", "units": "1"})
    if name == "observed_order":
        return VariableSpec(("variant", "member"), np.float64, {
            "long_name": "observed order of convergence of the integration method",
            "units": "1"})
    if name == "status":
        masks, meanings = zip(*STATUS_FLAGS)
        return VariableSpec(("variant", "member"), np.uint8, {
            "long_name": "member status bit flags",
            "flag_masks": np.array(masks, dtype=np.uint8),
            "flag_meanings": " ".join(meanings)})
    if name.startswith("param_") and name.removeprefix("param_") in layout.parameters:
        parameter = name.removeprefix("param_")
        info = layout.parameters[parameter]
        dims = ("variant", "member", "group") if info.shape == "vector" and layout.groups \
            else ("variant", "member")
        attrs: dict[str, object] = {"long_name": info.description or f"parameter {parameter}"}
        if info.units:
            attrs["units"] = info.units
        return VariableSpec(dims, np.float64, attrs)
    raise KeyError(f"{name!r} is not a variable of this result file")


def result_variables(layout: ResultLayout) -> tuple[str, ...]:
    """Names of every data variable of the complete result file, in file order."""
    names = [*(STREAMED if layout.scenario.output.members else ()),
             "state_quantile", "flow_count_quantile",
             *(f"param_{p}" for p in layout.parameters),
             *METRICS, *(f"{m}_quantile" for m in METRICS)]
    if layout.scenario.output.compare_to:
        names.extend(f"difference_quantile_{m}" for m in METRICS)
    names.extend(["members_in_summary", "step_error", "observed_order", "status"])
    return tuple(names)


def coordinates(layout: ResultLayout) -> dict[str, xr.Variable]:
    """The coordinate and label variables (no ``_FillValue`` on any: see
    :func:`encoding`)."""
    quantile_values = np.asarray(layout.scenario.output.quantiles, dtype=np.float64)
    coords = {
        "member": xr.Variable("member", np.arange(layout.members, dtype=np.int32),
                              {"long_name": "ensemble member index (0-based)"}),
        "quantile": xr.Variable("quantile", quantile_values,
                                {"long_name": "probability of the quantile over members",
                                 "units": "1"}),
        "time": xr.Variable("time", np.asarray(layout.times, dtype=np.float64),
                            time_attrs(layout)),
    }
    labels = {"variant": layout.variants, "compartment": layout.compartments,
              "flow": layout.flows, "group": layout.groups}
    long_names = {"variant": "scenario variant", "compartment": "model compartment",
                  "flow": "flow between compartments", "group": "population group"}
    for dim, values in labels.items():
        if values:
            coords[f"{dim}_name"] = xr.Variable(dim, np.array(values, dtype=object),
                                                {"long_name": long_names[dim]})
    return coords


def global_attributes(layout: ResultLayout) -> dict[str, object]:
    """The global attributes of SPEC section 3."""
    scenario = layout.scenario
    attrs: dict[str, object] = {
        "Conventions": "CF-1.10",
        "title": scenario.title or scenario.name,
        "source": layout.source,
        "history": layout.history,
        "scenario": scenario.source.text,
        "fingerprint": layout.fingerprint,
        "members": np.int32(layout.members),
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
    sizes = {"time": layout.n_reports, "compartment": len(layout.compartments),
             "flow": len(layout.flows), "group": layout.n_groups}
    trailing = tuple(sizes[d] for d in variable_spec(layout, name).dims[2:])
    return np.asarray(array).reshape(array.shape[:2] + trailing)


def build_dataset(layout: ResultLayout, variables: Mapping[str, np.ndarray]) -> xr.Dataset:
    """The result dataset (not yet decoded) from arrays with flat model rows.

    Parameters
    ----------
    layout : the result's layout.
    variables : name -> array; the first two axes are (variant, member) or (variant,
        quantile), or (variant,) for ``members_in_summary``; then model rows
        (``c * n_groups + g``) and/or time as in :func:`variable_spec`.  ``param_<name>``
        of a vector parameter is (variant, member, group).

    Returns
    -------
    xarray.Dataset with the coordinates, label variables and global attributes of
    SPEC section 3, the time coordinate as float days (CF-encoded).
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


def dataset_from_results(layout: ResultLayout,
                         results: Sequence[tuple[ChunkResult, Mapping[str, np.ndarray]]]
                         ) -> xr.Dataset:
    """The result dataset (not yet decoded) from every member of every variant in memory.

    Parameters
    ----------
    layout : the result's layout.
    results : per variant, in ``layout.variants`` order, (result, reported): the
        :class:`ChunkResult` of members 0 .. members-1 and ``Design.reported``.

    Returns
    -------
    The same variables, values and attributes as the file the streaming store writes
    (without ``state`` and ``flow_count`` when ``output.members`` is false).
    """
    variables = {name: np.stack([getattr(result, name) for result, _ in results])
                 for name in (*STREAMED, "step_error", "observed_order", "status")}
    for name in layout.parameters:
        values = np.stack([np.asarray(reported[name], dtype=np.float64)
                           for _, reported in results])
        variables[f"param_{name}"] = values.transpose(0, 2, 1) if values.ndim == 3 else values
    variables.update(member_metrics(variables["state"], variables["flow_count"], layout.times))
    included = in_summary(variables["status"])
    probabilities = layout.scenario.output.quantiles
    for name in STREAMED:
        variables[f"{name}_quantile"] = np.stack(
            [member_quantiles(variables[name][v], probabilities, included[v])
             for v in range(len(layout.variants))])
    variables.update(summary_quantiles(variables, variables["status"], probabilities,
                                       layout.compare_index))
    if not layout.scenario.output.members:
        for name in STREAMED:
            del variables[name]
    return build_dataset(layout, variables)


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
