"""FASTA reading and writing, and region strings (seqstate.io.fasta, seqstate.io.regions)."""

from __future__ import annotations

import gzip
import io
import os
import sys
from pathlib import Path

import fasta_oracle
import pytest
from Bio import SeqIO
from hypothesis import given, settings
from hypothesis import strategies as st

from seqstate.errors import SequenceFormatError, UsageError
from seqstate.io import fasta as fasta_module
from seqstate.io.fasta import (
    DNA_ALPHABET,
    Record,
    SkippedRecord,
    iter_fasta,
    iter_sequences,
    read_fasta,
    write_fasta,
)
from seqstate.io.regions import TO_END, Region, check_region, parse_region

DATA = Path(__file__).parent / "data" / "io"
SAMPLE = DATA / "two_records.fa"


def write_bytes(tmp_path: Path, name: str, data: bytes) -> Path:
    path = tmp_path / name
    path.write_bytes(data)
    return path


class FakeStdin:
    """Stands in for sys.stdin: only the binary ``.buffer`` is used."""

    def __init__(self, data: bytes) -> None:
        self.buffer = io.BytesIO(data)


# ---------------------------------------------------------------- reading


def test_sample_matches_biopython() -> None:
    records = read_fasta(SAMPLE)
    with open(SAMPLE) as handle:
        reference = list(SeqIO.parse(handle, "fasta"))
    # Reference: Biopython 1.88 Bio.SeqIO "fasta" parser (id = first word of the
    # header, description = whole header, sequence = lines joined).
    assert [r.id for r in records] == [r.id for r in reference]
    assert [r.seq for r in records] == [str(r.seq).encode("ascii") for r in reference]
    assert [f"{r.id} {r.description}" for r in records] == [r.description for r in reference]


def test_sample_content_kept_exactly() -> None:
    first, second = read_fasta(SAMPLE)
    assert first == Record(
        "chr1",
        "first test record, lower and upper case",
        b"ACGTACGTNNacgtRYSWKMBDHVACGTAC" + b"GTACGTACGTACGTACGTACGTACGTACGT" + b"acgtacgt",
    )
    assert len(first.seq) == 68
    assert second.id == "chrM:part"
    assert second.seq == b"TTGGCCAAUU-ACGT"


def test_gzip_detected_by_magic_not_extension(tmp_path: Path) -> None:
    packed = write_bytes(tmp_path, "sequences.txt", gzip.compress(SAMPLE.read_bytes()))
    plain_named_gz = write_bytes(tmp_path, "plain.fa.gz", SAMPLE.read_bytes())
    # gzip streams start with bytes 1f 8b (RFC 1952; checked against CPython's
    # Lib/gzip.py, which writes and expects the magic b"\037\213").
    assert packed.read_bytes()[:2] == b"\x1f\x8b"
    assert read_fasta(packed) == read_fasta(SAMPLE)
    assert read_fasta(plain_named_gz) == read_fasta(SAMPLE)


def test_stdin_plain(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(sys, "stdin", FakeStdin(SAMPLE.read_bytes()))
    assert read_fasta("-") == read_fasta(SAMPLE)


def test_stdin_gzip(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(sys, "stdin", FakeStdin(gzip.compress(SAMPLE.read_bytes())))
    assert read_fasta("-") == read_fasta(SAMPLE)


def test_stdin_error_names_stdin(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(sys, "stdin", FakeStdin(b">a\nAC1T\n"))
    with pytest.raises(SequenceFormatError) as info:
        read_fasta("-")
    assert info.value.path == "<stdin>"
    assert str(info.value).startswith("<stdin> line 2")


def test_crlf_blank_lines_and_inner_spaces(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b"\r\n>a  desc  here \r\nAC GT\r\n\r\nTT\r\n\n>b\r\nG\r\n")
    records = read_fasta(path)
    assert records == [Record("a", "desc  here", b"ACGTTT"), Record("b", "", b"G")]


def test_iter_fasta_streams_records_before_a_later_error(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b">a\nACGT\n>b\nAC!T\n")
    records = iter_fasta(path)
    assert next(records) == Record("a", "", b"ACGT")
    with pytest.raises(SequenceFormatError) as info:
        next(records)
    assert info.value.line0 == 3


def test_iter_fasta_detects_duplicates(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b">a\nA\n>b\nC\n>a\nG\n")
    with pytest.raises(SequenceFormatError) as info:
        list(iter_fasta(path))
    assert info.value.line0 == 4


def test_alphabet_check_none_accepts_any_character(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "protein.fa", b">p\nMKX*J.12@\n")
    assert read_fasta(path, alphabet_check=None)[0].seq == b"MKX*J.12@"


def test_alphabet_check_rejects_unknown_mode() -> None:
    with pytest.raises(ValueError, match="alphabet_check"):
        read_fasta(SAMPLE, alphabet_check="protein")


def test_every_documented_dna_character_is_accepted(tmp_path: Path) -> None:
    # IUPAC nucleotide codes incl. U and ambiguity codes (NC-IUB 1984 recommendations;
    # checked against Biopython 1.88 Bio.Data.IUPACData: ambiguous_dna_letters
    # "GATCRYWSMKHBVDN", ambiguous_rna_letters with U); '-' as gap (common practice).
    letters = "ACGTURYSWKMBDHVN-"
    assert DNA_ALPHABET == letters
    body = (letters + letters.lower()).encode("ascii")
    path = write_bytes(tmp_path, "all.fa", b">all\n" + body + b"\n")
    assert read_fasta(path)[0].seq == body


# ---------------------------------------------------------------- errors


def test_missing_file(tmp_path: Path) -> None:
    missing = tmp_path / "nope.fa"
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(missing)
    assert info.value.path == str(missing)
    assert "file not found" in str(info.value)


def test_unreadable_directory(tmp_path: Path) -> None:
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(tmp_path)
    assert info.value.path == str(tmp_path)
    assert "is a directory" in str(info.value)


def test_empty_file(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "empty.fa", b"")
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(path)
    assert str(info.value) == f"{path}: no FASTA records found (empty file)"


def test_only_blank_lines(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "blank.fa", b"\n  \n\t\n")
    with pytest.raises(SequenceFormatError, match="only blank lines") as info:
        read_fasta(path)
    assert info.value.path == str(path)


def test_not_fasta_shows_line_and_short_copy(tmp_path: Path) -> None:
    text = b"\n##gff-version 3 followed by a long line that goes on and on and on\n>a\nA\n"
    path = write_bytes(tmp_path, "x.gff3", text)
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(path)
    err = info.value
    assert err.path == str(path)
    assert err.line0 == 1  # the first non-blank line, shown as line 2
    message = str(err)
    assert f"{path} line 2:" in message
    assert "'>'" in message
    assert "'##gff-version 3 followed by a long line ...'" in message


def test_header_without_id(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b">a\nAC\n>   \nGT\n")
    with pytest.raises(SequenceFormatError, match="no record ID") as info:
        read_fasta(path)
    assert (info.value.path, info.value.line0) == (str(path), 2)


def test_empty_sequence_names_record(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b">a\nAC\n>empty one\n\n>c\nG\n")
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(path)
    err = info.value
    assert (err.path, err.line0, err.where) == (str(path), 2, "record 'empty'")
    assert "record 'empty' has an empty sequence" in str(err)


def test_empty_sequence_in_last_record(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b">a\nAC\n>last\n")
    with pytest.raises(SequenceFormatError, match="'last' has an empty sequence") as info:
        read_fasta(path)
    assert info.value.line0 == 2


def test_duplicate_id_names_both_lines(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b">chr1 a\nAC\n>chr2\nGG\n>chr1 again\nTT\n")
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(path)
    err = info.value
    assert (err.path, err.line0) == (str(path), 4)
    assert "duplicate record ID 'chr1' (first used on line 1)" in str(err)
    assert f"{path} line 5" in str(err)


@pytest.mark.parametrize(
    ("body", "char", "position", "line0"),
    [
        (b"ACGT\nAC5T\n", "'5'", 7, 2),
        (b"AC@T\n", "'@'", 3, 1),
        (b"ACGTX\n", "'X'", 5, 1),
        (b"ACGT\nACGT\nJ\n", "'J'", 9, 3),
        (b"A.GT\n", "'.'", 2, 1),
        (b"ACG*\n", "'*'", 4, 1),
        (b"AC GT\nT T x\n", "'x'", 7, 2),
    ],
)
def test_bad_character_names_record_position_and_line(
    tmp_path: Path, body: bytes, char: str, position: int, line0: int
) -> None:
    path = write_bytes(tmp_path, "x.fa", b">rec1 desc\n" + body)
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(path)
    err = info.value
    assert (err.path, err.line0, err.where) == (str(path), line0, "record 'rec1'")
    assert f"character {char} at position {position} " in str(err)


def test_non_ascii_byte_is_reported_as_hex(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", ">r\nAC\u00e9T\n".encode())
    with pytest.raises(SequenceFormatError, match="byte 0xC3 at position 3"):
        read_fasta(path)


def test_truncated_gzip(tmp_path: Path) -> None:
    data = gzip.compress(SAMPLE.read_bytes() * 50)
    path = write_bytes(tmp_path, "cut.fa.gz", data[: len(data) // 2])
    with pytest.raises(SequenceFormatError, match="cannot be read") as info:
        read_fasta(path)
    assert info.value.path == str(path)


# ---------------------------------------------------------------- writing


def test_write_fasta_wraps_and_biopython_reads_it(tmp_path: Path) -> None:
    records = [Record("a", "some text", b"ACGTACGTAC"), Record("b", "", b"GGG")]
    path = tmp_path / "out.fa"
    with open(path, "w") as handle:
        write_fasta(handle, records, width=4)
    assert path.read_text() == ">a some text\nACGT\nACGT\nAC\n>b\nGGG\n"
    with open(path) as handle:
        reference = [(r.id, str(r.seq)) for r in SeqIO.parse(handle, "fasta")]
    # Reference: Biopython 1.88 Bio.SeqIO "fasta" parser.
    assert reference == [("a", "ACGTACGTAC"), ("b", "GGG")]


@pytest.mark.parametrize(
    ("record", "width"),
    [(Record("has space", "", b"A"), 60), (Record("", "", b"A"), 60), (Record("a", "", b""), 60)]
    + [(Record("a", "", b"A"), 0)],
)
def test_write_fasta_rejects_bad_input(record: Record, width: int) -> None:
    with pytest.raises(ValueError):
        write_fasta(io.StringIO(), [record], width=width)


_ids = st.text(alphabet="abcXYZ019_.:|-", min_size=1, max_size=8)
_seqs = st.text(alphabet=DNA_ALPHABET + DNA_ALPHABET.lower(), min_size=1, max_size=200)


@settings(max_examples=50, deadline=None)
@given(
    st.lists(st.tuples(_ids, _seqs), min_size=1, max_size=5, unique_by=lambda t: t[0]),
    st.integers(min_value=1, max_value=70),
)
def test_write_read_round_trip(pairs: list[tuple[str, str]], width: int) -> None:
    records = [Record(i, "d e", s.encode("ascii")) for i, s in pairs]
    buffer = io.StringIO()
    write_fasta(buffer, records, width=width)
    stdin = FakeStdin(buffer.getvalue().encode("ascii"))
    saved = sys.stdin
    sys.stdin = stdin  # type: ignore[assignment]
    try:
        assert read_fasta("-") == records
    finally:
        sys.stdin = saved


# ---------------------------------------------------------------- regions


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("chr1:1-10", Region("chr1", 0, 10)),
        ("chr1:1,000-2,000", Region("chr1", 999, 2000)),
        ("chr1:5-5", Region("chr1", 4, 5)),
        (" chr2:3 - 7 ", Region("chr2", 2, 7)),
        ("HLA:A:10-20", Region("HLA:A", 9, 20)),
        ("chr1", Region("chr1", 0, TO_END)),
        ("HLA:A*01", Region("HLA:A*01", 0, TO_END)),
    ],
)
def test_parse_region(text: str, expected: Region) -> None:
    assert parse_region(text) == expected


@pytest.mark.parametrize(
    "text",
    ["", "chr1:", "chr1:5", "chr1:5-", "chr1:-5", "chr1:0-10", "chr1:10-5", ":1-5", "chr 1:1-5"]
    + ["chr1:1-2-3", "a b"],
)
def test_parse_region_errors(text: str) -> None:
    with pytest.raises(UsageError) as info:
        parse_region(text)
    message = str(info.value)
    assert message.startswith(f"region {text!r}: ")
    assert "expected ID:START-END with 1-based inclusive START <= END" in message


def test_region_to_text_round_trip() -> None:
    assert parse_region("chr1:1,001-2,000").to_text() == "chr1:1001-2000"
    assert parse_region("chrM").to_text() == "chrM"


def test_check_region_resolves_whole_record() -> None:
    assert check_region(parse_region("chr2"), {"chr1": 800, "chr2": 50}) == Region("chr2", 0, 50)
    assert check_region(parse_region("chr1:1-800"), {"chr1": 800}) == Region("chr1", 0, 800)


def test_check_region_outside_record() -> None:
    with pytest.raises(UsageError) as info:
        check_region(parse_region("chr1:5-900"), {"chr1": 800})
    assert str(info.value) == "region chr1:5-900 lies outside record chr1 (length 800)"


def test_check_region_start_beyond_end_of_record() -> None:
    with pytest.raises(UsageError, match="lies outside record chr1 \\(length 800\\)"):
        check_region(parse_region("chr1:801-801"), {"chr1": 800})


def test_check_region_unknown_record_lists_five() -> None:
    lengths = {f"c{i}": 10 for i in range(7)}
    with pytest.raises(UsageError) as info:
        check_region(parse_region("chrX:1-5"), lengths)
    message = str(info.value)
    assert "no record 'chrX'" in message
    assert "c0, c1, c2, c3, c4, ... (7 records in all)" in message
    assert "c5" not in message


# ---------------------------------------------------------------- what the first bytes say

BOM = b"\xef\xbb\xbf"  # UTF-8 byte-order mark (The Unicode Standard, section 23.8)


@pytest.mark.parametrize("compress", [False, True], ids=["plain", "gzip"])
def test_utf8_byte_order_mark_is_accepted(tmp_path: Path, compress: bool) -> None:
    data = BOM + b">a desc\nACGT\n>b\nGG\n"
    path = write_bytes(tmp_path, "bom.fa", gzip.compress(data) if compress else data)
    records = read_fasta(path)
    assert [(r.id, r.description, r.seq) for r in records] == [
        ("a", "desc", b"ACGT"),
        ("b", "", b"GG"),
    ]


def test_utf8_byte_order_mark_on_stdin(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(sys, "stdin", FakeStdin(BOM + b">s\nAC\n"))
    assert read_fasta("-") == [Record("s", "", b"AC")]


# Magic numbers (common practice): bzip2 "BZh", xz fd 37 7a 58 5a 00, Zstandard
# 28 b5 2f fd (RFC 8878, section 3.1.1), zip "PK\x03\x04".
_ZSTD_FRAME = b"\x28\xb5\x2f\xfd\x20\x05\x29\x00\x00>a\nAC\n"


@pytest.mark.parametrize(
    "name, make, found",
    [
        ("x.fa.bz2", lambda d: __import__("bz2").compress(d), "compressed with bzip2"),
        ("x.fa.xz", lambda d: __import__("lzma").compress(d), "compressed with xz"),
        ("x.fa.zst", lambda d: _ZSTD_FRAME, "compressed with zstd"),
        ("x.zip", lambda d: b"PK\x03\x04" + d, "is a zip archive"),
        ("x.fa.gz.gz", lambda d: gzip.compress(gzip.compress(d)), "compressed twice with gzip"),
        ("x.fa.gz", lambda d: gzip.compress(__import__("bz2").compress(d)), "bzip2 inside gzip"),
        ("u16.fa", lambda d: d.decode().encode("utf-16"), "is UTF-16 text"),
    ],
)
def test_other_compressions_and_encodings_are_named(
    tmp_path: Path, name: str, make, found: str
) -> None:
    path = write_bytes(tmp_path, name, make(b">a\nACGT\n"))
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(path)
    msg = info.value.format()
    assert msg.startswith(f"{path}: "), msg
    assert found in msg, msg
    if "UTF" not in found:
        assert "only plain and gzip are read" in msg, msg


def test_cr_only_line_endings_are_named(tmp_path: Path) -> None:
    # classic Mac OS line ends: every line break is a lone CR (common practice)
    path = write_bytes(tmp_path, "mac.fa", b">a\rACGT\r>b\rGG\r")
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(path)
    msg = info.value.format()
    assert msg.startswith(f"{path} line 1: "), msg
    assert "CR-only line endings" in msg, msg


def test_crlf_line_endings_are_still_read(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "dos.fa", b">a\r\nACGT\r\nAA\r\n")
    assert read_fasta(path) == [Record("a", "", b"ACGTAA")]


# ---------------------------------------------------------------- empty records


def test_empty_records_are_skipped_and_listed(tmp_path: Path) -> None:
    from seqstate.io.fasta import SkippedRecord

    path = write_bytes(tmp_path, "x.fa", b">a\nAC\n>gap one\n\n>c\nG\n>end\n")
    skipped: list[SkippedRecord] = []
    records = read_fasta(path, empty_records="skip", skipped=skipped)
    assert [r.id for r in records] == ["a", "c"]
    assert skipped == [SkippedRecord("gap", 2, "empty"), SkippedRecord("end", 6, "empty")]


def test_only_empty_records_is_an_error_even_when_skipping(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b">a\n>b\n\n")
    with pytest.raises(SequenceFormatError, match="every record is empty") as info:
        read_fasta(path, empty_records="skip")
    assert info.value.line0 == 0


# ---------------------------------------------------------------- streaming in chunks
# Oracle: the whole-file reader of seqstate before streaming (tests/fasta_oracle.py, the
# reading half of seqstate/io/fasta.py as it was), which read the file with one read().


def outcome(read, path: Path, **options):
    """Records (id, description, bases) and skipped records, or the error raised."""
    skipped: list = []
    try:
        records = read(path, skipped=skipped, **options)
    except SequenceFormatError as err:
        return ("error", str(err), err.line0, err.where)
    return (
        [(r.id, r.description, r.seq) for r in records],
        [(s.id, s.line0, s.reason) for s in skipped],
    )


def read_sequences(path: Path, **options) -> list[Record]:
    """iter_sequences as Records: every base read back through its source."""
    out = []
    for rec in iter_sequences(path, **options):
        out.append(Record(rec.id, rec.description, rec.read(0, rec.length)))
        assert len(out[-1].seq) == rec.length
        rec.source.close()
    return out


_LINES = [
    b">a desc",
    b">b",
    b">a",
    b">",
    b">  ",
    b" >c",
    b">d\xff",
    b"ACGT",
    b"acgtn",
    b"AC GT",
    b"",
    b"  ",
    b"\t",
    b"AC!T",
    b"A\xc3\xa9",
    b"NNNN-RY",
    b"x",
    b"#text",
]
_fasta_text = st.tuples(
    st.lists(st.sampled_from(_LINES), min_size=0, max_size=12),
    st.sampled_from([b"\n", b"\r\n"]),
    st.booleans(),
    st.booleans(),
).map(lambda t: (b">first\n" if t[3] else b"") + t[1].join(t[0]) + (t[1] if t[2] else b""))


@settings(max_examples=200, deadline=None)
@given(_fasta_text, st.integers(min_value=1, max_value=9), st.sampled_from(["error", "skip"]))
def test_any_chunk_size_reads_as_the_whole_file_reader(
    text: bytes, chunk: int, empty_records: str
) -> None:
    import tempfile

    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "x.fa"
        path.write_bytes(text)
        expected = outcome(fasta_oracle.read_fasta, path, empty_records=empty_records)
        saved = fasta_module.CHUNK_BYTES
        fasta_module.CHUNK_BYTES = chunk
        try:
            got = outcome(read_fasta, path, empty_records=empty_records)
            spilled = outcome(
                read_sequences, path, empty_records=empty_records, spill_above=2, spill_dir=folder
            )
        finally:
            fasta_module.CHUNK_BYTES = saved
        assert got == expected
        assert spilled == expected
        assert sorted(p.name for p in Path(folder).iterdir()) == ["x.fa"]


_ORACLE_TEXTS = [
    b">a first record\nACGT\nacgtN\n>b\nGG\n",
    b">x\r\nAC\r\nGT\r\n>y  two  words \r\nTTTT\r\n",
    b">only\nNNNNacgtRY\n\nACGT",
    b">chr1 len=12\n" + b"ACGTACGTACGT\n" * 40 + b">chr2\nA\n",
]


@pytest.mark.parametrize("text", _ORACLE_TEXTS)
def test_the_oracle_reads_as_biopython(tmp_path: Path, text: bytes) -> None:
    # The oracle is an independent reader: none of its code comes from the streaming
    # module, and on valid files it gives Biopython's records (Bio.SeqIO "fasta" parser:
    # the ID is the first word of the header, its description the whole header line)
    for name, value in vars(fasta_oracle).items():
        assert getattr(value, "__module__", None) != fasta_module.__name__, name
    path = write_bytes(tmp_path, "o.fa", text)
    got = fasta_oracle.read_fasta(path)
    with open(path, encoding="ascii", newline="") as handle:
        want = list(SeqIO.parse(handle, "fasta"))
    assert [r.id for r in got] == [r.id for r in want]
    assert [r.description for r in got] == [r.description[len(r.id) :].strip() for r in want]
    assert [r.seq.decode() for r in got] == [str(r.seq) for r in want]


@pytest.fixture
def small_chunks(monkeypatch: pytest.MonkeyPatch):
    def use(n: int) -> None:
        monkeypatch.setattr(fasta_module, "CHUNK_BYTES", n)

    return use


def test_record_spanning_many_chunks(tmp_path: Path, small_chunks) -> None:
    body = b"".join(b"ACGTNacgtn"[i % 10 : i % 10 + 1] * 61 + b"\n" for i in range(400))
    path = write_bytes(tmp_path, "long.fa", b">long words here\n" + body + b">next\nGG\n")
    small_chunks(97)
    records = read_fasta(path)
    assert records == [
        Record("long", "words here", body.replace(b"\n", b"")),
        Record("next", "", b"GG"),
    ]
    assert len(records[0].seq) == 400 * 61


@pytest.mark.parametrize("chunk", [4, 5, 6, 7, 8])
def test_bad_character_exactly_at_a_chunk_edge(tmp_path: Path, small_chunks, chunk: int) -> None:
    # ">r\n" is bytes 0-2, "ACGT\n" 3-7, "AC" 8-9, the bad '5' is byte 10.
    path = write_bytes(tmp_path, "x.fa", b">r\nACGT\nAC5T\n")
    small_chunks(chunk)
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(path)
    assert (info.value.line0, info.value.where) == (2, "record 'r'")
    assert "character '5' at position 7 " in str(info.value)


@pytest.mark.parametrize("chunk", [1, 2, 3, 6, 7, 8])
def test_header_split_across_chunks(tmp_path: Path, small_chunks, chunk: int) -> None:
    # "\n>" of the second header falls on every possible chunk edge for some chunk size.
    path = write_bytes(tmp_path, "x.fa", b">a\nACG\n>b two\nTT\n")
    small_chunks(chunk)
    assert read_fasta(path) == [Record("a", "", b"ACG"), Record("b", "two", b"TT")]


@pytest.mark.parametrize("chunk", range(1, 12))
def test_crlf_split_across_chunks_is_one_line_end(tmp_path: Path, small_chunks, chunk: int) -> None:
    path = write_bytes(tmp_path, "dos.fa", b">a x\r\nACGT\r\nAA\r\n>b\r\nC\r\n")
    small_chunks(chunk)
    assert read_fasta(path) == [Record("a", "x", b"ACGTAA"), Record("b", "", b"C")]


@pytest.mark.parametrize("chunk", range(1, 9))
def test_lone_cr_at_a_chunk_edge_is_still_named(tmp_path: Path, small_chunks, chunk: int) -> None:
    path = write_bytes(tmp_path, "mac.fa", b">a\r\nAC\r\nGT\rTT\r\n")
    small_chunks(chunk)
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(path)
    assert info.value.line0 == 2
    assert "CR-only line endings" in str(info.value)


def test_cr_only_after_blank_lines_before_the_first_header(tmp_path: Path, small_chunks) -> None:
    path = write_bytes(tmp_path, "x.fa", b"\n\n\r\n  \r \n>a\nAC\n")
    small_chunks(2)
    with pytest.raises(SequenceFormatError, match="CR-only") as info:
        read_fasta(path)
    assert info.value.line0 == 3


def test_text_before_the_header_shows_the_line_across_chunks(tmp_path: Path, small_chunks) -> None:
    line = b"##gff-version 3 followed by a long line that goes on and on and on"
    path = write_bytes(tmp_path, "x.gff3", b"\n\n" + line + b"\n>a\nA\n")
    small_chunks(5)
    with pytest.raises(SequenceFormatError) as info:
        read_fasta(path)
    assert info.value.line0 == 2
    assert "'##gff-version 3 followed by a long line ...'" in str(info.value)


def test_truncated_gzip_after_some_records_is_one_error(tmp_path: Path, small_chunks) -> None:
    data = gzip.compress(b"".join(b">r%d\nACGTACGT\n" % i for i in range(5000)))
    path = write_bytes(tmp_path, "cut.fa.gz", data[: len(data) // 2])
    small_chunks(1000)
    with pytest.raises(SequenceFormatError, match="cannot be read") as info:
        list(iter_fasta(path))
    assert info.value.path == str(path)


# ---------------------------------------------------------------- iter_sequences


def test_iter_sequences_short_and_spilled_records(tmp_path: Path, small_chunks) -> None:
    spill = tmp_path / "spill"
    spill.mkdir()
    long_seq = bytes(b"ACGT"[(i * 7) % 4] for i in range(5000))
    text = b">short s\nACGT\n>long\n" + b"\n".join(long_seq[i : i + 60] for i in range(0, 5000, 60))
    path = write_bytes(tmp_path, "x.fa", text + b"\n")
    small_chunks(256)
    records = iter_sequences(path, spill_above=100, spill_dir=spill)
    short = next(records)
    assert (short.id, short.description, short.length, short.line0) == ("short", "s", 4, 0)
    assert type(short.source).__name__ == "BytesSource"
    long = next(records)
    assert type(long.source).__name__ == "SpillSource"
    assert (long.length, long.line0) == (5000, 2)
    for start0, end0 in [(0, 5000), (0, 1), (4999, 5000), (1234, 3210), (60, 60)]:
        assert long.read(start0, end0) == long_seq[start0:end0]
    # The spill file has no name in the folder: nothing to leave behind.
    assert list(spill.iterdir()) == []
    with pytest.raises(StopIteration):
        next(records)
    long.source.close()
    long.source.close()  # twice is fine
    with pytest.raises(ValueError, match="closed"):
        long.read(0, 1)


def test_spill_above_is_the_largest_record_kept_in_memory(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b">a\nACGTA\n>b\nACGTAC\n")
    kinds = [type(r.source).__name__ for r in iter_sequences(path, spill_above=5)]
    assert kinds == ["BytesSource", "SpillSource"]


def open_fds() -> int:
    return len(os.listdir("/proc/self/fd"))


needs_proc = pytest.mark.skipif(not Path("/proc/self/fd").is_dir(), reason="needs /proc")


@needs_proc
def test_spill_files_are_closed_when_the_iteration_stops_early(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b">a\n" + b"ACGT" * 100 + b"\n>b\n" + b"T" * 500 + b"\n")
    before = open_fds()
    records = iter_sequences(path, spill_above=10, spill_dir=tmp_path)
    first = next(records)
    assert open_fds() > before  # the input and the spill file are open
    records.close()
    assert open_fds() == before
    with pytest.raises(ValueError, match="closed"):
        first.read(0, 4)


@needs_proc
def test_spill_files_are_closed_after_an_error_mid_iteration(tmp_path: Path) -> None:
    text = b">a\n" + b"ACGT" * 100 + b"\n>b\n" + b"T" * 500 + b"\nTT!T\n"
    path = write_bytes(tmp_path, "x.fa", text)
    before = open_fds()
    seen = []
    with pytest.raises(SequenceFormatError, match="character '!' at position 503"):
        for rec in iter_sequences(path, spill_above=10, spill_dir=tmp_path):
            seen.append(rec)  # the caller never closes them
    assert [r.id for r in seen] == ["a"]
    assert open_fds() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["x.fa"]


@needs_proc
def test_spill_file_of_a_record_being_read_is_closed_on_interrupt(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = write_bytes(tmp_path, "x.fa", b">a\n" + b"ACGT\n" * 400)
    monkeypatch.setattr(fasta_module, "CHUNK_BYTES", 64)
    real = fasta_module._read_chunk
    calls = []

    def interrupted(handle, shown):
        calls.append(1)
        if len(calls) == 10:
            raise KeyboardInterrupt
        return real(handle, shown)

    monkeypatch.setattr(fasta_module, "_read_chunk", interrupted)
    before = open_fds()
    with pytest.raises(KeyboardInterrupt):
        list(iter_sequences(path, spill_above=100, spill_dir=tmp_path))
    assert open_fds() == before


def test_full_spill_folder_is_one_clear_error(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import errno

    from seqstate.io import sources

    def full(fd, data, offset):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(sources.os, "pwrite", full)
    path = write_bytes(tmp_path, "x.fa", b">chr9\n" + b"ACGT" * 100 + b"\n")
    with pytest.raises(UsageError) as info:
        list(iter_sequences(path, spill_above=10, spill_dir=tmp_path))
    message = str(info.value)
    assert message == (
        f"the temporary copy of record 'chr9' of {path} in spill folder '{tmp_path}' "
        f"cannot be written: {os.strerror(errno.ENOSPC)}; "
        "set TMPDIR to a folder with more free space"
    )
    assert sorted(p.name for p in tmp_path.iterdir()) == ["x.fa"]


def test_missing_spill_folder_is_one_clear_error(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b">chr9\n" + b"ACGT" * 100 + b"\n")
    with pytest.raises(UsageError, match="spill folder .* cannot be written: .*set TMPDIR"):
        list(iter_sequences(path, spill_above=10, spill_dir=tmp_path / "nope"))


def test_iter_sequences_errors_as_iter_fasta(tmp_path: Path) -> None:
    path = write_bytes(tmp_path, "x.fa", b">a\nAC\n>empty one\n\n>c\nG\n")
    with pytest.raises(SequenceFormatError) as info:
        list(iter_sequences(path))
    assert (info.value.line0, info.value.where) == (2, "record 'empty'")
    skipped: list[SkippedRecord] = []
    got = [r.id for r in iter_sequences(path, empty_records="skip", skipped=skipped)]
    assert got == ["a", "c"]
    assert skipped == [SkippedRecord("empty", 2, "empty")]
    with pytest.raises(ValueError, match="spill_above"):
        list(iter_sequences(path, spill_above=-1))


def test_iter_sequences_reads_stdin_and_gzip(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(sys, "stdin", FakeStdin(gzip.compress(SAMPLE.read_bytes())))
    assert read_sequences(Path("-"), spill_above=20) == read_fasta(SAMPLE)


_MEMORY_SCRIPT = """
import resource, sys
from seqstate.io.fasta import iter_sequences
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
n = 0
for rec in iter_sequences(sys.argv[1], spill_dir=sys.argv[2]):
    n += rec.length
    assert rec.read(rec.length - 10, rec.length) == b"ACGTACGTAC"[: 10]
    rec.source.close()
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(n, (peak - base) * 1024)
"""


@pytest.mark.slow
def test_reading_a_200_mb_record_keeps_memory_bounded(tmp_path: Path) -> None:
    path = tmp_path / "big.fa"
    line = b"ACGTACGTAC" * 6 + b"\n"
    block = line * 100_000  # 6 Mbp a block
    with open(path, "wb") as handle:
        handle.write(b">big synthetic record\n")
        for _ in range(34):
            handle.write(block)
    bases = 34 * 100_000 * 60
    spill = tmp_path / "spill"
    spill.mkdir()
    import subprocess

    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    done = subprocess.run(
        [sys.executable, "-c", _MEMORY_SCRIPT, str(path), str(spill)],
        capture_output=True,
        text=True,
        env=env,
        check=True,
    )
    n, grown = map(int, done.stdout.split())
    assert n == bases
    # ru_maxrss is in KiB on Linux (getrusage(2) manual page).
    assert grown < 100 * 2**20, f"peak RSS grew by {grown / 2**20:.0f} MiB"
    assert list(spill.iterdir()) == []
