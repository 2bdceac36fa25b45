"""Tidy tables of a result's measures for spreadsheets (``ensemble export``): one row per
number, the caution as a leading ``#`` comment line, readable by
``pandas.read_csv(path, comment="#")``.

Three tables: the quantile bands in time (``variant, measure, group, start, end,
quantile, value``: ``start`` and ``end`` are the bounds of the interval a value covers, the
same instant for a stock), the metrics (peak value and time, total, days above, with the
share of censored peaks as quantile-less rows) and the differences between pairs of
variants.  Times are dates (ISO 8601) when the scenario has a start, else days since it.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import xarray as xr

from ensemble.errors import UsageError
from ensemble.present.summary import measure_names

METRICS = ("peak_value", "peak_time", "total", "days_above")


def _times(values: np.ndarray) -> list[str]:
    if np.issubdtype(values.dtype, np.datetime64):
        return [str(np.datetime64(v, "D")) if not np.isnat(v) else "" for v in values]
    return [f"{float(v):g}" for v in values]


def _groups(array: xr.DataArray) -> list[tuple[str, xr.DataArray]]:
    if "group" in array.dims:
        return [(str(g), array.sel(group=g)) for g in array["group"].values]
    return [("all", array)]


def band_table(dataset: xr.Dataset) -> pd.DataFrame:
    """The quantile bands of every measure, one row per variant, measure, group, time
    and quantile."""
    frames = []
    for name in measure_names(dataset):
        array = dataset[f"measure_{name}_quantile"]
        time_dim = array.dims[-1]
        ends = _times(dataset[time_dim].values)
        bounds = f"{time_dim}_bounds"
        starts = _times(dataset[bounds].values[:, 0]) if bounds in dataset else ends
        for variant in dataset["variant"].values:
            for group, part in _groups(array.sel(variant=variant)):
                values = part.transpose("quantile", time_dim).values
                for q, probability in enumerate(dataset["quantile"].values):
                    frames.append(pd.DataFrame({
                        "variant": str(variant), "measure": name, "group": group,
                        "start": starts, "end": ends, "quantile": float(probability),
                        "value": values[q]}))
    return pd.concat(frames, ignore_index=True)


def _metric_rows(dataset: xr.Dataset, first: str, labels: np.ndarray, suffix: str
                 ) -> pd.DataFrame:
    """Rows (``first`` column, measure, group, metric, quantile, value) of every
    measure's ``<metric><suffix>`` variables along dimension ``first``."""
    rows = []
    for name in measure_names(dataset):
        for metric in METRICS:
            variable = f"measure_{name}_{metric}{suffix}"
            if variable not in dataset:
                continue
            array = dataset[variable]
            for index, label in enumerate(labels):
                for group, part in _groups(array.isel({first: index})):
                    values = part.values
                    cells = _times(values) if np.issubdtype(values.dtype, np.datetime64) \
                        else [float(v) for v in values]
                    rows.extend({first: str(label), "measure": name, "group": group,
                                 "metric": metric, "quantile": float(p), "value": v}
                                for p, v in zip(dataset["quantile"].values, cells))
    return pd.DataFrame(rows)


def metric_table(dataset: xr.Dataset) -> pd.DataFrame:
    """Quantiles over members of every measure's metrics, and the share of censored
    peaks (metric ``censored_share``, no quantile)."""
    table = _metric_rows(dataset, "variant", dataset["variant"].values, "_quantile")
    shares = []
    for name in measure_names(dataset):
        array = dataset[f"measure_{name}_censored_share"]
        for variant in dataset["variant"].values:
            for group, part in _groups(array.sel(variant=variant)):
                shares.append({"variant": str(variant), "measure": name, "group": group,
                               "metric": "censored_share", "quantile": np.nan,
                               "value": float(part.values)})
    return pd.concat([table, pd.DataFrame(shares)], ignore_index=True)


def difference_table(dataset: xr.Dataset) -> pd.DataFrame | None:
    """Quantiles over members of each member's metric differences, per pair of
    variants; None when the result has no pairs."""
    if "pair" not in dataset.dims:
        return None
    return _metric_rows(dataset, "pair", dataset["pair_name"].values,
                        "_difference_quantile")


def write_csv(table: pd.DataFrame, path: Path, caution: str) -> Path:
    """``table`` as CSV at ``path``, the caution as its leading ``#`` line."""
    with open(path, "w", encoding="utf-8", newline="") as handle:
        handle.write(f"# {caution}\n")
        table.to_csv(handle, index=False)
    return path


def export_tables(dataset: xr.Dataset, directory: Path, stem: str) -> list[Path]:
    """Write ``<stem>-bands.csv``, ``<stem>-metrics.csv`` and, with pairs,
    ``<stem>-differences.csv`` into ``directory``; the files written.

    Raises
    ------
    UsageError : the result has no measures.
    """
    if not measure_names(dataset):
        raise UsageError("RESULT", "", None, "the result has no measures to export",
                         "declare [[measures]] in the scenario and run it again")
    directory.mkdir(parents=True, exist_ok=True)
    caution = " ".join(str(dataset.attrs.get("caution", "")).split())
    written = [write_csv(band_table(dataset), directory / f"{stem}-bands.csv", caution),
               write_csv(metric_table(dataset), directory / f"{stem}-metrics.csv", caution)]
    differences = difference_table(dataset)
    if differences is not None:
        written.append(write_csv(differences, directory / f"{stem}-differences.csv",
                                 caution))
    return written
