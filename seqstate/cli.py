"""Command line: parse, validate, call the pipeline, map errors to exit codes.

This module holds the ``seqstate`` group (``main``) and its error handling; the
commands are in ``cli_annotate.py`` (annotate, index, merge), ``cli_models.py`` (model,
sample, fit) and ``cli_evaluate.py`` (score, plot, compare, calibrate), their shared
options in ``cli_shared.py``.

Exit codes: 0 success; 1 input or format error (FASTA, GFF3, BED, model tables,
impossible record); 2 usage error (bad option, unknown model, bad region,
unwritable output); 3 an optional extra is missing; 130 interrupted.
"""

from __future__ import annotations

import sys
from collections.abc import Sequence
from typing import Any

import click

from seqstate import __version__
from seqstate.cli_annotate import annotate_cmd, index_cmd, merge_cmd
from seqstate.cli_evaluate import calibrate_cmd, compare_cmd, plot_cmd, score_cmd
from seqstate.cli_models import fit_cmd, model_group, sample_cmd
from seqstate.commands.process import (
    EXIT_INTERRUPTED,
    Interrupted,
    signal_handlers,
    silence_stdout,
)
from seqstate.errors import SeqstateError
from seqstate.io.atomic import stop_requested

__all__ = ["main"]


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


main.add_command(model_group)
main.add_command(annotate_cmd)
main.add_command(sample_cmd)
main.add_command(score_cmd)
main.add_command(plot_cmd)
main.add_command(fit_cmd)
main.add_command(compare_cmd)
main.add_command(index_cmd)
main.add_command(merge_cmd)
main.add_command(calibrate_cmd)


if __name__ == "__main__":  # pragma: no cover
    main()
