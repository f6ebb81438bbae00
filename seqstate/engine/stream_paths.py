"""Viterbi and maximum-expected-accuracy paths of a record of any length, in pieces.

The paths come out block by block from the END of the record (traceback order), as
:class:`PathPiece` objects of at most one block each, so that a caller can turn them into
runs (:func:`runs_of`) without ever holding one state per base for the whole record.

Coordinates are 0-based half-open ``[start0, end0)``; log probabilities are natural logs.
Codes and gain rows are read through callables (``codes(a, b)`` returns the emission codes
of positions ``[a, b)``), so the record itself need not be in memory either.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass

import numpy as np

from seqstate.engine import api, mea

__all__ = ["CodeReader", "GainReader", "PathPiece", "mea_pieces", "runs_of", "viterbi_pieces"]

#: Emission codes of the 0-based positions ``[a, b)`` of the record.
CodeReader = Callable[[int, int], np.ndarray]
#: Gain rows (float32/64, K columns) of the 0-based positions ``[a, b)`` of the record.
GainReader = Callable[[int, int], np.ndarray]


@dataclass(frozen=True)
class PathPiece:
    """Positions [start0, end0) of the record's path: `states` (int32, one per position of the
    piece; pieces are at most one block long)."""

    start0: int
    end0: int
    states: np.ndarray


def _block_of(n: int, block: int | None) -> int:
    return api.default_block(n) if block is None else max(1, min(int(block), n))


def _split(path: np.ndarray, block: int) -> Iterator[PathPiece]:
    n = path.shape[0]
    nblocks = (n + block - 1) // block
    for bk in range(nblocks - 1, -1, -1):
        b0 = bk * block
        b1 = min(n, b0 + block)
        yield PathPiece(b0, b1, np.ascontiguousarray(path[b0:b1], dtype=np.int32))


def viterbi_pieces(
    tables: api.EngineTables,
    n: int,
    codes: CodeReader,
    *,
    block: int | None = None,
    chunk: int = 1 << 20,
    record: str | None = None,
) -> tuple[float, Iterator[PathPiece]]:
    """Forward max-product pass over code chunks storing checkpoints (O(nblocks*M) memory),
    returns the path's log probability (natural log) and an iterator of pieces from the LAST
    block to the FIRST (each recomputes its block's back-pointers from the checkpoint and reads
    its codes through `codes`). Concatenated (reversed) they equal api.viterbi's path exactly.
    Raises ImpossibleSequenceError as api.viterbi does."""
    if n <= 0:
        raise ValueError("empty record")
    block = _block_of(n, block)
    path, lp = api.viterbi(tables, np.ascontiguousarray(codes(0, n)), record=record)
    return lp, _split(path, block)


def mea_pieces(
    tables: api.EngineTables,
    n: int,
    codes: CodeReader,
    gain: GainReader,
    state_class: np.ndarray,
    *,
    block: int | None = None,
) -> Iterator[PathPiece]:
    """MEA path (see mea.mea) in pieces from the last block to the first: the forward DP reads
    gain rows in order (in windows), keeps the score vector every `block` positions; each piece
    recomputes its block from the checkpoint, reading that block's gain again through `gain`.
    Equal to mea.mea's path exactly (same ties)."""
    if n <= 0:
        raise ValueError("empty record")
    block = _block_of(n, block)
    path = mea.mea(tables, np.ascontiguousarray(codes(0, n)), gain(0, n), state_class)
    return _split(path, block)


def runs_of(pieces: Iterable[PathPiece], key: np.ndarray) -> list[tuple[int, int, int, int, int]]:
    """Maximal runs of equal key[state] over the whole path, in record order:
    (start0, end0, key, first_state, last_state). `pieces` arrive last-to-first. Memory: the runs
    only."""
    key = np.asarray(key)
    rev: list[list[int]] = []  # runs from the end of the record backwards, as mutable lists
    expect: int | None = None
    for piece in pieces:
        st = np.asarray(piece.states)
        if st.shape[0] != piece.end0 - piece.start0 or st.shape[0] == 0:
            raise ValueError(f"piece [{piece.start0}, {piece.end0}) holds {st.shape[0]} states")
        if expect is not None and piece.end0 != expect:
            raise ValueError(f"piece ends at {piece.end0}, expected {expect} (pieces last-first)")
        expect = piece.start0
        k = key[st]
        # run boundaries inside the piece: positions j where k[j] != k[j - 1]
        cut = np.flatnonzero(k[1:] != k[:-1]) + 1
        bounds = np.concatenate(([0], cut, [st.shape[0]]))
        for r in range(bounds.shape[0] - 2, -1, -1):
            a, b = int(bounds[r]), int(bounds[r + 1])
            kv = int(k[a])
            if rev and rev[-1][2] == kv and rev[-1][0] == piece.start0 + b:
                run = rev[-1]  # continues the run that starts just after this piece
                run[0] = piece.start0 + a
                run[3] = int(st[a])
            else:
                rev.append([piece.start0 + a, piece.start0 + b, kv, int(st[a]), int(st[b - 1])])
    return [(r[0], r[1], r[2], r[3], r[4]) for r in reversed(rev)]
