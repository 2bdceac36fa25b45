"""What a run computes: its fingerprint, and the members of each variant cut into chunks.

A chunk is ``(variant index, first member, end member)`` with the end excluded.  Which
draws a member gets depends only on the scenario and the member's index
(:func:`ensemble.sampling.make_design`), so the cut changes no number of the result: it
only sets the size of one task.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
from collections.abc import Mapping
from datetime import date
from fractions import Fraction
from typing import Any

from ensemble.about import PROGRAM, VERSION
from ensemble.records import ChunkKey
from ensemble.scenario.schema import Compute, Scenario, Source


TARGET_WORK_PER_CHUNK = {"numpy": 4e7, "compiled": 5e8}
"""Aimed-for work of one task per backend, in state-element steps (member x step x
(states + flows) x runs of the step check): about a second on one core (measured here on
an SEIR: the numpy backend does some 3e7 a second, the compiled kernels about ten times
more).  Common practice, no source: tasks of 0.1-10 s amortise the scheduler's overhead of
about a millisecond a task while keeping the load balanced."""

MAX_CHUNK_BYTES = 96 * 2**20
"""Largest trajectory block (states and flow counts of every member of a chunk) of one
task: a worker holds two such blocks (the run and its check, :class:`~ensemble.integrate.kernels.launch.ReportBuffers`) and
one chunk at a time, so memory stays within a few hundred MB a worker, while tasks stay
large enough that their fixed costs (scheduling, opening files, setting up the draws)
fade (measured: 4,608-member SEIR chunks finish a 200,000-member run 7-10 % sooner than
1,536-member ones)."""

TASKS_PER_WORKER = 4
"""With the default chunk size, at least this many tasks per worker when there are enough
members, so that a slow or lost worker does not hold up the end of the run."""


def canonical(value: Any) -> Any:
    """A JSON-ready form of a parsed scenario value that is the same in every process.

    Dataclasses become ``[class name, {field: value}]``; mappings keep their order (it is
    the file's order, and it sets the order of results); sets are sorted (their iteration
    order changes with Python's string hashing); fractions, dates and floats become exact
    text (``repr`` of a float round-trips).
    """
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        fields = {f.name: canonical(getattr(value, f.name)) for f in dataclasses.fields(value)}
        return [type(value).__name__, fields]
    if isinstance(value, Mapping):
        return [[str(key), canonical(item)] for key, item in value.items()]
    if isinstance(value, (set, frozenset)):
        return sorted(canonical(item) for item in value)
    if isinstance(value, (list, tuple)):
        return [canonical(item) for item in value]
    if isinstance(value, bool) or value is None or isinstance(value, (int, str)):
        return value
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, Fraction):
        return f"{value.numerator}/{value.denominator}"
    if isinstance(value, date):
        return value.isoformat()
    raise TypeError(f"no canonical form for {type(value).__name__}")


def fingerprint(scenario: Scenario, backend: str = "numpy") -> str:
    """SHA-256 of everything that changes the numbers of ``scenario``'s result.

    That is the parsed scenario (members and seed included, after command-line
    overrides), the program version and the integration backend; left out are how the
    work is distributed (``[compute]``), where the result goes (``output.path``) and the
    scenario file's path and text (comments and layout change no number).

    Parameters
    ----------
    scenario : the validated scenario.
    backend : the integration backend (``"numpy"`` or ``"compiled"``); the two agree to
        round-off, not bit for bit, so a run cannot be resumed with the other.

    Returns
    -------
    64 hexadecimal digits.
    """
    relevant = dataclasses.replace(
        scenario,
        output=dataclasses.replace(scenario.output, path=""),
        compute=Compute(),
        source=Source(path="", text=""),
    )
    text = json.dumps(
        {"program": PROGRAM, "version": VERSION, "backend": backend,
         "scenario": canonical(relevant)},
        separators=(",", ":"), ensure_ascii=True,
    )
    return hashlib.sha256(text.encode("ascii")).hexdigest()


def default_chunk(scenario: Scenario, n_states: int, n_flow_elements: int,
                  workers: int = 1, backend: str = "numpy", block: int = 1) -> int:
    """A chunk size for ``scenario`` when neither the command line nor the file sets one.

    Aims at :data:`TARGET_WORK_PER_CHUNK` per task, at most :data:`MAX_CHUNK_BYTES` of
    trajectories per task, and at least :data:`TASKS_PER_WORKER` tasks per worker; a
    chunk of at least ``block`` members is cut down to a whole number of blocks, so that
    a kernel working in blocks of ``block`` members pads nothing.

    Parameters
    ----------
    scenario : the validated scenario.
    n_states, n_flow_elements : rows of the state and of the flow counts (compartments and
        flows times groups).
    workers : number of worker processes the run uses.
    backend : the integration backend (``"numpy"`` or ``"compiled"``).
    block : members per block of the backend's kernel
        (:func:`ensemble.integrate.kernels.blocks.block_size`); 1 for none.
    """
    check = scenario.solver.check
    runs = 1
    if check.enabled:
        runs += check.refine + (check.refine ** 2 if check.levels == 3 else 0)
    steps = int(scenario.days / scenario.solver.step)
    work_per_member = steps * (n_states + n_flow_elements) * runs
    bytes_per_member = (n_states + n_flow_elements) * scenario.n_reports * 8
    chunk = min(TARGET_WORK_PER_CHUNK[backend] / work_per_member,
                MAX_CHUNK_BYTES / bytes_per_member)
    chunk = int(min(chunk, math.ceil(scenario.member_count / (TASKS_PER_WORKER * max(workers, 1)))))
    if chunk >= block:
        chunk -= chunk % block
    return max(1, chunk)


def split(start: int, end: int, chunk: int) -> list[tuple[int, int]]:
    """Cut members ``start .. end-1`` into consecutive ranges of at most ``chunk``."""
    if chunk < 1:
        raise ValueError(f"chunk must be at least 1, not {chunk}")
    return [(first, min(first + chunk, end)) for first in range(start, end, chunk)]


def plan_chunks(scenario: Scenario, chunk: int, *,
                member_range: tuple[int, int] | None = None) -> list[ChunkKey]:
    """The chunks of a run: every variant's members cut into ranges of at most ``chunk``.

    Parameters
    ----------
    scenario : the validated scenario (``scenario.member_count`` per variant).
    chunk : members per chunk (>= 1).
    member_range : ``(start, end)`` to plan only those members of every variant (a
        shard, :func:`shard_range`); default all.

    Returns
    -------
    Chunk keys, variant by variant, in member order.
    """
    start, end = member_range if member_range is not None else (0, scenario.member_count)
    return [(variant, first, last)
            for variant in range(len(scenario.variants))
            for first, last in split(start, end, chunk)]


def shard_range(index: int, count: int, member_count: int) -> tuple[int, int]:
    """Members ``floor(I*M/N) .. floor((I+1)*M/N) - 1`` of shard I of N (M members per
    variant; the project's reference, ``ensemble/scenario/reference.md``), returned as
    ``(start, end)`` with the end excluded.

    Every member falls in exactly one shard, and shard sizes differ by at most one.
    """
    if not 0 <= index < count:
        raise ValueError(f"shard {index}/{count}: the index must be 0 .. {count - 1}")
    return index * member_count // count, (index + 1) * member_count // count
