"""`annotate --jobs`: records on several threads give the bytes of one thread; the clamp of
--jobs; a failing record among running ones; a stop signal during a parallel run; progress.

Every expectation here is the project's own: --jobs N must reproduce --jobs 1 byte for byte
(the README's promise), so --jobs 1 is the reference.
"""

from __future__ import annotations

import io
import json
import os
import shutil
import signal
import subprocess
import sys
import threading
from pathlib import Path

import pytest
from click.testing import CliRunner

from seqstate import log
from seqstate.cli import main
from seqstate.commands import annotate_run
from seqstate.io.tables import builtin_dir

REPO = Path(__file__).resolve().parents[1]


def run(args: list) -> object:
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


def files_of(folder: Path) -> dict[str, bytes]:
    out = {}
    for p in sorted(folder.iterdir()):
        data = p.read_bytes()
        if p.name.endswith(".run.json"):
            doc = json.loads(data)
            doc.pop("command_line")  # the command differs by its --jobs and -o only
            doc["options"].pop("out_dir")
            data = json.dumps(doc, sort_keys=True).encode()
        out[p.name] = data
    return out


@pytest.fixture(scope="module")
def many_records(tmp_path_factory):
    folder = tmp_path_factory.mktemp("jobs")
    fasta = folder / "many.fa"
    res = run(
        [
            "sample",
            "cpg-island",
            "--length",
            "20000",
            "--records",
            "24",
            "--seed",
            "11",
            "-o",
            fasta,
            "-q",
        ]
    )
    assert res.exit_code == 0, res.output
    return fasta


@pytest.mark.parametrize("decode", ["posterior", "viterbi"])
def test_two_jobs_write_the_bytes_of_one_job_on_many_records(tmp_path, many_records, decode):
    outs = {}
    for jobs in (1, 2, 3):
        out = tmp_path / f"j{jobs}"
        res = run(
            [
                "annotate",
                many_records,
                "-o",
                out,
                "--jobs",
                jobs,
                "--decode",
                decode,
                "--tracks",
                "both",
                "-q",
            ]
        )
        assert res.exit_code == 0, res.output
        outs[jobs] = files_of(out)
    assert outs[1].keys() == outs[2].keys() == outs[3].keys()
    # gff3, feature and records tables, bedGraph, bigWig, run report
    assert len(outs[1]) == 6
    for name in outs[1]:
        assert outs[2][name] == outs[1][name], name
        assert outs[3][name] == outs[1][name], name
    gff = outs[1]["many.gff3"].decode().splitlines()
    assert sum(1 for x in gff if x.startswith("##sequence-region")) == 24
    assert sum(1 for x in gff if not x.startswith("#")) > 0  # there are features to compare


def test_two_jobs_write_the_bytes_of_one_job_for_gene_models(tmp_path):
    fasta = tmp_path / "genes.fa"
    res = run(
        [
            "sample",
            "gene-segment",
            "--length",
            "30000",
            "--records",
            "6",
            "--seed",
            "5",
            "-o",
            fasta,
            "-q",
        ]
    )
    assert res.exit_code == 0, res.output
    outs = {}
    for jobs in (1, 2):
        out = tmp_path / f"j{jobs}"
        res = run(["annotate", fasta, "-m", "gene-segment", "-o", out, "--jobs", jobs, "-q"])
        assert res.exit_code == 0, res.output
        outs[jobs] = files_of(out)
    assert outs[1] == outs[2]
    assert b"\tCDS\t" in outs[1]["genes.gff3"]


@pytest.mark.parametrize("asked", [0, -3, 4096])
def test_jobs_outside_the_cores_are_clamped_with_a_note(tmp_path, many_records, asked):
    cores = annotate_run.available_cores()
    jobs, note = annotate_run.resolve_jobs(asked)
    assert jobs == (1 if asked < 1 else cores)
    assert note is not None and f"--jobs {asked}" in note
    assert annotate_run.resolve_jobs(None) == (cores, None)
    res = CliRunner().invoke(
        main, ["annotate", str(many_records), "-o", str(tmp_path / "o"), "--jobs", str(asked)]
    )
    assert res.exit_code == 0, res.output
    assert note in res.output  # CliRunner mixes stderr into output


def test_an_impossible_record_among_running_ones_stops_the_run_with_no_output(tmp_path):
    # a copy of cpg-island whose states never emit T: every record but one has no T
    model = tmp_path / "no-t"
    shutil.copytree(builtin_dir() / "cpg-island", model)
    lines = (model / "emissions.tsv").read_text(encoding="utf-8").splitlines()
    edited = [
        ln if ln.startswith(("#", "state")) else "\t".join(ln.split("\t")[:5] + ["0"])
        for ln in lines
    ]
    (model / "emissions.tsv").write_text("\n".join(edited) + "\n", encoding="utf-8")
    good = "ACGGCAGCCAGGACGC" * 4000
    text = "".join(f">ok{i}\n{good}\n" for i in range(8))
    text += ">bad\n" + "ACG" * 1000 + "T" + "ACG" * 10 + "\n"
    text += "".join(f">late{i}\n{good}\n" for i in range(8))
    fasta = tmp_path / "imp.fa"
    fasta.write_text(text)
    out = tmp_path / "existing"
    out.mkdir()
    res = CliRunner().invoke(
        main, ["annotate", str(fasta), "-m", str(model), "-o", str(out), "--jobs", "2"]
    )
    assert res.exit_code == 1
    errors = [x for x in res.output.splitlines() if x.startswith("error:")]
    assert len(errors) == 1, res.output
    assert "record 'bad'" in errors[0] and "position 3001" in errors[0], errors[0]
    assert list(out.iterdir()) == []
    # no progress ticker and no record thread outlives the failed run: each one left
    # ends within a generous bound (an explicit join, not a guessed sleep)
    for thread in [t for t in threading.enumerate() if t.name.startswith("seqstate-")]:
        thread.join(timeout=30)
    alive = [t.name for t in threading.enumerate() if t.name.startswith("seqstate-")]
    assert alive == []


def test_stop_signal_during_a_parallel_run_leaves_the_old_outputs(tmp_path, held_run):
    fasta = tmp_path / "par.fa"
    res = run(
        ["sample", "cpg-island", "--length", "150000", "--records", "4", "--seed", "3"]
        + ["-o", fasta, "-q"]
    )
    assert res.exit_code == 0
    out = tmp_path / "out"
    out.mkdir()
    (out / "par.gff3").write_text("old features\n")
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    # held once the first record is written (SEQSTATE_TEST_HOLD): records 2 and 3 are
    # taken by the two threads, record 4 not yet read; the signal arrives at that moment
    proc = held_run(["annotate", fasta, "-o", out, "--force", "--jobs", "2"], "record-written")
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 130, err
    assert err.splitlines()[-1] == "error: interrupted"
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


# ---------------------------------------------------------------- progress
class _Clock:
    """A fake ``time`` for seqstate.log: ``perf_counter`` returns ``now``, moved by hand."""

    def __init__(self) -> None:
        self.now = 1000.0

    def perf_counter(self) -> float:
        return self.now


class _Steps:
    """Stands in for the ticker's stop event: each ``wait`` (one turn of the ticker's loop)
    returns only when the test calls :meth:`turn`, which returns once that turn is done."""

    def __init__(self) -> None:
        self._go = threading.Semaphore(0)
        self._waiting = threading.Semaphore(0)
        self._stopped = False
        self.timeouts: list[float] = []

    def wait(self, timeout: float) -> bool:  # called by the ticker thread
        self.timeouts.append(timeout)
        self._waiting.release()
        assert self._go.acquire(timeout=30)
        return self._stopped

    def turn(self) -> None:
        assert self._waiting.acquire(timeout=30)  # the ticker waits (its last turn is over)
        self._go.release()
        assert self._waiting.acquire(timeout=30)  # this turn is over: it waits again
        self._waiting.release()  # (its token, for the next turn)

    def clear(self) -> None:
        self._stopped = False

    def set(self) -> None:
        self._stopped = True
        self._go.release()


def _fake_progress(monkeypatch, **kw):
    clock = _Clock()
    monkeypatch.setattr(log, "time", clock)
    stream = io.StringIO()
    progress = log.Progress(stream, **kw)
    steps = _Steps()
    progress._stop = steps  # the ticker's loop, one turn at a time
    return progress, stream, clock, steps


def test_progress_in_a_log_is_a_plain_line_now_and_then(monkeypatch):
    progress, stream, clock, steps = _fake_progress(monkeypatch, live=False, interval=5.0)
    progress.start(10_000_000)
    counts = []
    for _ in range(5):
        progress.advance(1_000_000, "chr1")  # in a log, advance never draws
        clock.now += 3.0
        steps.turn()
        counts.append(stream.getvalue().count("\n"))
    progress.finish()
    # a line only once 5 s have passed since the last one: at 6 s, 12 s (of 3, 6, .., 15 s)
    assert counts == [0, 1, 1, 2, 2]
    lines = stream.getvalue().splitlines()
    assert len(lines) == 2 and all(x.startswith("progress: chr1: ") for x in lines)
    assert "\r" not in stream.getvalue()
    # at 12 s: 4 of 10 Mbp, 0.33 Mbp/s, 18 s left
    assert lines[-1] == "progress: chr1: 4.00/10.00 Mbp (40%), 0.33 Mbp/s, 18 s left"
    assert max(steps.timeouts) <= 1.0  # the ticker looks at least once a second


def test_progress_on_a_terminal_is_redrawn_every_second_without_calls(monkeypatch):
    progress, stream, clock, steps = _fake_progress(monkeypatch, live=True)
    progress.start(0)  # total not known yet
    progress.advance(500, "ctg7")  # no draw: less than 0.2 s since the start
    redraws = []
    for _ in range(4):  # no advance: only the ticker draws, once a second
        clock.now += 0.5
        steps.turn()
        redraws.append(stream.getvalue().count("\r"))
    progress.finish()
    assert redraws == [0, 1, 1, 2]
    text = stream.getvalue()
    assert text.endswith("\n")
    assert "ctg7: 0.00 Mbp" in text and "left" not in text
    assert progress._ticker is None


def test_quiet_progress_says_nothing_and_log_runs_get_the_plain_kind(monkeypatch):
    quiet = log.progress_for(True)
    assert isinstance(quiet, log.QuietProgress)
    monkeypatch.setattr(sys, "stderr", io.StringIO())
    assert log.progress_for(False).live is False  # stderr is not a terminal


# ---------------------------------------------------------------- long records
@pytest.mark.parametrize(
    "model,decode,extra",
    [
        ("cpg-island", "posterior", ["--tracks", "both"]),
        ("cpg-island", "viterbi", []),
        ("cpg-island-8", "posterior", ["--masked", "unknown"]),
        ("gene-segment", "posterior", []),
        ("gene-segment", "viterbi", ["--tracks", "none"]),
    ],
)
def test_long_records_window_by_window_write_the_bytes_of_the_whole_record_path(
    tmp_path, monkeypatch, model, decode, extra
):
    # the whole-record path (every record short) is the reference; with a tiny threshold
    # every record goes window by window (spilled, checkpointed, windows of a few blocks)
    fasta = tmp_path / "long.fa"
    length = "60000" if model == "gene-segment" else "150000"
    res = run(
        ["sample", model, "--length", length, "--records", "3", "--seed", "21", "-o", fasta, "-q"]
    )
    assert res.exit_code == 0, res.output
    text = fasta.read_text()  # a run of unknown bases inside a record, and soft-masking
    lines = text.splitlines()
    lines[5] = "N" * 15 + lines[5][15:].lower()
    fasta.write_text("\n".join(lines) + "\n")
    args = ["annotate", fasta, "-m", model, "--decode", decode, "-q", *extra]
    assert run(args + ["-o", tmp_path / "whole"]).exit_code == 0
    monkeypatch.setattr(annotate_run, "long_threshold", lambda *a: 1000)
    monkeypatch.setattr(annotate_run, "window_length", lambda *a: 4096)
    for jobs in (1, 2):
        out = tmp_path / f"windows{jobs}"
        res = run(args + ["-o", out, "--jobs", jobs])
        assert res.exit_code == 0, res.output
        assert files_of(out) == files_of(tmp_path / "whole")


def test_the_first_compile_says_what_it_is_doing(tmp_path, many_records, monkeypatch):
    from seqstate.engine import jitcache

    monkeypatch.setattr(jitcache, "kernels_cached", lambda modules=("kernels",): False)
    res = CliRunner().invoke(main, ["annotate", str(many_records), "-o", str(tmp_path / "a")])
    assert res.exit_code == 0, res.output
    assert "note: compiling the engine's kernels" in res.output
    monkeypatch.setattr(jitcache, "kernels_cached", lambda modules=("kernels",): True)
    res = CliRunner().invoke(main, ["annotate", str(many_records), "-o", str(tmp_path / "b")])
    assert "compiling" not in res.output
    res = CliRunner().invoke(main, ["annotate", str(many_records), "-o", str(tmp_path / "c"), "-q"])
    assert res.output == ""  # -q: no note, no progress, no summary


def test_kernel_cache_is_found_after_a_run(tmp_path, many_records, monkeypatch):
    from seqstate.engine import jitcache

    # a cache of this test's own, whatever the machine's cache is (set, unwritable or
    # warm): the run in a subprocess caches only in NUMBA_CACHE_DIR (numba's
    # NUMBA_CACHE_LOCATOR_CLASSES), and kernels_cached looks there and beside an empty
    # copy of the engine's folder
    cache = tmp_path / "numba-cache"
    env = dict(
        os.environ,
        PYTHONPATH=str(REPO),
        NUMBA_CACHE_DIR=str(cache),
        NUMBA_CACHE_LOCATOR_CLASSES="UserProvidedCacheLocator",
    )
    monkeypatch.setenv("NUMBA_CACHE_DIR", str(cache))
    monkeypatch.setattr(jitcache, "__file__", str(tmp_path / "engine" / "jitcache.py"))
    monkeypatch.setattr(jitcache, "CACHE", True)
    assert jitcache.kernels_cached(("kernels",)) is False  # nothing cached yet
    proc = subprocess.run(
        [sys.executable, "-m", "seqstate", "annotate", str(many_records), "-o"]
        + [str(tmp_path / "warm"), "-q"],
        env=env,
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert proc.returncode == 0, proc.stderr
    assert any(cache.rglob("kernels.*.nbi"))  # numba cached the run's kernels there
    assert jitcache.kernels_cached(("kernels",)) is True
    assert jitcache.kernels_cached(("no_such_module",)) is False
    # with no on-disk cache (nothing writable) the answer is always "not cached"
    monkeypatch.setattr(jitcache, "CACHE", False)
    assert jitcache.kernels_cached(("kernels",)) is False
