"""``seqstate merge``: annotate runs on groups of records gathered into one output set.

The expected output is always seqstate's own annotate of the whole file (the same
stem): the gathered GFF3, feature table, bedGraph and bigWig tracks must have the same
bytes, and the run report the same fields but the invocation ones (command line,
output folder, --force, the selection).  Inputs are synthetic (``seqstate sample``).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands.merge import INVOCATION_OPTIONS

GROUPS = [["sim1", "sim2"], ["sim3"], ["sim4", "sim5"]]


def run(*args: object):
    return CliRunner().invoke(main, [str(a) for a in args])


def ok(*args: object):
    result = run(*args)
    assert result.exit_code == 0, result.output
    return result


def one_error(result, code: int = 2) -> str:
    assert result.exit_code == code, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), result.output
    return lines[0]


def without_invocation(report: dict) -> dict:
    report = dict(report)
    report.pop("command_line")
    report["options"] = {k: v for k, v in report["options"].items() if k not in INVOCATION_OPTIONS}
    return report


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Five 30 kb cpg-island records (seed 3), a direct run and three group runs."""
    root = tmp_path_factory.mktemp("merge")
    fasta = root / "asm.fa"
    ok("sample", "cpg-island", "--length", 30000, "--records", 5, "--seed", 3, "-o", fasta)
    common = ["--stem", "asm", "--tracks", "both", "-q"]
    ok("annotate", fasta, "-o", root / "direct", *common)
    for i, ids in enumerate(GROUPS):
        ok("annotate", fasta, "-o", root / f"g{i}", "--records", ",".join(ids), *common)
    return root


def reports(root: Path) -> list[Path]:
    return [root / f"g{i}" / "asm.run.json" for i in range(len(GROUPS))]


def test_merge_equals_direct_run(runs, tmp_path):
    ok("merge", *reports(runs), "-o", tmp_path / "m", "-q")
    direct = sorted(p.name for p in (runs / "direct").iterdir())
    assert sorted(p.name for p in (tmp_path / "m").iterdir()) == direct
    for name in direct:
        if name.endswith(".run.json"):
            continue
        assert (tmp_path / "m" / name).read_bytes() == (runs / "direct" / name).read_bytes(), name
    gff = (runs / "direct" / "asm.gff3").read_text()
    # every group has features (regression value of this seed: one island on each of these)
    assert {line.split("\t")[0] for line in gff.splitlines() if "\tCpG_island\t" in line} == {
        "sim2",
        "sim3",
        "sim4",
    }
    merged = json.loads((tmp_path / "m" / "asm.run.json").read_text())
    want = json.loads((runs / "direct" / "asm.run.json").read_text())
    assert without_invocation(merged) == without_invocation(want)
    assert list(merged) == list(want) and list(merged["options"]) == list(want["options"])
    assert merged["options"]["records"] is None and merged["options"]["out_dir"] == str(
        tmp_path / "m"
    )
    assert merged["command_line"][:2] == ["seqstate", "merge"]


def test_merge_into_the_direct_folder_gives_the_same_report(runs, tmp_path):
    """Into the folder of a direct run, the report differs from its one only in command_line."""
    out = tmp_path / "d"
    ok("annotate", runs / "asm.fa", "-o", out, "--stem", "asm", "--tracks", "both", "-q")
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    ok("merge", *reports(runs), "-o", out, "--force", "-q")
    after = {p.name: p.read_bytes() for p in out.iterdir()}
    assert sorted(after) == sorted(before)
    for name in before:
        if not name.endswith(".run.json"):
            assert after[name] == before[name], name
    a, b = json.loads(after["asm.run.json"]), json.loads(before["asm.run.json"])
    assert a.pop("command_line") != b.pop("command_line")
    a["options"]["force"] = False  # the merge was asked for --force, the direct run not
    assert a == b


def test_merge_one_group_is_a_copy(runs, tmp_path):
    ok(
        "annotate",
        runs / "asm.fa",
        "-o",
        tmp_path / "all",
        "--records",
        "sim1,sim2,sim3,sim4,sim5",
        "--stem",
        "asm",
        "--tracks",
        "both",
        "-q",
    )
    ok("merge", tmp_path / "all" / "asm.run.json", "-o", tmp_path / "m", "--stem", "asm", "-q")
    for name in ("asm.gff3", "asm.features.tsv", "asm.CpG_island.bedgraph", "asm.CpG_island.bw"):
        assert (tmp_path / "m" / name).read_bytes() == (runs / "direct" / name).read_bytes()


def test_merge_new_stem(runs, tmp_path):
    ok("merge", *reports(runs), "-o", tmp_path / "m", "--stem", "other", "-q")
    names = sorted(p.name for p in (tmp_path / "m").iterdir())
    assert names == [
        "other.CpG_island.bedgraph",
        "other.CpG_island.bw",
        "other.features.tsv",
        "other.gff3",
        "other.run.json",
    ]
    report = json.loads((tmp_path / "m" / "other.run.json").read_text())
    assert report["outputs"] == names and report["options"]["stem"] == "other"


def test_merge_refuses_existing_outputs_without_force(runs, tmp_path):
    out = tmp_path / "m"
    out.mkdir()
    (out / "asm.gff3").write_text("mine\n")
    message = one_error(run("merge", *reports(runs), "-o", out))
    assert "asm.gff3" in message and "--force" in message
    assert (out / "asm.gff3").read_text() == "mine\n"
    assert sorted(p.name for p in out.iterdir()) == ["asm.gff3"]
    ok("merge", *reports(runs), "-o", out, "--force", "-q")
    assert (out / "asm.gff3").read_bytes() == (runs / "direct" / "asm.gff3").read_bytes()


def test_merge_record_in_two_groups(runs, tmp_path):
    message = one_error(run("merge", *reports(runs), reports(runs)[1], "-o", tmp_path / "m"))
    assert "record 'sim3' is in two groups" in message
    assert not (tmp_path / "m").exists()


def test_merge_groups_with_different_options(runs, tmp_path):
    ok(
        "annotate",
        runs / "asm.fa",
        "-o",
        tmp_path / "x",
        "--records",
        "sim3",
        "--stem",
        "asm",
        "--tracks",
        "both",
        "--min-length",
        "50",
        "-q",
    )
    message = one_error(
        run("merge", reports(runs)[0], tmp_path / "x" / "asm.run.json", "-o", tmp_path / "m")
    )
    assert "differ in" in message and "min_length" in message
    assert not (tmp_path / "m").exists()


def test_merge_groups_with_different_tracks(runs, tmp_path):
    ok(
        "annotate",
        runs / "asm.fa",
        "-o",
        tmp_path / "x",
        "--records",
        "sim3",
        "--stem",
        "asm",
        "--tracks",
        "bedgraph",
        "-q",
    )
    message = one_error(
        run("merge", reports(runs)[0], tmp_path / "x" / "asm.run.json", "-o", tmp_path / "m")
    )
    assert "differ in option 'tracks'" in message


def test_merge_missing_group_file(runs, tmp_path):
    copy = tmp_path / "g"
    copy.mkdir()
    for p in (runs / "g1").iterdir():
        if p.name != "asm.CpG_island.bedgraph":
            (copy / p.name).write_bytes(p.read_bytes())
    message = one_error(run("merge", reports(runs)[0], copy / "asm.run.json", "-o", tmp_path / "m"))
    assert "asm.CpG_island.bedgraph" in message and "does not exist" in message
    assert not (tmp_path / "m").exists()


@pytest.mark.parametrize(
    "name, content, expected",
    [
        ("asm.run.json", "{not json", "line 1: not JSON"),
        ("asm.run.json", '{"schema": "other/1"}', "schema 'other/1', expected"),
        ("asm.json", "{}", "is not a run report (expected a file STEM.run.json)"),
    ],
)
def test_merge_bad_report(tmp_path, name, content, expected):
    path = tmp_path / name
    path.write_text(content)
    assert expected in one_error(run("merge", path, "-o", tmp_path / "m"))
    assert not (tmp_path / "m").exists()


def test_merge_missing_report(tmp_path):
    message = one_error(run("merge", tmp_path / "no.run.json", "-o", tmp_path / "m"))
    assert "does not exist" in message


def test_merge_region_run_refused(runs, tmp_path):
    ok(
        "annotate",
        runs / "asm.fa",
        "-o",
        tmp_path / "r",
        "--region",
        "sim1:1-5000",
        "--stem",
        "asm",
        "-q",
    )
    message = one_error(run("merge", tmp_path / "r" / "asm.run.json", "-o", tmp_path / "m"))
    assert "--region run" in message


def test_merge_different_stems_need_stem(runs, tmp_path):
    ok(
        "annotate",
        runs / "asm.fa",
        "-o",
        tmp_path / "x",
        "--records",
        "sim3",
        "--stem",
        "b",
        "--tracks",
        "both",
        "-q",
    )
    message = one_error(
        run("merge", reports(runs)[0], tmp_path / "x" / "b.run.json", "-o", tmp_path / "m")
    )
    assert "different stems (asm, b): give --stem" in message
