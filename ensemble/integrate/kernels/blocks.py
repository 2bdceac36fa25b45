"""Members per block, the unit of work of every generated kernel, and the padding of a
chunk.

A kernel integrates a chunk block after block, each block's members side by side in the
SIMD lanes.  The block size depends on the model and the method only, never on the
chunk; the last block of a chunk is only as wide as the members left, padded to a whole
number of :data:`LANES` (:func:`padding_unit`).
"""

from __future__ import annotations

from ensemble.integrate.kernels.form import KernelForm
from ensemble.methods import Method
from ensemble.model.lower import LoweredModel

LANES = 8
"""A chunk is padded to a multiple of this many members (or of the block, if smaller): the
doubles of one AVX-512 vector.  Without a vector math library a member gets the same bits
in a vector lane as in the scalar loop that ends a loop over members (the arithmetic is
IEEE 754 in both, without fast-math, and ``exp`` and the like are the same scalar calls),
so the width of the last block changes no number."""

VECTOR_MATH_LANES = 64
"""The padding when numba uses Intel's SVML (installed with it, and not disabled): a
vectorised ``exp`` may differ from the scalar one in the last bit, so every member must go
through the vector body of every loop, whatever vector width times unrolling the compiler
picks (64 at most: 8 lanes of AVX-512 unrolled 8 times).  Common practice, no source."""

FUSED_BLOCK = 512
"""Members per block when one pass takes the whole step (every stage in registers)."""

STAGED_BYTES = 512 * 1024
"""Largest size of a block's arrays when a step is staged over arrays (states, rates of
every stage, increments, flow counts, sums over groups): a quarter of the L2 cache of one
core of the machine measured (2 MB), so that the arrays and the parameters they read stay
in it (measured with scripts/benchmark.py)."""

IMPLICIT_BYTES = 1_100_000
"""Largest size of a block's Newton matrices and right-hand sides (members x n x (n + 1)
float64): about the L2 cache of one core of the machines measured (1 MB).  On the 16-group
model (n = 64) that is 32 members; 8 members gave twice the cost per step (measured with
scripts/benchmark.py)."""


def block_size(model: LoweredModel, method: Method) -> int:
    """Members per block of the kernel of ``model`` and ``method``
    (:func:`form_block_size`)."""
    return form_block_size(KernelForm(model, method))


def form_block_size(form: KernelForm) -> int:
    """Members per block, a power of two from 8 to 512: :data:`FUSED_BLOCK` for a fused
    explicit step; otherwise as many as keep the block's arrays near
    :data:`STAGED_BYTES` (explicit) or its Newton matrices near :data:`IMPLICIT_BYTES`."""
    if form.shape == "fused":
        return FUSED_BLOCK
    if form.method.implicit:
        per_member, limit = 8 * form.n_states * (form.n_states + 1), IMPLICIT_BYTES
    else:
        stages = len(form.method.b)
        rows = (form.n_states * (2 if form.shape == "staged" else 1)
                + (stages + 1 + (form.shape == "staged")) * form.n_elements
                + 2 * form.n_groups * len(form.structured)
                + stages * len(form.model.schedule_slots))
        per_member, limit = 8 * rows, STAGED_BYTES
    size = 512
    while size > 8 and size * per_member > limit:
        size //= 2
    return size


def padding_unit(block: int, vector_math: bool) -> int:
    """Members a chunk is padded to a multiple of, for blocks of ``block`` members, with or
    without a vector math library."""
    return min(VECTOR_MATH_LANES if vector_math else LANES, block)
