"""The workflow's last step: one table across assemblies.

Usage: python summary.py OUT.tsv ASSEMBLY=RUN_JSON,FEATURES_TSV[,COMPARE_JSON] ...

One row per assembly and feature type of its feature table (one row with type
``.`` when an assembly has no feature), in sample sheet order.  Columns:

assembly, type, features (count), feature_bases (sum of end - start + 1),
mean_posterior (the per-base posterior averaged over the bases of those
features: the length-weighted mean of the table's ``mean_posterior``; NA when the
table has no such column), records, total_bases (bases annotated), the accuracy
against the reference for the compared type (strand-aware nucleotide and
feature sensitivity and specificity from ``seqstate compare``; NA otherwise),
exon_sensitivity, exon_specificity (exact-exon figures: the feature figures of a
``CDS`` or ``exon`` comparison, whose rule matches both ends; NA for other types),
gene_sensitivity, gene_specificity (genes with a right transcript, from the
``gene`` figures of such a comparison; NA otherwise), model, model_sha256,
seqstate_version (from the run report).
Numbers are written with 4 decimals; the file has no timestamp.
"""

from __future__ import annotations

import csv
import json
import os
import sys

COLUMNS = [
    "assembly",
    "type",
    "features",
    "feature_bases",
    "mean_posterior",
    "records",
    "total_bases",
    "nucleotide_sensitivity",
    "nucleotide_specificity",
    "feature_sensitivity",
    "feature_specificity",
    "exon_sensitivity",
    "exon_specificity",
    "gene_sensitivity",
    "gene_specificity",
    "model",
    "model_sha256",
    "seqstate_version",
]


def _num(value) -> str:
    return "NA" if value is None else f"{value:.4f}"


def rows_of(name: str, run_json: str, features_tsv: str, compare_json: str | None):
    with open(run_json, encoding="utf-8") as fh:
        report = json.load(fh)
    accuracy: dict[str, dict] = {}
    if compare_json:
        with open(compare_json, encoding="utf-8") as fh:
            results = json.load(fh)
        for result in results if isinstance(results, list) else [results]:
            accuracy[result["type"]] = result
    per_type: dict[str, list[float]] = {}  # type -> [count, bases, weighted posterior]
    with open(features_tsv, encoding="utf-8", newline="") as fh:
        table = csv.DictReader(fh, delimiter="\t")
        has_post = "mean_posterior" in (table.fieldnames or [])
        for row in table:
            length = int(row["end_1based"]) - int(row["start_1based"]) + 1
            acc = per_type.setdefault(row["type"], [0, 0, 0.0])
            acc[0] += 1
            acc[1] += length
            if has_post and row["mean_posterior"] not in ("", "NA", "."):
                acc[2] += float(row["mean_posterior"]) * length
    totals = report["totals"]  # the report lists only the first records; totals count all
    common = {
        "records": str(totals["records"]),
        "total_bases": str(totals["bases"]),
        "model": report["model"]["name"],
        "model_sha256": report["model"]["sha256"],
        "seqstate_version": report["version"],
    }
    types = sorted(per_type) or ["."]
    for t in types:
        count, bases, weighted = per_type.get(t, [0, 0, 0.0])
        acc = accuracy.get(t)
        exon = acc["feature"] if acc and acc.get("rule") == "exon" else None
        gene = acc.get("gene") if acc else None
        yield {
            "assembly": name,
            "type": t,
            "features": str(int(count)),
            "feature_bases": str(int(bases)),
            "mean_posterior": _num(weighted / bases if bases and has_post else None),
            "nucleotide_sensitivity": _num(
                acc["nucleotide"]["strand_aware"]["sensitivity"] if acc else None
            ),
            "nucleotide_specificity": _num(
                acc["nucleotide"]["strand_aware"]["specificity"] if acc else None
            ),
            "feature_sensitivity": _num(acc["feature"]["sensitivity"] if acc else None),
            "feature_specificity": _num(acc["feature"]["specificity"] if acc else None),
            "exon_sensitivity": _num(exon["sensitivity"] if exon else None),
            "exon_specificity": _num(exon["specificity"] if exon else None),
            "gene_sensitivity": _num(gene["sensitivity"] if gene else None),
            "gene_specificity": _num(gene["specificity"] if gene else None),
            **common,
        }


def main(argv: list[str]) -> int:
    if len(argv) < 2:
        print(
            "usage: summary.py OUT.tsv ASSEMBLY=RUN_JSON,FEATURES_TSV[,COMPARE_JSON] ...",
            file=sys.stderr,
        )
        return 2
    out, items = argv[0], argv[1:]
    temp = f"{out}.tmp-{os.getpid()}"
    with open(temp, "w", encoding="utf-8", newline="\n") as fh:
        fh.write("\t".join(COLUMNS) + "\n")
        for item in items:
            name, _, paths = item.partition("=")
            parts = paths.split(",")
            compare = parts[2] if len(parts) > 2 else None
            for row in rows_of(name, parts[0], parts[1], compare):
                fh.write("\t".join(row[c] for c in COLUMNS) + "\n")
    os.replace(temp, out)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
