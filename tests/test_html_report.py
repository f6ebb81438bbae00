"""The HTML run report: valid HTML5, self-contained, and rendered by a real browser.

Validity is checked with html5lib (a general-purpose parser of the WHATWG HTML standard) in
strict mode, which raises on any parse error.  The browser test renders the page in
headless Chromium (Debian package ``chromium``, installed by ``.ci/run``) and is skipped
when no such binary is on PATH.
"""

from __future__ import annotations

import csv
import io
import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands.calibrate import CalibrateOptions, calibrate, figure_svg, reliability_figure
from seqstate.io.html_report import build_report_figures, inline_svg, write_html_report

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
    assert f"<th>bases</th><td>{bases}</td>" in page
    assert f"<th>CpG_island</th><td>{len(rows)}</td>" in page
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


@pytest.mark.skipif(_chromium() is None, reason="headless Chromium is not installed")
def test_renders_in_chromium(page: str, tmp_path: Path) -> None:
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


@pytest.mark.skipif(_chromium() is None, reason="headless Chromium is not installed")
def test_table_sorts_and_searches_in_chromium(run_files: tuple[dict, list[dict]], tmp_path: Path):
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
