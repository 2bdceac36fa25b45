"""`ensemble merge` checks every part it is given: the fingerprint must follow from the
scenario, member count, seed and backend the part records, and the part's numbers and
attributes must match the content checksum written into it (SHA-256, FIPS 180-4, as
Python's hashlib computes it).  A part that fails is named, the command exits 2 and
nothing is written (ensemble/run/shards.py).

The reference for the numbers is a single local run of the same scenario: parts that
pass merge to its numbers bit for bit (the README's cluster section).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import netCDF4
import pytest

from ensemble import api
from ensemble.run.plan import fingerprint
from ensemble.run.shards import CHECKSUM_ATTRIBUTE
from support import assert_identical_numbers, run_cli, write_scenario


@pytest.fixture(scope="module")
def made(tmp_path_factory: pytest.TempPathFactory) -> dict:
    """Three parts of an illustrative scenario, a part of the same scenario with another
    seed, and the single run of the first (all computed in this process)."""
    directory = tmp_path_factory.mktemp("parts")
    scenario = write_scenario(directory, members=9, days=15)
    parts = [api.run(scenario, output=directory / f"part{i}.nc", shard=f"{i}/3",
                     workers=0, chunk=2, progress=False) for i in range(3)]
    other = api.run(api.load_scenario(scenario, seed=12), output=directory / "other.nc",
                    shard="1/3", workers=0, progress=False)
    single = api.run(scenario, output=directory / "single.nc", workers=0, progress=False)
    return {"scenario": scenario, "parts": parts, "other": other, "single": single}


@pytest.fixture
def parts(made: dict, tmp_path: Path) -> list[Path]:
    """Copies of the three parts in this test's directory (for editing)."""
    return [Path(shutil.copy(part, tmp_path)) for part in made["parts"]]


def refused(tmp_path: Path, parts: list[Path], named: Path) -> str:
    """Merge ``parts`` with the command line: exit 2, one error line naming ``named``,
    no traceback, and neither the result nor a work directory left; the message."""
    done = run_cli("merge", *parts, "--output", "merged.nc", cwd=tmp_path)
    assert done.returncode == 2, done.stderr
    errors = [line for line in done.stderr.splitlines() if line.startswith("error:")]
    assert len(errors) == 1 and str(named) in errors[0], done.stderr
    assert "Traceback" not in done.stderr
    assert not (tmp_path / "merged.nc").exists()
    assert not (tmp_path / "merged.nc.partial").exists()
    return errors[0]


def test_checked_parts_merge_to_the_single_run(made, parts, tmp_path):
    merged = api.merge(parts, tmp_path / "merged.nc")
    assert_identical_numbers(made["single"], merged)


def test_a_part_of_another_run_with_an_edited_fingerprint_is_refused(made, parts, tmp_path):
    """The seed-12 run's part 1, its fingerprint attribute made to match the others."""
    impostor = Path(shutil.copy(made["other"], tmp_path / "impostor.nc"))
    with netCDF4.Dataset(parts[1]) as genuine:
        wanted = genuine.fingerprint
    with netCDF4.Dataset(impostor, "a") as part:
        part.fingerprint = wanted
    message = refused(tmp_path, [parts[0], impostor, parts[2]], impostor)
    assert "fingerprint" in message


def test_an_edited_number_is_refused(parts, tmp_path):
    with netCDF4.Dataset(parts[2], "a") as part:
        part["state"][0, 1, 0, 3] += 1.0
    message = refused(tmp_path, parts, parts[2])
    assert CHECKSUM_ATTRIBUTE in message


def test_an_edited_parameter_draw_is_refused(parts, tmp_path):
    with netCDF4.Dataset(parts[0], "a") as part:
        name = next(name for name in part.variables if name.startswith("param_"))
        part[name][1, 0] *= 2
    refused(tmp_path, parts, parts[0])


def test_a_consistent_edit_of_seed_and_fingerprint_is_refused(made, parts, tmp_path):
    """Every part's seed and fingerprint edited to agree with each other (the fingerprint
    of the recorded scenario with the new seed): the numbers are still those of the old
    seed, which the content checksum tells."""
    reseeded = fingerprint(api.load_scenario(made["scenario"], seed=12), "compiled")
    for edited in parts:
        with netCDF4.Dataset(edited, "a") as part:
            assert part.backend == "compiled"
            part.seed = 12
            part.fingerprint = reseeded
    message = refused(tmp_path, parts, parts[0])
    assert CHECKSUM_ATTRIBUTE in message


def test_a_part_without_its_checksum_is_refused(parts, tmp_path):
    with netCDF4.Dataset(parts[1], "a") as part:
        part.delncattr(CHECKSUM_ATTRIBUTE)
    message = refused(tmp_path, parts, parts[1])
    assert CHECKSUM_ATTRIBUTE in message and "missing" in message
