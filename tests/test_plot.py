"""``seqstate plot`` (seqstate.commands.plot and its CLI command).

The figure is checked against annotate's own outputs on the synthetic demo
(its decoded features and its posterior track), against the image formats'
own readers (matplotlib.image.imread for PNG, xml.etree for SVG, the PDF
magic number), and for what the docs promise: stated size, one box element
per decoded feature, greyscale-only ink, lanes with distinct line styles.
"""

from __future__ import annotations

import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import matplotlib.colors
import matplotlib.image
import numpy as np
import pytest
from click.testing import CliRunner
from helpers import sample_record

from seqstate.cli import main
from seqstate.commands.annotate import AnnotateOptions, annotate
from seqstate.commands.plot import MAX_REGION, PlotOptions, draw, plot_data
from seqstate.errors import UsageError
from seqstate.io.gff3 import read_gff3
from seqstate.io.tables import save_model
from seqstate.model import State, make_model

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "examples" / "cex_draft1.fa.gz"
TRUTH = REPO / "examples" / "cex_draft1.truth.gff3"
REGION = "cex_ctg3:180000-220000"
R0, R1 = 179999, 220000  # the region, 0-based half-open
SVG_NS = "{http://www.w3.org/2000/svg}"


def run(args: list[str]):
    return CliRunner().invoke(main, args, catch_exceptions=False)


@pytest.fixture(scope="module")
def annotated(tmp_path_factory) -> Path:
    """annotate on the whole demo (default options): the reference for the figure."""
    out = tmp_path_factory.mktemp("annot")
    annotate(AnnotateOptions(input=str(DEMO), out_dir=str(out)))
    return out


def _overlapping(features, seqid, r0, r1):
    return [f for f in features if f.seqid == seqid and f.start0 < r1 and f.end0 > r0]


def test_png_has_the_stated_size(tmp_path):
    out = tmp_path / "fig.png"
    res = run(
        [
            "plot",
            str(DEMO),
            "--region",
            REGION,
            "-o",
            str(out),
            "--width",
            "6",
            "--height",
            "4",
            "--dpi",
            "50",
            "--reference",
            str(TRUTH),
        ]
    )
    assert res.exit_code == 0, res.stderr
    img = matplotlib.image.imread(out)
    # pixels = inches x dots per inch (matplotlib 3.11 Figure.savefig docstring: dpi is
    # "The resolution in dots per inch")
    assert img.shape[:2] == (200, 300)
    assert res.stderr.startswith(f"seqstate: {REGION}, 3 decoded, 3 reference feature(s)")


def test_svg_has_one_box_per_decoded_feature(tmp_path, annotated):
    out = tmp_path / "fig.svg"
    res = run(
        ["plot", str(DEMO), "--region", REGION, "-o", str(out), "--reference", str(TRUTH), "-q"]
    )
    assert res.exit_code == 0, res.stderr
    assert res.stderr == ""
    root = ET.parse(out).getroot()  # well-formed XML (SVG is XML)
    assert root.tag == f"{SVG_NS}svg"
    ids = [el.get("id") for el in root.iter() if el.get("id")]
    boxes = [i for i in ids if i.startswith("feature-box-")]
    refs = [i for i in ids if i.startswith("reference-box-")]
    want = _overlapping(read_gff3(annotated / "cex_draft1.gff3"), "cex_ctg3", R0, R1)
    truth = _overlapping(read_gff3(TRUTH), "cex_ctg3", R0, R1)
    # one box per feature annotate decodes on the region (annotate's GFF3 is the reference)
    assert len(want) == 3 and sorted(boxes) == [f"feature-box-{i}" for i in (1, 2, 3)]
    assert sorted(refs) == [f"reference-box-{i + 1}" for i in range(len(truth))]


@pytest.mark.parametrize(
    "r0, r1", [(R0, R1), (195_000, 213_000)], ids=["islands-inside", "islands-cut-by-both-ends"]
)
def test_boxes_and_curve_match_annotate(annotated, r0, r1):
    region = f"cex_ctg3:{r0 + 1}-{r1}"
    data = plot_data(PlotOptions(input=str(DEMO), region=region, out="x.png", reference=str(TRUTH)))
    want = _overlapping(read_gff3(annotated / "cex_draft1.gff3"), "cex_ctg3", r0, r1)
    assert len(want) >= 2
    assert [(f.start0, f.end0) for f in data.decoded] == [(f.start0, f.end0) for f in want]
    # the curve is annotate's posterior track: bedGraph runs rounded to 4 decimals
    track = np.full(r1 - r0, np.nan)
    with open(annotated / "cex_draft1.CpG_island.bedgraph") as fh:
        for line in fh:
            cols = line.split()
            if cols[0] != "cex_ctg3":
                continue
            s, e = max(int(cols[1]), r0), min(int(cols[2]), r1)
            if s < e:
                track[s - r0 : e - r0] = float(cols[3])
    assert not np.isnan(track).any()
    assert np.max(np.abs(data.values[:, 0] - track)) <= 0.5e-4 + 1e-7
    fig = draw(data, 8, 4, 60)
    ax = fig.axes[0]
    boxes = sorted(
        (p for p in fig.axes[1].patches if (p.get_gid() or "").startswith("feature-box-")),
        key=lambda p: p.get_x(),
    )
    # base i (0-based) is drawn at x = i + 1, so a feature [s, e) spans s + 0.5 .. e + 0.5
    # (features cut by the region's ends are drawn whole and clipped by the axes)
    assert [(b.get_x(), b.get_x() + b.get_width()) for b in boxes] == [
        (f.start0 + 0.5, f.end0 + 0.5) for f in want
    ]
    assert ax.get_ylim() == (0.0, 1.0)
    # 40 kb (or 18 kb) on 8 x 60 = 480 pixel columns: binned means, the bin in the title
    assert ax.get_title(loc="left").startswith("posterior probability (mean per ")
    assert ax.get_xlim() == (r0 + 0.5, r1 + 0.5)
    title = fig._suptitle.get_text()
    assert region in title and "cpg-island" in title
    assert fig.axes[-1].get_xlabel() == "position on cex_ctg3 (1-based)"


def test_features_split_at_unknown_runs_as_annotate(tmp_path):
    from seqstate.commands.inputs import read_records
    from seqstate.io.tables import load_model

    rec = next(r for r in read_records(str(DEMO), load_model("cpg-island")) if r.id == "cex_ctg3")
    seq = bytearray(rec.seq)
    seq[195_400:195_420] = b"N" * 20  # inside the planted island 194748-196221 (1-based)
    seq[196_200:196_230] = b"n" * 30  # over its right end
    fasta = tmp_path / "ctg3n.fa"
    fasta.write_bytes(b">cex_ctg3\n" + bytes(seq) + b"\n")
    out = tmp_path / "annot"
    annotate(AnnotateOptions(input=str(fasta), out_dir=str(out)))
    r0, r1 = 190_000, 200_000
    want = _overlapping(read_gff3(out / "ctg3n.gff3"), "cex_ctg3", r0, r1)
    data = plot_data(PlotOptions(input=str(fasta), region=f"cex_ctg3:{r0 + 1}-{r1}", out="x.png"))
    # annotate's features are the reference: the island is cut at the 20 unknown bases
    assert any(f.end0 == 195_400 for f in want) and any(f.start0 == 195_420 for f in want)
    assert [(f.start0, f.end0) for f in data.decoded] == [(f.start0, f.end0) for f in want]


def test_pdf_is_written(tmp_path):
    out = tmp_path / "fig.pdf"
    res = run(["plot", str(DEMO), "--region", "cex_ctg1:186000-187500", "-o", str(out), "-q"])
    assert res.exit_code == 0, res.stderr
    # a PDF file starts with "%PDF-" (ISO 32000-1 file header; checked against matplotlib
    # 3.11 backends/backend_pdf.py, which writes b"%PDF-1.4" first)
    head = out.read_bytes()[:5]
    assert head == b"%PDF-"
    # no timestamp: the same run gives the same bytes (README: outputs carry no timestamp)
    again = tmp_path / "again.pdf"
    run(["plot", str(DEMO), "--region", "cex_ctg1:186000-187500", "-o", str(again), "-q"])
    assert again.read_bytes() == out.read_bytes()


def test_flank_covering_the_record_is_the_whole_record():
    base = PlotOptions(input=str(DEMO), region="cex_ctg2:239000-241000", out="x.png")
    whole = plot_data(base)
    base.flank = 300_000
    flanked = plot_data(base)
    # a window reaching both record ends is the record itself (same computation)
    assert np.array_equal(whole.values, flanked.values)
    assert [(f.start0, f.end0) for f in whole.decoded] == [
        (f.start0, f.end0) for f in flanked.decoded
    ]
    base.flank = 500
    near = plot_data(base)
    assert "region ± 500 bases" in draw(near, 6, 3, 40)._suptitle.get_text()


# ---------------------------------------------------------------- greyscale and lanes
@pytest.fixture(scope="module")
def three_groups(tmp_path_factory):
    """A model with three track groups (alpha on both strands, beta) and a record."""
    rng = np.random.default_rng(99)
    m = 4
    trans = rng.uniform(0.05, 1.0, (m, m)) + np.eye(m) * 20
    emis = rng.uniform(0.1, 1.0, (m, 4))
    model = make_model(
        name="three",
        alphabet="ACGT",
        states=[
            State("ap", "alpha", "+"),
            State("am", "alpha", "-"),
            State("b", "beta"),
            State("bg"),
        ],
        start=np.full(m, 0.25),
        transitions=trans / trans.sum(axis=1, keepdims=True),
        emissions=emis / emis.sum(axis=1, keepdims=True),
    )
    root = tmp_path_factory.mktemp("three")
    manifest = save_model(model, root / "model")
    fasta = root / "r.fa"
    fasta.write_text(">r\n" + "".join("ACGT"[i] for i in rng.integers(4, size=3000)) + "\n")
    ref = root / "ref.bed"
    ref.write_text("r\t100\t400\tx\nr\t1200\t1300\ty\n")
    return manifest, fasta, ref


def _greys_only(fig) -> list[str]:
    bad = []
    for ax in fig.axes:
        for line in ax.get_lines():
            bad += [c for c in [line.get_color()] if not _is_grey(c)]
        for patch in ax.patches:
            for c in (patch.get_facecolor(), patch.get_edgecolor()):
                if not _is_grey(c):
                    bad.append(str(c))
    return bad


def _is_grey(colour) -> bool:
    r, g, b, _ = matplotlib.colors.to_rgba(colour)
    return r == g == b


def test_readable_in_greyscale(three_groups):
    manifest, fasta, ref = three_groups
    data = plot_data(
        PlotOptions(
            input=str(fasta),
            region="r:1-3000",
            out="x.png",
            model=str(manifest),
            reference=str(ref),
        )
    )
    assert data.groups == ["alpha.plus", "alpha.minus", "beta"]
    fig = draw(data, 8, 5, 50)
    # no information in hue: every line and box is black, white or grey
    assert _greys_only(fig) == []
    lines = fig.axes[0].get_lines()
    assert [ln.get_label() for ln in lines] == data.groups
    # curves told apart by line style alone
    assert len({ln.get_linestyle() for ln in lines}) == 3
    dec = [p for p in fig.axes[1].patches]
    refs = [p for p in fig.axes[2].patches]
    assert len(refs) == 2 and all(p.get_gid().startswith("reference-box-") for p in refs)
    # decoded and reference boxes differ by fill pattern and outline style, not colour
    assert {p.get_hatch() for p in refs} == {"////"} and all(p.get_hatch() is None for p in dec)
    assert {p.get_linestyle() for p in refs} != {p.get_linestyle() for p in dec}
    # lanes by position: curves above decoded above reference
    tops = [ax.get_position().y0 for ax in fig.axes[:3]]
    assert tops[0] > tops[1] > tops[2]
    # one row per track group in the decoded lane, in model order from the top
    assert [t.get_text() for t in fig.axes[1].get_yticklabels()] == list(reversed(data.groups))


# ---------------------------------------------------------------- bad input
def _bad(args, out: Path):
    res = run(args)
    lines = res.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), res.stderr
    assert not out.exists()  # nothing half-written
    return res.exit_code, lines[0]


def test_region_over_the_maximum_needs_allow_large(tmp_path):
    rng = np.random.default_rng(5)
    fasta = tmp_path / "big.fa"
    seq = sample_record(rng, MAX_REGION + 100).encode("ascii")  # uniform (tests/helpers.py)
    fasta.write_bytes(b">big\n" + seq + b"\n")
    out = tmp_path / "big.png"
    region = f"big:1-{MAX_REGION + 1}"
    code, line = _bad(["plot", str(fasta), "--region", region, "-o", str(out)], out)
    assert code == 2
    assert line == (
        f"error: region {region} is 2,000,001 bases, more than the 2,000,000 "
        "plotted without --allow-large"
    )
    assert MAX_REGION == 2_000_000  # the maximum the docs state
    res = run(
        [
            "plot",
            str(fasta),
            "--region",
            region,
            "-o",
            str(out),
            "--allow-large",
            "-q",
            "--width",
            "4",
            "--height",
            "2",
            "--dpi",
            "40",
        ]
    )
    assert res.exit_code == 0, res.stderr
    # 2 inches hold no readable curve over a lane: the figure grows to its least height
    assert matplotlib.image.imread(out).shape[:2] == (round(40 * _least_height(1)), 160)


@pytest.mark.parametrize(
    "region, code, expect",
    [
        ("cex_ctg1:20-10", 2, "START 20 is after END 10"),
        ("cex_ctg9:1-10", 2, "no record 'cex_ctg9'"),
        ("cex_ctg1:249990-250010", 2, "lies outside record cex_ctg1 (length 250000)"),
    ],
)
def test_bad_region(tmp_path, region, code, expect):
    out = tmp_path / "f.png"
    got, line = _bad(["plot", str(DEMO), "--region", region, "-o", str(out)], out)
    assert got == code and expect in line


def test_bad_reference_and_output(tmp_path):
    out = tmp_path / "f.png"
    ref = tmp_path / "ref.gff3"
    ref.write_text("##gff-version 3\ncex_ctg1\t.\tx\t10\t5\t.\t.\t.\t.\n")
    code, line = _bad(
        ["plot", str(DEMO), "--region", "cex_ctg1:1-100", "-o", str(out), "--reference", str(ref)],
        out,
    )
    assert code == 1 and "ref.gff3 line 2: start 10 is greater than end 5" in line
    gif = tmp_path / "f.gif"
    code, line = _bad(["plot", str(DEMO), "--region", "cex_ctg1:1-100", "-o", str(gif)], gif)
    assert code == 2 and "must end in .png, .svg or .pdf" in line


def test_missing_matplotlib_is_a_clear_error(tmp_path, monkeypatch):
    for name in [m for m in sys.modules if m == "matplotlib" or m.startswith("matplotlib.")]:
        monkeypatch.delitem(sys.modules, name)
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import matplotlib -> ImportError
    out = tmp_path / "f.png"
    code, line = _bad(["plot", str(DEMO), "--region", "cex_ctg1:1-100", "-o", str(out)], out)
    assert code == 3
    assert line == "error: plotting needs the optional extra: pip install 'seqstate[plot]'"


def test_plot_cuts_features_at_unknown_runs_like_annotate(tmp_path):
    # An island-like run interrupted by 20 unknown bases: with the default threshold (10)
    # the decoded feature is cut in two, as annotate cuts it; --split-unknown 21 keeps one.
    fasta = tmp_path / "n.fa"
    island = "CG" * 150
    fasta.write_text(">r\n" + "AT" * 300 + island + "N" * 20 + island + "AT" * 300 + "\n")
    counts = {}
    for threshold in (10, 21):
        data = plot_data(
            PlotOptions(
                input=str(fasta),
                region="r",
                out=str(tmp_path / "f.png"),
                min_length=1,
                split_unknown=threshold,
            )
        )
        counts[threshold] = len(data.decoded)
        out = tmp_path / f"a{threshold}"
        annotate(
            AnnotateOptions(
                input=str(fasta), out_dir=str(out), min_length=1, split_unknown=threshold
            )
        )
        assert counts[threshold] == len(read_gff3(out / "n.gff3"))
    assert counts == {10: 2, 21: 1}


# ---------------------------------------------------------------- gene models
# Synthetic records drawn from the shipped gene-segment model (`seqstate sample`, seed 3);
# the decoded genes are checked against annotate's own GFF3 of the same records.


@pytest.fixture(scope="module")
def gene_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("genes")
    fa, truth = tmp / "g.fa", tmp / "truth.gff3"
    res = run(
        ["sample", "gene-segment", "--length", "30000", "--records", "2", "--seed", "3"]
        + ["-o", str(fa), "--truth", str(truth), "-q"]
    )
    assert res.exit_code == 0, res.stderr
    out = tmp / "annot"
    annotate(AnnotateOptions(input=str(fa), out_dir=str(out), model="gene-segment"))
    return tmp, fa, truth, read_gff3(out / "g.gff3")


def test_gene_model_lane_is_annotates_genes(gene_run):
    tmp, fa, truth, annotated = gene_run
    mrna_gene = {f.get("ID"): f.get("Parent") for f in annotated if f.type == "mRNA"}
    partial = {f.get("ID") for f in annotated if f.type == "gene" and f.get("partial")}
    n_genes, strands = 0, set()
    for seqid in ("sim1", "sim2"):
        data = plot_data(
            PlotOptions(input=str(fa), region=seqid, out="x.png", model="gene-segment")
        )
        assert data.decoded_unit == "gene" and data.decoded_rows == ["genes +", "genes -"]
        want: dict[str, list] = {}
        for f in annotated:
            if f.type == "CDS" and f.seqid == seqid:
                want.setdefault(mrna_gene[f.get("Parent")], []).append((f.start0, f.end0, f.strand))
        got: dict[str, list] = {}
        for f in data.decoded:
            assert f.row == (0 if f.strand == "+" else 1)  # one row per strand
            assert f.label == f.model + (" (partial)" if f.model in partial else "")
            got.setdefault(f.model, []).append((f.start0, f.end0, f.strand))
        assert got == want  # same IDs, same CDS pieces as annotate
        n_genes += len(got)
        strands |= {s for pieces in got.values() for _, _, s in pieces}
        fig = draw(data, 10, 4, 60)
        lane = fig.axes[1]
        texts = [t.get_text() for t in lane.texts if (t.get_gid() or "").startswith("feature-")]
        assert sorted(texts) == sorted({f.label for f in data.decoded})  # every gene ID
        lines = lane.get_lines()
        marks = [ln for ln in lines if (ln.get_gid() or "").startswith("feature-strand")]
        assert len(marks) == len(got)  # one 3' arrowhead per gene, pointing its way
        assert [ln.get_marker() for ln in marks] == [
            ">" if pieces[0][2] == "+" else "<"
            for pieces in sorted(got.values(), key=lambda p: p[0][0])
        ]
        joins = [ln for ln in lines if (ln.get_gid() or "").startswith("feature-join")]
        assert len(joins) == sum(len(p) > 1 for p in got.values())  # introns drawn as lines
    assert n_genes >= 3 and strands == {"+", "-"}
    res = run(["plot", str(fa), "--region", "sim2", "-m", "gene-segment", "-o", str(tmp / "g.svg")])
    assert res.exit_code == 0, res.stderr
    assert "decoded gene(s) -> " in res.stderr


def test_curves_stay_distinguishable_where_they_coincide(gene_run):
    _, fa, _, _ = gene_run
    data = plot_data(
        PlotOptions(input=str(fa), region="sim1:1-2000", out="x.png", model="gene-segment")
    )
    lines = draw(data, 8, 4, 50).axes[0].get_lines()
    assert [ln.get_label() for ln in lines] == data.groups and len(lines) == 4
    # distinct dash patterns; each later curve narrower and darker, drawn on top, so a
    # curve lying on another still shows inside it (common practice)
    assert len({ln.get_linestyle() for ln in lines}) == 4
    widths = [ln.get_linewidth() for ln in lines]
    greys = [matplotlib.colors.to_rgba(ln.get_color())[0] for ln in lines]
    orders = [ln.get_zorder() for ln in lines]
    assert widths == sorted(widths, reverse=True) and len(set(widths)) == 4
    assert greys == sorted(greys, reverse=True) and len(set(greys)) == 4
    assert orders == sorted(orders) and len(set(orders)) == 4


def test_whole_record_is_binned_means(gene_run):
    from seqstate.commands.plot import _curve_points, bin_size

    _, fa, _, _ = gene_run
    data = plot_data(PlotOptions(input=str(fa), region="sim1", out="x.png", model="gene-segment"))
    fig = draw(data, 5, 3, 40)  # 200 pixel columns, 400 points at most: 30 kb is binned
    size = bin_size(30_000, 400)
    assert size == 150  # ceil(30000 / 200)
    assert fig.axes[0].get_title(loc="left") == "posterior probability (mean per 150-base bin)"
    line = fig.axes[0].get_lines()[0]
    ys = np.asarray(line.get_ydata())
    # the mean of each 150-base bin, by hand (numpy reshape)
    assert np.allclose(ys, data.values[:, 0].astype(np.float64).reshape(-1, 150).mean(axis=1))
    assert np.allclose(np.asarray(line.get_xdata())[:2], [75.5, 225.5])  # bin centres, 1-based
    # a last, shorter bin is the mean of what it holds; no binning when it fits
    x, y = _curve_points(np.arange(7, dtype=np.float32), 10, 3)
    assert x.tolist() == [12.0, 15.0, 17.0] and y.tolist() == [1.0, 4.0, 6.0]
    x, y = _curve_points(np.arange(3, dtype=np.float32), 10, bin_size(3, 4))
    assert x.tolist() == [11.0, 12.0, 13.0] and y.tolist() == [0.0, 1.0, 2.0]


def test_labels_left_out_when_too_many(tmp_path):
    from seqstate.commands.plot import MAX_LABELS, LaneFeature, PlotData

    n = MAX_LABELS + 1
    decoded = [LaneFeature(0, 10 * i, 10 * i + 5, "", "+", f"g{i}", f"g{i}") for i in range(n)]
    data = PlotData("r", 0, 10 * n, "m", "viterbi", "note", ["a"], np.zeros((10 * n, 1)), decoded)
    data.decoded_rows = ["genes +"]
    lane = draw(data, 6, 3, 40).axes[1]
    assert lane.texts == [] or all(not t.get_text() for t in lane.texts)
    assert f"{n} in view, IDs not written (at most {MAX_LABELS})" in lane.get_title(loc="left")


REF_GFF3 = """##gff-version 3
##sequence-region sim1 1 30000
sim1\tref\tregion\t1\t30000\t.\t.\t.\tID=chr
sim1\tref\tgene\t101\t900\t.\t-\t.\tID=G1
sim1\tref\tmRNA\t101\t900\t.\t-\t.\tID=G1.a;Parent=G1
sim1\tref\tCDS\t101\t300\t.\t-\t0\tParent=G1.a
sim1\tref\tCDS\t701\t900\t.\t-\t0\tParent=G1.a
sim1\tref\tmRNA\t101\t600\t.\t-\t.\tID=G1.b;Parent=G1
sim1\tref\tCDS\t101\t300\t.\t-\t0\tParent=G1.b
sim1\tref\tCDS\t501\t600\t.\t-\t0\tParent=G1.b
sim1\tref\tCDS\t1501\t1800\t.\t+\t0\tID=lone
"""


def _ref_data(ref: Path, fa: Path, *types: str):
    return plot_data(
        PlotOptions(
            input=str(fa),
            region="sim1:1-2000",
            out="x.png",
            model="gene-segment",
            reference=str(ref),
            reference_types=types,
        )
    )


def test_reference_types_and_gene_models(gene_run, tmp_path):
    _, fa, _, _ = gene_run
    ref = tmp_path / "ref.gff3"
    ref.write_text(REF_GFF3)
    data = _ref_data(ref, fa)
    # by default only the types that are the model's labels (CDS): the others take no
    # lane and the title says so
    assert data.reference_hidden == ["region", "gene", "mRNA"]
    # the two isoforms overlap, so the CDS row has two tiers (the lone CDS at 1501-1800
    # fits in the first)
    assert data.reference_rows == ["CDS", ""]
    by_model: dict[str, set] = {}
    for f in data.reference:
        by_model.setdefault(f.model, set()).add((f.start0, f.end0, f.row, f.label))
    assert by_model == {
        "G1.a": {(100, 300, 0, "G1"), (700, 900, 0, "G1")},  # labelled with the gene ID
        "G1.b": {(100, 300, 1, ""), (500, 600, 1, "")},  # the same gene: its ID once
        None: {(1500, 1800, 0, "lone")},
    }
    fig = draw(data, 8, 5, 50)
    assert "not shown: region, gene, mRNA" in fig.axes[2].get_title(loc="left")
    labels = [t.get_text() for t in fig.axes[2].texts]
    assert sorted(labels) == ["G1", "lone"]
    every = _ref_data(ref, fa, "gene", "mRNA", "CDS")
    assert every.reference_rows == ["gene", "mRNA", "", "CDS", ""]
    marks = [
        ln for ln in fig.axes[2].get_lines() if (ln.get_gid() or "").startswith("reference-strand")
    ]
    assert "<" in {ln.get_marker() for ln in marks} and ">" in {ln.get_marker() for ln in marks}
    # selected types only; 'all' brings the region row back
    only = _ref_data(ref, fa, "region")
    assert only.reference_rows == ["region"] and only.reference_hidden == ["gene", "mRNA", "CDS"]
    assert "region" in _ref_data(ref, fa, "all").reference_rows
    with pytest.raises(UsageError, match="--reference-type bogus: no such type"):
        _ref_data(ref, fa, "bogus")


def test_reference_gtf_draws_as_its_gff3_twin(gene_run, tmp_path):
    # GTF 2.2 twin of REF_GFF3's transcripts (gene_id / transcript_id; from memory)
    _, fa, _, _ = gene_run
    gff = tmp_path / "ref.gff3"
    gff.write_text(REF_GFF3)
    gtf = tmp_path / "ref.gtf"
    gtf.write_text(
        'sim1\tref\tCDS\t101\t300\t.\t-\t0\tgene_id "G1"; transcript_id "G1.a";\n'
        'sim1\tref\tCDS\t701\t900\t.\t-\t0\tgene_id "G1"; transcript_id "G1.a";\n'
        'sim1\tref\tCDS\t101\t300\t.\t-\t0\tgene_id "G1"; transcript_id "G1.b";\n'
        'sim1\tref\tCDS\t501\t600\t.\t-\t0\tgene_id "G1"; transcript_id "G1.b";\n'
    )
    want = _ref_data(gff, fa, "CDS")
    got = _ref_data(gtf, fa, "CDS")
    key = [(f.start0, f.end0, f.strand, f.model, f.label, f.row) for f in got.reference]
    assert key == [
        (f.start0, f.end0, f.strand, f.model, f.label, f.row)
        for f in want.reference
        if f.model != "lone" and f.model is not None
    ]
    res = run(
        ["plot", str(fa), "--region", "sim1:1-2000", "-m", "gene-segment"]
        + ["-o", str(tmp_path / "r.png"), "--reference", str(gtf), "--reference-type", "CDS"]
    )
    assert res.exit_code == 0, res.stderr
    assert "4 reference feature(s)" in res.stderr


def _least_height(n_lane_rows: int, n_ref_rows: int | None = None) -> float:
    from seqstate.commands.plot import MIN_CURVE_INCHES, _lane_inches

    lanes = _lane_inches(n_lane_rows) + (0 if n_ref_rows is None else _lane_inches(n_ref_rows))
    return 1.2 + MIN_CURVE_INCHES + lanes


def _texts_inside_and_apart(fig) -> list:
    """Every visible text of a drawn figure lies inside it; ID labels do not overlap."""
    from matplotlib.text import Text

    renderer = fig.canvas.get_renderer()
    box = fig.bbox
    labels = []
    unseen = set()  # labels of ticks outside the view: matplotlib does not draw them
    for ax in fig.axes:
        for axis, (lo, hi) in ((ax.xaxis, ax.get_xlim()), (ax.yaxis, ax.get_ylim())):
            for tick in axis.get_major_ticks():
                if not min(lo, hi) <= tick.get_loc() <= max(lo, hi):
                    unseen |= {id(tick.label1), id(tick.label2)}
    for t in fig.findobj(Text):
        if not t.get_visible() or not t.get_text() or id(t) in unseen:
            continue
        ext = t.get_window_extent(renderer)
        # matplotlib's own measure of the drawn text (Text.get_window_extent)
        assert ext.x0 >= box.x0 - 0.5 and ext.x1 <= box.x1 + 0.5, t.get_text()
        assert ext.y0 >= box.y0 - 0.5 and ext.y1 <= box.y1 + 0.5, t.get_text()
        if "-label-" in (t.get_gid() or ""):
            labels.append(ext)
    for i, a in enumerate(labels):
        assert not any(a.overlaps(b) for b in labels[i + 1 :])
    return labels


def test_nothing_clipped_at_the_default_size(gene_run, tmp_path):
    from seqstate.commands.plot import PlotOptions as Opts

    _, fa, _, _ = gene_run
    ref = tmp_path / "ref.gff3"
    ref.write_text(REF_GFF3)
    for model, region in (("cpg-island", "sim1:1-30000"), ("gene-segment", "sim1:1-30000")):
        data = plot_data(
            Opts(input=str(fa), region=region, out="x.png", model=model, reference=str(ref))
        )
        defaults = Opts(input="", region="", out="")
        fig = draw(data, defaults.width, defaults.height, defaults.dpi)
        fig.canvas.draw()
        # the tight bounding box of everything drawn (matplotlib Figure.get_tightbbox)
        tight = fig.get_tightbbox(fig.canvas.get_renderer())
        w, h = fig.get_size_inches()
        assert tight.x0 >= -0.01 and tight.y0 >= -0.01 and tight.x1 <= w + 0.01
        assert tight.y1 <= h + 0.01
        _texts_inside_and_apart(fig)


def test_crowded_labels_are_dropped_or_moved_not_overprinted():
    from seqstate.commands.plot import LaneFeature, PlotData

    # 30 genes of 40 bases side by side, IDs far longer than the genes
    decoded = [
        LaneFeature(i % 2, 50 * i, 50 * i + 40, "", "+", f"g{i}", f"record.gene.{i}")
        for i in range(30)
    ]
    data = PlotData("r", 0, 1500, "m", "viterbi", "note", ["a"], np.zeros((1500, 1)), decoded)
    data.decoded_rows = ["genes +", "genes -"]
    fig = draw(data, 10, 4, 100)
    written = _texts_inside_and_apart(fig)
    assert 2 <= len(written) < 30  # some fit, the others are left out
    title = fig.axes[1].get_title(loc="left")
    assert f"{30 - len(written)} ID(s) not written (no room)" in title
