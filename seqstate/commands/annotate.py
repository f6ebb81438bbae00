"""``seqstate annotate``: read -> encode -> engine -> the model's kind -> write.

Nothing here parses options or prints to the terminal except through the
:class:`~seqstate.log.Progress` it is handed; errors are raised as
:class:`~seqstate.errors.SeqstateError` subclasses for the CLI to report.  What
features a record gives, and the columns of the feature table, are the model's
kind's business (:func:`seqstate.kinds.kind_of`).

This module holds the run: options checked against the model, the outputs checked before
any work, the runner set up, and ``--region`` resolved.  The options and run report are in
``annotate_options.py``, the output names in ``annotate_names.py``, the writing of the
output set in ``annotate_write.py``, the record loop in ``annotate_run.py``; their public
names are re-exported here.
"""

from __future__ import annotations

import sys
from dataclasses import asdict, replace
from pathlib import Path
from typing import TextIO

from seqstate import __version__, log
from seqstate.commands import annotate_run
from seqstate.commands.annotate_names import (
    CALIBRATED_TRACK,
    CDS_SUFFIX,
    PROTEINS_SUFFIX,
    STDOUT,
    check_stem,
    feature_id_stem,
    input_stem,
    output_names,
)
from seqstate.commands.annotate_options import (
    COORDINATES,
    DEFAULT_MIN_CDS_LENGTH,
    REPORT_SCHEMA,
    AnnotateOptions,
    AnnotateReport,
    ModelSummary,
    _browser_checks,
    _check_gene_filters,
    _check_truth,
    _gene_filter,
    _thresholds,
    calibrated_groups,
    warn_skipped,
)
from seqstate.commands.annotate_run import Item, Runner
from seqstate.commands.annotate_write import _close, _known_total, _write_set, gff_provenance
from seqstate.commands.inputs import alphabet_check_of, read_set
from seqstate.commands.masking import check_masked, prepare_masked
from seqstate.commands.records_table import (
    LISTED_RECORDS,
    RecordReport,
    SkippedReport,
    Totals,
)
from seqstate.engine import jitcache
from seqstate.errors import ImpossibleSequenceError, UsageError
from seqstate.io import indexed, tracks
from seqstate.io.atomic import check_outputs
from seqstate.io.fasta import SequenceRecord, SkippedRecord, iter_sequences
from seqstate.io.regions import Region, check_region, parse_region
from seqstate.io.tables import load_model, model_sha256
from seqstate.kinds import group_index, kind_of, track_groups
from seqstate.log import Progress, QuietProgress
from seqstate.model import Model, resolve_thresholds
from seqstate.model.recalibration import Map

__all__ = [
    "CALIBRATED_TRACK",
    "CDS_SUFFIX",
    "COORDINATES",
    "DEFAULT_MIN_CDS_LENGTH",
    "LISTED_RECORDS",
    "PROTEINS_SUFFIX",
    "REPORT_SCHEMA",
    "STDOUT",
    "AnnotateOptions",
    "AnnotateReport",
    "ModelSummary",
    "RecordReport",
    "SkippedReport",
    "Totals",
    "annotate",
    "calibrated_groups",
    "check_stem",
    "feature_id_stem",
    "gff_provenance",
    "input_stem",
    "output_names",
    "recal_map",
    "warn_skipped",
]


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


def recal_map(model: Model, track: str) -> Map:
    """The posterior map of ``track`` in ``model``'s recalibration table."""
    assert model.recalibration is not None
    m = model.recalibration.get(track, "posterior")
    assert m is not None
    return m
