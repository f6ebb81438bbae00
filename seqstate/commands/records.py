"""Record selection: ``--records ID,ID,...`` and ``--records-file FILE`` (annotate a subset).

A selection is a list of FASTA record IDs.  The records kept are those of the
input whose ID is selected, in **input order** (the order of the selection does
not matter), so that runs on disjoint selections that together cover a file can
be gathered back into the output of one run on the whole file
(:mod:`seqstate.commands.merge`).  An ID the input does not have is an error that
names it; so is an ID selected twice.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path
from typing import Protocol, TypeVar

from seqstate.errors import UsageError, escape_text

#: How many unknown IDs an error message lists before it says "and N more".
SHOWN_IDS = 5


class _HasId(Protocol):
    @property
    def id(self) -> str: ...


_R = TypeVar("_R", bound=_HasId)
_S = TypeVar("_S", bound=_HasId)


def _check_id(rid: str, where: str) -> None:
    if not rid:
        raise UsageError(f"{where}: an empty record ID (expected ID or ID,ID,...)")
    if rid.split() != [rid]:
        raise UsageError(
            f"{where}: record ID {escape_text(rid)!r} contains whitespace "
            "(FASTA record IDs never do)"
        )


def _no_repeats(ids: list[str], where_of: Sequence[str]) -> list[str]:
    seen: dict[str, str] = {}
    for rid, where in zip(ids, where_of):
        if rid in seen:
            raise UsageError(
                f"{where}: record ID '{escape_text(rid)}' is selected twice (first in {seen[rid]})"
            )
        seen[rid] = where
    return ids


def parse_records_option(text: str) -> list[str]:
    """``--records A,B,C`` -> ``["A", "B", "C"]`` (spaces around commas are allowed).

    An empty item (``A,,B``, a trailing comma) or an ID given twice is a
    :class:`~seqstate.errors.UsageError`.
    """
    ids = [part.strip() for part in text.split(",")]
    wheres = [f"--records item {i + 1}" for i in range(len(ids))]
    for rid, where in zip(ids, wheres):
        _check_id(rid, where)
    return _no_repeats(ids, wheres)


def read_records_file(path: str | Path) -> list[str]:
    """The IDs of a records file: one record ID per line (UTF-8), blank lines ignored.

    Leading and trailing whitespace of a line is dropped; whitespace inside an
    ID, an ID on two lines, an unreadable file or a file without any ID is a
    :class:`~seqstate.errors.UsageError` naming the file and 1-based line.
    """
    shown = escape_text(str(path))
    try:
        text = Path(path).read_bytes().decode("utf-8-sig")
    except FileNotFoundError:
        raise UsageError(f"--records-file '{shown}' does not exist") from None
    except IsADirectoryError:
        raise UsageError(f"--records-file '{shown}' is a directory, expected a file") from None
    except UnicodeDecodeError:
        raise UsageError(f"--records-file '{shown}' is not UTF-8 text") from None
    except OSError as exc:
        raise UsageError(
            f"--records-file '{shown}' cannot be read: {exc.strerror or exc}"
        ) from None
    ids: list[str] = []
    wheres: list[str] = []
    for line0, line in enumerate(text.splitlines()):
        rid = line.strip()
        if not rid:
            continue
        where = f"{shown} line {line0 + 1}"
        _check_id(rid, where)
        ids.append(rid)
        wheres.append(where)
    if not ids:
        raise UsageError(f"--records-file '{shown}' has no record ID (expected one per line)")
    return _no_repeats(ids, wheres)


def records_selection(records: str | None, records_file: str | None) -> list[str] | None:
    """The selection of the two options (None: every record); both at once is an error."""
    if records is not None and records_file is not None:
        raise UsageError("--records and --records-file cannot be combined: give one of them")
    if records is not None:
        return parse_records_option(records)
    if records_file is not None:
        return read_records_file(records_file)
    return None


def select_records(
    records: Sequence[_R],
    skipped: Sequence[_S],
    wanted: Sequence[str],
    fasta: str,
) -> tuple[list[_R], list[_S]]:
    """Keep the records (and skipped empty records) whose ID is in ``wanted``.

    Both lists keep their input order.  An ID of ``wanted`` that is neither a
    record nor a skipped record of ``fasta`` is a
    :class:`~seqstate.errors.UsageError` naming the first :data:`SHOWN_IDS` of them.
    """
    want = set(wanted)
    known = {r.id for r in records} | {r.id for r in skipped}
    unknown = [rid for rid in wanted if rid not in known]
    if unknown:
        shown = ", ".join(f"'{escape_text(rid)}'" for rid in unknown[:SHOWN_IDS])
        more = f" and {len(unknown) - SHOWN_IDS} more" if len(unknown) > SHOWN_IDS else ""
        raise UsageError(
            f"{escape_text(fasta)}: {len(unknown)} selected record ID(s) not in the FASTA: "
            f"{shown}{more}"
        )
    return (
        [r for r in records if r.id in want],
        [r for r in skipped if r.id in want],
    )
