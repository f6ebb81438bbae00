"""Command line: parse, validate, call the pipeline, map errors to exit codes.

Exit codes: 0 success; 1 input or format error (FASTA, GFF3, BED, model tables,
impossible record); 2 usage error (bad option, unknown model, bad region,
unwritable output); 3 an optional extra is missing; 130 interrupted.
"""

from __future__ import annotations

import io
import sys
from collections.abc import Callable, Sequence
from typing import Any, TypeVar

import click

from seqstate import __version__, log
from seqstate.commands.process import (
    EXIT_INTERRUPTED,
    Interrupted,
    raise_stdout_failure,
    signal_handlers,
    silence_stdout,
)
from seqstate.errors import SeqstateError
from seqstate.io.atomic import stop_requested

F = TypeVar("F", bound=Callable[..., Any])


def echo_stdout(text: str) -> None:
    """Write ``text`` to standard output; a full device is one ``error:`` line (exit 2)."""
    try:
        click.echo(text, nl=False)
        sys.stdout.flush()
    except BrokenPipeError:
        raise
    except OSError as exc:
        raise_stdout_failure(exc)


def not_empty(ctx: click.Context, param: click.Parameter, value: Any) -> Any:
    """Click callback: an option given as '' is a usage error, not 'no value'."""
    if value is not None and not isinstance(value, tuple) and not str(value).strip():
        raise click.BadParameter("is empty", ctx=ctx, param=param)
    if isinstance(value, tuple) and any(not str(v).strip() for v in value):
        raise click.BadParameter("is empty", ctx=ctx, param=param)
    return value


def force_option(command: F) -> F:
    """--force, the same on every command that writes files."""
    return click.option(
        "--force",
        is_flag=True,
        help="Replace output files that exist (an input is never replaced).",
    )(command)


def quiet_option(command: F) -> F:
    """-q/--quiet, the same on every command."""
    return click.option("-q", "--quiet", is_flag=True, help="No progress or summary on stderr.")(
        command
    )


def model_option(
    required: bool = False, help: str = "Built-in model NAME or model PATH."
) -> Callable[[F], F]:
    """-m/--model: the built-in ``cpg-island`` by default, or ``required``."""
    if required:
        return click.option("-m", "--model", required=True, help=help)
    return click.option("-m", "--model", default="cpg-island", show_default=True, help=help)


def fasta_argument(command: F) -> F:
    """The FASTA input, first argument of every command that reads sequences."""
    return click.argument("input", metavar="FASTA")(command)


def say(quiet: bool, text: str) -> None:
    """The summary line of a command, unless ``-q``."""
    if not quiet:
        log.summary(text)


def _debug_before_command(args: Sequence[str]) -> bool:
    """True when ``--debug`` comes before the command name (the only place it means
    anything); after it, it is an unknown option of the command: a usage error, never
    a traceback."""
    for arg in args:
        if arg == "--debug":
            return True
        if not arg.startswith("-"):
            return False
    return False


class _ReadEnded(Exception):
    """An EOFError out of a command: a compressed input that ended early.  (click would
    turn it into Abort, the same as Ctrl-C, after printing an empty line.)"""


class _Group(click.Group):
    """A click group whose usage errors are one ``error:`` line, like our own errors."""

    def invoke(self, ctx: click.Context) -> Any:
        try:
            return super().invoke(ctx)
        except EOFError as exc:
            raise _ReadEnded() from exc

    def main(  # type: ignore[override]
        self, args: Sequence[str] | None = None, prog_name: str | None = None, **kwargs: Any
    ) -> Any:
        args = list(sys.argv[1:] if args is None else args)
        debug = _debug_before_command(args)
        try:
            kwargs.setdefault("obj", {"argv": list(args)})
            with signal_handlers():
                try:
                    value = super().main(
                        args=args,
                        prog_name=prog_name or "seqstate",
                        standalone_mode=False,
                        **kwargs,
                    )
                except Exception as exc:
                    if stop_requested():  # the signal's exception was wrapped on its way
                        raise Interrupted(0) from exc
                    raise
                if stop_requested():  # the signal's exception was swallowed on its way
                    raise Interrupted(0)
                sys.stdout.flush()
            return value
        except click.exceptions.Exit as exc:
            sys.exit(exc.exit_code)
        except _ReadEnded as exc:
            if debug:
                raise
            reason = str(exc.__cause__) or "input ended early"
            click.echo(f"error: input cannot be read (truncated file?): {reason}", err=True)
            sys.exit(1)
        except click.exceptions.Abort:
            click.echo("error: interrupted", err=True)
            sys.exit(EXIT_INTERRUPTED)
        except click.ClickException as exc:
            if debug:
                raise
            message = " ".join(exc.format_message().split())
            if isinstance(exc, click.NoSuchOption) and exc.option_name == "--debug":
                message = (
                    "--debug is not an option of a command: it goes before the command name "
                    "(seqstate --debug COMMAND ...)"
                )
            click.echo(f"error: {message} (see 'seqstate --help')", err=True)
            sys.exit(2)
        except SeqstateError as exc:
            if debug:
                raise
            click.echo(f"error: {exc.format()}", err=True)
            sys.exit(exc.exit_code)
        except (KeyboardInterrupt, Interrupted):
            if debug:
                raise
            click.echo("error: interrupted", err=True)
            sys.exit(EXIT_INTERRUPTED)
        except BrokenPipeError:
            silence_stdout()
            sys.exit(1)
        except OSError as exc:
            from seqstate.io.atomic import write_failure

            failure = write_failure(exc, "output")
            if debug or failure is None:
                raise
            silence_stdout()
            click.echo(f"error: {failure.format()}", err=True)
            sys.exit(failure.exit_code)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="seqstate")
@click.option("--debug", is_flag=True, help="Show tracebacks for errors.")
def main(debug: bool) -> None:
    """seqstate: annotate genomic DNA with hidden Markov models you control.

    For research annotation only; not for clinical or diagnostic decisions.
    """


def command_line(obj: dict | None) -> list[str]:
    """The command as it was given to :func:`main` (for run reports and provenance)."""
    argv = (obj or {}).get("argv")
    return ["seqstate", *(sys.argv[1:] if argv is None else argv)]


def decoding_options(command: F) -> F:
    """--decode, --min-posterior, --min-length and --split-unknown, shared by annotate and plot."""
    command = click.option(
        "--split-unknown",
        type=click.IntRange(min=1),
        default=10,
        show_default=True,
        help="No feature (gene or segment) spans a run of this many unknown bases: it is cut "
        "there.",
    )(command)
    command = click.option(
        "--min-length",
        type=int,
        default=None,
        help="Shortest feature, in bases; default: the model's (cpg-island: 200, else 1).",
    )(command)
    command = click.option(
        "--min-posterior",
        type=float,
        default=None,
        help="Posterior decoding: smallest per-base label posterior inside a feature; "
        "default: the model's (0.5 unless it says otherwise).",
    )(command)
    return click.option(
        "--decode",
        type=click.Choice(["posterior", "viterbi"]),
        default=None,
        help="Feature decoding; default: the model's.",
    )(command)


def masked_option(command: F) -> F:
    """--masked, shared by every command that reads sequences."""
    return click.option(
        "--masked",
        type=click.Choice(["base", "unknown", "evidence"]),
        default="base",
        show_default=True,
        help="Read lowercase (soft-masked) bases as their base, as unknown, or as "
        "evidence scored by the model's mask table (P(masked | state)).",
    )(command)


# ---------------------------------------------------------------- model
@main.group("model")
def model_group() -> None:
    """List the built-in models, or check one (a NAME or a PATH) and print its summary."""


@model_group.command("list")
def model_list() -> None:
    """The built-in models, one line each."""
    from seqstate.commands.model import list_lines

    for line in list_lines():
        click.echo(line)


@model_group.command("check")
@click.argument("model")
def model_check(model: str) -> None:
    """Validate MODEL (a built-in NAME or a PATH) and print a summary."""
    from seqstate.commands.model import check

    click.echo(check(model))


# ---------------------------------------------------------------- annotate
@main.command("annotate")
@fasta_argument
@model_option()
@click.option(
    "-o",
    "--out",
    "out_dir",
    default="seqstate-out",
    show_default=True,
    callback=not_empty,
    help="Output folder (created if absent); '-': only the GFF3, on standard output.",
)
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


# ---------------------------------------------------------------- sample
@main.command("sample")
@click.argument("model")
@click.option("--length", type=int, required=True, help="Bases per record.")
@click.option(
    "--records",
    type=int,
    default=1,
    show_default=True,
    help="Number of records to draw, each of --length bases (IDs PREFIX1, PREFIX2, ...).",
)
@click.option(
    "--seed", type=int, required=True, help="Random seed, 0 or more (same seed, same output)."
)
@click.option(
    "-o", "--out", "out_fasta", required=True, callback=not_empty, help="FASTA file to write."
)
@click.option(
    "--truth",
    "truth_gff3",
    default=None,
    callback=not_empty,
    help="GFF3 file for the true labelled runs.",
)
@click.option(
    "--prefix",
    default="sim",
    show_default=True,
    help="Record ID prefix (no whitespace or control characters).",
)
@force_option
@quiet_option
def sample_cmd(quiet: bool, **options: Any) -> None:
    """Draw synthetic records and their true state paths from MODEL."""
    from seqstate.commands.sample import SampleOptions, sample

    say(quiet, sample(SampleOptions(**options)).summary())


# ---------------------------------------------------------------- score
@main.command("score")
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
@main.command("plot")
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


@main.command("fit")
@click.argument("fasta_arg", metavar="FASTA", required=False)
@model_option(required=True, help="Start model: built-in NAME or PATH.")
@click.option("--fasta", default=None, hidden=True, help="Same as the FASTA argument.")
@click.option(
    "--labels",
    default=None,
    help="Known features, GFF3 or GTF (type = label) or BED (name = label): count the states "
    "they give.",
)
@click.option(
    "--labels-format",
    type=click.Choice(["auto", "gff3", "gtf", "bed"]),
    default="auto",
    show_default=True,
    help="Format of --labels (auto: by file name, then content).",
)
@click.option("--em", is_flag=True, help="Refine by Baum-Welch (after counting, if --labels).")
@click.option("--max-iter", type=int, default=50, show_default=True, help="EM: most updates.")
@click.option(
    "--tol",
    type=float,
    default=1e-8,
    show_default=True,
    help="EM: converged when the relative gain (change / |previous log-likelihood|) is below this.",
)
@click.option(
    "--freeze",
    multiple=True,
    metavar="PART",
    help="Keep start, transitions, emissions or a STATE (its transition and "
    "emission rows) as in the start model; repeatable.",
)
@click.option(
    "--pseudocount",
    type=float,
    default=None,
    help="Added to every allowed cell's count [default: 1 for counting, 0 for EM].",
)
@masked_option
@click.option(
    "--bad-genes",
    type=click.Choice(["skip", "fail"]),
    default="skip",
    show_default=True,
    help="Gene models: skip a gene whose annotation the "
    "layout cannot use (phases that contradict the lengths, no stop codon, ...), "
    "or fail naming it.",
)
@click.option(
    "--region",
    default=None,
    callback=not_empty,
    help="Count only ID:START-END (1-based, inclusive) or ID, as on annotate; features "
    "outside it are ignored.",
)
@click.option(
    "--records",
    "records_list",
    default=None,
    callback=not_empty,
    help="Count only these record IDs (ID,ID,...), as on annotate.",
)
@click.option(
    "--records-file",
    default=None,
    callback=not_empty,
    help="Count only the record IDs listed in this file, one per line.",
)
@click.option("--name", default=None, help="Name of the fitted model [default: folder name].")
@click.option(
    "-o",
    "--out",
    "out_dir",
    required=True,
    callback=not_empty,
    help="Model folder to write (created if absent; other files in it are kept).",
)
@click.option(
    "--force",
    is_flag=True,
    help="Replace the model files (manifest, tables) in --out; other files are kept.",
)
@quiet_option
@click.pass_obj
def fit_cmd(
    obj,
    fasta_arg,
    model,
    fasta,
    labels,
    labels_format,
    em,
    max_iter,
    tol,
    freeze,
    pseudocount,
    masked,
    bad_genes,
    region,
    records_list,
    records_file,
    name,
    out_dir,
    force,
    quiet,
) -> None:
    """Fit a model's tables to the sequences of FASTA: count from known features and/or
    Baum-Welch."""
    from seqstate.commands.fit import FitOptions, fit, stderr_log
    from seqstate.commands.records import records_selection
    from seqstate.errors import UsageError

    if fasta_arg is not None and fasta is not None and fasta_arg != fasta:
        raise UsageError(f"two FASTA inputs given ('{fasta_arg}' and --fasta '{fasta}'): give one")
    fasta = fasta_arg if fasta_arg is not None else fasta
    if fasta is None:
        raise UsageError("missing the FASTA argument: seqstate fit FASTA -m MODEL ... -o OUT")

    opts = FitOptions(
        model=model,
        fasta=fasta,
        out=out_dir,
        labels=labels,
        labels_format=labels_format,
        em=em,
        max_iter=max_iter,
        tol=tol,
        freeze=list(freeze),
        pseudocount=pseudocount,
        masked=masked,
        name=name,
        force=force,
        command_line=command_line(obj),
        bad_genes=bad_genes,
        region=region,
        records=records_selection(records_list, records_file),
    )
    report = fit(opts, log=(lambda _: None) if quiet else stderr_log)
    stop = f"; EM {report.stop_reason}" if opts.em else ""
    if not quiet:
        click.echo(
            f"seqstate: {report.method} on {report.stretch}: log-likelihood "
            f"{report.loglik:.6f} (natural log){stop} -> {report.out}/",
            err=True,
        )


# ---------------------------------------------------------------- compare
@main.command("compare")
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


# ---------------------------------------------------------------- index
@main.command("index")
@fasta_argument
@force_option
@quiet_option
def index_cmd(quiet: bool, **options: Any) -> None:
    """Write the .fai index of FASTA (and the .gzi of a bgzip FASTA) next to it."""
    from seqstate.commands.index import IndexOptions, index

    say(quiet, index(IndexOptions(**options)).summary())


# ---------------------------------------------------------------- merge
@main.command("merge")
@click.argument("reports", nargs=-1, required=True, metavar="REPORT.run.json...")
@click.option(
    "-o",
    "--out",
    "out_dir",
    default="seqstate-out",
    show_default=True,
    callback=not_empty,
    help="Output folder of the gathered set (created if absent).",
)
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


# ---------------------------------------------------------------- calibrate
@main.command("calibrate")
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


if __name__ == "__main__":  # pragma: no cover
    main()
