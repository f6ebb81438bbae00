"""THROWAWAY stand-in for the streaming posterior contract (replaced by the engine's own).

Implements the contract of ``seqstate.engine.stream`` on top of the whole-record
``api.posterior``; for testing the kinds only.  Not bounded in memory.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from seqstate.engine import api

CodeReader = Callable[[int, int], np.ndarray]


@dataclass(frozen=True)
class RecordCheckpoints:
    n: int
    block: int
    loglik: float
    alpha_ck: np.ndarray
    alpha_ck_log: np.ndarray
    beta_ck: np.ndarray
    beta_ck_log: np.ndarray
    all_codes: np.ndarray = field(repr=False, compare=False, default=None)  # stand-in only


def checkpoints(tables, n, codes, *, block=None, chunk=1 << 20, threads=1, record=None):
    allc = np.ascontiguousarray(codes(0, n))
    grp = np.zeros(tables.n_states, dtype=np.int64)
    p = api.posterior(tables, allc, group=grp, n_groups=1, block=block, record=record)
    return RecordCheckpoints(
        n, p.block, p.loglik, p.alpha_ck, p.alpha_ck_log, p.beta_ck, p.beta_ck_log, allc
    )


def posterior_blocks(
    tables, ck, codes, first_block, stop_block, group, n_groups, dtype=np.float32, threads=1
):
    a = first_block * ck.block
    b = min(ck.n, stop_block * ck.block)
    assert codes.shape[0] == b - a
    assert np.array_equal(codes, ck.all_codes[a:b])
    key = (np.asarray(group).tobytes(), n_groups, np.dtype(dtype).str)
    cache = _CACHE.get(id(ck))
    if cache is None or cache[0] is not ck or cache[1] != key:
        p = api.posterior(
            tables, ck.all_codes, group=group, n_groups=n_groups, block=ck.block, dtype=dtype
        )
        cache = _CACHE[id(ck)] = (ck, key, p.values)
    return np.ascontiguousarray(cache[2][a:b])


_CACHE: dict = {}


def view(tables, ck, codes, first_block, stop_block, values):
    a = first_block * ck.block
    b = min(ck.n, stop_block * ck.block)
    assert codes.shape[0] == b - a
    return api.Posterior(
        ck.loglik,
        values,
        ck.block,
        ck.alpha_ck[first_block:stop_block],
        ck.alpha_ck_log[first_block:stop_block],
        ck.beta_ck[first_block:stop_block],
        ck.beta_ck_log[first_block:stop_block],
    )
