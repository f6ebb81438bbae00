"""Posteriors and paths -> feature segments, and the scores every feature carries.

Segments are 0-based half-open ``[start0, end0)`` on one record.  A *track group*
is one (label, strand) pair of the model: its states are the states with that
label and strand, and its posterior is the sum of theirs.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from seqstate.engine import api
from seqstate.model import Model

LOG2E = 1.0 / math.log(2.0)


@dataclass(frozen=True)
class Group:
    """A (label, strand) pair, the states that report it, and its track name.

    ``strand`` is the strand features of this group are written on (``+``, ``-``
    or None).  ``track_name`` is the label, plus ``.plus``/``.minus`` when the
    label occurs on both strands.
    """

    label: str
    strand: str | None
    states: tuple[int, ...]
    track_name: str


_STRAND_WORD = {"+": "plus", "-": "minus", None: "unstranded"}


def track_groups(model: Model) -> list[Group]:
    """The model's (label, strand) groups, in order of first appearance among the states."""
    order: list[tuple[str, str | None]] = []
    members: dict[tuple[str, str | None], list[int]] = {}
    for i, s in enumerate(model.states):
        if s.label is None:
            continue
        key = (s.label, s.strand)
        if key not in members:
            members[key] = []
            order.append(key)
        members[key].append(i)
    strands_of: dict[str, set] = {}
    for label, strand in order:
        strands_of.setdefault(label, set()).add(strand)
    groups = []
    for label, strand in order:
        name = label if len(strands_of[label]) == 1 else f"{label}.{_STRAND_WORD[strand]}"
        groups.append(Group(label, strand, tuple(members[(label, strand)]), name))
    return groups


def group_index(model: Model, groups: list[Group]) -> np.ndarray:
    """Per state, the index of its group (or -1)."""
    out = np.full(model.n_states, -1, dtype=np.int64)
    for g, grp in enumerate(groups):
        for s in grp.states:
            out[s] = g
    return out


@dataclass
class Segment:
    """One decoded feature before scoring: group index and 0-based half-open bounds."""

    group: int
    start0: int
    end0: int
    scores: dict = field(default_factory=dict)


def runs_above(values: np.ndarray, threshold: float, min_length: int) -> list[tuple[int, int]]:
    """Maximal runs with ``values >= threshold`` of at least ``min_length`` bases."""
    above = np.asarray(values) >= threshold
    n = above.shape[0]
    change = np.flatnonzero(above[1:] != above[:-1]) + 1
    if change.size == 0 and (n == 0 or not above[0]):
        return []
    edges = change.tolist()
    if above[0]:
        edges.insert(0, 0)
    if above[n - 1]:
        edges.append(n)
    starts, ends = np.array(edges[0::2]), np.array(edges[1::2])
    keep = (ends - starts) >= min_length
    return list(zip(starts[keep].tolist(), ends[keep].tolist()))


def segments_from_posterior(post: np.ndarray, threshold: float, min_length: int) -> list[Segment]:
    """Posterior decoding: per group, maximal runs at or above ``threshold``; sorted by start."""
    segs = []
    for g in range(post.shape[1]):
        for s0, e0 in runs_above(post[:, g], threshold, min_length):
            segs.append(Segment(g, s0, e0))
    segs.sort(key=lambda s: (s.start0, s.end0, s.group))
    return segs


def segments_from_path(
    path: np.ndarray, state_group: np.ndarray, min_length: int = 1
) -> list[Segment]:
    """Viterbi decoding: maximal runs of one group along the path (runs of no group dropped)."""
    g = state_group[np.asarray(path, dtype=np.int64)]
    n = g.shape[0]
    if n == 0:
        return []
    change = np.flatnonzero(g[1:] != g[:-1]) + 1
    starts = np.concatenate([[0], change])
    ends = np.concatenate([change, [n]])
    segs = []
    for s0, e0 in zip(starts.tolist(), ends.tolist()):
        grp = int(g[s0])
        if grp >= 0 and e0 - s0 >= min_length:
            segs.append(Segment(grp, s0, e0))
    return segs


#: Default of ``annotate --split-unknown``: runs of at least this many unknown bases
#: split a feature (segments and genes alike); unknown bases are also trimmed from
#: both ends of every segment.
UNKNOWN_SPLIT = 10


def split_at_unknown(
    segs: list[Segment], unknown: np.ndarray, min_length: int = 1, threshold: int = UNKNOWN_SPLIT
) -> list[Segment]:
    """Cut features at runs of >= ``threshold`` unknown bases and trim unknown ends.

    ``unknown`` is a boolean per base of the record.  The model marginalises unknown
    bases, so a label's posterior can stay high across them; a feature must not
    claim bases that were never seen.  Pieces shorter than ``min_length`` are dropped.
    The result is sorted by (start, end, group), the order features are written in.
    """
    if not unknown.any():
        return segs
    out: list[Segment] = []
    for seg in segs:
        u = unknown[seg.start0 : seg.end0]
        if not u.any():
            out.append(seg)
            continue
        padded = np.concatenate([[False], u, [False]])
        edges = np.flatnonzero(padded[1:] != padded[:-1])
        cuts = [(int(a), int(b)) for a, b in zip(edges[0::2], edges[1::2])]
        pieces = []
        lo = 0
        for a, b in cuts:
            if b - a >= threshold or a == 0 or b == len(u):
                if a > lo:
                    pieces.append((lo, a))
                lo = b
        if lo < len(u):
            pieces.append((lo, len(u)))
        for a, b in pieces:
            if b - a >= min_length:
                out.append(Segment(seg.group, seg.start0 + a, seg.start0 + b))
    out.sort(key=lambda s: (s.start0, s.end0, s.group))
    return out


def score_segment(
    tables: api.EngineTables,
    codes: np.ndarray,
    post: api.Posterior,
    group_values: np.ndarray,
    mask: np.ndarray,
    start0: int,
    end0: int,
    *,
    log_odds: bool = True,
) -> dict:
    """Scores of one segment: posterior mean/min, exact segment probability, log-odds.

    ``group_values`` is the group's per-base posterior over the record.
    ``segment_probability`` is P(every base of the segment carries the group | x);
    ``log_odds_nat``/``log_odds_bits`` are the segment's log-odds under the group's
    states against the other states (natural log and base 2), left out when
    ``log_odds`` is false.
    """
    vals = np.asarray(group_values[start0:end0], dtype=np.float64)
    lp = api.segment_log_probability(tables, codes, post, start0, end0, mask)
    out = {
        "mean_posterior": float(vals.mean()),
        "min_posterior": float(vals.min()),
        "segment_probability": math.exp(lp) if lp > -math.inf else 0.0,
    }
    if log_odds:
        lo = api.segment_log_odds(tables, codes, post, start0, end0, mask)
        out["log_odds_nat"] = lo
        out["log_odds_bits"] = lo * LOG2E if math.isfinite(lo) else lo
    return out


def cpg_statistics(seq: bytes) -> dict:
    """Length, G+C fraction and CpG observed/expected ratio of a stretch of DNA.

    O/E = CpG count * length / (C count * G count) (Gardiner-Garden & Frommer 1987,
    J. Mol. Biol. 196:261); 0 when there is no C or no G.  Counts are over
    upper-cased bases; G+C counts G, C and S over the bases that are G, C, S, A,
    T, U or W (other ambiguity codes and N left out); the O/E length counts the
    known bases (A, C, G, T) only, so unknown bases do not inflate the ratio.
    ``length`` is the feature's length in bases, unknown bases included.
    Flags: ``meets_ggf1987`` (length >= 200, G+C > 0.5, O/E > 0.6) and
    ``meets_tj2002`` (Takai & Jones 2002, PNAS 99:3740: length >= 500,
    G+C >= 0.55, O/E >= 0.65).
    """
    up = seq.upper()
    n = len(up)
    known = sum(up.count(ch) for ch in (b"A", b"C", b"G", b"T"))
    c = up.count(b"C")
    g = up.count(b"G")
    s = up.count(b"S")
    cg = up.count(b"CG")
    acgt = sum(up.count(ch) for ch in (b"A", b"C", b"G", b"T", b"U", b"S", b"W"))
    gc = (c + g + s) / acgt if acgt else 0.0
    oe = cg * known / (c * g) if c and g else 0.0
    return {
        "length": n,
        "gc_fraction": gc,
        "cpg_count": cg,
        "cpg_oe": oe,
        "meets_ggf1987": n >= 200 and gc > 0.5 and oe > 0.6,
        "meets_tj2002": n >= 500 and gc >= 0.55 and oe >= 0.65,
    }
