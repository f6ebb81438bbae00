"""Progress on stderr (seqstate.log.Progress) with a fake clock: no sleeping, no timing races.

What is checked: the line names the task and the record from the start (never ``: 0.00``);
while a record's work is reported in large steps the line moves on and its time left falls
instead of stalling and rising; off a terminal the first line comes within 10 s and then one
a minute; totals count only the selected records; calibrate's line is named.
"""

from __future__ import annotations

import io
import re
import sys
import threading

import pytest

from seqstate import log
from seqstate.commands.annotate import AnnotateOptions, annotate


class FakeClock:
    """A clock the test moves by hand (seconds)."""

    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def made(live: bool = False, **kwargs) -> tuple[log.Progress, io.StringIO, FakeClock]:
    clock = FakeClock()
    stream = io.StringIO()
    progress = log.Progress(stream, live=live, clock=clock, ticker=False, **kwargs)
    return progress, stream, clock


def percent(line: str) -> float:
    return float(re.search(r"\((\d+)%\)", line).group(1))


def seconds_left(line: str) -> float:
    m = re.search(r", (?:(\d+) min )?(\d+) s left", line)
    assert m, line
    return 60.0 * int(m.group(1) or 0) + int(m.group(2))


# ---------------------------------------------------------------- the line
def test_the_line_names_task_and_record_from_the_start():
    progress, _, clock = made(task="annotate")
    progress.start(1_350_000)
    assert progress.line() == "annotate: 0.00/1.35 Mbp (0%)"  # no record yet, no empty name
    progress.working("NC_004353.4", 1_350_000)
    clock.now += 3
    assert progress.line().startswith("annotate NC_004353.4: 0.00/1.35 Mbp (0%)")
    assert not progress.line().startswith(":")


def test_a_record_reported_in_two_halves_moves_on_and_its_time_left_falls():
    # a record whose bases are reported at half and at the end (posterior, then decoding):
    # between the two the line goes on at the measured rate instead of sitting at 50 %
    progress, _, clock = made(task="annotate")
    progress.start(1_000_000)
    progress.working("chr4", 1_000_000)
    clock.now += 10.0
    progress.advance(500_000, "chr4")
    at_half = progress.line()
    assert percent(at_half) == 50 and seconds_left(at_half) == 10
    lines = []
    for _ in range(4):
        clock.now += 2.0
        lines.append(progress.line())
    assert [percent(x) for x in lines] == [60, 70, 80, 90]
    assert [seconds_left(x) for x in lines] == [8, 6, 4, 2]
    # slower than measured: the line stops short of the record's end (99 %), never past
    # it, and the time left does not grow
    clock.now += 30.0
    late = progress.line()
    assert percent(late) == 99 and seconds_left(late) <= 2
    progress.advance(500_000, "chr4")
    assert progress.line().startswith("annotate chr4: 1.00/1.00 Mbp (100%)")


def test_interpolation_stops_at_the_pending_bases_of_several_records():
    progress, _, clock = made()
    progress.start(3_000)
    progress.working("a", 1_000)
    clock.now += 1.0
    progress.advance(1_000, "a")
    progress.working("b", 1_000)
    clock.now += 100.0  # far longer than the measured rate needs
    # 1,000 done and 990 of b's 1,000 shown as done: 66 % of 3,000, not more
    assert progress.line().startswith("b: 0.00/0.00 Mbp (66%)")


def test_total_unknown_shows_bases_and_no_time_left():
    progress, _, clock = made()
    progress.start(0)
    progress.working("ctg7", 500)
    clock.now += 1.0
    progress.advance(500, "ctg7")
    line = progress.line()
    assert line.startswith("ctg7: 0.00 Mbp, ") and "Mbp/s" in line and "left" not in line


def test_advance_from_many_threads_adds_up():
    progress, _, _ = made()
    progress.start(0)

    def work() -> None:
        for _ in range(1000):
            progress.advance(3, "r")

    threads = [threading.Thread(target=work) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert progress.done == 12_000


# ---------------------------------------------------------------- when lines are written
def test_in_a_log_the_first_line_comes_within_10_s_then_one_a_minute():
    progress, stream, clock = made(live=False, task="annotate")
    progress.start(10_000_000)
    progress.working("chr1", 10_000_000)
    drawn_at = []
    for step in range(0, 200):  # 200 s, polled every second as the ticker does
        clock.now = 100.0 + step
        if step and step % 7 == 0:
            progress.advance(100_000, "chr1")
        if progress.poll():
            drawn_at.append(step)
    assert drawn_at[0] <= 10
    assert [b - a for a, b in zip(drawn_at, drawn_at[1:])] == [60] * (len(drawn_at) - 1)
    lines = stream.getvalue().splitlines()
    assert len(lines) == len(drawn_at) and "\r" not in stream.getvalue()
    assert all(x.startswith("progress: annotate chr1: ") for x in lines)
    assert "/10.00 Mbp" in lines[-1] and "Mbp/s" in lines[-1] and "left" in lines[-1]


def test_on_a_terminal_the_line_is_redrawn_every_second_without_calls():
    progress, stream, clock = made(live=True, task="annotate")
    progress.start(0)
    progress.working("ctg7", 500)
    clock.now += 0.5
    assert not progress.poll()
    clock.now += 0.6
    assert progress.poll()
    clock.now += 1.0
    assert progress.poll()
    progress.finish()
    text = stream.getvalue()
    assert text.count("\r") == 2 and text.endswith("\n")
    assert "annotate ctg7: 0.00 Mbp" in text and "left" not in text


def test_the_ticker_thread_ends_with_finish():
    progress = log.Progress(io.StringIO(), live=False)
    progress.start(10)
    assert any(t.name == "seqstate-progress" for t in threading.enumerate())
    progress.finish()
    assert not any(t.name == "seqstate-progress" for t in threading.enumerate())


def test_quiet_progress_says_nothing_and_log_runs_get_the_plain_kind(monkeypatch):
    quiet = log.progress_for(True, "annotate")
    assert isinstance(quiet, log.QuietProgress)
    quiet.start(10)
    quiet.working("r", 10)
    quiet.advance(10, "r")
    assert not quiet.poll()
    monkeypatch.setattr(sys, "stderr", io.StringIO())
    plain = log.progress_for(False, "annotate")
    assert plain.live is False and plain.first <= 10 and plain.interval == 60
    assert plain.task == "annotate"


# ---------------------------------------------------------------- callers
class Recording(log.QuietProgress):
    """Counts silently and keeps every call."""

    def __init__(self) -> None:
        super().__init__()
        self.calls: list[tuple] = []

    def start(self, total_bases: int) -> None:
        self.calls.append(("start", total_bases))
        super().start(total_bases)

    def working(self, what: str, bases: int) -> None:
        self.calls.append(("working", what, bases))
        super().working(what, bases)

    def advance(self, bases: int, what: str) -> None:
        self.calls.append(("advance", what, bases))
        super().advance(bases, what)


@pytest.fixture()
def indexed_fasta(tmp_path):
    fasta = tmp_path / "three.fa"
    seqs = {"r1": "ACGT" * 500, "r2": "GGCC" * 700, "r3": "ATTA" * 300}
    fasta.write_text("".join(f">{k}\n{v}\n" for k, v in seqs.items()))
    offset, fai = 0, []
    for k, v in seqs.items():
        offset += len(k) + 2
        fai.append(f"{k}\t{len(v)}\t{offset}\t{len(v)}\t{len(v) + 1}\n")
        offset += len(v) + 1
    (tmp_path / "three.fa.fai").write_text("".join(fai))
    return fasta, seqs


def test_annotate_total_counts_only_the_selected_records(tmp_path, indexed_fasta):
    fasta, seqs = indexed_fasta
    rec = Recording()
    annotate(
        AnnotateOptions(input=str(fasta), out_dir=str(tmp_path / "o"), records=["r1", "r3"]),
        progress=rec,
    )
    assert rec.calls[0] == ("start", len(seqs["r1"]) + len(seqs["r3"]))
    # each record is named before its bases are counted, and its bases add up
    for rid in ("r1", "r3"):
        mine = [c for c in rec.calls[1:] if c[1] == rid]
        assert mine[0] == ("working", rid, len(seqs[rid]))
        assert sum(c[2] for c in mine[1:] if c[0] == "advance") == len(seqs[rid])
    assert not [c for c in rec.calls if c[1:2] == ("r2",)]
    rec2 = Recording()
    annotate(AnnotateOptions(input=str(fasta), out_dir=str(tmp_path / "all")), progress=rec2)
    assert rec2.calls[0] == ("start", sum(len(v) for v in seqs.values()))


def test_calibrate_progress_is_named(tmp_path, monkeypatch):
    from seqstate.commands import calibrate as cal

    made_for = []

    def recording_for(quiet: bool, task: str = "") -> log.Progress:
        made_for.append(task)
        return Recording()

    monkeypatch.setattr(log, "progress_for", recording_for)
    cal.calibrate(
        cal.CalibrateOptions(
            model="cpg-island", length=2_000, records=2, seed=1, out=str(tmp_path / "c.tsv")
        ),
        quiet=False,
    )
    assert made_for == ["calibrate"]
