"""The records table (``STEM.records.tsv``) of annotate and merge, and the run report's
first entries and totals.

The expected values are seqstate's own outputs of the same run (the GFF3 features per
record, the FASTA written here); inputs are synthetic (``seqstate sample`` or seeded
random bases written by the test).
"""

from __future__ import annotations

import hashlib
import json
import random
from pathlib import Path
from typing import Any

import pytest
from helpers import cli_ok as ok
from helpers import cli_run as run

from seqstate.commands.records_table import COLUMNS, LISTED_RECORDS
from seqstate.io.tsvtext import unescape_cell


def load(path: Path) -> dict[str, Any]:
    return json.loads(path.read_text(encoding="utf-8"))


def table_rows(path: Path) -> list[dict[str, str]]:
    lines = path.read_text(encoding="utf-8").splitlines()
    assert lines[0].split("\t") == list(COLUMNS)
    return [dict(zip(COLUMNS, line.split("\t"), strict=True)) for line in lines[1:]]


def write_fasta(path: Path, records: list[tuple[str, str]]) -> Path:
    path.write_text("".join(f">{rid}\n{seq}\n" if seq else f">{rid}\n" for rid, seq in records))
    return path


def random_records(n: int, length: int, seed: int) -> list[tuple[str, str]]:
    rng = random.Random(seed)
    return [(f"c{i}", "".join(rng.choices("ACGT", k=length))) for i in range(n)]


def sha256(path: Path) -> str:
    # SHA-256 as hashlib computes it (FIPS 180-4; Python's standard library)
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Four 8 kb cpg-island records (seed 4) with header-only records around them, a
    backslash and a non-ASCII letter in one ID; a direct run and two group runs."""
    root = tmp_path_factory.mktemp("records")
    sampled = root / "sampled.fa"
    ok("sample", "cpg-island", "--length", 8000, "--records", 4, "--seed", 4, "-o", sampled)
    recs: list[tuple[str, str]] = []
    for line in sampled.read_text().splitlines():
        if line.startswith(">"):
            recs.append((line[1:].split()[0], ""))
        else:
            recs[-1] = (recs[-1][0], recs[-1][1] + line)
    recs[1] = ("sim\\2é", recs[1][1])
    layout = [("e0", ""), recs[0], recs[1], ("e1", ""), recs[2], recs[3], ("e2", "")]
    fasta = write_fasta(root / "asm.fa", layout)
    common = ["--stem", "asm", "-q"]
    ok("annotate", fasta, "-o", root / "direct", *common)
    ok("annotate", fasta, "-o", root / "g0", "--records", "e0,sim1,sim\\2é,e1", *common)
    ok("annotate", fasta, "-o", root / "g1", "--records", "sim3,sim4,e2", *common)
    return root


# ---------------------------------------------------------------- annotate
def test_table_rows_match_the_features_written(runs):
    out = runs / "direct"
    rows = table_rows(out / "asm.records.tsv")
    ids = [unescape_cell(r["record_id"]) for r in rows]
    assert ids == ["e0", "sim1", "sim\\2é", "e1", "sim3", "sim4", "e2"]  # FASTA order
    assert rows[2]["record_id"] == "sim\\\\2é"  # the backslash escaped, the letter kept
    per_record: dict[str, int] = {}
    for line in (out / "asm.gff3").read_text().splitlines():
        if not line.startswith("#"):
            seqid = line.split("\t")[0]
            per_record[seqid] = per_record.get(seqid, 0) + 1
    assert per_record == {"sim3": 1}  # this seed gives sim3 one island (regression value)
    for row, rid in zip(rows, ids):
        if row["status"] == "skipped":
            assert row["skip_reason"] == "empty" and row["length"] == "0"
            assert row["features"] == "." and int(row["header_line"]) >= 1
            continue
        assert row["length"] == row["end_1based"] == "8000" and row["start_1based"] == "1"
        gff_id = rid.replace("\\", "%5C")  # GFF3 escapes it (and keeps the letter)
        assert int(row["features"]) == per_record.get(gff_id, per_record.get(rid, 0))
    report = load(out / "asm.run.json")
    assert report["totals"] == {
        "records": 4,
        "skipped_records": 3,
        "bases": 32000,
        "features": sum(per_record.values()),
        "genes": None,
        "mrnas": None,
        "filtered_genes": None,
    }
    assert report["records_table"] == "asm.records.tsv" and not report["records_truncated"]
    assert [r["id"] for r in report["records"]] == ["sim1", "sim\\2é", "sim3", "sim4"]
    assert [(s["id"], s["reason"]) for s in report["skipped_records"]] == [
        ("e0", "empty"),
        ("e1", "empty"),
        ("e2", "empty"),
    ]
    assert report["output_sha256"]["asm.records.tsv"] == sha256(out / "asm.records.tsv")


def test_summary_and_loglik_come_from_the_table(runs):
    report = load(runs / "direct" / "asm.run.json")
    rows = [r for r in table_rows(runs / "direct" / "asm.records.tsv") if r["status"] != "skipped"]
    assert [float(r["loglik_nat"]) for r in rows] == [r["loglik_nat"] for r in report["records"]]


@pytest.mark.parametrize("n", [LISTED_RECORDS, LISTED_RECORDS + 1])
def test_report_lists_the_first_records_only(tmp_path, n):
    fasta = write_fasta(tmp_path / "many.fa", random_records(n, 40, seed=n))
    ok("annotate", fasta, "-o", tmp_path / "out", "--tracks", "none", "-q")
    report = load(tmp_path / "out" / "many.run.json")
    rows = table_rows(tmp_path / "out" / "many.records.tsv")
    assert len(rows) == n and report["totals"]["records"] == n
    assert report["totals"]["bases"] == 40 * n
    assert report["records_limit"] == LISTED_RECORDS
    assert report["records_truncated"] is (n > LISTED_RECORDS)
    assert [r["id"] for r in report["records"]] == [f"c{i}" for i in range(min(n, 1000))]


def test_rerun_gives_the_same_bytes(runs, tmp_path):
    fasta = runs / "asm.fa"
    ok("annotate", fasta, "-o", tmp_path / "again", "--stem", "asm", "-q", "--jobs", 1)
    for name in ("asm.records.tsv", "asm.gff3", "asm.features.tsv", "asm.CpG_island.bedgraph"):
        assert (tmp_path / "again" / name).read_bytes() == (runs / "direct" / name).read_bytes()
    a, b = load(tmp_path / "again" / "asm.run.json"), load(runs / "direct" / "asm.run.json")
    for r in (a, b):
        r.pop("command_line"), r["options"].pop("out_dir")
    assert a == b


def test_force_replaces_the_table_with_the_set(runs, tmp_path):
    out = tmp_path / "out"
    fasta = runs / "asm.fa"
    ok("annotate", fasta, "-o", out, "--stem", "asm", "-q")
    before = (out / "asm.records.tsv").read_bytes()
    result = run("annotate", fasta, "-o", out, "--stem", "asm", "--records", "sim3", "-q")
    assert result.exit_code != 0 and "already exists" in result.output, result.output
    assert (out / "asm.records.tsv").read_bytes() == before
    ok("annotate", fasta, "-o", out, "--stem", "asm", "--records", "sim3", "--force", "-q")
    rows = table_rows(out / "asm.records.tsv")
    assert [r["record_id"] for r in rows] == ["sim3"]
    assert load(out / "asm.run.json")["output_sha256"]["asm.records.tsv"] == sha256(
        out / "asm.records.tsv"
    )


def test_table_that_is_an_input_is_refused(runs, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    fasta = out / "asm.records.tsv"  # the FASTA lies where the table would go
    fasta.write_bytes((runs / "asm.fa").read_bytes())
    result = run("annotate", fasta, "-o", out, "--stem", "asm", "--force", "-q")
    assert result.exit_code != 0
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and "input" in lines[0]
    assert fasta.read_bytes() == (runs / "asm.fa").read_bytes()
    assert sorted(p.name for p in out.iterdir()) == ["asm.records.tsv"]


# ---------------------------------------------------------------- merge
def test_merge_gathers_the_tables(runs, tmp_path):
    out = tmp_path / "m"
    ok("merge", runs / "g0" / "asm.run.json", runs / "g1" / "asm.run.json", "-o", out, "-q")
    direct = runs / "direct"
    assert (out / "asm.records.tsv").read_bytes() == (direct / "asm.records.tsv").read_bytes()
    merged, want = load(out / "asm.run.json"), load(direct / "asm.run.json")
    for key in ("totals", "records", "skipped_records", "records_table", "output_sha256"):
        assert merged[key] == want[key], key


def test_merge_of_truncated_groups(tmp_path):
    """Groups of 600 and 401 records: the gathered report lists the first 1,000 and the
    gathered table has all 1,001, as a direct run of the whole file."""
    n = LISTED_RECORDS + 1
    fasta = write_fasta(tmp_path / "many.fa", random_records(n, 40, seed=11))
    common = ["--stem", "many", "--tracks", "none", "-q"]
    ok("annotate", fasta, "-o", tmp_path / "direct", *common)
    ids = [f"c{i}" for i in range(n)]
    for g, part in enumerate((ids[:600], ids[600:])):
        (tmp_path / f"g{g}.txt").write_text("\n".join(part) + "\n")
        ok(
            "annotate",
            fasta,
            "-o",
            tmp_path / f"g{g}",
            "--records-file",
            tmp_path / f"g{g}.txt",
            *common,
        )
    assert not load(tmp_path / "g0" / "many.run.json")["records_truncated"]
    out = tmp_path / "m"
    ok(
        "merge",
        tmp_path / "g0" / "many.run.json",
        tmp_path / "g1" / "many.run.json",
        "-o",
        out,
        "-q",
    )
    direct = tmp_path / "direct"
    for name in ("many.records.tsv", "many.gff3", "many.features.tsv"):
        assert (out / name).read_bytes() == (direct / name).read_bytes(), name
    merged, want = load(out / "many.run.json"), load(direct / "many.run.json")
    assert merged["records_truncated"] is True and len(merged["records"]) == LISTED_RECORDS
    for key in ("totals", "records", "records_truncated", "output_sha256"):
        assert merged[key] == want[key], key


def copy_group(src: Path, dest: Path) -> Path:
    dest.mkdir()
    for p in src.iterdir():
        (dest / p.name).write_bytes(p.read_bytes())
    return dest / "asm.run.json"


def forge(report: Path, edit_report=None) -> None:
    """Record the listed files' checksums as they are now (so a file's content, not its
    checksum, is what gets checked), after ``edit_report`` changed the report."""
    data = load(report)
    if edit_report is not None:
        edit_report(data)
    data["output_sha256"] = {n: sha256(report.parent / n) for n in data["output_sha256"]}
    report.write_text(json.dumps(data))


def refused(runs: Path, tmp_path: Path, g0: Path, g1: Path, expected: str, where: str) -> None:
    out = tmp_path / "m"
    result = run("merge", g0, g1, "-o", out)
    assert result.exit_code != 0, result.output
    assert result.exception is None or isinstance(result.exception, SystemExit), result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), result.output
    assert expected in lines[0], lines[0]
    assert lines[0].startswith(f"error: {where}"), lines[0]
    assert not out.exists()


def edit_row(table: Path, line: int, column: str, value: str) -> None:
    lines = table.read_text(encoding="utf-8").splitlines(True)
    cells = lines[line - 1].rstrip("\n").split("\t")
    cells[COLUMNS.index(column)] = value
    lines[line - 1] = "\t".join(cells) + "\n"
    table.write_text("".join(lines), encoding="utf-8")


@pytest.mark.parametrize(
    "column, value, line, expected",
    [
        ("length", "8k", 2, "column 'length' is '8k', expected an integer >= 1"),
        ("features", "-1", 2, "column 'features' is '-1', expected an integer >= 0"),
        ("unknown_bases", "9000", 2, "column 'unknown_bases' is '9000', expected an integer"),
        ("loglik_nat", "x", 2, "column 'loglik_nat' is 'x', expected a number"),
        ("status", "done", 2, "column 'status' is 'done', expected 'annotated' or 'skipped'"),
        ("genes", "3", 2, "column 'mrnas' is '.', expected a count"),
        ("header_line", "7", 2, "column 'header_line' is '7', expected '.'"),
        ("record_id", "sim\\q3", 2, "expected a cell escaped as seqstate writes it"),
        ("record_id", "sim3", 3, "column 'record_id' is 'sim3', expected each record once"),
        ("features", "1\t2", 2, "15 column(s), expected 14"),
        ("length", "1" + "0" * 5000, 2, "expected an integer >= 1"),
        ("loglik_nat", "inf", 2, "expected a number as seqstate writes it"),
        ("record_id", "sim\t3", 2, "15 column(s), expected 14"),
    ],
)
def test_bad_cell_is_one_error_line(runs, tmp_path, column, value, line, expected):
    g1 = copy_group(runs / "g1", tmp_path / "g1")
    table = g1.parent / "asm.records.tsv"
    edit_row(table, line, column, value)
    forge(g1)
    refused(runs, tmp_path, runs / "g0" / "asm.run.json", g1, expected, f"{table} line {line}: ")


def test_table_changed_after_the_run_fails_its_checksum(runs, tmp_path):
    g1 = copy_group(runs / "g1", tmp_path / "g1")
    table = g1.parent / "asm.records.tsv"
    edit_row(table, 2, "features", "5")
    want = load(g1)["output_sha256"]["asm.records.tsv"]
    refused(runs, tmp_path, runs / "g0" / "asm.run.json", g1, f"expected {want}", f"{table}: ")


def test_row_count_differs_from_the_totals(runs, tmp_path):
    g1 = copy_group(runs / "g1", tmp_path / "g1")
    table = g1.parent / "asm.records.tsv"
    lines = table.read_text(encoding="utf-8").splitlines(True)
    table.write_text("".join(lines[:-1] + lines[-2:]), encoding="utf-8")  # sim4 twice
    forge(g1)
    refused(runs, tmp_path, runs / "g0" / "asm.run.json", g1, "each record once", f"{table} line 4")
    table.write_text("".join(lines[:-1]), encoding="utf-8")  # e2 left out
    forge(g1)
    expected = "skipped_records 0 over its rows, expected 1 as run report"
    refused(runs, tmp_path, runs / "g0" / "asm.run.json", g1, expected, f"{table}: ")


def test_table_not_utf8(runs, tmp_path):
    g1 = copy_group(runs / "g1", tmp_path / "g1")
    table = g1.parent / "asm.records.tsv"
    lines = table.read_bytes().splitlines(keepends=True)
    lines[2] = lines[2].replace(b"sim4", b"sim\xff4")
    table.write_bytes(b"".join(lines))
    forge(g1)
    expected = "byte 4 is 0xff, not UTF-8: expected UTF-8 text"
    refused(runs, tmp_path, runs / "g0" / "asm.run.json", g1, expected, f"{table} line 3: ")


def test_table_row_differs_from_the_report_entry(runs, tmp_path):
    g1 = copy_group(runs / "g1", tmp_path / "g1")
    forge(g1, lambda d: d["records"][0].update(unknown_bases=3))
    table = g1.parent / "asm.records.tsv"
    expected = "the row of record 'sim3' differs from 'records[0]' of run report"
    refused(runs, tmp_path, runs / "g0" / "asm.run.json", g1, expected, f"{table} line 2: ")


def test_partial_record_in_the_table_is_refused(runs, tmp_path):
    g1 = copy_group(runs / "g1", tmp_path / "g1")
    table = g1.parent / "asm.records.tsv"
    edit_row(table, 2, "end_1based", "7000")
    forge(g1, lambda d: d["records"][0].update(end_1based=7000))
    gff = g1.parent / "asm.gff3"
    gff.write_text(gff.read_text().replace("sim3 1 8000", "sim3 1 7000"))
    forge(g1, lambda d: d["totals"].update(bases=d["totals"]["bases"] - 1000))
    expected = "record 'sim3' spans 1-7000, expected the whole record 1-8000"
    refused(runs, tmp_path, runs / "g0" / "asm.run.json", g1, expected, f"{table} line 2: ")


def test_rows_out_of_the_fasta_order(runs, tmp_path):
    g1 = copy_group(runs / "g1", tmp_path / "g1")
    table = g1.parent / "asm.records.tsv"
    lines = table.read_text(encoding="utf-8").splitlines(True)
    table.write_text("".join([lines[0], lines[2], lines[1], lines[3]]), encoding="utf-8")
    forge(g1, lambda d: d.update(records=d["records"][::-1]))
    expected = "record 'sim3' comes after record 'sim4', expected the FASTA's record order"
    refused(runs, tmp_path, runs / "g0" / "asm.run.json", g1, expected, f"{table} line 3: ")


def test_old_schema_is_refused(runs, tmp_path):
    g1 = copy_group(runs / "g1", tmp_path / "g1")
    forge(g1, lambda d: d.update(schema="seqstate-run-report/1"))
    expected = "is a run report of an older seqstate (every record listed in the report, no "
    refused(runs, tmp_path, runs / "g0" / "asm.run.json", g1, expected, f"{g1}: ")
