"""BED interval input.

BED columns 2 and 3 are 0-based half-open, the same convention the program
uses inside, so intervals are kept exactly as written: ``chr1 0 10`` is the
first ten bases.  Only the first six columns are interpreted (chrom, start,
end, name, score, strand); further columns are ignored.
"""

from __future__ import annotations

import re
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

from seqstate.errors import FeatureFormatError
from seqstate.io.files import display_name, open_input, text_lines

__all__ = ["BedInterval", "parse_bed", "read_bed"]

_INTEGER = re.compile(r"[+-]?[0-9]+")
_BED_STRANDS = ("+", "-", ".")


@dataclass
class BedInterval:
    """One BED line: bases ``start0 .. end0-1`` of ``seqid`` (0-based half-open).

    ``name``, ``score`` and ``strand`` are the raw text of columns 4-6, or None
    when the line has fewer columns.  ``line0`` is the 0-based line index.
    """

    seqid: str
    start0: int
    end0: int
    name: str | None
    score: str | None
    strand: str | None
    line0: int


def _skip(line: str) -> bool:
    if not line.strip() or line.startswith("#"):
        return True
    first = line.split(None, 1)[0]
    return first in ("track", "browser")


def _coordinate(text: str, column: int, name: str, shown: str, line0: int) -> int:
    if not _INTEGER.fullmatch(text):
        raise FeatureFormatError(
            f"column {column} ({name}) {text!r} is not a whole number", path=shown, line0=line0
        )
    value = int(text)
    if value < 0:
        raise FeatureFormatError(
            f"column {column} ({name}) is {value}; BED positions are 0-based, expected >= 0",
            path=shown,
            line0=line0,
        )
    return value


def read_bed(path: str | Path) -> list[BedInterval]:
    """Read a BED file (``"-"`` for standard input; plain or gzip); see :func:`parse_bed`."""
    with open_input(path, FeatureFormatError, "BED") as handle:
        return list(parse_bed(handle, display_name(path)))


def parse_bed(handle: BinaryIO, shown: str) -> Iterator[BedInterval]:
    """The intervals of an open binary ``handle``, named ``shown`` in messages.

    Blank lines, ``#`` comments and ``track`` / ``browser`` lines are skipped.
    Fields are split on tabs when the line has a tab, otherwise on runs of
    whitespace.  Raises :class:`~seqstate.errors.FeatureFormatError` naming
    the file and line for fewer than 3 fields, a start or end that is not a
    whole number, a negative position, start > end, or a strand other than
    '+', '-' or '.'.
    """
    for line0, line in text_lines(handle, shown, FeatureFormatError):
        if _skip(line):
            continue
        yield _parse_line(line, shown, line0)


def _parse_line(line: str, shown: str, line0: int) -> BedInterval:
    fields = line.split("\t") if "\t" in line else line.split()
    if len(fields) < 3:
        raise FeatureFormatError(
            f"found {len(fields)} field{'s' if len(fields) != 1 else ''}, "
            "expected at least 3 (chrom, start, end)",
            path=shown,
            line0=line0,
        )
    seqid = fields[0].strip()
    if not seqid:
        raise FeatureFormatError("column 1 (chrom) is empty", path=shown, line0=line0)
    start0 = _coordinate(fields[1].strip(), 2, "start", shown, line0)
    end0 = _coordinate(fields[2].strip(), 3, "end", shown, line0)
    if start0 > end0:
        raise FeatureFormatError(
            f"start {start0} is greater than end {end0} "
            "(BED intervals are 0-based half-open with start <= end)",
            path=shown,
            line0=line0,
        )
    extra = [f.strip() for f in fields[3:6]] + [None, None, None]
    strand = extra[2]
    if strand is not None and strand not in _BED_STRANDS:
        raise FeatureFormatError(
            f"column 6 (strand) {strand!r} is not one of + - .",
            path=shown,
            line0=line0,
        )
    return BedInterval(seqid, start0, end0, extra[0], extra[1], strand, line0)
