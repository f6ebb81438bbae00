"""BED reading (seqstate.io.bed)."""

from __future__ import annotations

import gzip
import io
import sys
from pathlib import Path

import pytest

from seqstate.errors import FeatureFormatError
from seqstate.io.bed import BedInterval, read_bed

DATA = Path(__file__).parent / "data" / "io"
SAMPLE = DATA / "intervals.bed"


def test_read_sample() -> None:
    # BED is 0-based half-open, '#' lines are comments, and track/browser lines precede
    # the data in track files (BED specification v1, Niu, Denisko & Hoffman 2022,
    # samtools/hts-specs BEDv1: "0-based, half-open coordinate system", "UCSC track files").
    assert read_bed(SAMPLE) == [
        BedInterval("chr1", 0, 10, "first", "500", "+", 4),
        BedInterval("chr1", 15, 15, None, None, None, 5),
        BedInterval("chrM:part", 2, 8, "second", None, None, 6),
    ]


def test_tab_separated_name_may_contain_spaces(tmp_path: Path) -> None:
    path = tmp_path / "x.bed"
    path.write_text("c\t1\t5\tname with spaces\t0\t-\textra\tcolumns\n")
    assert read_bed(path) == [BedInterval("c", 1, 5, "name with spaces", "0", "-", 0)]


def test_gzip_and_stdin(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    packed = tmp_path / "intervals.txt"
    packed.write_bytes(gzip.compress(SAMPLE.read_bytes()))
    assert read_bed(packed) == read_bed(SAMPLE)

    class FakeStdin:
        buffer = io.BytesIO(gzip.compress(SAMPLE.read_bytes()))

    monkeypatch.setattr(sys, "stdin", FakeStdin())
    assert read_bed("-") == read_bed(SAMPLE)


def test_empty_file_gives_no_intervals(tmp_path: Path) -> None:
    path = tmp_path / "x.bed"
    path.write_text("track name=nothing\n\n")
    assert read_bed(path) == []


def bed_error(tmp_path: Path, bad_line: str) -> FeatureFormatError:
    path = tmp_path / "bad.bed"
    path.write_text(f"# header\nc\t0\t5\n{bad_line}\n")
    with pytest.raises(FeatureFormatError) as info:
        read_bed(path)
    err = info.value
    assert (err.path, err.line0) == (str(path), 2)
    assert str(err).startswith(f"{path} line 3: ")
    return err


def test_missing_file(tmp_path: Path) -> None:
    with pytest.raises(FeatureFormatError, match="file not found") as info:
        read_bed(tmp_path / "none.bed")
    assert info.value.path == str(tmp_path / "none.bed")


def test_too_few_fields(tmp_path: Path) -> None:
    err = bed_error(tmp_path, "c\t5")
    assert "found 2 fields, expected at least 3" in str(err)


def test_non_numeric_start(tmp_path: Path) -> None:
    err = bed_error(tmp_path, "c\tabc\t10")
    assert "column 2 (start) 'abc' is not a whole number" in str(err)


def test_non_numeric_end(tmp_path: Path) -> None:
    err = bed_error(tmp_path, "c 1 1.5e3")
    assert "column 3 (end) '1.5e3' is not a whole number" in str(err)


def test_negative_start(tmp_path: Path) -> None:
    err = bed_error(tmp_path, "c\t-4\t10")
    assert "column 2 (start) is -4" in str(err)


def test_start_after_end(tmp_path: Path) -> None:
    # BED requires chromStart <= chromEnd (BED specification v1, 2022, "Coordinates").
    err = bed_error(tmp_path, "c\t20\t10")
    assert "start 20 is greater than end 10" in str(err)


def test_bad_strand(tmp_path: Path) -> None:
    # BED strand is '+', '-' or '.' (BED specification v1, 2022, field 6: [-+.]).
    err = bed_error(tmp_path, "c\t1\t10\tn\t0\tforward")
    assert "column 6 (strand) 'forward' is not one of + - ." in str(err)


# ---------------------------------------------------------------- what the first bytes say
@pytest.mark.parametrize("compress", [False, True], ids=["plain", "gzip"])
def test_utf8_byte_order_mark_is_not_part_of_the_first_chrom(tmp_path: Path, compress) -> None:
    # a UTF-8 byte-order mark (The Unicode Standard, 23.8) must not end up in the seqid
    data = b"\xef\xbb\xbfchr1\t0\t10\tfirst\n"
    path = tmp_path / "bom.bed"
    path.write_bytes(gzip.compress(data) if compress else data)
    assert read_bed(path) == [BedInterval("chr1", 0, 10, "first", None, None, 0)]


def test_cr_only_line_endings_are_named(tmp_path: Path) -> None:
    path = tmp_path / "mac.bed"
    path.write_bytes(b"chr1\t0\t10\rchr1\t20\t30\r")
    with pytest.raises(FeatureFormatError) as info:
        read_bed(path)
    msg = info.value.format()
    assert msg.startswith(f"{path} line 1: ") and "CR-only line endings" in msg, msg


def test_bzip2_compressed_bed_is_named(tmp_path: Path) -> None:
    import bz2

    path = tmp_path / "x.bed.bz2"
    path.write_bytes(bz2.compress(b"chr1\t0\t10\n"))
    with pytest.raises(FeatureFormatError) as info:
        read_bed(path)
    assert info.value.format() == f"{path}: compressed with bzip2; only plain and gzip are read"
