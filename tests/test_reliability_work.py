"""No lost or mixed work: the work in progress of a run (``<result>.partial``) is kept
unless the run is told to continue it (``--resume``) or discard it (``--force``); the
program removes only a directory that carries its own mark; one run at a time holds a
work directory's lock; every saved chunk is checked against its CRC-32 checksums at a
resume and before the result is written.

The expected behaviour is the contract of ensemble/run/journal.py and
ensemble/run/work_directory.py (the README's command-line section on ``--resume`` and
``--force``).  Checksums are CRC-32 (ISO 3309, RFC 1952) as Python's zlib computes them; the
lock is flock(2) (Linux manual page), which the kernel releases when its holder dies.
Reference numbers come from an uninterrupted run of the same scenario in this process.
Concurrent runs are real processes that meet at a barrier (a line on a pipe), not after
sleeps.
"""

from __future__ import annotations

import errno
import io
import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import psutil
import pytest

from ensemble import api
from ensemble.errors import IncompleteWork, RunFailed, WorkInProgress, WorkLocked
from ensemble.run import chunk_files, tasks, work_directory
from ensemble.run.chunk_files import CHECKSUM_FILE, MEMBER_FILE
from ensemble.run.execute import run_scenario
from ensemble.run.journal import WorkJournal, partial_path
from ensemble.run.progress import Progress
from ensemble.run.work_directory import LOCK_FILE, Holder, WorkLock, create_owned
from ensemble.scenario.load import load_scenario
from support import (assert_same_numbers, fill, grouped_scenario, layout_of,
                     made_up_members, run_cli, saved_chunks, write_scenario)

CHUNK = 10
"""Members per chunk of the interrupted runs (40 members: four chunks per variant)."""


@pytest.fixture(scope="module")
def reference(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The scenario of :func:`support.write_scenario` run without interruption."""
    directory = tmp_path_factory.mktemp("reference")
    return api.run(write_scenario(directory), output=directory / "reference.nc",
                   workers=0, progress=False)


def interrupted_run(directory: Path, monkeypatch: pytest.MonkeyPatch, failing_member: int,
                    **options: object) -> Path:
    """Run the scenario of :func:`support.write_scenario` in ``directory`` until the chunk
    holding ``failing_member`` fails (the chunks before it are saved); return the
    scenario file."""
    scenario = write_scenario(directory, **options)
    real_make_design = tasks.make_design

    def failing(scenario, variant, model, members):
        if failing_member in members:
            raise FloatingPointError("an illustrative failure")
        return real_make_design(scenario, variant, model, members)

    monkeypatch.setattr(tasks, "make_design", failing)
    with pytest.raises(RunFailed):
        api.run(scenario, output=directory / "result.nc", workers=0, chunk=CHUNK,
                progress=False)
    monkeypatch.setattr(tasks, "make_design", real_make_design)
    return scenario


def contents(directory: Path) -> dict[str, bytes]:
    """Every file under ``directory`` (relative name -> bytes)."""
    return {str(path.relative_to(directory)): path.read_bytes()
            for path in sorted(directory.rglob("*")) if path.is_file()}


def chunk_contents(work: Path) -> dict[str, bytes]:
    """The files of the saved chunks of ``work``."""
    return {name: data for name, data in contents(work).items() if name.startswith("chunk-")}


# ------------------------------------------------------------ work in progress is kept


def test_unfinished_work_is_kept_unless_resumed_or_forced(tmp_path, monkeypatch, reference):
    """Rerunning an interrupted run without --resume refuses (exit 2, naming --resume and
    --force) and leaves every saved chunk as it was; --force discards them and runs."""
    interrupted_run(tmp_path, monkeypatch, failing_member=25)
    work = tmp_path / "result.nc.partial"
    before = chunk_contents(work)
    assert len(saved_chunks(work)) == 2

    refused = run_cli("run", "testtown.toml", "--workers", "0", cwd=tmp_path)
    assert refused.returncode == 2, refused.stderr
    assert "--resume" in refused.stderr and "--force" in refused.stderr
    assert "2 saved chunks" in refused.stderr and "Traceback" not in refused.stderr
    assert chunk_contents(work) == before

    forced = run_cli("run", "testtown.toml", "--workers", "0", "--force", cwd=tmp_path)
    assert forced.returncode == 0, forced.stderr
    assert not work.exists()
    assert_same_numbers(tmp_path / "result.nc", reference)


@pytest.mark.parametrize("options", [[], ["--force"], ["--resume"], ["--resume", "--force"]],
                         ids=["plain", "force", "resume", "resume-force"])
def test_a_directory_the_program_did_not_make_is_left_alone(tmp_path, options):
    """The output ``notes`` (from the scenario file) has a work directory name,
    ``notes.partial``, that the user's own directory already holds: whatever the options,
    the run refuses (exit 2, saying so) and writes nothing into it or beside it."""
    write_scenario(tmp_path, members=6, output="notes")
    theirs = tmp_path / "notes.partial"
    theirs.mkdir()
    (theirs / "chapter-1.txt").write_text("the user's own text")
    (theirs / "manifest.json").write_text("{}")
    before = contents(theirs)

    done = run_cli("run", "testtown.toml", "--workers", "0", *options, cwd=tmp_path)
    assert done.returncode == 2, done.stderr
    assert "not made by ensemble" in done.stderr and "notes.partial" in done.stderr
    assert contents(theirs) == before
    assert sorted(path.name for path in tmp_path.iterdir()) == ["notes.partial",
                                                                "testtown.toml"]


def test_a_file_where_the_work_directory_would_be_is_left_alone(tmp_path):
    write_scenario(tmp_path, members=6)
    (tmp_path / "result.nc.partial").write_text("not a directory")
    done = run_cli("run", "testtown.toml", "--workers", "0", "--force", cwd=tmp_path)
    assert done.returncode == 2 and "not made by ensemble" in done.stderr
    assert (tmp_path / "result.nc.partial").read_text() == "not a directory"


def test_a_work_directory_without_saved_chunks_is_started_afresh(tmp_path):
    """Nothing is lost when a run killed before its first chunk is rerun: its work
    directory is reused without --resume or --force."""
    layout = layout_of(grouped_scenario(tmp_path, members=10))
    WorkJournal.open(tmp_path / "r.nc", layout, resume=False, force=False).close()
    journal = WorkJournal.open(tmp_path / "r.nc", layout, resume=False, force=False)
    fill(journal, layout, chunk=5)
    assert journal.finish() == tmp_path / "r.nc"
    assert not partial_path(tmp_path / "r.nc").exists()


# ------------------------------------------------------------ one run at a time


HOLDER = textwrap.dedent("""
    import sys
    from ensemble.run.journal import WorkJournal
    from ensemble.run.layout import lowered_models, result_layout
    from ensemble.run.plan import fingerprint
    from ensemble.run.tasks import DEFAULT_BACKEND, compute_chunk
    from ensemble.scenario.load import load_scenario

    scenario = load_scenario(sys.argv[1])
    models = lowered_models(scenario)
    layout = result_layout(scenario, models, fingerprint(scenario, DEFAULT_BACKEND), "held")
    journal = WorkJournal.open(sys.argv[2], layout, resume=False, force=False)
    output = compute_chunk(scenario, models[0], (0, 0, 10), DEFAULT_BACKEND)
    journal.save(output.key, output.result, output.reported)
    print("holding", flush=True)
    sys.stdin.readline()
""")
"""A run's driver reduced to what matters here: it takes the work directory of the
result ``argv[2]``, saves one chunk of the scenario ``argv[1]``, says so, and waits."""


def test_a_second_run_is_refused_while_the_first_holds_the_work_directory(tmp_path,
                                                                           reference):
    """Two runs writing the same result: the second exits 2 naming the process of the
    first, even with --force or --resume, and the first's chunk stays; once the first is
    killed (its lock dies with it), --resume takes the directory over, says from whom,
    and finishes with the numbers of an uninterrupted run."""
    scenario = write_scenario(tmp_path)
    holder = subprocess.Popen([sys.executable, "-c", HOLDER, scenario, "result.nc"],
                              cwd=tmp_path, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                              stderr=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline() == "holding\n", holder.stderr.read()
        work = tmp_path / "result.nc.partial"
        held = chunk_contents(work)
        for options in ([], ["--force"], ["--resume"]):
            second = run_cli("run", "testtown.toml", "--workers", "0", *options,
                             cwd=tmp_path)
            assert second.returncode == 2, second.stderr
            assert f"process {holder.pid} on" in second.stderr, second.stderr
            assert chunk_contents(work) == held
        holder.send_signal(signal.SIGKILL)
    finally:
        holder.kill()
        holder.wait(timeout=60)

    resumed = run_cli("run", "testtown.toml", "--workers", "0", "--resume", cwd=tmp_path)
    assert resumed.returncode == 0, resumed.stderr
    assert f"from process {holder.pid} on" in resumed.stderr
    assert "no longer running" in resumed.stderr
    assert "resuming: 1 chunks already done" in resumed.stderr
    assert_same_numbers(tmp_path / "result.nc", reference)


def test_two_journals_of_one_process_do_not_share_a_work_directory(tmp_path):
    layout = layout_of(grouped_scenario(tmp_path, members=10))
    first = WorkJournal.open(tmp_path / "r.nc", layout, resume=False, force=False)
    with pytest.raises(WorkLocked, match=rf"process {os.getpid()} .*\(this process\)"):
        WorkJournal.open(tmp_path / "r.nc", layout, resume=True, force=False)
    first.close()
    WorkJournal.open(tmp_path / "r.nc", layout, resume=True, force=False).close()


def test_where_files_cannot_be_locked_the_record_decides(tmp_path, monkeypatch):
    """A file system without flock (ENOLCK): a lock recorded by a running process of
    this host holds, one of a process that ended is taken over, and one of another host
    holds (it cannot be looked at)."""
    def no_locks(handle, operation):
        raise OSError(errno.ENOLCK, "No locks available")

    monkeypatch.setattr(work_directory.fcntl, "flock", no_locks)
    work = tmp_path / "r.nc.partial"
    assert create_owned(work)
    waiting = subprocess.Popen([sys.executable, "-c", "import sys; sys.stdin.readline()"],
                               stdin=subprocess.PIPE)
    try:
        alive = Holder(waiting.pid, Holder.this_process().host,
                       psutil.Process(waiting.pid).create_time())
        (work / LOCK_FILE).write_text(alive.text())
        with pytest.raises(WorkLocked, match=f"process {waiting.pid} on"):
            WorkLock.acquire(work)
    finally:
        waiting.communicate(b"\n", timeout=60)
    taken = WorkLock.acquire(work)
    assert taken.previous == alive
    assert Holder.parse((work / LOCK_FILE).read_text()) == Holder.this_process()
    taken.release()

    elsewhere = Holder(alive.pid, "another-host.invalid", alive.started)
    (work / LOCK_FILE).write_text(elsewhere.text())
    with pytest.raises(WorkLocked, match="another-host.invalid"):
        WorkLock.acquire(work)


# ------------------------------------------------------------ checksums of saved chunks


def test_the_checksum_is_the_crc32_of_the_whole_file(tmp_path, monkeypatch):
    """CRC-32 of the nine bytes "123456789" is cbf43926, the check value of the
    polynomial of zlib and gzip (Williams 1993, "A painless guide to CRC error detection
    algorithms", sec. 17, the "CRC-32" entry); read a few bytes at a time, the file gives
    the same."""
    path = tmp_path / "digits"
    path.write_bytes(b"123456789")
    assert chunk_files.file_checksum(path) == "cbf43926"
    monkeypatch.setattr(chunk_files, "CHECKSUM_BLOCK", 4)
    assert chunk_files.file_checksum(path) == "cbf43926"
    path.write_bytes(b"")
    assert chunk_files.file_checksum(path) == "00000000"


def flip_a_value(path: Path, value: float = 59_972.0) -> None:
    """Overwrite the last float64 of an ``.npy`` file with ``value`` (same size)."""
    data = bytearray(path.read_bytes())
    data[-8:] = np.float64(value).tobytes()
    path.write_bytes(bytes(data))


def truncate(path: Path) -> None:
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])


def test_damaged_chunks_are_computed_again_at_resume(tmp_path, monkeypatch, reference):
    """An edited value, a truncated trajectory file and a member file rewritten with
    other bytes: --resume says which chunks were damaged, computes them again, and the
    result has the bits of an uninterrupted run (no traceback)."""
    interrupted_run(tmp_path, monkeypatch, failing_member=35)
    work = tmp_path / "result.nc.partial"
    first, second, third = saved_chunks(work)
    flip_a_value(first / "state.npy")
    truncate(second / "flow_count.npy")
    (third / MEMBER_FILE).write_bytes(b"PK\x03\x04 not what was saved")

    resumed = run_cli("run", "testtown.toml", "--workers", "0", "--resume", cwd=tmp_path)
    assert resumed.returncode == 0, resumed.stderr
    assert "Traceback" not in resumed.stderr
    for members, damaged_file in (("0..9", "state.npy"), ("10..19", "flow_count.npy"),
                                  ("20..29", MEMBER_FILE)):
        assert (f"members {members} of variant 'no-change' is damaged ({damaged_file} does "
                "not match its checksum); computing it again") in resumed.stderr
    assert_same_numbers(tmp_path / "result.nc", reference)


DAMAGES = {
    "edited value": lambda chunk: flip_a_value(chunk / "state.npy"),
    "truncated": lambda chunk: truncate(chunk / "state.npy"),
    "file removed": lambda chunk: (chunk / "flow_count.npy").unlink(),
    "file added": lambda chunk: (chunk / "extra.npy").write_bytes(b"\x93NUMPY"),
    "checksums removed": lambda chunk: (chunk / CHECKSUM_FILE).unlink(),
    "checksums garbled": lambda chunk: (chunk / CHECKSUM_FILE).write_bytes(b"\xff\x00"),
}


@pytest.mark.parametrize("damage", DAMAGES.values(), ids=DAMAGES.keys())
def test_every_kind_of_damage_is_found_at_resume(tmp_path, damage):
    layout = layout_of(grouped_scenario(tmp_path, members=10))
    path = tmp_path / "r.nc"
    journal = WorkJournal.open(path, layout, resume=False, force=False)
    fill(journal, layout, chunk=5)
    journal.close()
    damage(journal.chunks.directory((1, 5, 10)))

    resumed = WorkJournal.open(path, layout, resume=True, force=False)
    assert resumed.saved() == [(0, 0, 5), (0, 5, 10), (1, 0, 5)]
    assert len(resumed.notes) == 1
    assert "members 5..9 of variant 'fewer-contacts' is damaged" in resumed.notes[0]
    resumed.save((1, 5, 10), *made_up_members(layout, 1, 5, 10))
    resumed.finish()


def test_a_chunk_damaged_during_the_run_is_computed_again_before_finishing(
        tmp_path, monkeypatch, reference):
    """A chunk edited after it was saved, while the run goes on, is found by the check
    before the result is written and computed again: the result keeps the bits of an
    uninterrupted run, and the run says what it did."""
    monkeypatch.chdir(tmp_path)     # the result goes to result.nc, as the file says
    scenario = load_scenario(write_scenario(tmp_path))
    work = tmp_path / "result.nc.partial"

    class DamagingProgress(Progress):
        """Edits the first chunk saved, once, as the run reports it saved."""
        damaged = False

        def advance(self, member_count: int) -> None:
            if not self.damaged:
                flip_a_value(saved_chunks(work)[0] / "state.npy")
                self.damaged = True
            super().advance(member_count)

    lines = io.StringIO()
    result = run_scenario(scenario, history="test", workers=0, chunk=CHUNK,
                          progress=DamagingProgress(bar=False, stream=lines))
    assert "members 0..9 of variant 'no-change' is damaged (state.npy does not match its " \
           "checksum); computing it again" in lines.getvalue()
    assert_same_numbers(result, reference)


def test_finish_refuses_a_chunk_damaged_since_it_was_saved(tmp_path):
    """Without the run engine (no way to compute again here): finish removes the damaged
    chunk, writes nothing, releases the lock, and a resume lacks only that chunk."""
    layout = layout_of(grouped_scenario(tmp_path, members=10))
    path = tmp_path / "r.nc"
    journal = WorkJournal.open(path, layout, resume=False, force=False)
    fill(journal, layout, chunk=5)
    truncate(journal.chunks.directory((0, 5, 10)) / "state.npy")
    with pytest.raises(IncompleteWork, match="members 5..9 of variant 'usual' is damaged"):
        journal.finish()
    assert not path.exists()
    resumed = WorkJournal.open(path, layout, resume=True, force=False)
    assert resumed.pending([(0, 0, 10), (1, 0, 10)]) == [(0, 5, 10)]


def test_damaged_brackets_are_removed_at_resume(tmp_path):
    layout = layout_of(grouped_scenario(tmp_path, members=10))
    path = tmp_path / "r.nc"
    journal = WorkJournal.open(path, layout, resume=False, force=False)
    journal.save((0, 0, 5), *made_up_members(layout, 0, 0, 5))
    journal.close()
    stored = partial_path(path) / "pilot-brackets-v0.npz"
    stored.write_bytes(b"PK\x03\x04 cut short")
    resumed = WorkJournal.open(path, layout, resume=True, force=False)
    assert not stored.exists() and resumed.saved() == [(0, 0, 5)]
    assert any("pilot-brackets-v0.npz was damaged" in note for note in resumed.notes)
