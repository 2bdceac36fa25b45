"""Shards: one run cut into N independent jobs, each writing a part file, merged afterwards.

Shard I of N holds members ``floor(I*M/N) .. floor((I+1)*M/N) - 1`` of every variant
(:func:`ensemble.run.plan.shard_range`).  A part file is a netCDF-4 file holding those
members' trajectories, step errors, status and reported parameters exactly as computed
(float64, lossless compression), plus the run's fingerprint, the shard's index and count,
and what is needed to rebuild the scenario (its text, member count, seed, backend).

:func:`merge_parts` feeds every part's members into one
:class:`~ensemble.run.journal.WorkJournal` and finishes it, so the result is the file a
single run would have written, identical in every number: chunks are pure functions of the
member indices, and the summaries do not depend on how members were chunked.

Every part is checked before its members count: its fingerprint must follow from the
scenario text, member count, seed and backend it records, and its numbers and those
attributes must match the checksum written into it (``content_sha256``: SHA-256, FIPS
180-4, of the attributes and of each stored variable's values member by member,
:class:`PartDigest`).  The checksum guards against parts damaged, edited or mixed up
after they were written; it is not a signature (whoever edits a part on purpose can
write a new checksum).  A part
stores the chunk results' own series (the trajectory variables of
:mod:`ensemble.output.variables` that are not derived from others), from which the journal
makes every trajectory variable again.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import os
import tomllib
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from decimal import Decimal
from pathlib import Path
from typing import Any

import netCDF4
import numpy as np

from ensemble.durable import replace_atomically
from ensemble.errors import InputError, PartError
from ensemble.output.layout import ResultLayout
from ensemble.output.variables import MEMBER_VALUE_NAMES, TRAJECTORIES
from ensemble.records import ChunkKey, ChunkResult
from ensemble.run.journal import WorkJournal
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

IDENTITY = ("ensemble_part", "fingerprint", "shard_index", "shard_count", "member_start",
            "member_end", "members", "seed", "backend", "scenario")
"""The attributes of a part that its content checksum covers, besides its numbers."""

CHECKSUM_ATTRIBUTE = "content_sha256"
"""The attribute of a part holding its content checksum (:class:`PartDigest`)."""


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
        journal.close()
        raise RuntimeError(f"shard {shard}: members {missing} were never saved")
    path = Path(journal.path)

    def write(temporary: Path) -> None:
        with netCDF4.Dataset(temporary, "w", format="NETCDF4") as part:
            _define_part(part, layout, shard, backend, start, end)
            digest = PartDigest(part)
            for key in journal.saved():
                _write_chunk(part, layout, key, *journal.load(key), start, digest)
            part.setncattr(CHECKSUM_ATTRIBUTE, digest.hexdigest())

    try:
        replace_atomically(path, write)
    except BaseException:
        journal.close()
        raise
    journal.discard()
    return path


class PartDigest:
    """The content checksum of a part: SHA-256 of its :data:`IDENTITY` attributes and of
    each stored variable's values, fed member by member in the order of the variants and
    members (so that any blocks of members, written or read, give the same checksum),
    each value in the variable's type, little-endian.

    Parameters
    ----------
    part : the open part file, whose attributes and variables are covered.
    """

    def __init__(self, part: netCDF4.Dataset):
        attributes = part.__dict__
        self.identity = json.dumps({name: _plain(attributes.get(name)) for name in IDENTITY},
                                   sort_keys=True)
        self.types = {name: variable.dtype.newbyteorder("<")
                      for name, variable in part.variables.items() if name != "member"}
        self.hashes = {name: hashlib.sha256() for name in sorted(self.types)}

    def add(self, name: str, values: np.ndarray) -> None:
        """Values of variable ``name`` for the next members of one variant, members on
        the last axis for the parameters, on the first otherwise."""
        by_member = np.moveaxis(values, -1, 0) if name.startswith("param_") else values
        self.hashes[name].update(np.ascontiguousarray(by_member, dtype=self.types[name]))

    def hexdigest(self) -> str:
        whole = hashlib.sha256(self.identity.encode("utf-8"))
        for name, digest in self.hashes.items():
            whole.update(f"\n{name} {digest.hexdigest()}".encode("ascii"))
        return whole.hexdigest()


def _plain(value: object) -> object:
    """An attribute's value as JSON can hold it (numpy numbers as Python numbers)."""
    return value.item() if isinstance(value, np.generic) else value


def _write_chunk(part: netCDF4.Dataset, layout: ResultLayout, key: ChunkKey,
                 result: ChunkResult, reported: dict[str, np.ndarray], start: int,
                 digest: PartDigest) -> None:
    """One saved chunk's members into the part file (and its checksum)."""
    variant, first, last = key
    rows = slice(first - start, last - start)
    for name, values in _chunk_values(layout, result, reported).items():
        part[name][(variant, ..., rows) if name.startswith("param_") else (variant, rows)] = (
            values)
        digest.add(name, values)


def _chunk_values(layout: ResultLayout, result: ChunkResult,
                  reported: Mapping[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Variable of a part -> the values a chunk gives it."""
    values = {variable.source: getattr(result, variable.source) for variable in STORED}
    values.update({name: getattr(result, name) for name in (*MEMBER_VALUE_NAMES, "status")})
    values.update({f"param_{name}": reported[name] for name in layout.parameters})
    return values


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
    scenario_text: str
    scenario_path: str
    member_count: int
    seed: int
    backend: str
    checksum: str
    """Its content checksum (:class:`PartDigest`) as written into it."""


def read_part_info(path: str | os.PathLike[str]) -> PartInfo:
    """The header of a part file.

    Raises
    ------
    PartError : the file is missing, not netCDF, not a part file, or lacks an attribute
        (the message names it).
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

    def attribute(name: str, kind: type) -> Any:
        try:
            value = attributes[name]
            return kind(value.item() if isinstance(value, np.generic) else value)
        except KeyError:
            problem = "is missing"
        except (TypeError, ValueError):
            problem = "is not a valid value"
        raise PartError(str(path), name, None, f"this attribute of the part {problem}",
                        "make the part again with `ensemble run --shard I/N`")

    try:
        shard = Shard(attribute("shard_index", int), attribute("shard_count", int))
    except ValueError as error:
        raise PartError(str(path), "shard_index", None, str(error)) from None
    return PartInfo(path=path, fingerprint=attribute("fingerprint", str), shard=shard,
                    member_range=(attribute("member_start", int),
                                  attribute("member_end", int)),
                    history=attribute("history", str),
                    scenario_text=attribute("scenario", str),
                    scenario_path=attribute("scenario_path", str),
                    member_count=attribute("members", int), seed=attribute("seed", int),
                    backend=attribute("backend", str),
                    checksum=attribute(CHECKSUM_ATTRIBUTE, str))


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
    PartError : parts of different runs, repeated or missing shards, not part files, or
        a part whose fingerprint does not follow from its scenario or whose numbers or
        attributes do not match its content checksum (nothing is written; the message
        names the part).
    ensemble.errors.ResultExists : ``output`` exists and ``force`` is false.
    """
    infos = [read_part_info(path) for path in parts]
    check_parts(infos)
    infos.sort(key=lambda info: info.shard.index)
    made: dict[tuple[str, int, int, str], Scenario] = {}
    scenario = [_scenario_of(info, output, made) for info in infos][0]
    layout = result_layout(scenario, lowered_models(scenario), infos[0].fingerprint,
                           f"{infos[0].history}\n{history}")
    journal = WorkJournal.open(output, layout, resume=False, force=force)
    try:
        for info in infos:
            _merge_part(journal, info, layout)
    except BaseException:
        journal.discard()       # nothing of a refused merge is kept
        raise
    return journal.finish()


def _scenario_of(info: PartInfo, output: str | os.PathLike[str],
                 made: dict[tuple[str, int, int, str], Scenario]) -> Scenario:
    """The scenario a part was made from (its recorded text and overrides), writing to
    ``output``, checked against the part's fingerprint; ``made`` keeps the scenarios
    already made from the same records.

    Raises
    ------
    PartError : the recorded scenario is not valid, or does not give the part's
        fingerprint (the part was edited, or made by another version of ensemble).
    """
    records = (info.scenario_text, info.member_count, info.seed, info.backend)
    if records not in made:
        try:
            scenario = validate(tomllib.loads(info.scenario_text, parse_float=Decimal),
                                info.scenario_path, info.scenario_text)
        except (InputError, tomllib.TOMLDecodeError) as error:
            raise PartError(str(info.path), "scenario", None,
                            f"the scenario recorded in the part is not valid ({error})"
                            ) from None
        made[records] = dataclasses.replace(
            scenario, member_count=info.member_count, seed=info.seed,
            output=dataclasses.replace(scenario.output, path=os.fspath(output)))
    scenario = made[records]
    if fingerprint(scenario, info.backend) != info.fingerprint:
        raise PartError(str(info.path), "fingerprint", None,
                        "does not follow from the scenario, member count, seed and backend "
                        "recorded in the part (the part was edited, or made by another "
                        "version of ensemble)",
                        "make the part again, or merge with the version that made it")
    return scenario


def _merge_part(journal: WorkJournal, info: PartInfo, layout: ResultLayout) -> None:
    """Save the members of part ``info`` into ``journal``, checking its content checksum.

    Raises
    ------
    PartError : the part cannot be read, or its numbers or attributes do not match the
        checksum it was written with.
    """
    try:
        with netCDF4.Dataset(info.path) as part:
            part.set_auto_mask(False)
            digest = PartDigest(part)
            for key, result, reported in _read_chunks(part, info, layout):
                for name, values in _chunk_values(layout, result, reported).items():
                    digest.add(name, values)
                journal.save(key, result, reported)
    except (OSError, RuntimeError, IndexError, ValueError) as error:
        raise PartError(str(info.path), "", None, f"cannot be read as a part ({error})",
                        "make the part again with `ensemble run --shard I/N`") from None
    if digest.hexdigest() != info.checksum:
        raise PartError(str(info.path), "", None,
                        "its numbers or attributes are not those it was written with (they "
                        f"do not match its {CHECKSUM_ATTRIBUTE})",
                        "make the part again with `ensemble run --shard I/N`")


def _read_chunks(part: netCDF4.Dataset, info: PartInfo, layout: ResultLayout
                 ) -> Iterator[tuple[tuple[int, int, int], ChunkResult, dict[str, np.ndarray]]]:
    """The members of the open part ``part`` as (key, result, reported), variant by
    variant, in blocks of at most :data:`BLOCK_BYTES` of trajectories."""
    start, end = info.member_range
    per_member = 8 * sum(layout.cell_count(variable) for variable in STORED)
    block = max(1, BLOCK_BYTES // per_member)
    for variant in range(len(layout.variants)):
        for first in range(start, end, block):
            last = min(first + block, end)
            rows = slice(first - start, last - start)
            reported = {name: part[f"param_{name}"][variant, ..., rows]
                        for name in layout.parameters}
            result = ChunkResult(
                members=np.arange(first, last, dtype=np.int64),
                **{variable.source: part[variable.source][variant, rows]
                   for variable in STORED},
                **{name: part[name][variant, rows] for name in MEMBER_VALUE_NAMES},
                status=part["status"][variant, rows], reported=reported)
            yield (variant, first, last), result, reported
