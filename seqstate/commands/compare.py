"""``seqstate compare``: accuracy of predicted features against a trusted annotation.

Coordinates: GFF3 and GTF files are 1-based and closed; everything inside this module is
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

Transcript and gene level (for ``CDS`` and ``exon``).  The compared lines of a
file are grouped into transcripts by their ``Parent`` (a line with several parents
belongs to each), and transcripts into genes by the transcript's own ``Parent``
(GFF3 gene -> mRNA -> CDS/exon; GTF ``gene_id`` and ``transcript_id``, see
:func:`seqstate.io.intervals.gtf_gene_features`).  A line without a parent is a
transcript and a gene of its own, named by its ``ID`` (lines sharing an ID are
one feature); a transcript whose parent is not in the file is a gene of its own.
A transcript is right when a transcript of the other file has exactly the same
exons (every exon exact, none more, none fewer); a gene is right when one of its
transcripts is.

* transcript ``Sn = right reference transcripts / reference transcripts``,
  ``Sp = right predicted transcripts / predicted transcripts``;
* gene ``Sn = reference genes with a right transcript / reference genes``,
  ``Sp = predicted genes with a right transcript / predicted genes``; gene
  ``missed`` and ``wrong`` are the fractions of reference and predicted genes
  none of whose exons overlaps an exon of the other file;
* ``missed_genes`` lists every reference gene that is not right, and
  ``wrong_genes`` every predicted gene that is not right, by ID with seqid,
  1-based span, strand, number of transcripts and ``overlapped`` (some exon of
  it overlaps an exon of the other file: a wrong structure rather than a gene
  missed or invented outright), so a curator can go to them.

With a region, a transcript counts when one of its exons overlaps the region.

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

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from seqstate.commands.compare_metrics import (
    Item,
    Transcript,
    approximate_correlation,
    feature_counts,
    gene_counts,
    nucleotide_counts,
    nucleotide_metrics,
    ratio,
)
from seqstate.commands.compare_report import (
    LISTED,
    REPORT_FORMATS,
    report_format,
    report_json,
    report_table,
    report_tsv,
    write_report,
)
from seqstate.commands.records import require_shared_ids
from seqstate.errors import FeatureFormatError, UsageError
from seqstate.io.files import display_name
from seqstate.io.gff3 import Feature, read_gff3, read_sequence_regions
from seqstate.io.intervals import Interval, read_gene_features, sniff_file
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


# ---------------------------------------------------------------- the comparison


def _feature_error(message: str, role: str, name: str | None, item: Item) -> FeatureFormatError:
    where = f"{role} feature on '{item.seqid}'" if name is None else f"seqid '{item.seqid}'"
    return FeatureFormatError(message, path=name, line0=item.line0, where=where)


def _select(features: Iterable[Feature | Interval], feature_type: str) -> list[Item]:
    return [
        Item(f.seqid, f.strand, f.start0, f.end0, f.line0)
        for f in features
        if f.type == feature_type
    ]


def _transcripts(features: Iterable[Feature | Interval], feature_type: str) -> list[Transcript]:
    """The transcripts of the lines of ``feature_type`` (see the module docstring)."""
    features = list(features)
    parent_of: dict[str, str] = {}
    for f in features:
        fid = f.get("ID")
        if fid and fid not in parent_of and f.type != feature_type:
            parents = _values(f, "Parent")
            parent_of[fid] = parents[0] if parents else fid
    exons: dict[str, set[tuple[str, str, int, int]]] = {}
    gene: dict[str, str] = {}
    first: dict[str, int | None] = {}
    for f in features:
        if f.type != feature_type:
            continue
        parents = _values(f, "Parent")
        if not parents:  # a transcript (and gene) of its own
            line0 = f.line0 if f.line0 is not None else -1
            parents = [f.get("ID") or f"line {line0 + 1}"]
        for tid in parents:
            exons.setdefault(tid, set()).add((f.seqid, f.strand, f.start0, f.end0))
            gene.setdefault(tid, parent_of.get(tid, tid))
            first.setdefault(tid, f.line0)
    return [Transcript(tid, gene[tid], frozenset(ex), first[tid]) for tid, ex in exons.items()]


def _values(f: Feature | Interval, key: str) -> list[str]:
    out: list[str] = []
    for k, v in f.attributes:
        if k == key:
            out.extend([v] if isinstance(v, str) else v)
    return out


def _gene_level(
    pred: Iterable[Feature | Interval],
    ref: Iterable[Feature | Interval],
    feature_type: str,
    keep: Callable[[Transcript], bool],
) -> dict:
    """Transcript and gene results of the transcripts ``keep`` accepts."""
    p_tx = [t for t in _transcripts(pred, feature_type) if keep(t)]
    r_tx = [t for t in _transcripts(ref, feature_type) if keep(t)]
    gc = gene_counts(p_tx, r_tx)
    tc, g = gc["transcript"], gc["gene"]
    return {
        "transcript": {
            "sensitivity": ratio(tc["matched_reference"], tc["reference"]),
            "specificity": ratio(tc["matched_predicted"], tc["predicted"]),
        },
        "gene": {
            "sensitivity": ratio(g["matched_reference"], g["reference"]),
            "specificity": ratio(g["matched_predicted"], g["predicted"]),
            "missed": ratio(g["missed_reference"], g["reference"]),
            "wrong": ratio(g["wrong_predicted"], g["predicted"]),
        },
        "counts": {"transcript": tc, "gene": g},
        "missed_genes": gc["missed"],
        "wrong_genes": gc["wrong"],
    }


def _dedupe(items: list[Item]) -> tuple[list[Item], int]:
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
    items: list[Item], spans: Mapping[str, Span], role: str, name: str | None, need: bool
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


def _compare(
    pred: Iterable[Feature | Interval],
    ref: Iterable[Feature | Interval],
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

    def clipped(items: list[Item]) -> list[Item]:
        if reg is None:
            return items
        return [
            Item(i.seqid, i.strand, max(i.start0, reg.start0), min(i.end0, reg.end0), i.line0)
            for i in items
        ]

    aware, agnostic = nucleotide_counts(clipped(p_items), clipped(r_items), universe)
    fc = feature_counts(p_items, r_items, exact)
    fc["reference_duplicates"] = r_dups
    fc["predicted_duplicates"] = p_dups

    def metrics(c: dict) -> dict:
        return nucleotide_metrics(c["tp"], c["fp"], c["fn"], c["tn"])

    genes = None
    if exact:

        def keep(t: Transcript) -> bool:
            if reg is not None:
                return any(
                    s == reg.seqid and a < reg.end0 and b > reg.start0 for s, _, a, b in t.exons
                )
            return only is None or any(s in only for s, _, _, _ in t.exons)

        genes = _gene_level(pred, ref, feature_type, keep)

    result: dict[str, Any] = {
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
            "sensitivity": ratio(fc["matched_reference"], fc["reference"]),
            "specificity": ratio(fc["matched_predicted"], fc["predicted"]),
            "missed": ratio(fc["missed_reference"], fc["reference"]),
            "wrong": ratio(fc["wrong_predicted"], fc["predicted"]),
        },
        "counts": {
            "bases": sum(span.length for span in universe.values()),
            "nucleotide": {"strand_aware": aware, "strand_agnostic": agnostic},
            "feature": fc,
        },
    }
    if genes is not None:
        result["transcript"] = genes["transcript"]
        result["gene"] = genes["gene"]
        result["counts"]["transcript"] = genes["counts"]["transcript"]
        result["counts"]["gene"] = genes["counts"]["gene"]
        result["missed_genes"] = genes["missed_genes"]
        result["wrong_genes"] = genes["wrong_genes"]
    return result


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
    ``counts``; for CDS and exon also ``transcript`` (``sensitivity``,
    ``specificity``), ``gene`` (the same and ``missed``, ``wrong``), their counts
    under ``counts``, and ``missed_genes`` and ``wrong_genes`` (lists of dicts:
    ``id``, ``seqid``, ``start_1based``, ``end_1based``, ``strand``,
    ``transcripts``, ``overlapped``).  An undefined ratio (zero denominator) is None.  The
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


def _listing(types: Iterable[str]) -> str:
    names = sorted(types)
    shown = ", ".join(names[:LISTED])
    if len(names) > LISTED:
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


def _read_features(path: str | Path, gtf: dict[str | Path, bool]) -> list[Feature]:
    """The features of a GFF3 file, or of a GTF file as its gene -> transcript
    hierarchy (told by its name or first lines; ``gtf[path]`` is set to which;
    :func:`~seqstate.io.intervals.read_gene_features`)."""
    gtf[path] = sniff_file(path, "GFF3 or GTF") == "gtf"
    return read_gene_features(path)[1] if gtf[path] else read_gff3(path)


def compare_files(
    predicted: str | Path,
    reference: str | Path,
    feature_type: str | None = None,
    region: str | None = None,
    *,
    all_sequences: bool = False,
) -> dict:
    """Read two GFF3 or GTF files (plain or gzip) and compare them; see
    :func:`compare_features`.  A file is read as GTF when its name ends ``.gtf``
    (optionally ``.gz``) or its first feature line has GTF attributes
    (:func:`~seqstate.io.intervals.sniff_interval_format`); else as GFF3.

    The type is chosen by :func:`choose_type`.  Sequence spans come from the
    ``##sequence-region`` lines of the reference, then of the prediction for
    seqids the reference does not declare (a GTF file has none).  Only the predicted file's
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
    gtf: dict[str | Path, bool] = {}
    pred = _read_features(predicted, gtf)
    ref = _read_features(reference, gtf)
    pred_types = {f.type for f in pred if f.type is not None}  # never None in GFF3, GTF
    ref_types = {f.type for f in ref if f.type is not None}
    chosen = choose_type(pred_types, ref_types, feature_type, pred_name, ref_name)
    spans: dict[str, Span] = {}
    declared: dict[str, set[str]] = {}
    regions_of: dict[str, dict[str, tuple[int, int, int]]] = {}
    for source, name, path in (
        ("reference", ref_name, reference),
        ("predicted", pred_name, predicted),
    ):
        regions = {} if gtf[path] else read_sequence_regions(path)
        regions_of[source] = regions
        declared[source] = set(regions)
        for seqid, (start0, end0, line0) in regions.items():
            if seqid not in spans:
                spans[seqid] = Span(seqid, start0, end0, source, f"{name} line {line0 + 1}")
    require_shared_ids(
        pred_name,
        list(dict.fromkeys([*sorted(declared["predicted"]), *(f.seqid for f in pred)])),
        ref_name,
        list(dict.fromkeys([*sorted(declared["reference"]), *(f.seqid for f in ref)])),
    )
    if all_sequences:
        return _compare(pred, ref, spans, chosen, reg, pred_name, ref_name, None, "all")
    narrowed = None if reg is not None else _stretch_of_prediction(regions_of, ref, pred_name)
    if narrowed is not None:
        # the stretch bounds the comparison; it is not the sequence's length
        if spans[narrowed.seqid].source == "predicted":
            spans = {k: v for k, v in spans.items() if k != narrowed.seqid}
        result = _compare(pred, ref, spans, chosen, narrowed.text(), pred_name, ref_name)
        result["sequence_scope"] = "predicted stretch"
        result["region_from"] = narrowed.note
        return result
    only = declared["predicted"] | {f.seqid for f in pred}
    return _compare(pred, ref, spans, chosen, reg, pred_name, ref_name, only, "predicted")


def _stretch_of_prediction(
    regions_of: Mapping[str, Mapping[str, tuple[int, int, int]]],
    ref: Iterable[Feature | Interval],
    pred_name: str | None,
) -> Span | None:
    """The stretch a region run's prediction covers, when it is narrower than the reference.

    A prediction of ``annotate --region`` declares the annotated stretch in its
    ``##sequence-region`` line.  When that line differs from the reference's
    (or the reference declares none and has features of that seqid outside
    it), the comparison is restricted to the stretch, as ``--region`` would:
    the whole-sequence reference is not counted against a partial prediction.
    ``None`` when no such line exists; an error when several seqids would need
    it (give ``--region``).
    """
    pred_regions, ref_regions = regions_of["predicted"], regions_of["reference"]
    outside: dict[str, bool] = {}
    for f in ref:
        got = pred_regions.get(f.seqid)
        if got is not None and (f.start0 < got[0] or f.end0 > got[1]):
            outside[f.seqid] = True
    narrow = []
    for seqid, (start0, end0, line0) in pred_regions.items():
        known = ref_regions.get(seqid)
        if (known is not None and known[:2] != (start0, end0)) or (
            known is None and outside.get(seqid)
        ):
            narrow.append(Span(seqid, start0, end0, "predicted", f"{pred_name} line {line0 + 1}"))
    if not narrow:
        return None
    if len(narrow) > 1:
        raise UsageError(
            f"{pred_name} declares stretches of {len(narrow)} sequences narrower than the "
            f"reference ({', '.join(s.text() for s in narrow[:3])}"
            f"{', ...' if len(narrow) > 3 else ''}); compare one at a time with --region"
        )
    return narrow[0]
