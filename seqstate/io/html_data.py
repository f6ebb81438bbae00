"""The data of the HTML run report: numbers as the page writes them, the rows of the
table of top features, the records, the accuracy rows and the feature counts.

``features_rows`` are the rows of annotate's feature table (dicts keyed by the columns
of :meth:`seqstate.kinds.base.Kind.feature_columns`, values as written in the TSV or as
numbers); coordinates in them are 1-based closed (``start_1based``, ``end_1based``).

Numbers are written one way throughout the page (:func:`fmt_number`): whole numbers with
a comma between thousands, fractions with :data:`DECIMALS` decimals (as ``seqstate
compare`` prints them), ``NA`` for a measure that is undefined.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

#: Most features listed in the table (the best by segment probability, then posterior).
TOP_FEATURES = 500


#: Columns shown in the table of top features, when the rows have them.
TABLE_COLUMNS = [
    "seqid",
    "start_1based",
    "end_1based",
    "strand",
    "type",
    "id",
    "length",
    "mean_posterior",
    "min_posterior",
    "segment_probability",
    "log_odds_bits",
]


#: Decimals of every fraction on the page (posteriors, ECE, Brier, Sn, Sp).
DECIMALS = 4


def fmt_number(value: Any, *, missing: str = "") -> str:
    """The page's one number format: ``1,348,131``, ``0.0134``; ``missing`` for None/NaN.

    Whole numbers (ints, or text that reads as an int) get thousands separators;
    other numbers get :data:`DECIMALS` decimals; text that is no number is kept.
    Booleans are written ``yes``/``no``.
    """
    if value is None:
        return missing
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:.{DECIMALS}f}" if math.isfinite(value) else missing
    text = str(value)
    if re.fullmatch(r"[+-]?\d+", text):
        return f"{int(text):,}"
    num = _number(text)
    if num is not None and re.fullmatch(r"[+-]?(\d+\.\d*|\.\d+|\d+(\.\d*)?[eE][+-]?\d+)", text):
        return f"{num:.{DECIMALS}f}"
    if text.lower() in ("nan", "na"):
        return missing
    return text


def _number(value: Any) -> float | None:
    if value is None or value == "":
        return None
    try:
        out = float(value)
    except (TypeError, ValueError):
        return None
    return out if math.isfinite(out) else None


def _length_of(row: Mapping[str, Any]) -> int | None:
    length = _number(row.get("length"))
    if length is not None:
        return int(length)
    s, e = _number(row.get("start_1based")), _number(row.get("end_1based"))
    if s is None or e is None:
        return None
    return int(e - s + 1)


def table_rows(rows: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """The feature rows with each span listed once: a row with the same seqid, start, end
    and strand as an earlier row that is its sibling (an mRNA's exon and CDS) or its parent
    (a gene and its only mRNA) is folded into that row, whose ``type`` then names both
    (``exon + CDS``, ``gene + mRNA``).  Rows keep their order; other rows are kept as they are.
    """
    out: list[dict[str, Any]] = []
    seen: dict[tuple[str, str, str, str], list[dict[str, Any]]] = {}
    for row in rows:
        key = tuple(str(row.get(c, "")) for c in ("seqid", "start_1based", "end_1based", "strand"))
        parent = str(row.get("parent") or "")
        kind = str(row.get("type") or "feature")
        host = None
        for other in seen.get(key, []):  # type: ignore[arg-type]
            if kind in str(other["type"]).split(" + "):
                continue
            if parent == str(other.get("id") or "") or (
                parent and parent == str(other.get("parent") or "")
            ):
                host = other
                break
        if host is not None:
            host["type"] = f"{host['type']} + {kind}"
            continue
        copy = dict(row)
        copy["type"] = kind
        out.append(copy)
        seen.setdefault(key, []).append(copy)  # type: ignore[arg-type]
    return out


def _top_level(rows: Sequence[Mapping[str, Any]]) -> list[Mapping[str, Any]]:
    """Rows that are no part of another (no ``parent``): genes, islands, segments."""
    return [r for r in rows if not str(r.get("parent") or "")]


def _records(records: Iterable[Any]) -> list[tuple[str, int]]:
    """(id, bases) pairs from (id, length) pairs or run-report record dicts."""
    out = []
    for rec in records:
        if isinstance(rec, Mapping):
            if "start_1based" in rec and "end_1based" in rec:
                n = int(rec["end_1based"]) - int(rec["start_1based"]) + 1
            else:
                n = int(rec["length"])
            out.append((str(rec["id"]), n))
        else:
            rid, n = rec
            out.append((str(rid), int(n)))
    return out


def shown_records(records: list[tuple[str, int]], most: int = 40) -> list[tuple[str, int]]:
    """The ``most`` longest records (ties: the first), in input order: the density bars."""
    longest = sorted(range(len(records)), key=lambda i: (-records[i][1], i))[:most]
    return [records[i] for i in sorted(longest)]


def accuracy_rows(result: Mapping[str, Any]) -> list[tuple[str, Any, Any, str]]:
    """(level, Sn, Sp, counts) of a comparison as ``seqstate compare`` returns it
    (:func:`seqstate.commands.compare.compare_files`): bases (strand-aware), features
    (exons for CDS and exon), and for those also transcripts and genes.  Sn and Sp are
    fractions or None (undefined)."""
    counts = result["counts"]
    exon = result.get("rule") == "exon"
    word = "exons" if exon else f"{result.get('type', 'feature')} features"
    nuc, nc = result["nucleotide"]["strand_aware"], counts["nucleotide"]["strand_aware"]
    fe, fc = result["feature"], counts["feature"]
    rows = [
        (
            "bases (strand-aware)",
            nuc["sensitivity"],
            nuc["specificity"],
            f"{nc['tp']:,} of {nc['tp'] + nc['fn']:,} reference and of "
            f"{nc['tp'] + nc['fp']:,} predicted bases",
        ),
        (
            word,
            fe["sensitivity"],
            fe["specificity"],
            f"{fc['matched_reference']:,} of {fc['reference']:,} reference and "
            f"{fc['matched_predicted']:,} of {fc['predicted']:,} predicted matched",
        ),
    ]
    for level in ("transcript", "gene"):
        if level in result:
            m, c = result[level], counts[level]
            rows.append(
                (
                    f"{level}s",
                    m["sensitivity"],
                    m["specificity"],
                    f"{c['matched_reference']:,} of {c['reference']:,} reference and "
                    f"{c['matched_predicted']:,} of {c['predicted']:,} predicted "
                    + (
                        "with every exon exact"
                        if level == "transcript"
                        else "with an exact transcript"
                    ),
                )
            )
    return rows


def _type_counts(rows: Sequence[Mapping[str, Any]]) -> list[tuple[str, int]]:
    """Features per type, types in the order they first appear (gene, mRNA, exon, CDS)."""
    counts: dict[str, int] = {}
    for row in rows:
        t = str(row.get("type") or "feature")
        counts[t] = counts.get(t, 0) + 1
    return list(counts.items())
