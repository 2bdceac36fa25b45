"""Members per block: the unit of work of every generated kernel.

A kernel integrates a chunk block after block, each block's members side by side in the
SIMD lanes.  The block size depends on the model and the method only, never on the
chunk, so that every member of a chunk of any size runs through the same code path (the
caller pads the last block).
"""

from __future__ import annotations

from ensemble.methods import Method
from ensemble.model.lower import LoweredModel

EXPLICIT_BLOCK = 512
"""Members per block of an explicit method."""

BLOCK_BYTES = 1_100_000
"""Largest size of a block's Newton matrices and right-hand sides (members x n x (n + 1)
float64): about the L2 cache of one core of the machines measured (1 MB).  On the 16-group
model (n = 64) that is 32 members; 8 members gave twice the cost per step (measured with
scripts/benchmark.py)."""


def block_size(model: LoweredModel, method: Method) -> int:
    """Members per block: :data:`EXPLICIT_BLOCK` for explicit methods; for implicit ones as
    many as keep the block's Newton matrices near :data:`BLOCK_BYTES` (a power of two, 8
    to 512)."""
    if not method.implicit:
        return EXPLICIT_BLOCK
    per_member = 8 * model.n_states * (model.n_states + 1)
    size = 512
    while size > 8 and size * per_member > BLOCK_BYTES:
        size //= 2
    return size
