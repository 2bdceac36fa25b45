"""Helpers shared by the cluster tests (tests/test_cluster_*.py)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

REPO = Path(__file__).resolve().parent.parent


def assert_identical_numbers(first: Path, second: Path) -> None:
    """Every variable of two result files -- data and coordinates -- has the same shape,
    dtype and bytes (so NaN matches NaN and -0.0 differs from 0.0)."""
    with xr.open_dataset(first, decode_times=False) as a, \
            xr.open_dataset(second, decode_times=False) as b:
        assert sorted(a.variables) == sorted(b.variables)
        compared = 0
        for name in a.variables:
            left, right = a[name].values, b[name].values
            assert left.shape == right.shape, name
            assert left.dtype == right.dtype, name
            if left.dtype.kind in "fiub":
                assert left.tobytes() == right.tobytes(), (
                    f"{name} differs between {first.name} and {second.name}")
                compared += 1
            else:
                assert np.array_equal(left, right), name
        assert compared > 10  # the trajectories, quantiles and metrics were all there
        for attribute in ("fingerprint", "members", "seed", "scenario"):
            assert str(a.attrs[attribute]) == str(b.attrs[attribute]), attribute
