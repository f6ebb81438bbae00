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
from types import SimpleNamespace
from typing import Protocol, TypeVar

from seqstate.errors import FeatureFormatError, UsageError, escape_text
from seqstate.io.regions import Region, check_region, parse_region

#: How many unknown IDs an error message lists before it says "and N more".
SHOWN_IDS = 5


class _HasId(Protocol):
    @property
    def id(self) -> str: ...


_R = TypeVar("_R", bound=_HasId)
_S = TypeVar("_S", bound=_HasId)


class RecordSelection(list[str]):
    """The record IDs of ``--records-file``: a list that also knows the file it was read
    from (``source``), so that the file is among the inputs no output may replace
    (:func:`seqstate.commands.inputs.read_set`)."""

    source: str | None = None


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
        selection = RecordSelection(read_records_file(records_file))
        selection.source = records_file
        return selection
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


def id_listing(ids: Sequence[str] | set[str], most: int = SHOWN_IDS) -> str:
    """Up to ``most`` IDs, quoted, then how many there are in all (sorted when a set)."""
    names = sorted(ids) if isinstance(ids, set) else list(ids)
    if not names:
        return "none"
    shown = ", ".join(f"'{escape_text(rid)}'" for rid in names[:most])
    return shown + (f", ... ({len(names)} in all)" if len(names) > most else "")


def require_shared_ids(
    first: str,
    first_ids: Sequence[str] | set[str],
    second: str,
    second_ids: Sequence[str] | set[str],
) -> None:
    """Two inputs about one genome must share a sequence ID; otherwise a one-line
    :class:`~seqstate.errors.FeatureFormatError` naming both ID sets (shortened).

    Nothing is raised when either input has no ID at all (its own checks say so).
    """
    a, b = set(first_ids), set(second_ids)
    if a and b and not a & b:
        raise FeatureFormatError(
            f"{escape_text(first)} and {escape_text(second)} share no sequence ID "
            f"({escape_text(first)}: {id_listing(first_ids)}; {escape_text(second)}: "
            f"{id_listing(second_ids)}): are they of two different assemblies?"
        )


def choose_stretches(
    lengths: dict[str, int], region: str | None, records: Sequence[str] | None, fasta: str
) -> list[Region]:
    """What a command counts: the one ``--region`` (1-based inclusive as typed, checked
    against the records), the whole ``--records`` selected (in input order), or every
    record.  ``lengths`` maps record ID to length in bases, in input order.  Returns
    0-based half-open regions; both options at once is a
    :class:`~seqstate.errors.UsageError`, as on ``annotate``.
    """
    if region is not None and records is not None:
        raise UsageError("--records cannot be combined with --region (a region names one)")
    if region is not None:
        if not region.strip():
            raise UsageError("--region is empty: expected ID:START-END or ID")
        return [check_region(parse_region(region), lengths)]
    ids = list(lengths)
    if records is not None:
        known = [SimpleNamespace(id=rid) for rid in ids]
        kept, _ = select_records(known, [], records, fasta)
        ids = [r.id for r in kept]
    return [Region(rid, 0, lengths[rid]) for rid in ids]


def describe_stretches(stretches: Sequence[Region], lengths: dict[str, int]) -> str:
    """The stretches as a person reads them: ``all N record(s)``, a region
    ``ID:START-END`` (1-based inclusive), or the records (shortened when many)."""
    whole = all(r.start0 == 0 and r.end0 == lengths.get(r.seqid) for r in stretches)
    if whole and len(stretches) == len(lengths):
        return f"all {len(lengths)} record(s)"
    if whole:
        return f"record(s) {id_listing([r.seqid for r in stretches])}"
    return ", ".join(r.to_text() for r in stretches)
