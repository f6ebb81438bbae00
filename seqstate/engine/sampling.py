"""Draw sequences and their true state paths from a model (numba kernel + NumPy driver).

Random numbers come from NumPy's PCG64 generator seeded by the caller, drawn in
chunks and handed to the kernel, so a seed gives the same output on every
platform.  The first ``k`` bases of a record use the back-off rows of order
0..k-1 (see :mod:`seqstate.engine.api`).  Records have the requested length: the
path is drawn from the transitions conditioned on not ending, so end
probabilities do not shorten a record.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from seqstate.engine import jitcache
from seqstate.engine.buffers import work_buffer
from seqstate.engine.tables import EngineTables

_CHUNK = 1 << 20


@njit(cache=jitcache.CACHE, nogil=True)
def _sample_chunk(
    u,
    pos0,
    state,
    ctx,
    start_cdf,
    trans_cdf,
    emit_cdf,
    offsets,
    order,
    n_symbols,
    path_out,
    sym_out,
):
    """Fill ``path_out``/``sym_out`` for positions pos0.. using 2 uniforms per position."""
    m = start_cdf.shape[0]
    cap = 1
    for _ in range(order):
        cap *= n_symbols
    n = path_out.shape[0]
    for i in range(n):
        r = u[2 * i]
        if pos0 + i == 0:
            s = 0
            while s < m - 1 and r >= start_cdf[s]:
                s += 1
        else:
            s = 0
            while s < m - 1 and r >= trans_cdf[state, s]:
                s += 1
        state = s
        j = pos0 + i if pos0 + i < order else order
        code0 = offsets[j] + (ctx % (n_symbols**j if j > 0 else 1)) * n_symbols
        r = u[2 * i + 1]
        x = 0
        while x < n_symbols - 1 and r >= emit_cdf[code0 + x, state]:
            x += 1
        path_out[i] = state
        sym_out[i] = x
        if order > 0:
            ctx = (ctx * n_symbols + x) % cap
    return state, ctx


def sample_record(
    tables: EngineTables, length: int, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """One record: (state path int32, symbol indices int8), both of ``length``."""
    m, a = tables.n_states, tables.n_symbols
    start = tables.start / tables.start.sum()
    trans = tables.transitions / tables.transitions.sum(axis=1, keepdims=True)
    start_cdf = np.cumsum(start)
    trans_cdf = np.cumsum(trans, axis=1)
    # emission cdf per code block: cumulative over the symbols of each context row
    n_codes = tables.E.shape[0]
    emit_cdf = np.zeros((n_codes, m))
    for j in range(tables.order + 1):
        lo, hi = tables.offsets[j], tables.offsets[j + 1]
        block = tables.E[lo:hi].reshape(-1, a, m)
        emit_cdf[lo:hi] = (np.cumsum(block, axis=1) / block.sum(axis=1, keepdims=True)).reshape(
            -1, m
        )
    path = work_buffer(length, np.int32)
    sym = work_buffer(length, np.int8)
    state, ctx = 0, 0
    for lo in range(0, length, _CHUNK):
        hi = min(length, lo + _CHUNK)
        u = rng.random(2 * (hi - lo))
        state, ctx = _sample_chunk(
            u,
            lo,
            state,
            ctx,
            start_cdf,
            trans_cdf,
            emit_cdf,
            tables.offsets,
            tables.order,
            a,
            path[lo:hi],
            sym[lo:hi],
        )
    return path, sym


@njit(cache=jitcache.CACHE, nogil=True)
def chain_mask(u, path, mask, prev, out):
    """Soft-masks drawn along a state path by a mask chain (``mask`` of shape ``(M, 3)``:
    P(masked) with no base before, after a masked base, after an unmasked one):
    ``out[i] = u[i] < mask[path[i], column]``, the column following base i - 1 (``prev``
    for the first: 0 none, 1 masked, 2 unmasked); returns the column after the last."""
    for i in range(path.shape[0]):
        m = u[i] < mask[path[i], prev]
        out[i] = m
        prev = 1 if m else 2
    return prev
