"""``seqstate compare``: accuracy of predicted features against a trusted annotation.

Coordinates: GFF3 files are 1-based and closed; everything inside this module is
0-based half-open (a :class:`~seqstate.io.gff3.Feature` holds ``start0`` and
``end0``; a span ``(start0, end0)`` covers bases ``start0 .. end0 - 1``).  The
``--region`` text is 1-based inclusive, parsed by
:func:`seqstate.io.regions.parse_region`.

Two levels are measured, with the definitions of Burset & Guigó (1996),
Genomics 34:353-367 (from memory):

Nucleotide level.  Every base of the compared sequences is TP (covered by a
predicted and a reference feature), FP (predicted only), FN (reference only)
or TN (neither).  Then

* sensitivity ``Sn = TP / (TP + FN)``;
* specificity ``Sp = TP / (TP + FP)`` (the fraction of predicted bases that
  are right, as in that paper; not ``TN / (TN + FP)``);
* approximate correlation ``AC = (ACP - 0.5) * 2`` with
  ``ACP = 1/4 [TP/(TP+FN) + TP/(TP+FP) + TN/(TN+FP) + TN/(TN+FN)]``, where only
  the terms whose denominators are non-zero are averaged (so ``1/4`` becomes
  one over the number of defined terms).

Counts are made twice.  *Strand-agnostic*: a base is covered when a feature on
any strand covers it.  *Strand-aware*: each strand is a track of its own, and a
base counts once per track, so a predicted feature on the wrong strand gives
FP bases on its strand and leaves FN bases on the other.  The tracks are the
strand values of the compared features (``+``, ``-``, ``.``, ``?``); when either
``+`` or ``-`` occurs, both are tracks.  With unstranded features only (``.``)
there is one track and both counts agree.

Feature level.  Features are compared on the same seqid and strand.

* ``CDS`` and ``exon`` (exon rule): each feature line is one exon; a predicted
  exon matches a reference exon when both ends are equal.
  ``Sn = matched reference exons / reference exons``,
  ``Sp = matched predicted exons / predicted exons``; missed exons
  ``ME = reference exons that overlap no predicted exon / reference exons``;
  wrong exons ``WE = predicted exons that overlap no reference exon /
  predicted exons``.
* any other type (overlap rule, for islands and other intervals): a predicted
  and a reference feature match when they share at least half the length of
  the shorter of the two (``2 * overlap >= min(length)``).  Sn and Sp are the
  fractions of reference and predicted features with at least one match;
  missed and wrong are the fractions with no overlap at all.

Identical features (same seqid, start, end and strand), such as an exon
shared by several isoforms, are counted once, in both files; nucleotide
coverage is the union of the features anyway.

The compared sequences are, by default, those of the predicted file: every
seqid named by its ``##sequence-region`` lines or carrying one of its features
(of any type), each from its first to its last base as the ``##sequence-region``
line of either file says (the reference's line wins).  Reference features on
other sequences are ignored, and the bases of those sequences count as
nothing: a prediction made on one chromosome is not credited with true
negatives on every other sequence the reference declares.  With
``all_sequences`` (``--all-sequences``) every seqid with a known span in either
file is compared.  A compared seqid that carries a compared feature but has no
known span is an error.  With a region, only that
stretch is compared: at the nucleotide level features are clipped to it; at the
feature level every feature that overlaps it is counted with its own ends.
Features on other seqids are ignored.
"""

from __future__ import annotations

import bisect
import json
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from seqstate.errors import FeatureFormatError, UsageError
from seqstate.io.atomic import atomic_text
from seqstate.io.fasta import display_name, iter_lines, open_input
from seqstate.io.gff3 import Feature, escape_column9, read_gff3, unescape
from seqstate.io.regions import TO_END, Region, parse_region

__all__ = [
    "EXON_TYPES",
    "REPORT_FORMATS",
    "Span",
    "approximate_correlation",
    "choose_type",
    "compare_features",
    "compare_files",
    "nucleotide_metrics",
    "read_sequence_regions",
    "report_format",
    "report_json",
    "report_table",
    "report_tsv",
    "write_report",
]

#: Feature types compared by the exon rule (exact ends); every other type by overlap.
EXON_TYPES = ("CDS", "exon")
#: Report formats of ``-o``, by file name ending.
REPORT_FORMATS = {".tsv": "tsv", ".json": "json"}

_STRANDED = ("+", "-")
_LISTED = 10  # at most this many feature types in a message


@dataclass(frozen=True)
class Span:
    """The compared stretch of one seqid, 0-based half-open ``[start0, end0)``.

    ``source`` says where it came from: ``"reference"`` or ``"predicted"`` (a
    ``##sequence-region`` line of that file), ``"region"`` (the region given)
    or ``"given"`` (the ``lengths`` argument of :func:`compare_features`).
    ``note`` is the same in words for messages, e.g. ``ref.gff3 line 2``.
    """

    seqid: str
    start0: int
    end0: int
    source: str
    note: str = ""

    @property
    def length(self) -> int:
        """Bases in the span."""
        return self.end0 - self.start0

    def text(self) -> str:
        """The span as a person would type it: ``ID:START-END``, 1-based inclusive."""
        return f"{self.seqid}:{self.start0 + 1}-{self.end0}"


@dataclass(frozen=True)
class _Item:
    """One compared feature: 0-based half-open, with the line it came from (0-based)."""

    seqid: str
    strand: str
    start0: int
    end0: int
    line0: int | None


# ---------------------------------------------------------------- metrics


def _ratio(num: int, den: int) -> float | None:
    return num / den if den else None


def approximate_correlation(tp: int, fp: int, fn: int, tn: int) -> float | None:
    """AC = (ACP - 0.5) * 2 (Burset & Guigó 1996, Genomics 34:353-367; from memory).

    ``ACP`` is the mean of TP/(TP+FN), TP/(TP+FP), TN/(TN+FP) and TN/(TN+FN)
    over the terms whose denominators are non-zero.  None when no term is
    defined (all counts zero).
    """
    terms = [
        _ratio(tp, tp + fn),
        _ratio(tp, tp + fp),
        _ratio(tn, tn + fp),
        _ratio(tn, tn + fn),
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
        "sensitivity": _ratio(tp, tp + fn),
        "specificity": _ratio(tp, tp + fp),
        "approximate_correlation": approximate_correlation(tp, fp, fn, tn),
    }


# ---------------------------------------------------------------- intervals


def _merge(intervals: Iterable[tuple[int, int]]) -> list[tuple[int, int]]:
    """Sorted, disjoint union of half-open intervals (touching ones are joined)."""
    out: list[tuple[int, int]] = []
    for start, end in sorted(intervals):
        if out and start <= out[-1][1]:
            if end > out[-1][1]:
                out[-1] = (out[-1][0], end)
        else:
            out.append((start, end))
    return out


def _covered(merged: Sequence[tuple[int, int]]) -> int:
    return sum(end - start for start, end in merged)


def _shared(a: Sequence[tuple[int, int]], b: Sequence[tuple[int, int]]) -> int:
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


class _Index:
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


# ---------------------------------------------------------------- the comparison


def _feature_error(message: str, role: str, name: str | None, item: _Item) -> FeatureFormatError:
    where = f"{role} feature on '{item.seqid}'" if name is None else f"seqid '{item.seqid}'"
    return FeatureFormatError(message, path=name, line0=item.line0, where=where)


def _select(features: Iterable[Feature], feature_type: str) -> list[_Item]:
    return [
        _Item(f.seqid, f.strand, f.start0, f.end0, f.line0)
        for f in features
        if f.type == feature_type
    ]


def _dedupe(items: list[_Item]) -> tuple[list[_Item], int]:
    """First occurrence of each (seqid, strand, start0, end0); and how many were dropped."""
    seen: set[tuple[str, str, int, int]] = set()
    out = []
    for item in items:
        key = (item.seqid, item.strand, item.start0, item.end0)
        if key not in seen:
            seen.add(key)
            out.append(item)
    return out, len(items) - len(out)


def _resolve_region(region: Region | str | None, spans: Mapping[str, Span]) -> Span | None:
    """The region as a span, checked against the seqid's known span (if any)."""
    if region is None:
        return None
    reg = parse_region(region) if isinstance(region, str) else region
    known = spans.get(reg.seqid)
    if reg.end0 == TO_END:
        if known is None:
            raise UsageError(
                f"region {reg.seqid}: no end given and no ##sequence-region line gives the "
                f"length of '{reg.seqid}'; give ID:START-END"
            )
        return Span(reg.seqid, known.start0, known.end0, "region", known.note)
    if known is not None and (reg.start0 < known.start0 or reg.end0 > known.end0):
        raise UsageError(
            f"region {reg.to_text()} lies outside {known.text()} "
            f"(the sequence as {known.note or 'given'} says)"
        )
    return Span(reg.seqid, reg.start0, reg.end0, "region", "the region")


def _check_inside(
    items: list[_Item], spans: Mapping[str, Span], role: str, name: str | None, need: bool
) -> None:
    for item in items:
        span = spans.get(item.seqid)
        if span is None:
            if need:
                raise _feature_error(
                    f"the length of '{item.seqid}' is not known: neither file has a "
                    "##sequence-region line for it (add one, or give --region)",
                    role,
                    name,
                    item,
                )
            continue
        if item.start0 < span.start0 or item.end0 > span.end0:
            raise _feature_error(
                f"feature {item.start0 + 1}-{item.end0} lies outside the sequence "
                f"{span.text()} ({span.note or 'as given'})",
                role,
                name,
                item,
            )


def _nucleotide(
    pred: list[_Item], ref: list[_Item], universe: Mapping[str, Span]
) -> tuple[dict, dict]:
    """Strand-aware and strand-agnostic TP/FP/FN/TN over the universe (items already clipped)."""
    bases = sum(span.length for span in universe.values())
    tracks = {item.strand for item in (*pred, *ref)}
    if tracks & set(_STRANDED):
        tracks |= set(_STRANDED)
    if not tracks:
        tracks = {"."}

    def grouped(items: list[_Item], stranded: bool) -> dict[tuple[str, str], list]:
        out: dict[tuple[str, str], list[tuple[int, int]]] = {}
        for item in items:
            key = (item.seqid, item.strand if stranded else "")
            out.setdefault(key, []).append((item.start0, item.end0))
        return {key: _merge(ivs) for key, ivs in out.items()}

    result = []
    for stranded, positions in ((True, bases * len(tracks)), (False, bases)):
        p = grouped(pred, stranded)
        r = grouped(ref, stranded)
        tp = sum(_shared(p[key], r[key]) for key in p if key in r)
        p_cov = sum(_covered(ivs) for ivs in p.values())
        r_cov = sum(_covered(ivs) for ivs in r.values())
        fp, fn = p_cov - tp, r_cov - tp
        counts = {
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


def _feature_level(pred: list[_Item], ref: list[_Item], exact: bool) -> dict[str, int]:
    """Matched, missed and wrong feature counts (same seqid and strand)."""

    def indexed(items: list[_Item]) -> dict[tuple[str, str], _Index]:
        out: dict[tuple[str, str], list[tuple[int, int]]] = {}
        for item in items:
            out.setdefault((item.seqid, item.strand), []).append((item.start0, item.end0))
        return {key: _Index(ivs) for key, ivs in out.items()}

    empty = _Index([])

    def tally(items: list[_Item], others: dict[tuple[str, str], _Index]) -> tuple[int, int]:
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


def _compare(
    pred: Iterable[Feature],
    ref: Iterable[Feature],
    spans: Mapping[str, Span],
    feature_type: str,
    region: Region | str | None,
    pred_name: str | None,
    ref_name: str | None,
    only: set[str] | None = None,
    scope: str = "given",
) -> dict:
    reg = _resolve_region(region, spans)
    p_items = _select(pred, feature_type)
    r_items = _select(ref, feature_type)
    exact = feature_type in EXON_TYPES
    if reg is None:
        universe: dict[str, Span] = dict(spans)
        if only is not None:
            universe = {seqid: span for seqid, span in spans.items() if seqid in only}
            p_items = [i for i in p_items if i.seqid in only]
            r_items = [i for i in r_items if i.seqid in only]
        _check_inside(p_items, spans, "predicted", pred_name, need=True)
        _check_inside(r_items, spans, "reference", ref_name, need=True)
    else:
        universe = {reg.seqid: reg}
        p_items = [i for i in p_items if i.seqid == reg.seqid]
        r_items = [i for i in r_items if i.seqid == reg.seqid]
        _check_inside(p_items, spans, "predicted", pred_name, need=False)
        _check_inside(r_items, spans, "reference", ref_name, need=False)
        p_items = [i for i in p_items if i.start0 < reg.end0 and i.end0 > reg.start0]
        r_items = [i for i in r_items if i.start0 < reg.end0 and i.end0 > reg.start0]
    p_items, p_dups = _dedupe(p_items)
    r_items, r_dups = _dedupe(r_items)

    def clipped(items: list[_Item]) -> list[_Item]:
        if reg is None:
            return items
        return [
            _Item(i.seqid, i.strand, max(i.start0, reg.start0), min(i.end0, reg.end0), i.line0)
            for i in items
        ]

    aware, agnostic = _nucleotide(clipped(p_items), clipped(r_items), universe)
    fc = _feature_level(p_items, r_items, exact)
    fc["reference_duplicates"] = r_dups
    fc["predicted_duplicates"] = p_dups

    def metrics(c: dict) -> dict:
        return nucleotide_metrics(c["tp"], c["fp"], c["fn"], c["tn"])

    return {
        "type": feature_type,
        "rule": "exon" if exact else "overlap",
        "region": None if reg is None else reg.text(),
        "sequence_scope": "region" if reg is not None else scope,
        "sequences_not_compared": len(set(spans) - set(universe)),
        "inputs": {"predicted": pred_name, "reference": ref_name},
        "sequences": [
            {
                "seqid": span.seqid,
                "start_1based": span.start0 + 1,
                "end_1based": span.end0,
                "from": span.source,
            }
            for span in universe.values()
        ],
        "nucleotide": {"strand_aware": metrics(aware), "strand_agnostic": metrics(agnostic)},
        "feature": {
            "sensitivity": _ratio(fc["matched_reference"], fc["reference"]),
            "specificity": _ratio(fc["matched_predicted"], fc["predicted"]),
            "missed": _ratio(fc["missed_reference"], fc["reference"]),
            "wrong": _ratio(fc["wrong_predicted"], fc["predicted"]),
        },
        "counts": {
            "bases": sum(span.length for span in universe.values()),
            "nucleotide": {"strand_aware": aware, "strand_agnostic": agnostic},
            "feature": fc,
        },
    }


def compare_features(
    pred: list[Feature],
    ref: list[Feature],
    lengths: Mapping[str, int | tuple[int, int]],
    feature_type: str,
    region: Region | str | None = None,
    *,
    pred_name: str | None = None,
    ref_name: str | None = None,
) -> dict:
    """Compare predicted features with reference features of one type.

    ``pred`` and ``ref`` are features as :func:`~seqstate.io.gff3.read_gff3`
    returns them (0-based half-open); only those of ``feature_type`` count,
    and empty lists are allowed.  ``lengths`` maps each seqid to its length
    (the sequence is ``[0, length)``) or to a 0-based half-open span
    ``(start0, end0)``; every seqid in it is compared, and every seqid that
    carries a feature of the type must be in it unless ``region`` is given.
    ``region`` (a :class:`~seqstate.io.regions.Region`, 0-based half-open, or
    the text ``ID:START-END``, 1-based inclusive, or ``ID``) restricts the
    comparison to that stretch.  ``pred_name`` and ``ref_name`` name the
    inputs in errors and in the result.

    Returns a dict: ``type``, ``rule`` (``"exon"`` for CDS and exon, else
    ``"overlap"``), ``region`` (``ID:START-END`` 1-based inclusive, or None),
    ``sequence_scope`` (how the compared sequences were chosen: ``"given"``
    here; ``"predicted"`` or ``"all"`` from :func:`compare_files`; ``"region"``),
    ``sequences_not_compared`` (sequences with a known span left out),
    ``inputs``, ``sequences`` (the compared spans, 1-based inclusive),
    ``nucleotide`` (``strand_aware`` and ``strand_agnostic``, each with
    ``sensitivity``, ``specificity`` and ``approximate_correlation``),
    ``feature`` (``sensitivity``, ``specificity``, ``missed``, ``wrong``) and
    ``counts``.  An undefined ratio (zero denominator) is None.  The
    definitions are in this module's docstring.

    Raises :class:`~seqstate.errors.FeatureFormatError` for a feature on a
    seqid of unknown length or outside its span, and
    :class:`~seqstate.errors.UsageError` for a bad region.
    """
    spans: dict[str, Span] = {}
    for seqid, value in lengths.items():
        start0, end0 = (0, value) if isinstance(value, int) else value
        if not 0 <= start0 < end0:
            raise UsageError(f"sequence '{seqid}': span {value!r} is empty or negative")
        spans[seqid] = Span(seqid, start0, end0, "given")
    return _compare(pred, ref, spans, feature_type, region, pred_name, ref_name)


# ---------------------------------------------------------------- files


def read_sequence_regions(path: str | Path) -> dict[str, tuple[int, int, int]]:
    """The ``##sequence-region seqid start end`` lines of a GFF3 file.

    Returns ``{seqid: (start0, end0, line0)}`` (0-based half-open; ``line0``
    the 0-based line), in file order.  Reading stops at ``##FASTA`` or a line
    starting with '>'.  Raises :class:`~seqstate.errors.FeatureFormatError`
    naming the file and line for a malformed line or a seqid given twice with
    different bounds.
    """
    shown = display_name(path)
    out: dict[str, tuple[int, int, int]] = {}
    with open_input(path, FeatureFormatError, "GFF3") as handle:
        for line0, raw in iter_lines(handle, shown, FeatureFormatError):
            if raw.startswith(b"##FASTA") or raw.startswith(b">"):
                break
            if not raw.startswith(b"##sequence-region"):
                continue
            text = raw.decode("utf-8", errors="replace")
            fields = text.split()
            numbers = fields[2:4] if len(fields) == 4 else []
            if (
                fields[0] != "##sequence-region"
                or not all(n.isdigit() for n in numbers)
                or (len(numbers) != 2 or not 1 <= int(numbers[0]) <= int(numbers[1]))
            ):
                raise FeatureFormatError(
                    f"{text.strip()!r}: expected '##sequence-region SEQID START END' with "
                    "1-based START <= END",
                    path=shown,
                    line0=line0,
                )
            try:
                seqid = unescape(fields[1])
            except UnicodeDecodeError:
                raise FeatureFormatError(
                    f"seqid {fields[1]!r} has %-escapes that do not decode as UTF-8",
                    path=shown,
                    line0=line0,
                ) from None
            bounds = (int(numbers[0]) - 1, int(numbers[1]))
            if seqid in out and out[seqid][:2] != bounds:
                first = out[seqid]
                raise FeatureFormatError(
                    f"##sequence-region {seqid} {bounds[0] + 1} {bounds[1]} differs from "
                    f"line {first[2] + 1} ({first[0] + 1} {first[1]})",
                    path=shown,
                    line0=line0,
                )
            out.setdefault(seqid, (*bounds, line0))
    return out


def _listing(types: Iterable[str]) -> str:
    names = sorted(types)
    shown = ", ".join(names[:_LISTED])
    if len(names) > _LISTED:
        shown += f", ... ({len(names)} types in all)"
    return shown or "none"


def choose_type(
    pred_types: set[str],
    ref_types: set[str],
    requested: str | None,
    pred_name: str,
    ref_name: str,
) -> str:
    """The feature type to compare.

    ``requested`` if given; else ``CDS`` if either file has CDS features; else
    the only type both files have.  Raises
    :class:`~seqstate.errors.FeatureFormatError` (exit 1) when a file has no
    feature of the chosen type or the files share no type, and
    :class:`~seqstate.errors.UsageError` (exit 2) when several types are shared
    and none was requested.
    """
    if requested is None:
        for name, types in ((pred_name, pred_types), (ref_name, ref_types)):
            if not types:
                raise FeatureFormatError("has no features, nothing to compare", path=name)
        shared = pred_types & ref_types
        if "CDS" in pred_types | ref_types:
            requested = "CDS"
        elif len(shared) == 1:
            requested = next(iter(shared))
        elif shared:
            raise UsageError(
                f"{pred_name} and {ref_name} share several feature types ({_listing(shared)}); "
                "choose one with --type"
            )
        else:
            raise FeatureFormatError(
                f"{pred_name} ({_listing(pred_types)}) and {ref_name} "
                f"({_listing(ref_types)}) have no feature type in common"
            )
    for name, types in ((pred_name, pred_types), (ref_name, ref_types)):
        if requested not in types:
            raise FeatureFormatError(
                f"no '{requested}' features (types in the file: {_listing(types)})", path=name
            )
    return requested


def compare_files(
    predicted: str | Path,
    reference: str | Path,
    feature_type: str | None = None,
    region: str | None = None,
    *,
    all_sequences: bool = False,
) -> dict:
    """Read two GFF3 files (plain or gzip) and compare them; see :func:`compare_features`.

    The type is chosen by :func:`choose_type`.  Sequence spans come from the
    ``##sequence-region`` lines of the reference, then of the prediction for
    seqids the reference does not declare.  Only the predicted file's
    sequences (its ``##sequence-region`` lines and the seqids of its features)
    are compared (``sequence_scope`` ``"predicted"``), or, with
    ``all_sequences``, every sequence with a known span (``"all"``).  Standard
    input is not accepted (each file is read twice: its directives, then its
    features).
    """
    for path in (predicted, reference):
        if str(path) == "-":
            raise UsageError("compare reads named files; standard input ('-') is not accepted")
    pred_name, ref_name = display_name(predicted), display_name(reference)
    reg = parse_region(region) if region is not None else None
    pred = read_gff3(predicted)
    ref = read_gff3(reference)
    chosen = choose_type(
        {f.type for f in pred}, {f.type for f in ref}, feature_type, pred_name, ref_name
    )
    spans: dict[str, Span] = {}
    declared: dict[str, set[str]] = {}
    for source, name, path in (
        ("reference", ref_name, reference),
        ("predicted", pred_name, predicted),
    ):
        regions = read_sequence_regions(path)
        declared[source] = set(regions)
        for seqid, (start0, end0, line0) in regions.items():
            if seqid not in spans:
                spans[seqid] = Span(seqid, start0, end0, source, f"{name} line {line0 + 1}")
    if all_sequences:
        return _compare(pred, ref, spans, chosen, reg, pred_name, ref_name, None, "all")
    only = declared["predicted"] | {f.seqid for f in pred}
    return _compare(pred, ref, spans, chosen, reg, pred_name, ref_name, only, "predicted")


# ---------------------------------------------------------------- reports


def _value(value: object, decimals: int) -> str:
    if value is None:
        return "NA"
    if isinstance(value, float):
        return f"{value:.{decimals}f}"
    return str(value)


def _flatten(prefix: str, value: object) -> list[tuple[str, object]]:
    if isinstance(value, dict):
        out: list[tuple[str, object]] = []
        for key, sub in value.items():
            out.extend(_flatten(f"{prefix}.{key}" if prefix else key, sub))
        return out
    return [(prefix, value)]


def report_tsv(result: dict) -> str:
    """``metric<TAB>value`` rows after a header: the result flattened with dotted names.

    Every key of :func:`compare_features`'s result, in order
    (``type`` ... ``counts.feature.wrong_predicted``); ``sequences`` is one row, the
    compared seqids joined by commas (each escaped as a GFF3 column-9 value, so a
    comma in a seqid reads ``%2C``).  Ratios have 6 decimals; an undefined value
    is ``NA``.
    """
    rows = ["metric\tvalue"]
    flat = dict(result)
    if "sequences" in flat:
        flat["sequences"] = ",".join(escape_column9(s["seqid"]) for s in result["sequences"])
    for key, value in _flatten("", flat):
        rows.append(f"{key}\t{_value(value, 6)}")
    return "\n".join(rows) + "\n"


def report_json(result: dict) -> str:
    """The result as indented JSON (undefined ratios are null), one trailing newline."""
    return json.dumps(result, indent=2, ensure_ascii=False) + "\n"


def report_table(result: dict) -> str:
    """A readable, aligned table: a short header, then metric, value and counts rows."""
    counts = result["counts"]
    fc = counts["feature"]
    exon = result["rule"] == "exon"

    def noun(n: int) -> str:
        word = "exon" if exon else f"{result['type']} feature"
        return word if n == 1 else word + "s"

    rule = (
        "exons, a match has both ends and the strand equal"
        if exon
        else "a match shares at least half of the shorter feature, same strand"
    )
    n_seq = len(result["sequences"])
    where = result["region"] or f"{n_seq} sequence{'s' if n_seq != 1 else ''}"
    names = [s["seqid"] for s in result["sequences"]]
    used = ", ".join(names[:_LISTED]) + (f", ... ({n_seq} in all)" if n_seq > _LISTED else "")
    left = result.get("sequences_not_compared", 0)
    scope = {
        "predicted": "the predicted file's"
        + (f"; {left} more declared, not compared (--all-sequences counts them)" if left else ""),
        "all": "every sequence either file declares",
        "region": "the region",
        "given": "as given",
    }.get(result.get("sequence_scope", "given"), "")

    def dropped(n: int) -> str:
        return f" ({n} duplicate{'s' if n != 1 else ''} counted once)" if n else ""

    inputs = result["inputs"]
    n_ref, n_pred = noun(fc["reference"]), noun(fc["predicted"])
    head = [
        ("type", f"{result['type']}: {rule}"),
        ("compared", f"{where}, {counts['bases']} bases"),
        ("sequences", f"{used or 'none'} ({scope})"),
        (
            "predicted",
            f"{inputs['predicted'] or '-'}: {fc['predicted']} {n_pred}"
            f"{dropped(fc['predicted_duplicates'])}",
        ),
        (
            "reference",
            f"{inputs['reference'] or '-'}: {fc['reference']} {n_ref}"
            f"{dropped(fc['reference_duplicates'])}",
        ),
    ]
    lines = [f"{key:<10} {text}" for key, text in head]
    rows: list[tuple[str, str, str]] = []
    for mode, label in (("strand_aware", "strand-aware"), ("strand_agnostic", "strand-agnostic")):
        m = result["nucleotide"][mode]
        c = counts["nucleotide"][mode]
        rows += [
            (
                f"base {label} Sn",
                _value(m["sensitivity"], 4),
                f"{c['tp']} of {c['tp'] + c['fn']} reference bases",
            ),
            (
                f"base {label} Sp",
                _value(m["specificity"], 4),
                f"{c['tp']} of {c['tp'] + c['fp']} predicted bases",
            ),
            (
                f"base {label} AC",
                _value(m["approximate_correlation"], 4),
                f"TP {c['tp']}, FP {c['fp']}, FN {c['fn']}, TN {c['tn']}",
            ),
        ]
    f = result["feature"]
    rows += [
        (
            "feature Sn",
            _value(f["sensitivity"], 4),
            f"{fc['matched_reference']} of {fc['reference']} reference {n_ref} matched",
        ),
        (
            "feature Sp",
            _value(f["specificity"], 4),
            f"{fc['matched_predicted']} of {fc['predicted']} predicted {n_pred} matched",
        ),
        (
            "missed" + (" (ME)" if exon else ""),
            _value(f["missed"], 4),
            f"{fc['missed_reference']} of {fc['reference']} reference {n_ref} with no overlap",
        ),
        (
            "wrong" + (" (WE)" if exon else ""),
            _value(f["wrong"], 4),
            f"{fc['wrong_predicted']} of {fc['predicted']} predicted {n_pred} with no overlap",
        ),
    ]
    header = ("metric", "value", "counts")
    w0 = max(len(r[0]) for r in (*rows, header))
    w1 = max(len(r[1]) for r in (*rows, header))
    lines.append("")
    for name, value, detail in (header, *rows):
        lines.append(f"{name:<{w0}}  {value:>{w1}}  {detail}")
    tracks = counts["nucleotide"]["strand_aware"]["tracks"]
    lines.append("")
    lines.append(
        f"strand-aware counts each base once per strand track ({' '.join(tracks)}); Sp = TP/(TP+FP)"
    )
    return "\n".join(lines) + "\n"


def report_format(path: str | Path) -> str:
    """``"tsv"`` or ``"json"`` from the file name; UsageError for any other ending."""
    suffix = Path(path).suffix.lower()
    if suffix not in REPORT_FORMATS:
        raise UsageError(f"report file '{path}' must end in .tsv or .json (the format follows)")
    return REPORT_FORMATS[suffix]


def write_report(
    result: dict | list[dict],
    path: str | Path,
    *,
    force: bool = False,
    inputs: tuple | list = (),
) -> None:
    """Write the report as TSV or JSON (by the name's ending), all-or-nothing.

    Several results (one per ``--type``): JSON holds a list of them; TSV puts a
    ``type`` column first.  The overwrite rule of :mod:`seqstate.io.atomic`
    applies (``force``, ``inputs``).
    """
    tsv = report_format(path) == "tsv"
    if isinstance(result, list):
        if tsv:
            rows = ["type\tmetric\tvalue"]
            for one in result:
                rows += [f"{one['type']}\t{row}" for row in report_tsv(one).splitlines()[1:]]
            text = "\n".join(rows) + "\n"
        else:
            text = json.dumps(result, indent=2, ensure_ascii=False) + "\n"
    else:
        text = report_tsv(result) if tsv else report_json(result)
    with atomic_text(path, force=force, inputs=inputs) as handle:
        handle.write(text)
