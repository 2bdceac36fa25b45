"""Uniform draws in (0, 1): one column per uncertain parameter element.

A column is keyed by the parameter's name and element (``(name, g)``; element 0 for a
scalar), never by variant, so a variant that overrides a distribution maps the same
uniform draws (common random numbers).  Member i's draw depends on the scenario (seed,
method, ``members``) and i only, never on which other members are asked for with it.

- ``random``: column (name, g) is the PCG64 stream (O'Neill 2014, "PCG: A family of
  simple fast space-efficient statistically good algorithms for random number
  generation") seeded by ``SeedSequence([seed, tag, hash(name), g])``; member i takes
  the stream's output i, reached with ``advance(i)`` in O(log i), so a chunk costs
  O(chunk) whatever its position and raising ``members`` keeps every existing draw.
- ``latin-hypercube``: column (name, g) is (perm_i + jitter_i) / members with its own
  permutation and jitter (McKay, Beckman & Conover 1979, "A comparison of three methods
  for selecting values of input variables in the analysis of output from a computer
  code", Technometrics 21:239-245), so adding a parameter changes no other column.
- ``sobol``: Sobol' points (Sobol' 1967, "On the distribution of points in a cube and the
  approximate evaluation of integrals", USSR Comput. Math. Math. Phys. 7:86-112), scrambled
  by :class:`scipy.stats.qmc.Sobol` (linear matrix scramble and digital shift), one
  dimension per column of the union over all variants, in the file's parameter order, so
  every variant sees the same points.  Each point is moved to the centre of its 2^-32
  cell, which keeps the net's balance and keeps 0 out.
"""

from __future__ import annotations

import functools
import hashlib
import warnings
from collections.abc import Iterator, Mapping, Sequence

import numpy as np

from ensemble.scenario.schema import Distribution, Scenario, element_distribution

ColumnKey = tuple[str, int]
"""(parameter name, element): element g of a per-group parameter, 0 for a scalar."""

_STREAM_TAGS = {"random": 1, "latin-hypercube-permutation": 2, "latin-hypercube-jitter": 3,
                "sobol": 4, "observation-noise": 5}
"""Separate the seed spaces of the methods' streams."""

SOBOL_BITS = 32
"""Bits of the Sobol' points (at most 2^32 members; scipy's ``fast_forward`` handles
at most 32)."""

_PERMUTATION_CACHE_SIZE = 32
"""Latin hypercube permutations kept per process (4 bytes per member each)."""


def uncertain_columns(scenario: Scenario) -> tuple[ColumnKey, ...]:
    """Every column any variant draws, in the file's parameter order.

    A parameter has a column per element if the base scenario or any variant gives it a
    distribution; ``per_group`` gives one per group, and a list per group one per group
    that any variant draws.
    """
    columns: list[ColumnKey] = []
    for name in scenario.parameters:
        forms = [scenario.parameters[name].form]
        forms += [v.parameters[name].form for v in scenario.variants if name in v.parameters]
        if any(isinstance(f, Distribution) and not f.per_group for f in forms):
            columns.append((name, 0))
            continue
        columns.extend((name, g) for g in range(scenario.model.n_groups)
                       if any(element_distribution(f, g) is not None for f in forms))
    return tuple(columns)


def uniform_draws(scenario: Scenario, keys: Sequence[ColumnKey],
                  member_index: np.ndarray) -> dict[ColumnKey, np.ndarray]:
    """Draws in (0, 1) of columns ``keys`` for member indices ``members``.

    Parameters
    ----------
    scenario : gives ``seed``, ``sampling`` and ``member_count`` (the ensemble size).
    keys : the columns wanted; for ``sobol`` each must be in :func:`uncertain_columns`.
    member_index : (M,) member indices in [0, scenario.member_count).

    Returns
    -------
    dict mapping each key to an (M,) float64 array.
    """
    member_index = np.asarray(member_index, dtype=np.int64)
    n_members = scenario.member_count
    if member_index.size and (member_index.min() < 0 or member_index.max() >= n_members):
        raise ValueError(f"member indices must lie in [0, {scenario.member_count})")
    if scenario.sampling == "random":
        return {key: _random_column(scenario.seed, key, member_index) for key in keys}
    if scenario.sampling == "latin-hypercube":
        return {key: _latin_hypercube_column(scenario.seed, key, n_members, member_index)
                for key in keys}
    if scenario.sampling == "sobol":
        return _sobol_columns(scenario.seed, uncertain_columns(scenario), keys, member_index)
    raise ValueError(f"unknown sampling method {scenario.sampling!r}")


def observation_noise_draws(seed: int, series: str, count: int,
                            member_index: np.ndarray) -> np.ndarray:
    """Draws in (0, 1) that put observation noise on ``count`` values of the observed
    series ``series`` (a measure's name) for each member of ``member_index``.

    Value w of member i is output i of the PCG64 stream seeded by
    ``SeedSequence([seed, tag, hash(series), w])``, reached with ``advance(i)``: it
    depends on the seed, the series, w and i alone (not on the chunk, the sampling
    method, the variant or the ensemble's size), so every variant's member i sees the
    same noise (common random numbers).

    Returns
    -------
    (M, count) float64 array.
    """
    member_index = np.asarray(member_index, dtype=np.int64)
    out = np.empty((member_index.size, count))
    for w in range(count):
        out[:, w] = _stream_values(seed, "observation-noise", (series, w), member_index)
    return out


def _name_hash(name: str) -> int:
    """A stable 64-bit hash of a parameter name (Python's hash() varies per process)."""
    return int.from_bytes(hashlib.blake2b(name.encode("utf-8"), digest_size=8).digest(),
                          "little")


def _stream(seed: int, tag: str, key: ColumnKey) -> np.random.PCG64:
    name, element = key
    return np.random.PCG64(np.random.SeedSequence([seed, _STREAM_TAGS[tag],
                                                   _name_hash(name), element]))


def _runs(member_index: np.ndarray) -> Iterator[tuple[int, slice]]:
    """(first member, positions) of each run of consecutive indices in ``members``."""
    breaks = np.flatnonzero(np.diff(member_index) != 1) + 1
    bounds = np.concatenate(([0], breaks, [member_index.size]))
    for begin, end in zip(bounds[:-1], bounds[1:]):
        if end > begin:
            yield int(member_index[begin]), slice(int(begin), int(end))


def _open_unit(raw: np.ndarray) -> np.ndarray:
    """uint64 outputs -> (k + 1/2) / 2^52, k the top 52 bits: strictly inside (0, 1)."""
    return ((raw >> np.uint64(12)).astype(np.float64) + 0.5) * 2.0 ** -52


def _stream_values(seed: int, tag: str, key: ColumnKey,
                   member_index: np.ndarray) -> np.ndarray:
    """Output i of the column's stream, mapped into (0, 1), for each i in ``members``."""
    out = np.empty(member_index.size)
    for first, positions in _runs(member_index):
        bit_generator = _stream(seed, tag, key)
        bit_generator.advance(first)
        out[positions] = _open_unit(bit_generator.random_raw(positions.stop - positions.start))
    return out


def _random_column(seed: int, key: ColumnKey, member_index: np.ndarray) -> np.ndarray:
    return _stream_values(seed, "random", key, member_index)


@functools.lru_cache(maxsize=_PERMUTATION_CACHE_SIZE)
def _latin_hypercube_permutation(seed: int, key: ColumnKey, size: int) -> np.ndarray:
    """Stratum of each member in column ``key``: a permutation of 0 .. size-1."""
    generator = np.random.Generator(_stream(seed, "latin-hypercube-permutation", key))
    strata = generator.permutation(size).astype(np.int32 if size < 2 ** 31 else np.int64)
    strata.flags.writeable = False
    return strata


def _latin_hypercube_column(seed: int, key: ColumnKey, size: int,
                            member_index: np.ndarray) -> np.ndarray:
    """Member i's draw lies in stratum perm_i: (perm_i + jitter_i) / size."""
    strata = _latin_hypercube_permutation(seed, key, size)[member_index].astype(np.float64)
    jitter = _stream_values(seed, "latin-hypercube-jitter", key, member_index)
    inside = np.minimum(strata + jitter, np.nextafter(strata + 1.0, 0.0))
    return inside / size


def _sobol_columns(seed: int, columns: tuple[ColumnKey, ...], keys: Sequence[ColumnKey],
                   member_index: np.ndarray) -> dict[ColumnKey, np.ndarray]:
    position: Mapping[ColumnKey, int] = {key: j for j, key in enumerate(columns)}
    missing = [key for key in keys if key not in position]
    if missing:
        raise ValueError(f"columns {missing} are not among the scenario's uncertain columns")
    if not keys:
        return {}
    from scipy.stats import qmc     # here only: scipy.stats takes half a second to import

    points = np.empty((member_index.size, len(columns)))
    for first, rows in _runs(member_index):
        engine = qmc.Sobol(len(columns), scramble=True, bits=SOBOL_BITS,
                           rng=np.random.Generator(_stream(seed, "sobol", ("", 0))))
        if first:
            engine.fast_forward(first)
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message="The balance properties",
                                    category=UserWarning)
            points[rows] = engine.random(rows.stop - rows.start)
    points += 2.0 ** -(SOBOL_BITS + 1)
    return {key: np.ascontiguousarray(points[:, position[key]]) for key in keys}
