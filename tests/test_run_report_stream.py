"""annotate's run report is written record by record, with the bytes json.dump(indent=2) gives."""

from __future__ import annotations

import io
import json

import pytest

from seqstate.commands.annotate import AnnotateReport, ModelSummary, RecordReport, SkippedReport


def _report(n: int) -> AnnotateReport:
    report = AnnotateReport(
        "seqstate.annotate/1", "seqstate", "0.1.0", ["seqstate", "annotate", "x\ty.fa"],
        ModelSummary("m", "0" * 64, "ACGT", 2, 3), {"truth_types": ["CDS", "a\nb"]},
        "posterior", {"from": {"min_posterior": "model"}}, "e", {"gff3": "1-based closed"},
    )  # fmt: skip
    report.records = [
        RecordReport(
            f"r{i}\t\u00e9",
            i + 1,
            1,
            i + 1,
            0,
            -1.5 * i,
            i,
            genes=None if i % 2 else 3,
            mrnas=None if i % 2 else 4,
            filtered_genes=None if i % 2 else {"min_cds_length": 1},
        )  # fmt: skip
        for i in range(n)
    ]
    report.skipped_records = [SkippedReport("e", 3, "no sequence")] if n % 2 else []
    report.outputs = ["x.gff3", "x.run.json"]
    report.output_sha256 = {"x.gff3": "1" * 64}
    return report


@pytest.mark.parametrize("n", [0, 1, 2, 7])
def test_streamed_report_is_json_dump_indent_2_byte_for_byte(n):
    # the reference is the standard library's own json.dump (Python docs, json module)
    report = _report(n)
    streamed = io.StringIO()
    report.write_json(streamed)
    expected = io.StringIO()
    json.dump(report.to_dict(), expected, indent=2, sort_keys=False)
    expected.write("\n")
    assert streamed.getvalue() == expected.getvalue()
    assert json.loads(streamed.getvalue())["records"] == report.to_dict()["records"]
