"""Bad input to ``seqstate annotate``: one ``error:`` line, the right exit status, no outputs.

README "Exit codes": 1 for input or format errors, 2 for usage errors.  Every error is
one line on stderr, ``error: FILE line N, record 'ID': ...``, and no output is left
behind.  Inputs are small hand-written FASTA texts (synthetic) and copies of the
built-in ``cpg-island`` model edited to be malformed.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner
from golden_util import GOLDEN_FASTA

from seqstate.cli import main
from seqstate.io.tables import builtin_dir

GOOD = ">a\nACGTACGTAC\n>b\nGGCGCGCCGA\n"


def run(args: list) -> tuple[int, list[str]]:
    """Run the CLI in-process; ``(exit status, stderr lines)``, insisting it did not crash."""
    result = CliRunner().invoke(main, [str(a) for a in args])
    # a handled error ends in sys.exit; any other exception would be a crash
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    assert "Traceback" not in result.stderr and result.stdout == ""
    return result.exit_code, result.stderr.splitlines()


def check_error(args: list, status: int, out: Path, *must_contain: str) -> str:
    """Assert the run fails with ``status``, one ``error:`` line naming ``must_contain``,
    and that ``out`` holds no file afterwards.  Returns the error line."""
    code, lines = run(args)
    assert code == status, lines
    assert len(lines) == 1, lines
    line = lines[0]
    assert line.startswith("error: "), line
    for text in must_contain:
        assert text in line, f"{text!r} not in {line!r}"
    assert not out.exists() or list(out.iterdir()) == [], sorted(out.iterdir())
    return line


def write(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture
def out(tmp_path) -> Path:
    return tmp_path / "out"


# ---------------------------------------------------------------- input errors (exit 1)
def test_missing_file(tmp_path, out):
    missing = tmp_path / "no-such.fa"
    check_error(["annotate", missing, "-o", out], 1, out, str(missing), "not found")
    assert not out.exists()


def test_empty_file(tmp_path, out):
    f = write(tmp_path / "empty.fa", "")
    check_error(["annotate", f, "-o", out], 1, out, str(f), "empty")


def test_file_that_is_not_fasta(tmp_path, out):
    f = write(tmp_path / "notes.txt", "##gff-version 3\nchr1\tx\tgene\t1\t10\t.\t+\t.\tID=g\n")
    check_error(["annotate", f, "-o", out], 1, out, str(f), "line 1", "not a FASTA file")


def test_record_with_empty_sequence(tmp_path, out):
    f = write(tmp_path / "hole.fa", ">a\nACGT\n>b\n\n>c\nACGT\n")
    # skipped with a warning by default; an error with --empty-records error
    check_error(
        ["annotate", f, "-o", out, "--empty-records", "error"],
        *(1, out, str(f), "line 3", "'b'", "empty sequence"),
    )


def test_duplicate_record_ids(tmp_path, out):
    f = write(tmp_path / "dup.fa", ">a first\nACGT\n>b\nAC\n>a second\nGG\n")
    check_error(["annotate", f, "-o", out], 1, out, str(f), "line 5", "'a'", "duplicate")


@pytest.mark.parametrize("char", ["X", "*", ".", "1", "é"])
def test_character_that_is_not_a_nucleotide(tmp_path, out, char):
    # IUPAC nucleotide codes (Cornish-Bowden 1985, Nucleic Acids Res. 13:3021; the letters
    # checked against Biopython 1.88 Bio.Data.IUPACData.ambiguous_dna_letters
    # "GATCRYWSMKHBVDN", plus U for RNA): ACGTU, RYSWKMBDHVN, and '-' as gap (common
    # practice); anything else is not a base.  12th base of record b.
    f = write(tmp_path / "bad.fa", f">a\nACGT\n>b\nACGTACGT\nACG{char}AC\n")
    line = check_error(
        ["annotate", f, "-o", out], 1, out, str(f), "line 5", "record 'b'", "position 12"
    )
    # a printable ASCII character is quoted, any other byte is named in hex
    want = repr(char) if char.isascii() else f"byte 0x{char.encode('utf-8')[0]:02X}"
    assert f"character {want} at position 12" in line, line


def test_record_impossible_under_the_model_leaves_no_partial_output(tmp_path):
    # a copy of cpg-island whose states never emit T; the first record has no T and is
    # annotated before the second (with a T at position 4) fails
    model = tmp_path / "no-t"
    shutil.copytree(builtin_dir() / "cpg-island", model)
    lines = (model / "emissions.tsv").read_text(encoding="utf-8").splitlines()
    edited = [
        ln if ln.startswith(("#", "state")) else "\t".join(ln.split("\t")[:5] + ["0"])
        for ln in lines
    ]
    (model / "emissions.tsv").write_text("\n".join(edited) + "\n", encoding="utf-8")
    f = write(tmp_path / "imp.fa", ">ok\nACGACGGCAGCAGGCA\n>bad\nACGTAC\n")
    out = tmp_path / "existing"
    out.mkdir()  # an existing, empty output folder must stay empty (no temporary files)
    check_error(["annotate", f, "-m", model, "-o", out], 1, out, "record 'bad'", "position 4")
    assert [p.name for p in out.iterdir()] == []


# ---------------------------------------------------------------- model errors
def test_unknown_model_lists_the_builtins(out):
    line = check_error(
        ["annotate", GOLDEN_FASTA, "-m", "no-such-model", "-o", out], 2, out, "no-such-model"
    )
    for name in ("cpg-island", "cpg-island-8", "casino"):
        assert name in line


def test_malformed_model_table_names_file_and_line(tmp_path, out):
    model = tmp_path / "broken"
    shutil.copytree(builtin_dir() / "cpg-island", model)
    manifest = model / "model.toml"
    # strict sums (normalize = false), then a transitions row summing to 1.009
    manifest.write_text(
        manifest.read_text(encoding="utf-8").replace("normalize = true", "normalize = false"),
        encoding="utf-8",
    )
    (model / "transitions.tsv").write_text(
        "from\tisland\tbackground\nisland\t0.999\t0.01\nbackground\t0.00001\t0.99999\n",
        encoding="utf-8",
    )
    check_error(
        ["annotate", GOLDEN_FASTA, "-m", manifest, "-o", out],
        1,
        out,
        str(model / "transitions.tsv"),
        "line 2",
        "island",
        "1.009",
    )


# ---------------------------------------------------------------- usage errors (exit 2)
def test_region_on_unknown_record(out):
    check_error(
        ["annotate", GOLDEN_FASTA, "--region", "chrZ:1-100", "-o", out], 2, out, "chrZ", "chr1"
    )


@pytest.mark.parametrize("region", ["chr1:9001-10001", "chr1:20000-30000"])
def test_region_outside_the_record(out, region):
    check_error(
        ["annotate", GOLDEN_FASTA, "--region", region, "-o", out],
        2,
        out,
        region,
        "outside",
        "10000",
    )


def test_region_that_does_not_parse(out):
    check_error(["annotate", GOLDEN_FASTA, "--region", "chr1:0-50", "-o", out], 2, out, "chr1:0-50")


def test_output_directory_under_a_regular_file(tmp_path):
    plain = write(tmp_path / "plain", "not a folder\n")
    out = plain / "sub"
    check_error(["annotate", GOLDEN_FASTA, "-o", out], 2, out, str(out))
    assert plain.read_text(encoding="utf-8") == "not a folder\n"


@pytest.mark.parametrize(
    "option",
    [
        ["--min-length", "0"],
        ["--min-posterior", "1.5"],
        ["--precision", "12"],
        ["--decode", "sideways"],
        ["--no-such-option"],
    ],
)
def test_bad_option_value(out, option):
    check_error(["annotate", GOLDEN_FASTA, *option, "-o", out], 2, out, option[0])


def test_good_input_passes_the_same_checks(tmp_path, out):
    # the control: the same helper accepts a valid run (exit 0, outputs written)
    f = write(tmp_path / "good.fa", GOOD)
    code, lines = run(["annotate", f, "-o", out, "-q"])
    assert code == 0 and lines == []
    assert sorted(p.name for p in out.iterdir()) == [
        "good.CpG_island.bedgraph",
        "good.features.tsv",
        "good.gff3",
        "good.records.tsv",
        "good.run.json",
    ]
