"""``seqstate annotate``: its options and run report, and the checks of its options.

:class:`AnnotateOptions` in, :class:`AnnotateReport` out (the run report, ``STEM.run.json``);
the option checks that need the model (gene filters, browser formats, ``--truth``,
``--calibrated-tracks``) and the report's ``thresholds``.  The run itself is
:func:`seqstate.commands.annotate.annotate`.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field, replace
from typing import Any, TextIO

from seqstate import log
from seqstate.commands.annotate_names import STDOUT
from seqstate.commands.records_table import (
    LISTED_RECORDS,
    RecordReport,
    SkippedReport,
    Totals,
)
from seqstate.errors import UsageError, escape_text
from seqstate.io import indexed
from seqstate.io.fasta import display_name
from seqstate.io.regions import Region
from seqstate.kinds import Group
from seqstate.model import Model

#: Version 2: ``totals``, the records table (``records_table``, every record) and
#: ``records`` / ``skipped_records`` cut to the first ``records_limit`` entries.
REPORT_SCHEMA = "seqstate-run-report/2"


#: Default ``--min-cds-length`` (coding bases per mRNA, stop codon included): of the
#: RefSeq mRNAs of D. melanogaster chr 4 none has fewer, of A. thaliana chr 1
#: 1-15,000,000 6 of 6,442 (0.09 %) (``benchmarks/cds_lengths.py``; README).
DEFAULT_MIN_CDS_LENGTH = 90


@dataclass
class AnnotateOptions:
    """Everything ``seqstate annotate`` was asked to do."""

    input: str
    model: str = "cpg-island"
    out_dir: str = "."
    decode: str | None = None
    #: None: the model's default (its ``[defaults]`` table, else 0.5 and 1)
    min_posterior: float | None = None
    min_length: int | None = None
    region: str | None = None
    masked: str = "base"
    tracks: str = "bedgraph"
    precision: int = 4
    split_unknown: int = 10
    #: a FASTA record with a header and no sequence: "skip" (warn, list it in the
    #: run report) or "error"
    empty_records: str = "skip"
    command_line: list[str] = field(default_factory=list)
    force: bool = False
    stem: str | None = None
    #: threads: None = every core this process may use (clamped to 1 .. cores)
    jobs: int | None = None
    #: gene models: file names (inside the output folder) of the spliced CDS (FASTA of
    #: nucleotides) and of their translations (FASTA of amino acids), and the table used
    cds: str | None = None
    proteins: str | None = None
    translation_table: int = 1
    #: a self-contained HTML page of the run (file name inside the output folder), and a
    #: trusted annotation whose calibration figure it shows
    report: str | None = None
    truth: str | None = None
    #: --truth-type: only these GFF3/GTF types of the truth (each a label of the model)
    truth_types: tuple[str, ...] = ()
    #: --records/--records-file: only these record IDs, kept in input order
    records: list[str] | None = None
    #: gene models: fewest coding bases per mRNA, and lowest gene score (the mean
    #: posterior of the gene's states over its span), of a gene that is written;
    #: None: the defaults (:data:`DEFAULT_MIN_CDS_LENGTH`, 0)
    min_cds_length: int | None = None
    min_gene_posterior: float | None = None
    #: a recalibrated model: also write each track's calibrated posterior
    #: (``STEM.TRACK.calibrated.bedgraph`` / ``.bw``, in --tracks' format)
    calibrated_tracks: bool = False
    #: --index-outputs: GFF3 and bedGraphs also sorted, bgzip-compressed and tabix-indexed;
    #: --gene-formats: gene structures also as these (seqstate.io.gene_formats)
    index_outputs: bool = False
    gene_formats: tuple[str, ...] = ()


@dataclass
class ModelSummary:
    """The model of a run, as the run report names it."""

    name: str
    sha256: str
    alphabet: str
    order: int
    states: int


#: How each output names its coordinates (written into every run report).
COORDINATES = {
    "gff3": "1-based closed",
    "bedgraph": "0-based half-open",
    "tsv": "1-based closed (start_1based, end_1based)",
}


@dataclass
class AnnotateReport:
    """The run report of ``seqstate annotate`` (written as ``STEM.run.json``).

    Its fields, in order, are the keys of the JSON document (:meth:`to_dict`);
    ``thresholds["from"]`` says for each threshold whether it came from an
    ``option`` or the ``model``.  ``totals`` counts every record; ``records`` and
    ``skipped_records`` list only the first ``records_limit`` of each
    (``records_truncated`` says whether some were left out); the records table
    ``records_table`` (:mod:`seqstate.commands.records_table`) has every one.
    """

    schema: str
    tool: str
    version: str
    command_line: list[str]
    model: ModelSummary
    options: dict[str, Any]
    decode: str
    thresholds: dict[str, Any]
    log_base: str
    coordinates: dict[str, str]
    totals: Totals = field(default_factory=Totals)
    #: the records table's file name (in the output folder; None with ``-o -``)
    records_table: str | None = None
    records_limit: int = LISTED_RECORDS
    records_truncated: bool = False
    records: list[RecordReport] = field(default_factory=list)
    skipped_records: list[SkippedReport] = field(default_factory=list)
    outputs: list[str] = field(default_factory=list)
    #: SHA-256 (hex) of every output but the report itself, by file name
    output_sha256: dict[str, str] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """The JSON document: plain dicts and lists, keys in field order."""
        return asdict(self)

    def write_json(self, handle: TextIO) -> None:
        """Write :meth:`to_dict` as ``json.dump(..., indent=2)`` would, byte for byte,
        each record converted only as it is written (a run of a million records never
        holds the whole document twice)."""
        text = json.dumps(asdict(replace(self, records=[])), indent=2)
        marker = '\n  "records": [],\n'
        cut = text.index(marker)
        handle.write(text[:cut] + '\n  "records": [')
        for i, rec in enumerate(self.records):
            body = json.dumps(asdict(rec), indent=2).replace("\n", "\n    ")
            handle.write(("," if i else "") + "\n    " + body)
        handle.write(("\n  ]" if self.records else "]") + ",\n" + text[cut + len(marker) :])
        handle.write("\n")

    @property
    def features(self) -> int:
        """Features written, over every record."""
        return self.totals.features

    @property
    def bases(self) -> int:
        """Bases annotated, over every record (the region's, with ``--region``)."""
        return self.totals.bases

    def summary(self, where: str) -> str:
        """The summary line (after ``seqstate: ``); ``where`` names the output.  For a
        gene model it counts genes and mRNAs (and the genes the filters dropped)."""
        t = self.totals
        genes = ""
        if t.genes is not None:
            dropped = sum((t.filtered_genes or {}).values())
            genes = f"{t.genes} gene(s), {t.mrnas} mRNA(s), {dropped} gene(s) filtered out, "
        return f"{t.records} record(s), {t.bases} bases, {genes}{t.features} features -> {where}"


def warn_skipped(
    fasta: str, skipped: list[SkippedReport], shown: int = 5, total: int | None = None
) -> None:
    """One warning line per skipped record (the first ``shown`` of ``total``, by default
    ``len(skipped)``; the records table has all)."""
    total = len(skipped) if total is None else total
    for sk in skipped[:shown]:
        text = f"{display_name(fasta)} line {sk.line}, record '{sk.id}'"
        log.warn(
            f"{escape_text(text)}: a header with no sequence, skipped "
            "(--empty-records error refuses such records)"
        )
    if total > shown:
        log.warn(
            f"{total - shown} more record(s) with no sequence skipped "
            "(all are listed in the records table)"
        )


def calibrated_groups(opts: AnnotateOptions, model: Model, groups: list[Group]) -> list[int]:
    """The groups whose calibrated posterior ``--calibrated-tracks`` writes (those the
    model's recalibration table has a ``posterior`` map for); checks the option."""
    if not opts.calibrated_tracks:
        return []
    recal = model.recalibration
    if recal is None:
        raise UsageError(
            f"--calibrated-tracks needs a recalibrated model; model '{model.name}' has no "
            "recalibration table (calibrate --fit-into writes one)"
        )
    if opts.tracks == "none" or opts.out_dir == STDOUT:
        raise UsageError(
            "--calibrated-tracks writes tracks: give --tracks bedgraph, bigwig or both"
        )
    return [g for g, grp in enumerate(groups) if recal.get(grp.track_name, "posterior")]


def _browser_checks(opts: AnnotateOptions, kind: str, model: str) -> tuple[str, ...]:
    """--index-outputs and --gene-formats checked; returns the gene formats in order."""
    from seqstate.io.gene_formats import parse_gene_formats

    formats = parse_gene_formats(",".join(opts.gene_formats)) if opts.gene_formats else ()
    for option, asked in (("--index-outputs", opts.index_outputs), ("--gene-formats", formats)):
        if asked and opts.out_dir == STDOUT:
            raise UsageError(f"{option} needs an output folder (not -o -)")
    if formats and kind != "genes":
        raise UsageError(f"--gene-formats writes gene structures; model '{model}' has no genes")
    if opts.index_outputs:
        indexed.require_pysam()
    return formats


def _check_gene_filters(opts: AnnotateOptions) -> None:
    """--min-cds-length and --min-gene-posterior in range (one-line usage errors)."""
    if opts.min_cds_length is not None and opts.min_cds_length < 0:
        raise UsageError(
            f"--min-cds-length {opts.min_cds_length} is negative: expected a number of "
            "coding bases, 0 or more"
        )
    mgp = opts.min_gene_posterior
    if mgp is not None and not 0.0 <= mgp <= 1.0:
        raise UsageError(f"--min-gene-posterior {mgp} is outside 0..1")


def _gene_filter(opts: AnnotateOptions, given: AnnotateOptions, kind: str, model: str) -> Any:
    """The gene filter of a gene model (None for other kinds), with a ``note:`` for each
    option that does not apply to the model's kind."""
    if kind != "genes":
        for option, value in (
            ("--min-cds-length", opts.min_cds_length),
            ("--min-gene-posterior", opts.min_gene_posterior),
        ):
            if value is not None:
                log.note(
                    f"note: {option} applies to gene models only; model '{model}' writes "
                    "segments, so it is ignored"
                )
        return None
    for option, value, instead in (
        ("--min-length", given.min_length, "--min-cds-length"),
        ("--min-posterior", given.min_posterior, "--min-gene-posterior"),
    ):
        if value is not None:
            log.note(
                f"note: {option} does not apply to gene models (model '{model}'); "
                f"it is ignored: use {instead} to filter genes"
            )
    from seqstate.kinds.genes import GeneFilter

    return GeneFilter(
        DEFAULT_MIN_CDS_LENGTH if opts.min_cds_length is None else opts.min_cds_length,
        0.0 if opts.min_gene_posterior is None else float(opts.min_gene_posterior),
    )


def _thresholds(
    min_posterior: float,
    min_length: int,
    source: dict[str, str],
    gene_filter: Any,
    given: AnnotateOptions,
) -> dict[str, Any]:
    """The run report's ``thresholds``: the segment thresholds, or a gene model's filters
    (``from``: ``option``, ``model`` or ``default``)."""
    if gene_filter is None:
        return {"min_posterior": min_posterior, "min_length": min_length, "from": source}
    return {
        "min_cds_length": gene_filter.min_cds_length,
        "min_gene_posterior": gene_filter.min_gene_posterior,
        "from": {
            "min_cds_length": "default" if given.min_cds_length is None else "option",
            "min_gene_posterior": "default" if given.min_gene_posterior is None else "option",
        },
    }


def _check_truth(opts: AnnotateOptions, model: Model, groups: list, region: Region | None) -> None:
    """Before any annotating: the ``--truth`` file is read and checked (its chosen types are
    labels, it exists), and it must have a feature on the annotated stretch: the region,
    the selected records, or a record of the FASTA."""
    from seqstate.commands.inputs import indexed_lengths
    from seqstate.commands.records import id_listing, require_shared_ids
    from seqstate.commands.truth import fasta_ids, read_truth
    from seqstate.errors import FeatureFormatError

    truth = read_truth(model, groups, opts.truth or "", opts.truth_types)
    if region is not None:
        inside = [
            f
            for f in truth.features
            if f.seqid == region.seqid and f.start0 < region.end0 and f.end0 > region.start0
        ]
        if not inside:
            shown = f"region {region.to_text()}"
            require_shared_ids(truth.path, truth.seqids, shown, [region.seqid])
            raise FeatureFormatError(
                f"no feature lies in region {region.to_text()}: nothing to calibrate on",
                path=truth.path,
            )
        return
    if opts.records is not None:
        if not set(truth.seqids) & set(opts.records):
            raise FeatureFormatError(
                f"no feature lies on the selected record(s) {id_listing(opts.records)} (the "
                f"truth's are on {id_listing(truth.seqids)}): nothing to calibrate on",
                path=truth.path,
            )
        return
    lengths = indexed_lengths(opts.input, model) if opts.input != "-" else None
    ids = fasta_ids(opts.input, lengths)
    if ids is not None:
        require_shared_ids(truth.path, truth.seqids, display_name(opts.input), ids)
