"""The chunk plan, the shard split and the fingerprint (ensemble.run.plan)."""

from __future__ import annotations

import dataclasses
import os
import subprocess
import sys
from pathlib import Path

from hypothesis import given, strategies as st

from ensemble.run.plan import (MAX_CHUNK_BYTES, default_chunk, fingerprint, plan_chunks,
                               shard_range)
from ensemble.scenario.load import load_scenario
from ensemble.scenario.schema import Compute
from support import write_scenario


@given(members=st.integers(0, 10_000), count=st.integers(1, 300))
def test_shards_cover_every_member_once(members: int, count: int) -> None:
    """The project's reference (sharded runs): shard I of N holds members
    floor(I*M/N) .. floor((I+1)*M/N) - 1; together the shards hold every member exactly
    once, in order, with sizes differing by at most one."""
    ranges = [shard_range(index, count, members) for index in range(count)]
    assert ranges[0][0] == 0 and ranges[-1][1] == members
    assert all(ranges[i][1] == ranges[i + 1][0] for i in range(count - 1))
    sizes = [end - start for start, end in ranges]
    assert max(sizes) - min(sizes) <= 1
    assert ranges[count // 2] == (count // 2 * members // count,
                                  (count // 2 + 1) * members // count)


def test_shard_index_out_of_range_is_refused() -> None:
    for index in (-1, 4):
        try:
            shard_range(index, 4, 100)
        except ValueError as error:
            assert "0 .. 3" in str(error)
        else:
            raise AssertionError(f"shard {index}/4 accepted")


@given(members=st.integers(1, 500), chunk=st.integers(1, 600))
def test_chunks_cover_every_member_of_every_variant_once(tmp_path_factory, members: int,
                                                         chunk: int) -> None:
    scenario = dataclasses.replace(_scenario(tmp_path_factory.mktemp("plan")),
                                   member_count=members)
    keys = plan_chunks(scenario, chunk)
    for variant in range(len(scenario.variants)):
        covered = [m for v, start, end in keys if v == variant for m in range(start, end)]
        assert covered == list(range(members))
    assert all(0 < end - start <= chunk for _, start, end in keys)


def test_chunks_of_a_shard_stay_inside_it(tmp_path: Path) -> None:
    scenario = _scenario(tmp_path)
    keys = plan_chunks(scenario, 7, member_range=shard_range(1, 3, scenario.member_count))
    assert {(start, end) for _, start, end in keys} == {(13, 20), (20, 26)}


def test_default_chunk_gives_several_tasks_per_worker(tmp_path: Path) -> None:
    """Common practice, no source: at least a few tasks per worker keep the load
    balanced."""
    scenario = dataclasses.replace(_scenario(tmp_path), member_count=10_000)
    chunk = default_chunk(scenario, n_states=4, n_flow_elements=3, workers=8)
    assert 1 <= chunk <= 10_000 // (4 * 8) + 1
    assert default_chunk(dataclasses.replace(scenario, member_count=1), 4, 3, workers=8) == 1


def test_default_chunk_bounds_the_memory_of_a_task(tmp_path: Path) -> None:
    """A chunk's trajectories (states and flow counts, float64, every reported time) stay
    within MAX_CHUNK_BYTES, whatever the backend's speed."""
    scenario = dataclasses.replace(_scenario(tmp_path), member_count=10**6)
    rows = 80 + 64                                   # e.g. 16 age groups, 5 compartments
    for backend in ("numpy", "compiled"):
        chunk = default_chunk(scenario, 80, 64, workers=1, backend=backend)
        assert chunk * rows * scenario.n_reports * 8 <= MAX_CHUNK_BYTES
    assert (default_chunk(scenario, 4, 3, backend="compiled")
            > default_chunk(scenario, 4, 3, backend="numpy"))


def test_default_chunk_is_whole_kernel_blocks(tmp_path: Path) -> None:
    """A chunk of at least one block of the compiled kernel is cut to whole blocks (no
    padded members), still within MAX_CHUNK_BYTES; a smaller one is left as it is."""
    scenario = dataclasses.replace(_scenario(tmp_path), member_count=10**6)
    unblocked = default_chunk(scenario, 4, 3, backend="compiled")
    chunk = default_chunk(scenario, 4, 3, backend="compiled", block=512)
    assert unblocked % 512 != 0, "pick a case the rounding changes"
    assert chunk % 512 == 0 and unblocked - 512 < chunk <= unblocked
    assert chunk * 7 * scenario.n_reports * 8 <= MAX_CHUNK_BYTES
    small = dataclasses.replace(scenario, member_count=100)
    assert (default_chunk(small, 4, 3, backend="compiled", block=512)
            == default_chunk(small, 4, 3, backend="compiled"))


def test_fingerprint_follows_what_changes_numbers(tmp_path: Path) -> None:
    scenario = _scenario(tmp_path)
    base = fingerprint(scenario)
    assert len(base) == 64
    changed = [
        dataclasses.replace(scenario, member_count=scenario.member_count + 1),
        dataclasses.replace(scenario, seed=scenario.seed + 1),
        dataclasses.replace(scenario, solver=dataclasses.replace(scenario.solver,
                                                                 method="heun")),
    ]
    assert all(fingerprint(other) != base for other in changed)
    assert fingerprint(scenario, "compiled") != base
    same = [
        dataclasses.replace(scenario, compute=Compute(chunk=3, workers=5)),
        dataclasses.replace(scenario, output=dataclasses.replace(scenario.output,
                                                                 path="elsewhere.nc")),
    ]
    assert all(fingerprint(other) == base for other in same)


def test_fingerprint_ignores_comments_and_layout(tmp_path: Path) -> None:
    path = write_scenario(tmp_path)
    first = fingerprint(load_scenario(path))
    path.write_text("# an illustrative comment\n\n" + path.read_text())
    assert fingerprint(load_scenario(path)) == first


def test_fingerprint_is_the_same_in_every_process(tmp_path: Path) -> None:
    """The scenario holds sets (names used by an expression) whose order follows
    Python's per-process string hashing; the fingerprint must not."""
    path = write_scenario(tmp_path)
    code = ("import sys; from ensemble.scenario.load import load_scenario; "
            "from ensemble.run.plan import fingerprint; "
            "print(fingerprint(load_scenario(sys.argv[1])))")
    digests = {
        subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True,
                       text=True, check=True,
                       env={**os.environ, "PYTHONHASHSEED": seed}).stdout.strip()
        for seed in ("1", "2")
    }
    assert digests == {fingerprint(load_scenario(path))}


def _scenario(directory: Path):
    return load_scenario(write_scenario(directory))
