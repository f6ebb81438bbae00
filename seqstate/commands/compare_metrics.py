"""The accuracy measures of ``seqstate compare``: nucleotide and feature counts, ratios.

Everything here is 0-based half-open; a compared feature is an :class:`Item`.
The definitions are given in :mod:`seqstate.commands.compare`.
"""

from __future__ import annotations

import bisect
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Protocol

__all__ = [
    "STRANDED",
    "IntervalIndex",
    "Item",
    "SpanLike",
    "Transcript",
    "approximate_correlation",
    "covered",
    "feature_counts",
    "gene_counts",
    "merge",
    "nucleotide_counts",
    "nucleotide_metrics",
    "ratio",
    "shared",
]

STRANDED = ("+", "-")


class SpanLike(Protocol):
    """What the counts need of a compared stretch: its number of bases."""

    @property
    def length(self) -> int: ...


@dataclass(frozen=True)
class Item:
    """One compared feature: 0-based half-open, with the line it came from (0-based)."""

    seqid: str
    strand: str
    start0: int
    end0: int
    line0: int | None


# ---------------------------------------------------------------- metrics


def ratio(num: int, den: int) -> float | None:
    return num / den if den else None


def approximate_correlation(tp: int, fp: int, fn: int, tn: int) -> float | None:
    """AC = (ACP - 0.5) * 2 (Burset & Guigó 1996, Genomics 34:353-367; from memory).

    ``ACP`` is the mean of TP/(TP+FN), TP/(TP+FP), TN/(TN+FP) and TN/(TN+FN)
    over the terms whose denominators are non-zero.  None when no term is
    defined (all counts zero).
    """
    terms = [
        ratio(tp, tp + fn),
        ratio(tp, tp + fp),
        ratio(tn, tn + fp),
        ratio(tn, tn + fn),
    ]
    defined = [t for t in terms if t is not None]
    if not defined:
        return None
    acp = sum(defined) / len(defined)
    return (acp - 0.5) * 2.0


def nucleotide_metrics(tp: int, fp: int, fn: int, tn: int) -> dict[str, float | None]:
    """Sn = TP/(TP+FN), Sp = TP/(TP+FP) and AC (see :func:`approximate_correlation`).

    A ratio whose denominator is zero is None.
    """
    return {
        "sensitivity": ratio(tp, tp + fn),
        "specificity": ratio(tp, tp + fp),
        "approximate_correlation": approximate_correlation(tp, fp, fn, tn),
    }


# ---------------------------------------------------------------- intervals


def merge(intervals: Iterable[tuple[int, int]]) -> list[tuple[int, int]]:
    """Sorted, disjoint union of half-open intervals (touching ones are joined)."""
    out: list[tuple[int, int]] = []
    for start, end in sorted(intervals):
        if out and start <= out[-1][1]:
            if end > out[-1][1]:
                out[-1] = (out[-1][0], end)
        else:
            out.append((start, end))
    return out


def covered(merged: Sequence[tuple[int, int]]) -> int:
    return sum(end - start for start, end in merged)


def shared(a: Sequence[tuple[int, int]], b: Sequence[tuple[int, int]]) -> int:
    """Bases in both of two merged interval lists (a two-pointer sweep)."""
    i = j = total = 0
    while i < len(a) and j < len(b):
        lo = max(a[i][0], b[j][0])
        hi = min(a[i][1], b[j][1])
        if hi > lo:
            total += hi - lo
        if a[i][1] <= b[j][1]:
            i += 1
        else:
            j += 1
    return total


class IntervalIndex:
    """Intervals of one (seqid, strand), for overlap queries."""

    def __init__(self, intervals: Iterable[tuple[int, int]]) -> None:
        self.items = sorted(set(intervals))
        self.starts = [start for start, _ in self.items]
        self.longest = max((end - start for start, end in self.items), default=0)
        self.exact = set(self.items)

    def overlapping(self, start: int, end: int) -> list[tuple[int, int]]:
        """Every interval sharing at least one base with ``[start, end)``."""
        lo = bisect.bisect_right(self.starts, start - self.longest)
        hi = bisect.bisect_left(self.starts, end)
        return [iv for iv in self.items[lo:hi] if iv[1] > start]


# ---------------------------------------------------------------- counts


def nucleotide_counts(
    pred: list[Item], ref: list[Item], universe: Mapping[str, SpanLike]
) -> tuple[dict, dict]:
    """Strand-aware and strand-agnostic TP/FP/FN/TN over the compared stretches ``universe``
    (items already clipped to them)."""
    bases = sum(span.length for span in universe.values())
    tracks = {item.strand for item in (*pred, *ref)}
    if tracks & set(STRANDED):
        tracks |= set(STRANDED)
    if not tracks:
        tracks = {"."}

    def grouped(items: list[Item], stranded: bool) -> dict[tuple[str, str], list]:
        out: dict[tuple[str, str], list[tuple[int, int]]] = {}
        for item in items:
            key = (item.seqid, item.strand if stranded else "")
            out.setdefault(key, []).append((item.start0, item.end0))
        return {key: merge(ivs) for key, ivs in out.items()}

    result = []
    for stranded, positions in ((True, bases * len(tracks)), (False, bases)):
        p = grouped(pred, stranded)
        r = grouped(ref, stranded)
        tp = sum(shared(p[key], r[key]) for key in p if key in r)
        p_cov = sum(covered(ivs) for ivs in p.values())
        r_cov = sum(covered(ivs) for ivs in r.values())
        fp, fn = p_cov - tp, r_cov - tp
        counts: dict[str, int | str] = {
            "positions": positions,
            "tp": tp,
            "fp": fp,
            "fn": fn,
            "tn": positions - tp - fp - fn,
        }
        if stranded:
            counts = {"tracks": "".join(s for s in ("+", "-", ".", "?") if s in tracks), **counts}
        result.append(counts)
    return result[0], result[1]


def feature_counts(pred: list[Item], ref: list[Item], exact: bool) -> dict[str, int]:
    """Matched, missed and wrong feature counts (same seqid and strand)."""

    def indexed(items: list[Item]) -> dict[tuple[str, str], IntervalIndex]:
        out: dict[tuple[str, str], list[tuple[int, int]]] = {}
        for item in items:
            out.setdefault((item.seqid, item.strand), []).append((item.start0, item.end0))
        return {key: IntervalIndex(ivs) for key, ivs in out.items()}

    empty = IntervalIndex([])

    def tally(items: list[Item], others: dict[tuple[str, str], IntervalIndex]) -> tuple[int, int]:
        matched = lonely = 0
        for item in items:
            index = others.get((item.seqid, item.strand), empty)
            hits = index.overlapping(item.start0, item.end0)
            if not hits:
                lonely += 1
            if exact:
                matched += (item.start0, item.end0) in index.exact
            else:
                length = item.end0 - item.start0
                matched += any(
                    2 * (min(item.end0, end) - max(item.start0, start)) >= min(length, end - start)
                    for start, end in hits
                )
        return matched, lonely

    matched_ref, missed = tally(ref, indexed(pred))
    matched_pred, wrong = tally(pred, indexed(ref))
    return {
        "reference": len(ref),
        "predicted": len(pred),
        "matched_reference": matched_ref,
        "matched_predicted": matched_pred,
        "missed_reference": missed,
        "wrong_predicted": wrong,
    }


# ---------------------------------------------------------------- transcripts and genes


@dataclass(frozen=True)
class Transcript:
    """One transcript as compared: its exons (CDS or exon lines of the compared type),
    each ``(seqid, strand, start0, end0)`` 0-based half-open, and its gene's ID."""

    id: str
    gene: str
    exons: frozenset[tuple[str, str, int, int]]
    line0: int | None


def _gene_rows(
    genes: dict[str, list[Transcript]],
    right: set[str],
    overlapping: Mapping[tuple[str, str], IntervalIndex],
) -> list[dict]:
    """The genes that are not ``right``, each with its place and whether any exon of
    it overlaps an exon of the other file."""
    rows = []
    for gid, txs in genes.items():
        if gid in right:
            continue
        exons = [e for t in txs for e in t.exons]
        seqid, strand = exons[0][0], exons[0][1]
        touched = any(
            overlapping[(s, st)].overlapping(a, b)
            for s, st, a, b in exons
            if (s, st) in overlapping
        )
        rows.append(
            {
                "id": gid,
                "seqid": seqid,
                "start_1based": min(e[2] for e in exons) + 1,
                "end_1based": max(e[3] for e in exons),
                "strand": strand,
                "transcripts": len(txs),
                "overlapped": touched,
            }
        )
    rows.sort(key=lambda r: (r["seqid"], r["start_1based"], r["end_1based"], r["id"]))
    return rows


def gene_counts(pred: Sequence[Transcript], ref: Sequence[Transcript]) -> dict:
    """Transcript- and gene-level counts, and the genes that are not right.

    A transcript is right when some transcript of the other file has exactly its
    exons (the same set of ``(seqid, strand, start0, end0)``); a gene is right when
    one of its transcripts is.  ``missed`` and ``wrong`` list the reference genes
    that are not found and the predicted genes that are not right (sorted by seqid,
    start, end, ID); ``missed_reference``/``wrong_predicted`` count those of them
    with no exon overlapping any exon of the other file (same seqid and strand).
    """
    p_sets = {t.exons for t in pred}
    r_sets = {t.exons for t in ref}

    def by_gene(txs: Sequence[Transcript]) -> dict[str, list[Transcript]]:
        out: dict[str, list[Transcript]] = {}
        for t in txs:
            out.setdefault(t.gene, []).append(t)
        return out

    def index(txs: Sequence[Transcript]) -> dict[tuple[str, str], IntervalIndex]:
        out: dict[tuple[str, str], list[tuple[int, int]]] = {}
        for t in txs:
            for s, st, a, b in t.exons:
                out.setdefault((s, st), []).append((a, b))
        return {key: IntervalIndex(ivs) for key, ivs in out.items()}

    p_genes, r_genes = by_gene(pred), by_gene(ref)
    p_right = {g for g, txs in p_genes.items() if any(t.exons in r_sets for t in txs)}
    r_right = {g for g, txs in r_genes.items() if any(t.exons in p_sets for t in txs)}
    missed = _gene_rows(r_genes, r_right, index(pred))
    wrong = _gene_rows(p_genes, p_right, index(ref))
    return {
        "transcript": {
            "reference": len(ref),
            "predicted": len(pred),
            "matched_reference": sum(t.exons in p_sets for t in ref),
            "matched_predicted": sum(t.exons in r_sets for t in pred),
        },
        "gene": {
            "reference": len(r_genes),
            "predicted": len(p_genes),
            "matched_reference": len(r_right),
            "matched_predicted": len(p_right),
            "missed_reference": sum(not r["overlapped"] for r in missed),
            "wrong_predicted": sum(not r["overlapped"] for r in wrong),
        },
        "missed": missed,
        "wrong": wrong,
    }
