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
from seqstate.io import atomic, staging
from seqstate.io.atomic import OutputSet


@pytest.fixture(autouse=True)
def _no_stop_left_behind(monkeypatch):
    monkeypatch.setattr(staging, "_STOPS", [])


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


# ---------------------------------------------------------------- the whole process
def _caught_signals(pid: int) -> int:
    """The process's caught-signal mask (Linux /proc/PID/status SigCgt), 0 if gone."""
    try:
        with open(f"/proc/{pid}/status") as status:
            for line in status:
                if line.startswith("SigCgt:"):
                    return int(line.split()[1], 16)
    except OSError:
        pass
    return 0


@pytest.mark.skipif(not __import__("os").path.exists("/proc/self/status"), reason="Linux /proc")
@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGINT, signal.SIGHUP])
def test_a_stop_signal_while_the_program_starts_is_an_interrupt(tmp_path, signum):
    # the handler is installed before NumPy, numba and click are imported: a signal sent
    # as soon as it is caught lands while the program is still starting
    import subprocess
    import sys
    import time

    (tmp_path / "in.fa").write_text(">r\nACGT\n")
    proc = subprocess.Popen(
        [sys.executable, "-m", "seqstate", "annotate", "in.fa", "-o", "out"],
        cwd=tmp_path,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    deadline = time.monotonic() + 30
    # SIGHUP is the last the program takes (Python itself catches SIGINT from the start)
    while not _caught_signals(proc.pid) & (1 << (signal.SIGHUP - 1)):
        assert proc.poll() is None and time.monotonic() < deadline
        time.sleep(0.001)
    proc.send_signal(signum)
    out, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err
    assert err.splitlines() == ["error: interrupted"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.fa"]


def test_a_stop_signal_after_the_command_returned_is_an_interrupt():
    # the command's own handlers are put away when it returns; the program's stays until
    # exit, so a signal then still gives the one line and exit 130 (not death by signal)
    import subprocess
    import sys

    code = (
        "import os, signal, sys\n"
        "from seqstate import launch\n"
        "def command():\n"
        "    print('done', flush=True)\n"
        "    os.kill(os.getpid(), signal.SIGTERM)\n"
        "    sys.exit(0)\n"
        "launch.run(command)\n"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert proc.returncode == 130
    assert proc.stdout == "done\n"
    assert proc.stderr.splitlines() == ["error: interrupted"]


def test_the_program_passes_the_command_exit_code_through():
    import subprocess
    import sys

    code = "import sys\nfrom seqstate import launch\nlaunch.run(lambda: sys.exit(3))\n"
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert (proc.returncode, proc.stderr) == (3, "")


def test_the_launcher_imports_only_the_standard_library():
    import subprocess
    import sys

    code = (
        "import sys\nimport seqstate.launch\n"
        "print(sorted(m for m in sys.modules if m.split('.')[0] in ('numpy', 'numba', 'click')))\n"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60)
    assert proc.stdout.strip() == "[]"
