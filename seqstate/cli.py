"""Command line: parse, validate, call the pipeline, map errors to exit codes.

Exit codes: 0 success; 1 input or format error (FASTA, GFF3, BED, model tables,
impossible record); 2 usage error (bad option, unknown model, bad region,
unwritable output); 3 an optional extra is missing; 130 interrupted.
"""

from __future__ import annotations

import sys

import click

from seqstate import __version__
from seqstate.errors import SeqstateError

EXIT_INTERRUPTED = 130


class _Group(click.Group):
    """A click group whose usage errors are one ``error:`` line, like our own errors."""

    def main(self, args=None, prog_name=None, **kwargs):  # type: ignore[override]
        args = list(sys.argv[1:] if args is None else args)
        debug = "--debug" in args
        try:
            return super().main(args=args, prog_name=prog_name or "seqstate",
                                standalone_mode=False, **kwargs)
        except click.exceptions.Exit as exc:
            sys.exit(exc.exit_code)
        except click.exceptions.Abort:
            click.echo("error: interrupted", err=True)
            sys.exit(EXIT_INTERRUPTED)
        except click.ClickException as exc:
            if debug:
                raise
            message = " ".join(exc.format_message().split())
            click.echo(f"error: {message} (see 'seqstate --help')", err=True)
            sys.exit(2)
        except SeqstateError as exc:
            if debug:
                raise
            click.echo(f"error: {exc.format()}", err=True)
            sys.exit(exc.exit_code)
        except KeyboardInterrupt:
            if debug:
                raise
            click.echo("error: interrupted", err=True)
            sys.exit(EXIT_INTERRUPTED)
        except BrokenPipeError:
            sys.exit(1)


@click.group(cls=_Group, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="seqstate")
@click.option("--debug", is_flag=True, help="Show tracebacks for errors.")
def main(debug: bool) -> None:
    """seqstate: annotate genomic DNA with hidden Markov models you control.

    For research annotation only; not for clinical or diagnostic decisions.
    """


# ---------------------------------------------------------------- model
@main.group("model")
def model_group() -> None:
    """List, check and describe models."""


@model_group.command("list")
def model_list() -> None:
    """The built-in models, one line each."""
    from seqstate.io.tables import list_builtin, load_model

    for name in list_builtin():
        m = load_model(name)
        labels = ", ".join(m.labels) or "no labels"
        about = m.description if len(m.description) <= 70 else m.description[:69] + "…"
        click.echo(f"{name}\t{m.n_states} states, order {m.order}, {labels}: {about}")


@model_group.command("check")
@click.argument("model")
def model_check(model: str) -> None:
    """Validate MODEL (a built-in NAME or a PATH) and print a summary."""
    from seqstate.io.tables import load_model, model_sha256, resolve_model_path

    path = resolve_model_path(model)
    m = load_model(model)
    click.echo(summary(m, str(path), model_sha256(m)))


def summary(m, path: str, sha: str) -> str:
    """Readable summary of a model: states, labels, strands, transitions, stay lengths."""
    lines = [f"model     {m.name}", f"manifest  {path}"]
    if m.description:
        lines.append(f"about     {m.description}")
    lines.append(f"alphabet  {m.alphabet} ({len(m.alphabet)} symbols)")
    lines.append(f"order     {m.order} (emission depends on the previous {m.order} symbols)")
    lines.append(f"decode    {m.decode} (default)")
    if m.end is None:
        lines.append("end       none given: any state may end a record")
    else:
        lines.append("end       P(record ends | state) given per state")
    lines.append(f"sha256    {sha}")
    lines.append("")
    stay = m.expected_stay()
    names = m.state_names
    w = max(5, max(len(n) for n in names))
    labels = [s.label or "-" for s in m.states]
    lw = max(5, max(len(x) for x in labels))
    lines.append(f"{'state':<{w}}  {'label':<{lw}}  strand  {'start':>10}  {'end':>10}  "
                 f"expected stay (bases)")
    for i, s in enumerate(m.states):
        end = "-" if m.end is None else f"{m.end[i]:.4g}"
        st = "inf" if stay[i] == float("inf") else f"{stay[i]:.4g}"
        lines.append(f"{s.name:<{w}}  {labels[i]:<{lw}}  {s.strand or '.':<6}  "
                     f"{m.start[i]:>10.4g}  {end:>10}  {st}")
    allowed = m.allowed_transitions()
    lines.append("")
    lines.append(f"allowed transitions: {len(allowed)} of {m.n_states ** 2}")
    for i, n in enumerate(names):
        succ = [f"{names[j]} {m.transitions[i, j]:.6g}" for j in range(m.n_states)
                if m.transitions[i, j] > 0]
        lines.append(f"  {n:<{w}} -> " + (", ".join(succ) if succ else "(none)"))
    if m.provenance:
        lines.append("")
        lines.append("provenance")
        for key, value in m.provenance.items():
            lines.append(f"  {key}: {value}")
    return "\n".join(lines)


# ---------------------------------------------------------------- annotate
@main.command("annotate")
@click.argument("fasta")
@click.option("-m", "--model", default="cpg-island", show_default=True,
              help="Built-in model NAME or model PATH.")
@click.option("-o", "--out", "out_dir", default="seqstate-out", show_default=True,
              help="Output folder (created if absent).")
@click.option("--decode", type=click.Choice(["posterior", "viterbi"]), default=None,
              help="Feature decoding; default: the model's.")
@click.option("--min-posterior", type=float, default=0.5, show_default=True,
              help="Posterior decoding: smallest per-base label posterior inside a feature.")
@click.option("--min-length", type=int, default=1, show_default=True,
              help="Shortest feature to report, in bases.")
@click.option("--region", default=None, help="Only ID:START-END (1-based, inclusive).")
@click.option("--masked", type=click.Choice(["base", "unknown"]), default="base",
              show_default=True, help="Read lowercase (soft-masked) bases as their base "
              "or as unknown.")
@click.option("--tracks", type=click.Choice(["bedgraph", "bigwig", "both", "none"]),
              default="bedgraph", show_default=True, help="Per-base posterior track format.")
@click.option("--precision", type=click.IntRange(0, 8), default=4, show_default=True,
              help="Decimals of the posterior values in tracks.")
@click.option("-q", "--quiet", is_flag=True, help="No progress or summary on stderr.")
def annotate_cmd(fasta, model, out_dir, decode, min_posterior, min_length, region, masked,
                 tracks, precision, quiet) -> None:
    """Annotate the records of FASTA (plain or gzip; '-' for stdin) with a model."""
    from seqstate.pipeline import AnnotateOptions, annotate

    opts = AnnotateOptions(
        input=fasta, model=model, out_dir=out_dir, decode=decode,
        min_posterior=min_posterior, min_length=min_length, region=region, masked=masked,
        tracks=tracks, precision=precision, command_line=["seqstate", *sys.argv[1:]],
    )
    report = annotate(opts, progress_enabled=(not quiet) and sys.stderr.isatty())
    if not quiet:
        n = sum(r["features"] for r in report["records"])
        bases = sum(r["end_1based"] - r["start_1based"] + 1 for r in report["records"])
        click.echo(f"seqstate: {len(report['records'])} record(s), {bases} bases, {n} features "
                   f"-> {out_dir}/", err=True)


# ---------------------------------------------------------------- sample
@main.command("sample")
@click.argument("model")
@click.option("--length", type=int, required=True, help="Bases per record.")
@click.option("--records", type=int, default=1, show_default=True)
@click.option("--seed", type=int, required=True, help="Random seed (same seed, same output).")
@click.option("-o", "--out", "out_fasta", required=True, help="FASTA file to write.")
@click.option("--truth", "truth", default=None, help="GFF3 file for the true labelled runs.")
@click.option("--prefix", default="sim", show_default=True, help="Record ID prefix.")
def sample_cmd(model, length, records, seed, out_fasta, truth, prefix) -> None:
    """Draw synthetic records and their true state paths from MODEL."""
    from seqstate.pipeline import SampleOptions, sample

    sample(SampleOptions(model=model, length=length, records=records, seed=seed,
                         out_fasta=out_fasta, truth_gff3=truth, prefix=prefix))


if __name__ == "__main__":  # pragma: no cover
    main()
