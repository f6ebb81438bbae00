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
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from seqstate import __version__, log
from seqstate.commands.inputs import read_model_records
from seqstate.commands.records import select_records
from seqstate.engine import api
from seqstate.errors import ImpossibleSequenceError, UsageError, escape_text
from seqstate.io import tracks
from seqstate.io.atomic import OutputSet, check_outputs
from seqstate.io.fasta import Record, SkippedRecord, display_name
from seqstate.io.gff3 import GFF3Writer
from seqstate.io.regions import Region, check_region, parse_region
from seqstate.io.tables import load_model, model_sha256
from seqstate.kinds import Group, Kind, RecordData, group_index, kind_of, track_groups
from seqstate.log import Progress, QuietProgress
from seqstate.model import Model, resolve_thresholds

REPORT_SCHEMA = "seqstate-run-report/1"


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
    #: --records/--records-file (issue 12): only these record IDs, kept in input order
    records: list[str] | None = None


@dataclass
class ModelSummary:
    """The model of a run, as the run report names it."""

    name: str
    sha256: str
    alphabet: str
    order: int
    states: int


@dataclass
class RecordReport:
    """One annotated record (or region of it): 1-based closed bounds and counts."""

    id: str
    length: int
    start_1based: int
    end_1based: int
    unknown_bases: int
    loglik_nat: float
    features: int


@dataclass
class SkippedReport:
    """A FASTA record skipped for having no sequence (``line`` is 1-based)."""

    id: str
    line: int
    reason: str


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
    ``option`` or the ``model``.
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
    records: list[RecordReport] = field(default_factory=list)
    skipped_records: list[SkippedReport] = field(default_factory=list)
    outputs: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """The JSON document: plain dicts and lists, keys in field order."""
        return asdict(self)

    @property
    def features(self) -> int:
        """Features written, over every record."""
        return sum(r.features for r in self.records)

    @property
    def bases(self) -> int:
        """Bases annotated, over every record (the region's, with ``--region``)."""
        return sum(r.end_1based - r.start_1based + 1 for r in self.records)

    def summary(self, where: str) -> str:
        """The summary line (after ``seqstate: ``); ``where`` names the output."""
        n = len(self.records)
        return f"{n} record(s), {self.bases} bases, {self.features} features -> {where}"


def warn_skipped(fasta: str, skipped: list[SkippedReport], shown: int = 5) -> None:
    """One warning line per skipped record (the first ``shown``; the run report has all)."""
    for sk in skipped[:shown]:
        text = f"{display_name(fasta)} line {sk.line}, record '{sk.id}'"
        log.warn(
            f"{escape_text(text)}: a header with no sequence, skipped "
            "(--empty-records error refuses such records)"
        )
    if len(skipped) > shown:
        log.warn(
            f"{len(skipped) - shown} more record(s) with no sequence skipped "
            "(all are listed in the run report)"
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
    stem: str, groups: list[Group], want_bedgraph: bool, want_bigwig: bool
) -> list[str]:
    """Every file name an annotate run writes into its output folder, in writing order."""
    names = [f"{stem}.gff3", f"{stem}.features.tsv"]
    for grp in groups:
        if want_bedgraph:
            names.append(f"{stem}.{grp.track_name}.bedgraph")
        if want_bigwig:
            names.append(f"{stem}.{grp.track_name}.bw")
    return names + [f"{stem}.run.json"]


def annotate(
    opts: AnnotateOptions, *, progress: Progress | None = None, stdout: TextIO | None = None
) -> AnnotateReport:
    """Run the main job; returns the run report (also written as JSON).

    ``opts.out_dir`` ``"-"`` writes only the GFF3, to ``stdout`` (default
    ``sys.stdout``), once every record is done; otherwise the outputs go into the
    folder and follow :func:`seqstate.io.atomic.check_outputs` (``opts.force``).
    ``progress`` (default: quiet) is told the bases done.
    """
    if not opts.out_dir:
        raise UsageError("-o/--out is empty: expected a folder name, or '-' for stdout")
    if opts.region is not None and not opts.region.strip():
        raise UsageError("--region is empty: expected ID:START-END or ID")
    to_stdout = opts.out_dir == STDOUT
    if to_stdout and opts.tracks != "none":
        raise UsageError(
            f"-o - writes only the GFF3 to standard output; --tracks {opts.tracks} needs an "
            "output folder"
        )
    if opts.stem is not None:
        check_stem(opts.stem)
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
    tables = api.prepare(model)
    groups = track_groups(model)
    if not groups:
        raise UsageError(f"model '{model.name}' has no labelled states: nothing to annotate")
    skipped: list[SkippedRecord] = []
    records = read_model_records(
        opts.input, model, empty_records=opts.empty_records, skipped=skipped
    )
    # -- record selection hook (issue 12, seqstate/commands/records.py) --
    if opts.records is not None:
        records, skipped[:] = select_records(records, skipped, opts.records, opts.input)
        if opts.region is not None:
            raise UsageError("--records cannot be combined with --region (a region names one)")
    # -- end of the record selection hook --
    lengths = {r.id: len(r.seq) for r in records}
    region: Region | None = None
    if opts.region is not None:
        region = check_region(parse_region(opts.region), lengths)
        records = [r for r in records if r.id == region.seqid]
    spans = []
    for rec in records:
        if region is not None:
            spans.append((rec, region.start0, region.end0))
        else:
            spans.append((rec, 0, len(rec.seq)))
    stem = opts.stem if opts.stem is not None else input_stem(opts.input, region)
    want_bedgraph = opts.tracks in ("bedgraph", "both")
    want_bigwig = opts.tracks in ("bigwig", "both")
    if want_bigwig:
        tracks.require_bigwig()
    if not to_stdout:
        names = output_names(stem, groups, want_bedgraph, want_bigwig)
        check_outputs([Path(opts.out_dir) / n for n in names], [opts.input], force=opts.force)
    options = {k: v for k, v in asdict(given).items() if k != "command_line"}
    options["decode"] = decode
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
        thresholds={"min_posterior": min_posterior, "min_length": min_length, "from": source},
        log_base="natural log (ln)",
        coordinates=dict(COORDINATES),
        skipped_records=[SkippedReport(sk.id, sk.line0 + 1, sk.reason) for sk in skipped],
    )
    progress = progress or QuietProgress()
    progress.start(sum(e - s for _, s, e in spans))
    run = _Run(
        opts,
        model,
        kind_of(model),
        decode,
        min_posterior,
        min_length,
        tables,
        groups,
        group_index(model, groups),
        spans,
        stem,
        progress,
    )
    try:
        return run.write(report, want_bedgraph, want_bigwig, stdout)
    except ImpossibleSequenceError as exc:
        raise ImpossibleSequenceError(exc.message, path=opts.input) from None


@dataclass
class _Run:
    """One annotate run after its checks: what the record loop needs."""

    opts: AnnotateOptions
    model: Model
    kind: Kind
    decode: str
    min_posterior: float
    min_length: int
    tables: api.EngineTables
    groups: list[Group]
    state_group: np.ndarray
    spans: list[tuple[Record, int, int]]
    stem: str
    progress: Progress

    def write(
        self,
        report: AnnotateReport,
        want_bedgraph: bool,
        want_bigwig: bool,
        stdout: TextIO | None = None,
    ) -> AnnotateReport:
        """Every record through the engine and the kind, into one output set."""
        opts, model, groups, stem, spans = self.opts, self.model, self.groups, self.stem, self.spans
        to_stdout = opts.out_dir == STDOUT
        out_dir = None if to_stdout else opts.out_dir  # nothing is staged with -o -
        with OutputSet(out_dir, force=opts.force, inputs=[opts.input]) as outs:
            gff_name = f"{stem}.gff3"
            tsv_name = f"{stem}.features.tsv"
            tsv: TextIO
            if to_stdout:
                gff_text = io.StringIO()
                gff = GFF3Writer(gff_text)
                tsv = io.StringIO()  # the feature table is not written with -o -
            else:
                gff = GFF3Writer(outs.open_text(gff_name))
                tsv = outs.open_text(tsv_name)
            gff.header([(rec.id, s + 1, e) for rec, s, e in spans])
            tsv.write("\t".join(self.kind.feature_columns(groups)) + "\n")
            bedgraphs = []
            bigwigs = []
            names = [gff_name, tsv_name]
            for grp in groups:
                desc = f"posterior of {grp.label}" + (
                    f" ({grp.strand} strand)" if grp.strand else ""
                )
                desc += f" under model {model.name}"
                if want_bedgraph:
                    name = f"{stem}.{grp.track_name}.bedgraph"
                    names.append(name)
                    bedgraphs.append(
                        tracks.BedGraphTrack(
                            outs.open_text(name), grp.track_name, desc, opts.precision
                        )
                    )
                if want_bigwig:
                    name = f"{stem}.{grp.track_name}.bw"
                    names.append(name)
                    bigwigs.append(
                        tracks.BigWigTrack(
                            outs.path(name),
                            [(rec.id, len(rec.seq)) for rec, _, _ in spans],
                            opts.precision,
                        )
                    )
            for rec, s0, e0 in spans:
                report.records.append(self.record(rec, s0, e0, gff, tsv, bedgraphs, bigwigs))
            for bw in bigwigs:
                bw.close()
            if not to_stdout:
                report.outputs = sorted(names + [f"{stem}.run.json"])
                with outs.open_text(f"{stem}.run.json") as fh:
                    json.dump(report.to_dict(), fh, indent=2, sort_keys=False)
                    fh.write("\n")
        self.progress.finish()
        if to_stdout:
            (stdout or sys.stdout).write(gff_text.getvalue())
        return report

    def record(
        self,
        rec: Record,
        s0: int,
        e0: int,
        gff: GFF3Writer,
        tsv: TextIO,
        bedgraphs: list[tracks.BedGraphTrack],
        bigwigs: list[tracks.BigWigTrack],
    ) -> RecordReport:
        """One record (bases ``s0 .. e0-1``): posterior, the kind's features, tracks."""
        opts, tables, groups = self.opts, self.tables, self.groups
        seq = rec.seq[s0:e0]
        sym = api.symbols_of(tables, seq, masked_unknown=(opts.masked == "unknown"))
        codes = api.encode_symbols(tables, sym)
        unknown = int(np.count_nonzero(sym < 0))
        state_group = self.state_group
        post = api.posterior(tables, codes, group=state_group, n_groups=len(groups), record=rec.id)
        self.progress.advance((e0 - s0) // 2, rec.id)
        data = RecordData(
            model=self.model,
            tables=tables,
            groups=groups,
            state_group=state_group,
            seqid=rec.id,
            offset0=s0,
            seq=seq,
            codes=codes,
            symbols=sym,
            post=post,
            decode=self.decode,
            min_posterior=self.min_posterior,
            min_length=self.min_length,
            split_unknown=opts.split_unknown,
        )
        n_feat = self.kind.write_record(data, gff, tsv)
        del data
        for g in range(len(groups)):
            values = post.values[:, g]
            if bedgraphs:
                bedgraphs[g].add(rec.id, values, s0)
            if bigwigs:
                bigwigs[g].add(rec.id, values, s0)
        self.progress.advance((e0 - s0) - (e0 - s0) // 2, rec.id)
        return RecordReport(rec.id, len(rec.seq), s0 + 1, e0, unknown, post.loglik, n_feat)
