"""The engine's Python face: prepare a model's arrays once, encode records, run kernels.

Coordinates are 0-based; segment bounds are half-open ``[start0, end0)``.
Log-likelihoods and log probabilities are natural logs.

Emission codes
--------------
A record is turned into one integer code per position.  For an order-k model
over A symbols, the code of position i names the emission row to use:
``offsets[j] + context * A + symbol`` where ``j`` is the length of the longest
clean context before i (``j = k`` except within k bases after the record start
or after an unknown base) and ``context`` reads those j symbols in base A.  The
last code stands for an unknown symbol (N, IUPAC ambiguity codes, gaps) whose
emission factor is 1 in every state (the base is marginalised).

Back-off rows (order j < k) come from the model's explicit lower-order rows when
it has them; otherwise they are derived from the order-k table of each state,
weighted by the stationary k-mer frequencies of that state's own order-k chain:
``P_j(x | c') = sum_u pi(u c') P(x | u c') / sum_u pi(u c')`` over the k-mers
``u c'`` that end in ``c'`` (uniform weights if every such k-mer has zero
frequency).  The stationary frequencies are found by power iteration of the
lazy chain ``(I + P) / 2``, which has the same fixed point and always converges.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from seqstate.engine import kernels
from seqstate.engine.buffers import work_buffer
from seqstate.errors import ImpossibleSequenceError
from seqstate.model import Model
from seqstate.model.emissions import backoff_rows

#: Default checkpoint block length for records longer than this (about sqrt(N) otherwise).
MIN_BLOCK = 1024


@dataclass
class EngineTables:
    """Everything a kernel needs for one model, as plain arrays (see kernels module)."""

    n_states: int
    n_symbols: int
    order: int
    start: np.ndarray
    end: np.ndarray
    log_start: np.ndarray
    log_end: np.ndarray
    pred_ptr: np.ndarray
    pred_src: np.ndarray
    pred_p: np.ndarray
    pred_logp: np.ndarray
    succ_ptr: np.ndarray
    succ_dst: np.ndarray
    succ_p: np.ndarray
    E: np.ndarray
    logE: np.ndarray
    nz_ptr: np.ndarray
    nz_state: np.ndarray
    offsets: np.ndarray
    unknown_code: int
    symbol_lookup: np.ndarray
    transitions: np.ndarray


def _log(x: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore"):
        return np.log(x)


def prepare(model: Model) -> EngineTables:
    """Build the kernel arrays of ``model`` (once per model, cheap)."""
    m = model.n_states
    a = len(model.alphabet)
    k = model.order
    T = np.ascontiguousarray(model.transitions, dtype=np.float64)
    allowed = T > 0
    # by to-state (predecessor lists, from-states ascending)
    pred_ptr = np.zeros(m + 1, dtype=np.int64)
    pred_src_l, pred_p_l = [], []
    for t in range(m):
        src = np.flatnonzero(allowed[:, t])
        pred_src_l.append(src)
        pred_p_l.append(T[src, t])
        pred_ptr[t + 1] = pred_ptr[t] + src.size
    pred_src = np.concatenate(pred_src_l).astype(np.int64) if m else np.zeros(0, np.int64)
    pred_p = np.concatenate(pred_p_l).astype(np.float64)
    succ_ptr = np.zeros(m + 1, dtype=np.int64)
    succ_dst_l, succ_p_l = [], []
    for s in range(m):
        dst = np.flatnonzero(allowed[s])
        succ_dst_l.append(dst)
        succ_p_l.append(T[s, dst])
        succ_ptr[s + 1] = succ_ptr[s] + dst.size
    succ_dst = np.concatenate(succ_dst_l).astype(np.int64)
    succ_p = np.concatenate(succ_p_l).astype(np.float64)
    # emission codes
    offsets = np.zeros(k + 2, dtype=np.int64)
    for j in range(k + 1):
        offsets[j + 1] = offsets[j] + a ** (j + 1)
    n_codes = int(offsets[k + 1]) + 1
    E = np.zeros((n_codes, m))
    lower = backoff_rows(model)
    for j in range(k + 1):
        rows = model.emissions if j == k else lower[j]  # (m, a**j, a)
        block = rows.reshape(m, a ** (j + 1)).T  # code-major
        E[offsets[j] : offsets[j + 1], :] = block
    E[n_codes - 1, :] = 1.0
    nz_ptr = np.zeros(n_codes + 1, dtype=np.int64)
    nz_list = []
    for c in range(n_codes):
        idx = np.flatnonzero(E[c] > 0)
        nz_list.append(idx)
        nz_ptr[c + 1] = nz_ptr[c] + idx.size
    nz_state = np.concatenate(nz_list).astype(np.int64)
    end = np.ones(m) if model.end is None else np.asarray(model.end, dtype=np.float64)
    lookup = np.full(256, -1, dtype=np.int8)
    fold = not any(ch.islower() for ch in model.alphabet)
    for i, ch in enumerate(model.alphabet):
        lookup[ord(ch)] = i
        if fold and ch.isalpha():
            lookup[ord(ch.lower())] = i
    return EngineTables(
        n_states=m,
        n_symbols=a,
        order=k,
        start=np.asarray(model.start, dtype=np.float64),
        end=end,
        log_start=_log(model.start),
        log_end=_log(end),
        pred_ptr=pred_ptr,
        pred_src=pred_src,
        pred_p=pred_p,
        pred_logp=_log(pred_p),
        succ_ptr=succ_ptr,
        succ_dst=succ_dst,
        succ_p=succ_p,
        E=np.ascontiguousarray(E),
        logE=np.ascontiguousarray(_log(E)),
        nz_ptr=nz_ptr,
        nz_state=nz_state,
        offsets=offsets,
        unknown_code=n_codes - 1,
        symbol_lookup=lookup,
        transitions=T,
    )


def symbols_of(
    tables: EngineTables, seq: bytes | str | np.ndarray, *, masked_unknown: bool = False
) -> np.ndarray:
    """Symbol index per position (int8), -1 for anything outside the alphabet.

    Lowercase (soft-masked) bases read as their base unless ``masked_unknown``.
    """
    if isinstance(seq, str):
        seq = seq.encode("ascii")
    raw = np.frombuffer(seq, dtype=np.uint8) if isinstance(seq, (bytes, bytearray)) else seq
    sym = tables.symbol_lookup[raw]
    if masked_unknown:
        lower = (raw >= ord("a")) & (raw <= ord("z"))
        sym = np.where(lower, np.int8(-1), sym)
    return sym


def encode(
    tables: EngineTables, seq: bytes | str | np.ndarray, *, masked_unknown: bool = False
) -> np.ndarray:
    """Emission codes of one record (see module docstring); smallest fitting unsigned dtype."""
    return encode_symbols(tables, symbols_of(tables, seq, masked_unknown=masked_unknown))


def encode_symbols(tables: EngineTables, sym: np.ndarray) -> np.ndarray:
    """Emission codes from symbol indices (int8, -1 unknown) as :func:`symbols_of` gives."""
    n_codes = tables.unknown_code + 1
    dtype = np.uint8 if n_codes <= 256 else np.uint16 if n_codes <= 65536 else np.int32
    out = work_buffer(sym.shape[0], dtype)
    kernels.encode_codes(
        sym, tables.order, tables.n_symbols, tables.offsets, tables.unknown_code, out
    )
    return out


def default_block(n: int) -> int:
    """Checkpoint block length: about sqrt(N), at least :data:`MIN_BLOCK`."""
    return max(MIN_BLOCK, int(math.isqrt(max(n, 1))) + 1)


def _raise_impossible(tables: EngineTables, codes: np.ndarray, record: str | None) -> None:
    _, pos = kernels.forward_loglik(
        codes,
        tables.start,
        tables.end,
        tables.E,
        tables.nz_ptr,
        tables.nz_state,
        tables.pred_ptr,
        tables.pred_src,
        tables.pred_p,
    )
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
    sm = _small_of(tables)
    sp = _sparse_of(tables) if sm is None else None
    if sm is not None:
        ll, pos = _small.forward_loglik(
            codes, sm.start, sm.end, sm.K, sm.st, sm.wide, sm.cls, sm.W, sm.T, sm.E, sm.lim
        )
    elif sp is not None:
        ll, pos = _sparse.forward_loglik(
            codes,
            sp.start,
            sp.end,
            sp.E,
            sp.w1,
            sp.f_ptr,
            sp.f_n0,
            sp.f_dst,
            sp.f_src,
            sp.f_w,
            _limit_of(tables),
        )
    else:
        ll, pos = kernels.forward_loglik(
            codes,
            tables.start,
            tables.end,
            tables.E,
            tables.nz_ptr,
            tables.nz_state,
            tables.pred_ptr,
            tables.pred_src,
            tables.pred_p,
            _limit_of(tables),
        )
    if pos >= 0:
        _raise_impossible(tables, codes, record)
    return ll


@dataclass
class Posterior:
    """Result of a posterior run on one record.

    ``values[i, g]`` is the posterior of group g at 0-based position i (groups are
    states or labels, as requested).  The checkpoints let segment queries
    recompute forward and backward vectors anywhere in O(block) time.
    """

    loglik: float
    values: np.ndarray
    block: int
    alpha_ck: np.ndarray
    alpha_ck_log: np.ndarray
    beta_ck: np.ndarray
    beta_ck_log: np.ndarray


def posterior(
    tables: EngineTables,
    codes: np.ndarray,
    *,
    group: np.ndarray | None = None,
    n_groups: int | None = None,
    block: int | None = None,
    dtype=np.float32,
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
    block = default_block(n) if block is None else max(1, min(int(block), n))
    nblocks = (n + block - 1) // block
    out = np.zeros((n, n_groups), dtype=dtype)
    alpha_ck = np.zeros((nblocks, m))
    beta_ck = np.zeros((nblocks, m))
    alpha_log = np.zeros(nblocks)
    beta_log = np.zeros(nblocks)
    sm = _small_of(tables)
    keyed = n_groups <= _sparse.MAX_KEYED_GROUPS
    sp = _sparse_of(tables, group if keyed else None, n_groups) if sm is None else None
    if sm is not None:
        gc = _small.group_table(sm, group)
        ll, pos = _small.posterior_checkpointed(
            codes,
            sm.start,
            sm.end,
            sm.K,
            sm.st,
            sm.wide,
            sm.cls,
            sm.W,
            sm.T,
            sm.E,
            block,
            gc,
            out,
            alpha_ck,
            alpha_log,
            beta_ck,
            beta_log,
            work_buffer(m),
            sm.lim,
        )
    elif sp is not None:
        ll, pos = _sparse.posterior_checkpointed(
            codes,
            sp.start,
            sp.end,
            sp.E,
            sp.perm,
            sp.w1,
            sp.f_ptr,
            sp.f_n0,
            sp.f_dst,
            sp.f_src,
            sp.f_w,
            sp.v1,
            sp.b_ptr,
            sp.b_n0,
            sp.b_dst,
            sp.b_src,
            sp.b_w,
            block,
            _sparse.group_runs(sp, group, n_groups),
            n_groups,
            out,
            alpha_ck,
            alpha_log,
            beta_ck,
            beta_log,
            _limit_of(tables),
        )
    else:
        ll, pos = kernels.posterior_checkpointed(
            codes,
            tables.start,
            tables.end,
            tables.E,
            tables.nz_ptr,
            tables.nz_state,
            tables.pred_ptr,
            tables.pred_src,
            tables.pred_p,
            tables.succ_ptr,
            tables.succ_dst,
            tables.succ_p,
            block,
            group,
            out,
            alpha_ck,
            alpha_log,
            beta_ck,
            beta_log,
            *kernels.posterior_scratch(n, m, block),
            _limit_of(tables),
        )
    if pos >= 0:
        _raise_impossible(tables, codes, record)
    return Posterior(ll, out, block, alpha_ck, alpha_log, beta_ck, beta_log)


def viterbi(
    tables: EngineTables, codes: np.ndarray, *, block: int | None = None, record: str | None = None
) -> tuple[np.ndarray, float]:
    """Most probable path (int16/int32 state indices) and its log probability (natural log).

    Ties are broken towards the lowest state index at every step and at the end.
    """
    n = codes.shape[0]
    if n == 0:
        raise ValueError("empty record")
    sm = _small_of(tables)
    sp = _sparse_of(tables) if sm is None else None
    if sp is not None and block is None:
        # one pass when the whole record's back-pointers fit the budget
        bp_bytes = n * (sp.n_multi + 1) * np.dtype(sp.bp_dtype).itemsize
        block = n if bp_bytes <= _sparse.BACKPOINTER_BUDGET else None
    block = default_block(n) if block is None else max(1, min(int(block), n))
    dtype = np.int16 if tables.n_states < 32768 else np.int32
    path = work_buffer(n, dtype)
    if sp is not None:
        lp, pos = _sparse.viterbi_checkpointed(
            codes,
            sp.log_start,
            sp.log_end,
            sp.logE,
            sp.perm,
            sp.inv,
            sp.la1,
            sp.f_ptr,
            sp.f_n0,
            sp.f_dst,
            sp.f_src,
            sp.f_lp,
            sp.f_rank,
            sp.f_col,
            sp.tb_prev,
            sp.tb_col,
            sp.p_ptr,
            sp.p_src,
            sp.p_lp,
            block,
            *_sparse.viterbi_scratch(sp, n, block),
            path,
        )
    elif sm is not None:
        lp, pos = _small.viterbi_checkpointed(
            codes,
            sm.log_start,
            sm.log_end,
            sm.K,
            sm.st,
            sm.wide,
            sm.cls,
            sm.LT,
            sm.LE,
            sm.logT,
            sm.logE,
            block,
            path,
            *_small.viterbi_scratch(sm, n, block),
        )
    else:
        lp, pos = kernels.viterbi_checkpointed(
            codes,
            tables.log_start,
            tables.log_end,
            tables.logE,
            tables.nz_ptr,
            tables.nz_state,
            tables.pred_ptr,
            tables.pred_src,
            tables.pred_logp,
            block,
            path,
            *kernels.viterbi_scratch(n, tables.n_states, block),
        )
    if pos >= 0:
        _raise_impossible(tables, codes, record)
    return path, lp


def forward_vector(
    tables: EngineTables, codes: np.ndarray, post: Posterior, pos: int
) -> tuple[np.ndarray, float]:
    """Scaled forward vector at ``pos`` and its natural-log scale."""
    out = work_buffer(tables.n_states)
    cur = _cursor_of(tables, codes, post)
    if cur is not None:
        row, lg = cur.forward(pos)
        _sparse.from_slots(row, 0, cur.sp.perm, out)
        return out, lg
    lg = kernels.vector_at(
        codes,
        pos,
        tables.start,
        tables.E,
        tables.nz_ptr,
        tables.nz_state,
        tables.pred_ptr,
        tables.pred_src,
        tables.pred_p,
        post.block,
        post.alpha_ck,
        post.alpha_ck_log,
        out,
    )
    return out, lg


def backward_vector(
    tables: EngineTables, codes: np.ndarray, post: Posterior, pos: int
) -> tuple[np.ndarray, float]:
    """Scaled backward vector at ``pos`` and its natural-log scale."""
    out = work_buffer(tables.n_states)
    cur = _cursor_of(tables, codes, post)
    if cur is not None:
        row, lg = cur.backward(pos)
        _sparse.from_slots(row, 0, cur.sp.perm, out)
        return out, lg
    lg = kernels.backward_vector_at(
        codes,
        pos,
        tables.E,
        tables.nz_ptr,
        tables.nz_state,
        tables.succ_ptr,
        tables.succ_dst,
        tables.succ_p,
        post.block,
        post.beta_ck,
        post.beta_ck_log,
        out,
        work_buffer(tables.n_states),
    )
    return out, lg


def _restricted(tables, codes, start0, end0, init, init_is_start, mask, use_emissions):
    sp = _sparse_of(tables)
    if sp is not None:
        m = tables.n_states
        row = np.zeros((1, m + 2))
        if not init_is_start:
            _sparse.to_slots(np.asarray(init, dtype=np.float64), sp.perm, row, 0)
        work = work_buffer((2, m + 2))
        lg = _sparse_restricted(
            tables,
            sp,
            codes,
            start0,
            end0,
            row,
            init_is_start,
            _mask_slots(sp, mask),
            use_emissions,
            work,
        )
        out = np.zeros(m)
        if lg > -np.inf:
            _sparse.from_slots(work, 0, sp.perm, out)
        return out, lg
    out = work_buffer(tables.n_states)
    lg = kernels.restricted_forward(
        codes,
        start0,
        end0,
        init,
        init_is_start,
        mask,
        use_emissions,
        tables.E,
        tables.nz_ptr,
        tables.nz_state,
        tables.pred_ptr,
        tables.pred_src,
        tables.pred_p,
        out,
        *kernels.restricted_scratch(tables.n_states, tables.pred_src.shape[0]),
    )
    return out, lg


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
    cur = _cursor_of(tables, codes, post)
    if cur is not None:
        sp = cur.sp
        if start0 == 0:
            init, init_log, is_start = cur.work, 0.0, True
        else:
            init, init_log = cur.forward(start0 - 1)
            is_start = False
        lg = _sparse_restricted(
            tables, sp, codes, start0, end0, init, is_start, _mask_slots(sp, mask), True, cur.work
        )
        if lg == -np.inf:
            return -np.inf
        beta, blog = cur.backward(end0 - 1)
        ld = _sparse.log_dot(cur.work, 0, beta, 0)
        if ld == -np.inf:
            return -np.inf
        return min(0.0, ld + lg + init_log + blog - post.loglik)
    if start0 == 0:
        init, init_log, is_start = tables.start, 0.0, True
    else:
        init, init_log = forward_vector(tables, codes, post, start0 - 1)
        is_start = False
    vec, lg = _restricted(tables, codes, start0, end0, init, is_start, mask, True)
    if lg == -np.inf:
        return -np.inf
    beta, blog = backward_vector(tables, codes, post, end0 - 1)
    joint = float(np.dot(vec, beta))
    if joint <= 0.0:
        return -np.inf
    return min(0.0, math.log(joint) + lg + init_log + blog - post.loglik)


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
    cur = _cursor_of(tables, codes, post)
    if cur is not None:
        sp = cur.sp
        if start0 == 0:
            init, is_start = cur.work, True
        else:
            init, _ = cur.forward(start0 - 1)
            is_start = False
        terms = []
        for msk in (mask, ~mask):
            mf = _mask_slots(sp, msk)
            l1 = _sparse_restricted(
                tables, sp, codes, start0, end0, init, is_start, mf, True, cur.work
            )
            s1 = _sparse.log_dot(cur.work, 0, cur.ones, 0) if l1 > -np.inf else -math.inf
            l0 = _sparse_restricted(
                tables, sp, codes, start0, end0, init, is_start, mf, False, cur.work
            )
            if l0 == -np.inf:
                terms.append(math.nan)
                continue
            if s1 == -math.inf:
                terms.append(-math.inf)
                continue
            terms.append(s1 + l1 - _sparse.log_dot(cur.work, 0, cur.ones, 0) - l0)
        return _odds_of(*terms)
    if start0 == 0:
        init, is_start = tables.start, True
    else:
        init, _ = forward_vector(tables, codes, post, start0 - 1)
        is_start = False
    terms = []
    for msk in (mask, ~mask):
        v1, l1 = _restricted(tables, codes, start0, end0, init, is_start, msk, True)
        v0, l0 = _restricted(tables, codes, start0, end0, init, is_start, msk, False)
        if l0 == -np.inf:
            terms.append(math.nan)
            continue
        s1 = float(v1.sum())
        if l1 == -np.inf or s1 <= 0:
            terms.append(-math.inf)
            continue
        terms.append(math.log(s1) + l1 - math.log(float(v0.sum())) - l0)
    return _odds_of(*terms)


def _odds_of(inside: float, outside: float) -> float:
    if math.isnan(inside) or math.isnan(outside):
        return math.nan
    if inside == -math.inf and outside == -math.inf:
        return math.nan
    return inside - outside


# ----------------------------------------------------------------- kernel dispatch
import os as _os  # noqa: E402

from seqstate.engine import small as _small  # noqa: E402
from seqstate.engine import sparse as _sparse  # noqa: E402

#: Set the environment variable SEQSTATE_KERNELS=generic to use only the generic kernels
#: (neither :mod:`seqstate.engine.small` nor :mod:`seqstate.engine.sparse`).
_USE_SMALL = _os.environ.get("SEQSTATE_KERNELS", "").strip().lower() != "generic"


def _small_of(tables: EngineTables):
    """The two-states-per-code tables of ``tables`` (built once, kept on the object), or None.

    None when the model does not fit :mod:`seqstate.engine.small` or the
    specialised kernels are switched off; the generic kernels then run.
    """
    if not _USE_SMALL:
        return None
    cached = tables.__dict__.get("_small_tables")
    if cached is not None:
        sm = cached[0]
        if sm is None or _small.still_valid(sm, tables):
            return sm
    sm = _small.build(tables)
    tables.__dict__["_small_tables"] = (sm,)
    return sm


def _sparse_of(tables: EngineTables, group: np.ndarray | None = None, n_groups: int = 0):
    """The renumbered chain-sparse tables of ``tables``, or None (kept on the object).

    With ``group`` (a posterior's state -> column array, for few columns) the
    states of each column are numbered consecutively, so that the per-column sums
    read contiguous ranges; such tables are kept per distinct ``group`` (a few at
    most in practice).  None when the model does not fit :mod:`seqstate.engine.sparse`
    (small, or not mostly chains) or the specialised kernels are switched off.
    """
    if not _USE_SMALL:
        return None
    key = None if group is None else _sparse.group_key(group, n_groups)
    cache = tables.__dict__.setdefault("_sparse_tables", {})
    name = None if key is None else key.tobytes()
    sp = cache.get(name, False)
    if sp is not False and (sp is None or _sparse.still_valid(sp, tables)):
        return sp
    if len(cache) > 16:
        cache.clear()
    sp = _sparse.build(tables, key) if _sparse.fits(tables) else None
    cache[name] = sp
    return sp


def _limit_of(tables: EngineTables) -> float:
    """The generic kernels' rescaling threshold for ``tables`` (kept on the object)."""
    cached = tables.__dict__.get("_rescale_limit")
    if cached is not None and cached[1] is tables.E and cached[2] is tables.pred_p:
        return cached[0]
    lim = kernels.rescale_limit(_small.smallest_factor(tables))
    tables.__dict__["_rescale_limit"] = (lim, tables.E, tables.pred_p)
    return lim


# ----------------------------------------------------------------- chain-sparse segment queries
class _Cursor:
    """Forward and backward vectors of one posterior in the chain-sparse slots, reused.

    Segment queries arrive mostly in position order, so the last forward vector
    (and the last backward vector) recomputed from a checkpoint is kept: a later
    query in the same block continues from it instead of from the checkpoint.
    The steps and the rescaling decisions are those of a pass from the
    checkpoint, so the result does not depend on the order of the queries.
    """

    def __init__(self, tables: EngineTables, sp, codes: np.ndarray, post: Posterior):
        m = tables.n_states
        self.sp, self.codes, self.post = sp, codes, post
        self.alpha, self.beta = post.alpha_ck, post.beta_ck
        self.lim = _limit_of(tables)
        self.f = np.zeros((2, m + 2))
        self.b = np.zeros((2, m + 2))
        self.f_pos = self.b_pos = -1
        self.f_log = self.b_log = 0.0
        self.work = np.zeros((2, m + 2))
        self.ones = np.ones((1, m + 2))

    def forward(self, pos: int) -> tuple[np.ndarray, float]:
        """Row 0 of the returned array: scaled forward vector at ``pos`` in slots; log scale."""
        post, sp = self.post, self.sp
        bk = pos // post.block
        if not (0 <= self.f_pos <= pos and self.f_pos // post.block == bk):
            _sparse.to_slots(post.alpha_ck[bk], sp.perm, self.f, 0)
            self.f_pos, self.f_log = bk * post.block, float(post.alpha_ck_log[bk])
        if pos > self.f_pos:
            ex = _sparse.forward_advance(
                self.codes,
                self.f_pos,
                pos,
                self.f,
                sp.w1,
                sp.f_ptr,
                sp.f_n0,
                sp.f_dst,
                sp.f_src,
                sp.f_w,
                self.lim,
            )
            self.f_pos, self.f_log = pos, self.f_log + ex * _LN2
        return self.f, self.f_log

    def backward(self, pos: int) -> tuple[np.ndarray, float]:
        """Row 0 of the returned array: scaled backward vector at ``pos`` in slots; log scale."""
        post, sp = self.post, self.sp
        n = self.codes.shape[0]
        bk = pos // post.block
        if not (self.b_pos >= pos and self.b_pos // post.block == bk):
            _sparse.to_slots(post.beta_ck[bk], sp.perm, self.b, 0)
            self.b_pos = min(n, bk * post.block + post.block) - 1
            self.b_log = float(post.beta_ck_log[bk])
        if pos < self.b_pos:
            ex = _sparse.backward_advance(
                self.codes,
                self.b_pos,
                pos,
                self.b,
                sp.v1,
                sp.b_ptr,
                sp.b_n0,
                sp.b_dst,
                sp.b_src,
                sp.b_w,
                self.lim,
            )
            self.b_pos, self.b_log = pos, self.b_log + ex * _LN2
        return self.b, self.b_log


_LN2 = math.log(2.0)


def _cursor_of(tables: EngineTables, codes: np.ndarray, post: Posterior):
    """The chain-sparse query state of ``post`` (kept on it), or None for the generic path."""
    sp = _sparse_of(tables)
    if sp is None:
        return None
    cur = post.__dict__.get("_sparse_cursor")
    if (
        cur is None
        or cur.sp is not sp
        or cur.codes is not codes
        or cur.post is not post
        or cur.alpha is not post.alpha_ck
        or cur.beta is not post.beta_ck
    ):
        cur = _Cursor(tables, sp, codes, post)
        post.__dict__["_sparse_cursor"] = cur
    return cur


def _mask_slots(sp, mask: np.ndarray) -> np.ndarray:
    """``mask`` (original order) as 0/1 factors per slot (dummy slots 0)."""
    out = np.zeros(sp.n_states + 2)
    out[1:-1] = np.asarray(mask, dtype=np.bool_)[sp.perm]
    return out


def _sparse_restricted(
    tables, sp, codes, start0, end0, init, init_is_start, maskf, use_emissions, work
) -> float:
    """Restricted forward in slots (result in row 0 of ``work``); natural-log scale or -inf."""
    ex = _sparse.restricted_forward(
        codes,
        start0,
        end0,
        init,
        init_is_start,
        maskf,
        -1 if use_emissions else tables.unknown_code,
        sp.start,
        sp.E,
        sp.w1,
        sp.f_ptr,
        sp.f_n0,
        sp.f_dst,
        sp.f_src,
        sp.f_w,
        _limit_of(tables),
        work,
    )
    return ex if ex == -np.inf else ex * _LN2
