"""The commands that score, draw and measure: ``score``, ``plot``, ``compare`` and
``calibrate``; click options only, each calls one function of :mod:`seqstate.commands`."""

from __future__ import annotations

from typing import Any

import click

from seqstate.cli_shared import (
    decoding_options,
    echo_stdout,
    fasta_argument,
    force_option,
    masked_option,
    model_option,
    not_empty,
    quiet_option,
    say,
)


# ---------------------------------------------------------------- score
@click.command("score")
@fasta_argument
@click.option(
    "--regions",
    required=True,
    help="Regions to score: BED (0-based half-open), GFF3 or GTF (1-based closed), "
    "plain or gzip; '-' for stdin.",
)
@model_option()
@click.option(
    "--label",
    default=None,
    help="Label to score (its states against the rest); default: the model's only label.",
)
@click.option(
    "-o",
    "--out",
    "out_tsv",
    default=None,
    callback=not_empty,
    help="TSV file to write; default: standard output.",
)
@click.option(
    "--gff",
    "out_gff",
    default=None,
    callback=not_empty,
    help="Also write the regions with their scores as GFF3 ('-' for stdout).",
)
@click.option(
    "--flank",
    type=click.IntRange(min=0),
    default=None,
    help="Compute on each region plus N bases each side instead of the whole "
    "record (faster; see the docs for what changes).",
)
@click.option(
    "--regions-format",
    type=click.Choice(["auto", "bed", "gff3", "gtf"]),
    default="auto",
    show_default=True,
    help="Format of --regions; auto: by name, else by content.",
)
@click.option(
    "--type",
    "types",
    multiple=True,
    help="GFF3 or GTF regions: only features of this type (repeatable).",
)
@masked_option
@force_option
@quiet_option
def score_cmd(regions_format: str, types: tuple[str, ...], quiet: bool, **options: Any) -> None:
    """Score the --regions on the records of FASTA (plain or gzip; '-' for stdin)."""
    from seqstate.commands.score import ScoreOptions, score

    fmt = None if regions_format == "auto" else regions_format
    result = score(ScoreOptions(regions_format=fmt, types=tuple(types), **options))
    if result.stdout is not None:
        echo_stdout(result.stdout)
    say(quiet, result.summary())


# ---------------------------------------------------------------- plot
@click.command("plot")
@fasta_argument
@click.option(
    "--region",
    required=True,
    callback=not_empty,
    help="ID:START-END (1-based, inclusive) or ID for a whole record.",
)
@model_option()
@click.option(
    "-o",
    "--out",
    "out",
    required=True,
    callback=not_empty,
    help="Figure file: .png, .svg or .pdf (the format follows the name).",
)
@click.option(
    "--reference", default=None, help="GFF3, GTF or BED features to show in their own lane."
)
@click.option(
    "--reference-type",
    "reference_types",
    multiple=True,
    callback=lambda _ctx, _param, value: tuple(value),
    help="Reference type (column 3) to draw, repeatable; 'all' for every type. Default: "
    "the types that are the model's labels (CDS, CpG_island, ...); when the file has none, "
    "all but whole-sequence types (region, chromosome, contig, scaffold, supercontig).",
)
@click.option(
    "--flank",
    type=click.IntRange(min=0),
    default=None,
    help="Compute on the region plus N bases each side instead of the whole record.",
)
@click.option("--width", type=float, default=10.0, show_default=True, help="Inches.")
@click.option(
    "--height",
    type=float,
    default=4.0,
    show_default=True,
    help="Inches; the least height: a figure with many lane rows is made taller.",
)
@click.option(
    "--dpi",
    type=int,
    default=100,
    show_default=True,
    help="Dots per inch (PNG pixels = inches x dpi).",
)
@click.option("--allow-large", is_flag=True, help="Allow regions over 2,000,000 bases.")
@decoding_options
@masked_option
@force_option
@quiet_option
def plot_cmd(quiet: bool, **options: Any) -> None:
    """Draw posteriors and features of one region of FASTA (needs the 'plot' extra)."""
    from seqstate.commands.plot import PlotOptions, plot

    say(quiet, plot(PlotOptions(**options)).summary())


# ---------------------------------------------------------------- compare
@click.command("compare")
@click.argument("predicted")
@click.argument("reference")
@click.option(
    "--type",
    "feature_types",
    multiple=True,
    callback=not_empty,
    help="Feature type to compare (CDS, exon, CpG_island, ...), repeatable: one report "
    "per type; default: CDS if either file has CDS, else the only type both files have.",
)
@click.option(
    "--region",
    default=None,
    callback=not_empty,
    help="Only ID:START-END (1-based, inclusive) or ID; also gives the span of a sequence "
    "without a ##sequence-region line.",
)
@click.option(
    "-o",
    "--out",
    "out",
    default=None,
    callback=not_empty,
    help="Report file, .tsv or .json (the format follows the name); default: a table on "
    "standard output.",
)
@click.option(
    "--all-sequences",
    is_flag=True,
    help="Compare every sequence either file declares, not only those of PREDICTED.",
)
@click.option(
    "--gene-list",
    default=None,
    callback=not_empty,
    help="Also write a TSV of the missed and wrong genes (CDS and exon types): ID, place, "
    "strand, so a curator can go to them.",
)
@force_option
@quiet_option
def compare_cmd(
    predicted, reference, feature_types, region, out, all_sequences, gene_list, force, quiet
) -> None:
    """Accuracy of PREDICTED features against REFERENCE features (GFF3 or GTF)."""
    from seqstate.commands.compare import compare_files, report_format, report_table, write_report
    from seqstate.commands.inputs import read_set
    from seqstate.io.atomic import check_outputs

    if out is not None:
        report_format(out)
    reads = read_set(files=[predicted, reference])
    if out is not None or gene_list is not None:
        check_outputs([out, gene_list], reads, force=force)
    results = [
        compare_files(
            predicted, reference, feature_type=t, region=region, all_sequences=all_sequences
        )
        for t in (list(dict.fromkeys(feature_types)) or [None])
    ]
    if out is None:
        echo_stdout("\n".join(report_table(result) for result in results))
    write_report(
        results[0] if len(results) == 1 else results,
        out,
        force=force,
        inputs=reads,
        gene_list=gene_list,
    )
    if not quiet:
        parts = []
        for result in results:
            sn = result["nucleotide"]["strand_aware"]["sensitivity"]
            sp = result["nucleotide"]["strand_aware"]["specificity"]
            shown = "NA" if sn is None else f"{sn:.4f}", "NA" if sp is None else f"{sp:.4f}"
            part = f"{result['type']}, strand-aware base Sn {shown[0]} Sp {shown[1]}"
            if "gene" in result:
                gsn = result["gene"]["sensitivity"]
                part += f", gene Sn {'NA' if gsn is None else f'{gsn:.4f}'}"
            parts.append(part)
        click.echo(f"seqstate: {'; '.join(parts)} -> {out or 'stdout'}", err=True)


# ---------------------------------------------------------------- calibrate
@click.command("calibrate")
@click.argument("model")
@click.option(
    "--length", type=int, default=None, help="Bases per sampled record.  [default: 200000]"
)
@click.option(
    "--records",
    "records_text",
    default=None,
    callback=not_empty,
    help="Sampling: how many records to draw [default: 10].  With --fasta: only these "
    "record IDs (ID,ID,...), as on annotate.",
)
@click.option(
    "--records-file",
    default=None,
    callback=not_empty,
    help="With --fasta: only the record IDs listed in this file, one per line.",
)
@click.option(
    "--region",
    default=None,
    callback=not_empty,
    help="With --fasta: only ID:START-END (1-based, inclusive) or ID, as on annotate.",
)
@click.option("--seed", type=int, default=None, help="Random seed, 0 or more.  [default: 0]")
@click.option("--bins", type=int, default=10, show_default=True, help="Probability bins.")
@click.option(
    "--fasta",
    default=None,
    callback=not_empty,
    help="Calibrate on these sequences instead of samples (needs --truth).",
)
@click.option(
    "--truth",
    default=None,
    callback=not_empty,
    help="Trusted features of --fasta (GFF3, BED or GTF; types are model labels, or "
    "choose them with --type).",
)
@click.option(
    "--type",
    "types",
    multiple=True,
    help="GFF3 or GTF truth: only features of this type, a label of the model "
    "(repeatable); introns come from the gaps between CDS when not chosen.",
)
@click.option(
    "-o", "--out", "out", default=None, callback=not_empty, help="Report file, .tsv or .json."
)
@click.option(
    "--figure",
    default=None,
    callback=not_empty,
    help="Reliability diagram, .png, .svg or .pdf (needs matplotlib).",
)
@click.option(
    "--fit-into",
    default=None,
    callback=not_empty,
    metavar="MODEL_DIR",
    help="Also fit a recalibration table on these forecasts (isotonic or temperature per "
    "score, chosen on held-out folds) and write MODEL with it as a new model folder.",
)
@click.option(
    "--folds",
    type=int,
    default=None,
    help="With --fit-into: folds of the held-out choice of each map.  [default: 5]",
)
@click.option(
    "--fold-block",
    "block",
    type=int,
    default=None,
    help="With --fit-into: bases per block; blocks are dealt to the folds in turn.  "
    "[default: 100000]",
)
@click.option(
    "--in-sample",
    is_flag=True,
    default=False,
    help="Measure even on bases MODEL's recalibration table was fitted on; the report "
    "marks the figures in-sample (refused otherwise).",
)
@force_option
@quiet_option
def calibrate_cmd(
    quiet: bool,
    records_text: str | None,
    records_file: str | None,
    types: tuple[str, ...],
    **options: Any,
) -> None:
    """How well MODEL's posteriors match the truth: sampled, or --fasta with --truth."""
    from seqstate.commands.calibrate import CalibrateOptions, calibrate
    from seqstate.commands.records import records_selection
    from seqstate.errors import UsageError

    count: int | None = None
    record_ids: list[str] | None = None
    if options["fasta"] is not None:
        record_ids = records_selection(records_text, records_file)
    else:
        if records_file is not None:
            record_ids = [records_file]  # refused by the checks: it needs --fasta
        if records_text is not None:
            try:
                count = int(records_text)
            except ValueError:
                raise UsageError(
                    f"--records {records_text!r}: sampling takes a number of records (record "
                    "IDs only apply with --fasta)"
                ) from None
    if options["fit_into"] is None:
        given = [n for n, k in (("--folds", "folds"), ("--fold-block", "block")) if options[k]]
        if given:
            raise UsageError(f"{', '.join(given)} only apply to --fit-into")
    options["folds"] = 5 if options["folds"] is None else options["folds"]
    options["block"] = 100_000 if options["block"] is None else options["block"]
    opts = CalibrateOptions(records=count, record_ids=record_ids, types=tuple(types), **options)
    say(quiet, calibrate(opts, quiet=quiet).summary())
