"""``seqstate merge`` against hostile run reports and group files.

Each case edits a copy of one group (its run report, or a file it lists) and expects
one ``error:`` line naming the file, exit 1, no traceback and no output folder.
Where a case is about a file's content rather than its checksum, the edited report
records the new file's SHA-256 (as a run that wrote it would), so the check of the
content itself is what answers.  Inputs are synthetic (``seqstate sample``).
"""

from __future__ import annotations

import hashlib
import importlib.util
import json
import os
from pathlib import Path
from typing import Any

import pytest
from helpers import cli_ok as ok
from helpers import cli_run as run

from seqstate.commands.runreport import MAX_DEPTH

HAVE_BIGWIG = importlib.util.find_spec("pyBigWig") is not None
TRACKS = "both" if HAVE_BIGWIG else "bedgraph"


def sha256(path: Path) -> str:
    # SHA-256 as hashlib computes it (FIPS 180-4; Python's standard library)
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Three 10 kb cpg-island records (seed 4), a direct run and two group runs."""
    root = tmp_path_factory.mktemp("hostile")
    fasta = root / "asm.fa"
    ok("sample", "cpg-island", "--length", 10000, "--records", 3, "--seed", 4, "-o", fasta)
    common = ["--stem", "asm", "--tracks", TRACKS, "-q"]
    ok("annotate", fasta, "-o", root / "direct", *common)
    ok("annotate", fasta, "-o", root / "g0", "--records", "sim1,sim2", *common)
    ok("annotate", fasta, "-o", root / "g1", "--records", "sim3", *common)
    return root


def copy_group(src: Path, dest: Path) -> Path:
    dest.mkdir()
    for p in src.iterdir():
        (dest / p.name).write_bytes(p.read_bytes())
    return dest / "asm.run.json"


def load(report: Path) -> dict[str, Any]:
    return json.loads(report.read_text())


def save(report: Path, data: dict[str, Any], *, forge: bool = True) -> None:
    """Write ``data`` as the report; ``forge``: record the listed files' checksums as
    they are now (so a file's content, not its checksum, is what gets checked)."""
    if forge and "output_sha256" in data:
        data["output_sha256"] = {
            name: sha256(report.parent / name) for name in data["output_sha256"]
        }
    report.write_text(json.dumps(data))


def refused(runs: Path, tmp_path: Path, edited: Path, expected: str, code: int = 1) -> str:
    """Merge of the first group and ``edited``: one error line, no output folder."""
    out = tmp_path / "m"
    result = run("merge", runs / "g0" / "asm.run.json", edited, "-o", out)
    assert result.exit_code == code, result.output
    assert result.exception is None or isinstance(result.exception, SystemExit), result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), result.output
    assert expected in lines[0], lines[0]
    assert not out.exists()
    return lines[0]


@pytest.fixture
def group(runs, tmp_path) -> Path:
    """An editable copy of the second group; returns its run report."""
    return copy_group(runs / "g1", tmp_path / "g1")


# ---------------------------------------------------------------- wrong types in the report
@pytest.mark.parametrize(
    "edit, expected",
    [
        (lambda d: d.update(options=["a"]), "'options' is a list of 1, expected an object"),
        (lambda d: d.update(options="x"), "'options' is 'x' (a string), expected an object"),
        (lambda d: d.update(records={}), "'records' is an object of 0 key(s), expected a list"),
        (lambda d: d.update(records="sim3"), "'records' is 'sim3' (a string), expected a list"),
        (lambda d: d.update(records=None), "'records' is null, expected a list"),
        (lambda d: d.update(skipped_records={}), "'skipped_records' is an object of 0 key(s)"),
        (lambda d: d.update(skipped_records=["x"]), "'skipped_records' is a list of 1, expected"),
        (lambda d: d["totals"].update(skipped_records=1, records=1), "'skipped_records' is a list"),
        (lambda d: d.update(records=[]), "'records' is a list of 0, expected the first 1"),
        (lambda d: d["totals"].update(records="1"), "'totals.records' is '1' (a string)"),
        (lambda d: d["totals"].update(features=-1), "'totals.features' is -1 (a number)"),
        (lambda d: d.update(records_limit=0), "'records_limit' is 0 (a number)"),
        (lambda d: d.update(records_truncated=True), "'records_truncated' is true (a boolean)"),
        (lambda d: d.update(records_table="x.tsv"), "'records_table' is 'x.tsv' (a string)"),
        (lambda d: d.pop("totals"), "'totals' is missing"),
        (lambda d: d.pop("output_sha256"), "'output_sha256' is missing"),
        (lambda d: d.update(schema="seqstate-run-report/1"), "a run report of an older seqstate"),
        (lambda d: d["records"][0].pop("id"), "'records[0].id' is missing, expected a non-empty"),
        (lambda d: d["records"][0].update(id=["sim3"]), "'records[0].id' is a list of 1"),
        (lambda d: d["records"][0].update(id=""), "'records[0].id' is '' (a string), expected"),
        (lambda d: d["records"][0].update(length=0), "'records[0].length' is 0 (a number)"),
        (lambda d: d["records"][0].update(length=-5), "'records[0].length' is -5 (a number)"),
        (lambda d: d["records"][0].update(length=1.5), "'records[0].length' is 1.5 (a number)"),
        (lambda d: d["records"][0].update(length="4000"), "'records[0].length' is '4000'"),
        (lambda d: d["records"][0].update(length=True), "'records[0].length' is true"),
        (lambda d: d["records"][0].pop("features"), "'records[0].features' is missing"),
        (lambda d: d["records"][0].update(loglik_nat=10**400), "expected a finite number"),
        (lambda d: d["records"][0].update(features=-1), "'records[0].features' is -1"),
        (lambda d: d["records"][0].update(end_1based=20000), "'records[0].end_1based' is 20000"),
        (lambda d: d.update(outputs=[]), "'outputs' is a list of 0, expected a non-empty list"),
        (lambda d: d.update(outputs="asm.gff3"), "'outputs' is 'asm.gff3' (a string)"),
        (lambda d: d.update(outputs=[5]), "'outputs[0]' is 5 (a number), expected a file name"),
        (lambda d: d.update(command_line="seqstate"), "'command_line' is 'seqstate' (a string)"),
        (lambda d: d["model"].update(sha256="x"), "'model.sha256' is 'x' (a string), expected 64"),
        (lambda d: d.pop("model"), "'model' is missing"),
        (lambda d: d.update(extra=1), "unknown key 'extra', expected only the keys"),
        (lambda d: d.update(output_sha256=[]), "'output_sha256' is a list of 0"),
    ],
)
def test_wrong_field_is_one_error_line(runs, tmp_path, group, edit, expected):
    data = load(group)
    edit(data)
    save(group, data, forge=False)
    message = refused(runs, tmp_path, group, expected)
    assert message.startswith(f"error: {group}: "), message


def test_negative_length_gives_no_bigwig(runs, tmp_path, group):
    """A length of -5 once gave a bigWig whose chromosome had 2**32 - 5 bases."""
    data = load(group)
    data["records"][0]["length"] = -5
    save(group, data, forge=False)
    refused(runs, tmp_path, group, "expected an integer >= 1")


@pytest.mark.skipif(not HAVE_BIGWIG, reason="pyBigWig (the bigwig extra) is not installed")
def test_length_past_what_a_bigwig_holds(runs, tmp_path, group):
    data = load(group)
    # bigWig chromosome sizes are unsigned 32-bit (Kent et al. 2010, Bioinformatics 26:2204)
    data["records"][0]["length"] = data["records"][0]["end_1based"] = 1 << 32
    save(group, data, forge=False)
    refused(runs, tmp_path, group, "expected an integer >= 1 and <= 4294967295")


def test_features_missing_leaves_no_outputs(runs, tmp_path, group):
    """Once every output was written before the missing count failed."""
    data = load(group)
    for rec in data["records"]:
        rec.pop("features")
    save(group, data, forge=False)
    refused(runs, tmp_path, group, "'records[0].features' is missing")


def test_outputs_must_list_the_gff3(runs, tmp_path, group):
    data = load(group)
    data["outputs"] = ["asm.run.json"]
    save(group, data, forge=False)
    refused(runs, tmp_path, group, "'outputs' does not list 'asm.gff3'")


def test_output_of_a_kind_merge_does_not_gather(runs, tmp_path, group):
    (group.parent / "asm.cds.fa").write_text(">x\nATG\n")
    data = load(group)
    data["outputs"].append("asm.cds.fa")
    save(group, data, forge=False)
    refused(runs, tmp_path, group, "'outputs[6]' is 'asm.cds.fa' (a string), expected a name")


def test_deep_json_is_an_error_line(runs, tmp_path, group):
    group.write_text("[" * 100_000 + "]" * 100_000)
    refused(runs, tmp_path, group, "nested too deep to read")


def test_deep_json_inside_options(runs, tmp_path, group):
    data = load(group)
    data["options"]["truth_types"] = json.loads("[" * (MAX_DEPTH + 5) + "]" * (MAX_DEPTH + 5))
    save(group, data, forge=False)
    refused(runs, tmp_path, group, f"expected at most {MAX_DEPTH}")


def test_number_python_cannot_read(runs, tmp_path, group):
    text = group.read_text().replace('"length": 10000', '"length": 1' + "0" * 5000, 1)
    group.write_text(text)
    refused(runs, tmp_path, group, "a value JSON cannot be read back")


def test_report_not_utf8(runs, tmp_path, group):
    group.write_bytes(group.read_bytes().replace(b'"sim3"', b'"sim\xff"', 1))
    refused(runs, tmp_path, group, "is 0xff, not UTF-8: expected UTF-8 JSON")


# ---------------------------------------------------------------- names that leave the folder
def test_output_path_escape_is_refused(runs, tmp_path, group):
    secret = tmp_path / "secret.txt"
    secret.write_text("private\n")
    (group.parent / "isl.").mkdir()
    data = load(group)
    data["outputs"].append("isl./../../secret.txt")
    save(group, data, forge=False)
    refused(runs, tmp_path, group, "expected a plain file name in the report's folder")


def test_output_link_out_of_the_folder_is_refused(runs, tmp_path, group):
    bedgraph = group.parent / "asm.CpG_island.bedgraph"
    outside = tmp_path / "outside.bedgraph"
    outside.write_bytes(bedgraph.read_bytes())
    bedgraph.unlink()
    bedgraph.symlink_to(outside)
    refused(runs, tmp_path, group, "leads out of the report's folder")


def test_output_that_is_not_a_regular_file(runs, tmp_path, group):
    bedgraph = group.parent / "asm.CpG_island.bedgraph"
    bedgraph.unlink()
    os.mkfifo(bedgraph)  # reading it would block forever
    refused(runs, tmp_path, group, "is not a regular file")


# ---------------------------------------------------------------- group files against the report
def test_corrupted_group_file_fails_its_checksum(runs, tmp_path, group):
    bedgraph = group.parent / "asm.CpG_island.bedgraph"
    text = bedgraph.read_text()
    last = text.rstrip("\n").rsplit("\t", 1)
    bedgraph.write_text(last[0] + "\t" + ("0.5000" if last[1] != "0.5000" else "0.2500") + "\n")
    message = refused(
        runs, tmp_path, group, "expected " + load(group)["output_sha256"][bedgraph.name]
    )
    assert message.startswith(f"error: {bedgraph}: SHA-256 ") and "changed after the run" in message


@pytest.mark.parametrize("name", ["asm.gff3", "asm.CpG_island.bedgraph", "asm.features.tsv"])
def test_group_text_file_not_utf8(runs, tmp_path, group, name):
    path = group.parent / name
    lines = path.read_bytes().splitlines(keepends=True)
    lines[1] = lines[1].rstrip(b"\n") + b"\xff\xfe\n"
    path.write_bytes(b"".join(lines))
    save(group, load(group))
    message = refused(runs, tmp_path, group, "not UTF-8: expected UTF-8 text")
    assert message.startswith(f"error: {path} line 2: "), message


def test_gff3_feature_count_differs_from_the_report(runs, tmp_path, group):
    data = load(group)
    assert data["records"][0]["features"] > 0  # this seed gives sim3 one island (regression value)
    gff = group.parent / "asm.gff3"
    gff.write_text("".join(line for line in gff.read_text().splitlines(True) if line[0] == "#"))
    save(group, data)
    refused(runs, tmp_path, group, "0 feature line(s) on record 'sim3', expected 1")


def test_gff3_sequence_region_of_another_record(runs, tmp_path, group):
    gff = group.parent / "asm.gff3"
    gff.write_text(
        gff.read_text().replace("##sequence-region sim3 1 10000", "##sequence-region sim9 1 10000")
    )
    save(group, load(group))
    refused(runs, tmp_path, group, "expected '##sequence-region sim3 1 10000'")


def test_bedgraph_interval_past_the_record(runs, tmp_path, group):
    bedgraph = group.parent / "asm.CpG_island.bedgraph"
    lines = bedgraph.read_text().splitlines(True)
    lines.append("sim3\t9999\t10500\t0.1000\n")
    bedgraph.write_text("".join(lines))
    save(group, load(group))
    refused(runs, tmp_path, group, "interval 9999-10500, expected 0 <= start < end <= 10000")


def test_feature_table_row_count_differs(runs, tmp_path, group):
    tsv = group.parent / "asm.features.tsv"
    tsv.write_text(tsv.read_text().splitlines(True)[0])
    save(group, load(group))
    refused(runs, tmp_path, group, "0 row(s), expected 1")


def test_last_line_without_line_end(runs, tmp_path, group):
    tsv = group.parent / "asm.features.tsv"
    tsv.write_text(tsv.read_text().rstrip("\n"))
    save(group, load(group))
    refused(runs, tmp_path, group, "the last line has no line end")


@pytest.mark.skipif(not HAVE_BIGWIG, reason="pyBigWig (the bigwig extra) is not installed")
def test_group_bigwig_that_is_not_one(runs, tmp_path, group):
    bw = group.parent / "asm.CpG_island.bw"
    bw.write_text("track type=bedGraph\n")
    save(group, load(group))
    message = refused(runs, tmp_path, group, "expected a bigWig file")
    assert message.startswith(f"error: {bw}: "), message


@pytest.mark.skipif(not HAVE_BIGWIG, reason="pyBigWig (the bigwig extra) is not installed")
def test_group_bigwig_cut_short(runs, tmp_path, group):
    bw = group.parent / "asm.CpG_island.bw"
    bw.write_bytes(bw.read_bytes()[:64])  # the magic number, then nothing usable
    save(group, load(group))
    refused(runs, tmp_path, group, "asm.CpG_island.bw")


@pytest.mark.skipif(not HAVE_BIGWIG, reason="pyBigWig (the bigwig extra) is not installed")
def test_group_bigwig_of_other_records(runs, tmp_path, group):
    bw = group.parent / "asm.CpG_island.bw"
    bw.write_bytes((runs / "g0" / "asm.CpG_island.bw").read_bytes())
    save(group, load(group))
    refused(runs, tmp_path, group, "expected the run report's 1 record(s) with their lengths")


# ---------------------------------------------------------------- checksums
def test_annotate_records_the_checksum_of_each_output(runs):
    report = load(runs / "direct" / "asm.run.json")
    listed = [n for n in report["outputs"] if n != "asm.run.json"]
    assert report["output_sha256"] == {n: sha256(runs / "direct" / n) for n in listed}


def test_merged_report_has_the_checksums_of_the_merged_files(runs, tmp_path):
    out = tmp_path / "m"
    ok("merge", runs / "g0" / "asm.run.json", runs / "g1" / "asm.run.json", "-o", out, "-q")
    report = load(out / "asm.run.json")
    assert report["output_sha256"] == load(runs / "direct" / "asm.run.json")["output_sha256"]
    assert report["output_sha256"] == {n: sha256(out / n) for n in report["output_sha256"]}


def test_reports_without_checksums_are_refused(runs, tmp_path, group):
    """Every report of this schema records its outputs' checksums: one without them is
    refused, not checked line by line."""
    data = load(group)
    data.pop("output_sha256")
    save(group, data)
    refused(runs, tmp_path, group, "'output_sha256' is missing")
