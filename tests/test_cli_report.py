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


def _sampled(tmp_path, length="20000", records="2"):
    fasta, truth = tmp_path / "c.fa", tmp_path / "c.truth.gff3"
    res = run(
        ["sample", "cpg-island", "--length", length, "--records", records, "--seed", "3"]
        + ["-o", fasta, "--truth", truth, "-q"]
    )
    assert res.exit_code == 0, res.output
    return fasta, truth


def test_report_calibrates_only_the_annotated_region(tmp_path, monkeypatch):
    # the calibration of --report --truth counts the bases of --region alone (and of
    # --records alone), not the whole FASTA
    from seqstate.commands import calibrate as cal
    from seqstate.commands.annotate import AnnotateOptions, annotate

    fasta, truth = _sampled(tmp_path)
    seen = []
    real = cal.calibrate

    def spy(opts, quiet=True):
        report = real(opts, quiet)
        seen.append(report)
        return report

    monkeypatch.setattr(cal, "calibrate", spy)
    text = truth.read_text()
    inside = next(
        line.split("\t")
        for line in text.splitlines()
        if line.startswith("sim2\t") and line.split("\t")[2] == "CpG_island"
    )
    start, end = int(inside[3]), int(inside[4])
    region = f"sim2:{max(1, start - 2000)}-{min(20000, end + 2000)}"
    size = min(20000, end + 2000) - max(1, start - 2000) + 1
    annotate(
        AnnotateOptions(
            input=str(fasta),
            out_dir=str(tmp_path / "o"),
            region=region,
            report="r.html",
            truth=str(truth),
        )
    )
    assert seen[-1].bases == size and seen[-1].records == 1 and seen[-1].stretch == region
    annotate(
        AnnotateOptions(
            input=str(fasta),
            out_dir=str(tmp_path / "o2"),
            records=["sim2"],
            report="r.html",
            truth=str(truth),
        )
    )
    assert seen[-1].bases == 20000 and seen[-1].records == 1


def test_truth_problems_stop_the_run_before_annotating(tmp_path, monkeypatch):
    from seqstate.commands import annotate as ann

    def never(*_args, **_kwargs):
        raise AssertionError("annotated before the truth was checked")

    monkeypatch.setattr(ann, "_write", never)
    fasta, truth = _sampled(tmp_path, "3000", "1")
    other = tmp_path / "other.gff3"
    other.write_text("##gff-version 3\nchrZ\tx\tCpG_island\t1\t10\t.\t.\t.\tID=a\n")
    far = tmp_path / "far.gff3"
    far.write_text("##gff-version 3\nsim1\tx\tCpG_island\t2900\t2950\t.\t.\t.\tID=a\n")
    for extra, status, words in (
        (["--truth", tmp_path / "missing.gff3"], 1, "missing.gff3: truth file not found"),
        (["--truth", other], 1, "share no sequence ID"),
        (["--truth", far, "--region", "sim1:1-1000"], 1, "no feature lies in region"),
        (["--truth", other, "--records", "sim1"], 1, "no feature lies on the selected record"),
        (["--truth", truth, "--truth-type", "CDS"], 2, "--type CDS: not a label"),
        (["--truth-type", "CpG_island"], 2, "give --truth too"),
    ):
        res = CliRunner().invoke(
            main,
            ["annotate", str(fasta), "-o", str(tmp_path / "o"), "--report", "r.html"]
            + [str(x) for x in extra],
        )
        lines = res.stderr.splitlines()
        assert res.exit_code == status and len(lines) == 1, (extra, res.output)
        assert lines[0].startswith("error: ") and words in lines[0], (extra, lines)
        assert not (tmp_path / "o").exists()
