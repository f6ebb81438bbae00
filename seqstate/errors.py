"""One exception family for errors the user must see and can fix.

Every error carries enough context to print a single line: the file, the line
(stored 0-based, shown 1-based), the record or row, what was found and what was
expected.  The CLI turns these, and only these, into ``error: ...`` lines and
exit codes; any other exception is a bug and keeps its traceback.
"""

from __future__ import annotations

import unicodedata
from pathlib import Path

#: Unicode categories escaped in messages: controls, format characters (such as
#: bidirectional overrides), lone surrogates, and line/paragraph separators.
_ESCAPED_CATEGORIES = frozenset({"Cc", "Cf", "Cs", "Zl", "Zp"})
_NAMED_ESCAPES = {"\t": "\\t", "\n": "\\n", "\r": "\\r"}


def escape_text(text: str) -> str:
    """``text`` with every character that could break a one-line message escaped.

    Tab, newline and carriage return become ``\\t``, ``\\n``, ``\\r``; other
    control and invisible format characters become ``\\xNN`` / ``\\uNNNN`` /
    ``\\UNNNNNNNN`` (as Python writes them); a lone surrogate that stands for an
    undecodable byte of a file name (``surrogateescape``) becomes ``\\xNN`` of that
    byte.  Printable text, including non-ASCII letters, is kept as it is.
    """
    if text.isprintable():
        return text
    out = []
    for ch in text:
        code = ord(ch)
        if ch in _NAMED_ESCAPES:
            out.append(_NAMED_ESCAPES[ch])
        elif 0xDC80 <= code <= 0xDCFF:
            out.append(f"\\x{code - 0xDC00:02x}")
        elif unicodedata.category(ch) in _ESCAPED_CATEGORIES:
            if code <= 0xFF:
                out.append(f"\\x{code:02x}")
            elif code <= 0xFFFF:
                out.append(f"\\u{code:04x}")
            else:
                out.append(f"\\U{code:08x}")
        else:
            out.append(ch)
    return "".join(out)


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
        """The one-line message, without the ``error:`` prefix.

        Control characters (from a file name, a record ID, a cell of a file) are
        escaped by :func:`escape_text`, so the message is always one line.
        """
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
        return escape_text(text)


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
