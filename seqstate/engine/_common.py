"""What every kernel family shares: compile options, the rescaling rule, checkpoint blocks,
and the plain arrays built from a model (transition lists, emission-code table).

Rescaling rule (one rule, three ways of testing it): a running forward or backward
vector is rescaled when it falls below ``lim``; ``lim`` is :data:`RESCALE_BELOW` for
ordinary models and larger for models with tiny factors (:func:`rescale_limit`).  The
generic and small kernels, and training, test the vector's sum; the chain-sparse
kernels test its largest entry (which rescales at least as often) and scale by
powers of two.  All keep the natural log (or binary exponent) of every factor, so
log-likelihoods are exact up to rounding.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from seqstate.engine import jitcache
from seqstate.model import Model

#: Options of every compiled kernel of the engine.
JIT: dict[str, Any] = {"cache": jitcache.CACHE, "nogil": True, "error_model": "numpy"}

#: Rescale a running vector when it falls below this value (the default ``lim``).
RESCALE_BELOW = 1e-100
#: Smallest value a scaled vector's sum times one step's factor may reach.
SAFE_FLOOR = 1e-290
#: Default checkpoint block length of the inference kernels for long records.
MIN_BLOCK = 1024
#: Default checkpoint block length of the training kernels for long records.
TRAINING_MIN_BLOCK = 256

LN2 = math.log(2.0)


def default_block(n: int, minimum: int = MIN_BLOCK) -> int:
    """Checkpoint block length: about sqrt(N), at least ``minimum``."""
    return max(minimum, int(math.isqrt(max(n, 1))) + 1)


def block_of(n: int, block: int | None) -> int:
    """The checkpoint block length of an ``n``-position record: ``block`` (clipped to
    1..n), or :func:`default_block` of ``n`` for None."""
    return default_block(n) if block is None else max(1, min(int(block), n))


def rescale_limit(smallest_factor: float) -> float:
    """Rescaling threshold that keeps one step's product above :data:`SAFE_FLOOR`.

    ``smallest_factor`` is the smallest non-zero transition times emission factor
    of a model.  For ordinary models this is :data:`RESCALE_BELOW`; with factors
    near the bottom of the float64 range the vectors are rescaled more often (every
    step in the extreme), so that no valid path underflows.
    """
    if smallest_factor <= 0.0:
        return RESCALE_BELOW
    return max(RESCALE_BELOW, SAFE_FLOOR / smallest_factor)


def smallest_factor(pred_p: np.ndarray, E: np.ndarray) -> float:
    """Smallest non-zero transition times smallest non-zero emission factor (a lower bound
    of every step's factors), 0 when there is none."""
    tp = pred_p[pred_p > 0]
    ep = E[E > 0]
    if tp.size == 0 or ep.size == 0:
        return 0.0
    return float(tp.min()) * float(ep.min())


def log0(x: np.ndarray) -> np.ndarray:
    """Natural log with log(0) = -inf and no warning."""
    with np.errstate(divide="ignore"):
        return np.log(x)


def transition_lists(
    T: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The allowed moves of ``T`` by to-state and by from-state.

    Returns ``(pred_ptr, pred_src, pred_p, succ_ptr, succ_dst, succ_p)``: for each
    to-state ``t`` its from-states ``pred_src[pred_ptr[t]:pred_ptr[t + 1]]`` in
    increasing order with their probabilities, and the same by from-state.
    """
    m = T.shape[0]
    allowed = T > 0
    pred = [np.flatnonzero(allowed[:, t]) for t in range(m)]
    succ = [np.flatnonzero(allowed[s]) for s in range(m)]
    pred_ptr = np.zeros(m + 1, dtype=np.int64)
    pred_ptr[1:] = np.cumsum([len(v) for v in pred])
    succ_ptr = np.zeros(m + 1, dtype=np.int64)
    succ_ptr[1:] = np.cumsum([len(v) for v in succ])
    if m == 0:
        empty = np.zeros(0, np.int64)
        return pred_ptr, empty, np.zeros(0), succ_ptr, empty.copy(), np.zeros(0)
    pred_src = np.concatenate(pred).astype(np.int64)
    succ_dst = np.concatenate(succ).astype(np.int64)
    pred_p = np.concatenate([T[p, t] for t, p in enumerate(pred)]).astype(np.float64)
    succ_p = np.concatenate([T[s, d] for s, d in enumerate(succ)]).astype(np.float64)
    return pred_ptr, pred_src, pred_p, succ_ptr, succ_dst, succ_p


def mask_blocks(mask: np.ndarray) -> int:
    """Code blocks of a mask table: 2 for one P(masked) per state, 6 for a mask chain."""
    return 2 if np.ndim(mask) == 1 else 6


#: Per mask-chain block q (previous position: 0 none or unknown, 1 unmasked, 2 masked),
#: the column of the ``(M, 3)`` mask table that gives P(masked).
CHAIN_COLUMN = (0, 2, 1)


def mask_block_probability(mask: np.ndarray, block: int) -> np.ndarray:
    """Per state, the mask factor of the codes of ``block`` (see :func:`code_table`)."""
    mask = np.asarray(mask, dtype=np.float64)
    cur = block % 2
    p = mask if mask.ndim == 1 else mask[:, CHAIN_COLUMN[block // 2]]
    return p if cur else 1.0 - p


def code_table(
    model: Model, lower: dict[int, np.ndarray], *, mask: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The emission factor of every code in every state, and its non-zero lists.

    ``lower[j]`` holds the order-j rows (shape ``(M, A**j, A)``) for every ``j <
    order``.  Returns ``(offsets, E, nz_ptr, nz_state)``: code ``offsets[j] + context
    * A + symbol`` reads the order-j row (see :mod:`seqstate.engine.tables`), the last
    code is the unknown symbol (factor 1 in every state), and ``nz_state[nz_ptr[c]:
    nz_ptr[c + 1]]`` are the states with a non-zero factor for code ``c``.

    With ``mask`` (P(masked | state), one per state) the U = ``offsets[k + 1]`` base
    codes are doubled: code c < U is the unmasked base, factor ``E[c] * (1 - mask)``,
    code ``U + c`` the same base soft-masked, factor ``E[c] * mask``; the unknown code
    (now 2U) keeps factor 1, so an unknown base carries no mask evidence.  With a mask
    chain (``mask`` of shape ``(M, 3)``: P(masked) with no known base before, after a
    masked base, after an unmasked one) there are six blocks: code ``(2q + m) U + c``
    for the previous position's class q (0 none or unknown, 1 unmasked, 2 masked) and
    the base's own mask m; the unknown code is 6U (:func:`mask_block_probability`).
    """
    m, a, k = model.n_states, len(model.alphabet), model.order
    offsets = np.zeros(k + 2, dtype=np.int64)
    for j in range(k + 1):
        offsets[j + 1] = offsets[j] + a ** (j + 1)
    n_codes = int(offsets[k + 1]) + 1
    E = np.zeros((n_codes, m))
    for j in range(k + 1):
        rows = model.emissions if j == k else lower[j]  # (m, a**j, a)
        E[offsets[j] : offsets[j + 1], :] = rows.reshape(m, a ** (j + 1)).T  # code-major
    E[n_codes - 1, :] = 1.0
    if mask is not None:
        u = n_codes - 1
        blocks = mask_blocks(mask)
        doubled = np.zeros((blocks * u + 1, m))
        for b in range(blocks):
            doubled[b * u : (b + 1) * u] = E[:u] * mask_block_probability(mask, b)[None, :]
        doubled[blocks * u] = 1.0
        E, n_codes = doubled, blocks * u + 1
    nz = [np.flatnonzero(E[c] > 0) for c in range(n_codes)]
    nz_ptr = np.zeros(n_codes + 1, dtype=np.int64)
    nz_ptr[1:] = np.cumsum([len(v) for v in nz])
    nz_state = np.concatenate(nz).astype(np.int64)
    return offsets, np.ascontiguousarray(E), nz_ptr, nz_state
