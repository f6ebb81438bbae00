"""One exception family for errors the user must see and can fix.

Every error carries enough context to print a single line: the file, the line
(stored 0-based, shown 1-based), the record or row, what was found and what was
expected.  The CLI turns these, and only these, into ``error: ...`` lines and
exit codes; any other exception is a bug and keeps its traceback.
"""

from __future__ import annotations

from pathlib import Path


class SeqstateError(Exception):
    """Base class of every user-facing error.

    ``exit_code`` is the process exit status the CLI uses for this error.
    """

    exit_code = 1

    def __init__(
        self,
        message: str,
        *,
        path: str | Path | None = None,
        line0: int | None = None,
        where: str | None = None,
    ) -> None:
        self.message = message
        self.path = str(path) if path is not None else None
        self.line0 = line0
        self.where = where
        super().__init__(self.format())

    def format(self) -> str:
        """The one-line message, without the ``error:`` prefix."""
        parts = []
        if self.path is not None:
            loc = self.path
            if self.line0 is not None:
                loc += f" line {self.line0 + 1}"
            parts.append(loc)
        elif self.line0 is not None:
            parts.append(f"line {self.line0 + 1}")
        if self.where:
            parts.append(self.where)
        prefix = ", ".join(parts)
        text = f"{prefix}: {self.message}" if prefix else self.message
        return " ".join(text.split("\n"))


class ModelFormatError(SeqstateError):
    """A model manifest or table is malformed or inconsistent."""


class TableFormatError(ModelFormatError):
    """A TSV table of a model has a bad cell, row or sum."""


class SequenceFormatError(SeqstateError):
    """A FASTA input is missing, empty, malformed or has bad characters."""


class FeatureFormatError(SeqstateError):
    """A GFF3 or BED input is malformed or inconsistent with the sequences."""


class ImpossibleSequenceError(SeqstateError):
    """A record has probability zero under the model (no allowed path)."""


class UsageError(SeqstateError):
    """An option value is wrong (unknown model, bad region, unwritable output)."""

    exit_code = 2


class OptionalDependencyError(SeqstateError):
    """An optional extra (pyBigWig, matplotlib) is needed but not installed."""

    exit_code = 3
