"""The commands about models: ``model list`` / ``model check``, ``sample`` (records drawn
from a model) and ``fit``; click options only, each calls one function of
:mod:`seqstate.commands`."""

from __future__ import annotations

from typing import Any

import click

from seqstate.cli_shared import (
    command_line,
    force_option,
    masked_option,
    model_option,
    not_empty,
    quiet_option,
    say,
)


# ---------------------------------------------------------------- model
@click.group("model")
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


# ---------------------------------------------------------------- sample
@click.command("sample")
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


@click.command("fit")
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
