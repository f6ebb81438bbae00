"""seqstate.kinds: which kind a model is, what each kind writes, and the annotate report.

Expected values come from the built-in manifests (models/*/model.toml) and from
counting by hand (in the comments).
"""

from __future__ import annotations

import json

import pytest
from golden_util import GOLDEN_FASTA

from seqstate.commands.annotate import AnnotateOptions, AnnotateReport, annotate
from seqstate.commands.sample import SampleOptions, sample
from seqstate.io.gff3 import read_gff3
from seqstate.io.tables import load_model
from seqstate.kinds import GENES, SEGMENTS, kind_of, track_groups
from seqstate.kinds.segments import BASE_COLUMNS, CPG_COLUMNS, ID_COLUMNS


@pytest.mark.parametrize(
    "name, kind",
    [
        ("cpg-island", SEGMENTS),
        ("cpg-island-8", SEGMENTS),
        ("casino", SEGMENTS),
        # every gene model declares [annotate] features = "gene_structure"
        ("gene-segment", GENES),
        ("gene-segment-layout", GENES),
        ("gene-segment-athaliana", GENES),
        ("gene-segment-layout-plant", GENES),
    ],
)
def test_kind_of_the_builtin_models(name, kind):
    assert kind_of(load_model(name)) is kind


def test_segment_columns_add_cpg_statistics_only_for_islands():
    cpg = load_model("cpg-island")
    casino = load_model("casino")
    assert SEGMENTS.feature_columns(track_groups(cpg)) == ID_COLUMNS + BASE_COLUMNS + CPG_COLUMNS
    assert SEGMENTS.feature_columns(track_groups(casino)) == ID_COLUMNS + BASE_COLUMNS
    assert SEGMENTS.extra_columns("loaded") == []
    assert SEGMENTS.extra_scores("loaded", b"CGCG") == {}


def test_island_extra_scores_by_hand():
    # CGCG: 2 CpG, C = G = 2, 4 known bases: O/E = 2 * 4 / (2 * 2) = 2; G+C fraction 1;
    # 4 bases is under both published minimum lengths (200 and 500), so both flags are no
    got = SEGMENTS.extra_scores("CpG_island", b"CGCG")
    assert list(got) == CPG_COLUMNS
    assert (got["gc_fraction"], got["cpg_count"], got["cpg_oe"]) == (1.0, 2, 2.0)
    assert got["meets_ggf1987"] is False and got["meets_tj2002"] is False


def test_gene_kind_fit_rule_and_columns():
    model = load_model("gene-segment")
    assert GENES.state_rule == model.extra["fit"]["state_rule"] == "gene_structure"
    assert SEGMENTS.state_rule is None
    cols = GENES.feature_columns(track_groups(model))
    assert cols[:8] == ID_COLUMNS + ["parent", "phase"]


def test_gene_truth_is_a_hierarchy(tmp_path):
    fa, gff = tmp_path / "g.fa", tmp_path / "g.gff3"
    report = sample(
        SampleOptions(
            "gene-segment", 20_000, records=1, seed=4, out_fasta=str(fa), truth_gff3=str(gff)
        )
    )
    feats = read_gff3(gff)
    assert report.features == len(feats) > 0
    types = {f.type for f in feats}
    assert types <= {"gene", "mRNA", "exon", "CDS"} and "gene" in types
    genes = [f for f in feats if f.type == "gene"]
    mrnas = [f for f in feats if f.type == "mRNA"]
    assert len(genes) == len(mrnas)  # one transcript per decoded gene
    assert {f.get("Parent") for f in mrnas} == {f.get("ID") for f in genes}


def test_annotate_report_is_the_json_written(tmp_path):
    out = tmp_path / "out"
    report = annotate(AnnotateOptions(input=str(GOLDEN_FASTA), out_dir=str(out), stem="g"))
    assert isinstance(report, AnnotateReport)
    written = json.loads((out / "g.run.json").read_text(encoding="utf-8"))
    assert written == report.to_dict()
    assert list(written) == [
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
    ]
    gff = read_gff3(out / "g.gff3")
    assert report.features == len(gff) == sum(r["features"] for r in written["records"])
    assert written["totals"]["features"] == report.features
    assert report.summary("x/").endswith(f"{report.features} features -> x/")
