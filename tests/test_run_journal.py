"""The work journal: durable chunks, resume, atomic finish, bounded memory.

The expected values are the journal's own contract (ensemble/run/journal.py; the
project's reference, ensemble/scenario/reference.md, on ``--resume`` and ``--force``);
quantiles are compared with ``numpy.quantile`` over all members held in memory (Hyndman
and Fan 1996, definition 7).
"""

from __future__ import annotations

import errno
import os
import pickle

import netCDF4
import numpy as np
import pytest
import xarray as xr

from ensemble import durable
from ensemble.errors import (FingerprintMismatch, IncompleteWork, ResultExists, StoreWriteError,
                             WorkInProgress)
from ensemble.output import brackets as brackets_module
from ensemble.output import result_file, writer
from ensemble.output.finish import block_plan
from ensemble.output.quantiles import in_summary
from ensemble.output.selection import pilot_brackets
from ensemble.output.result_file import result_fingerprint
from ensemble.run import chunk_files
from ensemble.run import tasks  # noqa: F401 (how tasks pickle the scenario's tables)
from ensemble.run.journal import WorkJournal, partial_path
from support import fill, grouped_scenario, layout_of, made_up_members


@pytest.fixture
def layout(tmp_path):
    return layout_of(grouped_scenario(tmp_path, members=10))


def _open(path, layout, **options):
    return WorkJournal.open(path, layout, **{"resume": False, "force": False, **options})


def _numbers(path) -> dict[str, np.ndarray]:
    with xr.open_dataset(path, decode_times=False) as dataset:
        return {name: dataset[name].values for name in dataset.data_vars}


def _assert_same_numbers(first, second):
    a, b = _numbers(first), _numbers(second)
    assert a.keys() == b.keys()
    for name in a:
        np.testing.assert_array_equal(a[name], b[name], err_msg=name)


def test_pending_cuts_partly_saved_chunks_to_what_is_missing(tmp_path, layout):
    journal = _open(tmp_path / "r.nc", layout)
    journal.save((0, 0, 4), *made_up_members(layout, 0, 0, 4))
    journal.save((0, 8, 10), *made_up_members(layout, 0, 8, 10))
    asked = [(0, 0, 6), (0, 6, 10), (1, 0, 10)]
    assert journal.pending(asked) == [(0, 4, 6), (0, 6, 8), (1, 0, 10)]
    assert journal.saved() == [(0, 0, 4), (0, 8, 10)]


def test_save_checks_keys_members_and_shapes(tmp_path, layout):
    journal = _open(tmp_path / "r.nc", layout)
    journal.save((0, 0, 4), *made_up_members(layout, 0, 0, 4))
    with pytest.raises(ValueError, match="overlaps"):
        journal.save((0, 2, 6), *made_up_members(layout, 0, 2, 6))
    with pytest.raises(ValueError, match="holds members"):
        journal.save((0, 5, 9), *made_up_members(layout, 0, 4, 8))
    with pytest.raises(ValueError, match="outside"):
        journal.save((0, 8, 11), *made_up_members(layout, 0, 8, 11))
    result, reported = made_up_members(layout, 1, 0, 3)
    del reported["infectious_days"]
    with pytest.raises(ValueError, match="infectious_days"):
        journal.save((1, 0, 3), result, reported)
    result, reported = made_up_members(layout, 1, 0, 3)
    reported["susceptibility"] = reported["susceptibility"][0]     # one group missing
    with pytest.raises(ValueError, match="susceptibility.*expected"):
        journal.save((1, 0, 3), result, reported)


def test_load_returns_what_was_saved(tmp_path, layout):
    journal = _open(tmp_path / "r.nc", layout)
    result, reported = made_up_members(layout, 1, 3, 7)
    journal.save((1, 3, 7), result, reported)
    loaded, loaded_reported = journal.load((1, 3, 7))
    for name in ("members", "state", "flow_count", "step_error", "observed_order", "status"):
        np.testing.assert_array_equal(getattr(loaded, name), getattr(result, name))
    for name in reported:
        np.testing.assert_array_equal(loaded_reported[name], reported[name])


def test_resume_after_a_kill_finishes_the_same_file(tmp_path, layout):
    """A run killed after one chunk, mid-way through writing another (a stray temporary
    left behind; and a half-written result file from an earlier kill during finish),
    resumed with another chunk size, gives the uninterrupted run's file."""
    reference = _open(tmp_path / "reference.nc", layout)
    fill(reference, layout, chunk=10)
    reference.finish()

    path = tmp_path / "r.nc"
    killed = _open(path, layout)
    killed.save((0, 0, 3), *made_up_members(layout, 0, 0, 3))
    stray = partial_path(path) / ".tmp-chunk-v0-0000000003-0000000006-99999"
    stray.mkdir()
    (stray / "state.npy").write_bytes(b"half a chunk")
    half_written_result = tmp_path / f".r.nc.x1y2z3{result_file.UNFINISHED_SUFFIX}"
    half_written_result.write_bytes(b"killed while finishing")
    del killed

    resumed = _open(path, layout, resume=True)
    assert not stray.exists() and not half_written_result.exists()
    missing = resumed.pending([(v, first, min(first + 4, 10)) for v in range(2)
                               for first in range(0, 10, 4)])
    assert missing[0] == (0, 3, 4)
    assert sum(end - first for _, first, end in missing) == 2 * 10 - 3
    for key in missing:
        resumed.save(key, *made_up_members(layout, *key))
    assert resumed.finish() == path
    assert not partial_path(path).exists()
    _assert_same_numbers(path, tmp_path / "reference.nc")


def test_after_a_crash_of_the_system_only_durable_chunks_are_kept(tmp_path, layout):
    """Chunks are not fsynced as they are saved, so a chunk written in an earlier boot
    (the system crashed, its data may never have reached the disk) is recomputed unless
    make_durable listed it; chunks of this boot are kept as they are."""
    path = tmp_path / "r.nc"
    journal = _open(path, layout)
    for key in [(0, 0, 3), (0, 3, 6), (1, 0, 3)]:
        journal.save(key, *made_up_members(layout, *key))
    journal.make_durable([(0, 0, 3)])
    journal.close()                     # the run ends (its lock is released)
    assert _open(path, layout, resume=True).saved() == [(0, 0, 3), (0, 3, 6), (1, 0, 3)]
    for name in ("chunk-v0-0000000000-0000000003", "chunk-v0-0000000003-0000000006"):
        (partial_path(path) / name / chunk_files.BOOT_FILE).write_text("an earlier boot")
        chunk_files.write_checksums(partial_path(path) / name)   # as that boot wrote it
    resumed = _open(path, layout, resume=True)
    assert resumed.saved() == [(0, 0, 3), (1, 0, 3)]
    np.testing.assert_array_equal(resumed.load((0, 0, 3))[0].state,
                                  made_up_members(layout, 0, 0, 3)[0].state)


def test_without_resume_old_work_is_kept_unless_forced(tmp_path, layout):
    path = tmp_path / "r.nc"
    _open(path, layout).save((0, 0, 3), *made_up_members(layout, 0, 0, 3))
    with pytest.raises(WorkInProgress, match="--resume.*--force"):
        _open(path, layout)
    assert _open(path, layout, resume=True).saved() == [(0, 0, 3)]
    assert _open(path, layout, force=True).saved() == []


def test_resume_of_a_different_scenario_is_refused(tmp_path, layout):
    path = tmp_path / "r.nc"
    _open(path, layout).save((0, 0, 3), *made_up_members(layout, 0, 0, 3))
    other = layout_of(layout.scenario, fingerprint="0" * 64)
    with pytest.raises(FingerprintMismatch):
        _open(path, other, resume=True)
    assert _open(path, layout, resume=True).saved() == [(0, 0, 3)]


def test_an_existing_result_is_replaced_only_when_forced(tmp_path, layout):
    path = tmp_path / "r.nc"
    path.write_bytes(b"an older result")
    with pytest.raises(ResultExists):
        _open(path, layout)
    journal = _open(path, layout, force=True)
    fill(journal, layout, chunk=5)
    assert path.read_bytes() == b"an older result"      # untouched until finish
    journal.finish()
    assert result_fingerprint(path) == layout.fingerprint
    assert WorkJournal.is_complete(path, layout.fingerprint)
    assert not WorkJournal.is_complete(path, "0" * 64)


def test_finish_names_missing_members(tmp_path, layout):
    journal = _open(tmp_path / "r.nc", layout)
    fill(journal, layout, chunk=5)
    chunk = journal.chunks.directory((1, 5, 10))
    for entry in chunk.iterdir():
        entry.unlink()
    chunk.rmdir()
    with pytest.raises(IncompleteWork, match="members 5-9 of variant 'fewer-contacts'"):
        journal.finish()
    assert not (tmp_path / "r.nc").exists()


def test_the_final_name_appears_only_complete(tmp_path, layout, monkeypatch):
    """At the rename, the final name is still absent and the temporary is a complete
    result in the same directory (so the rename is atomic)."""
    path = tmp_path / "r.nc"
    journal = _open(path, layout)
    fill(journal, layout, chunk=5)
    seen = []
    real_replace = os.replace

    def checking_replace(source, target):
        assert not os.path.exists(target)
        assert os.path.dirname(os.fspath(source)) == os.fspath(tmp_path)
        seen.append(result_fingerprint(source))
        with netCDF4.Dataset(source) as nc:
            assert "state" in nc.variables and "flow_count" in nc.variables
        real_replace(source, target)

    monkeypatch.setattr(durable.os, "replace", checking_replace)
    journal.finish()
    assert seen == [layout.fingerprint]


@pytest.mark.parametrize("failure, message", [
    (OSError(errno.ENOSPC, os.strerror(errno.ENOSPC)), "No space left on device"),
    (RuntimeError("NetCDF: HDF error"), "HDF error.*MiB free"),
])
def test_a_full_disk_keeps_the_chunks_for_resume(tmp_path, layout, monkeypatch, failure,
                                                 message):
    """A write error while finishing (as Python's OSError, or as the netCDF library's
    RuntimeError, which is how a full disk shows up inside HDF5) is a StoreWriteError;
    no temporary stays behind and the chunks are there for a resume (which the command
    line names, tests/test_clear_errors.py)."""
    path = tmp_path / "r.nc"
    journal = _open(path, layout)
    fill(journal, layout, chunk=5)

    def disk_full(*args, **kwargs):
        raise failure

    monkeypatch.setattr(writer, "write_trajectories", disk_full)
    with pytest.raises(StoreWriteError, match=message):
        journal.finish()
    assert not path.exists()
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []
    monkeypatch.undo()
    resumed = _open(path, layout, resume=True)
    assert len(resumed.saved()) == 4
    resumed.finish()
    assert result_fingerprint(path) == layout.fingerprint


def test_an_unwritable_destination_is_a_store_error(tmp_path, layout):
    blocker = tmp_path / "not-a-directory"
    blocker.write_text("a file where a directory should be")
    with pytest.raises(StoreWriteError, match="cannot write"):
        _open(blocker / "r.nc", layout)


def test_without_members_the_file_keeps_summaries_only(tmp_path):
    layout = layout_of(grouped_scenario(tmp_path, members=10, keep_members=False))
    journal = _open(tmp_path / "r.nc", layout)
    fill(journal, layout, chunk=4)
    loaded, _ = journal.load((0, 0, 4))
    assert loaded.state.shape[0] == 4           # the work in progress keeps trajectories
    journal.finish()
    with netCDF4.Dataset(tmp_path / "r.nc") as nc:
        assert "state" not in nc.variables and "flow_count" not in nc.variables
        assert {"state_quantile", "peak_value", "status"} <= set(nc.variables)


def test_block_plan_covers_every_cell_once_within_budget():
    members, rows, times, budget = 3000, 7, 50, 100_000
    seen = np.zeros((times, rows), dtype=int)
    for time_range, row_range in block_plan(members, rows, times, budget):
        size = (time_range.stop - time_range.start) * (row_range.stop - row_range.start)
        assert size * members * 8 <= budget
        seen[time_range, row_range] += 1
    assert (seen == 1).all()
    assert len(block_plan(10, 3, 20, 10**9)) == 1


def test_finish_gathers_thousands_of_members_in_small_blocks(tmp_path):
    """3000 members per variant, a budget of 100 kB per block (one time of one state row
    for all members is 24 kB): finish uses many blocks, none over the budget, and its
    quantiles equal numpy.quantile over all members in memory."""
    layout = layout_of(grouped_scenario(tmp_path, members=3000))
    journal = _open(tmp_path / "r.nc", layout, block_bytes=100_000)
    fill(journal, layout, chunk=700)
    journal.finish()
    assert journal.largest_block_bytes <= 100_000
    assert journal.block_count >= 2 * 2 * layout.n_reports
    with xr.open_dataset(tmp_path / "r.nc", decode_times=False) as dataset:
        keep = in_summary(dataset.status.values)
        for v in range(2):
            expected = np.quantile(dataset.state.values[v][keep[v]],
                                   dataset["quantile"].values, axis=0)
            np.testing.assert_array_equal(dataset.state_quantile.values[v], expected)


def test_brackets_derived_block_by_block_equal_those_of_the_whole_pilot(tmp_path,
                                                                         monkeypatch):
    """The journal reads its pilot a few cells at a time (excluded members as NaN); the
    brackets equal :func:`pilot_brackets` of the included pilot members held in memory at
    once (the selection's own contract, ensemble/output/selection.py)."""
    pilot = 1000
    layout = layout_of(grouped_scenario(tmp_path, members=4 * pilot, keep_members=False))
    monkeypatch.setattr(brackets_module, "PILOT_MEMBER_COUNT", pilot)
    monkeypatch.setattr(brackets_module, "PILOT_BLOCK_BYTES", 3 * pilot * 8)
    journal = _open(tmp_path / "r.nc", layout)
    assert journal.brackets.pilot_member_count() == pilot
    for first in (0, 600):
        journal.save((1, first, first + 600), *made_up_members(layout, 1, first, first + 600))
    assert journal.brackets.pilot(0) is None              # variant 0 has no pilot yet
    result, _ = made_up_members(layout, 1, 0, pilot)
    included = in_summary(result.status)
    assert not included.all()                           # members 1 and 2 are left out
    derived = journal.brackets.pilot(1)
    for name in ("state", "flow_count"):
        values = getattr(result, name).transpose(2, 1, 0).reshape(-1, pilot)
        expected = pilot_brackets(values[:, included].copy(), layout.scenario.output.quantiles)
        np.testing.assert_array_equal(derived[name].lower, expected.lower)
        np.testing.assert_array_equal(derived[name].upper, expected.upper)


def test_task_copies_read_the_brackets_the_first_derivation_stored(tmp_path, monkeypatch):
    """Every task gets a pickled copy of the journal (dask sends one with each task): a
    copy holds no brackets, reads those the first derivation stored in the work
    directory (the same digests, nothing derived again), and skips the refinement rather
    than wait while another task holds the derivation lock (the journal's contract,
    ensemble/output/brackets.py)."""
    pilot = 500
    layout = layout_of(grouped_scenario(tmp_path, members=4 * pilot, keep_members=False))
    monkeypatch.setattr(brackets_module, "PILOT_MEMBER_COUNT", pilot)
    monkeypatch.setattr(brackets_module, "REFINE_PILOTS", 2)
    journal = _open(tmp_path / "r.nc", layout)
    journal.save((0, 0, 2 * pilot), *made_up_members(layout, 0, 0, 2 * pilot))
    derived = journal.brackets.pilot(0)

    def derive_again(*arguments):
        raise AssertionError("a copy derived the pilot's brackets again")

    copy = pickle.loads(pickle.dumps(journal))      # as a task carries it
    assert copy.brackets._known == {}
    monkeypatch.setattr(brackets_module.BracketCache, "_pilot_brackets", derive_again)
    read = copy.brackets.pilot(0)
    assert {name: b.digest() for name, b in read.items()} == {
        name: b.digest() for name, b in derived.items()}

    past_refining = (0, 2 * pilot, 2 * pilot + 10)
    with journal.brackets._exclusive(wait=True):
        assert copy.brackets.cutting(past_refining) is read      # not awaited
    assert copy.brackets.refined(0) is None
    refined = copy.brackets.cutting(past_refining)
    assert refined is not read
    assert {name: b.digest() for name, b in refined.items()} == {
        name: b.digest() for name, b in journal.brackets.refined(0).items()}
    assert (journal.work / "refined-brackets-v0.npz").is_file()


def test_task_copies_in_one_process_share_the_brackets_read(tmp_path, monkeypatch):
    """Copies of the journal in one process read a bracket file once and share its
    arrays (dask keeps recent tasks, each with its copy, so arrays per copy would add up
    over a large run); a file stored anew, as by a new run of the same work directory,
    is read again."""
    pilot = 500
    layout = layout_of(grouped_scenario(tmp_path, members=4 * pilot, keep_members=False))
    monkeypatch.setattr(brackets_module, "PILOT_MEMBER_COUNT", pilot)
    journal = _open(tmp_path / "r.nc", layout)
    journal.save((0, 0, pilot), *made_up_members(layout, 0, 0, pilot))
    journal.brackets.pilot(0)
    first, second = (pickle.loads(pickle.dumps(journal)).brackets.pilot(0) for _ in range(2))
    assert all(first[name].lower is second[name].lower for name in first)

    path = journal.work / "pilot-brackets-v0.npz"
    stored = dict(np.load(path))
    path.unlink()
    np.savez(path, **{name: values + 1.0 for name, values in stored.items()})
    third = pickle.loads(pickle.dumps(journal)).brackets.pilot(0)
    assert all(np.array_equal(third[name].lower, first[name].lower + 1.0) for name in first)


def test_a_large_model_gets_a_smaller_pilot_not_none(tmp_path, monkeypatch):
    """The pilot shrinks so that its trajectories fit PILOT_BYTES (worked example: the
    bytes of one member's cells times the pilot's members), down to SMALLEST_PILOT;
    below that every member is kept whole."""
    layout = layout_of(grouped_scenario(tmp_path, members=200_000, keep_members=False))
    journal = _open(tmp_path / "r.nc", layout)
    cells = sum(layout.cell_count(variable)
                for variable in brackets_module.trajectory_variables(layout))
    assert journal.brackets.pilot_member_count() == brackets_module.PILOT_MEMBER_COUNT
    monkeypatch.setattr(brackets_module, "PILOT_BYTES", 8 * cells * 3000 + 7)
    assert journal.brackets.pilot_member_count() == 3000
    assert journal.brackets.refining_member_count() == 4 * 3000
    monkeypatch.setattr(brackets_module, "PILOT_BYTES", 8 * cells * 1000)
    assert journal.brackets.pilot_member_count() == 0
