"""Run reports of ``seqstate annotate`` read back, and the files they list checked.

A run report (``STEM.run.json``) read by another command (``seqstate merge``) is
input like any other: :func:`read_report` parses it with a bounded nesting depth
and :func:`check_report` checks every field against the one schema annotate
writes (types, ranges, output names that are plain file names of the report's
folder).  :func:`check_group_files` then reads each listed file once and checks
it against the report: its SHA-256 checksum (``output_sha256``, which annotate
records for every output but the report itself), UTF-8 text, and the lines or
entries the records imply (records, their spans, features per record).  The
records come from the run's records table (:func:`read_group_records`: every
record, checked against the report's ``totals`` and first entries).  Every
failure is one :class:`ReportFormatError` line naming the file (and the line),
what was found and what was expected.

Reports of an older schema (``seqstate-run-report/1``: every record listed in the
report, no records table) are refused with a line that says so.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
import stat
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

from seqstate.commands.records_table import (
    FILTERS,
    TABLE_SUFFIX,
    TableRecords,
    check_against_report,
    read_table,
)
from seqstate.errors import SeqstateError, escape_text
from seqstate.io import tracks
from seqstate.io.gff3 import escape_seqid

#: Deepest nesting of JSON arrays and objects a run report may have (annotate's
#: reports have 4: the report, ``records``, one record, ``filtered_genes``).
MAX_DEPTH = 32

#: Largest record length a bigWig can hold (its chromosome sizes are 32-bit).
BIGWIG_MAX_LENGTH = (1 << 32) - 1

#: First four bytes of a bigWig file (its magic number, little-endian).
BIGWIG_MAGIC = (0x888FFC26).to_bytes(4, "little")

#: Top-level keys of an annotate run report, in the order annotate writes them.
REPORT_KEYS = (
    "schema",
    "tool",
    "version",
    "command_line",
    "model",
    "options",
    "decode",
    "thresholds",
    "log_base",
    "coordinates",
    "totals",
    "records_table",
    "records_limit",
    "records_truncated",
    "records",
    "skipped_records",
    "outputs",
    "output_sha256",
)

#: Schemas of older annotate reports, and what they lack (refused with this said).
OLD_SCHEMAS = {
    "seqstate-run-report/1": "every record listed in the report, no records table",
}

_HEX64 = re.compile(r"[0-9a-f]{64}")
_BLOCK = 1 << 20


class ReportFormatError(SeqstateError):
    """A run report, or a file it lists, is malformed or does not match the report."""


# ---------------------------------------------------------------- checksums
def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 of a file's bytes (lowercase hex), read in 1 MiB blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(_BLOCK):
            digest.update(block)
    return digest.hexdigest()


def output_checksums(folder: str | os.PathLike, names: Sequence[str]) -> dict[str, str]:
    """``{name: sha256}`` of the files ``names`` in ``folder``, in name order."""
    return {name: file_sha256(Path(folder) / name) for name in sorted(names)}


# ---------------------------------------------------------------- reading and schema
def _kind(value: Any) -> str:
    """How a message names a JSON value that is not what was expected."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return f"{str(value).lower()} (a boolean)"
    if isinstance(value, (int, float)):
        return f"{value!r} (a number)"
    if isinstance(value, str):
        shown = value if len(value) <= 40 else value[:37] + "..."
        return f"{shown!r} (a string)"
    if isinstance(value, list):
        return f"a list of {len(value)}"
    if isinstance(value, dict):
        return f"an object of {len(value)} key(s)"
    return type(value).__name__


def _depth(value: Any) -> int:
    """Nesting depth of parsed JSON (a scalar 0, ``[]`` 1), without recursion."""
    deepest = 0
    stack = [(value, 1)]
    while stack:
        item, level = stack.pop()
        if isinstance(item, dict):
            children: Any = item.values()
        elif isinstance(item, list):
            children = item
        else:
            continue
        deepest = max(deepest, level)
        if level > MAX_DEPTH:
            return level
        stack.extend((child, level + 1) for child in children)
    return deepest


def read_report(path: Path, shown: str) -> dict[str, Any]:
    """The JSON object of the run report ``path`` (``shown``: its name in messages).

    Refuses text that is not UTF-8 or not JSON, a number JSON cannot hold as Python
    reads it, nesting deeper than :data:`MAX_DEPTH`, and a document that is not an
    object.  Raises ``FileNotFoundError`` and ``OSError`` for the caller to name.
    """
    data = path.read_bytes()
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ReportFormatError(
            f"byte {exc.start + 1} is 0x{data[exc.start]:02x}, not UTF-8: expected UTF-8 JSON",
            path=shown,
        ) from None
    try:
        report = json.loads(text)
    except RecursionError:
        raise ReportFormatError(
            f"JSON nested too deep to read, expected at most {MAX_DEPTH} levels", path=shown
        ) from None
    except json.JSONDecodeError as exc:
        raise ReportFormatError(
            f"not JSON ({exc.msg}), expected a run report of seqstate annotate",
            path=shown,
            line0=exc.lineno - 1,
        ) from None
    except ValueError as exc:  # an integer of more digits than Python converts
        raise ReportFormatError(
            f"a value JSON cannot be read back ({exc}), expected a run report", path=shown
        ) from None
    depth = _depth(report)
    if depth > MAX_DEPTH:
        raise ReportFormatError(
            f"JSON nested more than {depth - 1} levels deep, expected at most {MAX_DEPTH}",
            path=shown,
        )
    if not isinstance(report, dict):
        raise ReportFormatError(
            f"the document is {_kind(report)}, expected a JSON object (a run report)", path=shown
        )
    return report


class _Checker:
    """Field checks of one report; each failure names the field by its JSON path."""

    def __init__(self, shown: str) -> None:
        self.shown = shown

    def fail(self, where: str, value: Any, expected: str) -> ReportFormatError:
        message = f"'{where}' is {_kind(value)}, expected {expected}"
        return ReportFormatError(message, path=self.shown)

    def typed(
        self,
        obj: dict[str, Any],
        key: str,
        where: str,
        kind: type | tuple[type, ...],
        expected: str,
    ) -> Any:
        if key not in obj:
            raise ReportFormatError(f"'{where}' is missing, expected {expected}", path=self.shown)
        value = obj[key]
        if not isinstance(value, kind) or (kind is not bool and isinstance(value, bool)):
            raise self.fail(where, value, expected)
        return value

    def integer(self, obj: dict[str, Any], key: str, where: str, low: int, high: int | None) -> int:
        text = f"an integer >= {low}" + (f" and <= {high}" if high is not None else "")
        value = self.typed(obj, key, where, int, text)
        if value < low or (high is not None and value > high):
            raise self.fail(where, value, text)
        return int(value)

    def strings(self, value: Any, where: str) -> None:
        if not isinstance(value, list):
            raise self.fail(where, value, "a list of strings")
        for i, item in enumerate(value):
            if not isinstance(item, str):
                raise self.fail(f"{where}[{i}]", item, "a string")


def check_report(
    report: dict[str, Any], shown: str, schema: str, stem: str, folder: Path
) -> list[str]:
    """Check every field of an annotate run report; returns its output names.

    ``shown`` names the report in messages, ``schema`` is the one expected, ``stem``
    the report's own (its file is ``STEM.run.json``), ``folder`` the one it lies in:
    every output must be a plain file name there (no folder part; a link must stay in
    the folder) that starts with ``STEM.``, lists the report itself, the GFF3 and the
    feature table, and is a regular file.
    """
    c = _Checker(shown)
    found = report.get("schema")
    if isinstance(found, str) and found in OLD_SCHEMAS:
        raise ReportFormatError(
            f"schema {found!r} is a run report of an older seqstate ({OLD_SCHEMAS[found]}), "
            f"expected {schema!r}: annotate the groups again with this version",
            path=shown,
        )
    if found != schema:
        raise ReportFormatError(
            f"schema is {_kind(report.get('schema'))}, expected {schema!r} "
            "(a report of seqstate annotate)",
            path=shown,
        )
    extra = [k for k in report if k not in REPORT_KEYS]
    missing = [k for k in REPORT_KEYS if k not in report]
    if missing:
        raise ReportFormatError(
            f"'{missing[0]}' is missing, expected every key of an annotate report "
            f"({', '.join(REPORT_KEYS)})",
            path=shown,
        )
    if extra:
        raise ReportFormatError(
            f"unknown key {escape_text(extra[0])!r}, expected only the keys of an annotate "
            f"report ({', '.join(REPORT_KEYS)})",
            path=shown,
        )
    for key in ("tool", "version", "decode", "log_base"):
        c.typed(report, key, key, str, "a string")
    c.strings(report.get("command_line"), "command_line")
    model = c.typed(report, "model", "model", dict, "an object (name, sha256, ...)")
    c.typed(model, "name", "model.name", str, "a string")
    sha = c.typed(model, "sha256", "model.sha256", str, "64 lowercase hex digits")
    if not _HEX64.fullmatch(sha):
        raise c.fail("model.sha256", sha, "64 lowercase hex digits")
    c.typed(model, "alphabet", "model.alphabet", str, "a string")
    c.integer(model, "order", "model.order", 0, None)
    c.integer(model, "states", "model.states", 1, None)
    c.typed(report, "options", "options", dict, "an object (option name -> value)")
    c.typed(report, "thresholds", "thresholds", dict, "an object")
    c.typed(report, "coordinates", "coordinates", dict, "an object")

    outputs = c.typed(report, "outputs", "outputs", list, "a non-empty list of file names")
    if not outputs:
        raise c.fail("outputs", outputs, "a non-empty list of file names")
    names = _check_outputs(c, outputs, stem, folder)
    bigwig = any(n.endswith(".bw") for n in names)
    high = BIGWIG_MAX_LENGTH if bigwig else None

    totals = _check_totals(c, report)
    table = c.typed(report, "records_table", "records_table", str, "a file name")
    if table != stem + TABLE_SUFFIX or table not in names:
        raise c.fail(
            "records_table", table, f"'{escape_text(stem + TABLE_SUFFIX)}', one of 'outputs'"
        )
    limit = c.integer(report, "records_limit", "records_limit", 1, None)
    truncated = c.typed(report, "records_truncated", "records_truncated", bool, "true or false")
    want_cut = totals["records"] > limit or totals["skipped_records"] > limit
    if truncated != want_cut:
        raise c.fail(
            "records_truncated",
            truncated,
            f"{str(want_cut).lower()} ('totals' against 'records_limit' {limit})",
        )

    records = c.typed(report, "records", "records", list, "a list of records")
    if len(records) != min(totals["records"], limit):
        raise c.fail(
            "records",
            records,
            f"the first {min(totals['records'], limit)} record(s) "
            f"(totals.records {totals['records']}, records_limit {limit})",
        )
    seen: set[str] = set()
    for i, rec in enumerate(records):
        where = f"records[{i}]"
        if not isinstance(rec, dict):
            raise c.fail(where, rec, "an object (id, length, ...)")
        rid = c.typed(rec, "id", f"{where}.id", str, "a non-empty string")
        if not rid:
            raise c.fail(f"{where}.id", rid, "a non-empty string")
        if rid in seen:
            raise c.fail(f"{where}.id", rid, "each record once")
        seen.add(rid)
        length = c.integer(rec, "length", f"{where}.length", 1, high)
        start = c.integer(rec, "start_1based", f"{where}.start_1based", 1, length)
        end = c.integer(rec, "end_1based", f"{where}.end_1based", start, length)
        c.integer(rec, "unknown_bases", f"{where}.unknown_bases", 0, end - start + 1)
        loglik = c.typed(rec, "loglik_nat", f"{where}.loglik_nat", (int, float), "a number")
        try:
            finite = math.isfinite(float(loglik))
        except OverflowError:  # an integer past what a float holds
            finite = False
        if not finite:
            raise c.fail(f"{where}.loglik_nat", loglik, "a finite number")
        c.integer(rec, "features", f"{where}.features", 0, None)
        _check_gene_counts(c, rec, where)

    skipped = c.typed(report, "skipped_records", "skipped_records", list, "a list of records")
    if len(skipped) != min(totals["skipped_records"], limit):
        raise c.fail(
            "skipped_records",
            skipped,
            f"the first {min(totals['skipped_records'], limit)} skipped record(s) "
            f"(totals.skipped_records {totals['skipped_records']}, records_limit {limit})",
        )
    for i, sk in enumerate(skipped):
        where = f"skipped_records[{i}]"
        if not isinstance(sk, dict):
            raise c.fail(where, sk, "an object (id, line, reason)")
        rid = c.typed(sk, "id", f"{where}.id", str, "a string")
        if rid in seen:
            raise c.fail(f"{where}.id", rid, "each record once (records and skipped_records)")
        seen.add(rid)
        c.integer(sk, "line", f"{where}.line", 1, None)
        reason = c.typed(sk, "reason", f"{where}.reason", str, "a non-empty string")
        if not reason or reason == ".":
            raise c.fail(f"{where}.reason", reason, "a non-empty string")

    sums = c.typed(report, "output_sha256", "output_sha256", dict, "an object (name -> sha256)")
    want = sorted(n for n in names if not n.endswith(".run.json"))
    if sorted(sums) != want:
        raise ReportFormatError(
            f"'output_sha256' names {sorted(sums)}, expected one checksum for each output "
            f"but the report ({want})",
            path=shown,
        )
    for name, value in sums.items():
        if not isinstance(value, str) or not _HEX64.fullmatch(value):
            raise c.fail(f"output_sha256.{name}", value, "64 lowercase hex digits")
    return names


def _check_gene_counts(c: _Checker, obj: dict[str, Any], where: str) -> None:
    """``genes``, ``mrnas`` and ``filtered_genes`` (one count per gene filter): all null
    (a segment model) or all given."""
    keys = ("genes", "mrnas", "filtered_genes")
    given = [obj.get(k) is not None for k in keys]
    if any(given) and not all(given):
        key = keys[given.index(False)]
        raise c.fail(f"{where}.{key}", obj.get(key), "a count, as 'genes' is given")
    if not any(given):
        return
    c.integer(obj, "genes", f"{where}.genes", 0, None)
    c.integer(obj, "mrnas", f"{where}.mrnas", 0, None)
    filtered = obj["filtered_genes"]
    if not isinstance(filtered, dict) or sorted(filtered) != sorted(FILTERS):
        raise c.fail(
            f"{where}.filtered_genes",
            filtered,
            f"null or an object of counts ({', '.join(FILTERS)})",
        )
    for key in FILTERS:
        c.integer(filtered, key, f"{where}.filtered_genes.{key}", 0, None)


def _check_totals(c: _Checker, report: dict[str, Any]) -> dict[str, Any]:
    totals = c.typed(report, "totals", "totals", dict, "an object of counts")
    keys = ("records", "skipped_records", "bases", "features", "genes", "mrnas", "filtered_genes")
    extra = [k for k in totals if k not in keys]
    if extra:
        raise ReportFormatError(
            f"unknown key 'totals.{escape_text(extra[0])}', expected only {', '.join(keys)}",
            path=c.shown,
        )
    for key in keys[:4]:
        c.integer(totals, key, f"totals.{key}", 0, None)
    _check_gene_counts(c, totals, "totals")
    return totals


def read_group_records(
    report: dict[str, Any], folder: Path, shown: str, *, max_length: int | None = None
) -> TableRecords:
    """Every record of a checked report's records table: its SHA-256 first (the one the
    report records), then every row (:func:`seqstate.commands.records_table.read_table`),
    then its totals and first entries against the report's."""
    path = folder / report["records_table"]
    path_shown = escape_text(str(path))
    want = report["output_sha256"][report["records_table"]]
    found = file_sha256(path)
    if found != want:
        raise _wrong(
            path,
            None,
            f"SHA-256 {found}, expected {want} as run report '{shown}' records "
            "(the file changed after the run)",
        )
    table = read_table(path, path_shown, max_length=max_length)
    check_against_report(table, report, path_shown, shown)
    return table


#: Output kinds a report may list, by the end of the name after ``STEM``.
_KINDS = (".run.json", ".gff3", ".features.tsv", TABLE_SUFFIX, ".bedgraph", ".bw")


def _check_outputs(c: _Checker, outputs: list[Any], stem: str, folder: Path) -> list[str]:
    names: list[str] = []
    root = os.path.realpath(folder)
    for i, name in enumerate(outputs):
        where = f"outputs[{i}]"
        if not isinstance(name, str) or not name:
            raise c.fail(where, name, "a file name")
        if "/" in name or "\\" in name or "\0" in name or name in (".", ".."):
            raise c.fail(where, name, "a plain file name in the report's folder (no folder part)")
        if not name.startswith(stem + ".") or not name.endswith(_KINDS):
            raise c.fail(
                where,
                name,
                f"a name '{stem}.…' of an annotate output ({', '.join(_KINDS)}), "
                f"the report's stem being '{stem}'",
            )
        if name in names:
            raise c.fail(where, name, "each output once")
        names.append(name)
    for required in (".run.json", ".gff3", ".features.tsv", TABLE_SUFFIX):
        if stem + required not in names:
            raise ReportFormatError(
                f"'outputs' does not list '{escape_text(stem + required)}', expected every "
                "output of the run (the report, the GFF3, the feature and records tables "
                "at least)",
                path=c.shown,
            )
    for name in names:
        path = folder / name
        shown = escape_text(str(path))
        if os.path.dirname(os.path.realpath(path)) != root:
            raise ReportFormatError(
                f"output '{escape_text(name)}' leads out of the report's folder, expected a "
                "file of the folder",
                path=c.shown,
            )
        try:
            mode = os.stat(path).st_mode
        except FileNotFoundError:
            raise ReportFormatError(
                f"'{shown}', an output it lists, does not exist", path=c.shown
            ) from None
        except OSError as exc:
            raise ReportFormatError(
                f"'{shown}', an output it lists, cannot be read: {exc.strerror}", path=c.shown
            ) from None
        if not stat.S_ISREG(mode):
            raise ReportFormatError(
                f"'{shown}', an output it lists, is not a regular file", path=c.shown
            )
    return names


# ---------------------------------------------------------------- group files
def _text_lines(path: Path) -> Iterator[tuple[int, str]]:
    """``(0-based line number, line)`` of a UTF-8 text file.

    A line that is not UTF-8, or a last line without its line end, is an error.
    """
    shown = escape_text(str(path))
    with open(path, "rb") as fh:
        for n, raw in enumerate(fh):
            try:
                line = raw.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise ReportFormatError(
                    f"byte {exc.start + 1} is 0x{raw[exc.start]:02x}, not UTF-8: expected "
                    "UTF-8 text",
                    path=shown,
                    line0=n,
                ) from None
            if not line.endswith("\n"):
                raise ReportFormatError(
                    "the last line has no line end, expected a complete file", path=shown, line0=n
                )
            yield n, line


def _wrong(path: Path, line0: int | None, message: str) -> ReportFormatError:
    return ReportFormatError(message, path=escape_text(str(path)), line0=line0)


def _check_gff3(path: Path, records: list[dict[str, Any]]) -> None:
    """The version line, one ``##sequence-region`` line per record, ``#`` comments,
    then each record's features (as many as the report says, inside its span)."""
    regions = [
        f"##sequence-region {escape_seqid(r['id'])} {r['start_1based']} {r['end_1based']}\n"
        for r in records
    ]
    place = {escape_seqid(r["id"]): i for i, r in enumerate(records)}
    counts = [0] * len(records)
    at = 0  # the record of the last feature (features come in record order)
    n = -1
    for n, line in _text_lines(path):
        if n == 0:
            if line != "##gff-version 3\n":
                raise _wrong(path, n, f"{_kind(line.rstrip())}, expected '##gff-version 3'")
            continue
        if n <= len(regions):
            if line != regions[n - 1]:
                raise _wrong(
                    path,
                    n,
                    f"{_kind(line.rstrip())}, expected {regions[n - 1].rstrip()!r} "
                    "(the report's records, in order)",
                )
            continue
        if line.startswith("#"):
            if line.startswith("##"):
                raise _wrong(path, n, f"{_kind(line.rstrip())}, expected a feature line")
            continue
        cols = line.rstrip("\n").split("\t")
        if len(cols) != 9:
            raise _wrong(path, n, f"{len(cols)} column(s), expected 9 (a GFF3 feature line)")
        i = place.get(cols[0])
        if i is None or i < at:
            raise _wrong(
                path,
                n,
                f"seqid {escape_text(cols[0])!r}, expected a record of the run report, "
                "in the report's order",
            )
        at = i
        rec = records[i]
        ok = cols[3].isdigit() and cols[4].isdigit()
        if not ok or not rec["start_1based"] <= int(cols[3]) <= int(cols[4]) <= rec["end_1based"]:
            raise _wrong(
                path,
                n,
                f"feature at {escape_text(cols[3])}-{escape_text(cols[4])}, expected "
                f"{rec['start_1based']} <= start <= end <= {rec['end_1based']} "
                "(the record's span in the report)",
            )
        counts[i] += 1
    if n < len(regions):
        raise _wrong(
            path,
            None,
            f"{max(n, 0)} sequence-region line(s), expected {len(regions)} (one per record)",
        )
    for rec, count in zip(records, counts):
        if count != rec["features"]:
            raise _wrong(
                path,
                None,
                f"{count} feature line(s) on record '{escape_text(rec['id'])}', expected "
                f"{rec['features']} (the run report's 'features')",
            )


def _check_table(path: Path, records: list[dict[str, Any]]) -> None:
    """A header line, then one row per feature of the report, each with its columns."""
    width = 0
    rows = 0
    for n, line in _text_lines(path):
        cols = line.count("\t") + 1
        if n == 0:
            width = cols
            continue
        if cols != width:
            raise _wrong(path, n, f"{cols} column(s), expected {width} (as the header line)")
        rows += 1
    want = sum(r["features"] for r in records)
    if width == 0 or rows != want:
        raise _wrong(
            path, None, f"{rows} row(s), expected {want} (the run report's features, one row each)"
        )


def _check_bedgraph(path: Path, records: list[dict[str, Any]]) -> None:
    """A track line, then ``chrom start end value`` lines on the report's records, in
    order, inside each record's span (0-based half-open)."""
    place = {tracks.escape_text(r["id"]): i for i, r in enumerate(records)}
    at = 0
    n = -1
    for n, line in _text_lines(path):
        if n == 0:
            if not line.startswith("track type=bedGraph"):
                raise _wrong(path, n, f"{_kind(line.rstrip())}, expected a bedGraph track line")
            continue
        cols = line.rstrip("\n").split("\t")
        i = place.get(cols[0]) if len(cols) == 4 else None
        if i is None or i < at:
            raise _wrong(
                path,
                n,
                f"{_kind(line.rstrip())}, expected 'chrom start end value' on a record of the "
                "run report, in the report's order",
            )
        at = i
        rec = records[i]
        ok = cols[1].isdigit() and cols[2].isdigit()
        lo, hi = rec["start_1based"] - 1, rec["end_1based"]
        if not ok or not lo <= int(cols[1]) < int(cols[2]) <= hi:
            raise _wrong(
                path,
                n,
                f"interval {escape_text(cols[1])}-{escape_text(cols[2])}, expected "
                f"{lo} <= start < end <= {hi} (the record's span in the report, 0-based)",
            )
    if n < 0:
        raise _wrong(path, None, "an empty file, expected a bedGraph track line")


def _check_bigwig_layout(path: Path) -> None:
    """The fixed header of a bigWig (Kent et al. 2010, Bioinformatics 26:2204; the
    layout of the UCSC format description) and that every offset it and its zoom
    headers give lies inside the file, with the chromosome tree and the data index
    where they say: a file cut short or not a bigWig is refused here, before the
    reading library (which does not check) is handed it."""
    size = path.stat().st_size
    with open(path, "rb") as fh:
        head = fh.read(64)
        if head[:4] != BIGWIG_MAGIC:
            raise _wrong(
                path, None, f"first bytes {head[:4].hex() or 'none'}, expected a bigWig file"
            )
        if len(head) < 64:
            raise _wrong(path, None, f"{size} bytes, expected a bigWig header of 64 bytes")
        zooms = int.from_bytes(head[6:8], "little")
        chrom_tree, data, index = (int.from_bytes(head[k : k + 8], "little") for k in (8, 16, 24))
        summary = int.from_bytes(head[44:52], "little")
        zoom_heads = fh.read(24 * zooms)
        offsets = [chrom_tree, data, index] + ([summary] if summary else [])
        for z in range(len(zoom_heads) // 24):
            entry = zoom_heads[24 * z : 24 * z + 24]
            offsets += [
                int.from_bytes(entry[8:16], "little"),
                int.from_bytes(entry[16:24], "little"),
            ]
        magics = {}
        for offset, magic in ((chrom_tree, 0x78CA8C91), (index, 0x2468ACE0)):
            fh.seek(min(offset, size))
            magics[offset] = (fh.read(4), magic.to_bytes(4, "little"))
    if len(zoom_heads) < 24 * zooms or any(not 64 <= o < size for o in offsets):
        raise _wrong(
            path,
            None,
            f"{size} bytes, an offset of its header past them: expected a whole bigWig file",
        )
    if any(found != want for found, want in magics.values()):
        raise _wrong(path, None, "no chromosome tree or data index where its header says")


def _check_bigwig(path: Path, records: list[dict[str, Any]]) -> None:
    """The bigWig magic number, then (pyBigWig) one chromosome per record of the
    report with the record's length."""
    _check_bigwig_layout(path)
    module = tracks._import_pybigwig()
    try:
        bw = module.open(str(path))
    except (RuntimeError, OSError):
        bw = None
    if bw is None:
        raise _wrong(path, None, "cannot be read as a bigWig file, expected one")
    try:
        try:
            chroms = dict(bw.chroms()) if bw.isBigWig() else None
        except (RuntimeError, OSError):
            chroms = None
    finally:
        bw.close()
    want = {tracks.escape_text(r["id"]): int(r["length"]) for r in records}
    if chroms != want:
        found = "no readable header" if chroms is None else f"{len(chroms)} chromosome(s)"
        raise _wrong(
            path,
            None,
            f"{found}, expected the run report's {len(want)} record(s) with their lengths",
        )


_CHECKS: dict[str, Callable[[Path, list[dict[str, Any]]], None]] = {
    ".gff3": _check_gff3,
    ".features.tsv": _check_table,
    ".bedgraph": _check_bedgraph,
    ".bw": _check_bigwig,
}


def check_group_files(
    report: dict[str, Any],
    folder: Path,
    names: Sequence[str],
    shown: str,
    records: list[dict[str, Any]],
) -> None:
    """Check every output of a checked report (see the module docstring) against
    ``records`` (every annotated record, from its records table): first its checksum
    (so no library reads a changed file), then UTF-8 and the lines or entries the
    records imply.  The records table itself is checked by :func:`read_group_records`."""
    sums = report["output_sha256"]
    for name in names:
        check = next((f for end, f in _CHECKS.items() if name.endswith(end)), None)
        if check is None:  # the report itself, the records table
            continue
        path = folder / name
        found = file_sha256(path)
        if found != sums[name]:
            raise _wrong(
                path,
                None,
                f"SHA-256 {found}, expected {sums[name]} as run report '{shown}' records "
                "(the file changed after the run)",
            )
        check(path, records)
