"""The records table of an annotate run (``STEM.records.tsv``): one row per FASTA record.

``seqstate annotate`` writes one row for every record it annotated and every record
it skipped, in input order, as each record is done; the run report
(``STEM.run.json``) keeps only the totals and the first :data:`LISTED_RECORDS`
entries of each kind (``records``, ``skipped_records``).  A ``--region`` run's
table has its one annotated row, then the rows of the records it skipped.

The table is TSV: one header line (:data:`COLUMNS`), then rows whose cells go
through :func:`seqstate.io.tsvtext.tsv_cell` (a record ID with a tab or a line end
stays one cell).  Coordinates are 1-based closed; a cell that does not apply is
``.`` (:data:`NA`):

==============================  =============================================
``record_id``                   the FASTA record ID
``status``                      ``annotated`` or ``skipped``
``skip_reason``                 why it was skipped (``empty``: a header with
                                no sequence), ``.`` for an annotated record
``length``                      bases of the record (0 for a skipped one)
``start_1based``/``end_1based`` the stretch annotated (the record, or the region)
``unknown_bases``               unknown bases (N, ...) in that stretch
``loglik_nat``                  log-likelihood of the stretch, natural log
``features``                    features written (GFF3 feature lines)
``genes``/``mrnas``             gene models: genes and mRNAs written
``filtered_min_cds_length``     gene models: genes dropped by each filter
``filtered_min_gene_posterior``
``header_line``                 a skipped record: the 1-based line of its header
==============================  =============================================

:class:`RecordsLog` writes the rows and keeps the counters and the first entries
(memory does not grow with the number of records).  :func:`read_table` reads a
table back for ``seqstate merge`` and checks it as strictly as the run report.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterator
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, TextIO

from seqstate.errors import SeqstateError, escape_text
from seqstate.io.tsvtext import tsv_cell, tsv_row, unescape_cell

#: Entries of each kind (``records``, ``skipped_records``) the run report lists; the
#: records table has every record.
LISTED_RECORDS = 1000

#: File-name suffix of the records table (after the run's stem).
TABLE_SUFFIX = ".records.tsv"

#: The header line's columns, in order.
COLUMNS = (
    "record_id",
    "status",
    "skip_reason",
    "length",
    "start_1based",
    "end_1based",
    "unknown_bases",
    "loglik_nat",
    "features",
    "genes",
    "mrnas",
    "filtered_min_cds_length",
    "filtered_min_gene_posterior",
    "header_line",
)

#: A cell that does not apply to the row.
NA = "."

#: The gene filters a gene model's ``filtered_genes`` counts, in column order.
FILTERS = ("min_cds_length", "min_gene_posterior")


@dataclass
class RecordReport:
    """One annotated record (or region of it): 1-based closed bounds and counts."""

    id: str
    length: int
    start_1based: int
    end_1based: int
    unknown_bases: int
    loglik_nat: float
    features: int
    #: gene models (None otherwise): genes and mRNAs written, and genes dropped by
    #: each filter (``min_cds_length``, ``min_gene_posterior``)
    genes: int | None = None
    mrnas: int | None = None
    filtered_genes: dict[str, int] | None = None


@dataclass
class SkippedReport:
    """A FASTA record skipped for having no sequence (``line`` is 1-based)."""

    id: str
    line: int
    reason: str


def _count(value: int | None) -> str:
    return NA if value is None else str(value)


def record_row(rec: dict[str, Any]) -> str:
    """The table line of an annotated record (a :class:`RecordReport` as a dict, as the
    run report lists it)."""
    filtered = rec.get("filtered_genes")
    loglik = rec["loglik_nat"]
    return tsv_row(
        [
            rec["id"],
            "annotated",
            NA,
            rec["length"],
            rec["start_1based"],
            rec["end_1based"],
            rec["unknown_bases"],
            repr(float(loglik)),
            rec["features"],
            _count(rec.get("genes")),
            _count(rec.get("mrnas")),
            *(NA if filtered is None else str(filtered[k]) for k in FILTERS),
            NA,
        ]
    )


def skipped_row(sk: dict[str, Any]) -> str:
    """The table line of a skipped record (a :class:`SkippedReport` as a dict)."""
    return tsv_row([sk["id"], "skipped", sk["reason"], 0, *([NA] * 9), sk["line"]])


HEADER = tsv_row(COLUMNS)


@dataclass
class Totals:
    """Counts over every record of a run (the run report's ``totals``).

    ``bases``: bases annotated (each stretch's ``end - start + 1``); ``genes``,
    ``mrnas`` and ``filtered_genes`` are None unless a record counted genes.
    """

    records: int = 0
    skipped_records: int = 0
    bases: int = 0
    features: int = 0
    genes: int | None = None
    mrnas: int | None = None
    filtered_genes: dict[str, int] | None = None

    def add(self, rec: dict[str, Any]) -> None:
        """Count one annotated record (a :class:`RecordReport` as a dict)."""
        self.records += 1
        self.bases += rec["end_1based"] - rec["start_1based"] + 1
        self.features += rec["features"]
        if rec.get("genes") is not None:
            self.genes = (self.genes or 0) + rec["genes"]
            self.mrnas = (self.mrnas or 0) + (rec.get("mrnas") or 0)
            filtered = rec.get("filtered_genes") or {}
            base = self.filtered_genes or dict.fromkeys(FILTERS, 0)
            self.filtered_genes = {k: base[k] + int(filtered.get(k, 0)) for k in FILTERS}

    def merged(self, other: Totals) -> Totals:
        """The totals of two runs' records together."""
        out = Totals(**asdict(self))
        out.records += other.records
        out.skipped_records += other.skipped_records
        out.bases += other.bases
        out.features += other.features
        if other.genes is not None:
            out.genes = (out.genes or 0) + other.genes
            out.mrnas = (out.mrnas or 0) + (other.mrnas or 0)
            base = out.filtered_genes or dict.fromkeys(FILTERS, 0)
            more = other.filtered_genes or {}
            out.filtered_genes = {k: base[k] + int(more.get(k, 0)) for k in FILTERS}
        return out


class RecordsLog:
    """The records table written as records finish, with the run's counters.

    ``handle``: the table's open text output (None: no table, as with ``-o -``).
    Keeps :class:`Totals` and the first ``limit`` entries of each kind; every other
    entry is written and dropped.
    """

    def __init__(self, handle: TextIO | None, limit: int = LISTED_RECORDS) -> None:
        self.handle = handle
        self.limit = limit
        self.totals = Totals()
        self.records: list[RecordReport] = []
        self.skipped: list[SkippedReport] = []
        if handle is not None:
            handle.write(HEADER)

    def add_record(self, rec: RecordReport) -> None:
        entry = asdict(rec)
        self.totals.add(entry)
        if len(self.records) < self.limit:
            self.records.append(rec)
        if self.handle is not None:
            self.handle.write(record_row(entry))

    def add_skipped(self, sk: SkippedReport) -> None:
        self.totals.skipped_records += 1
        if len(self.skipped) < self.limit:
            self.skipped.append(sk)
        if self.handle is not None:
            self.handle.write(skipped_row(asdict(sk)))

    @property
    def truncated(self) -> bool:
        """Whether the run report lists fewer entries than the table has rows."""
        return self.totals.records > self.limit or self.totals.skipped_records > self.limit


# ---------------------------------------------------------------- reading back
class RecordsTableError(SeqstateError):
    """A records table is malformed or does not match its run report."""


@dataclass
class TableRecords:
    """A records table read back: every annotated and skipped entry, in table order
    (dicts as the run report lists them), their totals, and every row's text."""

    records: list[dict[str, Any]]
    skipped: list[dict[str, Any]]
    totals: Totals
    #: the 0-based line of each entry of ``records`` and of ``skipped``
    record_lines: list[int]
    skipped_lines: list[int]


_INT = re.compile(r"0|[1-9][0-9]*")
#: Most digits of a count or coordinate cell (more than any run has; int() is never
#: handed thousands of digits).
_DIGITS = 19


def _lines(path: Path, shown: str) -> Iterator[tuple[int, str]]:
    """``(0-based line number, line)``: UTF-8, each line ended."""
    with open(path, "rb") as fh:
        for n, raw in enumerate(fh):
            try:
                line = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise RecordsTableError(
                    f"byte {exc.start + 1} is 0x{raw[exc.start]:02x}, not UTF-8: expected "
                    "UTF-8 text",
                    path=shown,
                    line0=n,
                ) from None
            if not line.endswith("\n"):
                raise RecordsTableError(
                    "the last line has no line end, expected a complete file", path=shown, line0=n
                )
            yield n, line


class _Row:
    """Cell checks of one row; each failure names the column and the line."""

    def __init__(self, cells: list[str], shown: str, n: int) -> None:
        self.cells = dict(zip(COLUMNS, cells))
        self.shown = shown
        self.n = n

    def fail(self, column: str, expected: str) -> RecordsTableError:
        found = escape_text(self.cells[column])
        shown = found if len(found) <= 40 else found[:37] + "..."
        return RecordsTableError(
            f"column '{column}' is {shown!r}, expected {expected}", path=self.shown, line0=self.n
        )

    def text(self, column: str) -> str:
        cell = self.cells[column]
        value = unescape_cell(cell)
        if tsv_cell(value) != cell:
            raise self.fail(column, "a cell escaped as seqstate writes it (\\\\, \\t, \\n, ...)")
        return value

    def integer(self, column: str, low: int, high: int | None = None) -> int:
        cell = self.cells[column]
        expected = f"an integer >= {low}" + (f" and <= {high}" if high is not None else "")
        if len(cell) > _DIGITS or not _INT.fullmatch(cell):
            raise self.fail(column, expected)
        value = int(cell)
        if value < low or (high is not None and value > high):
            raise self.fail(column, expected)
        return value

    def optional(self, column: str) -> int | None:
        return None if self.cells[column] == NA else self.integer(column, 0)

    def na(self, *columns: str) -> None:
        for column in columns:
            if self.cells[column] != NA:
                raise self.fail(column, f"'{NA}' (a skipped record has none)")


def _annotated(row: _Row, rid: str, high: int | None) -> dict[str, Any]:
    row.na("skip_reason", "header_line")
    length = row.integer("length", 1, high)
    start = row.integer("start_1based", 1, length)
    end = row.integer("end_1based", start, length)
    unknown = row.integer("unknown_bases", 0, end - start + 1)
    cell = row.cells["loglik_nat"]
    try:
        loglik = float(cell)
    except ValueError:
        raise row.fail("loglik_nat", "a number") from None
    if repr(loglik) != cell or not math.isfinite(loglik):
        raise row.fail("loglik_nat", "a number as seqstate writes it (Python's repr)")
    features = row.integer("features", 0)
    genes, mrnas = row.optional("genes"), row.optional("mrnas")
    cuts = [row.optional("filtered_" + k) for k in FILTERS]
    present = [v is not None for v in (genes, mrnas, *cuts)]
    if any(present) and not all(present):
        column = ("genes", "mrnas", *("filtered_" + k for k in FILTERS))[present.index(False)]
        raise row.fail(column, "a count, as the row's other gene columns have")
    rec: dict[str, Any] = {
        "id": rid,
        "length": length,
        "start_1based": start,
        "end_1based": end,
        "unknown_bases": unknown,
        "loglik_nat": loglik,
        "features": features,
        "genes": genes,
        "mrnas": mrnas,
        "filtered_genes": None if genes is None else dict(zip(FILTERS, cuts)),
    }
    return rec


def read_table(path: Path, shown: str, *, max_length: int | None = None) -> TableRecords:
    """Every row of the records table ``path`` (``shown`` names it in messages), checked.

    Refuses a header other than :data:`COLUMNS`, a row of another width (a raw tab
    in a cell), a cell not escaped as :func:`~seqstate.io.tsvtext.tsv_cell` writes
    it, a count or coordinate out of range (a length above ``max_length`` too), an
    empty or repeated record ID, and a cell that does not apply not written ``.``.
    Each failure is one :class:`RecordsTableError` naming the file and the line.
    """
    records: list[dict[str, Any]] = []
    skipped: list[dict[str, Any]] = []
    totals = Totals()
    lines: tuple[list[int], list[int]] = ([], [])
    seen: set[str] = set()
    n = -1
    for n, line in _lines(path, shown):
        if n == 0:
            if line != HEADER:
                raise RecordsTableError(
                    f"header {escape_text(line.rstrip(chr(10)))[:60]!r}, expected the columns "
                    f"{' '.join(COLUMNS)} (a records table of seqstate annotate)",
                    path=shown,
                    line0=0,
                )
            continue
        cells = line[:-1].split("\t")
        if len(cells) != len(COLUMNS):
            raise RecordsTableError(
                f"{len(cells)} column(s), expected {len(COLUMNS)} (as the header line; a tab "
                "inside a cell is written \\t)",
                path=shown,
                line0=n,
            )
        row = _Row(cells, shown, n)
        rid = row.text("record_id")
        if not rid:
            raise row.fail("record_id", "a non-empty record ID")
        if rid in seen:
            raise row.fail("record_id", "each record once")
        seen.add(rid)
        status = row.cells["status"]
        if status == "annotated":
            rec = _annotated(row, rid, max_length)
            records.append(rec)
            lines[0].append(n)
            totals.add(rec)
        elif status == "skipped":
            reason = row.text("skip_reason")
            if not reason or reason == NA:
                raise row.fail("skip_reason", "why the record was skipped")
            row.integer("length", 0, 0)
            row.na(*COLUMNS[4:13])
            skipped.append({"id": rid, "line": row.integer("header_line", 1), "reason": reason})
            lines[1].append(n)
            totals.skipped_records += 1
        else:
            raise row.fail("status", "'annotated' or 'skipped'")
    if n < 0:
        raise RecordsTableError("an empty file, expected a header line", path=shown)
    return TableRecords(records, skipped, totals, *lines)


def check_against_report(
    table: TableRecords, report: dict[str, Any], shown: str, report_shown: str
) -> None:
    """The table's totals and first entries are those of its (checked) run report."""
    found = asdict(table.totals)
    want = report["totals"]
    for key, value in found.items():
        if want.get(key) != value:
            raise RecordsTableError(
                f"{key} {value!r} over its rows, expected {want.get(key)!r} as run report "
                f"'{report_shown}' says ('totals.{key}')",
                path=shown,
            )
    for kind, rows, entries, at, fmt in (
        ("records", table.records, report["records"], table.record_lines, record_row),
        (
            "skipped_records",
            table.skipped,
            report["skipped_records"],
            table.skipped_lines,
            skipped_row,
        ),
    ):
        for i, (row, entry) in enumerate(zip(rows, entries)):
            if fmt(row) != fmt(entry):
                raise RecordsTableError(
                    f"the row of record '{escape_text(row['id'])}' differs from '{kind}[{i}]' "
                    f"of run report '{report_shown}', expected the same record",
                    path=shown,
                    line0=at[i],
                )
