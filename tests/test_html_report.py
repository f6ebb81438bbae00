"""The HTML run report: valid HTML5, self-contained, and rendered by a real browser.

Validity is checked with html5lib (a general-purpose parser of the WHATWG HTML standard) in
strict mode, which raises on any parse error.  The browser test renders the page in
headless Chromium (Debian package ``chromium``, installed by ``.ci/run``) and is skipped
when no such binary is on PATH, except in CI (``CI=true``: a failure; ``chromium`` fixture).
"""

from __future__ import annotations

import csv
import io
import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands.calibrate import CalibrateOptions, calibrate, figure_svg, reliability_figure
from seqstate.io.html_report import (
    build_report_figures,
    fmt_number,
    inline_svg,
    panels_in_columns,
    table_rows,
    write_html_report,
)


def _in_ci() -> bool:
    return os.environ.get("CI", "").strip().lower() in ("true", "1", "yes")


#: Browser tests are skipped without Chromium outside CI; in CI the fixture fails instead.
needs_chromium = pytest.mark.skipif(
    not _in_ci() and not any(shutil.which(n) for n in ("chromium", "chromium-browser")),
    reason="headless Chromium is not installed",
)

pytest.importorskip("matplotlib")
html5lib = pytest.importorskip("html5lib")

#: Chromium flags for a headless run that never reaches the network or a profile.
CHROMIUM_FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]


def cli(args: list) -> None:
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exit_code == 0, result.stderr


@pytest.fixture(scope="module")
def run_files(tmp_path_factory: pytest.TempPathFactory) -> tuple[dict, list[dict]]:
    """An annotate run on a synthetic sample (cpg-island, 3 records of 300 kbp, seed 5)."""
    d = tmp_path_factory.mktemp("html")
    fa = d / "s.fa"
    cli(["sample", "cpg-island", "--length", 300000, "--records", 3, "--seed", 5, "-o", fa, "-q"])
    cli(["annotate", fa, "-o", d / "ann", "-q"])
    with open(d / "ann" / "s.features.tsv", encoding="utf-8", newline="") as handle:
        rows = list(csv.DictReader(handle, delimiter="\t"))
    report = json.loads((d / "ann" / "s.run.json").read_text())
    assert rows, "the sample holds islands"
    return report, rows


@pytest.fixture(scope="module")
def page(run_files: tuple[dict, list[dict]]) -> str:
    report, rows = run_files
    figures = build_report_figures(rows, report["records"])
    cal = calibrate(CalibrateOptions("cpg-island", length=50000, records=2, seed=1))
    figures["calibration"] = figure_svg(reliability_figure(cal))
    buf = io.StringIO()
    write_html_report(buf, report, rows, figures, cal)
    return buf.getvalue()


def test_valid_html5(page: str) -> None:
    # html5lib strict mode raises ParseError on any error of the WHATWG parsing rules
    doc = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(page)
    assert page.startswith("<!DOCTYPE html>")
    assert doc.find(".//title").text.startswith("seqstate run report: cpg-island")
    svgs = doc.findall(".//{http://www.w3.org/2000/svg}svg")
    assert len(svgs) == 4  # lengths, scores, density, calibration
    ids = [el.get("id") for el in doc.iter() if isinstance(el.tag, str) and el.get("id")]
    assert len(ids) == len(set(ids)), "ids are unique across the inline figures"


def test_no_external_resource(page: str) -> None:
    assert not re.search(r"(https?|ftp):|//[A-Za-z0-9]", page.replace("</", "<"))
    assert not re.search(r"<(link|img|iframe|object|embed)\b", page)
    assert not re.search(r"<script[^>]*\bsrc=", page)
    assert "@import" not in page and "url(http" not in page


def test_summary_content(page: str, run_files: tuple[dict, list[dict]]) -> None:
    report, rows = run_files
    assert report["model"]["sha256"] in page
    bases = sum(r["end_1based"] - r["start_1based"] + 1 for r in report["records"])
    assert f"<th>bases</th><td class='n'>{bases:,}</td>" in page
    assert f"<th>CpG_island</th><td class='n'>{len(rows):,}</td>" in page
    assert page.count("<tr><td") >= len(rows)
    for row in rows:
        assert f">{row['id']}</td>" in page


def test_deterministic(run_files: tuple[dict, list[dict]]) -> None:
    report, rows = run_files
    texts = []
    for _ in range(2):
        buf = io.StringIO()
        write_html_report(buf, report, rows, build_report_figures(rows, report["records"]))
        texts.append(buf.getvalue())
    assert texts[0] == texts[1]


def test_text_is_escaped() -> None:
    rows = [
        {"seqid": "c<1>", "start_1based": "1", "end_1based": "9", "strand": ".", "type": "x&y"},
    ]
    rows[0]["id"] = "<script>alert(1)</script>"
    buf = io.StringIO()
    write_html_report(buf, {"model": {"name": "m<b>"}, "records": []}, rows, {})
    text = buf.getvalue()
    assert "<script>alert" not in text and "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert "c&lt;1&gt;" in text and "x&amp;y" in text and "m&lt;b&gt;" in text
    html5lib.HTMLParser(strict=True).parse(text)


def test_top_features_order_and_limit() -> None:
    rows = [
        {"seqid": "r", "type": "t", "id": f"f{i}", "segment_probability": str(p)}
        for i, p in enumerate([0.1, 0.9, 0.5, 0.7])
    ]
    buf = io.StringIO()
    write_html_report(buf, {"records": []}, rows, {}, top=3)
    order = re.findall(r">(f\d)</td>", buf.getvalue())
    assert order == ["f1", "f3", "f2"]


def test_inline_svg_prefixes_ids() -> None:
    svg = (
        '<?xml version="1.0"?>\n<!DOCTYPE svg PUBLIC "-//W3C//DTD SVG 1.1//EN" "http://x">'
        '<svg xmlns="http://www.w3.org/2000/svg" xmlns:xlink="http://www.w3.org/1999/xlink">'
        "<metadata><rdf>http://purl</rdf></metadata>"
        '<defs><path id="a1"/></defs><use xlink:href="#a1"/><g clip-path="url(#a1)"'
        ' fill="#ffffff"/></svg>'
    )
    out = inline_svg(svg, "f0")
    assert out.startswith("<svg>")
    assert 'id="f0-a1"' in out and 'xlink:href="#f0-a1"' in out and "url(#f0-a1)" in out
    assert 'fill="#ffffff"' in out and "http" not in out


def test_empty_run() -> None:
    figures = build_report_figures([], [("r1", 1000)])
    buf = io.StringIO()
    write_html_report(buf, {"records": [{"id": "r1", "length": 1000}]}, [], figures)
    html5lib.HTMLParser(strict=True).parse(buf.getvalue())
    assert "No features." in buf.getvalue()


# ---------------------------------------------------------------- a real browser
def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return None


@needs_chromium
def test_renders_in_chromium(page: str, tmp_path: Path, chromium: str) -> None:
    from matplotlib.image import imread

    html_file = tmp_path / "report.html"
    html_file.write_text(page, encoding="utf-8")
    base = [_chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'profile'}"]
    shot = tmp_path / "shot.png"
    subprocess.run(
        [*base, "--window-size=1200,1800", f"--screenshot={shot}", html_file.as_uri()],
        check=True,
        capture_output=True,
        timeout=120,
    )
    pixels = imread(str(shot))[..., :3]
    assert pixels.shape[0] >= 1000 and pixels.shape[1] >= 1000
    # not blank: dark pixels (text, axes, bars) are present and the image is not uniform
    dark = (pixels.mean(axis=2) < 0.5).mean()
    assert 0.005 < dark < 0.5, dark
    assert np.unique(pixels.reshape(-1, 3), axis=0).shape[0] > 10
    dom = subprocess.run(
        [*base, "--dump-dom", html_file.as_uri()],
        check=True,
        capture_output=True,
        timeout=120,
        text=True,
    ).stdout
    assert dom.count("<svg") == 4
    for key in ("feature_lengths", "scores", "feature_density", "calibration"):
        assert f'id="figure-{key}"' in dom
    assert '<table id="features">' in dom
    table = dom.split('<table id="features">', 1)[1].split("</table>", 1)[0]
    n_rows = table.count("<tr><td")
    assert n_rows >= 1
    # the inline script ran: it filled in the row count
    m = re.search(r'<span id="feature-count">(\d+) of (\d+) shown</span>', dom)
    assert m and m.group(1) == m.group(2) == str(n_rows)


@needs_chromium
def test_table_sorts_and_searches_in_chromium(
    run_files: tuple[dict, list[dict]], tmp_path: Path, chromium: str
):
    report, rows = run_files
    buf = io.StringIO()
    write_html_report(buf, report, rows, {})
    # the page's own script, driven as a person would: click a heading, type a search
    drive = (
        "<script>(function(){var ths=document.querySelectorAll('#features th');"
        "for(var i=0;i<ths.length;i++){if(ths[i].textContent==='segment_probability'){"
        "ths[i].click();}}var s=document.getElementById('feature-search');s.value='sim2';"
        "s.dispatchEvent(new Event('input'));})();</script></body>"
    )
    html_file = tmp_path / "driven.html"
    html_file.write_text(buf.getvalue().replace("</body>", drive), encoding="utf-8")
    base = [_chromium(), *CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'profile'}"]
    dom = subprocess.run(
        [*base, "--dump-dom", html_file.as_uri()],
        check=True,
        capture_output=True,
        timeout=120,
        text=True,
    ).stdout
    table = dom.split('<table id="features">', 1)[1].split("</table>", 1)[0]
    body = table.split("<tbody>", 1)[1]
    trs = re.findall(r"<tr( hidden=\"\")?>(.*?)</tr>", body)
    assert len(trs) == len(rows)
    heads = re.findall(r">([a-z_0-9]+)</th>", table)
    col = heads.index("segment_probability")
    values = [float(re.findall(r'data-v="([^"]*)"', cells)[col]) for _, cells in trs]
    assert values == sorted(values)  # ascending after one click
    shown = [cells for hidden, cells in trs if not hidden]
    expected = sum(1 for r in rows if "sim2" in "".join(str(v) for v in r.values()))
    assert 0 < expected < len(rows)  # the search hides some rows and keeps others
    assert len(shown) == expected and all("sim2" in cells for cells in shown)
    assert 'aria-sort="ascending"' in table


def test_density_shows_the_longest_records() -> None:
    from seqstate.io.html_report import shown_records

    recs = [(f"c{i}", 1000 + (i * 37) % 60) for i in range(60)]
    shown = shown_records(recs, 40)
    assert len(shown) == 40
    assert [r for r in recs if r in shown] == shown  # input order kept
    assert min(n for _, n in shown) >= max(n for r, n in recs if (r, n) not in shown)


# ---------------------------------------------------------------- what a user reads
def test_one_number_format() -> None:
    # thousands separators and 4 decimals, as seqstate compare prints its values
    assert fmt_number(1348131) == "1,348,131" and fmt_number("930") == "930"
    assert fmt_number("1348131") == "1,348,131" and fmt_number(-12) == "-12"
    assert fmt_number(0.0133569) == "0.0134" and fmt_number("0.7580") == "0.7580"
    assert fmt_number("1e-05") == "0.0000" and fmt_number(2.5) == "2.5000"
    assert fmt_number(None, missing="NA") == "NA" and fmt_number(float("nan")) == ""
    assert fmt_number("NC_004353.4") == "NC_004353.4" and fmt_number(True) == "yes"


def test_every_number_on_the_page_has_the_one_format(page: str) -> None:
    doc = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(page)
    cells = [td.text or "" for td in doc.iter("td") if td.get("class") == "n"]
    assert cells
    for text in cells:
        assert re.fullmatch(r"NA|-?\d{1,3}(,\d{3})*|-?\d+\.\d{4}|", text), text


def _gene_rows() -> list[dict]:
    """Rows of a gene model's feature table: one gene, its mRNA, two exons and their CDS."""
    base = {"seqid": "c1", "strand": "+", "segment_probability": "0.9000"}
    spans = [
        ("gene", "c1.gene.1", "", 100, 900),
        ("mRNA", "c1.mRNA.1", "c1.gene.1", 100, 900),
        ("exon", "c1.mRNA.1.exon.1", "c1.mRNA.1", 100, 300),
        ("CDS", "c1.mRNA.1.CDS.1", "c1.mRNA.1", 100, 300),
        ("exon", "c1.mRNA.1.exon.2", "c1.mRNA.1", 700, 900),
        ("CDS", "c1.mRNA.1.CDS.2", "c1.mRNA.1", 750, 900),  # a UTR: not the exon's span
    ]
    return [
        dict(base, type=t, id=i, parent=p, start_1based=str(a), end_1based=str(b))
        for t, i, p, a, b in spans
    ]


def test_exon_and_cds_of_one_span_are_one_row() -> None:
    rows = _gene_rows()
    once = table_rows(rows)
    assert [r["type"] for r in once] == ["gene + mRNA", "exon + CDS", "exon", "CDS"]
    buf = io.StringIO()
    write_html_report(buf, {"records": [{"id": "c1", "length": 1000}]}, rows, {})
    text = buf.getvalue()
    table = text.split("<table id='features'>", 1)[1]
    assert table.count("<tr><td") == 4
    assert table.count(">c1.mRNA.1.exon.1</td>") == 1 and "c1.mRNA.1.CDS.1" not in table
    # the counts per type still count every feature
    for kind, n in (("gene", 1), ("mRNA", 1), ("exon", 2), ("CDS", 2)):
        assert f"<tr><th>{kind}</th><td class='n'>{n}</td></tr>" in text
    html5lib.HTMLParser(strict=True).parse(text)


def _density_axes(rows: list, records: list) -> list:
    from seqstate.io.html_figures import _density_figure

    return _density_figure(rows, records).axes


def test_density_along_one_record() -> None:
    rows = [
        {"seqid": "c1", "type": "gene", "parent": "", "start_1based": str(s)}
        for s in (10, 20, 50_000, 99_000)
    ] + [{"seqid": "c1", "type": "exon", "parent": "g", "start_1based": "30"}]
    (ax,) = _density_axes(rows, [{"id": "c1", "start_1based": 1, "end_1based": 100_000}])
    assert ax.get_xlim() == (1, 100_001)
    heights = [p.get_height() for p in ax.patches]
    assert 40 <= len(heights) <= 60  # bins along the record, of a round width
    assert sum(heights) == 4 and heights[0] == 2  # genes only, by start
    assert "2 kbp" in ax.get_ylabel() and "genes" in ax.get_ylabel()


def test_density_of_many_records_one_row_each() -> None:
    recs = [(f"chr{i}", 10_000 * (i + 1)) for i in range(12)]
    rows = [{"seqid": "chr3", "type": "CpG_island", "start_1based": "5"}]
    (ax,) = _density_axes(rows, recs)
    names = [t.get_text() for t in ax.get_yticklabels()]
    assert names == [r for r, _ in recs]
    fig = ax.figure
    # each name gets at least 0.2 inch of height: readable at 100 %
    assert fig.get_size_inches()[1] / len(recs) >= 0.2
    width = dict(zip(names, [p.get_width() for p in ax.patches], strict=True))
    assert width["chr3"] == pytest.approx(1 / 40_000 * 1e6) and width["chr1"] == 0


def test_panel_pairs_in_two_columns() -> None:
    from matplotlib.figure import Figure

    fig = Figure(figsize=(18.4, 5.6))
    grid = fig.add_gridspec(2, 4, height_ratios=[3, 1])
    for col in range(4):
        fig.add_subplot(grid[0, col]).set_title(f"t{col}")
        fig.add_subplot(grid[1, col])
    panels_in_columns(fig, 2)
    spans = [a.get_subplotspec() for a in fig.axes]
    assert [(s.rowspan.start, s.colspan.start) for s in spans] == [
        (0, 0),
        (1, 0),
        (0, 1),
        (1, 1),
        (2, 0),
        (3, 0),
        (2, 1),
        (3, 1),
    ]
    assert fig.get_size_inches()[0] <= 10.0  # shown at 100 % in a page of 72em


# ---------------------------------------------------------------- a gene model with --truth
@pytest.fixture(scope="module")
def gene_run(tmp_path_factory: pytest.TempPathFactory) -> dict:
    """annotate -m gene-segment --report --truth on a synthetic sample (60 kbp, seed 3), the
    truth being the sample's own CDS lines, and seqstate compare of the same two files."""
    d = tmp_path_factory.mktemp("genes")
    fa, truth_all, truth = d / "g.fa", d / "all.gff3", d / "known_cds.gff3"
    cli(["sample", "gene-segment", "--length", 60000, "--seed", 3, "-o", fa, "--truth", truth_all])
    lines = truth_all.read_text().splitlines(keepends=True)
    truth.write_text("".join(x for x in lines if x.startswith("#") or "\tCDS\t" in x))
    cli(
        ["annotate", fa, "-m", "gene-segment", "-o", d / "o", "--report", "r.html"]
        + ["--truth", truth, "-q"]
    )
    cli(["compare", d / "o" / "g.gff3", truth, "-o", d / "cmp.json", "-q"])
    return {
        "page": (d / "o" / "r.html").read_text(encoding="utf-8"),
        "compare": json.loads((d / "cmp.json").read_text()),
        "truth": str(truth),
    }


def test_gene_report_names_the_truth_file(gene_run: dict) -> None:
    page = gene_run["page"]
    html5lib.HTMLParser(strict=True).parse(page)
    assert f"Truth: <span id='truth-name'>{gene_run['truth']}</span>" in page
    assert "Truth: truth" not in page and "(truth," not in page


def test_gene_report_accuracy_equals_compare(gene_run: dict) -> None:
    doc = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(gene_run["page"])
    table = next(t for t in doc.iter("table") if t.get("id") == "accuracy-table")
    got = {tr[0].text: (tr[1].text, tr[2].text) for tr in table.find("tbody").findall("tr")}
    result = gene_run["compare"]
    if isinstance(result, list):
        result = result[0]

    def four(v: float | None) -> str:  # seqstate compare's own 4 decimals
        return "NA" if v is None else f"{v:.4f}"

    nuc = result["nucleotide"]["strand_aware"]
    want = {
        "bases (strand-aware)": (four(nuc["sensitivity"]), four(nuc["specificity"])),
        "exons": (four(result["feature"]["sensitivity"]), four(result["feature"]["specificity"])),
        "transcripts": (
            four(result["transcript"]["sensitivity"]),
            four(result["transcript"]["specificity"]),
        ),
        "genes": (four(result["gene"]["sensitivity"]), four(result["gene"]["specificity"])),
    }
    assert got == want
    assert float(want["exons"][0]) > 0  # the run finds some exons exactly


def test_gene_report_calibration_readable(gene_run: dict) -> None:
    page = gene_run["page"]
    fig = page.split("id='figure-calibration'", 1)[1].split("</figure>", 1)[0]
    width_pt = float(re.search(r'<svg[^>]*\bwidth="([\d.]+)pt"', fig).group(1))
    assert width_pt <= 10 * 72  # four track groups in two columns, not one row of 18 inches
