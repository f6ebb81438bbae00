"""The segments kind: labelled segments, their scores and CpG statistics.

Posteriors and paths -> feature segments (maximal runs of one track group, see
:mod:`seqstate.kinds.base`), the scores every feature carries, the statistics of
a ``CpG_island`` feature, and the GFF3 + TSV writer of segment features.  This is
the kind of every model that does not declare another.  Segments are 0-based
half-open ``[start0, end0)`` on one record.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, TextIO

import numpy as np

from seqstate.engine import api, stream_paths
from seqstate.io.gff3 import Feature, GFF3Writer
from seqstate.io.tsvtext import tsv_row
from seqstate.kinds.base import SOURCE, Group, Kind, RecordData, group_index, track_groups
from seqstate.kinds.stream import RecordPass, StreamRecord, TrackSink, Window, unknown_count
from seqstate.model import Model
from seqstate.model.recalibration import Recalibration

__all__ = [
    "BASE_COLUMNS",
    "CALIBRATED",
    "CPG_COLUMNS",
    "CPG_LABEL",
    "SCORE_FORMATS",
    "SEGMENTS",
    "UNKNOWN_SPLIT",
    "add_calibrated",
    "Group",
    "Segment",
    "SegmentKind",
    "cpg_statistics",
    "decode_segments",
    "feature_of",
    "format_value",
    "group_masks",
    "group_index",
    "runs_above",
    "score_segment",
    "score_segments",
    "write_segment",
    "segments_from_path",
    "segment_scores",
    "segments_from_posterior",
    "split_at_unknown",
    "track_groups",
    "with_calibrated",
]

LOG2E = 1.0 / math.log(2.0)


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
    return segment_scores(
        tables, codes, post, group_values[start0:end0], mask, start0, end0, log_odds=log_odds
    )


def segment_scores(
    tables: api.EngineTables,
    codes: np.ndarray,
    post: api.Posterior,
    values: np.ndarray,
    mask: np.ndarray,
    start0: int,
    end0: int,
    *,
    log_odds: bool = True,
) -> dict:
    """:func:`score_segment` given the segment's own posterior values (``values[i]`` is
    base ``start0 + i``); ``start0``/``end0`` are coordinates of ``codes`` and ``post``
    (a whole record, or a window's view of it)."""
    vals = np.asarray(values, dtype=np.float64)
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


# ---------------------------------------------------------------- columns and formats
#: The label whose features carry :func:`cpg_statistics` (Sequence Ontology SO:0000307).
CPG_LABEL = "CpG_island"
SCORE_FORMATS = {
    "mean_posterior": ".4f",
    "min_posterior": ".4f",
    "segment_probability": ".4g",
    "log_odds_nat": ".3f",
    "log_odds_bits": ".3f",
    "length": "d",
    "gc_fraction": ".4f",
    "cpg_count": "d",
    "cpg_oe": ".4f",
    "meets_ggf1987": "",
    "meets_tj2002": "",
}
#: Scores that get a ``calibrated_`` counterpart from a recalibrated model, and the
#: score of the recalibration table (:mod:`seqstate.model.recalibration`) each uses.
CALIBRATED = {
    "mean_posterior": "posterior",
    "min_posterior": "posterior",
    "segment_probability": "segment_probability",
    "exon_probability": "exon_probability",
    "structure_probability": "structure_probability",
}
for _key in CALIBRATED:
    SCORE_FORMATS["calibrated_" + _key] = SCORE_FORMATS.get(_key, ".4g")


def with_calibrated(columns: list[str]) -> list[str]:
    """``columns`` with a ``calibrated_`` column after each score of :data:`CALIBRATED`."""
    out = []
    for c in columns:
        out.append(c)
        if c in CALIBRATED:
            out.append("calibrated_" + c)
    return out


def add_calibrated(
    scores: dict, values: np.ndarray | None, recal: Recalibration | None, group: str
) -> dict:
    """``scores`` with the ``calibrated_`` counterparts a recalibration table gives for
    ``group`` (a track name, or ``mRNA.plus``/``mRNA.minus``), each right after its raw
    score; ``values`` are the feature's per-base posteriors of the track (None: no
    per-base counterparts).  The mean of the calibrated per-base posteriors, the map
    of the minimum (a monotone map keeps the minimum), the map of each probability.
    Without a table (None) ``scores`` is returned as it is."""
    if recal is None:
        return scores
    out = {}
    for key, value in scores.items():
        out[key] = value
        which = CALIBRATED.get(key)
        m = None if which is None else recal.get(group, which)
        if m is None:
            continue
        if key == "mean_posterior":
            if values is None:
                continue
            out["calibrated_" + key] = float(m.apply(values).mean())
        else:
            out["calibrated_" + key] = m.value(float(value))
    return out


#: Columns of annotate's feature table before the scores (1-based closed coordinates).
ID_COLUMNS = ["seqid", "start_1based", "end_1based", "strand", "type", "id"]
#: Score columns of every segment feature.
BASE_COLUMNS = [
    "mean_posterior",
    "min_posterior",
    "segment_probability",
    "log_odds_nat",
    "log_odds_bits",
    "length",
]
#: Columns of :func:`cpg_statistics` written for ``CpG_island`` features and regions.
CPG_COLUMNS = ["gc_fraction", "cpg_count", "cpg_oe", "meets_ggf1987", "meets_tj2002"]


def format_value(value: float, spec: str) -> str:
    """A score as written in GFF3 and TSV: yes/no, integers as is, nan/inf, no ``-0``."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if math.isnan(value):
        return "nan"
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    text = format(value, spec)
    if text.startswith("-") and float(text) == 0.0:
        text = text[1:]
    return text


def label_columns(label: str) -> list[str]:
    """Statistics columns of features (or regions) of ``label``: CpG columns for islands."""
    return list(CPG_COLUMNS) if label == CPG_LABEL else []


def label_scores(label: str, seq: bytes) -> dict[str, Any]:
    """The values of :func:`label_columns` for one stretch of sequence."""
    if label != CPG_LABEL:
        return {}
    stats = cpg_statistics(seq)
    return {key: stats[key] for key in CPG_COLUMNS}


# ---------------------------------------------------------------- decoding and writing
def decode_segments(
    tables: api.EngineTables,
    codes: np.ndarray,
    post: api.Posterior,
    state_group: np.ndarray,
    symbols: np.ndarray,
    *,
    decode: str,
    min_posterior: float,
    min_length: int,
    split_unknown: int,
    record: str,
) -> list[Segment]:
    """The segments of one record, as annotate and plot decode them.

    Viterbi: runs of one group along the most probable path; posterior: runs at or
    above ``min_posterior``.  Both keep runs of at least ``min_length`` bases, then
    cut them at runs of ``split_unknown`` unknown bases (:func:`split_at_unknown`;
    ``symbols`` are the symbol indices, negative for an unknown base).
    """
    if decode == "viterbi":
        path, _ = api.viterbi(tables, codes, record=record)
        segs = segments_from_path(path, state_group, min_length)
        del path
    else:
        segs = segments_from_posterior(post.values, min_posterior, min_length)
    return split_at_unknown(segs, symbols < 0, min_length, split_unknown)


def score_segments(
    model: Model,
    tables: api.EngineTables,
    codes: np.ndarray,
    post: api.Posterior,
    groups: list[Group],
    segs: list[Segment],
    seq: bytes,
) -> None:
    """Fill ``seg.scores`` for every segment (posterior scores, and CpG statistics)."""
    masks = group_masks(model, groups)
    for seg in segs:
        grp = groups[seg.group]
        sc = score_segment(
            tables, codes, post, post.values[:, seg.group], masks[seg.group], seg.start0, seg.end0
        )
        sc = add_calibrated(
            sc, post.values[seg.start0 : seg.end0, seg.group], model.recalibration, grp.track_name
        )
        sc["length"] = seg.end0 - seg.start0
        sc.update(label_scores(grp.label, seq[seg.start0 : seg.end0]))
        seg.scores = sc


def group_masks(model: Model, groups: list[Group]) -> list[np.ndarray]:
    """Per track group, a boolean per state: the group's states."""
    masks = []
    for grp in groups:
        mask = np.zeros(model.n_states, dtype=np.bool_)
        mask[list(grp.states)] = True
        masks.append(mask)
    return masks


def feature_of(
    seqid: str,
    offset0: int,
    grp: Group,
    seg: Segment,
    number: int,
    id_stem: str | None = None,
) -> Feature:
    """The GFF3 feature of a scored segment (``offset0`` shifts region coordinates); its
    ID is ``IDSTEM.TRACK.N`` (``id_stem``, default ``seqid``)."""
    stem = seqid if id_stem is None else id_stem
    attrs: list[tuple[str, str | list[str]]] = [("ID", f"{stem}.{grp.track_name}.{number}")]
    for key, value in seg.scores.items():
        attrs.append((key, format_value(value, SCORE_FORMATS.get(key, ".6g"))))
    return Feature(
        seqid=seqid,
        source=SOURCE,
        type=grp.label,
        start0=seg.start0 + offset0,
        end0=seg.end0 + offset0,
        score=seg.scores.get("mean_posterior"),
        strand=grp.strand or ".",
        phase=None,
        attributes=attrs,
    )


def write_segment(
    seqid: str,
    offset0: int,
    groups: list[Group],
    seg: Segment,
    counters: list[int],
    score_cols: list[str],
    gff: GFF3Writer,
    tsv: TextIO,
    id_stem: str | None = None,
) -> None:
    """Write one scored segment as a GFF3 line and a feature-table row; its number is
    the next of ``counters[seg.group]`` (counted per group, in file order)."""
    counters[seg.group] += 1
    feat = feature_of(seqid, offset0, groups[seg.group], seg, counters[seg.group], id_stem)
    gff.write(feat)
    row = [
        seqid,
        str(feat.start0 + 1),
        str(feat.end0),
        feat.strand,
        feat.type,
        feat.get("ID") or "",
    ]
    row += [
        format_value(seg.scores[c], SCORE_FORMATS[c]) if c in seg.scores else "" for c in score_cols
    ]
    tsv.write(tsv_row(row))


def _order(seg: Segment) -> tuple[int, int, int]:
    return (seg.start0, seg.end0, seg.group)


class _SegmentStream:
    """Windowed decoding of one record into segment features (see :mod:`kinds.stream`).

    Posterior decoding: maximal runs at or above ``min_posterior`` are followed per
    group across windows; a run is closed when it ends, kept when at least
    ``min_length`` long, cut at unknown runs (:func:`split_at_unknown`) and its pieces
    scored -- on the window when they lie inside it, else on a span view of their own
    blocks.  Viterbi: the path's runs come first (from the path pieces), then the
    windows pass scores them.  Scored pieces wait until no open run can still give a
    piece that sorts before them, then are written in (start, end, group) order with
    per-group numbers, exactly as the whole-record path writes them.
    """

    def __init__(self, kind: SegmentKind, rec: StreamRecord, gff: GFF3Writer, tsv: TextIO):
        self.rec, self.gff, self.tsv = rec, gff, tsv
        self.score_cols = kind.feature_columns(rec.groups, rec.model.recalibration is not None)[
            len(ID_COLUMNS) :
        ]
        self.counters = [0] * len(rec.groups)
        self.masks = group_masks(rec.model, rec.groups)
        self.pending: list[Segment] = []
        self.written = 0
        self.rp: RecordPass | None = None

    def run(self, track_sink: TrackSink) -> tuple[int, float, int]:
        rec = self.rec
        rp = self.rp = RecordPass(rec)
        n_groups = len(rec.groups)
        unknown = 0
        todo: list[Segment] = []
        if rec.decode == "viterbi":
            _, pieces = stream_paths.viterbi_pieces(
                rec.tables, rec.n, rec.read_codes, block=rp.block, record=rec.seqid
            )
            runs = stream_paths.runs_of(pieces, rec.state_group)
            todo = [
                Segment(int(k), s0, e0)
                for s0, e0, k, _, _ in runs
                if k >= 0 and e0 - s0 >= rec.min_length
            ]
        open_start: list[int | None] = [None] * n_groups
        next_todo = 0
        for win in rp.windows(rec.state_group, n_groups):
            unknown += unknown_count(rec, win.start0, win.end0)
            for g in range(n_groups):
                track_sink(g, rec.offset0 + win.values0, win.values[:, g])
            if rec.decode == "viterbi":
                while next_todo < len(todo) and todo[next_todo].end0 <= win.end0:
                    self.finish(todo[next_todo], win)
                    next_todo += 1
                limit = todo[next_todo].start0 if next_todo < len(todo) else rec.n
            else:
                for seg in self.runs_in(win, open_start):
                    self.finish(seg, win)
                starts = [s for s in open_start if s is not None]
                limit = min(starts) if starts else rec.n
            self.flush(limit)
        self.flush(rec.n + 1)
        return self.written, rp.loglik, unknown

    def runs_in(self, win: Window, open_start: list[int | None]) -> list[Segment]:
        """Runs of the posterior closed in this window (>= min_length); runs reaching the
        window end stay open in ``open_start``."""
        rec = self.rec
        a, b = win.values0, win.end0
        closed = []
        for g in range(len(rec.groups)):
            runs = runs_above(win.values[:, g], rec.min_posterior, 1)
            s_open = open_start[g]
            open_start[g] = None
            if s_open is not None:
                if runs and runs[0][0] == 0:
                    runs[0] = (s_open - a, runs[0][1])
                elif a - s_open >= rec.min_length:
                    closed.append(Segment(g, s_open, a))
            for r0, r1 in runs:
                s0, e0 = r0 + a, r1 + a
                if e0 == b and b < rec.n:
                    open_start[g] = s0
                elif e0 - s0 >= rec.min_length:
                    closed.append(Segment(g, s0, e0))
        return closed

    def finish(self, seg: Segment, win: Window) -> None:
        """Cut one decoded segment at unknown runs, score its pieces, keep them pending."""
        rec = self.rec
        assert self.rp is not None
        unknown = np.asarray(rec.read_symbols(seg.start0, seg.end0)) < 0
        local = [Segment(seg.group, 0, seg.end0 - seg.start0)]
        for piece in split_at_unknown(local, unknown, rec.min_length, rec.split_unknown):
            s0, e0 = piece.start0 + seg.start0, piece.end0 + seg.start0
            w = win if win.holds(s0, e0) else self.rp.span(s0, e0, rec.state_group, len(rec.groups))
            grp = rec.groups[seg.group]
            col = w.column(seg.group, s0, e0)
            sc = segment_scores(
                rec.tables,
                w.codes,
                w.view,
                col,
                self.masks[seg.group],
                s0 - w.origin0,
                e0 - w.origin0,
            )
            sc = add_calibrated(sc, col, rec.model.recalibration, grp.track_name)
            sc["length"] = e0 - s0
            if label_columns(grp.label):
                sc.update(label_scores(grp.label, rec.read_bases(s0, e0)))
            self.pending.append(Segment(seg.group, s0, e0, sc))

    def flush(self, limit: int) -> None:
        """Write the pending pieces that start before ``limit``, in file order."""
        self.pending.sort(key=_order)
        k = 0
        rec = self.rec
        while k < len(self.pending) and self.pending[k].start0 < limit:
            seg = self.pending[k]
            write_segment(
                rec.seqid,
                rec.offset0,
                rec.groups,
                seg,
                self.counters,
                self.score_cols,
                self.gff,
                self.tsv,
                rec.id_stem,
            )
            k += 1
        del self.pending[:k]
        self.written += k


class SegmentKind(Kind):
    """Labelled segments: one feature per maximal run of a track group."""

    name = "segments"

    def claims(self, model: Model) -> bool:
        return True  # the default kind

    def feature_columns(self, groups: list[Group], calibrated: bool = False) -> list[str]:
        extra: list[str] = []
        for grp in groups:
            extra += [c for c in label_columns(grp.label) if c not in extra]
        base = with_calibrated(BASE_COLUMNS) if calibrated else BASE_COLUMNS
        return ID_COLUMNS + base + extra

    def write_record(self, rec: RecordData, gff: GFF3Writer, tsv: TextIO) -> int:
        segs = decode_segments(
            rec.tables,
            rec.codes,
            rec.post,
            rec.state_group,
            rec.symbols,
            decode=rec.decode,
            min_posterior=rec.min_posterior,
            min_length=rec.min_length,
            split_unknown=rec.split_unknown,
            record=rec.seqid,
        )
        score_segments(rec.model, rec.tables, rec.codes, rec.post, rec.groups, segs, rec.seq)
        score_cols = self.feature_columns(rec.groups, rec.model.recalibration is not None)[
            len(ID_COLUMNS) :
        ]
        counters = [0] * len(rec.groups)
        for seg in segs:
            write_segment(
                rec.seqid, rec.offset0, rec.groups, seg, counters, score_cols, gff, tsv, rec.id_stem
            )
        return len(segs)

    def write_stream(
        self, rec: StreamRecord, gff: GFF3Writer, tsv: TextIO, track_sink: TrackSink
    ) -> tuple[int, float, int]:
        return _SegmentStream(self, rec, gff, tsv).run(track_sink)

    def truth_of(self, path: np.ndarray, model: Model, state_group: np.ndarray) -> list[Any]:
        return segments_from_path(path, state_group)

    def write_truth(
        self,
        gff: GFF3Writer,
        model: Model,
        groups: list[Group],
        truth: list[Any],
        seqid: str,
        offset0: int = 0,
        numbers: list[int] | None = None,
    ) -> int:
        counters = [] if numbers is None else numbers  # per group, the last number written
        if not counters:
            counters.extend([0] * len(groups))
        for seg in truth:
            counters[seg.group] += 1
            seg.scores = {"length": seg.end0 - seg.start0}
            feat = feature_of(seqid, offset0, groups[seg.group], seg, counters[seg.group])
            feat.score = None
            gff.write(feat)
        return len(truth)

    def extra_columns(self, label: str) -> list[str]:
        return label_columns(label)

    def extra_scores(self, label: str, seq: bytes) -> dict[str, Any]:
        return label_scores(label, seq)


#: The segments kind (the default).
SEGMENTS = SegmentKind()
