"""``--set KEY=VALUE``: any key of the scenario file set on the command line, checked like
the file, giving bit for bit the result of the edited file.

Every setting here is invented and illustrative; the reference for each comparison is the
same scenario with the key edited in its text.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from ensemble import api
from ensemble.errors import ScenarioError
from ensemble.examples import seir_text
from ensemble.run.plan import fingerprint
from support import REPO, run_cli

SETTINGS = ["scenario.days=45", "parameters.R0.high=3.5",
            'model.flows[0].rate=beta * 1.1 * contact_scale * S * I / N',
            'solver.report_every=0.5']


def edited(text: str) -> str:
    """``text`` with the keys of :data:`SETTINGS` edited by hand."""
    changed = text.replace("days = 60", "days = 45").replace(
        'rate = "beta * contact_scale * S * I / N"',
        'rate = "beta * 1.1 * contact_scale * S * I / N"')
    changed = changed.replace("R0 = { dist = \"uniform\", low = 1.3, high = 2.5 }",
                              "R0 = { dist = \"uniform\", low = 1.3, high = 3.5 }")
    return changed.replace("[solver]\n", "[solver]\nreport_every = 0.5\n")


@pytest.fixture
def files(tmp_path):
    text = seir_text(members=40, days=60)
    assert "days = 60" in text and 'rate = "beta * contact_scale * S * I / N"' in text
    assert 'R0 = { dist = "uniform", low = 1.3, high = 2.5 }' in text
    assert "[solver]\n" in text and "report_every" not in text
    original, changed = tmp_path / "seir.toml", tmp_path / "seir-edited.toml"
    original.write_text(text, encoding="utf-8")
    changed.write_text(edited(text), encoding="utf-8")
    return original, changed


def test_an_override_gives_the_scenario_of_the_edited_file(files) -> None:
    original, changed = files
    overridden = api.load_scenario(original, settings=SETTINGS)
    assert overridden.source.overrides == tuple(SETTINGS)
    assert fingerprint(overridden) == fingerprint(api.load_scenario(changed))
    assert fingerprint(overridden) != fingerprint(api.load_scenario(original))


def test_an_override_gives_bit_for_bit_the_result_of_the_edited_file(files, tmp_path) -> None:
    """Every number of the result file (data variables and coordinates) has the same
    bytes, and so has the fingerprint; the command is in the history."""
    original, changed = files
    first = run_cli("run", original, "-o", tmp_path / "set.nc", "--workers", "0",
                    "--backend", "numpy", *(a for s in SETTINGS for a in ("--set", s)),
                    cwd=tmp_path, timeout=600)
    assert first.returncode == 0, first.stderr
    second = api.run(changed, output=tmp_path / "edited.nc", workers=0, progress=False,
                     backend="numpy")
    with xr.open_dataset(tmp_path / "set.nc", decode_times=False) as a, \
            xr.open_dataset(second, decode_times=False) as b:
        assert sorted(a.variables) == sorted(b.variables)
        for name in a.variables:
            left, right = a[name].values, b[name].values
            assert left.shape == right.shape, name
            if left.dtype.kind in "fiub":
                assert left.tobytes() == right.tobytes(), name
        assert a.attrs["fingerprint"] == b.attrs["fingerprint"]
        assert a.sizes["time"] == 91   # 45 days reported every half day
        assert "--set scenario.days=45" in a.attrs["history"]


def test_values_are_read_as_toml(files) -> None:
    original, _ = files
    scenario = api.load_scenario(original, settings=[
        'parameters.latent_days={ dist = "uniform", low = 2, high = 4 }',
        "output.quantiles=[0.1, 0.5, 0.9]", "output.keep_members=false",
        'scenario.title="A \\"quoted\\" title"'])
    assert scenario.parameters["latent_days"].form.family == "uniform"
    assert scenario.output.quantiles == (0.1, 0.5, 0.9)
    assert scenario.output.keep_members is False
    assert scenario.title == 'A "quoted" title'


@pytest.mark.parametrize("setting, key, message", [
    ("scenario.days=abc", "scenario.days", "finite number of days"),
    ("solver.stepp=0.5", "solver.stepp", "unknown key"),
    ("parameters.R0.high=1.0", "parameters.R0", "high"),
    ("model.flows[9].rate=1", "model.flows", "3 entries"),
    ("scenario.days", "--set", "KEY=VALUE"),
    ("scenario.name.first=x", "scenario.name", "not a table"),
    ("model.flows[0]=1", "--set", "ends with an index"),
])
def test_bad_overrides_name_the_key(files, setting, key, message) -> None:
    original, _ = files
    with pytest.raises(ScenarioError) as error:
        api.load_scenario(original, settings=[setting])
    assert error.value.key.startswith(key)
    assert message in str(error.value)


def test_check_refuses_a_bad_override_with_exit_2(files, tmp_path) -> None:
    original, _ = files
    done = run_cli("check", original, "--set", "scenario.days=-1", cwd=tmp_path)
    assert done.returncode == 2
    assert "scenario.days" in done.stderr and "positive" in done.stderr


def test_check_shows_the_settings(files, tmp_path) -> None:
    original, _ = files
    done = run_cli("check", original, "--set", "scenario.days=45", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "45 days" in done.stdout
    assert "set on the command line: scenario.days=45" in done.stdout


def test_the_array_script_carries_the_settings(files, tmp_path) -> None:
    original, _ = files
    profile = REPO / "configs" / "example-slurm.toml"
    done = run_cli("array-script", original, "--cluster", profile, "--shards", "2",
                   "--set", "scenario.days=45", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "--set scenario.days=45" in done.stdout
    assert np.all([line.count("--set") <= 1 for line in done.stdout.splitlines()
                   if "merge" in line])
