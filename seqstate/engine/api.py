"""The engine's Python face: prepare a model's arrays once, encode records, run kernels.

Coordinates are 0-based; segment bounds are half-open ``[start0, end0)``.
Log-likelihoods and log probabilities are natural logs.

The kernel family of a model is chosen once, by :func:`prepare` (see
:mod:`seqstate.engine.backends`); the functions here check their arguments,
hand the work to ``tables.backend`` and turn a failing position into an error.
Emission codes and back-off rows: see :mod:`seqstate.engine.tables`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import DTypeLike

from seqstate.engine import passes
from seqstate.engine._common import MIN_BLOCK, block_of, default_block
from seqstate.engine.backends import Backend
from seqstate.engine.buffers import work_buffer
from seqstate.engine.tables import (
    KERNEL_CHOICES,
    EngineTables,
    default_kernels,
    encode,
    encode_symbols,
    mask_evidence_codes,
    prepare,
    symbols_of,
)
from seqstate.errors import ImpossibleSequenceError
from seqstate.model.emissions import backoff_rows, stationary_kmers

__all__ = [
    "KERNEL_CHOICES",
    "MIN_BLOCK",
    "EngineTables",
    "Posterior",
    "backoff_rows",
    "backend_of",
    "backward_vector",
    "constrained_log_probability",
    "default_block",
    "default_kernels",
    "encode",
    "encode_symbols",
    "forward_vector",
    "loglik",
    "mask_evidence_codes",
    "posterior",
    "prepare",
    "segment_log_odds",
    "segment_log_probability",
    "stationary_kmers",
    "symbols_of",
    "viterbi",
]

#: Process-wide switch of the test suite's kernel fixture: when False, every call runs
#: the generic family whatever the tables chose (``tables.generic``).  It starts False
#: when the environment variable SEQSTATE_KERNELS is "generic".
_USE_SMALL = default_kernels() != "generic"


def backend_of(tables: EngineTables) -> Backend:
    """The kernel family that serves ``tables`` now: ``tables.backend``, or the generic
    family while :data:`_USE_SMALL` is off."""
    return tables.backend if _USE_SMALL else tables.generic


def _raise_impossible(tables: EngineTables, codes: np.ndarray, record: str | None) -> None:
    n = codes.shape[0]
    pos = passes.first_failure(tables, lambda a, b: codes[a:b], n, n)
    name = f"record '{record}'" if record else "the record"
    if pos >= codes.shape[0] or pos < 0:
        msg = "no state that may end the sequence can be reached at its last base"
    else:
        msg = (
            f"has probability zero under the model: every state is impossible at position {pos + 1}"
        )
    raise ImpossibleSequenceError(f"{name} {msg}" if pos < codes.shape[0] else f"{name}: {msg}")


def loglik(tables: EngineTables, codes: np.ndarray, *, record: str | None = None) -> float:
    """Total log-likelihood (natural log) of one encoded record."""
    if codes.shape[0] == 0:
        raise ValueError("empty record")
    ll, pos = backend_of(tables).loglik(codes)
    if pos >= 0:
        _raise_impossible(tables, codes, record)
    return ll


@dataclass
class Posterior:
    """Result of a posterior run on one record.

    ``values[i, g]`` is the posterior of group g at 0-based position i (groups are
    states or labels, as requested).  The checkpoints let segment queries
    recompute forward and backward vectors anywhere in O(block) time; ``cursor``
    is the query state a kernel family may keep between such queries.
    """

    loglik: float
    values: np.ndarray
    block: int
    alpha_ck: np.ndarray
    alpha_ck_log: np.ndarray
    beta_ck: np.ndarray
    beta_ck_log: np.ndarray
    cursor: object = field(default=None, init=False, repr=False, compare=False)


def posterior(
    tables: EngineTables,
    codes: np.ndarray,
    *,
    group: np.ndarray | None = None,
    n_groups: int | None = None,
    block: int | None = None,
    dtype: DTypeLike = np.float32,
    record: str | None = None,
) -> Posterior:
    """Posteriors summed by ``group`` (state -> column, -1 to drop); per state by default.

    Memory is O(block * M) for the dynamic programme plus the N x groups output,
    stored as ``dtype`` (float32 by default, float64 on request).
    """
    n = codes.shape[0]
    if n == 0:
        raise ValueError("empty record")
    m = tables.n_states
    if group is None:
        group = np.arange(m, dtype=np.int64)
        n_groups = m
    group = np.asarray(group, dtype=np.int64)
    if n_groups is None:
        n_groups = int(group.max()) + 1 if group.size else 0
    if group.shape != (m,) or (m and (int(group.max()) >= n_groups or int(group.min()) < -1)):
        # the kernels write out[i, group[s]] without bounds checks
        raise ValueError(f"group must hold one column in [-1, {n_groups}) per state")
    block = block_of(n, block)
    nblocks = (n + block - 1) // block
    out = np.zeros((n, n_groups), dtype=dtype)
    ck = (np.zeros((nblocks, m)), np.zeros(nblocks), np.zeros((nblocks, m)), np.zeros(nblocks))
    ll, pos = backend_of(tables).posterior(codes, group, n_groups, block, out, ck)
    if pos >= 0:
        _raise_impossible(tables, codes, record)
    return Posterior(ll, out, block, ck[0], ck[1], ck[2], ck[3])


def viterbi(
    tables: EngineTables, codes: np.ndarray, *, block: int | None = None, record: str | None = None
) -> tuple[np.ndarray, float]:
    """Most probable path (int16/int32 state indices) and its log probability (natural log).

    Ties are broken towards the lowest state index at every step and at the end.
    """
    n = codes.shape[0]
    if n == 0:
        raise ValueError("empty record")
    from seqstate.engine import stream_paths  # it is built on this module

    lp, pieces = stream_paths.viterbi_pieces(
        tables, n, lambda a, b: codes[a:b], block=block, chunk=n, record=record, one_piece=True
    )
    path = work_buffer(n, np.int16 if tables.n_states < 32768 else np.int32)
    for piece in pieces:
        path[piece.start0 : piece.end0] = piece.states
    return path, lp


def forward_vector(
    tables: EngineTables, codes: np.ndarray, post: Posterior, pos: int
) -> tuple[np.ndarray, float]:
    """Scaled forward vector at ``pos`` and its natural-log scale."""
    return backend_of(tables).forward_vector(codes, post, pos)


def backward_vector(
    tables: EngineTables, codes: np.ndarray, post: Posterior, pos: int
) -> tuple[np.ndarray, float]:
    """Scaled backward vector at ``pos`` and its natural-log scale."""
    return backend_of(tables).backward_vector(codes, post, pos)


def constrained_log_probability(
    tables: EngineTables,
    codes: np.ndarray,
    post: Posterior,
    start0: int,
    end0: int,
    cls: np.ndarray,
    allowed: np.ndarray,
) -> float:
    """log P(z_i in allowed[cls[i - start0]] for every i in [start0, end0) | x), natural
    log; -inf if impossible.

    ``cls`` (one integer per position of the stretch, in ``[0, K)``) names each
    position's allowed set, ``allowed`` (K x states, booleans) lists each set's
    states.  A forward pass through the allowed sets between the bounds, joined to
    the unrestricted forward vector at ``start0 - 1`` and the backward vector at
    ``end0 - 1``: exact.  One set for every position is
    :func:`segment_log_probability`; a set per position following a decoded path (with
    boundary positions outside it) gives the probability of that path's features.
    """
    if end0 <= start0:
        return 0.0  # an empty stretch: the condition holds for every path
    cls = np.ascontiguousarray(cls, dtype=np.int64)
    allowed = np.ascontiguousarray(allowed, dtype=np.bool_)
    if allowed.ndim != 2 or allowed.shape[1] != tables.n_states or allowed.shape[0] == 0:
        raise ValueError(f"allowed must be a K x {tables.n_states} boolean array, K >= 1")
    if cls.shape != (end0 - start0,):
        raise ValueError(f"cls must hold one class per position of [{start0}, {end0})")
    if int(cls.min()) < 0 or int(cls.max()) >= allowed.shape[0]:
        raise ValueError(f"cls values must lie in [0, {allowed.shape[0]})")
    if start0 < 0 or end0 > codes.shape[0]:
        raise ValueError(f"[{start0}, {end0}) is not inside the record's {codes.shape[0]} bases")
    backend = backend_of(tables)
    return backend.constrained_log_probability(codes, post, start0, end0, cls, allowed)


def segment_log_probability(
    tables: EngineTables,
    codes: np.ndarray,
    post: Posterior,
    start0: int,
    end0: int,
    mask: np.ndarray,
) -> float:
    """log P(z_i in mask for every i in [start0, end0) | x), natural log; -inf if impossible.

    A forward pass restricted to the masked states between the bounds, joined to
    the unrestricted forward vector before the segment and the backward vector
    at its last base.  Exact, not a product of per-base posteriors.
    """
    if end0 <= start0:
        return 0.0  # an empty segment: the condition holds for every path
    mask = np.asarray(mask, dtype=np.bool_)
    return backend_of(tables).segment_log_probability(codes, post, start0, end0, mask)


def segment_log_odds(
    tables: EngineTables,
    codes: np.ndarray,
    post: Posterior,
    start0: int,
    end0: int,
    mask: np.ndarray,
) -> float:
    """Natural-log odds of the segment's bases under the masked states against the rest.

    ``log P(x_seg | x_before, z_seg all in mask) - log P(x_seg | x_before, z_seg all
    outside mask)``: each term is a restricted forward with emissions divided by
    the same restricted forward without emissions (the prior probability of
    staying in the class), both started from the forward vector before the
    segment.  For a two-state order-1 model this is the sum over the segment of
    log(a_class / a_other) of the two emission tables.  +inf or -inf when one
    class cannot hold the segment.
    """
    if end0 <= start0:
        return 0.0  # an empty segment carries no evidence either way
    mask = np.asarray(mask, dtype=np.bool_)
    inside, outside = backend_of(tables).segment_log_odds_terms(codes, post, start0, end0, mask)
    if math.isnan(inside) or math.isnan(outside):
        return math.nan
    if inside == -math.inf and outside == -math.inf:
        return math.nan
    return inside - outside
