"""Shards: one run cut into N independent jobs, each writing a part file, merged afterwards.

Shard I of N holds members ``floor(I*M/N) .. floor((I+1)*M/N) - 1`` of every variant
(:func:`ensemble.run.plan.shard_range`).  A part file is a netCDF-4 file holding those
members' trajectories, step errors, status and reported parameters exactly as computed
(float64, lossless compression), plus the run's fingerprint, the shard's index and count,
and what is needed to rebuild the scenario (its text, member count, seed, backend).

:func:`merge_parts` feeds every part's members into one
:class:`~ensemble.run.journal.WorkJournal` and finishes it, so the result is the file a
single run would have written, identical in every number: chunks are pure functions of the
member indices, and the summaries do not depend on how members were chunked.  A part
stores the chunk results' own series (the trajectory variables of
:mod:`ensemble.output.variables` that are not derived from others), from which the journal
makes every trajectory variable again.
"""

from __future__ import annotations

import dataclasses
import functools
import os
import shutil
import tomllib
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path
from typing import Any

import netCDF4
import numpy as np

from ensemble.durable import replace_atomically
from ensemble.errors import PartError
from ensemble.output.layout import ResultLayout
from ensemble.output.variables import MEMBER_VALUE_NAMES, TRAJECTORIES
from ensemble.records import ChunkKey, ChunkResult
from ensemble.run.journal import WorkJournal, partial_path
from ensemble.run.layout import lowered_models, result_layout
from ensemble.run.plan import fingerprint, plan_chunks, shard_range
from ensemble.scenario.load import validate
from ensemble.scenario.schema import Scenario

PART_FORMAT = "ensemble shard part 1"
"""Value of a part file's ``ensemble_part`` attribute: marks the file and its layout."""

BLOCK_BYTES = 64 * 2**20
"""Trajectory bytes moved at once when a part is written or merged (bounded memory)."""

CHUNK_BYTES = 2**20
"""Target size of one netCDF chunk of a part's trajectories."""


MERGE = "ensemble merge"
"""What a :class:`~ensemble.errors.PartError` about the set of parts (not one file) names."""


@dataclass(frozen=True)
class Shard:
    """Shard ``index`` (0-based) of ``count``."""

    index: int
    count: int

    def __post_init__(self) -> None:
        if self.count < 1 or not 0 <= self.index < self.count:
            raise ValueError(f"shard {self.index}/{self.count}: expected 0 <= I < N")

    @classmethod
    def parse(cls, text: str) -> Shard:
        """Read ``"I/N"`` as written on the command line.

        Raises
        ------
        ValueError : not of the form I/N with whole numbers 0 <= I < N.
        """
        index, slash, count = text.partition("/")
        if not slash or not index.strip().isdigit() or not count.strip().isdigit():
            raise ValueError(f"expected I/N, e.g. 0/8, not {text!r}")
        return cls(int(index), int(count))

    def member_range(self, total: int) -> tuple[int, int]:
        """``(start, end)`` of this shard's members out of ``total`` (end excluded)."""
        return shard_range(self.index, self.count, total)

    def __str__(self) -> str:
        return f"{self.index}/{self.count}"


def default_part_path(scenario: Scenario, shard: Shard) -> Path:
    """``<result stem>.shard-I-of-N.nc`` beside the scenario's result path."""
    result = Path(scenario.output.path)
    return result.with_name(f"{result.stem}.shard-{shard.index}-of-{shard.count}.nc")


def engine_options(scenario: Scenario, shard: Shard, backend: str) -> dict[str, Any]:
    """Arguments of :func:`ensemble.run.execute.run_scenario` that make it run ``shard``
    only and end with its part file instead of a result."""
    return {"member_range": shard.member_range(scenario.member_count),
            "finish": functools.partial(write_part, shard=shard, backend=backend)}


def part_is_complete(path: str | os.PathLike[str], fingerprint: str, shard: Shard) -> bool:
    """True when ``path`` is already the part file of ``shard`` of this run (a resumed
    shard then has nothing to do)."""
    try:
        info = read_part_info(path)
    except PartError:
        return False
    return info.fingerprint == fingerprint and info.shard == shard


# ----------------------------------------------------------------------------- writing


STORED = tuple(variable for variable in TRAJECTORIES if variable.derive is None)
"""The trajectory variables a part stores: the chunk results' own series."""


def write_part(journal: WorkJournal, shard: Shard, backend: str) -> Path:
    """Write the part file of ``shard`` from the chunks saved in ``journal``, whole or not
    at all (:func:`ensemble.durable.replace_atomically`), then remove the work in
    progress.

    ``journal`` is the work in progress of the part (opened at the part's path); every
    member of the shard in every variant must be saved in it.

    Returns
    -------
    The part's path.
    """
    layout = journal.layout
    start, end = shard.member_range(layout.member_count)
    missing = journal.pending(plan_chunks(layout.scenario, max(end - start, 1),
                                          member_range=(start, end)))
    if missing:
        raise RuntimeError(f"shard {shard}: members {missing} were never saved")
    path = Path(journal.path)

    def write(temporary: Path) -> None:
        with netCDF4.Dataset(temporary, "w", format="NETCDF4") as part:
            _define_part(part, layout, shard, backend, start, end)
            for key in journal.saved():
                _write_chunk(part, layout, key, *journal.load(key), start)

    replace_atomically(path, write)
    shutil.rmtree(partial_path(path), ignore_errors=True)
    return path


def _write_chunk(part: netCDF4.Dataset, layout: ResultLayout, key: ChunkKey,
                 result: ChunkResult, reported: dict[str, np.ndarray], start: int) -> None:
    """One saved chunk's members into the part file."""
    variant, first, last = key
    rows = slice(first - start, last - start)
    for variable in STORED:
        part[variable.source][variant, rows] = getattr(result, variable.source)
    for name in (*MEMBER_VALUE_NAMES, "status"):
        part[name][variant, rows] = getattr(result, name)
    for name in layout.parameters:
        part[f"param_{name}"][variant, ..., rows] = reported[name]


def _define_part(part: netCDF4.Dataset, layout: ResultLayout, shard: Shard, backend: str,
                 start: int, end: int) -> None:
    """Dimensions, variables and attributes of an empty part file."""
    scenario = layout.scenario
    part.setncatts({
        "ensemble_part": PART_FORMAT,
        "title": f"shard {shard} of an ensemble run (merge the parts with `ensemble merge`)",
        "source": layout.source,
        "history": layout.history,
        "fingerprint": layout.fingerprint,
        "shard_index": np.int32(shard.index),
        "shard_count": np.int32(shard.count),
        "member_start": np.int64(start),
        "member_end": np.int64(end),
        "members": np.int64(scenario.member_count),
        "seed": np.int64(scenario.seed),
        "backend": backend,
        "scenario_path": os.path.abspath(scenario.source.path),
        "scenario": scenario.source.text,
    })
    part.createDimension("variant", len(layout.variants))
    part.createDimension("member", end - start)
    part.createDimension("group", layout.n_groups)
    part.createDimension("time", layout.n_reports)
    part.createVariable("member", "i8", ("member",))[:] = np.arange(start, end)
    for variable in STORED:
        n_rows = layout.row_count(variable)
        part.createDimension(f"{variable.source}_row", n_rows)
        per_member = max(1, CHUNK_BYTES // (8 * n_rows * layout.n_reports))
        part.createVariable(
            variable.source, "f8", ("variant", "member", f"{variable.source}_row", "time"),
            zlib=True, complevel=1, shuffle=True,
            chunksizes=(1, max(1, min(per_member, end - start)), n_rows, layout.n_reports))
    for name in MEMBER_VALUE_NAMES:
        part.createVariable(name, "f8", ("variant", "member"))
    part.createVariable("status", "u1", ("variant", "member"))
    for name, info in layout.parameters.items():
        dimensions = ("variant", "group", "member") if info.shape == "vector" else (
            "variant", "member")
        part.createVariable(f"param_{name}", "f8", dimensions)


# ----------------------------------------------------------------------------- merging


@dataclass(frozen=True)
class PartInfo:
    """What a part file says about itself."""

    path: Path
    fingerprint: str
    shard: Shard
    member_range: tuple[int, int]
    history: str


def read_part_info(path: str | os.PathLike[str]) -> PartInfo:
    """The header of a part file.

    Raises
    ------
    PartError : the file is missing, not netCDF, or not a part file.
    """
    path = Path(path)
    try:
        with netCDF4.Dataset(path) as part:
            attributes = part.__dict__
    except (OSError, RuntimeError) as error:
        raise PartError(str(path), "", None,
                        f"cannot be read as a part file ({error})") from None
    if attributes.get("ensemble_part") != PART_FORMAT:
        raise PartError(str(path), "", None, "not a shard part file",
                        "parts are made by `ensemble run --shard I/N`")
    return PartInfo(path=path, fingerprint=str(attributes["fingerprint"]),
                    shard=Shard(int(attributes["shard_index"]), int(attributes["shard_count"])),
                    member_range=(int(attributes["member_start"]),
                                  int(attributes["member_end"])),
                    history=str(attributes["history"]))


def check_parts(parts: Sequence[PartInfo]) -> None:
    """Refuse parts of different runs, repeated shards and missing shards.

    Raises
    ------
    PartError : naming the files of each fingerprint, the repeated shard, or the missing
        shard indices.
    """
    if not parts:
        raise PartError(MERGE, "", None, "no part files given")
    by_fingerprint: dict[str, list[str]] = {}
    for part in parts:
        by_fingerprint.setdefault(part.fingerprint, []).append(str(part.path))
    if len(by_fingerprint) > 1:
        groups = "; ".join(f"{digest[:12]}: {', '.join(files)}"
                           for digest, files in by_fingerprint.items())
        raise PartError(MERGE, "", None,
                        f"the parts come from different runs (fingerprints {groups})")
    counts = {part.shard.count for part in parts}
    if len(counts) > 1:
        raise PartError(MERGE, "", None,
                        f"the parts disagree on the number of shards ({sorted(counts)})")
    count = counts.pop()
    seen: dict[int, Path] = {}
    for part in parts:
        if part.shard.index in seen:
            raise PartError(MERGE, "", None, f"shard {part.shard} given twice: "
                            f"{seen[part.shard.index]} and {part.path}")
        seen[part.shard.index] = part.path
    missing = sorted(set(range(count)) - set(seen))
    if missing:
        listed = ", ".join(str(index) for index in missing)
        raise PartError(MERGE, "", None,
                        f"missing shard{'s' if len(missing) > 1 else ''} {listed} of {count}",
                        f"each shard I is made by `ensemble run --shard I/{count}`")


def merge_parts(parts: Sequence[str | os.PathLike[str]], output: str | os.PathLike[str], *,
                force: bool = False, history: str) -> Path:
    """Join the part files of one run into its result file.

    Parameters
    ----------
    parts : every shard's part file, in any order.
    output : the result file to write.
    force : replace an existing result.
    history : the line this merge adds to the result's ``history`` attribute.

    Returns
    -------
    The result's path.

    Raises
    ------
    PartError : parts of different runs, repeated or missing shards, or not part files
        (nothing is written).
    ensemble.errors.ResultExists : ``output`` exists and ``force`` is false.
    """
    infos = [read_part_info(path) for path in parts]
    check_parts(infos)
    infos.sort(key=lambda info: info.shard.index)
    scenario, backend = _scenario_of(infos[0], output)
    layout = result_layout(scenario, lowered_models(scenario), infos[0].fingerprint,
                           f"{infos[0].history}\n{history}")
    journal = WorkJournal.open(output, layout, resume=False, force=force)
    for info in infos:
        for key, result, reported in _read_chunks(info, layout):
            journal.save(key, result, reported)
    return journal.finish()


def _scenario_of(info: PartInfo, output: str | os.PathLike[str]) -> tuple[Scenario, str]:
    """The scenario a part was made from (its recorded text and overrides), writing to
    ``output``, checked against the part's fingerprint."""
    with netCDF4.Dataset(info.path) as part:
        text, original = str(part.scenario), str(part.scenario_path)
        member_count, seed, backend = int(part.members), int(part.seed), str(part.backend)
    scenario = validate(tomllib.loads(text, parse_float=Decimal), original, text)
    scenario = dataclasses.replace(
        scenario, member_count=member_count, seed=seed,
        output=dataclasses.replace(scenario.output, path=os.fspath(output)))
    if fingerprint(scenario, backend) != info.fingerprint:
        raise PartError(str(info.path), "", None, "made by a different version of "
                        "ensemble (its fingerprint does not match its scenario here)",
                        "merge with the version that made the parts")
    return scenario, backend


def _read_chunks(info: PartInfo, layout: ResultLayout
                 ) -> Iterator[tuple[tuple[int, int, int], ChunkResult, dict[str, np.ndarray]]]:
    """A part's members as (key, result, reported), variant by variant, in blocks of at most
    :data:`BLOCK_BYTES` of trajectories."""
    start, end = info.member_range
    per_member = 8 * sum(layout.cell_count(variable) for variable in STORED)
    block = max(1, BLOCK_BYTES // per_member)
    with netCDF4.Dataset(info.path) as part:
        part.set_auto_mask(False)
        for variant in range(len(layout.variants)):
            for first in range(start, end, block):
                last = min(first + block, end)
                rows = slice(first - start, last - start)
                result = ChunkResult(
                    members=np.arange(first, last, dtype=np.int64),
                    **{variable.source: part[variable.source][variant, rows]
                       for variable in STORED},
                    **{name: part[name][variant, rows] for name in MEMBER_VALUE_NAMES},
                    status=part["status"][variant, rows])
                reported = {name: part[f"param_{name}"][variant, ..., rows]
                            for name in layout.parameters}
                yield (variant, first, last), result, reported
