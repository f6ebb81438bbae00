"""The TSV tables of a model folder: reading and checking them, cell by cell.

``start.tsv``, ``end.tsv`` and ``mask.tsv`` (state, value), ``transitions.tsv`` (a square table,
rows = from, columns = to; an empty cell is 0) and ``emissions.tsv`` (state,
context, one column per symbol); the layout is described in
:mod:`seqstate.io.tables`.  Lines starting with ``#`` and blank lines are
ignored.  Problems raise :class:`~seqstate.errors.TableFormatError` naming the
file and line.
"""

from __future__ import annotations

import math
import os
import re
import stat
import sys
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from seqstate.errors import ModelFormatError, TableFormatError
from seqstate.io import files
from seqstate.model import SUM_TOLERANCE

__all__ = [
    "EMPTY_CONTEXT",
    "read_emissions",
    "read_text",
    "read_transitions",
    "read_vector",
]

#: The context of an order-0 emission row (no preceding symbol).
EMPTY_CONTEXT = "."


def read_text(path: Path, error_cls: type[ModelFormatError], what: str) -> bytes:
    """The bytes of a manifest or table, after the checks every model file gets.

    Only a regular file is read: a FIFO, socket or device is refused without waiting on
    it (opened non-blocking, then checked), so a model never blocks a run.
    """
    try:
        data = _regular_bytes(path, error_cls, what)
    except FileNotFoundError:
        raise error_cls(f"{what} file not found", path=path) from None
    except IsADirectoryError:
        raise error_cls(f"is a directory, expected a {what} file", path=path) from None
    except OSError as exc:
        raise error_cls(f"cannot be read: {exc.strerror or exc}", path=path) from None
    kind = files.sniff(data[: files.SNIFF_BYTES])
    if kind in ("UTF-16", "UTF-32"):
        raise error_cls(files.unsupported_message(kind), path=path)
    if kind is not None:
        found = f"compressed with {kind}" if kind != "zip" else "is a zip archive"
        raise error_cls(
            f"{found}; a model's manifest and tables are read as plain text only", path=path
        )
    if data.startswith(files.UTF8_BOM):
        data = data[len(files.UTF8_BOM) :]
    return data


def _regular_bytes(path: Path, error_cls: type[ModelFormatError], what: str) -> bytes:
    """The bytes of ``path`` if it is a regular file (symbolic links followed)."""
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0))
    try:
        mode = os.fstat(fd).st_mode
        if stat.S_ISDIR(mode):
            raise IsADirectoryError(str(path))
        if not stat.S_ISREG(mode):
            kind = "a FIFO (named pipe)" if stat.S_ISFIFO(mode) else "not a regular file"
            raise error_cls(
                f"is {kind}; expected a {what} file (a model's files are read as regular files)",
                path=path,
            )
        with os.fdopen(fd, "rb", closefd=True) as handle:
            fd = -1
            return handle.read()
    finally:
        if fd >= 0:
            os.close(fd)


#: A number cell of a model table: decimal digits with an optional sign, point and
#: exponent (``0.25``, ``1e-5``, ``.5``), plus the words ``inf`` and ``nan`` so that they
#: get their own message.  Python's ``float`` also takes ``1_0`` (as 10), digits of other
#: scripts and other spellings no table should hold; they are refused here.
_NUMBER = re.compile(
    r"[+-]?(?:(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?|inf(?:inity)?|nan)", re.I | re.A
)


def _lines(path: Path, data: bytes | None = None) -> Iterator[tuple[int, list[str]]]:
    """Yield (line0, fields) for non-blank, non-comment lines of a TSV file (``data``: its
    bytes as :func:`read_text` gave them, when already read).

    LF, CRLF and CR line ends are all read; a UTF-8 byte-order mark is dropped.
    """
    if data is None:
        data = read_text(path, TableFormatError, "TSV table")
    for line0, raw in enumerate(data.splitlines()):
        try:
            line = raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            start = exc.start
            raise TableFormatError(
                f"is not UTF-8 text: byte 0x{raw[start]:02X} at column {start + 1} cannot be "
                "decoded; expected a UTF-8 TSV table",
                path=path,
                line0=line0,
            ) from None
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        yield line0, line.split("\t")


_WORD = re.compile(r"[A-Za-z0-9_.+-]{1,30}")


def _shown_cells(fields: list[str], limit: int = 4) -> str:
    """Header cells for a message: word-like cells as written, anything else described.

    A file that is not a table (say, a system file named by mistake) is never echoed.
    """
    out = []
    for cell in fields[:limit]:
        cell = cell.strip()
        word = _WORD.fullmatch(cell) or (len(cell) <= 2 and cell.isascii() and cell.isprintable())
        out.append(repr(cell) if word else f"<{len(cell)} other characters>")
    if len(fields) > limit:
        out.append(f"... ({len(fields)} cells)")
    return ", ".join(out) or "nothing"


def _total(values) -> float:
    """Exact sum of non-negative values; inf when it overflows the float range."""
    try:
        return math.fsum(values)
    except OverflowError:
        return math.inf


def _check_total(total: float, what: str, path: Path, line0: int | None) -> None:
    if not math.isfinite(total):
        raise TableFormatError(
            f"{what} sums to more than {sys.float_info.max:.4g}, the largest number "
            "(overflow); scale the counts down",
            path=path,
            line0=line0,
        )


def _number(cell: str, path: Path, line0: int, what: str) -> float:
    text = cell.strip()
    if text == "":
        return 0.0
    try:
        if not _NUMBER.fullmatch(text):
            raise ValueError(text)
        value = float(text)
    except ValueError:
        raise TableFormatError(
            f"{what}: '{text[:30]}' is not a number (expected digits with an optional sign, "
            "point and exponent, such as 0.25 or 1e-5)",
            path=path,
            line0=line0,
        ) from None
    if not math.isfinite(value):
        raise TableFormatError(f"{what}: '{text}' is not a finite number", path=path, line0=line0)
    if value < 0:
        raise TableFormatError(f"{what}: {text} is negative", path=path, line0=line0)
    return value


def _state_index(name: str, index: dict[str, int], path: Path, line0: int) -> int:
    if name not in index:
        raise TableFormatError(
            f"unknown state '{name}' (states: {', '.join(index)})", path=path, line0=line0
        )
    return index[name]


def _check_sum(total: float, what: str, path: Path, line0: int | None) -> None:
    if abs(total - 1.0) > SUM_TOLERANCE:
        raise TableFormatError(
            f"{what} sums to {total:.9g}, expected 1 (tolerance {SUM_TOLERANCE:g})",
            path=path,
            line0=line0,
        )


#: The columns of a mask chain's table (``mask.tsv``), after ``state``.
MASK_CHAIN_COLUMNS = ["mask", "after_masked", "after_unmasked"]


def read_mask(path: Path, names: list[str]) -> np.ndarray:
    """``mask.tsv``: ``state<TAB>mask`` (one P(masked) per state, shape ``(M,)``) or
    ``state<TAB>mask<TAB>after_masked<TAB>after_unmasked`` (a mask chain, ``(M, 3)``);
    every state once, every value a probability from 0 to 1."""
    lines = list(_lines(path))
    if not lines:
        raise TableFormatError("table is empty", path=path)
    line0, head = lines[0]
    head = [f.strip() for f in head]
    if head[1:] not in (["mask"], MASK_CHAIN_COLUMNS) or head[0] != "state":
        raise TableFormatError(
            f"header is {_shown_cells(lines[0][1])}, expected 'state<TAB>mask' or "
            "'state<TAB>mask<TAB>after_masked<TAB>after_unmasked'",
            path=path,
            line0=line0,
        )
    width = len(head) - 1
    index = {n: i for i, n in enumerate(names)}
    values = np.zeros((len(names), width))
    given = np.zeros(len(names), dtype=bool)
    for line0, fields in lines[1:]:
        if len(fields) != width + 1:
            raise TableFormatError(
                f"found {len(fields)} columns, expected {width + 1}", path=path, line0=line0
            )
        s = _state_index(fields[0].strip(), index, path, line0)
        if given[s]:
            raise TableFormatError(f"duplicate row for state '{names[s]}'", path=path, line0=line0)
        given[s] = True
        for j, cell in enumerate(fields[1:]):
            values[s, j] = _number(cell, path, line0, f"state '{names[s]}'")
            if values[s, j] > 1:
                raise TableFormatError(
                    f"state '{names[s]}': P(masked) {cell.strip()} is above 1, expected a "
                    "probability from 0 to 1",
                    path=path,
                    line0=line0,
                )
    if not given.all():
        missing = names[int(np.argmin(given))]
        raise TableFormatError(
            f"no row for state '{missing}': the mask table gives P(masked) for every state",
            path=path,
            line0=lines[-1][0],
        )
    return values[:, 0].copy() if width == 1 else values


def read_vector(path: Path, names: list[str], column: str, strict: bool) -> np.ndarray:
    index = {n: i for i, n in enumerate(names)}
    values = np.zeros(len(names))
    given = np.zeros(len(names), dtype=bool)
    header_seen = False
    last_line0 = None
    for line0, fields in _lines(path):
        last_line0 = line0
        if not header_seen:
            header_seen = True
            if [f.strip() for f in fields] != ["state", column]:
                raise TableFormatError(
                    f"header is {_shown_cells(fields)}, expected 'state<TAB>{column}'",
                    path=path,
                    line0=line0,
                )
            continue
        if len(fields) != 2:
            raise TableFormatError(
                f"found {len(fields)} columns, expected 2", path=path, line0=line0
            )
        s = _state_index(fields[0].strip(), index, path, line0)
        if given[s]:
            raise TableFormatError(f"duplicate row for state '{names[s]}'", path=path, line0=line0)
        given[s] = True
        values[s] = _number(fields[1], path, line0, f"state '{names[s]}'")
    if not header_seen:
        raise TableFormatError("table is empty", path=path)
    total = _total(values)
    _check_total(total, f"{column} values (all rows)", path, last_line0)
    if column == "start" and not strict and total <= 0:
        raise TableFormatError(
            "start probabilities sum to 0 and cannot be normalised", path=path, line0=last_line0
        )
    if column == "start" and strict:
        _check_sum(total, "start probabilities (all rows)", path, last_line0)
    return values


def read_transitions(
    path: Path, names: list[str], end: np.ndarray | None, strict: bool
) -> np.ndarray:
    index = {n: i for i, n in enumerate(names)}
    m = len(names)
    table = np.zeros((m, m))
    given = np.zeros(m, dtype=bool)
    columns: list[int] | None = None
    for line0, fields in _lines(path):
        if columns is None:
            if fields[0].strip() != "from":
                raise TableFormatError(
                    f"first header cell is {_shown_cells(fields, 1)}, expected 'from' followed "
                    "by the to-state names",
                    path=path,
                    line0=line0,
                )
            columns = []
            for name in fields[1:]:
                c = _state_index(name.strip(), index, path, line0)
                if c in columns:
                    raise TableFormatError(
                        f"duplicate column for state '{name.strip()}'", path=path, line0=line0
                    )
                columns.append(c)
            continue
        if len(fields) > len(columns) + 1:
            raise TableFormatError(
                f"found {len(fields)} columns, expected at most {len(columns) + 1}",
                path=path,
                line0=line0,
            )
        s = _state_index(fields[0].strip(), index, path, line0)
        if given[s]:
            raise TableFormatError(f"duplicate row for state '{names[s]}'", path=path, line0=line0)
        given[s] = True
        for c, cell in zip(columns, fields[1:]):
            table[s, c] = _number(cell, path, line0, f"row '{names[s]}' column '{names[c]}'")
        total = _total([*table[s], end[s] if end is not None else 0.0])
        what = f"row '{names[s]}'" + (" (transitions plus end)" if end is not None else "")
        _check_total(total, what, path, line0)
        if strict:
            _check_sum(float(total), what, path, line0)
        elif total <= 0:
            raise TableFormatError(
                f"{what} sums to 0 and cannot be normalised", path=path, line0=line0
            )
    if columns is None:
        raise TableFormatError("table is empty", path=path)
    missing = [names[i] for i in range(m) if not given[i]]
    if missing and (end is None or any(end[index[n]] < 1.0 for n in missing)):
        raise TableFormatError(f"no row for state '{missing[0]}'", path=path)
    return table


def read_emissions(
    path: Path, names: list[str], alphabet: str, order: int, strict: bool
) -> tuple[np.ndarray, dict[int, np.ndarray]]:
    """``emissions.tsv``: (full-context rows ``(M, A**order, A)``, back-off rows by context
    length), rows as written (not normalised).  A table as ``save_model`` writes it is read
    by a fast path (:func:`_emissions_fast`); anything it does not accept is read line by
    line, which gives the same arrays or the error of the first bad line."""
    data = read_text(path, TableFormatError, "TSV table")
    fast = _emissions_fast(data, names, alphabet, order, strict)
    if fast is not None:
        return fast
    return _emissions_by_line(path, data, names, alphabet, order, strict)


#: Characters that end a line for ``str.splitlines`` but not for ``bytes.splitlines``.
_OTHER_LINE_ENDS = re.compile("[\x0b\x0c\x1c\x1d\x1e\x85\u2028\u2029]")
#: A character no number cell of the fast path holds.
_NOT_PLAIN = re.compile(r"[^0-9.eE+-]")


def _emissions_fast(
    data: bytes, names: list[str], alphabet: str, order: int, strict: bool
) -> tuple[np.ndarray, dict[int, np.ndarray]] | None:
    """:func:`read_emissions` of a well-formed table in bulk, or None when anything is
    unusual (then the line-by-line reader gives the same result or the exact error)."""
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        return None
    if _OTHER_LINE_ENDS.search(text):
        return None
    rows = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not rows:
        return None
    m, a = len(names), len(alphabet)
    head = [f.strip() for f in rows[0].split("\t")]
    if head[:2] != ["state", "context"] or sorted(head[2:]) != sorted(alphabet):
        return None
    if len(head) != a + 2:
        return None
    columns = np.array([alphabet.index(c) for c in head[2:]], dtype=np.int64)
    body = rows[1:]
    n, w = len(body), a + 2
    if any(line.count("\t") != w - 1 for line in body):
        return None
    fields = np.array("\t".join(body).split("\t"), dtype=object).reshape(n, w)
    index = {nm: i for i, nm in enumerate(names)}
    found = [index.get(v) for v in fields[:, 0].tolist()]
    if None in found:
        return None
    state = np.array(found, dtype=np.int64)
    sym = {c: i for i, c in enumerate(alphabet)}
    codes: dict[str, tuple[int, int]] = {}
    for ctx in set(fields[:, 1].tolist()):
        word = "" if ctx == EMPTY_CONTEXT else ctx
        if len(word) > order or any(ch not in sym for ch in word):
            return None
        c = 0
        for ch in word:
            c = c * a + sym[ch]
        codes[ctx] = (len(word), c)
    where = np.array([codes[v] for v in fields[:, 1].tolist()], dtype=np.int64).reshape(n, 2)
    level, context = where[:, 0], where[:, 1]
    cells = fields[:, 2:].ravel().tolist()
    # digits, point, exponent and sign only: then float() accepts exactly the cells that
    # _NUMBER does (no spaces, underscores or words), with the same values
    if _NOT_PLAIN.search("".join(cells)):
        return None
    try:
        values = np.array(list(map(float, cells)), dtype=np.float64).reshape(n, a)
    except ValueError:
        return None
    if not np.all(np.isfinite(values)) or np.any(values < 0):
        return None
    totals = values.sum(axis=1)
    if not np.all(np.isfinite(totals)):
        return None
    if strict:
        # exact sums only where the rounding of the plain sum could matter
        near = np.flatnonzero(np.abs(np.abs(totals - 1.0) - SUM_TOLERANCE) < 1e-9)
        totals[near] = [_total(values[i].tolist()) for i in near]
        if np.any(np.abs(totals - 1.0) > SUM_TOLERANCE):
            return None
    elif np.any(values.max(axis=1) <= 0):
        return None
    full = np.full((m, a**order, a), np.nan)
    lower = {j: np.full((m, a**j, a), np.nan) for j in range(order)}
    for j in range(order + 1):
        pick = level == j
        key = state[pick] * a**j + context[pick]
        if np.unique(key).shape[0] != key.shape[0]:
            return None  # a duplicate row
        if j == order and key.shape[0] != m * a**order:
            return None  # a missing context
        target = full if j == order else lower[j]
        placed = np.full((key.shape[0], a), np.nan)
        placed[:, columns] = values[pick]
        target[state[pick], context[pick]] = placed
    lower = {j: arr for j, arr in lower.items() if not np.all(np.isnan(arr))}
    return full, lower


def _emissions_by_line(
    path: Path, data: bytes, names: list[str], alphabet: str, order: int, strict: bool
) -> tuple[np.ndarray, dict[int, np.ndarray]]:
    index = {n: i for i, n in enumerate(names)}
    m, a = len(names), len(alphabet)
    sym = {c: i for i, c in enumerate(alphabet)}
    full = np.full((m, a**order, a), np.nan)
    lower = {j: np.full((m, a**j, a), np.nan) for j in range(order)}
    given = {j: np.zeros((m, a**j), dtype=bool) for j in range(order + 1)}
    context_index: dict[str, int] = {}
    columns: list[int] | None = None
    for line0, fields in _lines(path, data):
        if columns is None:
            head = [f.strip() for f in fields]
            if head[:2] != ["state", "context"]:
                raise TableFormatError(
                    f"header starts {_shown_cells(head, 2)}, expected 'state<TAB>context' then "
                    "one column per symbol",
                    path=path,
                    line0=line0,
                )
            if sorted(head[2:]) != sorted(alphabet) or len(head[2:]) != a:
                raise TableFormatError(
                    f"symbol columns {_shown_cells(head[2:], a + 1)} do not match the alphabet "
                    f"{alphabet!r}",
                    path=path,
                    line0=line0,
                )
            columns = [sym[c] for c in head[2:]]
            continue
        if len(fields) != a + 2:
            raise TableFormatError(
                f"found {len(fields)} columns, expected {a + 2}", path=path, line0=line0
            )
        s = _state_index(fields[0].strip(), index, path, line0)
        ctx = fields[1].strip()
        if ctx == EMPTY_CONTEXT:
            ctx = ""
        if len(ctx) > order:
            raise TableFormatError(
                f"context '{ctx}' is longer than the model's order {order}", path=path, line0=line0
            )
        c = context_index.get(ctx)
        if c is None:
            c = 0
            for ch in ctx:
                if ch not in sym:
                    raise TableFormatError(
                        f"context '{ctx}' has symbol {ch!r} not in the alphabet",
                        path=path,
                        line0=line0,
                    )
                c = c * a + sym[ch]
            context_index[ctx] = c
        target = full if len(ctx) == order else lower[len(ctx)]
        seen_rows = given[len(ctx)]
        if seen_rows[s, c]:
            raise TableFormatError(
                f"duplicate row for state '{names[s]}' context '{ctx or EMPTY_CONTEXT}'",
                path=path,
                line0=line0,
            )
        seen_rows[s, c] = True
        row = [0.0] * a
        for col, cell in zip(columns, fields[2:]):
            row[col] = _number(
                cell, path, line0, f"state '{names[s]}' context '{ctx or EMPTY_CONTEXT}'"
            )
        total = _total(row)
        _check_total(
            total, f"row for state '{names[s]}' context '{ctx or EMPTY_CONTEXT}'", path, line0
        )
        if strict:
            if abs(total - 1.0) > SUM_TOLERANCE:
                what = f"row for state '{names[s]}' context '{ctx or EMPTY_CONTEXT}'"
                _check_sum(total, what, path, line0)
        elif total <= 0:
            what = f"row for state '{names[s]}' context '{ctx or EMPTY_CONTEXT}'"
            raise TableFormatError(
                f"{what} sums to 0 and cannot be normalised", path=path, line0=line0
            )
        target[s, c] = row
    if columns is None:
        raise TableFormatError("table is empty", path=path)
    missing = np.argwhere(~given[order])
    if missing.size:
        s, c = (int(v) for v in missing[0])
        ctx = _context_string(alphabet, order, c) or EMPTY_CONTEXT
        raise TableFormatError(f"missing context '{ctx}' for state '{names[s]}'", path=path)
    lower = {j: arr for j, arr in lower.items() if not np.all(np.isnan(arr))}
    return full, lower


def _context_string(alphabet: str, order: int, index: int) -> str:
    a = len(alphabet)
    chars = []
    for _ in range(order):
        chars.append(alphabet[index % a])
        index //= a
    return "".join(reversed(chars))
