"""`ensemble run` as a program: exit statuses, the not-overwrite rule, interruptions and
resume (the command line's contract in the README: exit status 0, 1, 2 or 130; an existing
result is replaced only with --force; an interrupted run continues with --resume).

Each test runs the real program in a subprocess on the illustrative SEIR scenario of
``support.write_scenario`` and compares what it leaves on disk with an uninterrupted run
made in this process (``ensemble.api.run`` with ``workers=0``).

The interruption tests signal the run at a barrier (``support.wait_for_saved_chunks``:
the first chunks are saved in ``result.nc.partial``), never after a sleep, and their
scenario is slow enough that most of its work is still ahead then: a small step makes each
chunk of two members take a noticeable fraction of a second, and there are many chunks.
Each test asserts that work was in flight (not every chunk was saved) before it checks what
the interrupted run kept.
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import subprocess
from pathlib import Path

import pytest

import ensemble
from ensemble import api
from support import (assert_same_numbers, ensemble_command, invoke_cli, run_cli, saved_chunks,
                     wait_for_saved_chunks, write_scenario)

SLOW = {"members": 16, "days": 60, "step": 1 / 256}
"""The interrupted scenario: 15,360 steps of four stages per member and variant (and the
step check's rerun at half the step), in chunks of :data:`CHUNK` members."""

CHUNK = 2
"""Members per chunk of the interrupted runs."""

TOTAL_CHUNKS = 2 * SLOW["members"] // CHUNK
"""Chunks of an interrupted run (two variants)."""


def start_slow_run(directory: Path, *arguments: str) -> subprocess.Popen:
    """Start ``ensemble run`` on the slow scenario in ``directory``, in a process group of
    its own."""
    scenario = write_scenario(directory, **SLOW)
    return subprocess.Popen(
        ensemble_command("run", scenario, "--chunk", str(CHUNK), *arguments), cwd=directory,
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)


def stop_group(process: subprocess.Popen) -> None:
    """Kill what is left of the process group this test started (its dask workers)."""
    try:
        os.killpg(process.pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    process.wait(timeout=30)


@pytest.fixture(scope="module")
def uninterrupted(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The slow scenario run without interruption, in this process."""
    directory = tmp_path_factory.mktemp("uninterrupted")
    scenario = write_scenario(directory, **SLOW)
    return api.run(scenario, output=directory / "result.nc", workers=0, progress=False)


def resume_and_compare(directory: Path, saved: int, uninterrupted: Path) -> None:
    """``--resume`` computes only the ``TOTAL_CHUNKS - saved`` chunks that were not saved,
    and the result equals the uninterrupted run bit for bit."""
    resumed = run_cli("run", "testtown.toml", "--resume", "--chunk", str(CHUNK),
                      "--workers", "1", cwd=directory)
    assert resumed.returncode == 0, resumed.stderr
    progress = re.search(r"resuming: (\d+) chunks already done, (\d+) to compute",
                         resumed.stderr)
    assert progress, resumed.stderr
    assert (int(progress[1]), int(progress[2])) == (saved, TOTAL_CHUNKS - saved)
    assert not (directory / "result.nc.partial").exists()
    assert_same_numbers(directory / "result.nc", uninterrupted)


def test_run_writes_result_and_reports(tmp_path: Path) -> None:
    scenario = write_scenario(tmp_path, members=12)
    done = run_cli("run", scenario, "--workers", "1", "--dashboard", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "result.nc").is_file()
    assert not (tmp_path / "result.nc.partial").exists()
    lines = done.stdout.splitlines()
    assert lines[0] == "result: result.nc"
    assert lines[1].startswith("12 members x 2 variants in ")
    assert lines[2].startswith("flagged members: step_check_failed ")
    assert lines[-1] == ensemble.CAUTION
    assert "dask dashboard at http" in done.stderr
    assert len(done.stderr.splitlines()) <= 5, "noisy output when not on a terminal"
    assert "Traceback" not in done.stderr


def test_existing_result_is_not_replaced_without_force(tmp_path: Path) -> None:
    """An existing PATH is not replaced without --force (exit 2 before any work)."""
    scenario = write_scenario(tmp_path, members=4)
    result = tmp_path / "result.nc"
    result.write_bytes(b"an earlier result")
    refused = run_cli("run", scenario, "--workers", "0", cwd=tmp_path)
    assert refused.returncode == 2
    assert "result.nc" in refused.stderr and "--force" in refused.stderr
    assert result.read_bytes() == b"an earlier result"
    assert not (tmp_path / "result.nc.partial").exists()

    replaced = run_cli("run", scenario, "--workers", "0", "--force", cwd=tmp_path)
    assert replaced.returncode == 0, replaced.stderr
    assert result.read_bytes().startswith(b"\x89HDF")


def test_invalid_scenario_exits_2_and_writes_nothing(tmp_path: Path) -> None:
    scenario = write_scenario(tmp_path)
    scenario.write_text(scenario.read_text().replace('method = "rk4"', 'method = "rk5"'))
    done = run_cli("run", scenario, cwd=tmp_path)
    assert done.returncode == 2
    assert "solver.method" in done.stderr and "rk5" in done.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["testtown.toml"]


def test_unwritable_output_exits_1_with_one_clear_line(tmp_path: Path) -> None:
    """The output's directory cannot be made (a file stands in its way; permissions
    would not stop root)."""
    scenario = write_scenario(tmp_path, members=4)
    (tmp_path / "blocker").write_text("a file, not a directory")
    done = run_cli("run", scenario, "--workers", "0", "--output", "blocker/result.nc",
                   cwd=tmp_path)
    assert done.returncode == 1
    errors = [line for line in done.stderr.splitlines() if not line.startswith("warning:")]
    assert len(errors) == 1 and errors[0].startswith("error: ")
    assert "blocker" in errors[0] and "Traceback" not in done.stderr


@pytest.mark.slow
def test_sigkill_then_resume_redoes_only_unfinished_chunks(
        tmp_path: Path, uninterrupted: Path) -> None:
    """A run killed with SIGKILL while chunks are in flight leaves no file under the final
    name; --resume refuses a changed scenario (exit 2), then finishes the run computing
    only the chunks that were not saved, and the result equals an uninterrupted run bit
    for bit."""
    process = start_slow_run(tmp_path, "--workers", "1")
    work = tmp_path / "result.nc.partial"
    try:
        wait_for_saved_chunks(process, work, 2)
        os.kill(process.pid, signal.SIGKILL)
    finally:
        stop_group(process)
    assert not (tmp_path / "result.nc").exists()
    saved = len(saved_chunks(work))
    assert 2 <= saved < TOTAL_CHUNKS, "the run had no work in flight when it was killed"

    other = run_cli("run", "testtown.toml", "--resume", "--seed", "12", "--workers", "0",
                    cwd=tmp_path)
    assert other.returncode == 2
    assert "fingerprint" in other.stderr.lower()
    assert len(saved_chunks(work)) == saved

    resume_and_compare(tmp_path, saved, uninterrupted)
    again = run_cli("run", "testtown.toml", "--resume", "--workers", "0", cwd=tmp_path)
    assert again.returncode == 0 and "nothing to do" in again.stderr


@pytest.mark.slow
@pytest.mark.parametrize("signal_number, whole_group",
                         [(signal.SIGINT, True), (signal.SIGTERM, False)],
                         ids=["ctrl-c", "sigterm"])
def test_interrupt_exits_130_and_keeps_finished_work(
        tmp_path: Path, uninterrupted: Path, signal_number: int, whole_group: bool) -> None:
    """Interrupted while chunks are in flight: exit status 130, one line naming --resume
    and no tracebacks, finished work kept, and --resume completes it to the uninterrupted
    result.  Ctrl-C on a terminal signals the whole process group, dask workers included;
    SIGTERM (a batch system's stop) reaches the driver only."""
    process = start_slow_run(tmp_path, "--workers", "1")
    work = tmp_path / "result.nc.partial"
    try:
        wait_for_saved_chunks(process, work, 1)
        if whole_group:
            os.killpg(process.pid, signal_number)
        else:
            os.kill(process.pid, signal_number)
        _, err = process.communicate(timeout=120)
    finally:
        stop_group(process)
    assert process.returncode == 130, err
    assert "--resume" in err and "Traceback" not in err
    assert not (tmp_path / "result.nc").exists()
    saved = len(saved_chunks(work))
    assert 1 <= saved < TOTAL_CHUNKS, "the run had no work in flight when it was signalled"
    resume_and_compare(tmp_path, saved, uninterrupted)


def test_interrupt_while_the_work_directory_is_removed_says_the_result_is_complete(
        tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """Ctrl-C that lands once the result file is in place, while ``result.nc.partial``
    is being removed: exit status 130 as for any interrupt, but the line says the result
    is complete (it is: it equals an uninterrupted run) instead of offering a resume."""
    scenario = write_scenario(tmp_path, members=12)
    reference = api.run(scenario, output=tmp_path / "reference.nc", workers=0,
                        progress=False)
    remove = shutil.rmtree

    def interrupted_removal(path, *args, **kwargs) -> None:
        if Path(path).name == "result.nc.partial":
            remove(next(Path(path).glob("chunk-*")))    # part of it is gone already
            raise KeyboardInterrupt
        remove(path, *args, **kwargs)

    monkeypatch.setattr(shutil, "rmtree", interrupted_removal)
    done = invoke_cli("run", scenario, "--workers", "0", cwd=tmp_path)
    assert done.returncode == 130, done.stderr
    assert done.stderr.splitlines()[-1] == (
        "interrupted after result.nc was written: the result is complete, "
        "and what is left of result.nc.partial is no longer needed")
    assert_same_numbers(tmp_path / "result.nc", reference)


def test_without_dashboard_no_address_is_printed(tmp_path: Path) -> None:
    """The dashboard is served and announced only when asked for (--dashboard)."""
    scenario = write_scenario(tmp_path, members=12)
    done = run_cli("run", scenario, "--workers", "1", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "dashboard" not in done.stderr
