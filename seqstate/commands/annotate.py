"""``seqstate annotate``: read -> encode -> engine -> the model's kind -> write.

Nothing here parses options or prints to the terminal except through the
:class:`~seqstate.log.Progress` it is handed; errors are raised as
:class:`~seqstate.errors.SeqstateError` subclasses for the CLI to report.  What
features a record gives, and the columns of the feature table, are the model's
kind's business (:func:`seqstate.kinds.kind_of`).
"""

from __future__ import annotations

import io
import json
import re
import sys
from collections.abc import Iterator, Sequence
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from types import SimpleNamespace
from typing import Any, TextIO, cast

from seqstate import __version__, log
from seqstate.commands import annotate_run
from seqstate.commands.annotate_run import Item, OutputWriter, Runner
from seqstate.commands.inputs import alphabet_check_of, read_set
from seqstate.commands.masking import check_masked, prepare_masked
from seqstate.commands.provenance import gff3_provenance
from seqstate.commands.records import select_records
from seqstate.commands.records_table import (
    LISTED_RECORDS,
    TABLE_SUFFIX,
    RecordReport,
    RecordsLog,
    SkippedReport,
    Totals,
)
from seqstate.commands.runreport import output_checksums
from seqstate.engine import jitcache
from seqstate.errors import ImpossibleSequenceError, UsageError, escape_text
from seqstate.io import indexed, tracks
from seqstate.io.atomic import OutputSet, check_outputs
from seqstate.io.fasta import SequenceRecord, SkippedRecord, display_name, iter_sequences
from seqstate.io.regions import Region, check_region, parse_region
from seqstate.io.tables import load_model, model_sha256
from seqstate.io.tsvtext import tsv_row
from seqstate.kinds import Group, group_index, kind_of, track_groups
from seqstate.log import Progress, QuietProgress
from seqstate.model import Model, resolve_thresholds
from seqstate.model.recalibration import Map

#: Version 2: ``totals``, the records table (``records_table``, every record) and
#: ``records`` / ``skipped_records`` cut to the first ``records_limit`` entries.
REPORT_SCHEMA = "seqstate-run-report/2"

__all__ = [
    "LISTED_RECORDS",
    "REPORT_SCHEMA",
    "AnnotateOptions",
    "AnnotateReport",
    "RecordReport",
    "SkippedReport",
    "Totals",
    "annotate",
]

#: Default ``--min-cds-length`` (coding bases per mRNA, stop codon included): of the
#: RefSeq mRNAs of D. melanogaster chr 4 none has fewer, of A. thaliana chr 1
#: 1-15,000,000 6 of 6,442 (0.09 %) (``benchmarks/cds_lengths.py``; README).
DEFAULT_MIN_CDS_LENGTH = 90
#: Default cds / proteins file names (``--cds`` / ``--proteins`` without a name).
CDS_SUFFIX = ".cds.fna"
PROTEINS_SUFFIX = ".proteins.faa"


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


#: ``out_dir`` that sends the GFF3 to standard output (no tracks, no other files).
STDOUT = "-"


def input_stem(path: str, region: Region | None = None) -> str:
    """File-name stem used for outputs: ``asm.fa.gz`` -> ``asm``; stdin -> ``stdin``.

    With a region the stem carries it, 1-based inclusive: ``asm.chr4_1001-2000``
    (characters of the record ID outside ``A-Z a-z 0-9 . _ + -`` become ``_``),
    so runs on different regions write different files.
    """
    if path == "-":
        name = "stdin"
    else:
        name = Path(path).name
        name = re.sub(r"\.(gz|bgz)$", "", name)
        name = re.sub(r"\.(fa|fasta|fna|fas|seq|txt)$", "", name, flags=re.IGNORECASE)
        name = name or "input"
    if region is not None:
        seqid = re.sub(r"[^A-Za-z0-9._+-]", "_", region.seqid)
        name += f".{seqid}_{region.start0 + 1}-{region.end0}"
    return name


def feature_id_stem(region: Region) -> str:
    """What feature IDs of a ``--region`` run start with: ``ID:START-END``, 1-based
    closed (``chr4:1001-2000.gene.3``), so runs on different stretches of a record
    never share an ID, and concatenating their GFF3s keeps every ID unique."""
    return region.to_text()


def check_stem(stem: str) -> str:
    """A ``--stem`` value: a plain file-name part, no folder, no whitespace or control chars."""
    if (
        not stem
        or stem in (".", "..")
        or "/" in stem
        or "\\" in stem
        or any(ch.isspace() or ord(ch) < 0x20 or ord(ch) == 0x7F for ch in stem)
    ):
        raise UsageError(
            f"--stem {stem!r} must be a plain file-name part (no folder, no spaces or "
            "control characters)"
        )
    return stem


def output_names(
    stem: str,
    groups: list[Group],
    want_bedgraph: bool,
    want_bigwig: bool,
    calibrated: Sequence[int] = (),
) -> list[str]:
    """Every file name an annotate run writes into its output folder, in writing order;
    ``calibrated``: the groups whose calibrated posterior is also written."""
    names = [f"{stem}.gff3", f"{stem}.features.tsv", f"{stem}{TABLE_SUFFIX}"]
    for grp in groups:
        if want_bedgraph:
            names.append(f"{stem}.{grp.track_name}.bedgraph")
        if want_bigwig:
            names.append(f"{stem}.{grp.track_name}.bw")
    for g in calibrated:
        if want_bedgraph:
            names.append(f"{stem}.{groups[g].track_name}{CALIBRATED_TRACK}.bedgraph")
        if want_bigwig:
            names.append(f"{stem}.{groups[g].track_name}{CALIBRATED_TRACK}.bw")
    return names + [f"{stem}.run.json"]


#: Part of a calibrated track's file name after the track name.
CALIBRATED_TRACK = ".calibrated"


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


def annotate(
    opts: AnnotateOptions, *, progress: Progress | None = None, stdout: TextIO | None = None
) -> AnnotateReport:
    """Run the main job; returns the run report (also written as JSON).

    ``opts.out_dir`` ``"-"`` writes only the GFF3, to ``stdout`` (default
    ``sys.stdout``), once every record is done; otherwise the outputs go into the
    folder and follow :func:`seqstate.io.atomic.check_outputs` (``opts.force``).
    ``progress`` (default: quiet) is told the bases done.  Records are streamed
    (:mod:`seqstate.commands.annotate_run`); ``opts.jobs`` threads share the work.
    """
    if not opts.out_dir:
        raise UsageError("-o/--out is empty: expected a folder name, or '-' for stdout")
    if opts.region is not None and not opts.region.strip():
        raise UsageError("--region is empty: expected ID:START-END or ID")
    check_masked(opts.masked)
    to_stdout = opts.out_dir == STDOUT
    if to_stdout and opts.tracks != "none":
        raise UsageError(
            f"-o - writes only the GFF3 to standard output; --tracks {opts.tracks} needs an "
            "output folder"
        )
    if opts.stem is not None:
        check_stem(opts.stem)
    if opts.records is not None and opts.region is not None:
        raise UsageError("--records cannot be combined with --region (a region names one)")
    for option, name in (("--cds", opts.cds), ("--proteins", opts.proteins)):
        if name is not None:
            if to_stdout:
                raise UsageError(f"{option} needs an output folder (not -o -)")
            if name:  # "" asks for the default name (STEM.cds.fna, STEM.proteins.faa)
                check_stem(name)  # a plain file name: written inside the output folder
    _check_gene_filters(opts)
    if opts.report is not None:
        if to_stdout:
            raise UsageError("--report needs an output folder (not -o -)")
        check_stem(opts.report)
    if opts.truth is not None and opts.report is None:
        raise UsageError("--truth gives the calibration figure of --report: give --report too")
    if opts.truth_types and opts.truth is None:
        raise UsageError("--truth-type chooses the features of --truth: give --truth too")
    extras = [n for n in (opts.cds, opts.proteins, opts.report) if n]
    if len(set(extras)) < len(extras):
        raise UsageError("--cds, --proteins and --report must name different files")
    jobs, jobs_note = annotate_run.resolve_jobs(opts.jobs)
    model = load_model(opts.model)
    decode = opts.decode or model.decode
    if decode not in ("posterior", "viterbi"):
        raise UsageError(f"decode '{decode}' is not posterior or viterbi")
    given = opts
    min_posterior, min_length, source = resolve_thresholds(
        model, opts.min_posterior, opts.min_length
    )
    opts = replace(opts, min_posterior=min_posterior, min_length=min_length)
    if not 0.0 <= min_posterior <= 1.0:
        raise UsageError(f"--min-posterior {min_posterior} is outside 0..1")
    if min_length < 1:
        raise UsageError(f"--min-length {min_length} must be at least 1")
    if opts.split_unknown < 1:
        raise UsageError(f"--split-unknown {opts.split_unknown} must be at least 1")
    tables = prepare_masked(model, opts.masked)
    groups = track_groups(model)
    if not groups:
        raise UsageError(f"model '{model.name}' has no labelled states: nothing to annotate")
    kind = kind_of(model)
    if (opts.cds is not None or opts.proteins is not None) and kind.name != "genes":
        raise UsageError(
            f"--cds and --proteins need a gene model; model '{model.name}' has no genes"
        )
    gene_filter = _gene_filter(opts, given, kind.name, model.name)
    opts = replace(opts, gene_formats=_browser_checks(opts, kind.name, model.name))
    if opts.cds is not None or opts.proteins is not None:
        from seqstate.io.cds import check_table

        check_table(opts.translation_table)
    want_bedgraph = opts.tracks in ("bedgraph", "both")
    want_bigwig = opts.tracks in ("bigwig", "both")
    if want_bigwig:
        tracks.require_bigwig()
    skipped: list[SkippedRecord] = []
    long_above = annotate_run.long_threshold(model, kind, groups)
    region: Region | None = None
    region_item: Item | None = None
    if opts.region is not None:
        region, region_item = _region_item(
            opts, model, parse_region(opts.region), long_above, skipped
        )
    if opts.truth is not None:
        _check_truth(opts, model, groups, region)
    stem = opts.stem if opts.stem is not None else input_stem(opts.input, region)
    opts = replace(
        opts,
        cds=f"{stem}{CDS_SUFFIX}" if opts.cds == "" else opts.cds,
        proteins=f"{stem}{PROTEINS_SUFFIX}" if opts.proteins == "" else opts.proteins,
    )
    extras = [n for n in (opts.cds, opts.proteins, opts.report) if n is not None]
    if len(set(extras)) < len(extras):
        raise UsageError("--cds, --proteins and --report must name different files")
    cal_groups = calibrated_groups(opts, model, groups)
    if not to_stdout:
        names = output_names(stem, groups, want_bedgraph, want_bigwig, cal_groups)
        names += [n for n in (opts.cds, opts.proteins, opts.report) if n is not None]
        names += indexed.browser_names(stem, names, opts.index_outputs, opts.gene_formats)
        reads = read_set(
            fasta=opts.input, model=opts.model, files=[opts.truth], records=opts.records
        )
        check_outputs([Path(opts.out_dir) / n for n in names], reads, force=opts.force)
    if jobs_note:
        log.note(jobs_note)
    options = {
        k: list(v) if isinstance(v, tuple) else v  # as JSON reads it back
        for k, v in asdict(given).items()
        if k not in ("command_line", "jobs")
        and not (k in ("calibrated_tracks", "index_outputs", "gene_formats") and not v)
    }
    options["decode"] = decode
    options["cds"], options["proteins"] = opts.cds, opts.proteins  # the names written
    report = AnnotateReport(
        schema=REPORT_SCHEMA,
        tool="seqstate",
        version=__version__,
        command_line=list(opts.command_line),
        model=ModelSummary(
            model.name, model_sha256(model), model.alphabet, model.order, model.n_states
        ),
        options=options,
        decode=decode,
        thresholds=_thresholds(min_posterior, min_length, source, gene_filter, given),
        log_base="natural log (ln)",
        coordinates=dict(COORDINATES),
    )
    progress = progress or QuietProgress()
    if not isinstance(progress, QuietProgress) and not jitcache.kernels_cached(
        ("kernels", tables.kernels)
    ):
        log.note(
            "note: compiling the engine's kernels for this machine (first run only, up to a "
            "minute; later runs reuse them)"
        )
    runner = Runner(
        model=model,
        kind=kind,
        tables=tables,
        groups=groups,
        state_group=group_index(model, groups),
        decode=decode,
        min_posterior=min_posterior,
        min_length=min_length,
        split_unknown=opts.split_unknown,
        masked_unknown=opts.masked == "unknown",
        precision=opts.precision,
        jobs=jobs,
        progress=progress,
        check_symbols=annotate_run.symbol_checker(model, opts.input),
        want_bedgraph=want_bedgraph,
        want_bigwig=want_bigwig,
        want_cds=opts.cds is not None,
        want_proteins=opts.proteins is not None,
        translation_table=opts.translation_table,
        gene_filter=gene_filter,
        calibrated=[(g, recal_map(model, groups[g].track_name)) for g in cal_groups],
    )
    try:
        _write(opts, model, runner, report, stem, region_item, skipped, long_above, stdout)
    except ImpossibleSequenceError as exc:
        raise ImpossibleSequenceError(exc.message, path=opts.input) from None
    return report


def _region_item(
    opts: AnnotateOptions,
    model: Model,
    region: Region,
    long_above: int,
    skipped: list[SkippedRecord],
) -> tuple[Region, Item]:
    """The region resolved, and its bases: read through the FASTA index when the file has
    one (or can be given one), else found by streaming the records (every record is still
    read and checked; only the region's record is kept)."""
    from seqstate.io import faidx

    check = alphabet_check_of(model)
    lengths = faidx.record_lengths(opts.input)
    if lengths is not None:
        region = check_region(region, lengths)
        found = faidx.region_record(opts.input, region, alphabet_check=check)
        if found is not None:
            seq = found.seq
            start0 = region.start0

            def read(a: int, b: int) -> bytes:
                return seq[a - start0 : b - start0]

            bases = region.end0 - region.start0
            length = lengths[region.seqid]
            return region, Item(
                found.id,
                length,
                start0,
                region.end0,
                read,
                lambda: None,
                bases > long_above,
                feature_id_stem(region),
            )
    seen: dict[str, int] = {}
    kept: SequenceRecord | None = None
    records = iter_sequences(
        opts.input,
        alphabet_check=check,
        empty_records=opts.empty_records,
        skipped=skipped,
        spill_above=long_above,
    )
    try:
        for rec in records:
            seen[rec.id] = rec.length
            if rec.id == region.seqid and kept is None:
                kept = rec
            else:
                rec.source.close()
    except BaseException:
        if kept is not None:
            kept.source.close()
        raise
    finally:
        _close(records)
    region = check_region(region, seen)  # no such record / outside it: the usual errors
    assert kept is not None
    bases = region.end0 - region.start0
    item = Item(
        kept.id,
        kept.length,
        region.start0,
        region.end0,
        kept.read,
        kept.source.close,
        bases > long_above,
        feature_id_stem(region),
    )
    return region, item


def gff_provenance(report: AnnotateReport) -> str:
    """The ``#`` lines of an annotate GFF3 after its header: tool and version, model name
    and checksum (no time, no path: the same run gives the same bytes)."""
    return gff3_provenance(report.model.name, report.model.sha256)


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


def _gene_counts(counts: dict[str, int]) -> dict[str, Any]:
    """The gene fields of a :class:`RecordReport` from a kind's counts (empty for a
    kind that counts no genes)."""
    from seqstate.kinds import genes

    if genes.COUNT_GENES not in counts:
        return {}
    return {
        "genes": counts[genes.COUNT_GENES],
        "mrnas": counts[genes.COUNT_MRNAS],
        "filtered_genes": {
            "min_cds_length": counts[genes.FILTERED_CDS_LENGTH],
            "min_gene_posterior": counts[genes.FILTERED_GENE_POSTERIOR],
        },
    }


def _stream_items(
    opts: AnnotateOptions,
    model: Model,
    skipped: list[SkippedRecord],
    long_above: int,
    scratch: Path | None,
) -> Iterator[Item]:
    """The records of the FASTA, one at a time, as items to annotate (a long record's
    bases spilled into ``scratch`` while it is read).

    Each item carries the records skipped just before it (``skipped_before``, taken
    out of ``skipped``, so the list never holds more than the records between two
    annotated ones); when the FASTA ends, ``skipped`` holds the ones after the last.
    With ``opts.records`` only the selected records and skipped records are kept.
    """
    check = alphabet_check_of(model)
    records = iter_sequences(
        opts.input,
        alphabet_check=check,
        empty_records=opts.empty_records,
        skipped=skipped,
        spill_above=long_above,
        spill_dir=scratch,
    )
    want = None if opts.records is None else set(opts.records)
    found: set[str] = set()  # the selected IDs the FASTA has (records or skipped)

    def take() -> list[SkippedRecord]:
        new = [sk for sk in skipped if want is None or sk.id in want]
        if want is not None:
            found.update(sk.id for sk in new)
        del skipped[:]
        return new

    try:
        for rec in records:
            if want is not None:
                if rec.id not in want:
                    rec.source.close()
                    continue
                found.add(rec.id)
            long = rec.length > long_above
            item = Item(rec.id, rec.length, 0, rec.length, rec.read, rec.source.close, long)
            item.skipped_before = take()
            yield item
    finally:
        _close(records)
    skipped[:] = take()
    if opts.records is not None:
        # an ID the FASTA lacks is an error (the run's outputs are then discarded)
        known = [SimpleNamespace(id=rid) for rid in opts.records if rid in found]
        select_records(known, [], opts.records, opts.input)


def _write(
    opts: AnnotateOptions,
    model: Model,
    runner: Runner,
    report: AnnotateReport,
    stem: str,
    region_item: Item | None,
    skipped: list[SkippedRecord],
    long_above: int,
    stdout: TextIO | None,
) -> None:
    """The output set of the run: every record through the runner, then the run report."""
    to_stdout = opts.out_dir == STDOUT
    runner.progress.start(_known_total(opts.input, region_item, opts.records))
    try:
        text = _write_set(opts, model, runner, report, stem, region_item, skipped, long_above)
    finally:
        runner.progress.finish()  # stops its ticker on errors and signals too
    if to_stdout and text is not None:
        (stdout or sys.stdout).write(text)


def _write_set(
    opts: AnnotateOptions,
    model: Model,
    runner: Runner,
    report: AnnotateReport,
    stem: str,
    region_item: Item | None,
    skipped: list[SkippedRecord],
    long_above: int,
) -> str | None:
    """The output set itself; returns the GFF3 text with ``-o -`` (else None)."""
    to_stdout = opts.out_dir == STDOUT
    groups = runner.groups
    out_dir = None if to_stdout else opts.out_dir  # nothing is staged with -o -
    reads = read_set(fasta=opts.input, model=opts.model, files=[opts.truth], records=opts.records)
    with OutputSet(out_dir, force=opts.force, inputs=reads) as outs:
        scratch = None if to_stdout else outs.scratch_dir()
        if not to_stdout:  # with --force, the earlier run's whole set is replaced
            outs.replaces_set_of(f"{stem}.run.json")
        gff_name = f"{stem}.gff3"
        tsv_name = f"{stem}.features.tsv"
        table_name = f"{stem}{TABLE_SUFFIX}"
        names = [gff_name, tsv_name]
        if to_stdout:
            gff_target: TextIO = sys.stdout
            tsv: TextIO = io.StringIO()  # the feature table is not written with -o -
            table = RecordsLog(None)  # nor the records table
        else:
            gff_target = outs.open_text(gff_name)
            tsv = outs.open_text(tsv_name)
            table = RecordsLog(outs.open_text(table_name))
            names.append(table_name)
        if opts.report is not None:
            tsv = cast(TextIO, _Tee(tsv))
        tsv.write(tsv_row(runner.kind.feature_columns(groups, model.recalibration is not None)))
        bedgraphs = []
        handles = []
        bigwig_paths = []
        for grp in groups:
            desc = f"posterior of {grp.label}" + (f" ({grp.strand} strand)" if grp.strand else "")
            desc += f" under model {model.name}"
            if runner.want_bedgraph:
                name = f"{stem}.{grp.track_name}.bedgraph"
                names.append(name)
                handle = outs.open_text(name)
                handles.append(handle)
                bedgraphs.append(tracks.BedGraphTrack(handle, grp.track_name, desc, opts.precision))
            if runner.want_bigwig:
                name = f"{stem}.{grp.track_name}.bw"
                names.append(name)
                bigwig_paths.append(outs.path(name))
        for g, _ in runner.calibrated:
            grp = groups[g]
            desc = f"calibrated posterior of {grp.label}" + (
                f" ({grp.strand} strand)" if grp.strand else ""
            )
            desc += f" under model {model.name} (its recalibration table)"
            track = f"{grp.track_name}{CALIBRATED_TRACK}"
            if runner.want_bedgraph:
                name = f"{stem}.{track}.bedgraph"
                names.append(name)
                handle = outs.open_text(name)
                handles.append(handle)
                bedgraphs.append(tracks.BedGraphTrack(handle, track, desc, opts.precision))
            if runner.want_bigwig:
                name = f"{stem}.{track}.bw"
                names.append(name)
                bigwig_paths.append(outs.path(name))
        writer = OutputWriter(
            gff_target,
            scratch,
            tsv,
            bedgraphs,
            handles,
            bigwig_paths,
            opts.precision,
            gff_comments=gff_provenance(report),
        )
        names += [extra for extra in (opts.cds, opts.proteins, opts.report) if extra is not None]
        writer.cds = outs.open_text(opts.cds) if opts.cds is not None else None
        writer.proteins = outs.open_text(opts.proteins) if opts.proteins is not None else None
        try:
            if region_item is not None:
                items: Iterator[Item] = iter([region_item])
            else:
                items = _stream_items(opts, model, skipped, long_above, scratch)
            runner.run(items, writer, lambda item, out: _log_record(table, item, out))
            for sk in skipped:  # after the last record (a --region run: every one)
                table.add_skipped(SkippedReport(sk.id, sk.line0 + 1, sk.reason))
            del skipped[:]
            text = writer.finish()
        except BaseException:
            writer.abandon()
            raise
        report.totals = table.totals
        report.records = table.records
        report.skipped_records = table.skipped
        report.records_limit = table.limit
        report.records_truncated = table.truncated
        if not to_stdout:
            names += indexed.write_browser_outputs(
                outs,
                stem,
                gff_target,
                handles,
                index=opts.index_outputs,
                gene_formats=opts.gene_formats,
            )
            report.records_table = table_name
            report.outputs = sorted(names + [f"{stem}.run.json"])
            if opts.report is not None and isinstance(tsv, _Tee):
                with outs.open_text(opts.report) as fh:
                    _write_html(fh, opts, report, tsv.text(), gff_target)
            for written in (gff_target, tsv, table.handle, *handles, writer.cds, writer.proteins):
                if written is not None:
                    written.flush()  # every output but the report is staged in gff_target's folder
            report.output_sha256 = output_checksums(Path(gff_target.name).parent, names)
            with outs.open_text(f"{stem}.run.json") as fh:
                report.write_json(fh)
    return text


def _log_record(table: RecordsLog, item: Item, out: annotate_run.RecordOutput) -> None:
    """One record done: the rows of the records skipped before it, then its own."""
    for sk in item.skipped_before:
        table.add_skipped(SkippedReport(sk.id, sk.line0 + 1, sk.reason))
    table.add_record(
        RecordReport(
            out.id,
            out.length,
            out.start0 + 1,
            out.end0,
            out.unknown,
            out.loglik,
            out.features,
            **_gene_counts(out.counts),
        )
    )


def _known_total(path: str, region_item: Item | None, records: Sequence[str] | None = None) -> int:
    """Bases the run will annotate when known before reading (a region, or an existing
    FASTA index: the selected ``records`` only, when given); 0 when not."""
    if region_item is not None:
        return region_item.bases
    if path == "-" or not Path(path + ".fai").is_file():
        return 0
    try:
        from seqstate.io import faidx

        lengths = faidx.record_lengths(path)
    except Exception:  # the index is checked properly when it is used
        return 0
    if not lengths:
        return 0
    if records is not None:
        wanted = set(records)
        return sum(n for rid, n in lengths.items() if rid in wanted)
    return sum(lengths.values())


def _close(records: Iterator[SequenceRecord]) -> None:
    """Close a record generator early (its spill files go with it)."""
    close = getattr(records, "close", None)
    if close is not None:
        close()


class _Tee:
    """A text output that also keeps what was written (the feature table, for --report)."""

    def __init__(self, handle: TextIO) -> None:
        self._handle = handle
        self._parts: list[str] = []

    def write(self, text: str) -> int:
        self._parts.append(text)
        return self._handle.write(text)

    def flush(self) -> None:
        self._handle.flush()

    def text(self) -> str:
        return "".join(self._parts)


def _write_html(
    handle: TextIO, opts: AnnotateOptions, report: AnnotateReport, tsv: str, gff: TextIO
) -> None:
    """The HTML page of the run: summary, figures, top features (and, against ``--truth``,
    the calibration figure and the accuracy of ``seqstate compare`` of the staged ``gff``)."""
    import csv

    from seqstate.io.html_report import build_report_figures, calibration_svg, write_html_report

    rows = list(csv.DictReader(io.StringIO(tsv), delimiter="\t"))
    doc = report.to_dict()
    figures = build_report_figures(rows, doc["records"])
    calibration = accuracy = truth = None
    if opts.truth is not None:
        from seqstate.commands.calibrate import (
            CalibrateOptions,
            calibrate,
            reliability_figure,
        )

        calibration = calibrate(
            CalibrateOptions(
                opts.model,
                fasta=opts.input,
                truth=opts.truth,
                types=tuple(opts.truth_types),
                region=opts.region,
                record_ids=opts.records,
                in_sample=True,  # the page marks it in-sample rather than failing late
            )
        )
        truth = display_name(opts.truth)
        figures["calibration"] = calibration_svg(reliability_figure(calibration), truth)
        gff.flush()
        accuracy = _truth_accuracy(gff.name, opts.truth, opts.region, rows)
    write_html_report(handle, doc, rows, figures, calibration, truth_name=truth, accuracy=accuracy)


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


def _truth_accuracy(gff: str, truth: str, region: str | None, rows: list) -> dict:
    """``seqstate compare`` of this run's GFF3 against the truth (CDS for gene models, else
    the run's feature type), or ``{"error": text}`` when the files cannot be compared."""
    from seqstate.commands.compare import compare_files
    from seqstate.errors import SeqstateError

    types = {r["type"] for r in rows}
    ftype = "CDS" if "CDS" in types else (min(types) if len(types) == 1 else None)
    try:
        return compare_files(gff, truth, ftype, region)
    except SeqstateError as exc:
        return {"error": f"no accuracy: {exc}".replace(gff, "this run's GFF3")}


def recal_map(model: Model, track: str) -> Map:
    """The posterior map of ``track`` in ``model``'s recalibration table."""
    assert model.recalibration is not None
    m = model.recalibration.get(track, "posterior")
    assert m is not None
    return m
