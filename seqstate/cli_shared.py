"""The command line's shared parts: options every command spells the same, helpers.

-m/--model, -q/--quiet, --force, --masked, the decoding options and the FASTA argument as
click decorators; ``not_empty`` (an option given as '' is a usage error); ``say`` (a
command's summary line unless -q); ``echo_stdout`` (standard output, a full device an
``error:`` line); ``command_line`` (the command as given, for run reports).
"""

from __future__ import annotations

import sys
from collections.abc import Callable
from typing import Any, TypeVar

import click

from seqstate import log
from seqstate.commands.process import raise_stdout_failure

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


def out_folder_option(help: str) -> Callable[[F], F]:
    """-o/--out: the output folder of a run (``seqstate-out`` by default, never '')."""
    return click.option(
        "-o",
        "--out",
        "out_dir",
        default="seqstate-out",
        show_default=True,
        callback=not_empty,
        help=help,
    )


def fasta_argument(command: F) -> F:
    """The FASTA input, first argument of every command that reads sequences."""
    return click.argument("input", metavar="FASTA")(command)


def say(quiet: bool, text: str) -> None:
    """The summary line of a command, unless ``-q``."""
    if not quiet:
        log.summary(text)


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
