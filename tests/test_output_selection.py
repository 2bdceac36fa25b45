"""Exact quantiles from a fraction of the members' values (ensemble/output/selection.py).

Reference: ``numpy.quantile`` (default "linear", Hyndman and Fan 1996, definition 7), bit
for bit, over every member's values held in memory.  The margin of the brackets rests on
the normal approximation of a binomial count (common practice, no source beyond any
probability text).
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from ensemble.output import selection
from ensemble.output.brackets import BracketCache
from ensemble.output.selection import (chunk_candidates, pilot_brackets, recut,
                                       refined_brackets, select)

PROBABILITIES = [0.0, 0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975, 1.0]


def _cells(rng: np.random.Generator, members: int) -> np.ndarray:
    """Cells of illustrative values: spread over decades, all equal, half equal, rounded
    (many ties), one NaN, all NaN, and a two-humped one."""
    values = rng.lognormal(size=(12, members)) * rng.integers(1, 1000, size=(12, 1))
    values[3] = 7.0
    values[4, : members // 2] = 1.0
    values[5, 100] = np.nan
    values[6] = np.nan
    values[7] = np.round(values[7])
    values[8] = np.where(rng.random(members) < 0.3, 1e4, 0.0) + rng.normal(size=members)
    return values


def _quantiles_from_candidates(values, included, pilot, chunk=1536):
    brackets = pilot_brackets(values[:, :pilot][:, included[:pilot]].copy(), PROBABILITIES)
    parts = [chunk_candidates(values[:, first:first + chunk], included[first:first + chunk],
                              brackets) for first in range(0, values.shape[1], chunk)]
    cells, intervals = brackets.lower.shape
    below = sum(part.below for part in parts)
    nans = sum(part.nans for part in parts)
    inside = sum(np.diff(part.offsets).reshape(cells, intervals) for part in parts)
    result, missed = select(parts, slice(0, cells), int(included.sum()), nans, below, inside,
                            PROBABILITIES)
    kept = sum(part.values.size for part in parts) / values.size
    return result, missed, kept


def test_candidates_give_numpys_quantiles_from_a_fraction_of_the_values():
    rng = np.random.default_rng(7)
    values = _cells(rng, 40_000)
    included = rng.random(values.shape[1]) > 0.05      # members left out of the summary
    included[100] = True                               # the NaN counts
    result, missed, kept = _quantiles_from_candidates(values, included, pilot=8192)
    assert not missed.any()
    np.testing.assert_array_equal(result, np.quantile(values[:, included], PROBABILITIES,
                                                      axis=1))
    assert kept < 0.5           # cells of equal values keep everything, the others ~30 %


@pytest.mark.parametrize("margin", [0.0, 1.0])
def test_narrow_brackets_report_their_misses_and_keep_the_rest_exact(monkeypatch, margin):
    """With brackets far too narrow, the cells whose ranks fall outside are reported (for
    the caller to compute from whole trajectories); every other cell is still exact."""
    monkeypatch.setattr(selection, "MARGIN_SD", margin)
    rng = np.random.default_rng(11)
    values = _cells(rng, 20_000)
    included = np.ones(values.shape[1], bool)
    result, missed, _ = _quantiles_from_candidates(values, included, pilot=256)
    assert missed.any()
    expected = np.quantile(values, PROBABILITIES, axis=1)
    np.testing.assert_array_equal(result[:, ~missed], expected[:, ~missed])
    assert np.isnan(result[:, missed]).all()


def _summed(parts, brackets):
    cells, intervals = brackets.lower.shape
    return (sum(part.below for part in parts), sum(part.nans for part in parts),
            sum(np.diff(part.offsets).reshape(cells, intervals) for part in parts))


def test_refined_brackets_from_the_first_members_keep_quantiles_exact():
    """Brackets refined from the first 16,000 members (pilot whole, the rest cut with the
    pilot's brackets) lie inside the pilot's, keep fewer values, and chunks cut with the
    pilot's brackets and cut again (recut) give, with those cut with the refined ones,
    numpy.quantile's bits; a recut chunk holds exactly what cutting it with the refined
    brackets holds."""
    rng = np.random.default_rng(5)
    values = _cells(rng, 60_000)
    included = rng.random(values.shape[1]) > 0.05
    included[100] = True
    pilot, stage, chunk = 4096, 16_000, 2000
    coarse = pilot_brackets(values[:, :pilot][:, included[:pilot]].copy(), PROBABILITIES)
    early = [chunk_candidates(values[:, first:first + chunk], included[first:first + chunk],
                              coarse) for first in range(0, stage, chunk)]
    below, nans, inside = _summed(early, coarse)
    fine = refined_brackets(early, int(included[:stage].sum()), nans, below, inside, coarse,
                            PROBABILITIES, block_cells=5)
    for cell in range(fine.lower.shape[0]):
        for low, high in zip(fine.lower[cell], fine.upper[cell]):
            if low <= high:
                assert ((coarse.lower[cell] <= low) & (high <= coarse.upper[cell])).any()
    again = [recut(part, coarse, fine) for part in early]
    direct = chunk_candidates(values[:, :chunk], included[:chunk], fine)
    for name in ("below", "nans", "offsets", "values"):
        np.testing.assert_array_equal(getattr(again[0], name), getattr(direct, name))
    late = [chunk_candidates(values[:, first:first + chunk], included[first:first + chunk],
                             fine) for first in range(stage, values.shape[1], chunk)]
    parts = again + late
    below, nans, inside = _summed(parts, fine)
    result, missed = select(parts, slice(0, fine.lower.shape[0]), int(included.sum()), nans,
                            below, inside, PROBABILITIES)
    assert not missed.any()
    np.testing.assert_array_equal(result, np.quantile(values[:, included], PROBABILITIES,
                                                      axis=1))
    coarse_kept = sum(part.values.size for part in early) / (stage * values.shape[0])
    fine_kept = sum(part.values.size for part in late) / ((60_000 - stage) * values.shape[0])
    assert fine_kept < 0.7 * coarse_kept


def test_recut_refuses_brackets_outside_the_coarse_ones():
    rng = np.random.default_rng(3)
    values = rng.normal(size=(2, 3000))
    coarse = pilot_brackets(values[:, :1000].copy(), [0.5])
    part = chunk_candidates(values[:, 1000:2000], np.ones(1000, bool), coarse)
    wider = selection.Brackets(coarse.lower - 1.0, coarse.upper)
    with pytest.raises(ValueError, match="not inside"):
        recut(part, coarse, wider)


def test_a_large_ensemble_refines_from_a_share_of_its_members(monkeypatch, tmp_path):
    """Four pilots' worth of members give the refined brackets up to 80 pilots' worth of
    members; beyond, a twentieth of the members does, up to 32 pilots' worth; an ensemble
    under twice that gains nothing (the rule of ensemble/output/brackets.py, common
    practice, no source)."""
    def refine(members: int) -> int:
        cache = BracketCache(SimpleNamespace(member_count=members), None, tmp_path, 1)
        monkeypatch.setattr(cache, "pilot_member_count", lambda: 1000)
        return cache.refining_member_count()

    assert refine(7_999) == 0
    assert refine(30_000) == 4_000
    assert refine(200_000) == 10_000
    assert refine(1_000_000) == 32_000
