"""A stop signal ends the run as interrupted even when its exception is lost on the way.

Python runs a signal handler between bytecodes of whatever is executing; when that is
compiled code (numba's dispatcher) or a callback whose exceptions are ignored, the
handler's exception arrives wrapped (SystemError) or not at all.  The CLI notes every stop
signal, so such a run still prints one ``error: interrupted`` line, exits 130 and commits no
output.
"""

from __future__ import annotations

import signal
from types import SimpleNamespace

import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.io import atomic
from seqstate.io.atomic import OutputSet


@pytest.fixture(autouse=True)
def _no_stop_left_behind(monkeypatch):
    monkeypatch.setattr(atomic, "_STOPS", [])


def _annotate_with(monkeypatch, body):
    import seqstate.commands.annotate

    monkeypatch.setattr(seqstate.commands.annotate, "annotate", body)
    return CliRunner().invoke(main, ["annotate", "in.fa", "-o", "out", "-q"])


def test_signal_whose_exception_was_wrapped_is_an_interrupt(monkeypatch):
    def body(opts, **kwargs):
        atomic.note_stop(signal.SIGTERM)
        raise SystemError("a compiled function returned a result with an exception set")

    result = _annotate_with(monkeypatch, body)
    assert result.exit_code == 130
    assert result.stderr.splitlines() == ["error: interrupted"]


def test_signal_whose_exception_was_swallowed_is_an_interrupt(monkeypatch):
    def body(opts, **kwargs):
        atomic.note_stop(signal.SIGHUP)  # the raise was ignored: the command went on
        return SimpleNamespace(skipped_records=[], summary=lambda where: f"done -> {where}")

    result = _annotate_with(monkeypatch, body)
    assert result.exit_code == 130
    assert result.stderr.splitlines() == ["error: interrupted"]


def test_output_set_never_commits_after_a_stop_signal(tmp_path):
    (tmp_path / "a.txt").write_text("old\n")
    atomic.note_stop(signal.SIGINT)
    with pytest.raises(KeyboardInterrupt), OutputSet(tmp_path, force=True) as outs:
        outs.open_text("a.txt").write("new\n")
    assert (tmp_path / "a.txt").read_text() == "old\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.txt"]


def test_an_interrupt_raised_inside_a_callback_from_c_is_not_reported_twice(monkeypatch):
    # a signal landing in Python code called back from C (numba's compiler) can only be
    # reported as "Exception ignored"; the stop is recorded anyway, so that report is dropped
    import sys
    from types import SimpleNamespace

    from seqstate.commands.process import Interrupted, signal_handlers

    seen = []
    monkeypatch.setattr(sys, "unraisablehook", seen.append)
    with signal_handlers():
        hook = sys.unraisablehook
        hook(SimpleNamespace(exc_value=Interrupted(15)))
        other = SimpleNamespace(exc_value=ValueError("x"))
        hook(other)
    assert seen == [other]  # only the other one reaches the previous hook
    assert sys.unraisablehook == seen.append  # restored on leaving
