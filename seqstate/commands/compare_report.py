"""The reports of ``seqstate compare``: TSV, JSON and the table on the terminal."""

from __future__ import annotations

import json
from pathlib import Path

from seqstate.errors import UsageError
from seqstate.io.atomic import atomic_text
from seqstate.io.gff3 import escape_column9

__all__ = [
    "LISTED",
    "REPORT_FORMATS",
    "report_format",
    "report_json",
    "report_table",
    "report_tsv",
    "write_report",
]

#: Report formats of ``-o``, by file name ending.
REPORT_FORMATS = {".tsv": "tsv", ".json": "json"}
#: At most this many names (feature types, sequences) in a message or report line.
LISTED = 10


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
    comma in a seqid reads ``%2C``).  Ratios have 6 decimals; an undefined value
    is ``NA``.
    """
    rows = ["metric\tvalue"]
    flat = dict(result)
    if "sequences" in flat:
        flat["sequences"] = ",".join(escape_column9(s["seqid"]) for s in result["sequences"])
    for key, value in _flatten("", flat):
        rows.append(f"{key}\t{_value(value, 6)}")
    return "\n".join(rows) + "\n"


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
    header = ("metric", "value", "counts")
    w0 = max(len(r[0]) for r in (*rows, header))
    w1 = max(len(r[1]) for r in (*rows, header))
    lines.append("")
    for name, value, detail in (header, *rows):
        lines.append(f"{name:<{w0}}  {value:>{w1}}  {detail}")
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
    path: str | Path,
    *,
    force: bool = False,
    inputs: tuple | list = (),
) -> None:
    """Write the report as TSV or JSON (by the name's ending), all-or-nothing.

    Several results (one per ``--type``): JSON holds a list of them; TSV puts a
    ``type`` column first.  The overwrite rule of :mod:`seqstate.io.atomic`
    applies (``force``, ``inputs``).
    """
    tsv = report_format(path) == "tsv"
    if isinstance(result, list):
        if tsv:
            rows = ["type\tmetric\tvalue"]
            for one in result:
                rows += [f"{one['type']}\t{row}" for row in report_tsv(one).splitlines()[1:]]
            text = "\n".join(rows) + "\n"
        else:
            text = json.dumps(result, indent=2, ensure_ascii=False) + "\n"
    else:
        text = report_tsv(result) if tsv else report_json(result)
    with atomic_text(path, force=force, inputs=inputs) as handle:
        handle.write(text)
