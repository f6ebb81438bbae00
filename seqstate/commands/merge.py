"""``seqstate merge``: gather annotate runs on groups of records into one output set.

The inputs are the run reports (``STEM.run.json``) of ``seqstate annotate
--records ...`` runs on the same FASTA with the same model and options, each
group a consecutive stretch of the FASTA's records.  The FASTA (``--fasta``, by
default the ``input`` the groups' reports name) says what the gathered set must
hold: every one of its records (header-only records included) in exactly one
group.  Its record IDs are read from its ``.fai`` index when it has one, else
from its header lines (the bases are skipped, memory is one block).  Groups given
in another order are gathered in the FASTA's order; a record in no group, in two
groups, not in the FASTA, or a group whose records are not one consecutive
stretch of the FASTA is an error naming the records.  The gathered set is then
byte-identical to the output of one ``seqstate annotate`` of the whole file with
the same stem:

- GFF3: ``##gff-version 3``, every ``##sequence-region`` line of every group in
  order, the ``#`` comment lines of the header once (every group must have the
  same ones: tool and version, model name and checksum), then the feature lines
  of every group in order;
- feature TSV and bedGraph tracks: the header (track) line once, then the rows
  of every group in order;
- bigWig tracks: one file with every record's header entry and the merged runs
  read back from the group files (pyBigWig);
- records table: the header line once, then every group's rows in order;
- gene models (:mod:`seqstate.commands.merge_outputs`): the CDS and protein FASTA
  (``--cds``/``--proteins``) and ``STEM.genes.bed`` whole, one group after another;
  ``STEM.genes.gtf`` its version line once, then every group's lines; the
  ``--index-outputs`` copies (``NAME.gz`` + ``.tbi``/``.csi``) made again from the
  gathered plain files.  Which of them are written is read from the groups' reports
  (their options), which must agree; a group run with ``--report`` (an HTML page of
  one run) is refused: the page is made by annotating the whole assembly;
- run report: the groups' report with ``totals`` added up and ``records`` and
  ``skipped_records`` the first ``records_limit`` entries of the groups' in order
  (each group lists its first ones, so the gathered first ones are among them).
  Its fields equal those of a direct run except the ones
  that describe how a run was invoked rather than what it computed:
  ``command_line`` (the merge's), and in ``options`` the keys of
  :data:`INVOCATION_OPTIONS` (``out_dir`` and ``force`` of the merge, ``records``
  None as in a run on every record, ``stem`` the merge's ``--stem`` if given, else
  the first group's; ``jobs`` as the first group gave it).

Everything is checked before anything is written: every report against the
one schema of annotate's reports and every file it lists against the report
(:mod:`seqstate.commands.runreport`: types and ranges, plain file names of the
group's folder, the SHA-256 checksums annotate records, UTF-8, records and
feature counts), every group's records table row by row (types, ranges, escaping,
its totals and first entries against the report:
:mod:`seqstate.commands.records_table`), the groups agree on every other field of
their reports and on their output files, and the records are those of the
FASTA.  The gathered report records the checksums of the gathered files.
Reports of an older schema (no records table) are refused.  Nothing here reads
bases.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, TextIO

from seqstate.commands import merge_outputs as mo
from seqstate.commands.annotate import REPORT_SCHEMA, check_stem
from seqstate.commands.groupfiles import check_group_files, output_role
from seqstate.commands.inputs import read_set
from seqstate.commands.records import id_listing
from seqstate.commands.records_table import TABLE_SUFFIX, TableRecords, Totals
from seqstate.commands.runreport import (
    BIGWIG_MAX_LENGTH,
    ReportFormatError,
    check_report,
    output_checksums,
    read_group_records,
    read_report,
)
from seqstate.errors import UsageError, escape_text
from seqstate.io import faidx, files, indexed, tracks
from seqstate.io.atomic import OutputSet, check_outputs

#: ``options`` keys of a run report that say how a run was invoked (they may differ
#: between the groups; see the module docstring for the value the gathered report takes).
INVOCATION_OPTIONS = ("out_dir", "force", "records", "stem", "jobs")

#: Report keys that are the groups' own (the rest must be equal in every group).
OWN_KEYS = (
    "command_line",
    "options",
    "totals",
    "records_table",
    "records_truncated",
    "records",
    "skipped_records",
    "outputs",
    "output_sha256",
)

REPORT_SUFFIX = ".run.json"

#: Bytes of the FASTA read at a time when its record IDs come from its header lines.
_SCAN_BYTES = 1 << 22


@dataclass
class MergeOptions:
    """What ``seqstate merge`` was asked to do."""

    #: run reports (``STEM.run.json``) of the groups, in the FASTA's record order
    reports: list[str]
    out_dir: str = "seqstate-out"
    #: file names of the gathered set; default: the groups' common stem
    stem: str | None = None
    #: the FASTA the groups annotated (None: the ``input`` their reports name)
    fasta: str | None = None
    force: bool = False
    command_line: list[str] = field(default_factory=list)


@dataclass
class MergeReport:
    """What a merge wrote."""

    groups: int
    records: int
    features: int
    out_dir: str
    outputs: list[str]
    #: the groups were given in another order than the FASTA's and gathered in its order
    reordered: bool = False

    def summary(self) -> str:
        """The summary line (after ``seqstate: ``)."""
        order = " (gathered in the FASTA's record order)" if self.reordered else ""
        return (
            f"{self.groups} group(s), {self.records} record(s), {self.features} features "
            f"-> {self.out_dir}/{order}"
        )


@dataclass
class _Group:
    """One group's run report and where its files are."""

    report_path: Path
    stem: str
    report: dict[str, Any]
    #: the report's outputs, checked (plain names of its folder)
    names: list[str] = field(default_factory=list)
    #: every record of its records table, checked against the report
    table: TableRecords = field(default_factory=lambda: TableRecords([], [], Totals(), [], []))

    def rows(self) -> list[tuple[int, str]]:
        """``(0-based line, record ID)`` of every row of the records table, in its order."""
        t = self.table
        rows = [(n, e["id"]) for n, e in zip(t.record_lines, t.records)]
        rows += [(n, e["id"]) for n, e in zip(t.skipped_lines, t.skipped)]
        return sorted(rows)

    @property
    def ids(self) -> list[str]:
        """Every record ID of the group (annotated and skipped), in table order."""
        return [rid for _, rid in self.rows()]

    def file(self, suffix: str) -> Path:
        """The group's output of role ``suffix`` (``.gff3``, ..., ``cds``, ``proteins``)."""
        if suffix in mo.DEFAULT_SUFFIX:
            return self.report_path.parent / self.report["options"][suffix]
        return self.report_path.parent / f"{self.stem}{suffix}"

    @property
    def shown(self) -> str:
        return escape_text(str(self.report_path))


def _load_group(path: str) -> _Group:
    shown = escape_text(path)
    p = Path(path)
    if not p.name.endswith(REPORT_SUFFIX) or p.name == REPORT_SUFFIX:
        raise UsageError(f"'{shown}' is not a run report (expected a file STEM{REPORT_SUFFIX})")
    try:
        report = read_report(p, shown)
    except FileNotFoundError:
        raise UsageError(f"run report '{shown}' does not exist") from None
    except OSError as exc:
        reason = exc.strerror or str(exc)
        raise UsageError(f"run report '{shown}' cannot be read: {reason}") from None
    stem = p.name[: -len(REPORT_SUFFIX)]
    names = check_report(report, shown, REPORT_SCHEMA, stem, p.parent)
    page = report["options"].get("report")
    if page is not None:
        raise UsageError(
            f"run report '{shown}' lists the HTML page '{escape_text(page)}' (--report), "
            "which merge cannot gather (it shows one run's records and figures): annotate "
            "the groups without --report and run --report on the whole assembly"
        )
    high = BIGWIG_MAX_LENGTH if any(n.endswith(".bw") for n in names) else None
    table = read_group_records(report, p.parent, shown, max_length=high)
    return _Group(p, stem, report, names, table)


def _suffixes(group: _Group) -> list[str]:
    """The group's output roles in report order: the names without its stem (``.gff3``,
    ...), ``cds`` and ``proteins`` for its CDS and protein FASTA
    (:func:`seqstate.commands.groupfiles.output_role`)."""
    return [output_role(group.report, group.stem, name) for name in group.names]


def _check_groups(groups: list[_Group]) -> list[str]:
    """Every group agrees with the first; no record twice; every file exists.

    Returns the output suffixes (without the stem).
    """
    first = groups[0]
    suffixes = _suffixes(first)
    for g in groups[1:]:
        a, b = first.report["options"], g.report["options"]
        differ = mo.output_difference(a, first.stem, b, g.stem)
        if differ is not None:
            option, was_a, was_b = differ
            raise UsageError(
                f"run report '{g.shown}' was run {was_b} and '{first.shown}' {was_a}: "
                "groups must write the same outputs (annotate every group with the same "
                "options)"
            )
        for key in sorted(set(a) | set(b)):
            if key in mo.OUTPUT_OPTIONS:
                continue
            if key not in INVOCATION_OPTIONS and a.get(key) != b.get(key):
                raise UsageError(
                    f"run reports '{first.shown}' and '{g.shown}' differ in option '{key}' "
                    f"({a.get(key)!r} and {b.get(key)!r}): groups must use the same options"
                )
        for key in sorted(set(first.report) | set(g.report)):
            if key in OWN_KEYS:
                continue
            if first.report.get(key) != g.report.get(key):
                raise UsageError(
                    f"run reports '{first.shown}' and '{g.shown}' differ in '{key}': "
                    "groups must be runs of the same version, model and options"
                )
        if sorted(map(mo.same_kind, _suffixes(g))) != sorted(map(mo.same_kind, suffixes)):
            raise UsageError(
                f"run reports '{first.shown}' and '{g.shown}' list different output files "
                "(groups must write the same tracks)"
            )
    seen: dict[str, str] = {}
    for g in groups:
        if g.report["options"].get("region") is not None:
            raise UsageError(
                f"run report '{g.shown}' is a --region run: only whole records can be gathered"
            )
        for rec, line0 in zip(g.table.records, g.table.record_lines):
            if rec["start_1based"] != 1 or rec["end_1based"] != rec["length"]:
                raise ReportFormatError(
                    f"record '{escape_text(rec['id'])}' spans {rec['start_1based']}-"
                    f"{rec['end_1based']}, expected the whole record 1-{rec['length']} (only "
                    "whole records can be gathered)",
                    path=escape_text(str(g.file(TABLE_SUFFIX))),
                    line0=line0,
                )
        for rid in g.ids:
            if rid in seen:
                raise UsageError(
                    f"record '{escape_text(rid)}' is in two groups: '{seen[rid]}' and '{g.shown}'"
                )
            seen[rid] = g.shown
    return suffixes


def _fasta_of(groups: list[_Group], given: str | None) -> str:
    """The FASTA whose records the groups must cover: ``--fasta``, else the groups' input."""
    if given is not None:
        path = given
    else:
        path = groups[0].report["options"].get("input")
        if not isinstance(path, str) or path == "-":
            raise UsageError(
                f"run report '{groups[0].shown}' names no FASTA file (standard input?): "
                "give --fasta FILE, the FASTA the groups annotated"
            )
        if not Path(path).is_file():
            raise UsageError(
                f"FASTA '{escape_text(path)}', the input of run report '{groups[0].shown}', "
                "does not exist here: give --fasta FILE, the FASTA the groups annotated"
            )
    if path == "-":
        raise UsageError("--fasta -: the FASTA's record IDs cannot be read from standard input")
    return path


def fasta_record_ids(path: str) -> list[str]:
    """Every record ID of a FASTA file, in file order (header-only records included).

    From the checked ``.fai`` index when the file has one (a stale index is an error,
    as on every command); else from the header lines, read in blocks of
    :data:`_SCAN_BYTES` (plain or gzip; the bases are skipped, never kept).  An ID is
    the first word of its header, as the FASTA reader takes it.
    """
    index = faidx.load_index(path, build=False, alphabet_check=None)
    if index is not None:
        return list(index.entries)
    ids: list[str] = []
    shown = files.display_name(path)
    with files.open_input(path) as handle:
        buf = b"\n"  # a header on the first line follows a line end too
        while True:
            try:
                chunk = handle.read(_SCAN_BYTES)
            except files.READ_ERRORS as exc:
                raise files.read_error(exc, shown, UsageError) from None
            buf += chunk
            pos, cut = 0, -1
            while (k := buf.find(b"\n>", pos)) >= 0:
                end = buf.find(b"\n", k + 2)
                if end < 0:
                    if chunk:  # the header line goes on in the next block
                        cut = k
                        break
                    end = len(buf)
                words = buf[k + 2 : end].decode("utf-8", errors="replace").split(None, 1)
                ids.append(words[0] if words else "")
                pos = end
            if not chunk:
                return ids
            buf = buf[cut:] if cut >= 0 else buf[-1:]


def _in_fasta_order(groups: list[_Group], fasta: str) -> tuple[list[_Group], bool]:
    """The groups sorted into the FASTA's record order, and whether that changed their order.

    Raises :class:`UsageError` for a record of a group that is not in the FASTA, a
    record of the FASTA in no group (the names, shortened), and a group whose
    records are not one consecutive stretch of the FASTA's records.  (A record in
    two groups is refused before, by :func:`_check_groups`.)
    """
    shown = escape_text(fasta)
    ids = fasta_record_ids(fasta)
    place = {rid: i for i, rid in enumerate(ids)}
    starts: list[int] = []
    for g in groups:
        held = g.ids
        unknown = [rid for rid in held if rid not in place]
        if unknown:
            raise UsageError(
                f"run report '{g.shown}' has record(s) {id_listing(unknown)} that FASTA "
                f"'{shown}' does not have: the groups must be runs on this FASTA (--fasta)"
            )
        previous = -1
        for line0, rid in g.rows():
            if place[rid] < previous:
                raise ReportFormatError(
                    f"record '{escape_text(rid)}' comes after record "
                    f"'{escape_text(ids[previous])}', expected the FASTA's record order",
                    path=escape_text(str(g.file(TABLE_SUFFIX))),
                    line0=line0,
                )
            previous = place[rid]
        at = sorted(place[rid] for rid in held)
        for a, b in zip(at, at[1:]):
            if b != a + 1:
                raise UsageError(
                    f"run report '{g.shown}' holds records '{escape_text(ids[a])}' and "
                    f"'{escape_text(ids[b])}' but not the {b - a - 1} record(s) between them "
                    f"in FASTA '{shown}' ({id_listing(ids[a + 1 : b])}): each group must be "
                    "a consecutive stretch of the FASTA's records"
                )
        starts.append(at[0] if at else len(ids))
    covered = {rid for g in groups for rid in g.ids}
    missing = [rid for rid in ids if rid not in covered]
    if missing:
        raise UsageError(
            f"FASTA '{shown}' has {len(missing)} record(s) in no group: {id_listing(missing)} "
            "(expected every record in one group; give the run reports of every group)"
        )
    order = sorted(range(len(groups)), key=lambda i: starts[i])
    return [groups[i] for i in order], order != list(range(len(groups)))


def _lines(path: Path) -> Iterator[str]:
    with open(path, encoding="utf-8", newline="") as fh:
        yield from fh


def _first_line(path: Path) -> str:
    with open(path, encoding="utf-8", newline="") as fh:
        return fh.readline()


_GFF_VERSION = "##gff-version 3\n"


@dataclass
class _GffHeader:
    """The header of one group's GFF3: its ``##sequence-region`` lines, its ``#``
    comment lines (``KEY VALUE``) and how many lines the header has."""

    regions: list[str]
    comments: list[str]
    lines: int


def _gff3_header(path: Path) -> _GffHeader:
    """Read the header of an annotate GFF3 (the version line, then ``##sequence-region``
    lines, then ``#`` comment lines, up to the first feature)."""
    regions: list[str] = []
    comments: list[str] = []
    n = 0
    for line in _lines(path):
        if n == 0:
            if line != _GFF_VERSION:
                raise UsageError(
                    f"'{escape_text(str(path))}' line 1: expected {_GFF_VERSION.strip()!r}"
                )
        elif line.startswith("##sequence-region ") and not comments:
            regions.append(line)
        elif line.startswith("#") and not line.startswith("##"):
            comments.append(line)
        else:
            break
        n += 1
    return _GffHeader(regions, comments, n)


def _comment_key(line: str) -> str:
    return line[1:].strip().split(None, 1)[0] if line[1:].strip() else ""


def _gff3_headers(groups: list[_Group], suffix: str) -> list[_GffHeader]:
    """Every group's GFF3 header; their comment lines must be the same (the first
    group's are written once): a differing model checksum, model or tool is an error."""
    headers = [_gff3_header(g.file(suffix)) for g in groups]
    first = headers[0].comments
    for g, h in zip(groups[1:], headers[1:]):
        if h.comments == first:
            continue
        a = {_comment_key(line): line.strip() for line in first}
        b = {_comment_key(line): line.strip() for line in h.comments}
        key = next((k for k in [*a, *b] if a.get(k) != b.get(k)), "")
        raise UsageError(
            f"'{escape_text(str(g.file(suffix)))}' and "
            f"'{escape_text(str(groups[0].file(suffix)))}' differ in their '# {key}' header "
            f"line ({escape_text(b.get(key, 'none'))!r} and {escape_text(a.get(key, 'none'))!r}): "
            "groups must be runs of the same tool version and model"
        )
    return headers


def _write_gff3(groups: list[_Group], suffix: str, headers: list[_GffHeader], out: TextIO) -> None:
    """The version line, every group's ``##sequence-region`` lines, the comment lines
    once, then every group's features."""
    out.write(_GFF_VERSION)
    for h in headers:
        out.writelines(h.regions)
    out.writelines(headers[0].comments)
    for g, h in zip(groups, headers):
        for i, line in enumerate(_lines(g.file(suffix))):
            if i >= h.lines:
                out.write(line)


def _check_table_headers(groups: list[_Group], suffix: str) -> None:
    """Every group's header (or track) line is the first group's."""
    header = _first_line(groups[0].file(suffix))
    for g in groups:
        path = g.file(suffix)
        if _first_line(path) != header:
            raise UsageError(
                f"'{escape_text(str(path))}' line 1 differs from "
                f"'{escape_text(str(groups[0].file(suffix)))}' line 1 (expected the same header)"
            )


def _write_table(groups: list[_Group], suffix: str, out: TextIO) -> None:
    """Header (or track) line once, then every group's rows (headers checked before)."""
    out.write(_first_line(groups[0].file(suffix)))
    for g in groups:
        lines = _lines(g.file(suffix))
        next(lines, None)
        for line in lines:
            out.write(line)


def _write_whole(groups: list[_Group], suffix: str, out: TextIO) -> None:
    """Every group's file whole, in order (the CDS and protein FASTA, the BED12)."""
    for g in groups:
        out.writelines(_lines(g.file(suffix)))


def _write_bigwig(groups: list[_Group], suffix: str, path: Path) -> None:
    """One bigWig of every group's records, with the entries of the group files.

    The records come in the groups' order with their lengths from the run
    reports, and the entries are handed to the library in the blocks the
    annotate writer uses, so the file equals a direct run's.
    """
    module = tracks._import_pybigwig()
    sizes = [(r["id"], int(r["length"])) for g in groups for r in g.table.records]
    out = module.open(str(path), "w")
    if out is None:
        raise OSError(f"pyBigWig could not open {str(path)!r} for writing")
    try:
        out.addHeader([(escape_text(rid), n) for rid, n in sizes])
        for g in groups:
            src_path = g.file(suffix)
            src = module.open(str(src_path))
            if src is None:
                raise ReportFormatError("cannot be read as a bigWig file", path=str(src_path))
            try:
                for r in g.table.records:
                    name = escape_text(r["id"])
                    try:
                        runs = src.intervals(name) or ()
                    except RuntimeError:
                        raise ReportFormatError(
                            f"the entries of record '{name}' cannot be read, expected a bigWig",
                            path=str(src_path),
                        ) from None
                    for lo in range(0, len(runs), tracks._ENTRIES):
                        block = runs[lo : lo + tracks._ENTRIES]
                        out.addEntries(
                            [name] * len(block),
                            [s for s, _, _ in block],
                            ends=[e for _, e, _ in block],
                            values=[v for _, _, v in block],
                        )
            finally:
                src.close()
    finally:
        out.close()


def merge(opts: MergeOptions) -> MergeReport:
    """Gather the groups' outputs into ``opts.out_dir`` (see the module docstring)."""
    if not opts.reports:
        raise UsageError("no run report given: expected one STEM.run.json per group")
    if not opts.out_dir:
        raise UsageError("-o/--out is empty: expected a folder name")
    groups = [_load_group(p) for p in opts.reports]
    suffixes = _check_groups(groups)
    stems = {g.stem for g in groups}
    if opts.stem is not None:
        stem = check_stem(opts.stem)
    elif len(stems) == 1:
        stem = groups[0].stem
    else:
        raise UsageError(
            f"the run reports have different stems ({', '.join(sorted(stems))}): give --stem"
        )
    fasta = _fasta_of(groups, opts.fasta)
    groups, reordered = _in_fasta_order(groups, fasta)
    if any(s.endswith(".bw") for s in suffixes):
        tracks.require_bigwig()
    bases = mo.indexed_bases(suffixes)
    if bases:
        indexed.require_pysam()
    for g in groups:
        check_group_files(g.report, g.report_path.parent, g.names, g.shown, g.table.records)
    for s in suffixes:
        if s.endswith((".features.tsv", TABLE_SUFFIX, ".bedgraph", ".genes.gtf")):
            _check_table_headers(groups, s)
    first_group = groups[0]
    # the gathered plain files by role (the compressed, indexed copies are made again)
    plain = {
        s: mo.gathered_name(s, first_group.file(s).name, first_group.stem, stem)
        for s in suffixes
        if not s.endswith((".gz", *mo.INDEX_ENDS))
    }
    longest = max((int(r["length"]) for g in groups for r in g.table.records), default=0)
    index_end = indexed.index_suffix(longest)
    copies = [plain[b] + end for b in bases for end in (".gz", ".gz" + index_end)]
    names = [*plain.values(), *copies]
    group_files = [g.report_path for g in groups]
    group_files += [g.report_path.parent / n for g in groups for n in g.names]
    inputs = read_set(fasta=fasta, files=group_files)
    check_outputs([Path(opts.out_dir) / n for n in names], inputs, force=opts.force)
    gff_headers = {s: _gff3_headers(groups, s) for s in suffixes if s.endswith(".gff3")}

    first = first_group.report
    report = dict(first)
    report["command_line"] = list(opts.command_line)
    options = dict(first["options"])
    options["out_dir"] = opts.out_dir
    options["force"] = opts.force
    options["records"] = None
    if "stem" in options:
        options["stem"] = stem if opts.stem is not None else options["stem"]
    for role in mo.DEFAULT_SUFFIX:
        if options.get(role) is not None:
            options[role] = plain[role]
    report["options"] = options
    limit = first["records_limit"]
    totals = Totals()
    for g in groups:
        totals = totals.merged(Totals(**g.report["totals"]))
    report["totals"] = asdict(totals)
    report["records_table"] = stem + TABLE_SUFFIX
    report["records_truncated"] = totals.records > limit or totals.skipped_records > limit
    # each group lists its first entries, so the first ``limit`` of all are among them
    report["records"] = [r for g in groups for r in g.report["records"]][:limit]
    report["skipped_records"] = [r for g in groups for r in g.report["skipped_records"]][:limit]
    report["outputs"] = sorted(names)

    with OutputSet(opts.out_dir, force=opts.force, inputs=inputs) as outs:
        outs.replaces_set_of(stem + REPORT_SUFFIX)  # with --force, as annotate's set
        staged: dict[str, Path] = {}
        for suffix, name in plain.items():
            if suffix == REPORT_SUFFIX:
                continue  # written last, with the others' checksums
            if suffix.endswith(".bw"):
                staged[name] = outs.path(name)
                _write_bigwig(groups, suffix, staged[name])
                continue
            with outs.open_text(name) as fh:
                if suffix.endswith(".gff3"):
                    _write_gff3(groups, suffix, gff_headers[suffix], fh)
                elif suffix in mo.DEFAULT_SUFFIX or suffix.endswith(".genes.bed"):
                    _write_whole(groups, suffix, fh)
                else:  # .features.tsv, .records.tsv, .bedgraph, .genes.gtf
                    _write_table(groups, suffix, fh)
            staged[name] = Path(fh.name)
        made = [(plain[b], staged[plain[b]], mo.index_kind(b)) for b in bases]
        written = list(staged) + mo.write_indexed(outs, made, longest)
        folder = staged[plain[".gff3"]].parent  # every staged file is in one folder
        report["output_sha256"] = output_checksums(folder, written)
        with outs.open_text(stem + REPORT_SUFFIX) as fh:
            json.dump(report, fh, indent=2, sort_keys=False)
            fh.write("\n")
    return MergeReport(
        groups=len(groups),
        records=totals.records,
        features=totals.features,
        out_dir=opts.out_dir,
        outputs=report["outputs"],
        reordered=reordered,
    )
