"""A model's kernel arrays (:func:`prepare`, once per model) and the encoding of records.

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

Mask evidence
-------------
Tables prepared with ``mask=True`` (a model with a mask table, ``--masked
evidence``) read a soft-masked (lowercase) base as evidence: the U = ``mask_codes``
codes above are doubled, code c for the base unmasked (factor ``E * (1 - P(masked |
state))``) and ``U + c`` for the same base and context soft-masked (``E * P(masked |
state)``); the unknown code is last (2U) with factor 1, so the mask of an unknown base
is ignored.  The context of a code reads the bases only, whatever their case.  On such
tables :func:`symbols_of` gives a lowercase base the symbol index plus A (still >= 0,
so "negative: unknown" holds everywhere) and :func:`encode_symbols` turns it into the
masked code.  A mask chain (a mask table of shape ``(M, 3)``) has six blocks of U codes
instead of two, ``(2q + m) U + c``, q naming the position before (0: none or unknown, 1:
unmasked, 2: masked) and m the base's own mask; the unknown code is 6U.  Its codes read
one base before the position, so a window's codes are read from at least one base
before it.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np

from seqstate.engine import _common
from seqstate.engine._common import code_table, log0, transition_lists
from seqstate.engine.buffers import work_buffer
from seqstate.engine.generic import kernels
from seqstate.model import Model
from seqstate.model.emissions import backoff_rows

if TYPE_CHECKING:
    from seqstate.engine.backends import Backend

#: The kernel families :func:`prepare` may be asked for ("auto": the fastest that fits).
KERNEL_CHOICES = ("auto", "generic", "small", "sparse")
#: The environment variable that gives the default of :func:`prepare`'s ``kernels``.
KERNELS_ENV = "SEQSTATE_KERNELS"


def default_kernels() -> str:
    """The kernel family asked for by ``SEQSTATE_KERNELS`` ("auto" when unset or unknown)."""
    value = os.environ.get(KERNELS_ENV, "").strip().lower()
    return value if value in KERNEL_CHOICES else "auto"


@dataclass(frozen=True, eq=False)
class EngineTables:
    """Everything a kernel needs for one model, as plain arrays (see kernels module).

    ``choice`` is the kernel family asked for (one of :data:`KERNEL_CHOICES`);
    ``backend`` serves the queries with the family chosen from it, once, when the
    tables are made, and ``kernels`` names that family ("generic", "small" or
    "sparse").  ``generic`` is the generic family for the same tables (the
    reference the specialised families are tested against).
    """

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
    choice: str = "auto"
    #: U, the number of base codes, when the tables read the mask as evidence (codes
    #: ``[U, 2U)`` are soft-masked bases; see the module docstring); 0 otherwise
    mask_codes: int = 0
    #: code blocks of the mask: 2 (one P(masked) per state) or 6 (a mask chain); 1 without
    #: mask evidence
    mask_blocks: int = 1
    generic: Backend = field(init=False, repr=False, compare=False)
    backend: Backend = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        from seqstate.engine import backends

        generic = backends.GenericBackend(self)
        object.__setattr__(self, "generic", generic)
        object.__setattr__(self, "backend", backends.choose(self, self.choice, generic))

    @property
    def kernels(self) -> str:
        """The kernel family that serves these tables: "generic", "small" or "sparse"."""
        return self.backend.name


def prepare(model: Model, *, kernels: str | None = None, mask: bool = False) -> EngineTables:
    """Build the kernel arrays of ``model`` (once per model, cheap) and choose its kernels.

    ``kernels`` is one of :data:`KERNEL_CHOICES`: "auto" (the default, unless the
    environment variable ``SEQSTATE_KERNELS`` says otherwise) takes the two-state
    kernels when the model fits them, else the chain-sparse kernels when it fits
    those, else the generic ones; a named family must fit (ValueError otherwise).
    ``mask`` reads soft-masked bases as evidence through the model's mask table
    (module docstring); ValueError when the model has none.
    """
    choice = default_kernels() if kernels is None else kernels
    if choice not in KERNEL_CHOICES:
        raise ValueError(f"kernels must be one of {', '.join(KERNEL_CHOICES)}, not {choice!r}")
    if mask and model.mask is None:
        raise ValueError(f"model '{model.name}' has no mask table")
    if mask and (2 * len(model.alphabet) > 127 or any(c.islower() for c in model.alphabet)):
        raise ValueError("mask evidence needs an upper-case alphabet of at most 63 symbols")
    m = model.n_states
    T = np.ascontiguousarray(model.transitions, dtype=np.float64)
    pred_ptr, pred_src, pred_p, succ_ptr, succ_dst, succ_p = transition_lists(T)
    offsets, E, nz_ptr, nz_state = code_table(
        model, backoff_rows(model), mask=model.mask if mask else None
    )
    end = np.ones(m) if model.end is None else np.asarray(model.end, dtype=np.float64)
    lookup = np.full(256, -1, dtype=np.int8)
    fold = not any(ch.islower() for ch in model.alphabet)
    for i, ch in enumerate(model.alphabet):
        lookup[ord(ch)] = i
        if fold and ch.isalpha():
            lookup[ord(ch.lower())] = i
    return EngineTables(
        n_states=m,
        n_symbols=len(model.alphabet),
        order=model.order,
        start=np.asarray(model.start, dtype=np.float64),
        end=end,
        log_start=log0(model.start),
        log_end=log0(end),
        pred_ptr=pred_ptr,
        pred_src=pred_src,
        pred_p=pred_p,
        pred_logp=log0(pred_p),
        succ_ptr=succ_ptr,
        succ_dst=succ_dst,
        succ_p=succ_p,
        E=E,
        logE=np.ascontiguousarray(log0(E)),
        nz_ptr=nz_ptr,
        nz_state=nz_state,
        offsets=offsets,
        unknown_code=E.shape[0] - 1,
        symbol_lookup=lookup,
        transitions=T,
        choice=choice,
        mask_codes=int(offsets[-1]) if mask else 0,
        mask_blocks=_common.mask_blocks(model.mask) if mask and model.mask is not None else 1,
    )


def symbols_of(
    tables: EngineTables, seq: bytes | str | np.ndarray, *, masked_unknown: bool = False
) -> np.ndarray:
    """Symbol index per position (int8), -1 for anything outside the alphabet.

    Lowercase (soft-masked) bases read as their base unless ``masked_unknown``; on
    tables that read the mask as evidence (``tables.mask_codes``) a lowercase base
    gets its symbol index plus A (module docstring).
    """
    if isinstance(seq, str):
        seq = seq.encode("ascii")
    raw = np.frombuffer(seq, dtype=np.uint8) if isinstance(seq, (bytes, bytearray)) else seq
    sym = tables.symbol_lookup[raw]
    if masked_unknown:
        lower = (raw >= ord("a")) & (raw <= ord("z"))
        sym = np.where(lower, np.int8(-1), sym)
    elif tables.mask_codes:
        lower = (raw >= ord("a")) & (raw <= ord("z")) & (sym >= 0)
        sym = np.where(lower, sym + np.int8(tables.n_symbols), sym).astype(np.int8)
    return sym


def encode(
    tables: EngineTables, seq: bytes | str | np.ndarray, *, masked_unknown: bool = False
) -> np.ndarray:
    """Emission codes of one record (see module docstring); smallest fitting unsigned dtype."""
    return encode_symbols(tables, symbols_of(tables, seq, masked_unknown=masked_unknown))


def mask_evidence_codes(
    tables: EngineTables, seq: bytes | str | np.ndarray, codes: np.ndarray, blocks: int = 2
) -> np.ndarray:
    """The codes that tables of the same model prepared with ``mask=True`` give ``seq``,
    from ``codes``, its codes under ``tables`` (prepared without): U is added at every
    lowercase base that is not unknown and the unknown code becomes 2U (see the module
    docstring; ``blocks`` 6 for a mask chain).  Used where one model's codes serve both
    (``seqstate fit``)."""
    if tables.mask_codes:
        raise ValueError("the codes already read the mask as evidence")
    if isinstance(seq, str):
        seq = seq.encode("ascii")
    raw = np.frombuffer(seq, dtype=np.uint8) if isinstance(seq, (bytes, bytearray)) else seq
    u = tables.unknown_code
    known = codes != u
    lower = (raw >= ord("a")) & (raw <= ord("z")) & known
    return _mask_blocks_of(codes, known, lower, u, blocks)


def _mask_blocks_of(
    codes: np.ndarray, known: np.ndarray, lower: np.ndarray, u: int, blocks: int
) -> np.ndarray:
    """Base codes (< U where ``known``) moved to their mask block; unknown -> blocks * U."""
    n_codes = blocks * u + 1
    dtype = np.uint8 if n_codes <= 256 else np.uint16 if n_codes <= 65536 else np.int32
    block = lower.astype(np.int64)
    if blocks == 6:
        prev = np.zeros(codes.shape[0], dtype=np.int64)  # 0: no known base before
        prev[1:] = np.where(known[:-1], 1 + lower[:-1], 0)
        block = block + 2 * prev
    out = np.where(known, codes.astype(np.int64) + u * block, blocks * u).astype(dtype)
    return out


def encode_symbols(tables: EngineTables, sym: np.ndarray) -> np.ndarray:
    """Emission codes from symbol indices (int8, -1 unknown) as :func:`symbols_of` gives.

    On tables that read the mask as evidence, a symbol of A or more (a soft-masked
    base) gives the masked code of its base; its context reads the bases only.
    """
    n_codes = tables.unknown_code + 1
    dtype = np.uint8 if n_codes <= 256 else np.uint16 if n_codes <= 65536 else np.int32
    out = work_buffer(sym.shape[0], dtype)
    a = tables.n_symbols
    if tables.mask_codes:
        masked = sym >= a
        base = np.where(masked, sym - np.int8(a), sym).astype(np.int8)
        u = tables.mask_codes
        kernels.encode_codes(base, tables.order, a, tables.offsets, u, out)
        if tables.mask_blocks == 2:
            out[masked] += dtype(u)  # a masked base is never unknown
            out[base < 0] = tables.unknown_code
            return out
        return _mask_blocks_of(out, base >= 0, masked, u, tables.mask_blocks)
    kernels.encode_codes(sym, tables.order, a, tables.offsets, tables.unknown_code, out)
    return out
