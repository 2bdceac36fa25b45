"""The shard route without a batch system: the split, part files, merge, and the driver
script for job arrays (run against stand-in ``sbatch``/``qsub`` commands that record what
they are given).

The reference for "merged parts equal a single run" is a single local run of the same
scenario: the README's cluster section promises a result identical in every number.
"""

from __future__ import annotations

import os
import shlex
import stat
import subprocess
from pathlib import Path

import pytest
from hypothesis import given, strategies as st

from ensemble import api
from ensemble.run.clusters import load_profile
from ensemble.errors import PartError
from ensemble.run.shards import Shard
from support import REPO, assert_identical_numbers, invoke_cli, write_scenario


# ----------------------------------------------------------------------------- the split


@given(members=st.integers(1, 500), count=st.integers(1, 60))
def test_shards_cover_every_member_exactly_once(members: int, count: int) -> None:
    ranges = [Shard(index, count).member_range(members) for index in range(count)]
    covered = [m for start, end in ranges for m in range(start, end)]
    assert covered == list(range(members))
    sizes = [end - start for start, end in ranges]
    assert max(sizes) - min(sizes) <= 1


def test_shard_split_formula() -> None:
    # The README's job arrays: members floor(I*M/N) .. floor((I+1)*M/N) - 1; M = 10, N = 3.
    assert [Shard(i, 3).member_range(10) for i in range(3)] == [(0, 3), (3, 6), (6, 10)]


@pytest.mark.parametrize("text", ["3/3", "-1/3", "1", "a/b", "1/0", "1/3/4"])
def test_bad_shard_text(text: str) -> None:
    with pytest.raises(ValueError):
        Shard.parse(text)


def test_bad_shard_option_exits_2(tmp_path: Path) -> None:
    write_scenario(tmp_path, members=4, days=5)
    done = invoke_cli("run", "testtown.toml", "--shard", "4/4", cwd=tmp_path)
    assert done.returncode == 2
    assert "--shard" in done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["testtown.toml"]


# ----------------------------------------------------------------------------- merging


@pytest.fixture(scope="module")
def sharded(tmp_path_factory) -> dict:
    """A single local run and the three parts of the same scenario (11 members: the shards
    have 3, 4 and 4), all computed in this process."""
    directory = tmp_path_factory.mktemp("sharded")
    scenario = write_scenario(directory, members=11, days=20)
    single = api.run(scenario, output=directory / "single.nc", workers=0, progress=False)
    parts = [api.run(scenario, output=directory / f"part{i}.nc", shard=f"{i}/3", workers=0,
                     chunk=2, progress=False) for i in range(3)]
    return {"directory": directory, "scenario": scenario, "single": single, "parts": parts}


def test_parts_merge_to_the_single_run_bit_for_bit(sharded) -> None:
    directory = sharded["directory"]
    merged = api.merge(list(reversed(sharded["parts"])), directory / "merged.nc")
    assert_identical_numbers(sharded["single"], merged)
    assert not Path(f"{merged}.partial").exists()


def test_part_files_say_what_they_hold(sharded) -> None:
    import netCDF4

    with netCDF4.Dataset(sharded["parts"][1]) as part:
        assert (part.shard_index, part.shard_count) == (1, 3)
        assert (part.member_start, part.member_end) == (3, 7)
        assert part["state"].shape[:2] == (2, 4)  # 2 variants x 4 members
        assert part.fingerprint == netCDF4.Dataset(sharded["single"]).fingerprint
    assert not Path(f"{sharded['parts'][1]}.partial").exists()


def test_merge_names_missing_shards(sharded) -> None:
    directory = sharded["directory"]
    with pytest.raises(PartError, match=r"missing shards 0, 2 of 3"):
        api.merge(sharded["parts"][1:2], directory / "never.nc")
    done = invoke_cli("merge", sharded["parts"][0], "--output", "never.nc", cwd=directory)
    assert done.returncode == 2
    assert "missing shards 1, 2 of 3" in done.stderr
    assert not (directory / "never.nc").exists()


def test_merge_refuses_a_shard_twice(sharded) -> None:
    with pytest.raises(PartError, match="given twice"):
        api.merge([*sharded["parts"], sharded["parts"][0]], sharded["directory"] / "n.nc")


def test_merge_refuses_parts_of_different_runs(sharded) -> None:
    directory = sharded["directory"]
    scenario = api.load_scenario(sharded["scenario"], seed=12)
    other = api.run(scenario, output=directory / "other-seed.nc", shard="1/3", workers=0,
                    progress=False)
    done = invoke_cli("merge", sharded["parts"][0], other, sharded["parts"][2],
                      "--output", "mixed.nc", cwd=directory)
    assert done.returncode == 2
    assert "different runs" in done.stderr
    assert "other-seed.nc" in done.stderr and "part0.nc" in done.stderr
    assert not (directory / "mixed.nc").exists()


def test_merge_refuses_a_result_file(sharded) -> None:
    done = invoke_cli("merge", sharded["single"], "--output", "x.nc", cwd=sharded["directory"])
    assert done.returncode == 2
    assert "not a shard part file" in done.stderr


def test_cli_shard_and_merge(tmp_path: Path) -> None:
    scenario = write_scenario(tmp_path, members=6, days=10)
    done = invoke_cli("run", "testtown.toml", "--shard", "0/2", "--workers", "0", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    api.run(scenario, shard="1/2", workers=0, progress=False,
            output=tmp_path / "result.shard-1-of-2.nc")
    parts = sorted(tmp_path.glob("result.shard-*-of-2.nc"))
    assert len(parts) == 2  # the command line's default part name is the API's
    done = invoke_cli("merge", *parts, "--output", "merged.nc", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    single = api.run(scenario, output=tmp_path / "single.nc", workers=0, progress=False)
    assert_identical_numbers(single, tmp_path / "merged.nc")
    done = invoke_cli("merge", *parts, "--output", "merged.nc", cwd=tmp_path)
    assert done.returncode == 2 and "--force" in done.stderr


# ----------------------------------------------------------------------------- job arrays


def fake_batch_system(directory: Path) -> Path:
    """Stand-ins for sbatch and qsub that keep each submitted script and its options, and
    print a job id as the real ones do (``sbatch --parsable``: ``<id>``; PBS Pro ``qsub``
    on an array: ``<id>[].<server>``)."""
    bin_directory = directory / "bin"
    bin_directory.mkdir()
    for name, reply in (("sbatch", "'%d' \"$n\""), ("qsub", "'%d[].pbs-server' \"$n\"")):
        script = bin_directory / name
        script.write_text(
            "#!/usr/bin/env bash\n"
            f'n=$(( $(ls {shlex.quote(str(directory))}/submitted-*.args 2>/dev/null | wc -l) + 100 ))\n'
            f'for a in "$@"; do echo "$a"; done > {shlex.quote(str(directory))}/submitted-$n.args\n'
            f"cat > {shlex.quote(str(directory))}/submitted-$n.script\n"
            f"printf {reply}\n")
        script.chmod(script.stat().st_mode | stat.S_IXUSR)
    return bin_directory


def driver_text(tmp_path: Path, profile: str, *options: str) -> str:
    write_scenario(tmp_path, members=40, days=10)
    done = invoke_cli("array-script", "testtown.toml", "--cluster", REPO / "configs" / profile,
                      "--shards", "4", *options, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    return done.stdout


def submit(tmp_path: Path, text: str) -> tuple[list[str], list[list[str]], str]:
    """Run the driver against the stand-ins: (its output lines, options of each submission,
    submitted scripts in order)."""
    bin_directory = fake_batch_system(tmp_path)
    driver = tmp_path / "submit.sh"
    driver.write_text(text)
    environment = dict(os.environ, PATH=f"{bin_directory}:{os.environ['PATH']}")
    done = subprocess.run(["bash", str(driver)], capture_output=True, text=True,
                          env=environment, cwd="/")
    assert done.returncode == 0, done.stderr
    arguments = [path.read_text().splitlines()
                 for path in sorted(tmp_path.glob("submitted-*.args"))]
    scripts = [path.read_text() for path in sorted(tmp_path.glob("submitted-*.script"))]
    return done.stdout.splitlines(), arguments, scripts


def test_slurm_array_script(tmp_path: Path) -> None:
    text = driver_text(tmp_path, "example-slurm.toml", "--members", "40", "--seed", "5",
                       "--chunk", "7")
    assert subprocess.run(["bash", "-n"], input=text, text=True).returncode == 0
    output, arguments, (array, merge) = submit(tmp_path, text)
    result = tmp_path / "result.nc"
    parts = tmp_path / "result.parts"
    assert arguments == [["--parsable"],
                         ["--parsable", "--kill-on-invalid-dep=yes", "--dependency=afterok:100"]]
    assert output == ["submitted the shards as job array 100 and the merge as job 101",
                      f"result, when job 101 has ended: {result}"]
    assert parts.is_dir()
    profile = load_profile(REPO / "configs" / "example-slurm.toml")
    for script in (array, merge):
        lines = script.splitlines()
        assert lines[0] == "#!/usr/bin/env bash"
        for expected in (f"#SBATCH -p {profile.queue}", f"#SBATCH -A {profile.account}",
                         f"#SBATCH -t {profile.walltime}", *profile.setup,
                         *(f"#SBATCH {d}" for d in profile.directives)):
            assert expected in lines, expected
    assert "#SBATCH --array=0-3" in array.splitlines()
    run_line = array.splitlines()[-1]
    # the profile's setup lines choose the environment: its python3, not this machine's
    assert run_line.startswith("exec python3 -m ensemble run ")
    assert str(tmp_path / "testtown.toml") in run_line
    for carried in ("--members 40", "--seed 5", "--chunk 7", "--resume",
                    '--shard "${SLURM_ARRAY_TASK_ID}/4"',
                    f"--output {parts}/shard-${{SLURM_ARRAY_TASK_ID}}-of-4.nc"):
        assert carried in run_line, carried
    merge_line = merge.splitlines()[-1]
    assert f"merge {parts}/shard-{{0..3}}-of-4.nc --output {result}" in merge_line


def test_pbs_array_script(tmp_path: Path) -> None:
    text = driver_text(tmp_path, "example-pbs.toml", "--backend", "numpy")
    output, arguments, (array, merge) = submit(tmp_path, text)
    assert arguments == [[], ["-W", "depend=afterok:100[].pbs-server"]]
    assert output[0] == ("submitted the shards as job array 100[].pbs-server and the merge "
                         "as job 101[].pbs-server")
    assert "#PBS -J 0-3" in array.splitlines()
    assert "#PBS -J" not in merge
    assert "#PBS -q workq" in array.splitlines() and "#PBS -l walltime=02:00:00" in array
    run_line = array.splitlines()[-1]
    assert '--shard "${PBS_ARRAY_INDEX}/4"' in run_line and "--backend numpy" in run_line
    assert "--workers 16" in run_line  # one local worker per core of the job


def test_array_script_refuses_local_and_too_many_shards(tmp_path: Path) -> None:
    write_scenario(tmp_path, members=3, days=10)
    done = invoke_cli("array-script", "testtown.toml", "--cluster", "local", "--shards", "2",
                      cwd=tmp_path)
    assert done.returncode == 2 and "batch-system profile" in done.stderr
    done = invoke_cli("array-script", "testtown.toml", "--cluster",
                      REPO / "configs" / "example-slurm.toml", "--shards", "4", cwd=tmp_path)
    assert done.returncode == 2 and "expected 1 .. 3" in done.stderr
