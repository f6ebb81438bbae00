"""``seqstate merge``: annotate runs on groups of records gathered into one output set.

The expected output is always seqstate's own annotate of the whole file (the same
stem): the gathered GFF3, feature table, bedGraph and bigWig tracks must have the same
bytes, and the run report the same fields but the invocation ones (command line,
output folder, --force, the selection).  Inputs are synthetic (``seqstate sample``).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest
from helpers import cli_ok as ok
from helpers import cli_run as run
from helpers import one_error_line as one_error
from helpers import without_invocation

GROUPS = [["sim1", "sim2"], ["sim3"], ["sim4", "sim5"]]


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
        "other.records.tsv",
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
    message = one_error(
        run("merge", reports(runs)[0], copy / "asm.run.json", "-o", tmp_path / "m"), code=1
    )
    assert "asm.CpG_island.bedgraph" in message and "does not exist" in message
    assert not (tmp_path / "m").exists()


@pytest.mark.parametrize(
    "name, content, expected, code",
    [
        ("asm.run.json", "{not json", "line 1: not JSON", 1),
        ("asm.run.json", '{"schema": "other/1"}', "schema is 'other/1' (a string), expected", 1),
        ("asm.json", "{}", "is not a run report (expected a file STEM.run.json)", 2),
    ],
)
def test_merge_bad_report(tmp_path, name, content, expected, code):
    path = tmp_path / name
    path.write_text(content)
    assert expected in one_error(run("merge", path, "-o", tmp_path / "m"), code=code)
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


# ---------------------------------------------------------------- the FASTA's records
def copy_group(src: Path, dest: Path) -> Path:
    """A copy of a group folder (to edit); returns its run report."""
    dest.mkdir()
    for p in src.iterdir():
        (dest / p.name).write_bytes(p.read_bytes())
    return dest / "asm.run.json"


def test_merge_reorders_groups_given_out_of_order(runs, tmp_path):
    given = [reports(runs)[i] for i in (2, 0, 1)]  # records sim4, sim5, sim1, sim2, sim3
    result = ok("merge", *given, "-o", tmp_path / "m")
    assert "gathered in the FASTA's record order" in result.output
    for name in ("asm.gff3", "asm.features.tsv", "asm.CpG_island.bedgraph", "asm.CpG_island.bw"):
        assert (tmp_path / "m" / name).read_bytes() == (runs / "direct" / name).read_bytes(), name
    merged = json.loads((tmp_path / "m" / "asm.run.json").read_text())
    assert [r["id"] for r in merged["records"]] == ["sim1", "sim2", "sim3", "sim4", "sim5"]
    in_order = ok("merge", *reports(runs), "-o", tmp_path / "n")
    assert "gathered in" not in in_order.output


def test_merge_missing_group_names_the_missing_records(runs, tmp_path):
    message = one_error(run("merge", reports(runs)[0], reports(runs)[2], "-o", tmp_path / "m"))
    assert "has 1 record(s) in no group: 'sim3'" in message and "asm.fa" in message
    assert not (tmp_path / "m").exists()
    message = one_error(run("merge", reports(runs)[0], "-o", tmp_path / "m"))
    assert "3 record(s) in no group: 'sim3', 'sim4', 'sim5'" in message


def test_merge_group_that_is_not_a_consecutive_stretch(runs, tmp_path):
    common = ["--stem", "asm", "--tracks", "both", "-q"]
    ok("annotate", runs / "asm.fa", "-o", tmp_path / "a", "--records", "sim1,sim3", *common)
    ok("annotate", runs / "asm.fa", "-o", tmp_path / "b", "--records", "sim2", *common)
    message = one_error(
        run(
            "merge",
            tmp_path / "a" / "asm.run.json",
            tmp_path / "b" / "asm.run.json",
            reports(runs)[2],
            "-o",
            tmp_path / "m",
        )
    )
    assert "holds records 'sim1' and 'sim3' but not the 1 record(s) between them" in message
    assert "('sim2')" in message and "consecutive stretch" in message
    assert not (tmp_path / "m").exists()


def test_merge_checks_the_records_against_the_fasta_option(runs, tmp_path):
    # another FASTA (other record IDs): the groups' records are not in it
    other = tmp_path / "other.fa"
    ok("sample", "cpg-island", "--length", 1000, "--records", 2, "--seed", 4, "-o", other)
    text = other.read_text().replace(">sim", ">chr")
    other.write_text(text)
    message = one_error(run("merge", *reports(runs), "--fasta", other, "-o", tmp_path / "m"))
    assert "'sim1', 'sim2'" in message and "does not have" in message
    # the groups' own FASTA named explicitly is the default's result
    ok("merge", *reports(runs), "--fasta", runs / "asm.fa", "-o", tmp_path / "m")
    assert (tmp_path / "m" / "asm.gff3").read_bytes() == (runs / "direct" / "asm.gff3").read_bytes()


def test_merge_input_not_found_asks_for_fasta(runs, tmp_path):
    moved = []
    for i in range(len(GROUPS)):
        report = copy_group(runs / f"g{i}", tmp_path / f"g{i}")
        data = json.loads(report.read_text())
        data["options"]["input"] = str(tmp_path / "elsewhere.fa")
        report.write_text(json.dumps(data))
        moved.append(report)
    message = one_error(run("merge", *moved, "-o", tmp_path / "m"))
    assert "elsewhere.fa" in message and "does not exist here: give --fasta" in message
    ok("merge", *moved, "--fasta", runs / "asm.fa", "-o", tmp_path / "m", "-q")
    assert (tmp_path / "m" / "asm.gff3").read_bytes() == (runs / "direct" / "asm.gff3").read_bytes()


def test_merge_keeps_one_copy_of_the_gff3_comment_lines(runs, tmp_path):
    ok("merge", *reports(runs), "-o", tmp_path / "m", "-q")
    lines = (tmp_path / "m" / "asm.gff3").read_text().splitlines()
    comments = [line for line in lines if line.startswith("#") and not line.startswith("##")]
    keys = [line.split()[1] for line in comments]
    assert keys == sorted(set(keys), key=keys.index)  # each key once
    assert "model_sha256" in keys
    # every comment line comes before the first feature and after the last region line
    last_region = max(i for i, line in enumerate(lines) if line.startswith("##sequence-region"))
    first_feature = min(i for i, line in enumerate(lines) if not line.startswith("#"))
    assert all(last_region < lines.index(c) < first_feature for c in comments)


def test_merge_refuses_groups_whose_gff3_model_checksum_differs(runs, tmp_path):
    report = copy_group(runs / "g1", tmp_path / "g1")
    gff = report.parent / "asm.gff3"
    text = gff.read_text()
    sha = next(line for line in text.splitlines() if line.startswith("# model_sha256 "))
    gff.write_text(text.replace(sha, "# model_sha256 " + "0" * 64))
    data = json.loads(report.read_text())  # as a run would record the file it wrote
    data["output_sha256"]["asm.gff3"] = hashlib.sha256(gff.read_bytes()).hexdigest()
    report.write_text(json.dumps(data))
    message = one_error(
        run("merge", reports(runs)[0], report, reports(runs)[2], "-o", tmp_path / "m")
    )
    assert "differ in their '# model_sha256' header line" in message
    assert not (tmp_path / "m").exists()


def test_fasta_record_ids_from_headers_and_from_the_index(tmp_path, monkeypatch):
    import gzip

    from Bio import SeqIO

    from seqstate.commands import merge as merge_module

    text = ">a first\nACGT\nAC\n>b\n>c\tdesc\nGGGG\n>d\nT\n"
    plain = tmp_path / "x.fa"
    plain.write_text(text)
    packed = tmp_path / "x.fa.gz"
    packed.write_bytes(gzip.compress(text.encode()))
    # Biopython's FASTA parser (a general-purpose reference library) gives the IDs
    with open(plain, encoding="utf-8") as handle:
        want = [r.id for r in SeqIO.parse(handle, "fasta")]
    assert want == ["a", "b", "c", "d"]
    for block in (3, 7, 1 << 22):  # headers cut across the blocks read
        monkeypatch.setattr(merge_module, "_SCAN_BYTES", block)
        assert merge_module.fasta_record_ids(str(plain)) == want
        assert merge_module.fasta_record_ids(str(packed)) == want
    # with an index the IDs come from it (header-only records kept with length 0)
    from seqstate.io import faidx

    faidx.build_index(plain, empty_records="skip")
    assert (tmp_path / "x.fa.fai").is_file()
    monkeypatch.setattr(merge_module.files, "open_input", None)  # the headers are not read
    assert merge_module.fasta_record_ids(str(plain)) == want
