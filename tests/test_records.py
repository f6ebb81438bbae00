"""Record selection (``annotate --records`` / ``--records-file``, seqstate/commands/records.py).

Every expected output here is the whole-file annotate of seqstate itself, run on a FASTA
that holds only the selected records: a selection must give the same bytes.
Inputs are synthetic (``seqstate sample`` from the built-in cpg-island model).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands.records import (
    parse_records_option,
    read_records_file,
    records_selection,
    select_records,
)
from seqstate.errors import UsageError
from seqstate.io.fasta import Record, SkippedRecord


def run(*args: object):
    return CliRunner().invoke(main, [str(a) for a in args])


@pytest.fixture(scope="module")
def fasta(tmp_path_factory) -> Path:
    """Four synthetic records of 6 kb (cpg-island, seed 7) and an empty one between them."""
    folder = tmp_path_factory.mktemp("records")
    raw = folder / "raw.fa"
    result = run("sample", "cpg-island", "--length", 6000, "--records", 4, "--seed", 7, "-o", raw)
    assert result.exit_code == 0, result.output
    text = raw.read_text()
    parts = text.split(">sim3")
    path = folder / "asm.fa"
    path.write_text(parts[0] + ">empty1\n>sim3" + parts[1])
    return path


def subset_fasta(fasta: Path, ids: list[str], out: Path) -> Path:
    """The records of ``fasta`` whose ID is in ``ids``, in file order (headers kept)."""
    keep, chunks = False, []
    for line in fasta.read_text().splitlines(keepends=True):
        if line.startswith(">"):
            keep = line[1:].split()[0] in ids
        if keep:
            chunks.append(line)
    out.write_text("".join(chunks))
    return out


# ---------------------------------------------------------------- parsing


def test_parse_records_option_keeps_given_ids():
    assert parse_records_option("b, a ,c") == ["b", "a", "c"]


@pytest.mark.parametrize(
    "text, message",
    [
        ("a,,b", "--records item 2: an empty record ID"),
        ("a,", "--records item 2: an empty record ID"),
        ("a,b,a", "--records item 3: record ID 'a' is selected twice (first in --records item 1)"),
    ],
)
def test_parse_records_option_errors(text, message):
    with pytest.raises(UsageError) as info:
        parse_records_option(text)
    assert info.value.message.startswith(message)


def test_records_file_lines(tmp_path):
    path = tmp_path / "ids.txt"
    path.write_bytes(b"\xef\xbb\xbfsim2\n\n  sim1  \r\n")
    assert read_records_file(path) == ["sim2", "sim1"]


@pytest.mark.parametrize(
    "content, message",
    [
        (b"sim1\nsim 2\n", "line 2: record ID 'sim 2' contains whitespace"),
        (b"sim1\nsim2\nsim1\n", "line 3: record ID 'sim1' is selected twice"),
        (b"\n\n", "has no record ID (expected one per line)"),
        (b"\xff\xfe", "is not UTF-8 text"),
    ],
)
def test_records_file_errors(tmp_path, content, message):
    path = tmp_path / "ids.txt"
    path.write_bytes(content)
    with pytest.raises(UsageError) as info:
        read_records_file(path)
    assert message in info.value.message
    assert str(path) in info.value.message


def test_records_file_missing(tmp_path):
    with pytest.raises(UsageError, match="does not exist"):
        read_records_file(tmp_path / "nope.txt")


def test_records_selection_one_of_two(tmp_path):
    assert records_selection(None, None) is None
    assert records_selection("a,b", None) == ["a", "b"]
    with pytest.raises(UsageError, match="cannot be combined"):
        records_selection("a", str(tmp_path / "x"))


def test_select_records_keeps_input_order():
    recs = [Record(id=i, description="", seq=b"ACGT") for i in ("r1", "r2", "r3")]
    skipped = [SkippedRecord(id="e1", line0=4, reason="empty")]
    kept, kept_skipped = select_records(recs, skipped, ["r3", "e1", "r1"], "x.fa")
    assert [r.id for r in kept] == ["r1", "r3"]
    assert [r.id for r in kept_skipped] == ["e1"]
    kept, kept_skipped = select_records(recs, skipped, ["r2"], "x.fa")
    assert [r.id for r in kept] == ["r2"] and kept_skipped == []


def test_select_records_names_unknown_ids():
    recs = [Record(id="r1", description="", seq=b"ACGT")]
    with pytest.raises(UsageError) as info:
        select_records(recs, [], ["r1", "u1", "u2"], "x.fa")
    assert info.value.message == "x.fa: 2 selected record ID(s) not in the FASTA: 'u1', 'u2'"
    with pytest.raises(UsageError) as info:
        select_records(recs, [], [f"u{i}" for i in range(8)], "x.fa")
    assert info.value.message.endswith("'u0', 'u1', 'u2', 'u3', 'u4' and 3 more")


# ---------------------------------------------------------------- annotate --records


@pytest.mark.parametrize("how", ["option", "file"])
def test_annotate_records_equals_subset_file(fasta, tmp_path, how):
    """The selection's outputs equal seqstate's whole-file annotate of only those records."""
    ids = ["sim4", "sim2"]  # given out of order: outputs keep the FASTA's order
    if how == "option":
        select = ["--records", ",".join(ids)]
    else:
        (tmp_path / "ids.txt").write_text("\n".join(ids) + "\n")
        select = ["--records-file", tmp_path / "ids.txt"]
    result = run("annotate", fasta, "-o", tmp_path / "sel", "--stem", "s", "-q", *select)
    assert result.exit_code == 0, result.output
    sub = subset_fasta(fasta, ids, tmp_path / "sub.fa")
    result = run("annotate", sub, "-o", tmp_path / "whole", "--stem", "s", "-q")
    assert result.exit_code == 0, result.output
    for name in ("s.gff3", "s.features.tsv", "s.CpG_island.bedgraph"):
        assert (tmp_path / "sel" / name).read_bytes() == (tmp_path / "whole" / name).read_bytes()
    gff = (tmp_path / "sel" / "s.gff3").read_text()
    assert "##sequence-region sim2 1 6000\n##sequence-region sim4 1 6000\n" in gff
    report = json.loads((tmp_path / "sel" / "s.run.json").read_text())
    assert [r["id"] for r in report["records"]] == ["sim2", "sim4"]
    assert report["options"]["records"] == ids
    assert report["skipped_records"] == []


def test_annotate_records_selects_an_empty_record(fasta, tmp_path):
    result = run("annotate", fasta, "-o", tmp_path / "o", "--records", "empty1,sim3", "-q")
    assert result.exit_code == 0, result.output
    report = json.loads((tmp_path / "o" / "asm.run.json").read_text())
    assert [r["id"] for r in report["records"]] == ["sim3"]
    assert [r["id"] for r in report["skipped_records"]] == ["empty1"]


@pytest.mark.parametrize(
    "args, message",
    [
        (
            ["--records", "sim1,nope,sim9"],
            "2 selected record ID(s) not in the FASTA: 'nope', 'sim9'",
        ),
        (["--records", "sim1", "--records-file", "ids.txt"], "cannot be combined"),
        (["--records", "sim1", "--region", "sim1:1-100"], "cannot be combined with --region"),
        (["--records", "sim1,,sim2"], "--records item 2: an empty record ID"),
        (["--records-file", "missing.txt"], "--records-file 'missing.txt' does not exist"),
    ],
)
def test_annotate_records_errors(fasta, tmp_path, monkeypatch, args, message):
    monkeypatch.chdir(tmp_path)
    result = run("annotate", fasta, "-o", "out", *args)
    assert result.exit_code == 2, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and message in lines[0]
    assert not (tmp_path / "out").exists()
