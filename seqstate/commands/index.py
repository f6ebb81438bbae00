"""``seqstate index``: the ``.fai`` (and for bgzip the ``.gzi``) index of a FASTA file.

The index files are written next to the FASTA (``x.fa.fai``, ``x.fa.gz.gzi``),
all-or-nothing through :mod:`seqstate.io.atomic`; an index that exists is
replaced only with ``force``; the FASTA itself is only read.  The FASTA is
checked as every command checks it (:func:`seqstate.io.fasta.iter_fasta`, the
same messages).  See :mod:`seqstate.io.faidx` for the formats.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from seqstate.errors import UsageError
from seqstate.io import faidx
from seqstate.io.files import display_name

__all__ = ["IndexOptions", "IndexReport", "index"]


@dataclass
class IndexOptions:
    """What ``seqstate index`` was asked: the FASTA file and ``--force``."""

    input: str
    force: bool = False


@dataclass
class IndexReport:
    """What was indexed: records, bases (over every record) and the files written."""

    input: str
    records: int
    bases: int
    written: list[Path] = field(default_factory=list)

    def summary(self) -> str:
        """The one-line summary (without the ``seqstate:`` prefix)."""
        names = ", ".join(str(p) for p in self.written)
        return f"{self.records} record(s), {self.bases:,} bases indexed -> {names}"


def index(opts: IndexOptions) -> IndexReport:
    """Check the FASTA and write its index files; returns what was written."""
    if opts.input == "-":
        raise UsageError("standard input cannot be indexed: give a FASTA file name")
    written = faidx.build_index(opts.input, force=opts.force)
    entries = faidx.parse_fai(written[0].read_text(encoding="utf-8"), str(written[0]))
    return IndexReport(
        display_name(opts.input),
        records=len(entries),
        bases=sum(e.length for e in entries),
        written=written,
    )
