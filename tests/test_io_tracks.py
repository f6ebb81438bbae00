"""Posterior tracks as bedGraph and bigWig (seqstate.io.tracks)."""

from __future__ import annotations

import io
import sys
from pathlib import Path

import numpy as np
import pyBigWig
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seqstate.errors import OptionalDependencyError
from seqstate.io import tracks, tracks_text
from seqstate.io.tracks import (
    BedGraphTrack,
    BigWigTrack,
    format_scaled,
    require_bigwig,
    runs_of_rounded,
    write_bedgraph,
    write_bigwig,
)


def expected_text(value: float, precision: int) -> str:
    """Oracle: Python's 'f' formatting, without '-0' (correctly rounded, ties to even: the
    Python documentation, string module, Format Specification Mini-Language, gh-99880)."""
    text = f"{float(value):.{precision}f}"
    if text.startswith("-") and float(text) == 0.0:
        text = text[1:]
    return text


def parse_bedgraph(text: str) -> tuple[str, list[tuple[str, int, int, str]]]:
    lines = text.splitlines()
    rows = []
    for line in lines[1:]:
        seqid, start, end, value = line.split("\t")
        rows.append((seqid, int(start), int(end), value))
    return lines[0], rows


def expand(rows: list[tuple[str, int, int, str]], seqid: str) -> list[str]:
    out: list[str] = []
    for name, start, end, value in rows:
        if name == seqid:
            assert start == len(out)  # contiguous, in position order
            out.extend([value] * (end - start))
    return out


# Values with ties, tiny negatives and exact bounds, repeated in runs.
_special = st.sampled_from([0.0, 1.0, 0.5, 0.00005, 0.00015, 0.99995, 0.12345, 1e-9, -1e-9, -0.0])
_value = st.one_of(_special, st.floats(min_value=0.0, max_value=1.0))
_runs = st.lists(st.tuples(_value, st.integers(1, 5)), min_size=1, max_size=40)


def build(runs: list[tuple[float, int]], dtype: type) -> np.ndarray:
    return np.repeat(np.array([v for v, _ in runs], dtype=dtype), [n for _, n in runs])


@settings(max_examples=150, deadline=None)
@given(
    _runs,
    _runs,
    st.sampled_from([np.float32, np.float64]),
    st.integers(min_value=0, max_value=6),
)
def test_bedgraph_matches_rounded_input_at_every_base(
    runs_a: list[tuple[float, int]],
    runs_b: list[tuple[float, int]],
    dtype: type,
    precision: int,
) -> None:
    a, b = build(runs_a, dtype), build(runs_b, dtype)
    buffer = io.StringIO()
    write_bedgraph(buffer, "posterior", "test", [("rec2", a), ("rec1", b)], precision)
    track, rows = parse_bedgraph(buffer.getvalue())
    assert track.startswith("track type=bedGraph ")
    # Records in input order.
    seqids = [r[0] for r in rows]
    assert seqids == sorted(seqids, key=["rec2", "rec1"].index)
    for seqid, values in (("rec2", a), ("rec1", b)):
        assert expand(rows, seqid) == [expected_text(v, precision) for v in values]
        mine = [r for r in rows if r[0] == seqid]
        # Maximal runs: neighbouring lines of a record never share a value.
        assert all(x[3] != y[3] for x, y in zip(mine, mine[1:], strict=False))
        assert all(r[1] < r[2] for r in mine)
        assert not any(r[3].startswith("-") for r in mine)


def test_track_line_and_exact_lines() -> None:
    buffer = io.StringIO()
    values = np.array([0.1, 0.10004, 0.2, -1e-7, 1.0], dtype=np.float64)
    write_bedgraph(buffer, 'CpG "island"', "posterior\tof\nstate", [("chr1", values)])
    # bedGraph: track line with type=bedGraph, then chrom, 0-based start, end,
    # value (UCSC Genome Browser help, "BedGraph Track Format",
    # genome.ucsc.edu/goldenPath/help/bedgraph.html: a track line, then four-column BED).
    assert buffer.getvalue() == (
        'track type=bedGraph name="CpG \'island\'" description="posterior of state"\n'
        "chr1\t0\t2\t0.1000\n"
        "chr1\t2\t3\t0.2000\n"
        "chr1\t3\t4\t0.0000\n"
        "chr1\t4\t5\t1.0000\n"
    )


def test_bedgraph_track_with_offset() -> None:
    buffer = io.StringIO()
    track = BedGraphTrack(buffer, "t", "d", precision=1)
    track.add("chr1", np.array([0.0, 0.0, 0.9]), offset0=100)
    track.add("chr2", np.array([0.5]))
    track.close()  # the last run of a record is held until the record ends
    assert buffer.getvalue().splitlines() == [
        'track type=bedGraph name="t" description="d"',
        "chr1\t100\t102\t0.0",
        "chr1\t102\t103\t0.9",
        "chr2\t0\t1\t0.5",
    ]


def test_values_near_a_tie_follow_the_exact_binary_value() -> None:
    buffer = io.StringIO()
    values = np.array([0.05, 0.15, 0.25, 0.35, 0.45], dtype=np.float64)
    write_bedgraph(buffer, "t", "d", [("c", values)], precision=1)
    # The doubles nearest 0.15 and 0.35 lie just below the tie, 0.05 and 0.45
    # just above, 0.25 is exact and rounds half to even (IEEE 754 binary64 and
    # Python's correctly rounded 'f' format, Python documentation gh-99880; the doubles'
    # exact values checked with decimal.Decimal, which converts a float exactly).
    assert [line.split("\t")[3] for line in buffer.getvalue().splitlines()[1:]] == [
        "0.1",
        "0.2",
        "0.3",
        "0.5",
    ]
    assert [line.split("\t")[1:3] for line in buffer.getvalue().splitlines()[1:]] == [
        ["0", "2"],
        ["2", "3"],
        ["3", "4"],
        ["4", "5"],
    ]


def test_record_of_length_one() -> None:
    buffer = io.StringIO()
    write_bedgraph(buffer, "t", "d", [("a", np.array([0.75], dtype=np.float32))], precision=2)
    assert buffer.getvalue().splitlines()[1:] == ["a\t0\t1\t0.75"]


def test_runs_across_internal_blocks(monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng(7)
    values = rng.choice([0.0, 0.25, 1.0], size=1000, p=[0.45, 0.1, 0.45])
    values = np.repeat(values, rng.integers(1, 9, size=values.shape[0]))
    whole = runs_of_rounded(values, 3)
    monkeypatch.setattr(tracks, "_BLOCK", 7)
    blocked = runs_of_rounded(values, 3)
    for left, right in zip(whole, blocked, strict=True):
        np.testing.assert_array_equal(left, right)
    starts, ends, scaled = blocked
    assert starts[0] == 0 and ends[-1] == values.shape[0]
    np.testing.assert_array_equal(starts[1:], ends[:-1])
    assert np.all(scaled[1:] != scaled[:-1])
    np.testing.assert_array_equal(np.repeat(scaled, ends - starts), np.rint(values * 1000))


def test_format_scaled() -> None:
    assert format_scaled(0, 4) == "0.0000"
    assert format_scaled(10000, 4) == "1.0000"
    assert format_scaled(5, 4) == "0.0005"
    assert format_scaled(-123, 2) == "-1.23"
    assert format_scaled(7, 0) == "7"


@pytest.mark.parametrize("bad", [np.nan, np.inf])
def test_non_finite_values_are_rejected(bad: float) -> None:
    with pytest.raises(ValueError, match="position 1 is .*not a finite number"):
        runs_of_rounded(np.array([0.5, bad]), 4)


@pytest.mark.parametrize("precision", [-1, 10, 2.5])
def test_bad_precision_is_rejected(precision: float) -> None:
    with pytest.raises(ValueError, match="precision"):
        runs_of_rounded(np.array([0.5]), precision)  # type: ignore[arg-type]


def test_two_dimensional_values_are_rejected() -> None:
    with pytest.raises(ValueError, match="1-D"):
        runs_of_rounded(np.zeros((2, 2)), 4)


# ---------------------------------------------------------------- bigWig


def test_bigwig_round_trip(tmp_path: Path) -> None:
    rng = np.random.default_rng(3)
    precision = 3
    a = np.repeat(rng.random(200), rng.integers(1, 6, size=200)).astype(np.float32)
    b = np.array([0.123456], dtype=np.float64)
    sizes = [("chrA", a.shape[0]), ("chrB", 1)]
    path = tmp_path / "t.bw"
    write_bigwig(path, [("chrA", a), ("chrB", b)], sizes, precision=precision)
    # Reference library: pyBigWig 0.3 (values() per base, intervals() as
    # 0-based half-open (start, end, value) tuples, values stored as float32).
    bw = pyBigWig.open(str(path))
    try:
        assert bw.chroms() == dict(sizes)
        tolerance = 10.0**-precision / 2 + np.finfo(np.float32).eps
        for seqid, values in (("chrA", a), ("chrB", b)):
            back = np.array(bw.values(seqid, 0, values.shape[0]))
            assert np.all(np.abs(back - values.astype(np.float64)) <= tolerance)
            starts, ends, scaled = runs_of_rounded(values, precision)
            intervals = bw.intervals(seqid)
            assert [(s, e) for s, e, _ in intervals] == list(
                zip(starts.tolist(), ends.tolist(), strict=True)
            )
            stored = np.array([v for _, _, v in intervals])
            np.testing.assert_allclose(stored, scaled / 10.0**precision, rtol=0, atol=1e-7)
    finally:
        bw.close()


def test_bigwig_rejects_out_of_order_and_wrong_length(tmp_path: Path) -> None:
    sizes = [("a", 3), ("b", 2)]
    with pytest.raises(ValueError, match="order"):
        write_bigwig(tmp_path / "x.bw", [("b", np.zeros(2)), ("a", np.zeros(3))], sizes)
    with pytest.raises(ValueError, match="length of 3"):
        write_bigwig(tmp_path / "y.bw", [("a", np.zeros(4))], sizes)
    with pytest.raises(ValueError, match="not in chrom_sizes"):
        write_bigwig(tmp_path / "z.bw", [("c", np.zeros(4))], sizes)


def test_bigwig_track_with_offset(tmp_path: Path) -> None:
    path = tmp_path / "region.bw"
    with BigWigTrack(path, [("chr1", 50), ("chr2", 5)], precision=2) as track:
        track.add("chr1", np.array([0.25, 0.25, 1.0], dtype=np.float32), offset0=10)
        with pytest.raises(ValueError, match="do not fit"):
            track.add("chr2", np.zeros(3), offset0=3)
    # Reference library: pyBigWig 0.3, intervals() as 0-based half-open tuples.
    bw = pyBigWig.open(str(path))
    try:
        assert bw.intervals("chr1") == ((10, 12, 0.25), (12, 13, 1.0))
    finally:
        bw.close()


def test_bigwig_without_pybigwig(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "pyBigWig", None)  # makes the import fail
    with pytest.raises(OptionalDependencyError) as info:
        write_bigwig(tmp_path / "x.bw", [("a", np.zeros(3))], [("a", 3)])
    assert str(info.value) == (
        "bigWig output needs the optional extra: pip install 'seqstate[bigwig]'"
    )
    assert not (tmp_path / "x.bw").exists()
    with pytest.raises(OptionalDependencyError):
        require_bigwig()
    with pytest.raises(OptionalDependencyError):
        BigWigTrack(tmp_path / "y.bw", [("a", 3)])


def test_require_bigwig_passes_when_installed() -> None:
    assert require_bigwig() is None


def test_record_ids_with_control_characters_are_escaped_on_bedgraph_lines() -> None:
    from seqstate.io.tracks import escape_text

    handle = io.StringIO()
    track = BedGraphTrack(handle, "t", "d", 1)
    track.add("a\tb\nc\x01%", np.array([0.5, 0.5], dtype=np.float32))
    track.end_record("a\tb\nc\x01%")
    lines = handle.getvalue().splitlines()
    # GFF3 1.26 percent-encoding (uppercase %XX) of the control characters; '%' itself stays
    assert lines[1:] == ["a%09b%0Ac%01%\t0\t2\t0.5"]
    assert escape_text("chr1") == "chr1" and escape_text("u;v=w&x,y%") == "u;v=w&x,y%"


# ---------------------------------------------------------------- records in pieces
# Oracle: the same writer given each record's values in one add() call (the
# whole-record writer of seqstate); pieces must give the same bytes.


def cut_points(n: int, data: st.DataObject) -> list[int]:
    cuts = data.draw(st.lists(st.integers(min_value=0, max_value=n), max_size=6))
    return [0, *sorted(cuts), n]


def records_strategy():
    return st.lists(_runs, min_size=1, max_size=3)


def bedgraph_of(pieces: list[tuple[str, np.ndarray, int, bool]], precision: int) -> str:
    """Text of a track fed (seqid, values, offset0, ends_record) pieces in order."""
    buffer = io.StringIO()
    track = BedGraphTrack(buffer, "t", "d", precision)
    for seqid, values, offset0, ends in pieces:
        track.add(seqid, values, offset0)
        if ends:
            track.end_record(seqid)
    track.close()
    return buffer.getvalue()


@settings(max_examples=100, deadline=None)
@given(
    records_strategy(),
    st.sampled_from([np.float32, np.float64]),
    st.integers(min_value=0, max_value=5),
    st.integers(min_value=0, max_value=40),
    st.booleans(),
    st.data(),
)
def test_bedgraph_pieces_give_the_bytes_of_one_call(
    records: list[list[tuple[float, int]]],
    dtype: type,
    precision: int,
    offset0: int,
    end_each: bool,
    data: st.DataObject,
) -> None:
    whole = []
    pieces = []
    for k, runs in enumerate(records):
        values = build(runs, dtype)
        seqid = f"rec{k}"
        whole.append((seqid, values, offset0, True))
        cuts = cut_points(values.shape[0], data)
        for i, (lo, hi) in enumerate(zip(cuts, cuts[1:], strict=False)):
            last = i == len(cuts) - 2
            pieces.append((seqid, values[lo:hi], offset0 + lo, last and end_each))
    assert bedgraph_of(pieces, precision) == bedgraph_of(whole, precision)


def test_bedgraph_held_run_is_written_at_end_record_and_not_before() -> None:
    buffer = io.StringIO()
    track = BedGraphTrack(buffer, "t", "d", precision=1)
    track.add("c", np.array([0.5, 0.5, 0.2]))
    assert buffer.getvalue().splitlines()[1:] == ["c\t0\t2\t0.5"]
    track.add("c", np.array([0.2, 0.9]), offset0=3)
    track.add("c", np.zeros(0), offset0=5)  # an empty piece keeps the held run
    assert buffer.getvalue().splitlines()[1:] == ["c\t0\t2\t0.5", "c\t2\t4\t0.2"]
    track.end_record("c")
    track.end_record("c")  # nothing held: no-op
    assert buffer.getvalue().splitlines()[1:] == ["c\t0\t2\t0.5", "c\t2\t4\t0.2", "c\t4\t5\t0.9"]
    track.close()
    with pytest.raises(RuntimeError, match="closed"):
        track.add("d", np.zeros(2))


def test_bedgraph_gap_or_new_record_does_not_join_runs() -> None:
    buffer = io.StringIO()
    with BedGraphTrack(buffer, "t", "d", precision=1) as track:
        track.add("c", np.array([0.5, 0.5]))
        track.add("c", np.array([0.5]), offset0=3)  # a gap at base 2
        track.add("e", np.array([0.5]), offset0=4)  # another record
    assert buffer.getvalue().splitlines()[1:] == ["c\t0\t2\t0.5", "c\t3\t4\t0.5", "e\t4\t5\t0.5"]


def bigwig_intervals(path: Path, names: list[str]) -> dict[str, object]:
    # Reference library: pyBigWig 0.3, intervals() as 0-based half-open tuples.
    bw = pyBigWig.open(str(path))
    try:
        return {name: bw.intervals(name) for name in names}
    finally:
        bw.close()


@settings(max_examples=40, deadline=None)
@given(records_strategy(), st.integers(min_value=0, max_value=4), st.booleans(), st.data())
def test_bigwig_pieces_give_the_file_of_one_call(
    records: list[list[tuple[float, int]]], precision: int, end_each: bool, data: st.DataObject
) -> None:
    import tempfile

    arrays = [build(runs, np.float32) for runs in records]
    sizes = [(f"rec{k}", int(a.shape[0]) + 3) for k, a in enumerate(arrays)]
    with tempfile.TemporaryDirectory() as folder:
        one = Path(folder) / "one.bw"
        with BigWigTrack(one, sizes, precision) as track:
            for (seqid, _), values in zip(sizes, arrays, strict=True):
                track.add(seqid, values, 2)
        cut = Path(folder) / "cut.bw"
        with BigWigTrack(cut, sizes, precision) as track:
            for (seqid, _), values in zip(sizes, arrays, strict=True):
                cuts = cut_points(values.shape[0], data)
                for lo, hi in zip(cuts, cuts[1:], strict=False):
                    track.add(seqid, values[lo:hi], 2 + lo)
                if end_each:
                    track.end_record(seqid)
        names = [seqid for seqid, _ in sizes]
        assert bigwig_intervals(cut, names) == bigwig_intervals(one, names)
        assert cut.read_bytes() == one.read_bytes()


def test_bigwig_pieces_must_not_go_back(tmp_path: Path) -> None:
    with BigWigTrack(tmp_path / "x.bw", [("a", 10), ("b", 5)], precision=1) as track:
        track.add("a", np.zeros(4))
        with pytest.raises(ValueError, match="go back before the end"):
            track.add("a", np.zeros(2), offset0=3)
        track.add("a", np.zeros(2), offset0=6)  # a gap is allowed
        track.add("b", np.ones(5))
        with pytest.raises(ValueError, match="order"):
            track.add("a", np.zeros(1), offset0=9)
    assert bigwig_intervals(tmp_path / "x.bw", ["a", "b"]) == {
        "a": ((0, 4, 0.0), (6, 8, 0.0)),
        "b": ((0, 5, 1.0),),
    }


# ---------------------------------------------------------------- compiled text and rounding
# Oracle: the plain-Python writer of seqstate kept beside the kernels
# (tracks_text.format_lines_reference, tracks.runs_of_rounded_reference: the former
# f-string and NumPy code); the kernels must give the same bytes and arrays.

_name = st.text(
    alphabet=st.characters(blacklist_categories=("Cs",), max_codepoint=0x2FF), max_size=12
).map(tracks.escape_text)
_scaled_int = st.integers(min_value=-(2**52) + 1, max_value=2**52 - 1)


@settings(max_examples=200, deadline=None)
@given(
    _name,
    st.lists(st.tuples(st.integers(0, 2**62), st.integers(0, 2**62), _scaled_int), max_size=30),
    st.integers(min_value=0, max_value=9),
)
def test_format_lines_kernel_matches_python_text(
    name: str, rows: list[tuple[int, int, int]], precision: int
) -> None:
    starts = np.array([r[0] for r in rows], dtype=np.int64)
    ends = np.array([r[1] for r in rows], dtype=np.int64)
    scaled = np.array([r[2] for r in rows], dtype=np.int64)
    raw = name.encode("utf-8")
    out = np.zeros(len(rows) * (len(raw) + tracks_text.LINE_EXTRA_BYTES) + 1, dtype=np.uint8)
    out[:] = 0xFF  # bytes the kernel does not write stay visible
    used = tracks_text.format_lines(
        np.frombuffer(raw, dtype=np.uint8), starts, ends, scaled, precision, out
    )
    expected = tracks_text.format_lines_reference(name, starts, ends, scaled, precision)
    assert out[:used].tobytes().decode("utf-8") == expected
    assert np.all(out[used:] == 0xFF)


def test_format_lines_extremes() -> None:
    # The widest line the bound LINE_EXTRA_BYTES allows for: 19-digit coordinates and the
    # largest |scaled| (2**52 - 1), negative, at every precision.
    big = np.array([2**63 - 1], dtype=np.int64)
    for precision in range(10):
        for value in (-(2**52) + 1, 2**52 - 1, -1, 0, 1, 10**precision):
            scaled = np.array([value], dtype=np.int64)
            out = np.empty(tracks_text.LINE_EXTRA_BYTES, dtype=np.uint8)
            used = tracks_text.format_lines(np.zeros(0, np.uint8), big, big, scaled, precision, out)
            assert out[:used].tobytes().decode() == tracks_text.format_lines_reference(
                "", big, big, scaled, precision
            )
    assert (
        format_scaled(-1, 4) == "-0.0001" and format_scaled(-(2**52) + 1, 0) == "-4503599627370495"
    )


@st.composite
def _near_tie(draw: st.DrawFn, precision: int, dtype: type) -> float:
    """A value at, or a few representable steps from, a decimal tie (k + 0.5) / 10**p."""
    k = draw(st.integers(min_value=-(10**5), max_value=10**5))
    value = dtype((k + 0.5) / 10.0**precision)
    for _ in range(draw(st.integers(min_value=0, max_value=3))):
        value = np.nextafter(value, dtype(draw(st.sampled_from([-np.inf, np.inf]))))
    return float(value)


@settings(max_examples=200, deadline=None)
@given(
    st.integers(min_value=0, max_value=9),
    st.sampled_from([np.float32, np.float64]),
    st.integers(min_value=1, max_value=9),
    st.data(),
)
def test_runs_kernel_matches_numpy_reference(
    precision: int, dtype: type, block: int, data: st.DataObject
) -> None:
    value = st.one_of(
        _special,
        st.floats(min_value=-1e6, max_value=1e6, width=32 if dtype is np.float32 else 64),
        _near_tie(precision, dtype),
    )
    runs = data.draw(st.lists(st.tuples(value, st.integers(1, 4)), min_size=1, max_size=40))
    values = build(runs, dtype)
    for size in (block, 1 << 18):
        tracks._BLOCK = size
        try:
            got = runs_of_rounded(values, precision)
            want = tracks.runs_of_rounded_reference(values, precision)
        finally:
            tracks._BLOCK = 1 << 18
        for left, right in zip(got, want, strict=True):
            assert left.dtype == np.int64
            np.testing.assert_array_equal(left, right)
    # Per base, the run value is Python's correctly rounded 'f' text (Python documentation,
    # Format Specification Mini-Language; gh-99880), without '-0'.
    starts, ends, scaled = got
    texts = [format_scaled(v, precision) for v in np.repeat(scaled, ends - starts).tolist()]
    assert texts == [expected_text(v, precision) for v in values.tolist()]


def test_values_at_ties_of_every_precision() -> None:
    # Every precision, values k/10**p + half a step, the doubles on either side of it, and
    # their negatives: the kernel's text is Python's correctly rounded 'f' text (Python
    # documentation, Format Specification Mini-Language; gh-99880).
    for precision in range(10):
        ties = (np.arange(-300, 300) + 0.5) / 10.0**precision
        values = np.concatenate(
            [ties, np.nextafter(ties, np.inf), np.nextafter(ties, -np.inf), [0.0, -0.0]]
        )
        buffer = io.StringIO()
        write_bedgraph(buffer, "t", "d", [("c", values)], precision)
        _, rows = parse_bedgraph(buffer.getvalue())
        assert expand(rows, "c") == [expected_text(v, precision) for v in values.tolist()]
        scaled = np.empty(values.shape[0], np.int64)
        ties = np.empty(values.shape[0], np.int64)
        status, n_ties = tracks_text.scale_block(values, 10.0**precision, scaled, ties)
        assert status == tracks_text.OK and n_ties > 0  # the exact tie rule was used


def reference_bedgraph(chunks: list[tuple[str, np.ndarray]], precision: int) -> str:
    """The bedGraph body of the plain-Python writer of seqstate (whole records)."""
    return "".join(
        tracks_text.format_lines_reference(
            tracks.escape_text(seqid),
            *tracks.runs_of_rounded_reference(values, precision),
            precision,
        )
        for seqid, values in chunks
    )


def test_many_runs_match_the_python_writer() -> None:
    # More runs than one write formats (_LINES) and more than one rounding block (_BLOCK).
    rng = np.random.default_rng(11)
    n = (1 << 18) + 150_000
    values = np.repeat(rng.normal(0.0, 2.0, size=n // 2), 2)[:n]
    values[rng.integers(0, n, size=1000)] = 0.5e-4  # ties at precision 4
    chunks = [("rec\t1", values), ("rec2", values[::3].astype(np.float32))]
    for precision in (0, 4, 9):
        buffer = io.StringIO()
        write_bedgraph(buffer, "t", "d", chunks, precision)
        body = buffer.getvalue().split("\n", 1)[1]
        assert body == reference_bedgraph(chunks, precision)
        assert body.count("\n") > tracks._LINES


@settings(max_examples=60, deadline=None)
@given(records_strategy(), st.integers(0, 9), st.integers(1, 5), st.integers(1, 200), st.data())
def test_small_writes_give_the_python_writer_bytes(
    records: list[list[tuple[float, int]]],
    precision: int,
    lines: int,
    text_bytes: int,
    data: st.DataObject,
) -> None:
    names = data.draw(st.lists(_name, min_size=len(records), max_size=len(records)))
    chunks = [(name, build(runs, np.float64)) for name, runs in zip(names, records, strict=True)]
    old = tracks._LINES, tracks._TEXT_BYTES
    tracks._LINES, tracks._TEXT_BYTES = lines, text_bytes
    try:
        buffer = io.StringIO()
        write_bedgraph(buffer, "t", "d", chunks, precision)
    finally:
        tracks._LINES, tracks._TEXT_BYTES = old
    assert buffer.getvalue().split("\n", 1)[1] == reference_bedgraph(chunks, precision)


def test_strided_and_other_dtypes_give_the_same_runs() -> None:
    rng = np.random.default_rng(2)
    table = rng.random((5000, 3)).round(2)
    column = table[:, 1]  # a strided view, as a posterior column is
    assert not column.flags.c_contiguous
    for values in (column, column.astype(np.float16), (column * 100).astype(np.int32)):
        for left, right in zip(
            runs_of_rounded(values, 3),
            tracks.runs_of_rounded_reference(np.ascontiguousarray(values), 3),
            strict=True,
        ):
            np.testing.assert_array_equal(left, right)


def test_poisoned_work_buffers_change_nothing() -> None:
    from seqstate.engine import buffers

    rng = np.random.default_rng(4)
    values = np.repeat(rng.random(3000).round(3), rng.integers(1, 5, size=3000))
    plain = io.StringIO()
    write_bedgraph(plain, "t", "d", [("c", values)], 3)
    with buffers.poisoning():
        poisoned = io.StringIO()
        write_bedgraph(poisoned, "t", "d", [("c", values)], 3)
    assert poisoned.getvalue() == plain.getvalue()


def test_values_too_large_for_the_precision_are_rejected() -> None:
    with pytest.raises(ValueError, match="too large to round at this precision"):
        runs_of_rounded(np.array([0.5, 2.0**52]), 0)
    # A finite value whose product overflows to infinity is too large, not "not finite".
    with pytest.raises(ValueError, match="too large to round at this precision"):
        runs_of_rounded(np.array([1e305]), 9)
    # Within one block a non-finite value is named first, wherever it is.
    with pytest.raises(ValueError, match="position 2 is inf, not a finite number"):
        runs_of_rounded(np.array([1e300, 0.5, np.inf]), 9)
    assert runs_of_rounded(np.array([2.0**52 - 1]), 0)[2].tolist() == [2**52 - 1]


# ---------------------------------------------------------------- runs of unknown bases
def test_spans_outside_runs_leaves_out_long_runs_only() -> None:
    flags = np.zeros(30, dtype=bool)
    flags[3:6] = True  # 3 flags: shorter than min_run 4, kept
    flags[10:14] = True  # exactly 4: left out
    flags[20:30] = True  # to the end: left out
    assert tracks.spans_outside_runs(flags, 0, 0, 30, 4) == [(0, 10), (14, 20)]
    assert tracks.spans_outside_runs(flags, 100, 105, 125, 4) == [(105, 110), (114, 120)]
    assert tracks.spans_outside_runs(flags, 0, 11, 13, 4) == []  # inside a run
    assert tracks.spans_outside_runs(flags, 0, 0, 30, 11) == [(0, 30)]  # no run that long
    assert tracks.spans_outside_runs(np.zeros(5, bool), 0, 1, 4, 1) == [(1, 4)]
    with pytest.raises(ValueError, match="do not cover"):
        tracks.spans_outside_runs(flags, 0, 0, 31, 4)


@settings(max_examples=200, deadline=None)
@given(
    st.lists(st.booleans(), min_size=1, max_size=80),
    st.integers(min_value=1, max_value=8),
    st.data(),
)
def test_track_spans_of_pieces_equal_those_of_the_whole_stretch(
    flags: list[bool], min_run: int, data: st.DataObject
) -> None:
    # the window path asks piece by piece, with min_run flags of margin: the same positions
    from seqstate.commands.annotate_run import track_spans

    sym = np.where(np.array(flags), -1, 0)
    n = len(flags)

    def read(a: int, b: int) -> np.ndarray:
        return sym[a:b]

    whole = track_spans(read, n, 0, n, min_run)
    kept = np.zeros(n, dtype=bool)
    for a, b in whole:
        kept[a:b] = True
    # oracle: a base is left out when it lies in a maximal run of >= min_run unknown bases
    want = np.ones(n, dtype=bool)
    i = 0
    while i < n:
        j = i
        while j < n and flags[j]:
            j += 1
        if j - i >= min_run:
            want[i:j] = False
        i = max(j, i + 1)
    assert kept.tolist() == want.tolist()
    cuts = cut_points(n, data)
    joined = np.zeros(n, dtype=bool)
    for lo, hi in zip(cuts, cuts[1:], strict=False):
        for a, b in track_spans(read, n, lo, hi, min_run):
            assert lo <= a < b <= hi
            joined[a:b] = True
    assert joined.tolist() == kept.tolist()


#: Unknown runs put into the synthetic record (0-based half-open, --split-unknown 10): the
#: long one and the one of exactly 10 straddle a window edge of the window path (4096-base
#: windows), the 9-base one (shorter than --split-unknown) stays in the track.
LONG_GAP = (11800, 12800)
EXACT_GAP = (16380, 16390)
SHORT_GAP = (20475, 20484)


def _record_with_gaps(tmp_path: Path, model: str) -> Path:
    from click.testing import CliRunner

    from seqstate.cli import main

    fasta = tmp_path / "gaps.fa"
    res = CliRunner().invoke(
        main,
        ["sample", model, "--length", "30000", "--records", "1", "--seed", "5", "-o", str(fasta)],
    )
    assert res.exit_code == 0, res.output
    header, *lines = fasta.read_text().splitlines()
    seq = list("".join(lines))
    for a, b in (LONG_GAP, EXACT_GAP, SHORT_GAP):
        seq[a:b] = "N" * (b - a)
    text = "".join(seq)
    fasta.write_text(
        header + "\n" + "\n".join(text[i : i + 60] for i in range(0, len(text), 60)) + "\n"
    )
    return fasta


@pytest.mark.parametrize("model", ["cpg-island", "gene-segment"])
def test_tracks_leave_out_runs_of_unknown_bases_that_cut_features(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, model: str
) -> None:
    from click.testing import CliRunner

    from seqstate.cli import main
    from seqstate.commands import annotate_run

    fasta = _record_with_gaps(tmp_path, model)
    args = ["annotate", str(fasta), "-m", model, "--tracks", "both", "--stem", "x", "-q"]
    res = CliRunner().invoke(main, [*args, "-o", str(tmp_path / "whole")])
    assert res.exit_code == 0, res.output
    bedgraphs = sorted((tmp_path / "whole").glob("*.bedgraph"))
    bigwigs = sorted((tmp_path / "whole").glob("*.bw"))
    assert bedgraphs and len(bigwigs) == len(bedgraphs)
    for path in bedgraphs:
        _, rows = parse_bedgraph(path.read_text())
        covered = np.zeros(30000, dtype=bool)
        for seqid, start, end, _ in rows:
            assert seqid == "sim1" and not covered[start:end].any()
            covered[start:end] = True
        want = np.ones(30000, dtype=bool)
        want[LONG_GAP[0] : LONG_GAP[1]] = False
        want[EXACT_GAP[0] : EXACT_GAP[1]] = False
        assert covered.tolist() == want.tolist(), path.name  # the 9-base run stays in
        # bigWig: the same bases (reference library: pyBigWig intervals, 0-based half-open)
        bw_path = path.with_suffix(".bw")
        intervals = bigwig_intervals(bw_path, ["sim1"])["sim1"]
        assert isinstance(intervals, tuple)
        in_bw = np.zeros(30000, dtype=bool)
        for start, end, _ in intervals:
            in_bw[start:end] = True
        assert in_bw.tolist() == want.tolist(), bw_path.name
    # the window path (the record long, 4096-base windows) writes the same bytes
    monkeypatch.setattr(annotate_run, "long_threshold", lambda *a: 1000)
    monkeypatch.setattr(annotate_run, "window_length", lambda *a: 4096)
    res = CliRunner().invoke(main, [*args, "-o", str(tmp_path / "windows")])
    assert res.exit_code == 0, res.output
    for path in [*bedgraphs, *bigwigs, tmp_path / "whole" / "x.gff3"]:
        assert (tmp_path / "windows" / path.name).read_bytes() == path.read_bytes(), path.name
