"""The result file as analysts' tools see it: CF-1.10, ncdump, xarray, the summary
command, and the numbers of a real run.

External references: the IOOS ``compliance-checker`` package's CF check (CF
conventions 1.10, Eaton et al. 2022); ``ncdump`` of Unidata's netCDF-C; the SIR final
size relation and peak prevalence (Kermack and McKendrick 1927, "A contribution to the
mathematical theory of epidemics", Proc. R. Soc. A 115; in the form of Hethcote 2000,
"The mathematics of infectious diseases", SIAM Review 42(4), section 2: along an SIR
path S + I - (N / R0) ln S is constant).
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import netCDF4
import numpy as np
import pytest
import xarray as xr
from scipy.optimize import brentq
from typer.testing import CliRunner

import ensemble
from ensemble import api
from ensemble.cli import app
from ensemble.examples import sir_text
from ensemble.errors import NotAResult
from ensemble.run.journal import WorkJournal
from support import fill, grouped_scenario, layout_of, load_text


def _made_up_file(directory: Path, **options) -> Path:
    layout = layout_of(grouped_scenario(directory, members=7, **options))
    journal = WorkJournal.open(directory / "result.nc", layout, resume=False, force=False)
    fill(journal, layout, chunk=3)
    return journal.finish()


@pytest.fixture(scope="module")
def dated(tmp_path_factory) -> Path:
    return _made_up_file(tmp_path_factory.mktemp("dated"))


@pytest.fixture(scope="module")
def undated(tmp_path_factory) -> Path:
    return _made_up_file(tmp_path_factory.mktemp("undated"), start=False)


UNDATED_TIME_RULE = "\u00a75.1 Independent Latitude, Longitude, Vertical, and Time Axes"
"""Without ``start`` the reference (ensemble/scenario/reference.md, result file) gives
``time`` units "days" (no reference date); the checker takes a variable named ``time``
for a CF time axis, which needs one (CF 4.4)."""


def _cf_failures(path: Path) -> list[dict]:
    """The failed highest-priority (weight 3) results of the ``compliance-checker``
    console script's cf:1.10 suite, run in its own process."""
    checker = shutil.which("compliance-checker") or str(
        Path(sys.executable).with_name("compliance-checker"))
    done = subprocess.run([checker, "--test", "cf:1.10", "--format", "json", "--output", "-",
                           str(path)], capture_output=True, text=True, timeout=300)
    report = json.loads(done.stdout[done.stdout.index("{"):])["cf:1.10"]
    assert report["possible_points"] > 100            # the suite really ran
    return [result for result in report["high_priorities"]
            if result["value"][0] < result["value"][1]]


def test_cf_check_has_no_high_priority_failures(dated):
    assert _cf_failures(dated) == []


def test_cf_check_without_a_start_fails_only_the_time_reference_rule(undated):
    failures = _cf_failures(undated)
    assert [f["name"] for f in failures] == [UNDATED_TIME_RULE]
    assert all("'time'" in message for message in failures[0]["msgs"])


def test_ncdump_reads_the_file(dated):
    if shutil.which("ncdump") is None:
        pytest.skip("ncdump not installed (Debian package netcdf-bin)")
    header = subprocess.run(["ncdump", "-h", str(dated)], capture_output=True, text=True,
                            check=True).stdout
    assert ":Conventions = \"CF-1.10\"" in header
    assert "double state(variant, member, compartment, group, time)" in header
    values = subprocess.run(["ncdump", "-v", "member", str(dated)], capture_output=True,
                            text=True, check=True).stdout
    assert "member = 0, 1, 2, 3, 4, 5, 6 ;" in values


def test_times_decode_to_dates_with_a_start(dated, undated):
    with xr.open_dataset(dated) as dataset:
        assert dataset.time.dtype.kind == "M"
        assert dataset.time.values[0] == np.datetime64("2027-02-01")
        assert dataset.time.values[-1] == np.datetime64("2027-02-13")
        assert dataset.peak_time.dtype.kind == "M"
    with netCDF4.Dataset(dated) as nc:
        time = nc["time"]
        assert (time.units, time.calendar, time.standard_name, time.axis) == (
            "days since 2027-02-01", "standard", "time", "T")
    with xr.open_dataset(undated) as dataset:
        assert dataset.time.dtype == np.float64
        assert dataset.time.attrs == {"units": "days",
                                      "long_name": "days since the start of the projection"}
        np.testing.assert_array_equal(dataset.time.values, np.arange(13.0))


def test_variables_dimensions_and_attributes_follow_the_spec(dated):
    with netCDF4.Dataset(dated) as nc:
        for name in ("member", "quantile", "time"):
            assert "_FillValue" not in nc[name].ncattrs(), name
        assert nc["member"].dtype == np.int32 and nc["quantile"].dtype == np.float64
        state = nc["state"]
        assert state.dimensions == ("variant", "member", "compartment", "group", "time")
        assert state.chunking() == [1, 1, 3, 2, 13]
        assert state.filters()["zlib"] and state.filters()["complevel"] == 4
        assert state.units == "1" and "number of persons" in state.long_name
        assert set(state.coordinates.split()) == {"variant_name", "compartment_name",
                                                  "group_name"}
        flow = nc["flow_count"]
        assert flow.dimensions == ("variant", "member", "flow", "group", "time")
        assert flow.cell_methods == "time: sum"
        assert nc["state_quantile"].dimensions == ("variant", "quantile", "compartment",
                                                   "group", "time")
        assert nc["peak_value"].dimensions == ("variant", "member", "compartment", "group")
        assert nc["total_flow_quantile"].dimensions == ("variant", "quantile", "flow", "group")
        assert nc["difference_quantile_peak_time"].units == "days"
        assert nc["peak_time"].units == "days since 2027-02-01"
        assert nc["param_susceptibility"].dimensions == ("variant", "member", "group")
        assert nc["param_infectious_days"].units == "day"
        status = nc["status"]
        assert status.dtype == np.uint8
        assert list(status.flag_masks) == [1, 2, 4, 8, 16]
        assert status.flag_meanings.split()[2] == "non_finite_value"
        assert nc["members_in_summary"].dtype == np.int32
        for label in ("variant_name", "compartment_name", "flow_name", "group_name"):
            assert nc[label].dtype is str
        assert list(nc["variant_name"][:]) == ["usual", "fewer-contacts"]
        attributes = {name: nc.getncattr(name) for name in nc.ncattrs()}
    assert attributes["Conventions"] == "CF-1.10"
    assert attributes["caution"] == ensemble.CAUTION
    assert attributes["source"] == f"ensemble {ensemble.__version__}"
    assert attributes["scenario"].startswith("# Illustrative only")
    assert (attributes["members"], attributes["seed"], attributes["sampling"]) == (7, 5, "random")
    assert (attributes["solver_method"], attributes["solver_step"]) == ("heun", 0.5)
    assert {"title", "history", "fingerprint", "time_varying_parameters"} <= attributes.keys()


def test_open_result_selects_by_label_like_the_plain_xarray_line(dated):
    dataset = api.open_result(dated)
    picked = dataset.state.sel(compartment="I", variant="fewer-contacts", group="old")
    assert picked.dims == ("member", "time")
    # the one line the README gives for plain xarray
    plain = xr.open_dataset(dated).pipe(lambda d: d.assign_coords(
        variant=d.variant_name, compartment=d.compartment_name, flow=d.flow_name,
        group=d.group_name))
    xr.testing.assert_identical(
        picked, plain.state.sel(compartment="I", variant="fewer-contacts", group="old"))


@pytest.mark.parametrize("keep_members", [True, False])
def test_simulate_returns_what_run_writes(tmp_path, keep_members):
    """api.run in chunks of 5 (the journal, the finish, the file) and api.simulate of the
    whole scenario at once, both with their default backend: the same dataset, every
    variable (values bit for bit, dimensions, attributes) and every global attribute but
    the history."""
    scenario = grouped_scenario(tmp_path, members=12, keep_members=keep_members)
    written = api.run(scenario, output=tmp_path / "r.nc", workers=0, chunk=5,
                      progress=False)
    with api.open_result(written) as from_file:
        simulated = api.simulate(scenario)
        assert set(simulated.data_vars) == set(from_file.data_vars)
        assert ("state" in simulated.data_vars) == keep_members
        assert simulated.attrs.keys() == from_file.attrs.keys()
        for name, value in simulated.attrs.items():
            if name != "history":
                assert np.array_equal(value, from_file.attrs[name]), name
        xr.testing.assert_identical(simulated.drop_attrs(deep=False),
                                    from_file.drop_attrs(deep=False))
    # the same members infect fewer with fewer contacts: the variants really differ
    infections = simulated.total_flow.sel(flow="infection")
    assert (infections.sel(variant="fewer-contacts") < infections.sel(variant="usual")).all()


def test_simulate_a_chosen_variant(tmp_path):
    """Member i draws the same numbers in every variant, so one variant alone gives the
    same trajectories; without its compare_to variant there are no differences."""
    scenario = grouped_scenario(tmp_path, members=4)
    both = api.simulate(scenario, backend="numpy")
    alone = api.simulate(scenario, variants=["fewer-contacts"], backend="numpy")
    assert list(alone.variant.values) == ["fewer-contacts"]
    assert not [name for name in alone.data_vars if name.startswith("difference_")]
    np.testing.assert_array_equal(alone.state.values[0],
                                  both.state.sel(variant="fewer-contacts").values)
    with pytest.raises(ValueError, match="fewer-contact"):
        api.simulate(scenario, variants=["fewer-contact"])


def test_simulated_sir_matches_the_final_size_and_peak_relations(tmp_path):
    """Closed SIR with R0 = 2, S0 = N - 10, I0 = 10: the conserved quantity
    S + I - (N / R0) ln S (Kermack and McKendrick 1927; Hethcote 2000, section 2) gives the
    final susceptibles S_inf and the largest prevalence at S = N / R0."""
    text = sir_text(members=2, days=300, population=1000000, infectious=10, beta=0.4,
                    gamma=0.2, step=0.125, report_every=0.25, seed=3, name="closed-sir")
    dataset = api.simulate(load_text(tmp_path, text, "sir"), backend="numpy")
    n, r0, s0, i0 = 1e6, 2.0, 1e6 - 10, 10.0
    invariant = s0 + i0 - n / r0 * np.log(s0)
    s_inf = brentq(lambda s: s - n / r0 * np.log(s) - invariant, 1.0, n / r0)
    i_max = invariant - n / r0 + n / r0 * np.log(n / r0)
    total = dataset.total_flow.sel(flow="infection").values
    peak = dataset.peak_value.sel(compartment="I").values
    np.testing.assert_allclose(total, s0 - s_inf, rtol=1e-4)
    np.testing.assert_allclose(peak, i_max, rtol=1e-4)
    # quarter-day reports: the largest reported prevalence is at most the true peak
    assert (peak <= i_max * (1 + 1e-9)).all()


def _summary(*arguments: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "ensemble", "summary", *arguments],
                          capture_output=True, text=True, timeout=120)


def test_summary_command_prints_quantiles_and_status_counts(dated):
    done = _summary(str(dated))
    assert done.returncode == 0, done.stderr
    text = done.stdout
    assert ("variant usual (4 members in the quantiles; left out, by status bit: "
            "step_check_failed 1, non_finite_value 1, impossible_drawn_start 1)") in text
    assert "variant fewer-contacts" in text
    assert "q0.05" in text and "q0.95" in text
    assert "compartment peak" in text and "I[old]" in text and "flow total" in text
    assert "non_finite_value 1" in text and "impossible_drawn_start 1" in text
    assert text.rstrip().endswith(ensemble.CAUTION)


def test_summary_refuses_what_is_not_a_complete_result(tmp_path, dated):
    not_netcdf = tmp_path / "notes.nc"
    not_netcdf.write_text("not a result")
    part = tmp_path / "part.nc"
    with netCDF4.Dataset(part, "w") as nc:      # shaped like a shard's part file
        nc.fingerprint = "f" * 64
        nc.ensemble_part = "1"
        nc.createDimension("member", 2)
        nc.createVariable("status", np.uint8, ("member",))
    work = tmp_path / "r.nc.partial"
    work.mkdir()
    runner = CliRunner()
    for target in (tmp_path / "missing.nc", not_netcdf, part, work):
        done = runner.invoke(app, ["summary", str(target)])
        assert done.exit_code == 2, target
        assert done.stderr.startswith("error: ") and str(target) in done.stderr
        with pytest.raises(NotAResult):
            api.open_result(target)
    assert "ensemble merge" in runner.invoke(app, ["summary", str(part)]).stderr
