"""The text of a TSV cell: the one escaping every TSV table seqstate writes goes through.

A cell never holds a character that would end its row or split it for a reader: a
backslash is written ``\\\\``, a tab ``\\t``, a line feed ``\\n``, a carriage return
``\\r``; any other control character (0x00-0x1F, 0x7F, 0x80-0x9F) and the Unicode line
and paragraph separators (U+2028, U+2029, which Python's ``str.splitlines`` also
breaks at) are written ``\\xNN`` or ``\\uNNNN``.  Everything else is kept, so ordinary
IDs, paths and numbers are written as they are.  :func:`unescape_cell` reads a cell
back to the original text.
"""

from __future__ import annotations

import re
from collections.abc import Iterable

__all__ = ["tsv_cell", "tsv_row", "unescape_cell"]

_NAMED = {"\\": "\\\\", "\t": "\\t", "\n": "\\n", "\r": "\\r"}
_SPECIAL = re.compile(r"[\\\x00-\x1f\x7f-\x9f\u2028\u2029]")
_ESCAPE = re.compile(r"\\(?:x([0-9a-f]{2})|u([0-9a-f]{4})|(.))", re.DOTALL)
_UNNAMED = {"\\": "\\", "t": "\t", "n": "\n", "r": "\r"}


def _escape(match: re.Match[str]) -> str:
    ch = match.group(0)
    named = _NAMED.get(ch)
    if named is not None:
        return named
    code = ord(ch)
    return f"\\x{code:02x}" if code <= 0xFF else f"\\u{code:04x}"


def tsv_cell(value: object) -> str:
    """``value`` (text, or anything ``str`` turns into text) as one TSV cell."""
    text = value if isinstance(value, str) else str(value)
    return _SPECIAL.sub(_escape, text) if _SPECIAL.search(text) else text


def tsv_row(cells: Iterable[object]) -> str:
    """One TSV line: every cell through :func:`tsv_cell`, tab-separated, ``\\n`` ended."""
    return "\t".join(tsv_cell(c) for c in cells) + "\n"


def unescape_cell(cell: str) -> str:
    """The text a cell written by :func:`tsv_cell` stands for (its inverse)."""
    if "\\" not in cell:
        return cell

    def back(match: re.Match[str]) -> str:
        hex2, hex4, named = match.groups()
        if hex2 or hex4:
            return chr(int(hex2 or hex4, 16))
        return _UNNAMED.get(named, "\\" + named)

    return _ESCAPE.sub(back, cell)
