"""The files a checked annotate run report lists, checked against it (``seqstate merge``).

:func:`check_group_files` reads each output of a report that
:func:`seqstate.commands.runreport.check_report` accepted: first its SHA-256 checksum
(``output_sha256``; so no library reads a changed file), then UTF-8 text and the lines
or entries the run's records imply (records, their spans, features and mRNAs per
record).  The compressed and index copies of ``--index-outputs`` (``NAME.gz``,
``NAME.gz.tbi``, ``NAME.gz.csi``) are checked by checksum only: merge makes them again
from the gathered plain files and never reads them.  Every failure is one
:class:`~seqstate.commands.runreport.ReportFormatError` line naming the file (and the
line), what was found and what was expected.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import Any

from seqstate.commands.records_table import TABLE_SUFFIX
from seqstate.commands.runreport import (
    BIGWIG_MAGIC,
    ReportFormatError,
    _kind,
    _wrong,
    file_sha256,
)
from seqstate.errors import escape_text
from seqstate.io import tracks
from seqstate.io.gff3 import escape_seqid

__all__ = ["check_group_files", "output_role"]


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


def _mrnas(records: list[dict[str, Any]]) -> int:
    """mRNAs the records wrote (0 for records of a model without genes)."""
    return sum(int(r.get("mrnas") or 0) for r in records)


_FASTA_NAME = re.compile(r"(.+)\.mRNA\.[0-9]+")


def _check_gene_fasta(path: Path, records: list[dict[str, Any]]) -> None:
    """A CDS or protein FASTA (:mod:`seqstate.io.cds`): one record per mRNA of the
    report, named ``ID.mRNA.N`` on the report's records in their order."""
    place = {r["id"]: i for i, r in enumerate(records)}
    at = 0
    count = 0
    for n, line in _text_lines(path):
        if not line.startswith(">"):
            if n == 0 or line == "\n":
                raise _wrong(path, n, f"{_kind(line.rstrip())}, expected a FASTA header line")
            continue
        name = line[1:].split(" ", 1)[0].rstrip("\n")
        m = _FASTA_NAME.fullmatch(name)
        i = place.get(m.group(1)) if m else None
        if i is None or i < at:
            raise _wrong(
                path,
                n,
                f"record name {escape_text(name)!r}, expected ID.mRNA.N on a record of the "
                "run report, in the report's order",
            )
        at = i
        count += 1
    if count != _mrnas(records):
        raise _wrong(
            path,
            None,
            f"{count} FASTA record(s), expected {_mrnas(records)} (the run report's mRNAs, "
            "one record each)",
        )


def _check_gene_lines(
    path: Path, records: list[dict[str, Any]], columns: int, header: str | None
) -> int:
    """Lines of ``columns`` tab-separated cells on the report's records in order (after
    the ``header`` line when given); returns the number of such lines."""
    place = {tracks.escape_text(r["id"]): i for i, r in enumerate(records)}
    at = 0
    rows = 0
    for n, line in _text_lines(path):
        if n == 0 and header is not None:
            if line != header:
                raise _wrong(path, n, f"{_kind(line.rstrip())}, expected {header.strip()!r}")
            continue
        cols = line.rstrip("\n").split("\t")
        i = place.get(cols[0]) if len(cols) == columns else None
        if i is None or i < at:
            raise _wrong(
                path,
                n,
                f"{_kind(line.rstrip())}, expected {columns} columns on a record of the run "
                "report, in the report's order",
            )
        at = i
        rows += 1
    if header is not None and rows == 0 and not path.stat().st_size:
        raise _wrong(path, None, f"an empty file, expected the line {header.strip()!r}")
    return rows


def _check_bed12(path: Path, records: list[dict[str, Any]]) -> None:
    """A BED12 of gene structures: one line per mRNA of the report, on its records."""
    rows = _check_gene_lines(path, records, 12, None)
    if rows != _mrnas(records):
        raise _wrong(
            path,
            None,
            f"{rows} line(s), expected {_mrnas(records)} (the run report's mRNAs, one each)",
        )


def _check_gtf(path: Path, records: list[dict[str, Any]]) -> None:
    """A GTF 2.2 of gene structures: its version line, then 9-column lines on the
    report's records in order (none when the run wrote no mRNA)."""
    rows = _check_gene_lines(path, records, 9, "#gtf-version 2.2\n")
    if (rows == 0) != (_mrnas(records) == 0):
        raise _wrong(
            path,
            None,
            f"{rows} line(s), expected the lines of the run report's {_mrnas(records)} mRNA(s)",
        )


_Check = Callable[[Path, list[dict[str, Any]]], None]

#: Structure checks by output role (:func:`output_role`); roles without one (the report,
#: the records table, the compressed and index copies) are checked by checksum only.
_CHECKS: dict[str, _Check] = {
    ".gff3": _check_gff3,
    ".features.tsv": _check_table,
    ".bedgraph": _check_bedgraph,
    ".bw": _check_bigwig,
    "cds": _check_gene_fasta,
    "proteins": _check_gene_fasta,
    ".genes.bed": _check_bed12,
    ".genes.gtf": _check_gtf,
}

#: How the names of the indexed copies end (checked by checksum only).
INDEXED_ENDS = (".gz", ".gz.tbi", ".gz.csi")


def output_role(report: dict[str, Any], stem: str, name: str) -> str:
    """What output ``name`` of a checked report is: ``cds`` or ``proteins`` (the
    names its options ``cds``/``proteins`` give), ``report`` (its HTML page), else the
    name after the report's ``stem`` (``.gff3``, ``.CDS.plus.bedgraph.gz.tbi``, ...)."""
    options = report["options"]
    for role in ("cds", "proteins", "report"):
        if options.get(role) is not None and name == options[role]:
            return role
    return name[len(stem) :]


def _check_of(role: str) -> _Check | None:
    if role in _CHECKS:
        return _CHECKS[role]
    if role.endswith(INDEXED_ENDS):
        return None
    return next((f for end, f in _CHECKS.items() if role.endswith(end)), None)


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
    stem = report["records_table"][: -len(TABLE_SUFFIX)]
    for name in names:
        if name not in sums:  # the report itself
            continue
        check = _check_of(output_role(report, stem, name))
        path = folder / name
        found = file_sha256(path)
        if found != sums[name]:
            raise _wrong(
                path,
                None,
                f"SHA-256 {found}, expected {sums[name]} as run report '{shown}' records "
                "(the file changed after the run)",
            )
        if check is not None:
            check(path, records)
