"""Region strings typed by a person, such as ``chr1:1,000-2,000``.

What the user types is 1-based and inclusive at both ends (``chr1:1-10`` is
the first ten bases).  Inside the program a :class:`Region` is 0-based and
half-open: ``chr1:1-10`` becomes ``Region("chr1", 0, 10)``.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from seqstate.errors import UsageError

__all__ = ["TO_END", "Region", "check_region", "parse_region"]

#: ``end0`` value meaning "to the end of the record" (a region given as an ID
#: alone).  :func:`check_region` replaces it with the record length.
TO_END = -1

_EXPECTED = "expected ID:START-END with 1-based inclusive START <= END, or an ID alone"
_NUMBER = r"[0-9][0-9,]*"
_RANGE = re.compile(rf"\s*({_NUMBER})\s*-\s*({_NUMBER})\s*")
# A suffix made only of digits, commas, '-' and spaces was meant as a range.
_RANGE_LIKE = re.compile(r"[0-9,\-\s]*")
_KNOWN_SHOWN = 5


@dataclass(frozen=True)
class Region:
    """A stretch of one record, 0-based half-open: bases ``start0 .. end0-1``.

    ``end0 == TO_END`` (-1) means "to the end of the record"; it only appears
    before :func:`check_region` has resolved it.
    """

    seqid: str
    start0: int
    end0: int

    def to_text(self) -> str:
        """The region as a person would type it: ``ID:START-END``, 1-based inclusive."""
        if self.end0 == TO_END:
            return self.seqid
        return f"{self.seqid}:{self.start0 + 1}-{self.end0}"


def _to_int(text: str) -> int | None:
    digits = text.replace(",", "")
    return int(digits) if digits.isdigit() else None


def parse_region(text: str) -> Region:
    """Parse ``ID:START-END`` (1-based inclusive) or ``ID`` (the whole record).

    Commas are allowed in the numbers (``chr1:1,000-2,000``).  IDs may contain
    ':'; the text is split at the last ':'.  If what follows that ':' is not
    made of digits, commas and '-', the whole text is taken as an ID, so
    ``HLA:A*01`` is a whole-record region.  A whole record gives
    ``Region(ID, 0, TO_END)``.  Raises :class:`~seqstate.errors.UsageError`
    for an empty ID, a malformed range, START < 1 or START > END.
    """
    stripped = text.strip()
    if not stripped:
        raise UsageError(f"region {text!r}: is empty; {_EXPECTED}")
    seqid, colon, suffix = stripped.rpartition(":")
    if not colon or not _RANGE_LIKE.fullmatch(suffix):
        if any(ch.isspace() for ch in stripped):
            raise UsageError(f"region {text!r}: ID contains whitespace; {_EXPECTED}")
        return Region(stripped, 0, TO_END)
    match = _RANGE.fullmatch(suffix)
    start = _to_int(match.group(1)) if match else None
    end = _to_int(match.group(2)) if match else None
    if not seqid or start is None or end is None or any(ch.isspace() for ch in seqid):
        raise UsageError(f"region {text!r}: {_EXPECTED}")
    if start < 1:
        raise UsageError(f"region {text!r}: START is {start}; {_EXPECTED}")
    if start > end:
        raise UsageError(f"region {text!r}: START {start} is after END {end}; {_EXPECTED}")
    return Region(seqid, start - 1, end)


def check_region(region: Region, record_lengths: dict[str, int]) -> Region:
    """Check a region against the input records and resolve :data:`TO_END`.

    ``record_lengths`` maps record ID to length in bases, in input order.
    Returns the region with a concrete ``end0``.  Raises
    :class:`~seqstate.errors.UsageError` for an unknown record (listing up to
    five known IDs) or a range that does not lie inside the record.
    """
    length = record_lengths.get(region.seqid)
    if length is None:
        known = list(record_lengths)
        shown = ", ".join(known[:_KNOWN_SHOWN])
        if len(known) > _KNOWN_SHOWN:
            shown += f", ... ({len(known)} records in all)"
        listing = f"known records: {shown}" if known else "the input has no records"
        raise UsageError(f"region {region.to_text()}: no record '{region.seqid}' ({listing})")
    if region.end0 == TO_END:
        return Region(region.seqid, 0, length)
    if region.start0 < 0 or region.end0 > length or region.start0 >= region.end0:
        raise UsageError(
            f"region {region.to_text()} lies outside record {region.seqid} (length {length})"
        )
    return region
