"""FASTA written from pieces of each record's sequence (bounded memory, any length).

The text is that of :func:`seqstate.io.fasta.write_fasta` on the whole records: a header
``>id description`` (``>id`` without one; whitespace in the description collapsed to one
space), then the bases ``width`` to a line.
"""

from __future__ import annotations

from typing import TextIO

import numpy as np


def header_line(record_id: str, description: str) -> str:
    """``>id description`` (``>id`` without one) and its newline; ValueError for an ID that
    is empty or contains whitespace."""
    if not record_id or record_id.split() != [record_id]:
        raise ValueError(f"record ID {record_id!r} is empty or contains whitespace")
    desc = " ".join(description.split())
    return f">{record_id} {desc}\n" if desc else f">{record_id}\n"


class FastaStreamWriter:
    """FASTA written a record at a time from pieces of its sequence, ``width`` bases a line.

    Memory: one piece (plus less than a line carried to the next piece).  ``start`` a
    record, ``write`` its bases (ASCII bytes) in any number of pieces, ``end`` it.
    ValueError for a width below 1, an ID that is empty or holds whitespace, an empty
    record, or calls out of that order.
    """

    def __init__(self, handle: TextIO, width: int = 60) -> None:
        if width < 1:
            raise ValueError(f"width must be at least 1, not {width}")
        self.handle, self.width = handle, width
        self._carry = b""
        self._id: str | None = None
        self._bases = 0

    def start(self, record_id: str, description: str = "") -> None:
        """Begin a record (the one before must be ended)."""
        if self._id is not None:
            raise ValueError(f"record '{self._id}' is not ended")
        self.handle.write(header_line(record_id, description))
        self._id, self._bases, self._carry = record_id, 0, b""

    def write(self, bases: bytes) -> None:
        """Append bases to the record: every full line is written now."""
        if self._id is None:
            raise ValueError("no record started")
        self._bases += len(bases)
        data = self._carry + bases if self._carry else bases
        rows = len(data) // self.width
        if rows:
            lines = np.empty((rows, self.width + 1), dtype=np.uint8)
            full = np.frombuffer(data, dtype=np.uint8, count=rows * self.width)
            lines[:, : self.width] = full.reshape(rows, self.width)
            lines[:, self.width] = ord("\n")
            self.handle.write(lines.tobytes().decode("ascii"))
        self._carry = data[rows * self.width :]

    def end(self) -> None:
        """End the record: its last, shorter line."""
        if self._id is None:
            raise ValueError("no record started")
        if not self._bases:
            raise ValueError(f"record '{self._id}' has an empty sequence")
        if self._carry:
            self.handle.write(self._carry.decode("ascii") + "\n")
        self._id, self._carry = None, b""
