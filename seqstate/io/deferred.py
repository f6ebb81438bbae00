"""Outputs whose header needs every record, written while the records stream past.

A GFF3 file starts with one ``##sequence-region`` line per record and a bigWig
file with the length of every record, but a streamed run learns the records one
at a time.  :class:`DeferredGFF3` keeps the feature lines in a scratch file and
writes header + lines at :meth:`~DeferredGFF3.finish`; :class:`DeferredBigWig`
keeps the merged runs of rounded values (0-based half-open) in a scratch file
and writes the bigWig at :meth:`~DeferredBigWig.finish`.  The bytes are those a
writer given everything at once would write.  Scratch files live in a folder the
caller owns (an output set's scratch folder), so a failed run leaves none.
"""

from __future__ import annotations

import shutil
from pathlib import Path
from typing import BinaryIO, TextIO

import numpy as np

from seqstate.io import tracks
from seqstate.io.gff3 import GFF3Writer, header_text

__all__ = ["DeferredBigWig", "DeferredGFF3", "RunCarry"]

_COPY = 1 << 22
_VERSION = header_text([])  # "##gff-version 3\n"


class DeferredGFF3:
    """A GFF3 output whose header is written last: :attr:`writer` takes features now.

    ``target`` is the output's open text handle; ``scratch`` a file path for the
    lines until :meth:`finish` (header, then the lines, copied in blocks).  The
    ``##sequence-region`` lines given to :meth:`add_region` go to a second scratch
    file beside it (``scratch`` + ``.regions``), so memory does not grow with the
    number of records.
    """

    def __init__(self, target: TextIO, scratch: Path) -> None:
        self._target = target
        self._scratch = scratch
        self._regions_path = scratch.with_name(scratch.name + ".regions")
        self._body: TextIO = open(scratch, "w", encoding="utf-8", newline="\n")
        self._regions: TextIO = open(self._regions_path, "w", encoding="utf-8", newline="\n")
        self.writer = GFF3Writer(self._body, body_only=True)

    def write_text(self, text: str) -> None:
        """Feature lines already formatted (from a worker's own writer)."""
        self._body.write(text)

    def add_region(self, seqid: str, start: int, end: int) -> None:
        """The ``##sequence-region`` line of one record (1-based closed), in order."""
        self._regions.write(header_text([(seqid, start, end)])[len(_VERSION) :])

    def finish(self) -> None:
        """Write the version line, the ``##sequence-region`` lines of :meth:`add_region`,
        then every line."""
        self._body.close()
        self._regions.close()
        self._target.write(_VERSION)
        with open(self._regions_path, encoding="utf-8", newline="\n") as lines:
            shutil.copyfileobj(lines, self._target, _COPY)
        with open(self._scratch, encoding="utf-8", newline="\n") as body:
            shutil.copyfileobj(body, self._target, _COPY)
        self._scratch.unlink()
        self._regions_path.unlink()

    def abandon(self) -> None:
        """Close the scratch files (the caller's folder removal deletes them)."""
        self._body.close()
        self._regions.close()


class RunCarry:
    """Merged runs of rounded values of one record fed in consecutive pieces.

    :meth:`add` returns the runs that are complete (``starts0``, ``ends0``,
    ``scaled`` as :func:`seqstate.io.tracks.runs_of_rounded` gives, on record
    coordinates); the last run stays open until :meth:`close` returns it, so the
    runs equal those of one call on the whole record.
    """

    def __init__(self, precision: int) -> None:
        self.precision = precision
        self._open: tuple[int, int, int] | None = None

    def add(self, values: np.ndarray, offset0: int) -> tuple[np.ndarray, ...]:
        starts, ends, scaled = tracks.runs_of_rounded(values, self.precision)
        if starts.shape[0] == 0:
            return starts, ends, scaled
        starts = starts + offset0
        ends = ends + offset0
        if self._open is not None:
            s0, e0, v0 = self._open
            if e0 == int(starts[0]) and v0 == int(scaled[0]):
                starts[0] = s0
            else:
                starts = np.concatenate(([s0], starts))
                ends = np.concatenate(([e0], ends))
                scaled = np.concatenate(([v0], scaled))
        self._open = (int(starts[-1]), int(ends[-1]), int(scaled[-1]))
        return starts[:-1], ends[:-1], scaled[:-1]

    def close(self) -> tuple[np.ndarray, ...]:
        if self._open is None:
            empty = np.zeros(0, dtype=np.int64)
            return empty, empty.copy(), empty.copy()
        s0, e0, v0 = self._open
        self._open = None
        return (np.array([s0], np.int64), np.array([e0], np.int64), np.array([v0], np.int64))


class DeferredBigWig:
    """A bigWig output whose record list is known at the end.

    ``path`` is where the bigWig goes (an output set's staged path), ``scratch`` a
    file for the runs.  Per record: :meth:`add` with consecutive pieces of its
    values, then :meth:`end_record` with its length; :meth:`finish` writes the file.
    """

    def __init__(self, path: Path, scratch: Path, precision: int = 4) -> None:
        tracks.require_bigwig()
        self.path = path
        self.precision = precision
        self._scratch = scratch
        self._runs: BinaryIO = open(scratch, "wb")
        self._sizes: list[tuple[str, int]] = []
        self._counts: list[int] = []
        self._carry: RunCarry | None = None
        self._pending = 0

    def _put(self, runs: tuple[np.ndarray, ...]) -> None:
        starts, ends, scaled = runs
        k = starts.shape[0]
        if k:
            block = np.empty((3, k), dtype=np.int64)
            block[0], block[1], block[2] = starts, ends, scaled
            self._runs.write(block.T.tobytes())  # one (start, end, scaled) triple a run
            self._pending += k

    def add(self, seqid: str, values: np.ndarray, offset0: int = 0) -> None:
        """Values of bases ``offset0 ..`` of the record being written (pieces in order)."""
        if self._carry is None:
            self._carry = RunCarry(self.precision)
        self._put(self._carry.add(values, offset0))

    def add_runs(self, runs: tuple[np.ndarray, np.ndarray, np.ndarray]) -> None:
        """Complete runs of the record being written (as :class:`RunCarry` returns them)."""
        self._put(runs)

    def end_record(self, seqid: str, length: int) -> None:
        """The record ``seqid`` of ``length`` bases is complete."""
        if self._carry is not None:
            self._put(self._carry.close())
            self._carry = None
        self._sizes.append((seqid, int(length)))
        self._counts.append(self._pending)
        self._pending = 0

    def finish(self) -> None:
        """Write the bigWig: every record's length, then its runs."""
        self._runs.close()
        with (
            tracks.BigWigTrack(self.path, self._sizes, self.precision) as bw,
            open(self._scratch, "rb") as runs,
        ):
            for (seqid, _), count in zip(self._sizes, self._counts):
                done = 0
                while done < count:
                    k = min(count - done, 1 << 20)
                    raw = np.frombuffer(runs.read(24 * k), dtype=np.int64).reshape(k, 3)
                    bw.add_runs(seqid, raw[:, 0], raw[:, 1], raw[:, 2])
                    done += k
        self._scratch.unlink()

    def abandon(self) -> None:
        self._runs.close()
