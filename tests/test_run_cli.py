"""`ensemble run` as a program: exit statuses, the not-overwrite rule, interruptions and
resume (SPEC section 2, "Command line"; issue 4 part 6).

Each test runs the real program in a subprocess on the illustrative SEIR scenario of
``support.write_scenario`` and compares what it leaves on disk with an uninterrupted run
made in this process (``ensemble.api.run`` with ``workers=0``).
"""

from __future__ import annotations

import os
import re
import signal
import subprocess
import time
from pathlib import Path

import pytest

import ensemble
from ensemble import api
from support import assert_same_numbers, ensemble_command, run_cli, write_scenario

SLOW = {"members": 20, "days": 60}
"""A run of several seconds with chunks of two members: time to interrupt it midway."""


def chunk_entries(work: Path) -> list[Path]:
    """Saved chunks in a work-in-progress directory."""
    return sorted(work.glob("chunk-*")) if work.is_dir() else []


def start_and_wait_for_chunks(tmp_path: Path, *arguments: str,
                              chunks: int = 1) -> subprocess.Popen:
    """Start ``ensemble run`` on the slow scenario and return once ``chunks`` chunks are
    saved (the program is then still running)."""
    scenario = write_scenario(tmp_path, **SLOW)
    process = subprocess.Popen(
        ensemble_command("run", scenario, "--chunk", "2", *arguments), cwd=tmp_path,
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    deadline = time.monotonic() + 60
    while len(chunk_entries(tmp_path / "result.nc.partial")) < chunks:
        if process.poll() is not None or time.monotonic() > deadline:
            stop_group(process)
            raise AssertionError(f"no chunk saved; stderr: {process.stderr.read()}")
        time.sleep(0.02)
    assert process.poll() is None, "the run ended before it could be interrupted"
    return process


def stop_group(process: subprocess.Popen) -> None:
    """Kill what is left of the process group this test started (its dask workers)."""
    try:
        os.killpg(process.pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    process.wait(timeout=30)


def reference_result(tmp_path: Path, **settings: int) -> Path:
    """The same scenario run without interruption, in this process."""
    directory = tmp_path / "reference"
    directory.mkdir()
    scenario = write_scenario(directory, **settings)
    return api.run(scenario, output=directory / "result.nc", workers=0, progress=False)


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
    """SPEC section 2: an existing PATH is not replaced without --force (exit 2 before
    any work)."""
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


def test_sigkill_then_resume_redoes_only_unfinished_chunks(tmp_path: Path) -> None:
    """Issue 4 part 6: a run killed with SIGKILL leaves no file under the final name;
    --resume refuses a changed scenario (exit 2), then finishes the run computing only the
    chunks that were not saved, and the result equals an uninterrupted run bit for bit."""
    process = start_and_wait_for_chunks(tmp_path, "--workers", "1", chunks=2)
    os.kill(process.pid, signal.SIGKILL)
    stop_group(process)
    work = tmp_path / "result.nc.partial"
    assert not (tmp_path / "result.nc").exists()
    saved = len(chunk_entries(work))
    total = 2 * SLOW["members"] // 2
    assert 2 <= saved < total

    scenario = tmp_path / "testtown.toml"
    other = run_cli("run", scenario, "--resume", "--seed", "12", "--workers", "0",
                    cwd=tmp_path)
    assert other.returncode == 2
    assert "fingerprint" in other.stderr.lower()
    assert len(chunk_entries(work)) == saved

    resumed = run_cli("run", scenario, "--resume", "--chunk", "2", "--workers", "1",
                      cwd=tmp_path)
    assert resumed.returncode == 0, resumed.stderr
    progress = re.search(r"resuming: (\d+) chunks already done, (\d+) to compute",
                         resumed.stderr)
    assert progress, resumed.stderr
    assert (int(progress[1]), int(progress[2])) == (saved, total - saved)
    assert not work.exists()
    assert_same_numbers(tmp_path / "result.nc", reference_result(tmp_path, **SLOW))

    again = run_cli("run", scenario, "--resume", "--workers", "0", cwd=tmp_path)
    assert again.returncode == 0 and "nothing to do" in again.stderr


@pytest.mark.parametrize("signal_number, whole_group",
                         [(signal.SIGINT, True), (signal.SIGTERM, False)],
                         ids=["ctrl-c", "sigterm"])
def test_interrupt_exits_130_and_keeps_finished_work(tmp_path: Path, signal_number: int,
                                                     whole_group: bool) -> None:
    """SPEC section 2: interrupted -> exit 130, finished work kept for --resume.  Ctrl-C
    on a terminal signals the whole process group, dask workers included: one line, no
    tracebacks."""
    process = start_and_wait_for_chunks(tmp_path, "--workers", "1")
    if whole_group:
        os.killpg(process.pid, signal_number)
    else:
        os.kill(process.pid, signal_number)
    try:
        _, err = process.communicate(timeout=60)
    finally:
        stop_group(process)
    assert process.returncode == 130, err
    assert "--resume" in err and "Traceback" not in err
    assert not (tmp_path / "result.nc").exists()
    assert chunk_entries(tmp_path / "result.nc.partial")


def test_without_dashboard_no_address_is_printed(tmp_path: Path) -> None:
    """The dashboard is served and announced only when asked for (--dashboard)."""
    scenario = write_scenario(tmp_path, members=12)
    done = run_cli("run", scenario, "--workers", "1", cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert "dashboard" not in done.stderr
