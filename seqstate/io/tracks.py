"""Per-base tracks (posteriors) as bedGraph text or bigWig.

Both writers take, for each record in input order, ``(seqid, values)`` where
``values`` is a 1-D float array with one value per base of the whole record
(``values[i]`` is base ``i``, 0-based).  Values are rounded to ``precision``
decimals and adjacent bases whose rounded values are equal are merged into one
line or entry, written 0-based half-open (``start0``, ``end0``) as bedGraph and
bigWig both use.

Record IDs are written through :func:`escape_text`: tab, newline, carriage
return and other control characters (0x00-0x1F, 0x7F) become ``%XX`` (as GFF3
escapes them), so one base run is always one line.

Rounding is exact: a value is shown as Python's ``f"{v:.{precision}f}"`` shows
it (round half to even on the exact binary value), except that a value that
rounds to zero is never written with a minus sign.

A track may leave bases out (bedGraph and bigWig both allow gaps: a base with no
line has no value).  ``annotate`` leaves out every run of unknown bases long
enough to cut features (``--split-unknown``): :func:`spans_outside_runs` gives
the pieces of a stretch that are written.
"""

from __future__ import annotations

import errno
import os
import shutil
from collections.abc import Iterable
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from seqstate.engine.buffers import work_buffer
from seqstate.errors import OptionalDependencyError
from seqstate.io import tracks_text
from seqstate.io.tracks_text import format_scaled

__all__ = [
    "BedGraphTrack",
    "BigWigTrack",
    "escape_text",
    "format_scaled",
    "require_bigwig",
    "runs_of_rounded",
    "spans_outside_runs",
    "write_bedgraph",
    "write_bigwig",
]

_MAX_PRECISION = 9
_BLOCK = 1 << 18  # bases scaled at once, to bound memory on long records
_LINES = 1 << 16  # bedGraph lines formatted per write (fewer for long record IDs)
_TEXT_BYTES = 1 << 22  # bound of the text buffer of one write
_ENTRIES = 1 << 20  # bigWig entries per addEntries call
#: bigWig size estimate (bytes): a fixed part, then per merged run the data
#: record (12 bytes: start, end, value, uncompressed) plus room for the zoom levels
#: and index written at close, which the writer library keeps in memory and flushes
#: without checking for a full disk.
BIGWIG_FIXED_BYTES = 1 << 20
BIGWIG_BYTES_PER_RUN = 32
_CONTROL = frozenset(chr(c) for c in range(0x20)) | {"\x7f"}


def escape_text(value: str) -> str:
    """``value`` with control characters (tab, newline, CR, 0x00-0x1F, 0x7F) as ``%XX``.

    The same uppercase percent codes as GFF3 uses; other characters, '%'
    included, are kept, so ordinary IDs are written as they are.
    """
    if not any(ch in _CONTROL for ch in value):
        return value
    return "".join(f"%{ord(ch):02X}" if ch in _CONTROL else ch for ch in value)


def spans_outside_runs(
    flags: np.ndarray, flags0: int, start0: int, end0: int, min_run: int
) -> list[tuple[int, int]]:
    """The pieces of ``[start0, end0)`` outside every run of at least ``min_run`` flags.

    ``flags`` is a boolean per position, ``flags[i]`` being position ``flags0 + i``
    (0-based); a run is a maximal stretch of True flags inside what ``flags``
    covers.  ``flags`` must cover ``[start0, end0)``, and, for a run that crosses
    either end to be measured, ``min_run`` positions beyond it on each side (or up
    to the edge of the stretch the runs are counted in: a run is cut there).
    Returns 0-based half-open ``(start0, end0)`` pairs in order, none empty; the
    whole interval when no such run touches it.
    """
    if min_run < 1:
        raise ValueError(f"min_run must be at least 1, not {min_run}")
    lo, hi = start0 - flags0, end0 - flags0
    if lo < 0 or hi > flags.shape[0]:
        raise ValueError(
            f"flags of positions {flags0}..{flags0 + flags.shape[0]} do not cover {start0}..{end0}"
        )
    if end0 <= start0:
        return []
    u = np.asarray(flags, dtype=np.bool_)
    if not u[lo:hi].any():
        return [(start0, end0)]
    padded = np.zeros(u.shape[0] + 2, dtype=np.bool_)
    padded[1:-1] = u
    edges = np.flatnonzero(padded[1:] != padded[:-1])
    out: list[tuple[int, int]] = []
    at = start0
    for a, b in zip(edges[0::2].tolist(), edges[1::2].tolist()):
        if b - a < min_run:
            continue
        a, b = max(a + flags0, start0), min(b + flags0, end0)
        if a >= b:
            continue
        if a > at:
            out.append((at, a))
        at = b
    if at < end0:
        out.append((at, end0))
    return out


def _check_precision(precision: int) -> None:
    if not isinstance(precision, (int, np.integer)) or not 0 <= precision <= _MAX_PRECISION:
        raise ValueError(f"precision must be a whole number 0..{_MAX_PRECISION}, not {precision!r}")


def runs_of_rounded(
    values: np.ndarray, precision: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Maximal runs of equal rounded values: ``(starts0, ends0, scaled_ints)``.

    ``values`` is 1-D.  Run ``k`` covers bases ``starts0[k] .. ends0[k]-1``
    (0-based half-open) whose values all round to ``scaled_ints[k] /
    10**precision``.  Adjacent runs always differ.  All three arrays are int64.
    Raises ``ValueError`` for a non-finite value, a value too large to round at
    ``precision``, or a bad precision.  The values are rounded and merged
    ``_BLOCK`` bases at a time by compiled kernels that release the GIL; only the
    rare values near a tie are decided in Python (see
    :mod:`seqstate.io.tracks_text`).
    """
    _check_precision(precision)
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise ValueError(f"values must be 1-D, not of shape {arr.shape}")
    if arr.dtype not in (np.float32, np.float64):
        arr = arr.astype(np.float64)
    n = arr.shape[0]
    empty = np.zeros(0, dtype=np.int64)
    if n == 0:
        return empty, empty.copy(), empty.copy()
    size = min(n, _BLOCK)
    q = work_buffer(size, np.int64)
    ties = work_buffer(size, np.int64)
    block_starts = work_buffer(size, np.int64)
    block_values = work_buffer(size, np.int64)
    scale = 10.0**precision
    breaks: list[np.ndarray] = []
    run_values: list[np.ndarray] = []
    previous = 0
    for lo in range(0, n, _BLOCK):
        block = arr[lo : lo + _BLOCK]
        m = block.shape[0]
        status, n_ties = tracks_text.scale_block(block, scale, q, ties)
        if status == tracks_text.TOO_LARGE:
            raise ValueError("values too large to round at this precision")
        if status != tracks_text.OK:
            bad = float(block[status])
            raise ValueError(
                f"value at 0-based position {lo + status} is {bad!r}, not a finite number"
            )
        for i in ties[:n_ties].tolist():
            q[i] = tracks_text.exact_scaled(float(block[i]), precision)
        k = tracks_text.block_breaks(q, m, previous, lo > 0, lo, block_starts, block_values)
        breaks.append(block_starts[:k].copy())
        run_values.append(block_values[:k].copy())
        previous = int(q[m - 1])
    starts = np.concatenate(breaks)
    ends = np.empty_like(starts)
    ends[:-1] = starts[1:]
    ends[-1] = n
    return starts, ends, np.concatenate(run_values)


def runs_of_rounded_reference(
    values: np.ndarray, precision: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Plain-NumPy reference of :func:`runs_of_rounded` (same result, same errors)."""
    _check_precision(precision)
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise ValueError(f"values must be 1-D, not of shape {arr.shape}")
    n = arr.shape[0]
    empty = np.zeros(0, dtype=np.int64)
    if n == 0:
        return empty, empty.copy(), empty.copy()
    breaks: list[np.ndarray] = []
    run_values: list[np.ndarray] = []
    previous: int | None = None
    for lo in range(0, n, _BLOCK):
        q = tracks_text.scale_block_reference(arr[lo : lo + _BLOCK], precision, lo)
        block_starts, block_values = tracks_text.block_breaks_reference(q, previous, lo)
        breaks.append(block_starts)
        run_values.append(block_values)
        previous = int(q[-1])
    starts = np.concatenate(breaks).astype(np.int64)
    ends = np.empty_like(starts)
    ends[:-1] = starts[1:]
    ends[-1] = n
    return starts, ends, np.concatenate(run_values).astype(np.int64)


def _one_run(start0: int, end0: int, scaled: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One run as the three int64 arrays :meth:`BedGraphTrack._write` takes."""
    return (
        np.array([start0], dtype=np.int64),
        np.array([end0], dtype=np.int64),
        np.array([scaled], dtype=np.int64),
    )


def _track_text(value: str) -> str:
    """A value safe inside double quotes on a track line: no quotes, no control chars."""
    cleaned = "".join(" " if ord(ch) < 0x20 or ch == "\x7f" else ch for ch in value)
    return cleaned.replace('"', "'")


class BedGraphTrack:
    """An open bedGraph output: the track line now, then the records' values in order.

    ``handle`` is a text handle the caller owns and closes.  The track line is
    ``track type=bedGraph name="..." description="..."``; double quotes in the
    name or description become single quotes and control characters become
    spaces, so the line stays well-formed.

    A record may come in consecutive pieces: :meth:`add` calls for one seqid
    whose ``offset0`` continue where the previous piece ended write exactly the
    bytes one call with the joined values would.  To allow this, the last run of
    each :meth:`add` is held back (it may go on in the next piece) and written
    when a piece of another record, or of the same record not starting where the
    run ends, is added, or at :meth:`end_record` or :meth:`close`.  Call
    :meth:`end_record` after the last piece of each record (or :meth:`close` at
    the end): until then the last line is not in ``handle``.
    """

    def __init__(
        self, handle: TextIO, track_name: str, description: str, precision: int = 4
    ) -> None:
        _check_precision(precision)
        self._handle = handle
        self._precision = precision
        #: the held run: (escaped seqid, seqid, start0, end0, scaled value)
        self._held: tuple[str, str, int, int, int] | None = None
        self._closed = False
        handle.write(
            f'track type=bedGraph name="{_track_text(track_name)}" '
            f'description="{_track_text(description)}"\n'
        )

    def add(self, seqid: str, values: np.ndarray, offset0: int = 0) -> None:
        """Add the merged runs of ``values``, base ``i`` being ``offset0 + i`` of ``seqid``.

        Lines are ``seqid<TAB>start0<TAB>end0<TAB>value``, 0-based half-open.
        ``offset0`` places a region's values (or a piece of a record) on record
        coordinates.  The last run is held back until the record goes on or ends
        (see the class notes).
        """
        if self._closed:
            raise RuntimeError("BedGraphTrack is closed")
        if offset0 < 0:
            raise ValueError(f"offset0 must be >= 0, not {offset0}")
        starts, ends, scaled = runs_of_rounded(values, self._precision)
        if starts.shape[0] == 0:
            return
        starts += offset0
        ends += offset0
        held = self._held
        self._held = None
        if held is not None:
            if held[1] == seqid and held[3] == int(starts[0]) and held[4] == int(scaled[0]):
                starts[0] = held[2]  # the held run goes on in this piece
            else:
                self._write(held[0], *_one_run(held[2], held[3], held[4]))
        name = escape_text(seqid)
        last = starts.shape[0] - 1
        self._write(name, starts[:last], ends[:last], scaled[:last])
        self._held = (name, seqid, int(starts[last]), int(ends[last]), int(scaled[last]))

    def end_record(self, seqid: str | None = None) -> None:
        """Write the held run: the record (``seqid``, for the reader) has no more pieces.

        Does nothing when no run is held.  The held run is written whichever
        record it belongs to: records come in order, so it is complete.
        """
        held, self._held = self._held, None
        if held is not None:
            self._write(held[0], *_one_run(held[2], held[3], held[4]))

    def close(self) -> None:
        """Write the held run and refuse further values; ``handle`` stays open."""
        if not self._closed:
            self.end_record()
            self._closed = True

    def __enter__(self) -> BedGraphTrack:
        return self

    def __exit__(self, exc_type: object, *exc_info: object) -> None:
        if exc_type is None:
            self.close()

    def _write(self, name: str, starts: np.ndarray, ends: np.ndarray, scaled: np.ndarray) -> None:
        """Write runs (record coordinates) as lines, at most ``_LINES`` lines a write.

        The text is made by a compiled kernel that releases the GIL; ``name`` (the
        escaped record ID) goes in as its UTF-8 bytes and the lines come back as
        the same characters.
        """
        k = starts.shape[0]
        if k == 0:
            return
        raw = name.encode("utf-8", "surrogatepass")
        name_bytes = np.frombuffer(raw, dtype=np.uint8)
        line_bytes = len(raw) + tracks_text.LINE_EXTRA_BYTES
        per_write = max(1, min(_LINES, _TEXT_BYTES // line_bytes, k))
        out = work_buffer(per_write * line_bytes, np.uint8)
        starts = np.ascontiguousarray(starts, dtype=np.int64)
        ends = np.ascontiguousarray(ends, dtype=np.int64)
        scaled = np.ascontiguousarray(scaled, dtype=np.int64)
        write = self._handle.write
        for lo in range(0, k, per_write):
            hi = lo + per_write
            used = tracks_text.format_lines(
                name_bytes, starts[lo:hi], ends[lo:hi], scaled[lo:hi], self._precision, out
            )
            write(str(out.data[:used], "utf-8", "surrogatepass"))


def write_bedgraph(
    handle: TextIO,
    track_name: str,
    description: str,
    chunks: Iterable[tuple[str, np.ndarray]],
    precision: int = 4,
) -> None:
    """Write a whole bedGraph: the track line, then merged runs per record.

    ``chunks`` gives ``(seqid, values)`` per record in input order, values for
    the whole record; see :class:`BedGraphTrack` for the line format.
    """
    track = BedGraphTrack(handle, track_name, description, precision)
    for seqid, values in chunks:
        track.add(seqid, values)
        track.end_record(seqid)
    track.close()


def require_bigwig() -> None:
    """Raise :class:`~seqstate.errors.OptionalDependencyError` unless pyBigWig imports."""
    _import_pybigwig()


def _import_pybigwig() -> Any:
    try:
        import pyBigWig
    except ImportError:
        raise OptionalDependencyError(
            "bigWig output needs the optional extra: pip install 'seqstate[bigwig]'"
        ) from None
    return pyBigWig


class BigWigTrack:
    """An open bigWig output with the same merged runs as :class:`BedGraphTrack`.

    ``chrom_sizes`` lists ``(seqid, length)`` for the header; :meth:`add` must
    then be called in that order (records may be left out).  Call
    :meth:`close` to finish the file (also done on leaving a ``with`` block).
    bigWig stores 32-bit floats, so a value reads back within float32
    precision of its rounded value.  Needs the optional pyBigWig package and
    raises :class:`~seqstate.errors.OptionalDependencyError` without it.
    """

    def __init__(
        self, path: str | Path, chrom_sizes: list[tuple[str, int]], precision: int = 4
    ) -> None:
        _check_precision(precision)
        module = _import_pybigwig()
        self._precision = precision
        self._scale = 10.0**precision
        self._order = {seqid: (i, int(n)) for i, (seqid, n) in enumerate(chrom_sizes)}
        self._last = -1
        self._end = 0  # end0 of the values added for record self._last
        #: the held run: (escaped seqid, start0, end0, scaled value, record index)
        self._held: tuple[str, int, int, int, int] | None = None
        self._path = Path(path)
        self._runs = 0
        self._bw = None
        self._check_space(0)
        self._bw = module.open(str(path), "w")
        if self._bw is None:
            raise OSError(f"pyBigWig could not open {str(path)!r} for writing")
        try:
            self._bw.addHeader([(escape_text(seqid), int(n)) for seqid, n in chrom_sizes])
        except BaseException:
            self.close()
            raise

    def add(self, seqid: str, values: np.ndarray, offset0: int = 0) -> None:
        """Add the merged runs of ``values``, base ``i`` being ``offset0 + i`` of ``seqid``.

        A record may come in pieces, in order: calls for the same seqid must not
        go back before the end of the previous piece; contiguous pieces give the
        same entries as one call (the last run is held back, as in
        :class:`BedGraphTrack`, until the record goes on, :meth:`end_record` or
        :meth:`close`).
        """
        if self._bw is None:
            raise RuntimeError("BigWigTrack is closed")
        if seqid not in self._order:
            raise ValueError(f"record {seqid!r} is not in chrom_sizes")
        index, length = self._order[seqid]
        if index < self._last:
            raise ValueError(f"record {seqid!r} comes out of chrom_sizes order")
        n = np.shape(values)[0] if np.ndim(values) == 1 else -1
        if offset0 < 0 or n < 0 or offset0 + n > length:
            raise ValueError(
                f"record {seqid!r}: values of shape {np.shape(values)} at offset {offset0} "
                f"do not fit a length of {length}"
            )
        end = self._end if index == self._last else 0
        if offset0 < end:
            raise ValueError(
                f"record {seqid!r}: values at offset {offset0} go back before the end of "
                f"the values already added ({end})"
            )
        starts, ends, scaled = runs_of_rounded(values, self._precision)
        self._last = index
        self._end = max(end, offset0 + n)
        if starts.shape[0] == 0:
            return
        starts += offset0
        ends += offset0
        held = self._held
        self._held = None
        name = escape_text(seqid)
        if held is not None:
            if held[4] == index and held[2] == int(starts[0]) and held[3] == int(scaled[0]):
                starts[0] = held[1]  # the held run goes on in this piece
            else:
                self._write(held[0], np.array([held[1]]), np.array([held[2]]), np.array([held[3]]))
        last = starts.shape[0] - 1
        self._write(name, starts[:last], ends[:last], scaled[:last])
        self._held = (name, int(starts[last]), int(ends[last]), int(scaled[last]), index)

    def end_record(self, seqid: str | None = None) -> None:
        """Hand over the held run: the record has no more pieces (no-op when none is held)."""
        held, self._held = self._held, None
        if held is not None and self._bw is not None:
            self._write(held[0], np.array([held[1]]), np.array([held[2]]), np.array([held[3]]))

    def _write(self, name: str, starts: np.ndarray, ends: np.ndarray, scaled: np.ndarray) -> None:
        """Hand runs (record coordinates) to the writer library, after the space check."""
        if starts.shape[0] == 0:
            return
        self._check_space(starts.shape[0])
        self._runs += starts.shape[0]
        assert self._bw is not None
        for lo in range(0, starts.shape[0], _ENTRIES):
            hi = lo + _ENTRIES
            block_starts = starts[lo:hi]
            self._bw.addEntries(
                [name] * block_starts.shape[0],
                block_starts,
                ends=ends[lo:hi],
                values=scaled[lo:hi] / self._scale,
            )

    def add_runs(
        self, seqid: str, starts0: np.ndarray, ends0: np.ndarray, scaled: np.ndarray
    ) -> None:
        """Add merged runs already rounded (``scaled / 10**precision``, record coordinates,
        0-based half-open), in order; several calls may carry one record's runs."""
        if self._bw is None:
            raise RuntimeError("BigWigTrack is closed")
        if seqid not in self._order:
            raise ValueError(f"record {seqid!r} is not in chrom_sizes")
        index, length = self._order[seqid]
        if index < self._last:
            raise ValueError(f"record {seqid!r} comes out of chrom_sizes order")
        k = int(np.shape(starts0)[0])
        if k and (int(starts0[0]) < 0 or int(ends0[-1]) > length):
            raise ValueError(f"record {seqid!r}: runs do not fit a length of {length}")
        self._last = index
        self._check_space(k)
        self._runs += k
        name = escape_text(seqid)
        for lo in range(0, k, _ENTRIES):
            hi = lo + _ENTRIES
            block_starts = np.ascontiguousarray(starts0[lo:hi], dtype=np.int64)
            self._bw.addEntries(
                [name] * block_starts.shape[0],
                block_starts,
                ends=np.ascontiguousarray(ends0[lo:hi], dtype=np.int64),
                values=np.asarray(scaled[lo:hi], dtype=np.float64) / self._scale,
            )

    def _check_space(self, new_runs: int) -> None:
        """Raise OSError(ENOSPC) unless the disk has room for the file with ``new_runs`` more.

        The writer library crashes the process on a full disk instead of
        reporting it, so room is checked before any data is handed to it.
        """
        written = 0
        try:
            if self._path.exists():
                written = self._path.stat().st_size
            free = shutil.disk_usage(self._path.parent).free
        except OSError:
            return
        need = BIGWIG_FIXED_BYTES + BIGWIG_BYTES_PER_RUN * (self._runs + new_runs) - written
        if free < need:
            raise OSError(
                errno.ENOSPC,
                f"{os.strerror(errno.ENOSPC)} (bigWig needs about {need:,} bytes, {free:,} free)",
            )

    def close(self) -> None:
        """Hand over the held run, finish and close the file (safe to call twice)."""
        if self._bw is not None:
            self.end_record()
            self._check_space(0)
            bw, self._bw = self._bw, None
            bw.close()
            if not self._path.is_file() or self._path.stat().st_size == 0:
                raise OSError(errno.EIO, f"the bigWig {str(self._path)!r} was not written")

    def __enter__(self) -> BigWigTrack:
        return self

    def __exit__(self, exc_type: object, *exc_info: object) -> None:
        if exc_type is None:
            self.close()
        elif self._bw is not None:
            # Only data already checked to fit was handed over: finishing it is safe.
            self._held = None
            bw, self._bw = self._bw, None
            bw.close()


def write_bigwig(
    path: str | Path,
    track_chunks: Iterable[tuple[str, np.ndarray]],
    chrom_sizes: list[tuple[str, int]],
    precision: int = 4,
) -> None:
    """Write a whole bigWig: merged runs of each record's values.

    ``chrom_sizes`` lists ``(seqid, length)`` for the header; ``track_chunks``
    gives ``(seqid, values)`` in that order (records may be left out), each
    values array having the record's full length.  See :class:`BigWigTrack`.
    """
    sizes = dict(chrom_sizes)
    with BigWigTrack(path, chrom_sizes, precision) as track:
        for seqid, values in track_chunks:
            if seqid in sizes and np.shape(values) != (sizes[seqid],):
                raise ValueError(
                    f"record {seqid!r}: {np.shape(values)} values for a length of {sizes[seqid]}"
                )
            track.add(seqid, values)
