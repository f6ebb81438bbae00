"""`annotate --report`: the HTML page of a run, checked with html5lib (a general-purpose
HTML5 parser, strict mode) and for external URLs; its figures and table are present."""

from __future__ import annotations

import re

import html5lib
from click.testing import CliRunner

from seqstate.cli import main


def run(args: list) -> object:
    return CliRunner().invoke(main, [str(a) for a in args], catch_exceptions=False)


def test_annotate_report_is_valid_self_contained_html_with_calibration(tmp_path):
    fasta, truth = tmp_path / "c.fa", tmp_path / "c.truth.gff3"
    res = run(
        [
            "sample",
            "cpg-island",
            "--length",
            "200000",
            "--records",
            "3",
            "--seed",
            "2",
            "-o",
            fasta,
            "--truth",
            truth,
            "-q",
        ]
    )
    assert res.exit_code == 0, res.output
    out = tmp_path / "o"
    res = run(["annotate", fasta, "-o", out, "--report", "run.html", "--truth", truth, "-q"])
    assert res.exit_code == 0, res.output
    text = (out / "run.html").read_text(encoding="utf-8")
    html5lib.HTMLParser(strict=True).parse(text)  # raises on any parse error
    assert not re.search(r"(src|href)\s*=\s*[\"']?(https?:)?//", text)  # nothing fetched
    assert text.count("<svg") >= 4  # lengths, scores, density, calibration
    assert "<table" in text and "CpG_island" in text
    assert "run.html" in (out / "c.run.json").read_text()
    again = tmp_path / "o2"
    run(["annotate", fasta, "-o", again, "--report", "run.html", "--truth", truth, "-q"])
    assert (again / "run.html").read_text(encoding="utf-8").replace("o2", "o") == text


def test_report_options_are_checked_before_any_work(tmp_path):
    fasta = tmp_path / "c.fa"
    run(["sample", "cpg-island", "--length", "2000", "--seed", "2", "-o", fasta, "-q"])
    for extra, words in (
        (["--truth", "x.gff3"], "give --report too"),
        (["--report", "a/b.html"], "plain file-name part"),
        (["--report", "same", "--cds", "same", "-m", "gene-segment"], "different files"),
    ):
        res = CliRunner().invoke(main, ["annotate", str(fasta), "-o", str(tmp_path / "o"), *extra])
        assert res.exit_code == 2 and words in res.output, res.output
        assert not (tmp_path / "o").exists()
