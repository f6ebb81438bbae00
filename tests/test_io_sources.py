"""Sequence sources read by range (seqstate.io.sources).

Every source is checked against the bases of the same record as the FASTA reader of
seqstate gives them (seqstate.io.fasta.read_fasta), sliced with Python's bytes slicing.
"""

from __future__ import annotations

import errno
import os
import threading
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seqstate.errors import SequenceFormatError, UsageError
from seqstate.io import sources
from seqstate.io.fasta import Record, read_fasta, write_fasta
from seqstate.io.sources import (
    BytesSource,
    FileSliceSource,
    SequenceSource,
    SpillSource,
    check_range,
)

SEQ = bytes(b"ACGTNacgtn"[(i * 7 + i // 13) % 10] for i in range(1000))


def spilled(seq: bytes, folder: Path, pieces: int = 7) -> SpillSource:
    source = SpillSource.create(folder, "record 'x'")
    step = max(1, len(seq) // pieces)
    for lo in range(0, len(seq), step):
        source.append(seq[lo : lo + step])
    return source.seal()


def fasta_file(folder: Path, seq: bytes, width: int, eol: bytes) -> tuple[Path, int]:
    """A two-record FASTA with equal lines; the byte offset of the second record's bases."""
    import io

    text = io.StringIO()
    write_fasta(text, [Record("first", "x", b"GATTACA" * 5), Record("rec", "d", seq)], width)
    data = text.getvalue().encode("ascii").replace(b"\n", eol)
    path = folder / ("lf.fa" if eol == b"\n" else "crlf.fa")
    path.write_bytes(data)
    header = b">rec d" + eol
    return path, data.index(header) + len(header)


def test_sources_follow_the_protocol(tmp_path: Path) -> None:
    path, offset = fasta_file(tmp_path, SEQ, 60, b"\n")
    made = [BytesSource(SEQ), spilled(SEQ, tmp_path), FileSliceSource(path, offset, 60, 61, 1000)]
    for source in made:
        assert isinstance(source, SequenceSource)
        assert source.length == 1000
        source.close()


@settings(max_examples=60, deadline=None)
@given(
    st.integers(min_value=1, max_value=1000),
    st.integers(min_value=1, max_value=70),
    st.sampled_from([b"\n", b"\r\n"]),
    st.data(),
)
def test_every_source_reads_what_the_reader_reads(
    length: int, width: int, eol: bytes, data: st.DataObject
) -> None:
    import tempfile

    seq = SEQ[:length]
    with tempfile.TemporaryDirectory() as folder_name:
        folder = Path(folder_name)
        path, offset = fasta_file(folder, seq, width, eol)
        truth = read_fasta(path)[1].seq  # the FASTA reader of seqstate
        assert truth == seq
        made = [
            BytesSource(seq),
            spilled(seq, folder),
            FileSliceSource(path, offset, width, width + len(eol), length),
        ]
        try:
            for _ in range(5):
                start0 = data.draw(st.integers(min_value=0, max_value=length))
                end0 = data.draw(st.integers(min_value=start0, max_value=length))
                for source in made:
                    assert source.read(start0, end0) == truth[start0:end0]
        finally:
            for source in made:
                source.close()


@pytest.mark.parametrize("bad", [(-1, 3), (5, 4), (0, 1001), (1001, 1002)])
def test_a_range_outside_the_record_is_refused(tmp_path: Path, bad: tuple[int, int]) -> None:
    path, offset = fasta_file(tmp_path, SEQ, 60, b"\n")
    made = [BytesSource(SEQ), spilled(SEQ, tmp_path), FileSliceSource(path, offset, 60, 61, 1000)]
    for source in made:
        with pytest.raises(ValueError, match="expected 0 <= start0 <= end0 <= length"):
            source.read(*bad)
        source.close()
    check_range(0, 1000, 1000)


def test_file_slice_reads_only_the_bytes_of_the_range(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path, offset = fasta_file(tmp_path, SEQ, 60, b"\n")
    asked: list[tuple[int, int]] = []
    real = os.pread

    def counting(fd: int, size: int, at: int) -> bytes:
        asked.append((size, at))
        return real(fd, size, at)

    monkeypatch.setattr(sources.os, "pread", counting)
    source = FileSliceSource(path, offset, 60, 61, 1000)
    # bases 59..61 (0-based) are the last of line 1, then the first two of line 2
    assert source.read(59, 62) == SEQ[59:62]
    assert asked == [(4, offset + 59)]  # three bases and the LF between them
    source.close()


def test_file_slice_of_a_file_shorter_than_its_layout(tmp_path: Path) -> None:
    path, offset = fasta_file(tmp_path, SEQ, 60, b"\n")
    source = FileSliceSource(path, offset, 60, 61, 1100)  # claims 100 bases too many
    assert source.read(0, 10) == SEQ[:10]
    with pytest.raises(SequenceFormatError) as info:
        source.read(990, 1010)
    assert info.value.path == str(path)
    assert "bases 991-1010 are not where the index says" in str(info.value)
    source.close()


def test_file_slice_of_lines_longer_than_the_layout_says(tmp_path: Path) -> None:
    path, offset = fasta_file(tmp_path, SEQ, 70, b"\n")
    source = FileSliceSource(path, offset, 60, 61, 1000)  # the file has 70 bases a line
    with pytest.raises(SequenceFormatError, match="lines of unequal length"):
        source.read(50, 80)
    source.close()


def test_file_slice_errors(tmp_path: Path) -> None:
    with pytest.raises(SequenceFormatError, match="cannot be read"):
        FileSliceSource(tmp_path / "nope.fa", 0, 60, 61, 10)
    with pytest.raises(ValueError, match="bad record layout"):
        FileSliceSource(tmp_path / "nope.fa", 0, 60, 59, 10)


def test_spill_source_rules(tmp_path: Path) -> None:
    source = SpillSource.create(tmp_path, "record 'x'")
    assert source.folder == tmp_path
    source.append(b"ACGT")
    with pytest.raises(ValueError, match="still being written"):
        source.read(0, 1)
    source.append(b"")
    source.append(b"NN")
    assert source.seal() is source
    assert source.length == 6 and source.read(2, 6) == b"GTNN"
    with pytest.raises(ValueError, match="sealed"):
        source.append(b"A")
    assert list(tmp_path.iterdir()) == []  # created without a name
    source.close()
    source.close()
    assert source.closed
    with pytest.raises(ValueError, match="closed"):
        source.read(0, 1)


def test_spill_source_is_read_by_many_threads_at_once(tmp_path: Path) -> None:
    seq = SEQ * 200  # 200 kbp
    source = spilled(seq, tmp_path, pieces=13)
    errors: list[str] = []

    def reader(k: int) -> None:
        for i in range(200):
            lo = (k * 7919 + i * 104729) % len(seq)
            hi = min(len(seq), lo + 1 + (i * 31) % 5000)
            if source.read(lo, hi) != seq[lo:hi]:
                errors.append(f"thread {k}: [{lo}, {hi})")

    threads = [threading.Thread(target=reader, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    source.close()


def test_close_waits_for_a_read_under_way(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    source = spilled(SEQ, tmp_path)
    inside = threading.Event()
    release = threading.Event()
    real = os.pread

    def slow(fd: int, size: int, at: int) -> bytes:
        inside.set()
        release.wait(5)
        return real(fd, size, at)

    monkeypatch.setattr(sources.os, "pread", slow)
    got: list[bytes] = []
    t = threading.Thread(target=lambda: got.append(source.read(0, 10)))
    t.start()
    inside.wait(5)
    closer = threading.Thread(target=source.close)
    closer.start()
    closer.join(0.2)
    assert closer.is_alive()  # waiting for the read
    release.set()
    t.join(5)
    closer.join(5)
    assert got == [SEQ[:10]] and source.closed


@pytest.mark.parametrize("code", ["ENOSPC", "EDQUOT", "EFBIG"])
def test_full_disk_while_spilling(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, code: str):
    number = getattr(errno, code)

    def full(fd: int, data: object, offset: int) -> int:
        raise OSError(number, os.strerror(number))

    source = SpillSource.create(tmp_path, "record 'chr2' of in.fa")
    source.append(b"ACGT")
    monkeypatch.setattr(sources.os, "pwrite", full)
    with pytest.raises(UsageError) as info:
        source.append(b"ACGT")
    assert str(info.value) == (
        f"the temporary copy of record 'chr2' of in.fa in spill folder '{tmp_path}' cannot be "
        f"written: {os.strerror(number)}; set TMPDIR to a folder with more free space"
    )
    assert source.closed  # its space is given back at once
    assert list(tmp_path.iterdir()) == []


def test_default_spill_folder_is_the_temporary_folder(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import tempfile

    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    source = SpillSource.create()
    assert source.folder == tmp_path
    source.close()


def test_bytes_source_close_drops_the_bases() -> None:
    source = BytesSource(b"ACGT")
    assert source.read(1, 3) == b"CG"
    source.close()
    with pytest.raises(ValueError, match="closed"):
        source.read(0, 1)
