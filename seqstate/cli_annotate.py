"""The commands of an annotation run: ``annotate``, ``index`` (a FASTA's index) and
``merge`` (per-group output sets gathered into one); click options only, each calls one
function of :mod:`seqstate.commands`."""

from __future__ import annotations

import io
from typing import Any

import click

from seqstate import log
from seqstate.cli_shared import (
    command_line,
    decoding_options,
    echo_stdout,
    fasta_argument,
    force_option,
    masked_option,
    model_option,
    not_empty,
    out_folder_option,
    quiet_option,
    say,
)


# ---------------------------------------------------------------- annotate
@click.command("annotate")
@fasta_argument
@model_option()
@out_folder_option("Output folder (created if absent); '-': only the GFF3, on standard output.")
@decoding_options
@click.option(
    "--region",
    default=None,
    callback=not_empty,
    help="Only ID:START-END (1-based, inclusive); the output names then carry it.",
)
@masked_option
@click.option(
    "--tracks",
    type=click.Choice(["bedgraph", "bigwig", "both", "none"]),
    default=None,
    help="Per-base posterior track format [default: bedgraph; none with -o -].",
)
@click.option(
    "--calibrated-tracks",
    is_flag=True,
    default=False,
    help="A recalibrated model: also write each track's calibrated posterior "
    "(STEM.TRACK.calibrated.bedgraph or .bw).",
)
@click.option(
    "--stem",
    default=None,
    callback=not_empty,
    help="Output file names start with this [default: the FASTA name, plus the region].",
)
@force_option
@click.option(
    "--precision",
    type=click.IntRange(0, 8),
    default=4,
    show_default=True,
    help="Decimals of the posterior values in tracks.",
)
@click.option(
    "--empty-records",
    type=click.Choice(["skip", "error"]),
    default="skip",
    show_default=True,
    help="A FASTA record with no sequence: skip it with a warning, or stop with an error.",
)
@click.option(
    "-j",
    "--jobs",
    type=int,
    default=None,
    help="Threads to use [default: every core this process may use].",
)
@click.option(
    "--cds",
    is_flag=False,
    flag_value="",
    default=None,
    metavar="[NAME]",
    help="Gene models: write the spliced CDS of every mRNA (FASTA) in the output folder, "
    "as NAME or, given alone, STEM.cds.fna.",
)
@click.option(
    "--proteins",
    is_flag=False,
    flag_value="",
    default=None,
    metavar="[NAME]",
    help="Gene models: write the translation of every mRNA (FASTA) in the output folder, "
    "as NAME or, given alone, STEM.proteins.faa.",
)
@click.option(
    "--min-cds-length",
    type=int,
    default=None,
    help="Gene models: drop genes whose mRNA has fewer coding bases [default: 90].",
)
@click.option(
    "--min-gene-posterior",
    type=float,
    default=None,
    help="Gene models: drop genes whose score (mean posterior of the gene's states over "
    "its span, 0..1) is lower [default: 0].",
)
@click.option(
    "--report",
    default=None,
    callback=not_empty,
    help="Also write a self-contained HTML page of the run to this file in the output folder.",
)
@click.option(
    "--truth",
    default=None,
    callback=not_empty,
    help="With --report: a trusted annotation (GFF3, GTF or BED) for its calibration figure.",
)
@click.option(
    "--truth-type",
    "truth_types",
    multiple=True,
    callback=lambda _ctx, _param, value: tuple(value),
    help="With --truth: only its features of this type, a label of the model (repeatable), "
    "as calibrate --type.",
)
@click.option(
    "--translation-table",
    type=int,
    default=1,
    show_default=True,
    help="NCBI genetic code used for --proteins.",
)
@click.option(
    "--records",
    "records_list",
    default=None,
    callback=not_empty,
    help="Only these record IDs (ID,ID,...); outputs keep the FASTA's record order.",
)
@click.option(
    "--records-file",
    default=None,
    callback=not_empty,
    help="Only the record IDs listed in this file, one per line.",
)
@click.option(
    "--index-outputs",
    is_flag=True,
    default=False,
    help="Also write the GFF3, bedGraphs and gene files sorted, bgzip-compressed and "
    "tabix-indexed (NAME.gz + NAME.gz.tbi, or .csi past 512 Mbp; needs pysam).",
)
@click.option(
    "--gene-formats",
    default=None,
    metavar="bed12,gtf",
    callback=lambda _ctx, _param, value: () if value is None else tuple(value.split(",")),
    help="Gene models: also write the gene structures as BED12 (STEM.genes.bed) and/or "
    "GTF 2.2 (STEM.genes.gtf).",
)
@quiet_option
@click.pass_obj
def annotate_cmd(
    obj: dict | None,
    tracks: str | None,
    quiet: bool,
    records_list: str | None,
    records_file: str | None,
    **options: Any,
) -> None:
    """Annotate the records of FASTA (plain or gzip; '-' for stdin) with a model."""
    from seqstate.commands.annotate import STDOUT, AnnotateOptions, annotate, warn_skipped
    from seqstate.commands.records import records_selection

    to_stdout = options["out_dir"] == STDOUT
    tracks = tracks or ("none" if to_stdout else "bedgraph")
    records = records_selection(records_list, records_file)
    opts = AnnotateOptions(
        tracks=tracks, command_line=command_line(obj), records=records, **options
    )
    gff_out = io.StringIO() if to_stdout else None
    report = annotate(opts, progress=log.progress_for(quiet, "annotate"), stdout=gff_out)
    warn_skipped(opts.input, report.skipped_records, total=report.totals.skipped_records)
    if gff_out is not None:
        echo_stdout(gff_out.getvalue())
    say(quiet, report.summary("stdout" if to_stdout else f"{opts.out_dir}/"))


# ---------------------------------------------------------------- index
@click.command("index")
@fasta_argument
@force_option
@quiet_option
def index_cmd(quiet: bool, **options: Any) -> None:
    """Write the .fai index of FASTA (and the .gzi of a bgzip FASTA) next to it."""
    from seqstate.commands.index import IndexOptions, index

    say(quiet, index(IndexOptions(**options)).summary())


# ---------------------------------------------------------------- merge
@click.command("merge")
@click.argument("reports", nargs=-1, required=True, metavar="REPORT.run.json...")
@out_folder_option("Output folder of the gathered set (created if absent).")
@click.option(
    "--stem",
    default=None,
    callback=not_empty,
    help="Output file names start with this [default: the groups' common stem].",
)
@click.option(
    "--fasta",
    default=None,
    callback=not_empty,
    help="The FASTA the groups annotated: every record of it must be in one group "
    "(its .fai is used when present) [default: the input the run reports name].",
)
@force_option
@quiet_option
@click.pass_obj
def merge_cmd(obj: dict | None, quiet: bool, **options: Any) -> None:
    """Gather annotate runs on groups of records (their run reports) in FASTA order."""
    from seqstate.commands.merge import MergeOptions, merge

    options["reports"] = list(options["reports"])
    report = merge(MergeOptions(command_line=command_line(obj), **options))
    say(quiet, report.summary())
