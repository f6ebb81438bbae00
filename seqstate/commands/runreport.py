"""Run reports of ``seqstate annotate`` read back, and the files they list checked.

A run report (``STEM.run.json``) read by another command (``seqstate merge``) is
input like any other: :func:`read_report` parses it with a bounded nesting depth
and :func:`check_report` checks every field against the one schema annotate
writes (types, ranges, output names that are plain file names of the report's
folder).  :func:`seqstate.commands.groupfiles.check_group_files` then reads each
listed file once and checks it against the report.  The records come from the
run's records table (:func:`read_group_records`: every record, checked against
the report's ``totals`` and first entries).  Every
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
from collections.abc import Sequence
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
    names = _check_outputs(c, report, outputs, stem, folder)
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


#: Output kinds a report may list, by the end of the name after ``STEM`` (besides the
#: files its options ``cds``, ``proteins`` and ``report`` name).
_PLAIN_KINDS = (".run.json", ".gff3", ".features.tsv", TABLE_SUFFIX, ".bedgraph", ".bw")
#: Gene structures (``--gene-formats``), and the kinds ``--index-outputs`` copies.
_GENE_KINDS = (".genes.bed", ".genes.gtf")
_INDEXED = tuple(
    kind + end
    for kind in (".gff3", ".bedgraph", *_GENE_KINDS)
    for end in (".gz", ".gz.tbi", ".gz.csi")
)
_KINDS = _PLAIN_KINDS + _GENE_KINDS + _INDEXED
#: Outputs every annotate run writes (after ``STEM``).
_REQUIRED = (".run.json", ".gff3", ".features.tsv", TABLE_SUFFIX)
#: Options of a report that name an output file of the run's folder (or are null).
NAMED_OUTPUTS = ("cds", "proteins", "report")


def _plain_name(c: _Checker, where: str, name: Any) -> str:
    if not isinstance(name, str) or not name:
        raise c.fail(where, name, "a file name")
    if "/" in name or "\\" in name or "\0" in name or name in (".", ".."):
        raise c.fail(where, name, "a plain file name in the report's folder (no folder part)")
    return name


def _check_outputs(
    c: _Checker, report: dict[str, Any], outputs: list[Any], stem: str, folder: Path
) -> list[str]:
    names: list[str] = []
    root = os.path.realpath(folder)
    named: dict[str, str] = {}
    for option in NAMED_OUTPUTS:
        value = report["options"].get(option)
        if value is not None:
            named[option] = _plain_name(c, f"options.{option}", value)
            own = [stem + end for end in _REQUIRED]
            if value in own or list(named.values()).count(value) > 1:
                raise c.fail(
                    f"options.{option}",
                    value,
                    f"a file name of its own (not {', '.join(own)} nor another option's)",
                )
    for i, name in enumerate(outputs):
        where = f"outputs[{i}]"
        _plain_name(c, where, name)
        if name in named.values():
            pass  # the CDS, protein or HTML file its options name
        elif not name.startswith(stem + ".") or not name.endswith(_KINDS):
            raise c.fail(
                where,
                name,
                f"a name '{stem}.…' of an annotate output ({', '.join(_KINDS)}), "
                f"the report's stem being '{stem}'",
            )
        if name in names:
            raise c.fail(where, name, "each output once")
        names.append(name)
    for option, name in named.items():
        if name not in names:
            raise ReportFormatError(
                f"'outputs' does not list '{escape_text(name)}', the file of "
                f"'options.{option}', expected every output of the run",
                path=c.shown,
            )
    for required in _REQUIRED:
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


def _wrong(path: Path, line0: int | None, message: str) -> ReportFormatError:
    return ReportFormatError(message, path=escape_text(str(path)), line0=line0)
