"""``ensemble plot`` and ``ensemble export`` on a real result file: the figures are
readable PNG and SVG files, and the CSV tables hold the file's numbers.

References: the PNG signature and dimensions are read back with matplotlib's own image
reader; the SVG is parsed as XML (W3C, "Scalable Vector Graphics (SVG) 1.1", root element
``svg``); the CSV is read with ``pandas.read_csv(comment="#")`` as the README says, and
compared with the result file opened by xarray.
"""

from __future__ import annotations

import xml.etree.ElementTree as ElementTree

import matplotlib.image
import numpy as np
import pandas as pd
import pytest

from ensemble import api
from ensemble.about import CAUTION
from support import run_cli
from test_output_measures import _scenario_text


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    directory = tmp_path_factory.mktemp("briefing")
    scenario = directory / "measured.toml"
    scenario.write_text(_scenario_text(12, True), encoding="utf-8")
    return api.run(scenario, output=directory / "measured.nc", workers=0,
                   progress=False, backend="numpy")


def test_plot_writes_readable_png_and_svg(result, tmp_path):
    finished = run_cli("plot", result, "--bands", "50,90", "--output", tmp_path / "figures",
                       cwd=tmp_path)
    assert finished.returncode == 0, finished.stderr
    written = sorted(p.name for p in (tmp_path / "figures").iterdir())
    assert written == sorted(f"{m}-{kind}.{ext}" for m in ("infected", "young_ever",
                                                           "infections")
                             for kind in ("fan", "peaks") for ext in ("png", "svg"))
    for path in (tmp_path / "figures").glob("*.png"):
        image = matplotlib.image.imread(path)
        assert image.ndim == 3 and image.shape[0] > 200 and image.shape[1] > 200
        assert image.std() > 0           # not a blank canvas
    for path in (tmp_path / "figures").glob("*.svg"):
        root = ElementTree.parse(path).getroot()
        assert root.tag.endswith("svg") and len(list(root.iter())) > 50
    # matplotlib writes each drawn text beside its glyphs as an XML comment
    svg = (tmp_path / "figures" / "infected-fan.svg").read_text(encoding="utf-8")
    assert "Contacts as usual" in svg and "Model projections inform" in svg


def test_plot_refuses_bands_the_result_cannot_draw(result, tmp_path):
    finished = run_cli("plot", result, "--bands", "80", cwd=tmp_path)
    assert finished.returncode == 2 and "80% band" in finished.stderr
    finished = run_cli("plot", result, "--measure", "beds", cwd=tmp_path)
    assert finished.returncode == 2 and "no measure 'beds'" in finished.stderr


def test_exported_tables_hold_the_numbers_of_the_file(result, tmp_path):
    finished = run_cli("export", result, "--format", "csv", "--output", tmp_path,
                       cwd=tmp_path)
    assert finished.returncode == 0, finished.stderr
    bands_path = tmp_path / "measured-bands.csv"
    assert bands_path.read_text(encoding="utf-8").splitlines()[0] == f"# {CAUTION}"
    bands = pd.read_csv(bands_path, comment="#")
    assert list(bands.columns) == ["variant", "measure", "group", "start", "end",
                                   "quantile", "value"]
    with api.open_result(result) as dataset:
        expected = dataset["measure_infections_quantile"].sel(
            variant="fewer-contacts", group="old", quantile=0.75).values
        rows = bands[(bands.variant == "fewer-contacts") & (bands.measure == "infections")
                     & (bands.group == "old") & (bands["quantile"] == 0.75)]
        np.testing.assert_allclose(rows.value.values, expected, rtol=1e-15)
        # the window's bounds: five days each, starting at the start date
        assert list(rows.start) == ["2027-02-01", "2027-02-06"]
        assert list(rows.end) == ["2027-02-06", "2027-02-11"]
        metrics = pd.read_csv(tmp_path / "measured-metrics.csv", comment="#")
        totals = metrics[(metrics.measure == "infections") & (metrics.metric == "total")
                         & (metrics.variant == "usual") & (metrics.group == "young")]
        np.testing.assert_allclose(
            totals.value.astype(float).values,
            dataset["measure_infections_total_quantile"].sel(variant="usual",
                                                             group="young").values)
        differences = pd.read_csv(tmp_path / "measured-differences.csv", comment="#")
        assert set(differences.pair) == set(str(p) for p in dataset["pair_name"].values)
