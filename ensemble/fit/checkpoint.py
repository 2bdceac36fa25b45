"""A fit's state kept after every round, so that ``ensemble fit --resume`` goes on after a
kill and gives the same file bit for bit (``ensemble fit`` in the README).

The state lives in ``<output>.fit-partial/state.npz``, replaced whole after each round
(:func:`ensemble.durable.replace_atomically`), with the key of the fit it belongs to: a
state of another scenario, seed, particle count or backend is refused. The directory is
removed when the result file is written.
"""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np

from ensemble.durable import replace_atomically
from ensemble.errors import UsageError
from ensemble.fit.smc import Round, SamplerState

STATE_FILE = "state.npz"


def partial_directory(output: Path) -> Path:
    """Where the fit writing ``output`` keeps its state."""
    return output.with_name(output.name + ".fit-partial")


def save_state(directory: Path, key: str, state: SamplerState) -> None:
    """Replace the kept state of the fit ``key`` with ``state``."""
    directory.mkdir(exist_ok=True)
    buffer = io.BytesIO()
    np.savez(buffer, z=state.z, log_likelihood=state.log_likelihood,
             rounds=np.array([[r.temperature, r.effective_size, r.acceptance]
                              for r in state.rounds]),
             numbers=np.array([state.temperature, state.log_evidence]),
             text=np.array(json.dumps({"key": key, "random_state": state.random_state})))
    replace_atomically(directory / STATE_FILE,
                       lambda target: target.write_bytes(buffer.getvalue()))


def load_state(directory: Path, key: str) -> SamplerState | None:
    """The kept state of the fit ``key``, or None when nothing is kept.

    Raises
    ------
    UsageError : the state kept belongs to another fit (scenario, seed, particles or
        backend), or cannot be read.
    """
    path = directory / STATE_FILE
    if not path.exists():
        return None
    try:
        with np.load(path) as stored:
            text = json.loads(str(stored["text"]))
            rounds = tuple(Round(*map(float, row)) for row in stored["rounds"])
            temperature, log_evidence = map(float, stored["numbers"])
            z, log_likelihood = stored["z"], stored["log_likelihood"]
    except (OSError, ValueError, KeyError) as problem:
        raise UsageError(str(path), "", None, f"cannot read the fit's kept state: {problem}",
                         "remove the directory to start again") from None
    if text["key"] != key:
        raise UsageError(str(path), "", None,
                         "the kept state belongs to another fit (scenario, seed, "
                         "particles or backend)", "remove the directory to start again")
    return SamplerState(z, log_likelihood, temperature, log_evidence, rounds,
                        text["random_state"])


def remove_state(directory: Path) -> None:
    """Remove the kept state and its directory (only what :func:`save_state` made)."""
    (directory / STATE_FILE).unlink(missing_ok=True)
    if directory.exists() and not any(directory.iterdir()):
        directory.rmdir()
