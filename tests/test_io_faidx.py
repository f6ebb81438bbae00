"""The FASTA index (``seqstate.io.faidx``): .fai and .gzi files, region reads, stale indexes.

Inputs are synthetic records drawn here from seeded generators.  Most tests compare
a read through the index with the same bases read by the whole-file reader of
seqstate (``seqstate.io.fasta.iter_fasta``).  The .fai columns (name, length,
offset, line bases, line width) and the .gzi layout (little-endian uint64 count,
then (compressed, uncompressed) offset pairs per block after the first) are the
shared index formats as described by the samtools documentation (faidx(5)); the
.fai expected here is computed by the test from the text it wrote.
"""

from __future__ import annotations

import gzip
import os
import struct
import zlib
from pathlib import Path

import numpy as np
import pytest
from Bio import bgzf

from seqstate.errors import SequenceFormatError, UsageError
from seqstate.io import faidx, faidx_build
from seqstate.io.fasta import iter_fasta
from seqstate.io.regions import TO_END, Region

BASES = b"ACGTNacgtn"


@pytest.fixture(autouse=True)
def _fresh(monkeypatch):
    """Every test starts without indexes in memory; files of any size are indexed."""
    faidx.clear_memory()
    monkeypatch.setattr(faidx, "AUTO_INDEX_BYTES", 0)
    yield
    faidx.clear_memory()


def random_records(seed: int, n: int = 3, most: int = 500) -> list[tuple[str, str, bytes]]:
    rng = np.random.default_rng(seed)
    out = []
    for i in range(n):
        length = int(rng.integers(1, most))
        seq = bytes(np.frombuffer(BASES, np.uint8)[rng.integers(0, len(BASES), length)])
        out.append((f"rec{i + 1}", f"synthetic record {i + 1}" if i % 2 == 0 else "", seq))
    return out


def fasta_text(records, width: int, eol: bytes = b"\n") -> tuple[bytes, list[str]]:
    """The FASTA bytes and the .fai lines expected for them (computed from the layout)."""
    out = bytearray()
    fai = []
    for rid, desc, seq in records:
        out += (f">{rid} {desc}" if desc else f">{rid}").encode() + eol
        first = min(width, len(seq))  # the first line sets line bases and width
        fai.append(f"{rid}\t{len(seq)}\t{len(out)}\t{first}\t{first + len(eol)}")
        for i in range(0, len(seq), width):
            out += seq[i : i + width] + eol
    return bytes(out), fai


def write_bgzip(path: Path, data: bytes, cuts: list[int]) -> None:
    """BGZF with a block boundary at every offset of ``cuts`` (Biopython's writer)."""
    with bgzf.BgzfWriter(str(path), "wb") as writer:
        done = 0
        for cut in sorted(set(cuts)) + [len(data)]:
            if cut > done:
                writer.write(data[done:cut])
                writer.flush()
                done = cut


def whole(path: Path, rid: str) -> bytes:
    """The record as the whole-file reader of seqstate reads it."""
    return next(r.seq for r in iter_fasta(path) if r.id == rid)


# ---------------------------------------------------------------- the index files
@pytest.mark.parametrize("width", [1, 7, 60])
@pytest.mark.parametrize("eol", [b"\n", b"\r\n"])
def test_built_fai_matches_the_layout_and_regions_match_the_reader(tmp_path, width, eol):
    records = random_records(width * 10 + len(eol))
    data, fai = fasta_text(records, width, eol)
    fa = tmp_path / "x.fa"
    fa.write_bytes(data)
    written = faidx.build_index(fa)
    assert written == [tmp_path / "x.fa.fai"]
    assert (tmp_path / "x.fa.fai").read_text() == "\n".join(fai) + "\n"
    rng = np.random.default_rng(width)
    for rid, desc, seq in records:
        assert faidx.region_record(fa, Region(rid, 0, TO_END)).seq == whole(fa, rid) == seq
        for _ in range(20):
            s = int(rng.integers(0, len(seq)))
            e = int(rng.integers(s + 1, len(seq) + 1))
            rec = faidx.region_record(fa, Region(rid, s, e))
            assert rec.id == rid and rec.description == desc
            assert rec.seq == whole(fa, rid)[s:e]


def test_fai_of_seqstate_matches_pyfaidx(tmp_path):
    pyfaidx = pytest.importorskip("pyfaidx")
    data, _ = fasta_text(random_records(5, n=5) + [("short", "", b"ACG")], 13)
    ours, theirs = tmp_path / "a.fa", tmp_path / "b.fa"
    ours.write_bytes(data)
    theirs.write_bytes(data)
    faidx.build_index(ours)
    pyfaidx.Faidx(str(theirs)).close()  # reference library: pyfaidx writes b.fa.fai
    assert (tmp_path / "a.fa.fai").read_text() == (tmp_path / "b.fa.fai").read_text()


@pytest.mark.parametrize("seed", range(25))
def test_bgzip_regions_match_the_reader_at_any_block_cut(tmp_path, seed):
    draw = np.random.default_rng(1000 + seed)
    width = int(draw.integers(1, 31))
    cuts = [int(c) for c in draw.integers(0, 3000, size=int(draw.integers(0, 13)))]
    folder = tmp_path
    records = random_records(seed, n=3, most=900)
    data, fai = fasta_text(records, width)
    fa = folder / "x.fa.gz"
    write_bgzip(fa, data, cuts)
    assert faidx.compression_of(fa) == "bgzip"
    faidx.build_index(fa)
    assert (folder / "x.fa.gz.fai").read_text() == "\n".join(fai) + "\n"
    # each .gzi pair: inflating from the compressed offset gives the text from the
    # uncompressed offset (zlib, raw deflate after the 18-byte BGZF header)
    raw = fa.read_bytes()
    pairs = faidx.parse_gzi((folder / "x.fa.gz.gzi").read_bytes(), "x.gzi")
    for coff, uoff in pairs:
        piece = zlib.decompressobj(-15).decompress(raw[coff + 18 :])
        assert piece and data[uoff : uoff + len(piece)] == piece
    rng = np.random.default_rng(seed)
    for rid, _desc, seq in records:
        s = int(rng.integers(0, len(seq)))
        e = int(rng.integers(s + 1, len(seq) + 1))
        assert faidx.region_record(fa, Region(rid, s, e)).seq == seq[s:e]


def test_gzi_round_trip_and_byte_layout():
    pairs = [(100, 65280), (200, 130560), (2**40, 2**41)]
    data = faidx.format_gzi(pairs)
    # little-endian uint64 count, then pairs (samtools documentation, from memory)
    assert data[:8] == struct.pack("<Q", 3) and len(data) == 8 + 3 * 16
    assert data[8:24] == struct.pack("<QQ", 100, 65280)
    assert faidx.parse_gzi(data, "x.gzi") == pairs


@pytest.mark.parametrize(
    "data,words",
    [
        (b"\x01\x00", "expected at least 8"),
        (struct.pack("<Q", 2) + b"\x00" * 16, "expected 40"),
        (faidx.format_gzi([(500, 100), (400, 200)]), "expected increasing offsets"),
    ],
)
def test_bad_gzi(data, words):
    with pytest.raises(SequenceFormatError) as err:
        faidx.parse_gzi(data, "x.gzi")
    assert words in str(err.value) and "x.gzi" in str(err.value)


@pytest.mark.parametrize(
    "text,line,words",
    [
        ("a\t10\t3\t10\t11\nb\t10\n", 2, "2 tab-separated field(s); expected 5"),
        ("a\t10\t3\t10\t11\nb\tten\t20\t10\t11\n", 2, "length 'ten' is not a whole number"),
        ("a\t10\t3\t-4\t11\n", 1, "line bases '-4' is not a whole number"),
        ("a\t10\t3\t10\t11\n\nb\t1\t20\t1\t2\n", 2, "empty line"),
        ("a\t10\t3\t10\t11\na\t1\t20\t1\t2\n", 2, "listed twice (first on line 1)"),
        ("a\t100\t3\t10\t10\n", 1, "do not fit a record of length 100"),
    ],
)
def test_bad_fai_line_names_file_and_line(text, line, words):
    with pytest.raises(SequenceFormatError) as err:
        faidx.parse_fai(text, "x.fa.fai")
    assert str(err.value).startswith(f"x.fa.fai line {line}")
    assert words in str(err.value)


def test_fai_round_trip():
    entries = [faidx.FaiEntry("chr1", 1000, 6, 60, 61), faidx.FaiEntry("c:2", 5, 1030, 5, 7)]
    assert faidx.parse_fai(faidx.format_fai(entries), "x") == entries


# ---------------------------------------------------------------- checks as the reader's
@pytest.mark.parametrize(
    "text",
    [
        b">a\nACGTX\n",
        b">a\nACGT\n>a\nAC\n",
        b"ACGT\n>a\nACGT\n",
        b">a\n>b\nACGT\n",
        b">a\rACGT\r",
        b"",
        b"\n\n",
        b">\nACGT\n",
        b">a\nAC\xffGT\n",
    ],
)
def test_index_checks_the_fasta_with_the_readers_words(tmp_path, text):
    fa = tmp_path / "bad.fa"
    fa.write_bytes(text)
    with pytest.raises(SequenceFormatError) as reader:
        list(iter_fasta(fa))
    with pytest.raises(SequenceFormatError) as ours:
        faidx.build_index(fa)
    assert str(ours.value) == str(reader.value)
    assert not (tmp_path / "bad.fa.fai").exists()


def test_bad_character_split_across_read_chunks(tmp_path, monkeypatch):
    monkeypatch.setattr(faidx_build, "_CHUNK", 64)
    seq = b"ACGT" * 100
    text = b">a\n" + b"\n".join(seq[i : i + 50] for i in range(0, 400, 50)) + b"\n>b\nAAXA\n"
    fa = tmp_path / "x.fa"
    fa.write_bytes(text)
    with pytest.raises(SequenceFormatError) as reader:
        list(iter_fasta(fa))
    with pytest.raises(SequenceFormatError) as ours:
        faidx.build_index(fa)
    assert str(ours.value) == str(reader.value)


def test_small_read_chunks_give_the_same_index(tmp_path, monkeypatch):
    data, fai = fasta_text(random_records(9, n=6), 11, b"\r\n")
    fa = tmp_path / "x.fa"
    fa.write_bytes(data)
    monkeypatch.setattr(faidx_build, "_CHUNK", 5)
    faidx.build_index(fa)
    assert (tmp_path / "x.fa.fai").read_text() == "\n".join(fai) + "\n"


@pytest.mark.parametrize(
    "text,words",
    [
        (b">a\nACGT\nAC\nACGT\n", "lines of unequal length"),
        (b">a\nACGT\nACGTA\n", "lines of unequal length"),
        (b">a\nAC GT\nACGT\n", "spaces or tabs"),
        (b">a\nACGT\n\nACGT\n", "lines of unequal length"),
        (b">a\n\nACGT\n", "blank line before its bases"),
    ],
)
def test_layout_a_fai_cannot_describe(tmp_path, text, words, capsys):
    fa = tmp_path / "x.fa"
    fa.write_bytes(text)
    list(iter_fasta(fa))  # a valid FASTA for the reader
    with pytest.raises(SequenceFormatError) as err:
        faidx.build_index(fa)
    assert "cannot be indexed" in str(err.value) and words in str(err.value)
    # on first use: no index, one note, and the caller streams
    assert faidx.region_record(fa, Region("a", 0, 2)) is None
    assert faidx.region_record(fa, Region("a", 0, 2)) is None
    notes = capsys.readouterr().err.splitlines()
    assert len(notes) == 1 and notes[0].startswith("note: ") and "reading it whole" in notes[0]
    assert not (tmp_path / "x.fa.fai").exists()


def test_trailing_blank_lines_and_no_final_line_end(tmp_path):
    fa = tmp_path / "x.fa"
    fa.write_bytes(b">a\nACGTA\nCG\n\n\n>b desc\nTTTT\nTT")
    faidx.build_index(fa)
    assert (tmp_path / "x.fa.fai").read_text() == "a\t7\t3\t5\t6\nb\t6\t22\t4\t5\n"
    assert faidx.region_record(fa, Region("a", 3, 7)).seq == b"TACG"
    assert faidx.region_record(fa, Region("b", 0, TO_END)).seq == b"TTTTTT"


def test_byte_order_mark_is_skipped(tmp_path):
    fa = tmp_path / "x.fa"
    fa.write_bytes(b"\xef\xbb\xbf>a one\nACG\nT\n")
    faidx.build_index(fa)
    assert (tmp_path / "x.fa.fai").read_text() == "a\t4\t10\t3\t4\n"
    rec = faidx.region_record(fa, Region("a", 0, TO_END))
    assert rec.seq == b"ACGT" and rec.description == "one"


# ---------------------------------------------------------------- using the index
def test_unknown_record_and_region_past_the_end_use_check_region_words(tmp_path):
    fa = tmp_path / "x.fa"
    fa.write_bytes(b">a\nACGTACGT\n>b\nGG\n")
    with pytest.raises(UsageError) as err:
        faidx.region_record(fa, Region("zz", 0, 3))
    assert str(err.value) == "region zz:1-3: no record 'zz' (known records: a, b)"
    with pytest.raises(UsageError) as err:
        faidx.region_record(fa, Region("a", 5, 9))
    assert str(err.value) == "region a:6-9 lies outside record a (length 8)"


def test_bad_character_inside_the_region(tmp_path):
    fa = tmp_path / "x.fa"
    fa.write_bytes(b">a\nACGT\nACGT\n")
    faidx.build_index(fa)
    # the bytes change after indexing (same length, mtime kept): only the region is read
    st = os.stat(fa)
    fa.write_bytes(b">a\nACGT\nAC*T\n")
    os.utime(fa, ns=(st.st_atime_ns, st.st_mtime_ns))
    assert faidx.region_record(fa, Region("a", 0, 4)).seq == b"ACGT"
    with pytest.raises(SequenceFormatError) as err:
        faidx.region_record(fa, Region("a", 4, 8))
    assert str(err.value) == (
        f"{fa}, record 'a': character '*' at position 7 is not a nucleotide or IUPAC ambiguity "
        "code (expected one of ACGTURYSWKMBDHVN- in either case)"
    )
    assert faidx.region_record(fa, Region("a", 4, 8), alphabet_check=None).seq == b"AC*T"


def test_index_older_than_fasta(tmp_path):
    fa = tmp_path / "x.fa"
    fa.write_bytes(b">a\nACGT\n")
    faidx.build_index(fa)
    fai = tmp_path / "x.fa.fai"
    st = os.stat(fai)
    os.utime(fa, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    with pytest.raises(SequenceFormatError) as err:
        faidx.region_record(fa, Region("a", 0, 2))
    assert str(err.value).startswith(f"{fai}: index is older than {fa}")
    assert str(err.value).endswith(f"rebuild it with: seqstate index --force {fa}")


@pytest.mark.parametrize(
    "fai_text,words",
    [
        ("b\t4\t3\t4\t5\n", "is '>a', not its header"),  # a .fai of another file
        ("a\t5\t3\t4\t5\nb\t2\t11\t2\t3\n", "last base (length 5) is not where the index"),
        ("a\t4\t2\t4\t5\n", "offset 2 is not the start of a line"),
        ("a\t4\t3\t4\t5\nb\t4\t300\t4\t5\n", "past the end of the file"),
    ],
)
def test_fai_that_does_not_match_its_fasta(tmp_path, fai_text, words):
    fa = tmp_path / "x.fa"
    fa.write_bytes(b">a\nACGT\n>b\nAC\n" if "b\t2" in fai_text else b">a\nACGT\n")
    (tmp_path / "x.fa.fai").write_text(fai_text)
    with pytest.raises(SequenceFormatError) as err:
        faidx.record_lengths(fa)
    text = str(err.value)
    assert text.startswith(f"{tmp_path / 'x.fa.fai'}: index does not match {fa}")
    assert words in text and text.endswith(f"seqstate index --force {fa}")
    assert "\n" not in text


def test_region_lines_moved_after_indexing(tmp_path):
    fa = tmp_path / "x.fa"
    fa.write_bytes(b">a\nACGTACGT\nACGTACGT\nACGTACGT\nAC\n")
    faidx.build_index(fa)
    st = os.stat(fa)
    fa.write_bytes(b">a\nACGTACGT\nACGTACGTA\nCGTACGT\nAC\n")  # same size, a line feed moved
    os.utime(fa, ns=(st.st_atime_ns, st.st_mtime_ns))
    with pytest.raises(SequenceFormatError) as err:
        faidx.region_record(fa, Region("a", 6, 20))
    assert "are not where the index puts them" in str(err.value)


def test_bad_fai_line_through_region_record(tmp_path):
    fa = tmp_path / "x.fa"
    fa.write_bytes(b">a\nACGT\n")
    (tmp_path / "x.fa.fai").write_text("a\t4\t3\n")
    with pytest.raises(SequenceFormatError) as err:
        faidx.region_record(fa, Region("a", 0, 2))
    assert str(err.value).startswith(f"{tmp_path / 'x.fa.fai'} line 1: 3 tab-separated")
    assert str(err.value).endswith(f"seqstate index --force {fa}")


def test_plain_gzip_streams_with_one_note(tmp_path, capsys):
    fa = tmp_path / "x.fa.gz"
    fa.write_bytes(gzip.compress(b">a\nACGT\n"))
    assert faidx.compression_of(fa) == "gzip"
    assert faidx.region_record(fa, Region("a", 0, 2)) is None
    assert faidx.record_lengths(fa) is None
    err = capsys.readouterr().err.splitlines()
    assert err == [
        f"note: {fa} is plain gzip, read from the start (bgzip gives random access to regions)"
    ]
    with pytest.raises(SequenceFormatError) as built:
        faidx.build_index(fa)
    assert "not bgzip" in str(built.value) and "bgzip" in str(built.value)


def test_bgzip_without_gzi_builds_it_on_first_use(tmp_path, capsys):
    data, _ = fasta_text(random_records(3), 10)
    fa = tmp_path / "x.fa.gz"
    write_bgzip(fa, data, [100, 200])
    faidx.build_index(fa)
    (tmp_path / "x.fa.gz.gzi").unlink()
    fai_before = (tmp_path / "x.fa.gz.fai").read_bytes()
    faidx.clear_memory()
    assert faidx.region_record(fa, Region("rec1", 0, 3)).seq == whole(fa, "rec1")[:3]
    assert (tmp_path / "x.fa.gz.gzi").exists()
    assert (tmp_path / "x.fa.gz.fai").read_bytes() == fai_before
    assert capsys.readouterr().err == f"note: indexed {fa}: wrote {tmp_path / 'x.fa.gz.gzi'}\n"


def test_unwritable_folder_keeps_the_index_in_memory(tmp_path, monkeypatch, capsys):
    fa = tmp_path / "x.fa"
    fa.write_bytes(b">a\nACGTAC\nGT\n")
    monkeypatch.setattr(faidx, "_writable", lambda folder: False)
    assert faidx.record_lengths(fa) == {"a": 8}
    assert faidx.region_record(fa, Region("a", 5, 8)).seq == b"CGT"
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and err[0].startswith(f"note: cannot write an index next to {fa}")
    assert not (tmp_path / "x.fa.fai").exists()


def test_small_file_without_index_is_streamed(tmp_path, monkeypatch):
    monkeypatch.setattr(faidx, "AUTO_INDEX_BYTES", 1000)
    fa = tmp_path / "x.fa"
    fa.write_bytes(b">a\nACGT\n")
    assert faidx.region_record(fa, Region("a", 0, 2)) is None
    assert not (tmp_path / "x.fa.fai").exists()
    faidx.build_index(fa)  # an index that exists is used whatever the size
    assert faidx.region_record(fa, Region("a", 0, 2)).seq == b"AC"


def test_stdin_and_missing_files_are_left_to_the_reader(tmp_path):
    assert faidx.region_record("-", Region("a", 0, 2)) is None
    assert faidx.record_lengths(tmp_path / "none.fa") is None
    with pytest.raises(UsageError):
        faidx.build_index("-")


def test_build_refuses_to_replace_an_index_without_force(tmp_path):
    fa = tmp_path / "x.fa"
    fa.write_bytes(b">a\nACGT\n")
    (tmp_path / "x.fa.fai").write_text("old\n")
    with pytest.raises(UsageError) as err:
        faidx.build_index(fa)
    assert "already exists: use --force" in str(err.value)
    assert (tmp_path / "x.fa.fai").read_text() == "old\n"
    faidx.build_index(fa, force=True)
    assert (tmp_path / "x.fa.fai").read_text() == "a\t4\t3\t4\t5\n"
    assert fa.read_bytes() == b">a\nACGT\n"


def test_empty_records_are_listed_with_length_zero_on_first_use(tmp_path):
    fa = tmp_path / "x.fa"
    fa.write_bytes(b">e\n>a\nACGT\n")
    with pytest.raises(SequenceFormatError):
        faidx.build_index(fa)  # as the reader with empty_records="error"
    assert faidx.record_lengths(fa) == {"a": 4}
    assert (tmp_path / "x.fa.fai").read_text() == "e\t0\t3\t0\t0\na\t4\t6\t4\t5\n"


def test_bgzip_with_gzi_and_no_fai_writes_only_the_fai(tmp_path, capsys):
    data, fai = fasta_text(random_records(4), 9)
    fa = tmp_path / "x.fa.gz"
    write_bgzip(fa, data, [50, 700])
    faidx.build_index(fa)
    (tmp_path / "x.fa.gz.fai").unlink()
    gzi = tmp_path / "x.fa.gz.gzi"
    before = gzi.read_bytes(), os.stat(gzi).st_mtime_ns
    faidx.clear_memory()
    assert faidx.record_lengths(fa) == {rid: len(seq) for rid, _, seq in random_records(4)}
    assert (tmp_path / "x.fa.gz.fai").read_text() == "\n".join(fai) + "\n"
    assert (gzi.read_bytes(), os.stat(gzi).st_mtime_ns) == before
    assert capsys.readouterr().err == f"note: indexed {fa}: wrote {tmp_path / 'x.fa.gz.fai'}\n"


def test_gzi_of_another_bgzip_file(tmp_path):
    data, _ = fasta_text(random_records(6, n=4, most=3000), 50)
    one, two = tmp_path / "one.fa.gz", tmp_path / "two.fa.gz"
    write_bgzip(one, data, [1000, 2000, 3000, 4000])
    write_bgzip(two, data, [1500, 2500, 3500])
    faidx.build_index(one)
    faidx.build_index(two)
    (tmp_path / "two.fa.gz.gzi").write_bytes((tmp_path / "one.fa.gz.gzi").read_bytes())
    with pytest.raises(SequenceFormatError) as err:
        for rid, _desc, seq in random_records(6, n=4, most=3000):
            assert faidx.region_record(two, Region(rid, 0, TO_END)).seq == seq
    assert "index does not match" in str(err.value)
    assert str(err.value).endswith(f"seqstate index --force {two}")


def test_record_source_reads_ranges_as_the_reader(tmp_path):
    records = random_records(12, n=3, most=2000)
    data, _ = fasta_text(records, 17)
    fa = tmp_path / "x.fa"
    fa.write_bytes(data)
    rng = np.random.default_rng(12)
    for rid, desc, seq in records:
        source = faidx.record_source(fa, rid)
        assert (source.id, source.description, source.length) == (rid, desc, len(seq))
        for _ in range(30):
            s = int(rng.integers(0, len(seq)))
            e = int(rng.integers(s + 1, len(seq) + 1))
            assert source.read(s, e) == whole(fa, rid)[s:e]
        with pytest.raises(ValueError):
            source.read(0, len(seq) + 1)
        source.close()
    with pytest.raises(UsageError) as err:
        faidx.record_source(fa, "nope")
    assert "no record 'nope' (known records: rec1, rec2, rec3)" in str(err.value)
