"""THROWAWAY stand-in for the streaming paths contract (replaced by the engine's own)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from seqstate.engine import api, mea


@dataclass(frozen=True)
class PathPiece:
    start0: int
    end0: int
    states: np.ndarray


def _pieces(path, block):
    n = path.shape[0]
    nb = (n + block - 1) // block
    for bk in range(nb - 1, -1, -1):
        yield PathPiece(bk * block, min(n, bk * block + block), path[bk * block : bk * block + block])


def viterbi_pieces(tables, n, codes, *, block=None, chunk=1 << 20, record=None):
    path, lp = api.viterbi(tables, np.ascontiguousarray(codes(0, n)), record=record)
    return lp, _pieces(path.astype(np.int32), block or api.default_block(n))


def mea_pieces(tables, n, codes, gain, state_class, *, block=None):
    block = block or api.default_block(n)
    g = np.concatenate([gain(a, min(n, a + 3 * block)) for a in range(0, n, 3 * block)])
    path = mea.mea(tables, np.ascontiguousarray(codes(0, n)), g, state_class)
    return _pieces(path, block)


def runs_of(pieces, key):
    parts = sorted(pieces, key=lambda p: p.start0)
    path = np.concatenate([p.states for p in parts])
    k = np.asarray(key)[path]
    n = k.shape[0]
    ch = np.flatnonzero(k[1:] != k[:-1]) + 1
    st = np.concatenate([[0], ch])
    en = np.concatenate([ch, [n]])
    return [(int(a), int(b), int(k[a]), int(path[a]), int(path[b - 1])) for a, b in zip(st, en)]
