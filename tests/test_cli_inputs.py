"""Bad and unusual inputs end to end: empty records, model thresholds, sample limits,
model files, compressed or marked inputs.  All sequences are synthetic (hand-written
here or drawn with a fixed seed)."""

from __future__ import annotations

import bz2
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.io.tables import builtin_dir


def run(args: list) -> tuple[int, list[str], list[str]]:
    """Run the CLI in-process: (exit status, stdout lines, stderr lines), with no crash."""
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    assert "Traceback" not in result.stderr
    return result.exit_code, result.stdout.splitlines(), result.stderr.splitlines()


def one_error(args: list, status: int, *must_contain: str) -> str:
    code, _, err = run(args)
    assert code == status, err
    assert len(err) == 1 and err[0].startswith("error: "), err
    for text in must_contain:
        assert text in err[0], f"{text!r} not in {err[0]!r}"
    return err[0]


def background(n: int, seed: int) -> str:
    """AT-rich synthetic DNA with few CpGs (A, T 0.3; C, G 0.2 each)."""
    rng = np.random.default_rng(seed)
    return "".join(rng.choice(list("ACGT"), size=n, p=[0.3, 0.2, 0.2, 0.3]))


def fasta(path: Path, records: list[tuple[str, str]]) -> Path:
    path.write_text("".join(f">{rid}\n{seq}\n" for rid, seq in records), encoding="utf-8")
    return path


# ---------------------------------------------------------------- empty records
def test_annotate_skips_an_empty_record_with_a_warning(tmp_path):
    fa = tmp_path / "asm.fa"
    fa.write_text(
        f">a\n{background(600, 1)}\n>gap_7 unplaced\n>b\n{background(400, 2)}\n",
        encoding="utf-8",
    )
    out = tmp_path / "out"
    code, _, err = run(["annotate", fa, "-o", out, "-q"])
    assert code == 0, err
    assert err == [
        f"warning: {fa} line 3, record 'gap_7': a header with no sequence, skipped "
        "(--empty-records error refuses such records)"
    ]
    report = json.loads((out / "asm.run.json").read_text(encoding="utf-8"))
    assert report["skipped_records"] == [{"id": "gap_7", "line": 3, "reason": "empty"}]
    assert [r["id"] for r in report["records"]] == ["a", "b"]
    regions = [
        ln for ln in (out / "asm.gff3").read_text().splitlines() if ln.startswith("##sequence")
    ]
    assert regions == ["##sequence-region a 1 600", "##sequence-region b 1 400"]


def test_annotate_empty_records_error_option(tmp_path):
    fa = fasta(tmp_path / "asm.fa", [("a", "ACGTACGT"), ("hole", ""), ("c", "ACGT")])
    out = tmp_path / "out"
    one_error(
        ["annotate", fa, "-o", out, "--empty-records", "error"],
        1,
        f"{fa} line 3, record 'hole'",
        "empty sequence",
    )
    assert not out.exists() or list(out.iterdir()) == []


def test_many_empty_records_warn_five_times_then_count(tmp_path):
    records = [("a", "ACGTACGTTA")] + [(f"e{i}", "") for i in range(8)]
    fa = fasta(tmp_path / "many.fa", records)
    code, _, err = run(["annotate", fa, "-o", tmp_path / "out", "-q"])
    assert code == 0, err
    assert len(err) == 6 and "record 'e4'" in err[4], err
    assert err[5] == (
        "warning: 3 more record(s) with no sequence skipped (all are listed in the records table)"
    )


# ---------------------------------------------------------------- decoding thresholds
@pytest.fixture(scope="module")
def short_island(tmp_path_factory) -> Path:
    """One record with a 120-base CpG-rich stretch in AT-rich DNA (synthetic)."""
    seq = background(3000, 11) + "CG" * 20 + "GCGC" * 20 + "CG" * 20 + background(3000, 12)
    return fasta(tmp_path_factory.mktemp("short") / "short.fa", [("r1", seq)])


def features(out: Path, stem: str) -> list[list[str]]:
    lines = (out / f"{stem}.gff3").read_text(encoding="utf-8").splitlines()
    return [ln.split("\t") for ln in lines if not ln.startswith("#")]


def test_cpg_island_default_minimum_is_200_bases(tmp_path, short_island):
    # Gardiner-Garden & Frommer 1987 (J. Mol. Biol. 196:261): islands are >= 200 bp, the
    # built-in model's [defaults] min_length
    out = tmp_path / "default"
    code, _, err = run(["annotate", short_island, "-o", out, "-q"])
    assert code == 0, err
    assert features(out, "short") == []
    report = json.loads((out / "short.run.json").read_text(encoding="utf-8"))
    assert report["thresholds"] == {
        "min_posterior": 0.5,
        "min_length": 200,
        "from": {"min_posterior": "model", "min_length": "model"},
    }
    assert report["options"]["min_length"] is None


def test_explicit_min_length_overrides_the_model(tmp_path, short_island):
    out = tmp_path / "explicit"
    code, _, err = run(["annotate", short_island, "-o", out, "-q", "--min-length", "1"])
    assert code == 0, err
    found = features(out, "short")
    assert len(found) == 1 and int(found[0][4]) - int(found[0][3]) + 1 < 200, found
    report = json.loads((out / "short.run.json").read_text(encoding="utf-8"))
    assert report["thresholds"]["min_length"] == 1
    assert report["thresholds"]["from"]["min_length"] == "option"


def test_model_without_defaults_keeps_one_base(tmp_path, short_island):
    model = tmp_path / "cpg-nodefaults"
    shutil.copytree(builtin_dir() / "cpg-island", model)
    text = (model / "model.toml").read_text(encoding="utf-8")
    start, end = text.index("[defaults]"), text.index("[tables]")
    (model / "model.toml").write_text(text[:start] + text[end:], encoding="utf-8")
    out = tmp_path / "nodefaults"
    code, _, err = run(["annotate", short_island, "-m", model, "-o", out, "-q"])
    assert code == 0, err
    assert len(features(out, "short")) == 1
    report = json.loads((out / "short.run.json").read_text(encoding="utf-8"))
    assert report["thresholds"]["min_length"] == 1


# ---------------------------------------------------------------- sample limits
@pytest.mark.parametrize(
    "args, found",
    [
        (["--records", "99999999999", "--length", "10"], "limit of 1,000,000 records"),
        (["--length", "100000000000"], "100,000,000,000 bases is more than the limit"),
        (["--records", "1000", "--length", "1000000"], "1,000,000,000 bases is more than"),
    ],
    ids=["records", "length", "product"],
)
def test_sample_refuses_an_output_over_the_limit_up_front(tmp_path, args, found):
    out = tmp_path / "big.fa"
    line = one_error(["sample", "cpg-island", "--seed", "1", "-o", out, *args], 2, found)
    assert "250,000,000" in line or "1,000,000 records" in line, line
    assert not out.exists()


# ---------------------------------------------------------------- model files via the CLI
def test_model_check_label_with_a_slash_is_one_error_line(tmp_path):
    model = tmp_path / "m"
    shutil.copytree(builtin_dir() / "cpg-island", model)
    path = model / "model.toml"
    path.write_text(
        path.read_text(encoding="utf-8").replace('"CpG_island"', '"CpG/island"'),
        encoding="utf-8",
    )
    one_error(["model", "check", model], 1, f"{path} line ", "'/'")


def test_annotate_with_a_model_reaching_outside_its_folder(tmp_path):
    model = tmp_path / "m"
    shutil.copytree(builtin_dir() / "cpg-island", model)
    path = model / "model.toml"
    path.write_text(
        path.read_text(encoding="utf-8").replace('start = "start.tsv"', 'start = "/etc/passwd"'),
        encoding="utf-8",
    )
    fa = fasta(tmp_path / "x.fa", [("a", "ACGT")])
    line = one_error(["annotate", fa, "-m", model, "-o", tmp_path / "o"], 1, "absolute path")
    assert "root:x" not in line


# ---------------------------------------------------------------- compressed and marked inputs
def test_annotate_bzip2_fasta_is_one_error_line(tmp_path):
    fa = tmp_path / "x.fa.bz2"
    fa.write_bytes(bz2.compress(b">a\nACGT\n"))
    one_error(
        ["annotate", fa, "-o", tmp_path / "o"],
        1,
        f"{fa}: compressed with bzip2; only plain and gzip are read",
    )


def test_annotate_reads_a_fasta_with_a_byte_order_mark(tmp_path):
    plain = fasta(tmp_path / "p.fa", [("a", background(300, 5))])
    marked = tmp_path / "m.fa"
    marked.write_bytes(b"\xef\xbb\xbf" + plain.read_bytes())
    for fa, out in ((plain, "po"), (marked, "mo")):
        code, _, err = run(["annotate", fa, "-o", tmp_path / out, "-q"])
        assert code == 0, err
    assert (tmp_path / "po" / "p.gff3").read_bytes() == (tmp_path / "mo" / "m.gff3").read_bytes()


def test_record_id_with_a_control_character_is_escaped_in_the_error(tmp_path):
    fa = tmp_path / "ctl.fa"
    fa.write_bytes(b">a\x01b\nACGT\n>a\x01b\nAC\n")
    line = one_error(["annotate", fa, "-o", tmp_path / "o"], 1, "record 'a\\x01b'", "duplicate")
    assert "\x01" not in line
