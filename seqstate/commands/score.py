"""``seqstate score``: posterior scores of given regions (candidate intervals).

Regions come from a BED file (0-based half-open, kept as written) or a GFF3 file
(1-based closed, read as ``start - 1`` and ``end``); inside this module every
region is 0-based half-open ``[start0, end0)`` on one record.  The output table
writes the coordinates back in the input's convention and says which in its
column names: ``start_0based``/``end_exclusive`` for BED, ``start_1based``/
``end_1based`` for GFF3 (the same names as annotate's feature table).

Scores are those annotate gives its features (mean and minimum posterior, the
exact segment probability, log-odds in natural log and bits, CpG statistics),
plus the maximum posterior, for one label of the model: the label's states
against all the other states.  When the label's states carry a strand (the CDS
states of a gene model on ``+`` and ``-``), a region's strand chooses them: a
region on ``+`` is scored with the label's ``+`` states (and any of its states
without a strand) against every other state, one on ``-`` with its ``-``
states, and a region on ``.`` or ``?`` (or a BED line without a strand) with
both.  The ``scored_strand`` column says which: ``+``, ``-``, ``both``, or ``.``
for a label whose states have no strand.  Posteriors are computed on the whole record, so
sequence outside a region counts; with ``flank=N`` each region is computed on
its own window (region plus N bases each side, cut at the record ends), which
is treated as a record of its own.
"""

from __future__ import annotations

import io
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, TextIO

import numpy as np

from seqstate.commands.inputs import (
    indexed_lengths,
    read_model_records,
    read_model_region,
    read_set,
)
from seqstate.commands.masking import check_masked, prepare_masked
from seqstate.commands.provenance import gff3_provenance
from seqstate.engine import api
from seqstate.errors import FeatureFormatError, ImpossibleSequenceError, UsageError
from seqstate.io.atomic import OutputSet, check_outputs
from seqstate.io.fasta import Record
from seqstate.io.files import display_name
from seqstate.io.gff3 import Feature, GFF3Writer
from seqstate.io.intervals import INTERVAL_FORMATS, read_interval_file
from seqstate.io.regions import Region
from seqstate.io.tables import load_model, model_sha256
from seqstate.io.tsvtext import tsv_row
from seqstate.kinds import Kind, kind_of
from seqstate.kinds.segments import LOG2E, SCORE_FORMATS, format_value, score_segment
from seqstate.model import Model

__all__ = [
    "REGION_FORMATS",
    "InputRegion",
    "RegionFile",
    "ScoreOptions",
    "ScoreReport",
    "choose_label",
    "check_regions",
    "read_regions",
    "score",
    "score_columns",
    "score_regions",
    "strand_mask",
    "table_text",
    "write_scored_gff3",
]

#: Formats of a regions file.
REGION_FORMATS = INTERVAL_FORMATS

#: Column names of the two coordinates, by input format (the convention is in the name).
COORDINATE_COLUMNS = {
    "bed": ("start_0based", "end_exclusive"),
    "gff3": ("start_1based", "end_1based"),
    "gtf": ("start_1based", "end_1based"),
}
#: Score columns every row has, in order (after seqid, the coordinates, name, length, label).
POSTERIOR_COLUMNS = [
    "mean_posterior",
    "min_posterior",
    "max_posterior",
    "segment_probability",
    "log_odds_nat",
    "log_odds_bits",
]
FORMATS = {**SCORE_FORMATS, "max_posterior": ".4f"}
#: Type written to ``--gff`` for regions read from BED (Sequence Ontology SO:0000001).
BED_FEATURE_TYPE = "region"

_KNOWN_SHOWN = 5


# ---------------------------------------------------------------- reading regions


@dataclass
class InputRegion:
    """One region to score: bases ``start0 .. end0-1`` of ``seqid`` (0-based half-open).

    ``name`` is BED column 4, or the GFF3 ``ID`` (else ``Name``) attribute, or
    ``""``.  ``strand`` is '+', '-', '.' (also for a BED line without column 6)
    or '?'.  ``line0`` is the 0-based line of the input.  For GFF3 input
    ``type``, ``phase`` and ``attributes`` keep the rest of the line.
    """

    seqid: str
    start0: int
    end0: int
    name: str
    strand: str
    line0: int
    type: str | None = None
    phase: int | None = None
    attributes: list[tuple[str, str | list[str]]] = field(default_factory=list)


@dataclass
class RegionFile:
    """The regions of one file, in file order, and how the file was read.

    ``path`` is the name used in messages (``<stdin>`` for ``-``); ``format``
    is ``"bed"`` or ``"gff3"``.
    """

    path: str
    format: str
    regions: list[InputRegion]

    def span_text(self, region: InputRegion) -> str:
        """The region's bounds as written in its file, with the convention named."""
        if self.format == "bed":
            return f"interval {region.start0}-{region.end0} (BED, 0-based half-open)"
        return f"feature {region.start0 + 1}-{region.end0} ({self.format.upper()}, 1-based closed)"


def read_regions(path: str, fmt: str | None = None, types: set[str] | None = None) -> RegionFile:
    """Read a regions file: BED, GFF3 or GTF, plain or gzip, ``"-"`` for standard input.

    ``fmt`` is ``"bed"``, ``"gff3"``, ``"gtf"`` or None (detect: by the name, else by
    content; see :func:`seqstate.io.intervals.sniff_interval_format`).  ``types``
    keeps only GFF3 or GTF features of those column-3 types (ignored for BED).
    Regions are 0-based half-open, in file order.  Malformed lines raise
    :class:`~seqstate.errors.FeatureFormatError` with the file and line.
    """
    if fmt is not None and fmt not in REGION_FORMATS:
        raise UsageError(f"regions format {fmt!r} is not one of {', '.join(REGION_FORMATS)}")
    fmt, found = read_interval_file(path, fmt, types=types, what="BED or GFF3")
    regions = [  # one region per interval; BED lines have no type, phase or attributes
        InputRegion(
            *(iv.seqid, iv.start0, iv.end0, iv.name or "", iv.strand, iv.line0),
            *(iv.type, iv.phase, list(iv.attributes)),
        )
        for iv in found
    ]
    return RegionFile(display_name(path), fmt, regions)


def check_regions(rf: RegionFile, lengths: dict[str, int], fasta_shown: str) -> None:
    """Every region must be on a record of the FASTA, non-empty and inside it.

    ``lengths`` maps record ID to length (bases), in input order.  Raises
    :class:`~seqstate.errors.FeatureFormatError` naming the regions file and
    the line of the first bad region.
    """
    known = list(lengths)
    listing = ", ".join(known[:_KNOWN_SHOWN])
    if len(known) > _KNOWN_SHOWN:
        listing += f", ... ({len(known)} records in all)"
    for reg in rf.regions:
        length = lengths.get(reg.seqid)
        if length is None:
            raise FeatureFormatError(
                f"no record '{reg.seqid}' in {fasta_shown} (known records: {listing})",
                path=rf.path,
                line0=reg.line0,
            )
        if reg.end0 <= reg.start0:
            raise FeatureFormatError(
                f"{rf.span_text(reg)} is empty; expected at least one base",
                path=rf.path,
                line0=reg.line0,
            )
        if reg.end0 > length:
            raise FeatureFormatError(
                f"{rf.span_text(reg)} ends past the end of record '{reg.seqid}' (length {length})",
                path=rf.path,
                line0=reg.line0,
            )


# ---------------------------------------------------------------- scoring


def choose_label(model: Model, label: str | None) -> str:
    """``label`` checked against the model's labels; the only label when None.

    Raises :class:`~seqstate.errors.UsageError` when the model has no label,
    when ``label`` is None and the model has several (they are listed), or
    when ``label`` is not one of them.
    """
    labels = model.labels
    if not labels:
        raise UsageError(f"model '{model.name}' has no labelled states: nothing to score")
    if label is None:
        if len(labels) > 1:
            raise UsageError(
                f"model '{model.name}' has labels {', '.join(labels)}: choose one with --label"
            )
        return labels[0]
    if label not in labels:
        raise UsageError(
            f"label '{label}' is not a label of model '{model.name}' (labels: {', '.join(labels)})"
        )
    return label


def strand_mask(model: Model, label: str, strand: str) -> tuple[np.ndarray, str]:
    """The states scored for a region on ``strand`` and the ``scored_strand`` value.

    For a label with stranded states and a region on ``+`` or ``-``: the label's
    states on that strand or without a strand, and the strand itself; for a
    region on ``.`` or ``?``: every state of the label, ``"both"``.  For a label
    whose states have no strand: every state of the label, ``"."``.
    """
    in_label = [s.label == label for s in model.states]
    stranded = any(s.strand in ("+", "-") for s, keep in zip(model.states, in_label) if keep)
    if not stranded:
        return np.array(in_label, dtype=np.bool_), "."
    if strand in ("+", "-"):
        keep = [k and s.strand in (strand, None) for s, k in zip(model.states, in_label)]
        return np.array(keep, dtype=np.bool_), strand
    return np.array(in_label, dtype=np.bool_), "both"


def score_columns(model: Model, label: str) -> list[str]:
    """The score keys of each result for ``label``, in table order.

    After the posterior scores come the extra columns the model's kind gives the
    label (the CpG statistics of ``CpG_island``).
    """
    return ["length", *POSTERIOR_COLUMNS, *kind_of(model).extra_columns(label)]


def _score_one(
    tables: api.EngineTables,
    codes: np.ndarray,
    post: api.Posterior,
    mask: np.ndarray,
    start0: int,
    end0: int,
    seq: bytes,
    kind: Kind,
    label: str,
) -> dict:
    sc = score_segment(tables, codes, post, post.values[:, 0], mask, start0, end0)
    out: dict[str, Any] = {"length": end0 - start0}
    for key in POSTERIOR_COLUMNS:
        if key == "max_posterior":
            out[key] = float(np.max(post.values[start0:end0, 0]))
        else:
            out[key] = sc[key]
    lo = out["log_odds_nat"]
    out["log_odds_bits"] = lo * LOG2E if math.isfinite(lo) else lo
    out.update(kind.extra_scores(label, seq[start0:end0]))
    return out


def score_regions(
    model: Model,
    records: list[Record],
    regions: list[InputRegion],
    label: str,
    *,
    flank: int | None = None,
    masked: str = "base",
    read_window: Callable[[str, int, int], bytes] | None = None,
    lengths: dict[str, int] | None = None,
) -> list[dict]:
    """Scores of every region (0-based half-open, already checked), in the order given.

    For each region: ``scored_strand`` (see :func:`strand_mask`: the label's
    states on the region's strand are scored when the label is stranded);
    ``length`` (bases); ``mean_posterior``, ``min_posterior`` and
    ``max_posterior`` of the label's per-base posterior (the sum over the
    scored states); ``segment_probability``, the exact
    P(every base of the region is in a state of the label | sequence);
    ``log_odds_nat``/``log_odds_bits``, the region's log-odds under the label's
    states against the other states (natural log, base 2); and for the label
    ``CpG_island`` the G+C fraction, CpG count, O/E ratio and the two published
    criteria flags (the model's kind's extra scores, see
    :func:`seqstate.kinds.segments.cpg_statistics`).

    With ``flank=None`` the posteriors come from the whole record (one pass per
    record that has regions).  With ``flank=N`` each region is computed on the
    window ``[start0 - N, end0 + N)`` cut at the record ends, as if the window
    were a record: the model's start probabilities apply at its first base, its
    end probabilities (if any) at its last, and the first ``order`` bases use
    the shorter-context emission rows.  ``masked`` is ``"base"``,
    ``"unknown"`` (lowercase bases read as unknown) or ``"evidence"`` (the model's mask
    table scores them, :mod:`seqstate.commands.masking`), as in annotate.

    With ``flank=N``, ``read_window(seqid, w0, w1)`` (the bases ``[w0, w1)`` of
    a record, e.g. through the FASTA index) and ``lengths`` (record ID ->
    length) may stand in for ``records``: a region on a record that is not in
    ``records`` has its window read through ``read_window``.
    """
    if flank is not None and flank < 0:
        raise UsageError(f"--flank {flank} must be 0 or more")
    tables = prepare_masked(model, masked)
    unknown = masked == "unknown"
    kind = kind_of(model)
    masks = {strand: strand_mask(model, label, strand) for strand in {r.strand for r in regions}}

    def group_of(mask: np.ndarray) -> np.ndarray:
        return np.where(mask, 0, -1).astype(np.int64)

    by_record: dict[str, list[int]] = {}
    for i, reg in enumerate(regions):
        by_record.setdefault(reg.seqid, []).append(i)
    results: list[dict | None] = [None] * len(regions)
    for rec in records:
        idx = by_record.get(rec.id)
        if not idx:
            continue
        if flank is None:
            codes = api.encode(tables, rec.seq, masked_unknown=unknown)
            by_scored: dict[str, list[int]] = {}  # one posterior pass per set of scored states
            for i in idx:
                by_scored.setdefault(masks[regions[i].strand][1], []).append(i)
            for scored, group_idx in by_scored.items():
                mask = masks[regions[group_idx[0]].strand][0]
                post = api.posterior(tables, codes, group=group_of(mask), n_groups=1, record=rec.id)
                for i in group_idx:
                    reg = regions[i]
                    results[i] = {
                        "scored_strand": scored,
                        **_score_one(
                            tables, codes, post, mask, reg.start0, reg.end0, rec.seq, kind, label
                        ),
                    }
                del post
            del codes
            continue
        for i in idx:
            reg = regions[i]
            w0 = max(0, reg.start0 - flank)
            w1 = min(len(rec.seq), reg.end0 + flank)
            results[i] = _score_window(
                tables, kind, label, masks[reg.strand], reg, rec.seq[w0:w1], w0, unknown
            )
    if flank is not None and read_window is not None and lengths is not None:
        for i, reg in enumerate(regions):
            if results[i] is None and reg.seqid in lengths:
                w0 = max(0, reg.start0 - flank)
                w1 = min(lengths[reg.seqid], reg.end0 + flank)
                window = read_window(reg.seqid, w0, w1)
                results[i] = _score_window(
                    tables, kind, label, masks[reg.strand], reg, window, w0, unknown
                )
    missing = [regions[i].seqid for i, r in enumerate(results) if r is None]
    if missing:
        raise ValueError(f"regions on records not given: {sorted(set(missing))}")
    return results  # type: ignore[return-value]


def _score_window(
    tables: Any,
    kind: Kind,
    label: str,
    mask_scored: tuple[np.ndarray, str],
    reg: InputRegion,
    window: bytes,
    w0: int,
    unknown: bool,
) -> dict:
    """The scores of ``reg`` computed on ``window``, the record's bases ``[w0, w0 + len)``."""
    mask, scored = mask_scored
    group = np.where(mask, 0, -1).astype(np.int64)
    w1 = w0 + len(window)
    codes = api.encode(tables, window, masked_unknown=unknown)
    post = api.posterior(
        tables, codes, group=group, n_groups=1, record=f"{reg.seqid}:{w0 + 1}-{w1}"
    )
    return {
        "scored_strand": scored,
        **_score_one(
            tables, codes, post, mask, reg.start0 - w0, reg.end0 - w0, window, kind, label
        ),
    }


# ---------------------------------------------------------------- writing


def table_text(rf: RegionFile, model: Model, label: str, scores: list[dict]) -> str:
    """The TSV: a header row, then one row per region in input order."""
    start_col, end_col = COORDINATE_COLUMNS[rf.format]
    keys = score_columns(model, label)
    header = ["seqid", start_col, end_col, "name", "label", "scored_strand", *keys]
    lines = [tsv_row(header)]
    for reg, sc in zip(rf.regions, scores):
        start = reg.start0 if rf.format == "bed" else reg.start0 + 1
        name = " ".join(reg.name.replace("\t", " ").split())
        row = [reg.seqid, str(start), str(reg.end0), name, label, sc["scored_strand"]]
        row += [format_value(sc[k], FORMATS[k]) for k in keys]
        lines.append(tsv_row(row))
    return "".join(lines)


def write_scored_gff3(
    handle: TextIO,
    rf: RegionFile,
    model: Model,
    label: str,
    scores: list[dict],
    lengths: dict[str, int],
) -> None:
    """The regions as GFF3 features (1-based closed) carrying their scores.

    ``lengths`` (record ID -> bases, in FASTA order) gives the ``##sequence-region``
    lines of the records that hold regions.

    Type, phase and attributes of GFF3 input are kept (attributes with the names
    of our scores are replaced); BED regions get type ``region`` and their name
    as ``Name``.  Column 6 is the mean posterior, as in annotate's GFF3.
    """
    keys = score_columns(model, label)
    ours = {"scored_label", "scored_strand", *keys}
    used = {reg.seqid for reg in rf.regions}
    gff = GFF3Writer(handle)
    gff.header([(seqid, length) for seqid, length in lengths.items() if seqid in used])
    handle.write(gff3_provenance(model.name, model_sha256(model)))
    for reg, sc in zip(rf.regions, scores):
        if rf.format != "bed":
            attrs = [(k, v) for k, v in reg.attributes if k not in ours]
            ftype = reg.type or BED_FEATURE_TYPE
        else:
            attrs = [("Name", reg.name)] if reg.name else []
            ftype = BED_FEATURE_TYPE
        attrs.append(("scored_label", label))
        attrs.append(("scored_strand", sc["scored_strand"]))
        attrs += [(k, format_value(sc[k], FORMATS[k])) for k in keys]
        mean = sc["mean_posterior"]
        gff.write(
            Feature(
                seqid=reg.seqid,
                source="seqstate",
                type=ftype,
                start0=reg.start0,
                end0=reg.end0,
                score=mean if math.isfinite(mean) else None,
                strand=reg.strand,
                phase=reg.phase,
                attributes=attrs,
            )
        )


@dataclass
class ScoreOptions:
    """Everything ``seqstate score`` was asked to do.

    ``out_tsv`` None means standard output; ``regions_format`` None means
    detect; ``types`` keeps only those GFF3 feature types (empty: all).
    """

    input: str
    regions: str
    model: str = "cpg-island"
    label: str | None = None
    out_tsv: str | None = None
    out_gff: str | None = None
    flank: int | None = None
    regions_format: str | None = None
    types: tuple[str, ...] = ()
    masked: str = "base"
    force: bool = False


@dataclass
class ScoreReport:
    """What a score run produced: the TSV text, counts, the label, and what to print.

    ``stdout`` is the text the caller must print on standard output (the table
    without ``-o``, or the GFF3 with ``--gff -``), or None.
    """

    table: str
    label: str
    regions: int
    format: str
    stdout: str | None = None
    #: where the table went: its file name, or "stdout"
    where: str = "stdout"

    def summary(self) -> str:
        """The summary line (after ``seqstate: ``)."""
        return f"{self.regions} region(s) ({self.format}) scored for {self.label} -> {self.where}"


def _records_for(
    path: str, model: Model, rf: RegionFile, flank: int | None
) -> tuple[dict[str, int], list[Record]]:
    """Record lengths (ID -> bases, FASTA order) and the records read, checked against
    the regions (:func:`check_regions`).

    With a FASTA index (:func:`seqstate.commands.inputs.indexed_lengths`) only what
    the regions need is read through it: with ``flank`` None the records named by a
    region (whole), with a flank nothing here (each window is read when it is
    scored).  Without an index every record is read.
    """
    lengths = indexed_lengths(path, model)
    if lengths is None:
        records = read_model_records(path, model)
        lengths = {r.id: len(r.seq) for r in records}
        check_regions(rf, lengths, display_name(path))
        return lengths, records
    check_regions(rf, lengths, display_name(path))
    if flank is not None:
        return lengths, []
    used = {reg.seqid for reg in rf.regions}
    records = []
    for seqid, length in lengths.items():
        if seqid in used:
            records.append(_read_indexed(path, model, Region(seqid, 0, length)))
    return lengths, records


def _read_indexed(path: str, model: Model, region: Region) -> Record:
    record = read_model_region(path, model, region)
    assert record is not None  # the index was there a moment ago
    return record


def score(opts: ScoreOptions) -> ScoreReport:
    """Run ``seqstate score``: read, check, score, then write every output at once.

    Every input is read and checked before anything is computed, and outputs
    are written only after every region is scored (files atomically), so an
    error leaves no output behind.  ``out_tsv`` None or ``"-"`` sends the
    table to standard output; ``out_gff`` ``"-"`` sends the GFF3 there (then
    the table needs a file).  Returns the result; the caller prints
    ``result.stdout``.
    """
    if opts.input == "-" and opts.regions == "-":
        raise UsageError("FASTA and --regions cannot both be standard input ('-')")
    check_masked(opts.masked)
    tsv_file = None if opts.out_tsv in (None, "-") else opts.out_tsv
    if opts.out_gff == "-" and tsv_file is None:
        raise UsageError(
            "the table and --gff cannot both go to standard output: give -o a file name"
        )
    inputs = read_set(fasta=opts.input, model=opts.model, files=[opts.regions])
    check_outputs([tsv_file, opts.out_gff], inputs, force=opts.force)
    model = load_model(opts.model)
    label = choose_label(model, opts.label)
    if opts.flank is not None and opts.flank < 0:
        raise UsageError(f"--flank {opts.flank} must be 0 or more")
    rf = read_regions(opts.regions, opts.regions_format, set(opts.types) or None)
    if opts.types and rf.format == "bed":
        raise UsageError(f"--type selects GFF3 features, but {rf.path} was read as BED")
    lengths, records = _records_for(opts.input, model, rf, opts.flank)

    def read_window(seqid: str, w0: int, w1: int) -> bytes:
        return _read_indexed(opts.input, model, Region(seqid, w0, w1)).seq

    try:
        scores = score_regions(
            model,
            records,
            rf.regions,
            label,
            flank=opts.flank,
            masked=opts.masked,
            read_window=read_window,
            lengths=lengths,
        )
    except ImpossibleSequenceError as exc:
        raise ImpossibleSequenceError(exc.message, path=display_name(opts.input)) from None
    table = table_text(rf, model, label, scores)
    gff_text = None
    if opts.out_gff is not None:
        buf = io.StringIO()
        write_scored_gff3(buf, rf, model, label, scores, lengths)
        gff_text = buf.getvalue()
    files = [
        (path, text)
        for path, text in ((tsv_file, table), (opts.out_gff, gff_text))
        if path is not None and path != "-" and text is not None
    ]
    with OutputSet(force=opts.force, inputs=inputs) as outs:
        for path, text in files:
            outs.open_text(path).write(text)
    return ScoreReport(
        table=table,
        label=label,
        regions=len(rf.regions),
        format=rf.format,
        stdout=table if tsv_file is None else gff_text if opts.out_gff == "-" else None,
        where=tsv_file or "stdout",
    )
