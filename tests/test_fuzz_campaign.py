"""A seeded, time-bounded fuzz campaign of the CLI (tests/fuzzing.py; the full one, at least
10,000 runs, is benchmarks/fuzz_campaign.py).

Rules checked on every run (README "Exit codes", the overwrite rule of io/atomic.py, common
practice for command-line tools): no traceback, no exit-0 run with an output that does not
parse, no file left behind by a failed run, no input changed.  The seed is fixed, so a
failure names a case (command / input / damage / seed) that reproduces with
``fuzzing.run_case``.
"""

from __future__ import annotations

from pathlib import Path

import fuzzing
import pytest

#: Stop after this many runs or seconds, whichever comes first (CI budget: 2 minutes).
MAX_RUNS = 1500
MAX_SECONDS = 80.0
SEED = 2024


@pytest.fixture(scope="module")
def base(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("fuzz-inputs")
    fuzzing.make_inputs(root)
    return root


def test_battery_covers_every_command_and_input() -> None:
    cases = fuzzing.battery()
    assert len(cases) >= 300
    assert {c.command for c in cases} == set(fuzzing.COMMANDS)
    for cmd, reads in fuzzing.READS.items():
        assert {c.target for c in cases if c.command == cmd} >= set(reads)


def test_checker_sees_each_kind_of_break(base: Path, tmp_path: Path) -> None:
    # the rules can fail: a bad GFF3, a ragged TSV and a NaN bedGraph value are caught
    bad = tmp_path / "b.gff3"
    bad.write_text("##gff-version 3\n##sequence-region r 1 10\nr\ts\tx\t5\t20\t.\t+\t.\tID=a\n")
    assert fuzzing.invalid_reason(bad)
    ragged = tmp_path / "t.tsv"
    ragged.write_text("a\tb\n1\t2\t3\n")
    assert fuzzing.invalid_reason(ragged)
    nan = tmp_path / "x.bedgraph"
    nan.write_text("r\t0\t5\tnan\n")
    assert fuzzing.invalid_reason(nan)
    # an undamaged run passes every rule
    out = fuzzing.run_case(fuzzing.Case("annotate", "options", "none", 0), base, tmp_path / "w")
    assert out.exit_code == 0 and out.broken == []


def test_fuzz_campaign(base: Path, tmp_path: Path) -> None:
    tally = fuzzing.run_cases(
        fuzzing.random_cases(SEED),
        base,
        tmp_path / "work",
        max_runs=MAX_RUNS,
        max_seconds=MAX_SECONDS,
    )
    assert tally.runs >= 100, tally.lines()  # enough runs to mean something
    report = "\n".join(tally.lines() + [f"{c} | {r} | {s}" for c, r, s in tally.failures[:30]])
    assert tally.counts == dict.fromkeys(fuzzing.RULES, 0), report
