"""Fan charts of the measures of a result (``ensemble plot``), and the distribution over
members of each measure's peak and total, drawn headless (matplotlib's Agg and SVG
backends) into PNG and SVG files.

A fan chart draws, per variant in a panel of its own (shared axes), the median of the
measure over members as a line and each central band (50 % between the 0.25 and 0.75
quantiles, 90 % between 0.05 and 0.95, ...) as a shaded area, from the quantiles the
result stores; a band needs both of its quantiles in the file.  Every figure carries the
result's caution in its footer.

Observed counts are drawn as points on the panels of the measure they count: those a
fit saw (the ``observation_*`` variables of a fit's result) as filled dots, and counts
given later (``ensemble plot --observed``) as open circles, each in the middle of the
window it counts (a measure over windows is drawn as steps spanning each window).
"""

from __future__ import annotations

import datetime
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402

from ensemble.errors import UsageError  # noqa: E402
from ensemble.present.summary import measure_names  # noqa: E402

LINE = "#1b4d6b"
"""Colour of the median line and, lighter, of the bands."""

BAND_ALPHA = 0.22
"""Opacity of one band; nested bands add up, darkest in the middle."""

FORMATS = ("png", "svg")

OBSERVED = "#a23b1f"
"""Colour of observed counts."""


@dataclass(frozen=True)
class ObservedPoints:
    """Observed counts of one measure drawn on its fan chart.

    Attributes
    ----------
    label : the legend's text.
    kind : ``"fitted"`` (counts a fit saw) or ``"later"`` (counts given to plot); the
        SVG identifies each panel's points as ``observed-<kind>-<panel>``.
    times : the counts' times on the chart's axis (dates, or days without a start).
    values : the counts (NaN ones are not drawn).
    """

    label: str
    kind: str
    times: np.ndarray
    values: np.ndarray


@dataclass(frozen=True)
class LaterCounts:
    """Counts given to ``ensemble plot`` (``--observed``): the file and, row by row,
    its dates (or days since the start), values and line numbers."""

    file: str
    dates: tuple[datetime.date | float, ...]
    values: np.ndarray
    lines: tuple[int, ...]


def band_quantiles(dataset: xr.Dataset, widths: Sequence[int]) -> list[tuple[int, float,
                                                                              float]]:
    """(width, lower, upper) of each central band of ``widths`` percent, checked
    against the result's quantiles.

    Raises
    ------
    UsageError : a band whose quantiles the result does not hold.
    """
    stored = [float(q) for q in dataset["quantile"].values]
    bands = []
    for width in sorted(widths, reverse=True):
        lower, upper = round((1 - width / 100) / 2, 6), round((1 + width / 100) / 2, 6)
        if not (any(np.isclose(q, lower) for q in stored)
                and any(np.isclose(q, upper) for q in stored)):
            raise UsageError("--bands", "", width, f"the result holds no quantiles "
                             f"{lower:g} and {upper:g} for a {width}% band",
                             "its quantiles are " + ", ".join(f"{q:g}" for q in stored))
        bands.append((width, lower, upper))
    return bands


def _quantile(array: xr.DataArray, probability: float) -> np.ndarray:
    index = int(np.argmin(np.abs(array["quantile"].values - probability)))
    return array.isel(quantile=index).values


def _footer(figure, dataset: xr.Dataset) -> None:
    caution = str(dataset.attrs.get("caution", ""))
    title = str(dataset.attrs.get("title", ""))
    figure.text(0.01, 0.005, f"{title}. {caution}", fontsize=7, color="#444444",
                ha="left", va="bottom", wrap=True)


def _panels(dataset: xr.Dataset, rows: int = 1):
    variants = list(dataset["variant"].values)
    figure, axes = plt.subplots(rows, len(variants), sharex=True, sharey=True,
                                squeeze=False, figsize=(4.2 * len(variants), 3.4 * rows + 0.6))
    return figure, axes, variants


def _title(dataset: xr.Dataset, variant: object) -> str:
    if "variant_title" in dataset.coords:
        return str(dataset["variant_title"].sel(variant=variant).values)
    return str(variant)


def fan_chart(dataset: xr.Dataset, name: str, bands: Sequence[tuple[int, float, float]],
              observed: Sequence[ObservedPoints] = ()):
    """The figure of measure ``name``: one panel per variant (one row per group for a
    measure by group), with the ``observed`` counts as points on every panel."""
    array = dataset[f"measure_{name}_quantile"]
    predictive = dataset.get(f"measure_{name}_as_observed_quantile")
    time_dim = array.dims[-1]
    groups = list(array["group"].values) if "group" in array.dims else [None]
    figure, axes, variants = _panels(dataset, len(groups))
    axis_times = TimeAxis.of(dataset, time_dim)
    units = str(array.attrs.get("units", ""))
    for column, variant in enumerate(variants):
        for row, group in enumerate(groups):
            axis = axes[row][column]
            part = array.sel(variant=variant)
            if group is not None:
                part = part.sel(group=group)
            for width, lower, upper in bands:
                axis.fill_between(axis_times.x, axis_times.values(_quantile(part, lower)),
                                  axis_times.values(_quantile(part, upper)),
                                  color=LINE, alpha=BAND_ALPHA, linewidth=0,
                                  step=axis_times.step, label=f"{width}% of members")
            axis.plot(axis_times.x, axis_times.values(_quantile(part, 0.5)), color=LINE,
                      linewidth=1.6, drawstyle=axis_times.drawstyle, label="median")
            if predictive is not None and bands:
                _draw_predictive(axis, predictive.sel(variant=variant), axis_times,
                                 max(bands))
            for points in observed:
                _draw_points(axis, points, axis_times, f"{row}-{column}")
            axis.grid(color="#dddddd", linewidth=0.6)
            heading = _title(dataset, variant) + (f" ({group})" if group else "")
            axis.set_title(heading, fontsize=9)
            if column == 0:
                axis.set_ylabel("persons" if units == "1" else units)
            axis.tick_params(axis="x", labelrotation=30, labelsize=7)
    axes[0][0].legend(fontsize=7, loc="upper left", frameon=False)
    figure.suptitle(str(array.attrs.get("long_name", name)).removeprefix(
        "quantile over members of the "), fontsize=11)
    figure.tight_layout(rect=(0, 0.05, 1, 1))
    _footer(figure, dataset)
    return figure


@dataclass(frozen=True)
class TimeAxis:
    """Where a series is drawn along the time axis.

    A measure counted over windows is drawn as steps, each window's value level over the
    whole window (from its start to its end, the coordinate's CF bounds), and a count
    observed over a window as a point in the middle of its window, inside the step it is
    compared with; a daily series is drawn as a line through its times.

    Attributes
    ----------
    x : the x values to draw at (every window's start, then the last window's end; or
        the times).
    half_window : how far before a window's end its middle lies (0 for a daily series).
    step : ``fill_between``'s ``step`` (None for a line).
    """

    x: np.ndarray
    half_window: object
    step: str | None

    @classmethod
    def of(cls, dataset: xr.Dataset, time_dim: str) -> TimeAxis:
        times = dataset[time_dim].values
        bounds = dataset[time_dim].attrs.get("bounds")
        if time_dim == "time" or bounds not in dataset:
            return cls(times, times[0] - times[0], None)
        edges = dataset[bounds].values
        return cls(np.append(edges[:, 0], edges[-1, 1]), (edges[0, 1] - edges[0, 0]) / 2,
                   "post")

    @property
    def drawstyle(self) -> str:
        """``plot``'s ``drawstyle`` matching :attr:`step`."""
        return "default" if self.step is None else f"steps-{self.step}"

    def values(self, values: np.ndarray) -> np.ndarray:
        """``values`` (one per time) as drawn at :attr:`x`: the last window's repeated
        at its end, where its step closes."""
        return values if self.step is None else np.append(values, values[-1])

    def points(self, times: np.ndarray) -> np.ndarray:
        """Where counts observed at ``times`` (the ends of their windows) are drawn."""
        return times - self.half_window


def _draw_predictive(axis, array: xr.DataArray, axis_times: TimeAxis,
                     band: tuple[int, float, float]) -> None:
    """The widest ``band`` of the counts as observed (observation noise included) as
    dashed bounds: where observed counts are expected to fall."""
    width, lower, upper = band
    for probability, label in ((lower, f"{width}% of counts as observed"), (upper, None)):
        axis.plot(axis_times.x, axis_times.values(_quantile(array, probability)),
                  color=LINE, linewidth=0.9, linestyle="--",
                  drawstyle=axis_times.drawstyle, label=label)


def _draw_points(axis, points: ObservedPoints, axis_times: TimeAxis, panel: str) -> None:
    """``points`` on ``axis``, each in the middle of its window: filled dots for counts a
    fit saw, open circles for later ones."""
    seen = np.isfinite(points.values)
    filled = points.kind == "fitted"
    axis.plot(axis_times.points(points.times[seen]), points.values[seen],
              linestyle="none", marker="o",
              markersize=4, color=OBSERVED, markerfacecolor=OBSERVED if filled else "none",
              label=points.label, gid=f"observed-{points.kind}-{panel}", zorder=3)


def fitted_observations(dataset: xr.Dataset) -> dict[str, list[ObservedPoints]]:
    """The counts a fit saw, by measure (none for a result not made by a fit)."""
    if "observation_count" not in dataset:
        return {}
    measures = dataset["observation_measure"].values.astype(str)
    found: dict[str, list[ObservedPoints]] = {}
    for name in map(str, dict.fromkeys(measures)):
        chosen = measures == name
        found[name] = [ObservedPoints("counts the fit saw", "fitted",
                                      dataset["observation_time"].values[chosen],
                                      dataset["observation_count"].values[chosen])]
    return found


def later_observations(dataset: xr.Dataset, counts: LaterCounts,
                       names: Sequence[str]) -> tuple[str, ObservedPoints]:
    """(measure, points) of counts given to plot: the measure is the one chosen with
    ``--measure`` when a single one is, else the one measure a fit saw; each date must
    end one of its windows (a reported time for a stock).

    Raises
    ------
    UsageError : no single measure to draw them on, a measure by group, or a date that
        is not one of the measure's times (naming the file's line).
    """
    fitted = list(fitted_observations(dataset))
    if len(names) == 1:
        name = names[0]
    elif len(fitted) == 1:
        name = fitted[0]
    else:
        raise UsageError("--observed", "", counts.file, "name the measure the counts are "
                         "of with a single --measure", "its measures are: "
                         + ", ".join(measure_names(dataset)))
    array = dataset[f"measure_{name}_quantile"]
    if "group" in array.dims:
        raise UsageError("--observed", "", counts.file, f"measure {name!r} is per group; "
                         "counts are drawn on a measure that is one series")
    axis = dataset[array.dims[-1]].values
    times = []
    for date, line in zip(counts.dates, counts.lines):
        time = _axis_time(date, axis)
        if time is None or not np.any(axis == time):
            shown = np.datetime_as_string(axis[:3], unit="D") \
                if np.issubdtype(axis.dtype, np.datetime64) else axis[:3]
            raise UsageError(f"{counts.file}: line {line}", "date", str(date),
                             f"not one of the times of measure {name!r} (the ends of its "
                             "windows)", f"its first times: {', '.join(map(str, shown))}")
        times.append(time)
    return name, ObservedPoints(f"later counts ({Path(counts.file).name})", "later",
                                np.array(times, dtype=axis.dtype), counts.values)


def _axis_time(date: datetime.date | float, axis: np.ndarray):
    """``date`` in the units of the chart's time axis, or None when they do not mix
    (a date on an axis of days, a number of days on an axis of dates)."""
    if np.issubdtype(axis.dtype, np.datetime64):
        if isinstance(date, datetime.date):
            return np.datetime64(date.isoformat()).astype(axis.dtype)
        return None
    return None if isinstance(date, datetime.date) else float(date)


def distribution_chart(dataset: xr.Dataset, name: str):
    """The figure of the distribution over members of measure ``name``'s peak and (a
    flow) total: per variant, box-like bars from the stored quantiles (the outer pair
    as whiskers, the inner pair as the box, the median as a tick)."""
    metrics = [m for m in ("peak_value", "total")
               if f"measure_{name}_{m}_quantile" in dataset]
    figure, axes = plt.subplots(1, len(metrics), squeeze=False,
                                figsize=(4.6 * len(metrics), 3.6))
    variants = list(dataset["variant"].values)
    for axis, metric in zip(axes[0], metrics):
        array = dataset[f"measure_{name}_{metric}_quantile"]
        if "group" in array.dims:
            array = array.sum("group")
        probabilities = array["quantile"].values
        for position, variant in enumerate(variants):
            values = array.sel(variant=variant).values
            low, high = values[0], values[-1]
            inner = (_quantile(array.sel(variant=variant), 0.25),
                     _quantile(array.sel(variant=variant), 0.75))
            axis.plot([position, position], [low, high], color=LINE, linewidth=1)
            axis.add_patch(plt.Rectangle((position - 0.2, inner[0]), 0.4,
                                         inner[1] - inner[0], color=LINE, alpha=0.35))
            axis.plot([position - 0.2, position + 0.2],
                      [_quantile(array.sel(variant=variant), 0.5)] * 2, color=LINE,
                      linewidth=2)
        axis.set_xticks(range(len(variants)),
                        [_title(dataset, v) for v in variants], fontsize=7, rotation=15)
        axis.set_title(f"{name}: {metric.replace('_', ' ')} (quantiles "
                       f"{probabilities[0]:g} to {probabilities[-1]:g})", fontsize=9)
        axis.grid(axis="y", color="#dddddd", linewidth=0.6)
    figure.tight_layout(rect=(0, 0.07, 1, 1))
    _footer(figure, dataset)
    return figure


def plot_measures(dataset: xr.Dataset, directory: Path, names: Sequence[str] = (),
                  bands: Sequence[int] = (50, 90),
                  later: LaterCounts | None = None) -> list[Path]:
    """Write the fan chart and the distribution chart of each measure (``names``, or
    every one) as ``<measure>-fan.png``/``.svg`` and ``<measure>-peaks.png``/``.svg``
    in ``directory``; the files written.  The counts a fit saw, and the ``later`` ones,
    are drawn on their measure's fan chart.

    Raises
    ------
    UsageError : the result has no measures, an unknown name, a band its quantiles
        cannot draw, or later counts that cannot be drawn (:func:`later_observations`).
    """
    known = measure_names(dataset)
    if not known:
        raise UsageError("RESULT", "", None, "the result has no measures to plot",
                         "declare [[measures]] in the scenario and run it again")
    for name in names:
        if name not in known:
            raise UsageError("--measure", "", name, f"the result has no measure {name!r}",
                             "its measures are: " + ", ".join(known))
    chosen = band_quantiles(dataset, bands)
    observed = fitted_observations(dataset)
    if later is not None:
        name, points = later_observations(dataset, later, names)
        observed[name] = [*observed.get(name, []), points]
    directory.mkdir(parents=True, exist_ok=True)
    written = []
    for name in names or known:
        for suffix, figure in (("fan", fan_chart(dataset, name, chosen,
                                                 observed.get(name, ()))),
                               ("peaks", distribution_chart(dataset, name))):
            for extension in FORMATS:
                path = directory / f"{name}-{suffix}.{extension}"
                figure.savefig(path, dpi=110)
                written.append(path)
            plt.close(figure)
    return written
