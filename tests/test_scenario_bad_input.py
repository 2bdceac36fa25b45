"""Malformed scenario files: `ensemble check` exits 2, names the key path, writes nothing.

Every file in ``tests/bad_scenarios/`` starts with ``# expect: <text>``: the key path (or,
for a TOML syntax error, the line and column) that the error message must contain.  The
files are run through the real console entry point in a fresh process, as a modeller
would run them.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from ensemble.cli import app

CORPUS = Path(__file__).parent / "bad_scenarios"
FILES = sorted(CORPUS.glob("*.toml"))


def _expected(path: Path) -> str:
    first = path.read_text(encoding="utf-8").splitlines()[0]
    assert first.startswith("# expect: "), f"{path.name} lacks its '# expect:' line"
    return first.removeprefix("# expect: ").strip()


def _snapshot(directory: Path) -> dict[str, bytes]:
    return {str(p.relative_to(directory)): p.read_bytes() if p.is_file() else b""
            for p in sorted(directory.rglob("*"))}


def test_corpus_is_large_enough() -> None:
    assert len(FILES) >= 40


@pytest.mark.parametrize("path", FILES, ids=[p.stem for p in FILES])
def test_check_rejects_with_key_path(path: Path, tmp_path: Path,
                                     monkeypatch: pytest.MonkeyPatch) -> None:
    """In-process through the real typer app (fast); the process-level behaviour is
    checked on a sample by :func:`test_check_in_a_fresh_process`."""
    scenario = tmp_path / path.name
    shutil.copyfile(path, scenario)
    monkeypatch.chdir(tmp_path)
    before = _snapshot(tmp_path)
    result = CliRunner().invoke(app, ["check", scenario.name])
    assert result.exit_code == 2, result.output
    assert result.exc_info is not None and result.exc_info[0] is SystemExit
    assert _expected(path) in result.stderr
    assert result.stderr.startswith(f"error: {scenario.name}")
    assert result.stdout == ""
    assert _snapshot(tmp_path) == before


SAMPLE = [CORPUS / f"{name}.toml" for name in
          ("syntax-unclosed-string", "derived-cycle", "expr-attribute", "matrix-not-square")]


@pytest.mark.parametrize("path", SAMPLE, ids=[p.stem for p in SAMPLE])
def test_check_in_a_fresh_process(path: Path, tmp_path: Path) -> None:
    scenario = tmp_path / path.name
    shutil.copyfile(path, scenario)
    before = _snapshot(tmp_path)
    done = subprocess.run([sys.executable, "-m", "ensemble", "check", scenario.name],
                          cwd=tmp_path, capture_output=True, text=True, timeout=60)
    assert done.returncode == 2, done.stdout + done.stderr
    assert _expected(path) in done.stderr
    assert "Traceback" not in done.stderr + done.stdout
    assert done.stdout == ""
    assert _snapshot(tmp_path) == before


def test_forbidden_expression_does_not_run(tmp_path: Path) -> None:
    """The import attempt in the corpus would create a file if it were ever executed; it
    is refused as bad input (exit status 2) with an error naming the rate's key path."""
    path = CORPUS / "expr-import.toml"
    assert "touch pwned" in path.read_text(encoding="utf-8")
    done = subprocess.run([sys.executable, "-m", "ensemble", "check", str(path)],
                          cwd=tmp_path, capture_output=True, text=True, timeout=60)
    assert done.returncode == 2, done.stdout + done.stderr
    assert done.stderr.startswith(f"error: {path}"), done.stderr
    assert _expected(path) in done.stderr and "__import__" in done.stderr
    assert "Traceback" not in done.stderr + done.stdout
    assert not (tmp_path / "pwned").exists()


@pytest.mark.parametrize("argument", ["missing.toml", "."])
def test_missing_file_or_directory(argument: str, tmp_path: Path) -> None:
    done = subprocess.run([sys.executable, "-m", "ensemble", "check", argument],
                          cwd=tmp_path, capture_output=True, text=True, timeout=60)
    assert done.returncode == 2
    assert done.stderr.startswith(f"error: {argument}: ")
    assert "Traceback" not in done.stderr


def test_usage_error_exits_2(tmp_path: Path) -> None:
    done = subprocess.run([sys.executable, "-m", "ensemble", "check"], cwd=tmp_path,
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
