"""The reports of ``seqstate compare``: TSV, JSON and the table on the terminal."""

from __future__ import annotations

import json
from pathlib import Path

from seqstate.errors import UsageError
from seqstate.io.atomic import OutputSet, atomic_text
from seqstate.io.gff3 import escape_column9
from seqstate.io.tsvtext import tsv_cell, tsv_row

__all__ = [
    "LISTED",
    "GENE_LISTS",
    "GENE_LIST_COLUMNS",
    "REPORT_FORMATS",
    "gene_list_tsv",
    "report_format",
    "report_json",
    "report_table",
    "report_tsv",
    "write_gene_list",
    "write_report",
]

#: Report formats of ``-o``, by file name ending.
REPORT_FORMATS = {".tsv": "tsv", ".json": "json"}
#: At most this many names (feature types, sequences, genes) in a message or report line.
LISTED = 10
#: The result keys that list genes that are not right (reference, predicted).
GENE_LISTS = ("missed_genes", "wrong_genes")
#: Columns of the gene list (:func:`gene_list_tsv`).
GENE_LIST_COLUMNS = [
    "type",
    "status",
    "file",
    "gene_id",
    "seqid",
    "start_1based",
    "end_1based",
    "strand",
    "transcripts",
    "overlapped",
]


# ---------------------------------------------------------------- reports


def _value(value: object, decimals: int) -> str:
    if value is None:
        return "NA"
    if isinstance(value, float):
        return f"{value:.{decimals}f}"
    return str(value)


def _flatten(prefix: str, value: object) -> list[tuple[str, object]]:
    if isinstance(value, dict):
        out: list[tuple[str, object]] = []
        for key, sub in value.items():
            out.extend(_flatten(f"{prefix}.{key}" if prefix else key, sub))
        return out
    return [(prefix, value)]


def report_tsv(result: dict) -> str:
    """``metric<TAB>value`` rows after a header: the result flattened with dotted names.

    Every key of :func:`compare_features`'s result, in order
    (``type`` ... ``counts.feature.wrong_predicted``); ``sequences`` is one row, the
    compared seqids joined by commas (each escaped as a GFF3 column-9 value, so a
    comma in a seqid reads ``%2C``); ``missed_genes`` and ``wrong_genes`` are one
    row each, the gene IDs joined the same way (empty when there is none).  Ratios
    have 6 decimals; an undefined value is ``NA``.
    """
    rows = [tsv_row(["metric", "value"])]
    flat = dict(result)
    if "sequences" in flat:
        flat["sequences"] = ",".join(escape_column9(s["seqid"]) for s in result["sequences"])
    for key in GENE_LISTS:
        if key in flat:  # the IDs, comma-joined (the places: gene_list_tsv)
            flat[key] = ",".join(escape_column9(g["id"]) for g in result[key])
    for key, value in _flatten("", flat):
        rows.append(tsv_row([key, _value(value, 6)]))
    return "".join(rows)


def report_json(result: dict) -> str:
    """The result as indented JSON (undefined ratios are null), one trailing newline."""
    return json.dumps(result, indent=2, ensure_ascii=False) + "\n"


def report_table(result: dict) -> str:
    """A readable, aligned table: a short header, then metric, value and counts rows."""
    counts = result["counts"]
    fc = counts["feature"]
    exon = result["rule"] == "exon"

    def noun(n: int) -> str:
        word = "exon" if exon else f"{result['type']} feature"
        return word if n == 1 else word + "s"

    rule = (
        "exons, a match has both ends and the strand equal"
        if exon
        else "a match shares at least half of the shorter feature, same strand"
    )
    n_seq = len(result["sequences"])
    where = result["region"] or f"{n_seq} sequence{'s' if n_seq != 1 else ''}"
    names = [s["seqid"] for s in result["sequences"]]
    used = ", ".join(names[:LISTED]) + (f", ... ({n_seq} in all)" if n_seq > LISTED else "")
    left = result.get("sequences_not_compared", 0)
    scope = {
        "predicted": "the predicted file's"
        + (f"; {left} more declared, not compared (--all-sequences counts them)" if left else ""),
        "all": "every sequence either file declares",
        "region": "the region",
        "predicted stretch": "the stretch the predicted file declares, "
        + str(result.get("region_from", "")),
        "given": "as given",
    }.get(result.get("sequence_scope", "given"), "")

    def dropped(n: int) -> str:
        return f" ({n} duplicate{'s' if n != 1 else ''} counted once)" if n else ""

    inputs = result["inputs"]
    n_ref, n_pred = noun(fc["reference"]), noun(fc["predicted"])
    head = [
        ("type", f"{result['type']}: {rule}"),
        ("compared", f"{where}, {counts['bases']} bases"),
        ("sequences", f"{used or 'none'} ({scope})"),
        (
            "predicted",
            f"{inputs['predicted'] or '-'}: {fc['predicted']} {n_pred}"
            f"{dropped(fc['predicted_duplicates'])}",
        ),
        (
            "reference",
            f"{inputs['reference'] or '-'}: {fc['reference']} {n_ref}"
            f"{dropped(fc['reference_duplicates'])}",
        ),
    ]
    lines = [f"{key:<10} {text}" for key, text in head]
    rows: list[tuple[str, str, str]] = []
    for mode, label in (("strand_aware", "strand-aware"), ("strand_agnostic", "strand-agnostic")):
        m = result["nucleotide"][mode]
        c = counts["nucleotide"][mode]
        rows += [
            (
                f"base {label} Sn",
                _value(m["sensitivity"], 4),
                f"{c['tp']} of {c['tp'] + c['fn']} reference bases",
            ),
            (
                f"base {label} Sp",
                _value(m["specificity"], 4),
                f"{c['tp']} of {c['tp'] + c['fp']} predicted bases",
            ),
            (
                f"base {label} AC",
                _value(m["approximate_correlation"], 4),
                f"TP {c['tp']}, FP {c['fp']}, FN {c['fn']}, TN {c['tn']}",
            ),
        ]
    f = result["feature"]
    rows += [
        (
            "feature Sn",
            _value(f["sensitivity"], 4),
            f"{fc['matched_reference']} of {fc['reference']} reference {n_ref} matched",
        ),
        (
            "feature Sp",
            _value(f["specificity"], 4),
            f"{fc['matched_predicted']} of {fc['predicted']} predicted {n_pred} matched",
        ),
        (
            "missed" + (" (ME)" if exon else ""),
            _value(f["missed"], 4),
            f"{fc['missed_reference']} of {fc['reference']} reference {n_ref} with no overlap",
        ),
        (
            "wrong" + (" (WE)" if exon else ""),
            _value(f["wrong"], 4),
            f"{fc['wrong_predicted']} of {fc['predicted']} predicted {n_pred} with no overlap",
        ),
    ]
    if "gene" in result:
        tc, gc = counts["transcript"], counts["gene"]
        t, g = result["transcript"], result["gene"]
        rows += [
            (
                "transcript Sn",
                _value(t["sensitivity"], 4),
                f"{tc['matched_reference']} of {tc['reference']} reference transcripts with "
                "every exon exact",
            ),
            (
                "transcript Sp",
                _value(t["specificity"], 4),
                f"{tc['matched_predicted']} of {tc['predicted']} predicted transcripts with "
                "every exon exact",
            ),
            (
                "gene Sn",
                _value(g["sensitivity"], 4),
                f"{gc['matched_reference']} of {gc['reference']} reference genes with an "
                "exact transcript",
            ),
            (
                "gene Sp",
                _value(g["specificity"], 4),
                f"{gc['matched_predicted']} of {gc['predicted']} predicted genes with an "
                "exact transcript",
            ),
            (
                "genes missed",
                _value(g["missed"], 4),
                f"{gc['missed_reference']} of {gc['reference']} reference genes with no overlap",
            ),
            (
                "genes wrong",
                _value(g["wrong"], 4),
                f"{gc['wrong_predicted']} of {gc['predicted']} predicted genes with no overlap",
            ),
        ]
    header = ("metric", "value", "counts")
    w0 = max(len(r[0]) for r in (*rows, header))
    w1 = max(len(r[1]) for r in (*rows, header))
    lines.append("")
    for name, value, detail in (header, *rows):
        lines.append(f"{name:<{w0}}  {value:>{w1}}  {detail}")
    for key, title in (
        ("missed_genes", "reference genes not found exactly"),
        ("wrong_genes", "predicted genes not in the reference"),
    ):
        genes = result.get(key)
        if not genes:
            continue
        lines.append("")
        lines.append(f"{title} ({len(genes)}; 1-based; * overlaps the other file):")
        for row in genes[:LISTED]:
            mark = "*" if row["overlapped"] else " "
            lines.append(
                f"  {mark} {row['id']}  {row['seqid']}:{row['start_1based']}-"
                f"{row['end_1based']} {row['strand']}"
            )
        if len(genes) > LISTED:
            lines.append(f"  ... {len(genes) - LISTED} more (all of them: --gene-list FILE.tsv)")
    tracks = counts["nucleotide"]["strand_aware"]["tracks"]
    lines.append("")
    lines.append(
        f"strand-aware counts each base once per strand track ({' '.join(tracks)}); Sp = TP/(TP+FP)"
    )
    return "\n".join(lines) + "\n"


def report_format(path: str | Path) -> str:
    """``"tsv"`` or ``"json"`` from the file name; UsageError for any other ending."""
    suffix = Path(path).suffix.lower()
    if suffix not in REPORT_FORMATS:
        raise UsageError(f"report file '{path}' must end in .tsv or .json (the format follows)")
    return REPORT_FORMATS[suffix]


def write_report(
    result: dict | list[dict],
    path: str | Path | None,
    *,
    force: bool = False,
    inputs: tuple | list = (),
    gene_list: str | Path | None = None,
) -> None:
    """Write the report as TSV or JSON (by the name's ending), all-or-nothing.

    Several results (one per ``--type``): JSON holds a list of them; TSV puts a
    ``type`` column first.  The overwrite rule of :mod:`seqstate.io.atomic`
    applies (``force``, ``inputs``).  With ``gene_list``, that file gets
    :func:`gene_list_tsv` in the same output set (both are written or neither);
    ``path`` may then be None (no report file).
    """
    if path is None and gene_list is None:
        return
    with OutputSet(force=force, inputs=inputs) as outs:
        if path is not None:
            outs.open_text(path).write(_report_text(result, path))
        if gene_list is not None:
            outs.open_text(gene_list).write(gene_list_tsv(result))


def _report_text(result: dict | list[dict], path: str | Path) -> str:
    tsv = report_format(path) == "tsv"
    if isinstance(result, list):
        if tsv:
            rows = ["type\tmetric\tvalue"]
            for one in result:
                body = report_tsv(one).split("\n")[1:-1]  # cells escaped: no newline inside
                rows += [f"{tsv_cell(one['type'])}\t{row}" for row in body]
            text = "\n".join(rows) + "\n"
        else:
            text = json.dumps(result, indent=2, ensure_ascii=False) + "\n"
    else:
        text = report_tsv(result) if tsv else report_json(result)
    return text


def gene_list_tsv(results: dict | list[dict]) -> str:
    """The genes that are not right, one row each, after a header
    (:data:`GENE_LIST_COLUMNS`): the compared ``type``, ``status`` (``missed``: a
    reference gene with no exact transcript; ``wrong``: a predicted gene with none in
    the reference), ``file`` (``reference`` or ``predicted``), the gene's ID, seqid,
    1-based closed span of its compared exons, strand, number of transcripts, and
    ``overlapped`` (``yes`` when some exon of it overlaps one of the other file).
    Missed genes first, each list sorted by seqid, start, end, ID.  Results without
    a gene level (types other than CDS and exon) give no rows."""
    rows = [tsv_row(GENE_LIST_COLUMNS)]
    for one in results if isinstance(results, list) else [results]:
        for key, status, file in (
            ("missed_genes", "missed", "reference"),
            ("wrong_genes", "wrong", "predicted"),
        ):
            for g in one.get(key, []):
                rows.append(
                    tsv_row(
                        [
                            one["type"],
                            status,
                            file,
                            g["id"],
                            g["seqid"],
                            str(g["start_1based"]),
                            str(g["end_1based"]),
                            g["strand"],
                            str(g["transcripts"]),
                            "yes" if g["overlapped"] else "no",
                        ]
                    )
                )
    return "".join(rows)


def write_gene_list(
    results: dict | list[dict],
    path: str | Path,
    *,
    force: bool = False,
    inputs: tuple | list = (),
) -> None:
    """Write :func:`gene_list_tsv` to ``path`` all-or-nothing (:mod:`seqstate.io.atomic`)."""
    with atomic_text(path, force=force, inputs=inputs) as handle:
        handle.write(gene_list_tsv(results))
