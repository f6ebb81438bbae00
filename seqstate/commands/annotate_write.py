"""The output set of an annotate run: the files opened and staged, the records streamed
through the runner, the records table, the run report JSON and the ``--report`` page (with,
against ``--truth``, its calibration figure and accuracy).
"""

from __future__ import annotations

import io
import sys
from collections.abc import Iterator, Sequence
from pathlib import Path
from types import SimpleNamespace
from typing import Any, TextIO, cast

from seqstate.commands import annotate_run
from seqstate.commands.annotate_names import CALIBRATED_TRACK, STDOUT
from seqstate.commands.annotate_options import AnnotateOptions, AnnotateReport
from seqstate.commands.annotate_run import Item, OutputWriter, Runner
from seqstate.commands.inputs import alphabet_check_of, read_set
from seqstate.commands.provenance import gff3_provenance
from seqstate.commands.records import select_records
from seqstate.commands.records_table import (
    TABLE_SUFFIX,
    RecordReport,
    RecordsLog,
    SkippedReport,
)
from seqstate.commands.runreport import output_checksums
from seqstate.io import indexed, tracks
from seqstate.io.atomic import OutputSet
from seqstate.io.fasta import SequenceRecord, SkippedRecord, display_name, iter_sequences
from seqstate.io.tsvtext import tsv_row
from seqstate.model import Model


def gff_provenance(report: AnnotateReport) -> str:
    """The ``#`` lines of an annotate GFF3 after its header: tool and version, model name
    and checksum (no time, no path: the same run gives the same bytes)."""
    return gff3_provenance(report.model.name, report.model.sha256)


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
