"""``ensemble summary``: the measures lead, censored peak times are bounds, rows without
information are left out, variant titles and stored differences are shown, ``--only``
and ``--all`` choose rows, and flagged members get the step check in plain words.

Expectations are the definitions of the project's reference
(``ensemble/scenario/reference.md``, ``[[measures]]`` and result file) and the README's
section on ``ensemble summary``; the step that would pass follows the error model
C h^p of a method of order p (Hairer, Norsett & Wanner 1993, "Solving Ordinary
Differential Equations I", sec. II.3).
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from ensemble import api
from ensemble.output.dataset import with_label_indexes
from ensemble.present.step_check import SAFETY, advice, step_that_passes
from ensemble.present.summary import summary_text
from ensemble.records import NON_FINITE, STEP_CHECK_FAILED
from support import REPO


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> xr.Dataset:
    """The age-structured demo with 30 members, through the file's own encoding."""
    scenario = api.load_scenario(REPO / "scenarios" / "age-seir.toml", member_count=30)
    path = tmp_path_factory.mktemp("demo") / "age.nc"
    api.simulate(scenario, backend="numpy").to_netcdf(path)
    with xr.open_dataset(path, decode_timedelta=False) as dataset:
        yield with_label_indexes(dataset.load())


def _table_rows(text: str) -> list[list[str]]:
    """The cells of the first table's rows (split on runs of two spaces)."""
    lines = text.splitlines()
    start = next(i for i, line in enumerate(lines) if line.lstrip().startswith("variant "
                                                                               ) and "units" in line)
    rows = []
    for line in lines[start + 1:]:
        if not line.strip():
            break
        rows.append([cell.strip() for cell in line.strip().split("  ") if cell.strip()])
    return rows


def test_the_demo_summary_leads_with_measures_and_fits_one_screen(demo):
    text = summary_text(demo)
    assert len(text.splitlines()) <= 50
    rows = _table_rows(text)
    assert [row[1] for row in rows[:4]] == ["R0", "beds peak", "beds peak time",
                                            "beds days above"]
    assert "variant long-break: Autumn break extended to three weeks" in text
    assert "long-break minus calendar" in text and "calendar minus calendar" not in text


def test_the_demo_summary_has_no_row_without_information(demo):
    """No row is zero in every quantile, and no peak is at an end in every member."""
    for row in _table_rows(summary_text(demo, show_all=True)):
        quantiles = row[-len(demo["quantile"]):]
        assert any(cell not in ("0", "0.0", "0.00", "0.000", "-0.0") for cell in quantiles), row
        if row[1].endswith("peak time"):
            assert not all(cell.startswith("≥") for cell in quantiles), row
            assert not all(cell.startswith("≤") for cell in quantiles), row
    shown = summary_text(demo, show_all=True)
    assert "S[0-17]" not in shown and "R[0-17]" not in shown   # only fall, only rise
    assert "I[0-17]" in shown


def test_censored_peak_times_are_printed_as_bounds(demo):
    """A quantile of the peak time at the last reported day is a bound, ``≥ <day>``;
    the censored column is the stored share."""
    last = str(demo["time"].values[-1])[:10]
    text = summary_text(demo, only=["beds"])
    share = demo["measure_beds_censored_share"].sel(variant="calendar").item()
    line = next(line for line in text.splitlines()
                if line.strip().startswith("calendar") and "beds peak time" in line)
    assert f"{100 * share:.0f}%" in line
    quantiles = demo["measure_beds_peak_time_quantile"].sel(variant="calendar").values
    for value in quantiles:
        day = str(value)[:10]
        assert (f"≥ {day}" in line) == (day == last)


def test_only_and_all_choose_the_rows(demo):
    only = summary_text(demo, only=["admissions"])
    assert "admissions total" in only and "beds" not in only and "R0" not in only
    assert "compartment" not in summary_text(demo)
    assert "compartment peak" in summary_text(demo, show_all=True)
    assert "I[65-plus]" in summary_text(demo, only=["I"])


def test_flagged_members_get_the_step_check_in_plain_words():
    status = np.array([0, STEP_CHECK_FAILED, STEP_CHECK_FAILED, NON_FINITE], dtype=np.uint8)
    step_error = np.array([0.5, 3.0, 16.0, np.nan])
    lines = advice(status, step_error, "rk4", 0.5)
    assert lines[0].startswith("75% of the members are flagged")
    assert "step_check_failed 50%" in lines[0] and "non_finite_value 25%" in lines[0]
    assert "worst step_error is 16" in lines[1]
    # order 4: the error of 16 tolerances falls to 1 at half the step, times the safety
    assert step_that_passes(0.5, 16.0, 4) == pytest.approx(SAFETY * 0.25)
    assert f"{SAFETY * 0.25:.3g} days" in lines[1]
    assert advice(np.zeros(3, np.uint8), np.zeros(3), "rk4", 0.5) == []


def test_a_strict_run_with_flagged_members_explains_the_step_and_exits_1(tmp_path):
    """A tolerance no fixed step of this size meets flags every member (the project's
    reference, ``[solver.check]``): the run writes its file, says so in plain words, and
    --strict makes it exit 1; without --strict it exits 0."""
    from support import GROUPED_TOML, run_cli

    text = GROUPED_TOML.format(start="", members=4, keep_members="false", compression=1)
    text = text.replace('report_every = 1', 'report_every = 1\ncheck = { rtol = 1e-12, '
                        'atol = 1e-12 }')
    (tmp_path / "tight.toml").write_text(text, encoding="utf-8")
    strict = run_cli("run", "tight.toml", "--strict", "--workers", "0", "--backend",
                     "numpy", "--output", "strict.nc", cwd=tmp_path)
    assert strict.returncode == 1, strict.stderr
    assert (tmp_path / "strict.nc").exists()
    assert "100% of the members are flagged" in strict.stdout
    assert "would pass: set [solver] step (now 0.5)" in strict.stdout
    relaxed = run_cli("run", "tight.toml", "--workers", "0", "--backend", "numpy",
                      "--output", "relaxed.nc", cwd=tmp_path)
    assert relaxed.returncode == 0, relaxed.stderr
    assert "members are flagged" in relaxed.stdout
