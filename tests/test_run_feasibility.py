"""``ensemble check`` and ``ensemble run`` estimate a run's work, memory and disk, refuse
what cannot finish or be written (exit status 2, with the figures, nothing computed), and
say how to proceed with a run that is large but feasible (the README's ``ensemble check``
section).

The scenario is the illustrative SEIR town of ``support.write_scenario`` (invented
numbers).  Memory and free disk are the machine's, so the tests that need a small machine
or a full disk give the estimate a stand-in for psutil's and shutil's answers.
"""

from __future__ import annotations

from collections import namedtuple
from pathlib import Path

import pytest

import xarray as xr

from ensemble import api
from ensemble.errors import InputError, ScenarioError
from ensemble.run import feasibility
from ensemble.run.feasibility import estimate
from support import run_cli, write_scenario

Usage = namedtuple("Usage", "total used free")
Memory = namedtuple("Memory", "total")


def test_work_is_members_times_steps_times_the_check_runs(tmp_path: Path) -> None:
    """Worked by hand: 2 variants x 40 members x (30 days / 0.25 day) steps, times 1 + 2
    for the run at h and the step check's run at h / 2; with three levels 1 + 2 + 4."""
    scenario = api.load_scenario(write_scenario(tmp_path, members=40, days=30, step=0.25))
    assert estimate(scenario).member_steps == 2 * 40 * 120 * 3
    three = api.load_scenario(write_scenario(tmp_path, members=40),
                              settings=["solver.check.levels=3"])
    assert estimate(three).member_steps == 2 * 40 * 120 * 7
    assert estimate(scenario, members=10).member_steps == 2 * 10 * 120 * 3


def test_the_time_estimate_counts_the_rows_of_a_member(tmp_path: Path) -> None:
    """Worked by hand: the SEIR town has 4 compartments and 3 flows, so a member-step is 7
    row-steps, and the time is the row-steps over the measured pace times the cores
    (2 variants x 40 members x 120 steps x 3 runs x 7 rows at 2e8 a core-second)."""
    scenario = api.load_scenario(write_scenario(tmp_path, members=40, days=30, step=0.25))
    figures = estimate(scenario)
    assert figures.row_steps == 2 * 40 * 120 * 3 * 7
    assert figures.hours(2) * 3600 == pytest.approx(2 * 40 * 120 * 3 * 7 / (2e8 * 2))


def test_measures_add_their_series_and_metrics_to_the_sizes(tmp_path: Path) -> None:
    """Worked by hand: a stock measure reported at the 31 times of 30 days and a flow
    measure over 5-day windows (6 windows) add 31 + 6 values of each member's series to
    the result file and to the saved chunks, and 5 metrics per measure row (peak value,
    peak time, total, days above, censored) to every per-member size; 2 variants x 40
    members."""
    path = write_scenario(tmp_path, members=40, days=30)
    before = estimate(api.load_scenario(path))
    with path.open("a") as text:
        text.write('\n[[measures]]\nname = "infectious"\nof = "I"\n'
                   '\n[[measures]]\nname = "new_cases"\nof = "infection"\nwindow = 5\n')
    after = estimate(api.load_scenario(path))
    members = 2 * 40
    metrics = 2 * 5 * 8
    assert after.file_bytes - before.file_bytes == members * (metrics + (31 + 6) * 8)
    assert after.work_bytes - before.work_bytes == members * (metrics + (31 + 6) * 8)
    assert after.driver_bytes - before.driver_bytes == members * metrics


@pytest.mark.parametrize("setting, key, shown", [
    ("scenario.members=2147483648", "scenario.members", "32-bit"),
    ("solver.step=1e-300", "solver.step", "1e+300 steps between two reported times"),
    ("solver.step=1e-320", "solver.step", "inf steps between two reported times"),
], ids=["members-beyond-int32", "step-1e-300", "step-below-float"])
def test_check_and_run_refuse_what_cannot_finish(tmp_path: Path, setting: str, key: str,
                                                 shown: str) -> None:
    scenario = write_scenario(tmp_path, members=4)
    for command in (("check",), ("run", "--workers", "0")):
        done = run_cli(*command, scenario, "--set", setting, cwd=tmp_path)
        assert done.returncode == 2, done.stderr
        assert key in done.stderr and shown in done.stderr
        assert "Traceback" not in done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["testtown.toml"]


def test_an_output_that_is_a_directory_is_refused_before_computing(tmp_path: Path) -> None:
    scenario = write_scenario(tmp_path, members=4)
    (tmp_path / "results").mkdir()
    done = run_cli("run", scenario, "--workers", "0", "-o", "results", cwd=tmp_path)
    assert done.returncode == 2, done.stderr
    assert "results: is a directory" in done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["results", "testtown.toml"]
    assert not any((tmp_path / "results").iterdir())


def test_more_than_memory_is_refused(tmp_path: Path, monkeypatch: pytest.MonkeyPatch
                                     ) -> None:
    """A machine of 1 MB: the 2 x 100,000 members' values at the finish do not fit."""
    monkeypatch.setattr(feasibility.psutil, "virtual_memory", lambda: Memory(10 ** 6))
    scenario = api.load_scenario(write_scenario(tmp_path, members=100_000))
    with pytest.raises(InputError, match="of per-member values, more than this machine's "
                                         "1 MB of memory"):
        api.check_report(scenario)


def test_more_than_the_free_disk_is_refused_before_computing(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A disk with 1 MB free cannot take 2 x 4,000 members' trajectories; a resume, whose
    saved chunks are on the disk already, is not refused for it."""
    monkeypatch.setattr(feasibility.shutil, "disk_usage",
                        lambda path: Usage(10 ** 9, 10 ** 9 - 10 ** 6, 10 ** 6))
    scenario = api.load_scenario(write_scenario(tmp_path, members=4000))
    with pytest.raises(InputError, match=r"needs about .* of disk .* and 1 MB are free"):
        api.run(scenario, workers=0, output=tmp_path / "result.nc", progress=False)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["testtown.toml"]
    feasibility.refuse_infeasible(scenario, estimate(scenario), tmp_path / "result.nc",
                                  resume=True)


def test_a_large_feasible_run_gets_advice(tmp_path: Path, monkeypatch: pytest.MonkeyPatch
                                          ) -> None:
    """Four million members at a step of a thousandth of a day: hours on two cores and
    tens of GB of trajectories; check names a cluster and keep_members = false."""
    monkeypatch.setattr(feasibility.shutil, "disk_usage",
                        lambda path: Usage(10 ** 15, 0, 10 ** 15))
    monkeypatch.setattr(feasibility.psutil, "virtual_memory", lambda: Memory(10 ** 12))
    monkeypatch.setattr(feasibility, "machine_cores", lambda: 2)
    scenario = api.load_scenario(write_scenario(tmp_path, members=4),
                                 settings=["scenario.members=4000000", "solver.step=0.001"])
    text = api.check_report(scenario)
    assert "feasibility" in text and "member-steps" in text
    assert "--cluster NAME" in text and "keep_members = false" in text
    small = api.check_report(api.load_scenario(write_scenario(tmp_path, members=4)))
    assert "--cluster NAME" not in small and "keep_members = false" not in small


def test_the_largest_seed_is_written_and_a_larger_one_refused(tmp_path: Path) -> None:
    """The file stores the seed as a 64-bit signed integer: 2^63 - 1 runs end to end
    and is stored; 2^63 is refused when the scenario is read, before any work."""
    scenario = api.load_scenario(write_scenario(tmp_path, members=2), seed=2 ** 63 - 1)
    result = api.run(scenario, output=tmp_path / "result.nc", workers=0, backend="numpy",
                     progress=False)
    with xr.open_dataset(result) as written:
        assert int(written.attrs["seed"]) == 2 ** 63 - 1
    with pytest.raises(ScenarioError, match="scenario.seed"):
        api.load_scenario(write_scenario(tmp_path, members=2), seed=2 ** 63)
