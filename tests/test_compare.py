"""``seqstate compare`` (seqstate.compare and its CLI command).

Sources of the expected values:

* the accuracy measures of Burset & Guigó (1996), Genomics 34:353-367, from
  memory: Sn = TP/(TP+FN), Sp = TP/(TP+FP), AC = (ACP - 0.5) * 2 with ACP the
  mean of TP/(TP+FN), TP/(TP+FP), TN/(TN+FP), TN/(TN+FN) over the terms with a
  non-zero denominator; exon Sn/Sp by exact ends, missed exons (ME) and wrong
  exons (WE) by no overlap at all;
* the island rule of the issue (a match shares at least half the shorter
  feature), common practice for interval features;
* GFF3 coordinates, 1-based closed (GFF3 specification, The-Sequence-Ontology/
  Specifications gff3.md: "positive 1-based integer coordinates", start <= end).

Every count below is worked out by hand in the comments beside the assertion;
the inputs in tests/data/compare are hand-made and synthetic.
"""

from __future__ import annotations

import json
import random
import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner
from hypothesis import given
from hypothesis import strategies as st

from seqstate.cli import main
from seqstate.commands.compare import (
    approximate_correlation,
    choose_type,
    compare_features,
    compare_files,
    nucleotide_metrics,
    read_sequence_regions,
    report_tsv,
)
from seqstate.errors import FeatureFormatError, UsageError
from seqstate.io.gff3 import Feature, read_gff3

DATA = Path(__file__).resolve().parent / "data" / "compare"
CDS_REF = DATA / "cds_ref.gff3"
CDS_PRED = DATA / "cds_pred.gff3"
ISL_REF = DATA / "islands_ref.gff3"
ISL_PRED = DATA / "islands_pred.gff3"


def feat(start: int, end: int, strand: str = "+", ftype: str = "CDS", seqid: str = "ctgA"):
    """A feature from GFF3 (1-based closed) coordinates, as read_gff3 would give it."""
    return Feature(seqid, "test", ftype, start - 1, end, None, strand, None)


def ac_by_hand(tp: int, fp: int, fn: int, tn: int) -> float:
    """AC written out from its definition (Burset & Guigó 1996, from memory)."""
    terms = [(tp, tp + fn), (tp, tp + fp), (tn, tn + fp), (tn, tn + fn)]
    defined = [a / b for a, b in terms if b]
    return (sum(defined) / len(defined) - 0.5) * 2


def run(args: list) -> tuple[int, str, str]:
    """Run the CLI in-process; ``(exit status, stdout, stderr)``, insisting it did not crash."""
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    return result.exit_code, result.stdout, result.stderr


def check_error(args: list, status: int, *must_contain: str) -> str:
    """The run fails with ``status`` and one ``error:`` line holding ``must_contain``."""
    code, out, err = run(args)
    lines = err.splitlines()
    assert code == status, err
    assert out == "" and len(lines) == 1 and lines[0].startswith("error: "), err
    assert "Traceback" not in err
    for text in must_contain:
        assert text in lines[0], f"{text!r} not in {lines[0]!r}"
    return lines[0]


# ---------------------------------------------------------------- the measures


def test_approximate_correlation_by_hand() -> None:
    # Burset & Guigó 1996 (from memory).  TP 30, FP 7, FN 10, TN 53:
    # ACP = (30/40 + 30/37 + 53/60 + 53/63) / 4, AC = 2 ACP - 1
    acp = (30 / 40 + 30 / 37 + 53 / 60 + 53 / 63) / 4
    assert approximate_correlation(30, 7, 10, 53) == pytest.approx(2 * acp - 1, abs=1e-15)
    # perfect prediction: every term is 1, AC = 1 (same source)
    assert approximate_correlation(10, 0, 0, 90) == pytest.approx(1.0)
    # the exact complement: TP = TN = 0, every term 0, AC = -1 (same source)
    assert approximate_correlation(0, 60, 40, 0) == pytest.approx(-1.0)
    # no reference bases (TP + FN = 0): that term is left out, the mean is over three:
    # TP/(TP+FP) = 0/5, TN/(TN+FP) = 95/100, TN/(TN+FN) = 95/95 (same source)
    assert approximate_correlation(0, 5, 0, 95) == pytest.approx(
        ((0 + 0.95 + 1.0) / 3 - 0.5) * 2, abs=1e-15
    )


def test_nucleotide_metrics_undefined_ratios_are_none() -> None:
    # Sn = TP/(TP+FN) is undefined with no reference base; Sp = TP/(TP+FP) with no
    # predicted base (Burset & Guigó 1996, from memory)
    m = nucleotide_metrics(0, 0, 0, 100)
    assert m["sensitivity"] is None and m["specificity"] is None
    assert m["approximate_correlation"] == pytest.approx(1.0)  # TN terms only: 100/100 twice


# ---------------------------------------------------------------- the CDS example


def test_cds_example_counts_by_hand() -> None:
    result = compare_files(CDS_PRED, CDS_REF)
    assert result["type"] == "CDS" and result["rule"] == "exon"
    # ctgA is 1-100 (the reference's ##sequence-region; the prediction has none).
    # Reference exons (1-based closed): 11-20+ (twice, two isoforms: counted once),
    # 31-40+, 51-60+, 71-80-.  Predicted: 11-20+, 31-42+, 71-80+, 86-90+.
    assert result["sequences"] == [
        {"seqid": "ctgA", "start_1based": 1, "end_1based": 100, "from": "reference"}
    ]
    ag = result["counts"]["nucleotide"]["strand_agnostic"]
    # strand-agnostic, 100 bases.  Reference covers 10+10+10+10 = 40 bases; predicted
    # 10+12+10+5 = 37.  Both: 11-20 (10) + 31-40 (10) + 71-80 (10) = 30 = TP.
    # FP = 37 - 30 = 7 (41-42 and 86-90); FN = 40 - 30 = 10 (51-60);
    # TN = 100 - 30 - 7 - 10 = 53.  (Burset & Guigó 1996 definitions, from memory)
    assert (ag["tp"], ag["fp"], ag["fn"], ag["tn"]) == (30, 7, 10, 53)
    m = result["nucleotide"]["strand_agnostic"]
    assert m["sensitivity"] == pytest.approx(30 / 40)  # Sn = TP/(TP+FN)
    assert m["specificity"] == pytest.approx(30 / 37)  # Sp = TP/(TP+FP)
    assert m["approximate_correlation"] == pytest.approx(ac_by_hand(30, 7, 10, 53))
    aw = result["counts"]["nucleotide"]["strand_aware"]
    # strand-aware: tracks + and -, 2 x 100 = 200 positions.  + track: reference 30
    # bases (11-20, 31-40, 51-60), predicted 37 (all four are +); both: 11-20 and
    # 31-40 = 20.  - track: reference 71-80 (10), predicted none.  TP = 20,
    # FP = 37 - 20 = 17, FN = 40 - 20 = 20, TN = 200 - 20 - 17 - 20 = 143.
    assert aw["tracks"] == "+-" and aw["positions"] == 200
    assert (aw["tp"], aw["fp"], aw["fn"], aw["tn"]) == (20, 17, 20, 143)
    m = result["nucleotide"]["strand_aware"]
    assert m["sensitivity"] == pytest.approx(20 / 40)
    assert m["specificity"] == pytest.approx(20 / 37)
    assert m["approximate_correlation"] == pytest.approx(ac_by_hand(20, 17, 20, 143))


def test_exon_exact_matching_by_hand() -> None:
    result = compare_files(CDS_PRED, CDS_REF)
    fc = result["counts"]["feature"]
    # Reference exons after counting 11-20+ once: 4 (1 duplicate).
    #   11-20+  matched exactly by the predicted 11-20+
    #   31-40+  the predicted 31-42+ shares the start only: no match, but it overlaps
    #   51-60+  no predicted exon on + overlaps it: missed
    #   71-80-  the only exon there is predicted on +: no overlap on -: missed
    # Predicted exons: 4.
    #   11-20+ matched; 31-42+ no match (overlaps 31-40+);
    #   71-80+ overlaps no reference exon on +: wrong; 86-90+ overlaps nothing: wrong
    # Sn = 1/4, Sp = 1/4, ME = 2/4, WE = 2/4 (Burset & Guigó 1996, from memory)
    assert fc == {
        "reference": 4,
        "predicted": 4,
        "matched_reference": 1,
        "matched_predicted": 1,
        "missed_reference": 2,
        "wrong_predicted": 2,
        "reference_duplicates": 1,
        "predicted_duplicates": 0,
    }
    assert result["feature"] == {
        "sensitivity": 0.25,
        "specificity": 0.25,
        "missed": 0.5,
        "wrong": 0.5,
    }


def test_shared_end_is_not_a_match_but_not_wrong_either() -> None:
    # reference 101-200; predicted 101-150 (same start) and 160-200 (same end): neither
    # has both ends, so Sn = Sp = 0, but both overlap it, so ME = WE = 0
    # (exon rule, Burset & Guigó 1996, from memory)
    ref = [feat(101, 200)]
    pred = [feat(101, 150), feat(160, 200)]
    result = compare_features(pred, ref, {"ctgA": 300}, "CDS")
    assert result["feature"] == {
        "sensitivity": 0.0,
        "specificity": 0.0,
        "missed": 0.0,
        "wrong": 0.0,
    }
    # and the same two exons with both ends equal do match
    same = compare_features([feat(101, 200)], ref, {"ctgA": 300}, "CDS")
    assert same["feature"]["sensitivity"] == 1.0 and same["feature"]["specificity"] == 1.0


def test_wrong_strand_separates_the_two_strand_modes() -> None:
    # one reference exon 21-40 on -, predicted at the same place on +.
    ref = [feat(21, 40, "-")]
    pred = [feat(21, 40, "+")]
    result = compare_features(pred, ref, {"ctgA": 100}, "CDS")
    ag = result["counts"]["nucleotide"]["strand_agnostic"]
    aw = result["counts"]["nucleotide"]["strand_aware"]
    # agnostic: the 20 bases are TP; TN = 100 - 20 = 80
    assert (ag["tp"], ag["fp"], ag["fn"], ag["tn"]) == (20, 0, 0, 80)
    assert result["nucleotide"]["strand_agnostic"]["sensitivity"] == 1.0
    # aware: 200 positions; the + track has 20 FP, the - track 20 FN, TP = 0,
    # TN = 200 - 40 = 160 (strands agree or the base does not count as TP)
    assert (aw["tp"], aw["fp"], aw["fn"], aw["tn"]) == (0, 20, 20, 160)
    assert result["nucleotide"]["strand_aware"]["sensitivity"] == 0.0
    assert result["nucleotide"]["strand_aware"]["specificity"] == 0.0
    # feature level compares on the same strand: missed and wrong
    assert result["feature"] == {
        "sensitivity": 0.0,
        "specificity": 0.0,
        "missed": 1.0,
        "wrong": 1.0,
    }


def test_duplicate_exons_counted_once_and_coverage_is_the_union() -> None:
    # three isoforms all carrying exon 11-30, one with 21-40 too: reference exons are
    # 11-30 and 21-40 (2, with 2 duplicates dropped); covered bases 11-40 = 30
    ref = [feat(11, 30), feat(11, 30), feat(11, 30), feat(21, 40)]
    pred = [feat(11, 30)]
    result = compare_features(pred, ref, {"ctgA": 50}, "CDS")
    fc = result["counts"]["feature"]
    assert (fc["reference"], fc["reference_duplicates"], fc["matched_reference"]) == (2, 2, 1)
    ag = result["counts"]["nucleotide"]["strand_agnostic"]
    # TP 20 (11-30), FN 10 (31-40), FP 0, TN 50 - 30 = 20
    assert (ag["tp"], ag["fp"], ag["fn"], ag["tn"]) == (20, 0, 10, 20)


def test_region_clips_bases_and_keeps_overlapping_features() -> None:
    result = compare_files(CDS_PRED, CDS_REF, region="ctgA:15-75")
    assert result["region"] == "ctgA:15-75" and result["counts"]["bases"] == 61  # 75 - 15 + 1
    ag = result["counts"]["nucleotide"]["strand_agnostic"]
    # clipped to 15-75.  Reference: 15-20 (6), 31-40 (10), 51-60 (10), 71-75 (5) = 31.
    # Predicted: 15-20 (6), 31-42 (12), 71-75 (5) = 23 (86-90 is outside).
    # TP = 6 + 10 + 5 = 21, FP = 23 - 21 = 2, FN = 31 - 21 = 10, TN = 61 - 33 = 28
    assert (ag["tp"], ag["fp"], ag["fn"], ag["tn"]) == (21, 2, 10, 28)
    aw = result["counts"]["nucleotide"]["strand_aware"]
    # + track: reference 6 + 10 + 10 = 26, predicted 23, both 6 + 10 = 16;
    # - track: reference 71-75 (5).  TP 16, FP 23 - 16 = 7, FN 31 - 16 = 15,
    # TN = 2 x 61 - 16 - 7 - 15 = 84
    assert (aw["tp"], aw["fp"], aw["fn"], aw["tn"]) == (16, 7, 15, 84)
    fc = result["counts"]["feature"]
    # feature level: the 4 reference exons all overlap the region; 3 predicted ones do
    # (86-90 does not).  Matched 1 and 1; missed 51-60+ and 71-80-; wrong 71-80+.
    assert (fc["reference"], fc["predicted"]) == (4, 3)
    assert (fc["matched_reference"], fc["matched_predicted"]) == (1, 1)
    assert (fc["missed_reference"], fc["wrong_predicted"]) == (2, 1)


def test_region_ignores_other_seqids_and_gives_an_unknown_span() -> None:
    # ctgB has no length anywhere; with --region on ctgB, the region is its span and
    # the ctgA features are ignored
    ref = [feat(11, 20, seqid="ctgA"), feat(5, 14, seqid="ctgB")]
    pred = [feat(11, 20, seqid="ctgA"), feat(10, 19, seqid="ctgB")]
    result = compare_features(pred, ref, {"ctgA": 100}, "CDS", region="ctgB:1-30")
    ag = result["counts"]["nucleotide"]["strand_agnostic"]
    # 30 bases; reference 5-14, predicted 10-19: TP 10-14 = 5, FP 15-19 = 5,
    # FN 5-9 = 5, TN 30 - 15 = 15
    assert (ag["tp"], ag["fp"], ag["fn"], ag["tn"]) == (5, 5, 5, 15)
    assert result["sequences"] == [
        {"seqid": "ctgB", "start_1based": 1, "end_1based": 30, "from": "region"}
    ]
    # without the region ctgB has no known length: an error naming the seqid
    with pytest.raises(FeatureFormatError, match="'ctgB'"):
        compare_features(pred, ref, {"ctgA": 100}, "CDS")


def test_whole_record_region_takes_the_declared_length() -> None:
    result = compare_files(CDS_PRED, CDS_REF, region="ctgA")
    assert result["counts"]["bases"] == 100
    whole = compare_files(CDS_PRED, CDS_REF)
    assert result["counts"]["nucleotide"] == whole["counts"]["nucleotide"]


def test_lengths_come_from_either_file_reference_first(tmp_path) -> None:
    ref_text = CDS_REF.read_text()
    pred_lines = CDS_PRED.read_text().splitlines(keepends=True)
    # reference says 1-120, no line in the prediction: the reference's length, TN = 53 + 20
    ref120 = tmp_path / "ref120.gff3"
    ref120.write_text(ref_text.replace("ctgA 1 100", "ctgA 1 120"))
    result = compare_files(CDS_PRED, ref120)
    assert result["sequences"][0]["end_1based"] == 120
    assert result["counts"]["nucleotide"]["strand_agnostic"]["tn"] == 73
    # prediction says 1-100 (a region run): only its stretch is compared, TN = 53
    pred100 = tmp_path / "pred100.gff3"
    pred100.write_text(pred_lines[0] + "##sequence-region ctgA 1 100\n" + "".join(pred_lines[1:]))
    result = compare_files(pred100, ref120)
    assert result["sequences"][0]["end_1based"] == 100
    assert result["sequence_scope"] == "predicted stretch"
    assert result["counts"]["nucleotide"]["strand_agnostic"]["tn"] == 53
    # reference without the line: the prediction's length is used
    ref_none = tmp_path / "ref_none.gff3"
    ref_none.write_text(ref_text.replace("##sequence-region ctgA 1 100\n", ""))
    result = compare_files(pred100, ref_none)
    assert result["sequences"][0]["from"] == "predicted"
    assert result["counts"]["nucleotide"]["strand_agnostic"]["tn"] == 53


def _ref_with_other_sequence(tmp_path) -> Path:
    """CDS_REF plus a sequence the prediction never mentions: ctgB 1-50 with a reference
    CDS at 5-14 (+)."""
    ref = tmp_path / "ref_ab.gff3"
    text = CDS_REF.read_text().replace(
        "##sequence-region ctgA 1 100\n",
        "##sequence-region ctgA 1 100\n##sequence-region ctgB 1 50\n",
    )
    ref.write_text(text + "ctgB\tref\tCDS\t5\t14\t.\t+\t0\tID=cdsB\n")
    return ref


def test_only_the_predicted_files_sequences_count_by_default(tmp_path) -> None:
    ref = _ref_with_other_sequence(tmp_path)
    result = compare_files(CDS_PRED, ref)
    # the prediction names ctgA only (its features; it has no ##sequence-region line):
    # ctgB, its 50 bases and its CDS are left out, so every count is that of
    # test_cds_example_counts_by_hand (100 bases; TN 53 agnostic, 143 aware)
    assert result["sequence_scope"] == "predicted"
    assert result["sequences_not_compared"] == 1
    assert [s["seqid"] for s in result["sequences"]] == ["ctgA"]
    assert result["counts"]["bases"] == 100
    ag = result["counts"]["nucleotide"]["strand_agnostic"]
    aw = result["counts"]["nucleotide"]["strand_aware"]
    assert (ag["tp"], ag["fp"], ag["fn"], ag["tn"]) == (30, 7, 10, 53)
    assert (aw["tp"], aw["fp"], aw["fn"], aw["tn"]) == (20, 17, 20, 143)
    assert result["nucleotide"]["strand_agnostic"]["approximate_correlation"] == pytest.approx(
        ac_by_hand(30, 7, 10, 53)  # Burset & Guigó 1996, from memory
    )
    assert result["counts"]["feature"]["reference"] == 4
    assert result["counts"]["feature"]["missed_reference"] == 2  # 51-60+ and 71-80-


def test_all_sequences_counts_every_declared_sequence(tmp_path) -> None:
    ref = _ref_with_other_sequence(tmp_path)
    result = compare_files(CDS_PRED, ref, all_sequences=True)
    assert result["sequence_scope"] == "all" and result["sequences_not_compared"] == 0
    assert [s["seqid"] for s in result["sequences"]] == ["ctgA", "ctgB"]
    assert result["counts"]["bases"] == 150  # 100 + 50
    ag = result["counts"]["nucleotide"]["strand_agnostic"]
    # ctgB adds 10 reference-only bases (5-14) and 40 bases covered by neither file:
    # TP 30, FP 7, FN 10 + 10 = 20, TN = 150 - 30 - 7 - 20 = 93
    assert (ag["tp"], ag["fp"], ag["fn"], ag["tn"]) == (30, 7, 20, 93)
    # AC by hand: ACP = (30/50 + 30/37 + 93/100 + 93/113) / 4 (Burset & Guigó 1996,
    # from memory) = (0.6 + 0.810811 + 0.93 + 0.823009) / 4 = 0.790955, AC = 0.581910
    acp = (30 / 50 + 30 / 37 + 93 / 100 + 93 / 113) / 4
    ac = result["nucleotide"]["strand_agnostic"]["approximate_correlation"]
    assert ac == pytest.approx(2 * acp - 1) and ac == pytest.approx(0.581910, abs=1e-6)
    # against the default (100 bases): AC = 2 * (30/40 + 30/37 + 53/60 + 53/63) / 4 - 1
    default = compare_files(CDS_PRED, ref)["nucleotide"]["strand_agnostic"]
    assert default["approximate_correlation"] == pytest.approx(
        2 * (30 / 40 + 30 / 37 + 53 / 60 + 53 / 63) / 4 - 1
    )
    aw = result["counts"]["nucleotide"]["strand_aware"]
    # strand-aware, tracks + and -: 2 x 150 = 300 positions; ctgB's CDS is FN on +:
    # TP 20, FP 17, FN 20 + 10 = 30, TN = 300 - 67 = 233
    assert aw["positions"] == 300 and (aw["tp"], aw["fp"], aw["fn"], aw["tn"]) == (20, 17, 30, 233)
    fc = result["counts"]["feature"]
    assert (fc["reference"], fc["matched_reference"], fc["missed_reference"]) == (5, 1, 3)


def test_prediction_sequence_regions_name_compared_sequences(tmp_path) -> None:
    # a ##sequence-region line of the prediction counts its sequence even without features
    ref = _ref_with_other_sequence(tmp_path)
    pred = tmp_path / "pred.gff3"
    lines = CDS_PRED.read_text().splitlines(keepends=True)
    pred.write_text(lines[0] + "##sequence-region ctgB 1 50\n" + "".join(lines[1:]))
    result = compare_files(pred, ref)
    assert [s["seqid"] for s in result["sequences"]] == ["ctgA", "ctgB"]
    assert result["counts"]["nucleotide"]["strand_agnostic"]["tn"] == 93  # as with all


def test_cli_says_which_sequences_were_compared(tmp_path) -> None:
    ref = _ref_with_other_sequence(tmp_path)
    code, out, _ = run(["compare", CDS_PRED, ref])
    assert code == 0
    assert "sequences  ctgA (the predicted file's; 1 more declared, not compared" in out
    assert "TP 30, FP 7, FN 10, TN 53" in out
    code, out, _ = run(["compare", CDS_PRED, ref, "--all-sequences"])
    assert code == 0
    assert "sequences  ctgA, ctgB (every sequence either file declares)" in out
    assert "TP 30, FP 7, FN 20, TN 93" in out
    tsv = tmp_path / "r.tsv"
    code, _, _ = run(["compare", CDS_PRED, ref, "-o", tsv])
    rows = dict(line.split("\t") for line in tsv.read_text().splitlines()[1:])
    assert rows["sequences"] == "ctgA" and rows["sequence_scope"] == "predicted"
    assert rows["sequences_not_compared"] == "1"
    js = tmp_path / "r.json"
    run(["compare", CDS_PRED, ref, "--all-sequences", "-o", js])
    data = json.loads(js.read_text())
    assert [s["seqid"] for s in data["sequences"]] == ["ctgA", "ctgB"]
    assert data["sequence_scope"] == "all"


def test_partial_sequence_region_is_the_compared_span(tmp_path) -> None:
    # ##sequence-region ctgA 11 90 (as annotate --region writes it): 80 bases compared
    ref = tmp_path / "ref.gff3"
    ref.write_text(CDS_REF.read_text().replace("ctgA 1 100", "ctgA 11 90"))
    result = compare_files(CDS_PRED, ref)
    # same TP/FP/FN as the whole record (every feature lies in 11-90); TN = 80 - 47 = 33
    ag = result["counts"]["nucleotide"]["strand_agnostic"]
    assert (ag["tp"], ag["fp"], ag["fn"], ag["tn"]) == (30, 7, 10, 33)


def _region_run(tmp_path: Path, start: int, end: int) -> Path:
    """CDS_PRED as ``annotate --region ctgA:START-END`` writes it: its line declares the
    stretch, and only its features inside it."""
    lines = CDS_PRED.read_text().splitlines(keepends=True)
    kept = [
        line
        for line in lines[1:]
        if line.startswith("#")
        or start <= int(line.split("\t")[3]) <= int(line.split("\t")[4]) <= end
    ]
    pred = tmp_path / f"pred_{start}_{end}.gff3"
    pred.write_text(lines[0] + f"##sequence-region ctgA {start} {end}\n" + "".join(kept))
    return pred


@pytest.mark.parametrize("stretch", [(1, 45), (21, 100), (61, 95)])
def test_region_run_compares_its_stretch_like_region(tmp_path, stretch) -> None:
    # a region run's prediction against a whole-sequence reference (GFF3 with a
    # ##sequence-region line, or GTF with none) counts only the annotated stretch:
    # the same figures as --region START-END (the reference outside is not missed)
    start, end = stretch
    pred = _region_run(tmp_path, start, end)
    want = compare_files(pred, CDS_REF, region=f"ctgA:{start}-{end}")
    for ref in (CDS_REF, _as_gtf(CDS_REF, tmp_path / "ref.gtf")):
        got = compare_files(pred, ref)
        assert got["sequence_scope"] == "predicted stretch"
        assert got["region_from"] == f"{pred} line 2"
        assert got["counts"] == want["counts"] and got["nucleotide"] == want["nucleotide"]
        assert got["counts"]["bases"] == end - start + 1


def test_region_runs_of_two_sequences_need_region(tmp_path) -> None:
    pred = _region_run(tmp_path, 21, 100)
    text = pred.read_text().replace(
        "##sequence-region ctgA 21 100\n",
        "##sequence-region ctgA 21 100\n##sequence-region ctgB 2 40\n",
    )
    pred.write_text(text)
    with pytest.raises(UsageError, match="narrower than the reference.*--region"):
        compare_files(pred, _ref_with_other_sequence(tmp_path))


# ---------------------------------------------------------------- islands and intervals


@pytest.mark.parametrize(
    ("pred", "matched"),
    [
        ((151, 260), True),  # shares 151-200 = 50 bases, exactly half of the shorter (100)
        ((152, 260), False),  # shares 49: just under half
        ((51, 150), True),  # shares 101-150 = 50 on the left side
        ((51, 149), False),  # 49 of the shorter 99 (2 x 49 < 99): just under
        ((181, 200), True),  # 20 bases inside: all of the shorter feature
        ((190, 420), False),  # 11 of 100 (the reference is the shorter one)
    ],
)
def test_island_half_of_the_shorter_rule(pred: tuple[int, int], matched: bool) -> None:
    # the reference island is 101-200 (100 bases); a match shares at least half of the
    # shorter feature, 2 x overlap >= shorter length (the rule, common practice)
    ref = [feat(101, 200, ".", "CpG_island")]
    result = compare_features([feat(*pred, ".", "CpG_island")], ref, {"ctgA": 1000}, "CpG_island")
    assert result["rule"] == "overlap"
    assert result["feature"]["sensitivity"] == (1.0 if matched else 0.0)
    assert result["feature"]["specificity"] == (1.0 if matched else 0.0)
    # an overlap, even a small one, is neither missed nor wrong
    assert result["feature"]["missed"] == 0.0 and result["feature"]["wrong"] == 0.0


def test_islands_example_by_hand() -> None:
    result = compare_files(ISL_PRED, ISL_REF)
    assert result["type"] == "CpG_island"  # the only type both files have
    fc = result["counts"]["feature"]
    # reference A 101-200, B 401-500, C 701-800, D 901-950; predicted a 151-260,
    # b 452-560, c 601-650, d 781-800.
    # a-A share 50 of the shorter 100: match.  b-B share 49 of 100: no match, overlap.
    # d-C share 20 of the shorter 20: match.  c overlaps nothing: wrong.  D: missed.
    assert (fc["matched_reference"], fc["missed_reference"], fc["reference"]) == (2, 1, 4)
    assert (fc["matched_predicted"], fc["wrong_predicted"], fc["predicted"]) == (2, 1, 4)
    ag = result["counts"]["nucleotide"]["strand_agnostic"]
    # 1000 bases.  Reference 100 + 100 + 100 + 50 = 350; predicted 110 + 109 + 50 + 20
    # = 289; shared 50 + 49 + 0 + 20 = 119 = TP; FP 289 - 119 = 170; FN 350 - 119 = 231;
    # TN 1000 - 119 - 170 - 231 = 480
    assert (ag["tp"], ag["fp"], ag["fn"], ag["tn"]) == (119, 170, 231, 480)
    # unstranded features only: one strand track, so both counts agree
    aw = result["counts"]["nucleotide"]["strand_aware"]
    assert aw["tracks"] == "." and {k: aw[k] for k in ag} == ag


# ---------------------------------------------------------------- against a per-base count

_interval = st.tuples(st.integers(0, 39), st.integers(1, 12), st.sampled_from("+-"))


@given(st.lists(_interval, max_size=6), st.lists(_interval, max_size=6), st.booleans())
def test_counts_agree_with_a_per_base_tally(pred_raw, ref_raw, exon) -> None:
    # the definitions applied base by base on a 50-base record (Burset & Guigó 1996, from
    # memory; overlap rule from the issue): an independent, slow tally
    n = 50
    ftype = "CDS" if exon else "region"
    pred = [feat(s + 1, min(s + w, n), d, ftype) for s, w, d in pred_raw]
    ref = [feat(s + 1, min(s + w, n), d, ftype) for s, w, d in ref_raw]
    result = compare_features(pred, ref, {"ctgA": n}, ftype)

    def bases(features, strand=None):
        return {i for f in features for i in range(f.start0, f.end0) if strand in (None, f.strand)}

    tp = fp = fn = tn = 0
    # one track per strand when there is any (stranded) feature, else one track
    for strand in "+-" if pred or ref else ".":
        p, r = bases(pred, strand), bases(ref, strand)
        tp, fp, fn = tp + len(p & r), fp + len(p - r), fn + len(r - p)
        tn += n - len(p | r)
    aw = result["counts"]["nucleotide"]["strand_aware"]
    assert (aw["tp"], aw["fp"], aw["fn"], aw["tn"]) == (tp, fp, fn, tn)
    p, r = bases(pred), bases(ref)
    ag = result["counts"]["nucleotide"]["strand_agnostic"]
    assert (ag["tp"], ag["fp"], ag["fn"]) == (len(p & r), len(p - r), len(r - p))
    assert ag["tn"] == n - len(p | r)

    def unique(features):
        return sorted({(f.start0, f.end0, f.strand) for f in features})

    def span(x):
        return set(range(x[0], x[1]))

    def tally(mine, theirs):
        matched = lonely = 0
        for a in mine:
            same = [b for b in theirs if b[2] == a[2]]
            shared = [len(span(a) & span(b)) for b in same]
            lonely += not any(shared)
            if exon:
                matched += a in same
            else:
                matched += any(
                    2 * s >= min(len(span(a)), len(span(b))) for s, b in zip(shared, same)
                )
        return matched, lonely

    fc = result["counts"]["feature"]
    assert (fc["matched_reference"], fc["missed_reference"]) == tally(unique(ref), unique(pred))
    assert (fc["matched_predicted"], fc["wrong_predicted"]) == tally(unique(pred), unique(ref))


# ---------------------------------------------------------------- choosing the type


def test_default_type_prefers_cds_then_the_only_shared_type() -> None:
    # the rule for the default --type
    assert choose_type({"gene", "CDS"}, {"gene", "CDS", "mRNA"}, None, "p", "r") == "CDS"
    assert choose_type({"CpG_island"}, {"CpG_island", "region"}, None, "p", "r") == "CpG_island"
    with pytest.raises(UsageError, match="exon, gene"):
        choose_type({"gene", "exon"}, {"gene", "exon"}, None, "p", "r")
    with pytest.raises(FeatureFormatError, match="no 'CDS' features"):
        choose_type({"gene"}, {"gene", "CDS"}, None, "p", "r")


def test_read_sequence_regions() -> None:
    # 1-based closed in the file (GFF3 specification gff3.md: ##sequence-region seqid
    # start end, 1-based), 0-based half-open returned
    assert read_sequence_regions(CDS_REF) == {"ctgA": (0, 100, 3)}
    assert read_sequence_regions(CDS_PRED) == {}


def _as_gtf(src: Path, dest: Path) -> Path:
    """The features of a GFF3 file as GTF 2.2 lines (columns 1-8 kept, mRNA written as
    ``transcript``; column 9 as ``key "value";`` pairs: gene_id and transcript_id from
    the GFF3 Parent chain, GTF 2.2 specification, from memory)."""
    out = []
    parent: dict[str, str] = {}
    for line in src.read_text().splitlines():
        if line.startswith("#"):
            continue
        cols = line.split("\t")
        attrs = dict(kv.split("=", 1) for kv in cols[8].split(";"))
        if cols[2] == "gene":
            ids = f'gene_id "{attrs["ID"]}";'
        elif cols[2] == "mRNA":
            parent[attrs["ID"]] = attrs["Parent"]
            cols[2] = "transcript"
            ids = f'gene_id "{attrs["Parent"]}"; transcript_id "{attrs["ID"]}";'
        elif "Parent" in attrs:
            ids = f'gene_id "{parent[attrs["Parent"]]}"; transcript_id "{attrs["Parent"]}";'
        else:
            ids = f'gene_id "{attrs["ID"]}";'
        out.append("\t".join(cols[:8]) + "\t" + ids)
    dest.write_text("\n".join(out) + "\n")
    return dest


def test_gtf_files_compare_as_their_gff3_twins(tmp_path: Path) -> None:
    want = compare_files(CDS_PRED, CDS_REF)
    # by name ...
    pred = _as_gtf(CDS_PRED, tmp_path / "pred.gtf")
    got = compare_files(pred, CDS_REF)
    assert got["inputs"]["predicted"] == str(pred)
    got["inputs"] = want["inputs"]
    assert got == want
    # ... and by content; a GTF reference has no ##sequence-region line, so the
    # length of ctgA must come from --region or the other file
    ref = _as_gtf(CDS_REF, tmp_path / "ref.annotation")
    with pytest.raises(FeatureFormatError, match="length of 'ctgA' is not known"):
        compare_files(pred, ref)
    got = compare_files(CDS_PRED, ref, region="ctgA:1-100")
    want = compare_files(CDS_PRED, CDS_REF, region="ctgA:1-100")
    got["inputs"] = want["inputs"]
    assert got["sequences"] == [
        {"seqid": "ctgA", "start_1based": 1, "end_1based": 100, "from": "region"}
    ]
    assert got == want


# ---------------------------------------------------------------- CLI outputs


def test_cli_table_on_stdout() -> None:
    code, out, err = run(["compare", CDS_PRED, CDS_REF])
    assert code == 0 and err.startswith("seqstate: CDS, ") and err.count("\n") == 1  # summary
    rows = {line[:24].strip(): line[24:].split(None, 1) for line in out.splitlines()}
    # values from test_cds_example_counts_by_hand, 4 decimals
    assert rows["base strand-agnostic Sn"] == ["0.7500", "30 of 40 reference bases"]
    assert rows["base strand-aware Sp"] == ["0.5405", "20 of 37 predicted bases"]  # 20/37
    assert rows["base strand-agnostic AC"][1] == "TP 30, FP 7, FN 10, TN 53"
    assert rows["feature Sn"] == ["0.2500", "1 of 4 reference exons matched"]
    assert rows["missed (ME)"][0] == "0.5000" and rows["wrong (WE)"][0] == "0.5000"
    assert "1 duplicate counted once" in out and str(CDS_REF) in out


def test_cli_tsv_and_json_reports(tmp_path) -> None:
    tsv, js = tmp_path / "r.tsv", tmp_path / "r.json"
    for path in (tsv, js):
        code, out, err = run(["compare", CDS_PRED, CDS_REF, "-o", path])
        assert code == 0 and out == "" and str(path) in err
    lines = tsv.read_text().splitlines()
    assert lines[0] == "metric\tvalue"
    rows = dict(line.split("\t") for line in lines[1:])
    assert all(len(line.split("\t")) == 2 for line in lines)
    assert rows["type"] == "CDS" and rows["region"] == "NA"
    assert rows["nucleotide.strand_agnostic.sensitivity"] == "0.750000"  # 30/40
    assert rows["nucleotide.strand_aware.specificity"] == "0.540541"  # 20/37
    assert rows["feature.wrong"] == "0.500000"  # 2/4
    assert rows["counts.nucleotide.strand_aware.tn"] == "143"
    assert rows["counts.feature.reference_duplicates"] == "1"
    data = json.loads(js.read_text())
    assert set(data) >= {"nucleotide", "feature", "counts", "inputs", "type", "region"}
    assert set(data["nucleotide"]) == {"strand_aware", "strand_agnostic"}
    assert data["region"] is None and data["inputs"]["reference"] == str(CDS_REF)
    assert data["nucleotide"]["strand_aware"]["sensitivity"] == 0.5  # 20/40
    assert data["counts"]["nucleotide"]["strand_agnostic"]["tn"] == 53
    # the TSV is the JSON flattened
    assert report_tsv(data) == tsv.read_text()


def test_cli_region_option() -> None:
    code, out, _ = run(["compare", CDS_PRED, CDS_REF, "--region", "ctgA:15-75"])
    assert code == 0
    assert "ctgA:15-75, 61 bases" in out
    assert "TP 21, FP 2, FN 10, TN 28" in out  # test_region_clips_bases_...


def test_reports_are_deterministic(tmp_path) -> None:
    # same inputs, same bytes; shuffled feature lines give the same figures
    a, b = tmp_path / "a.json", tmp_path / "b.json"
    run(["compare", ISL_PRED, ISL_REF, "-o", a])
    run(["compare", ISL_PRED, ISL_REF, "-o", b])
    assert a.read_bytes() == b.read_bytes()
    pred, ref = read_gff3(CDS_PRED), read_gff3(CDS_REF)
    first = compare_features(pred, ref, {"ctgA": 100}, "CDS")
    rng = random.Random(7)
    for _ in range(5):
        rng.shuffle(pred)
        rng.shuffle(ref)
        again = compare_features(pred, ref, {"ctgA": 100}, "CDS")
        assert again == first


# ---------------------------------------------------------------- bad input


def test_no_feature_of_the_type(tmp_path) -> None:
    out = tmp_path / "r.tsv"
    line = check_error(["compare", ISL_PRED, CDS_REF, "--type", "CDS", "-o", out], 1, str(ISL_PRED))
    assert "no 'CDS' features" in line and "CpG_island" in line  # lists what the file has
    assert not out.exists()
    # by default CDS is chosen because the reference has it; the prediction has none
    check_error(["compare", ISL_PRED, CDS_REF], 1, str(ISL_PRED), "'CDS'")
    check_error(["compare", CDS_PRED, CDS_REF, "--type", "exon"], 1, str(CDS_PRED), "'exon'")


def test_malformed_gff3_line_is_named() -> None:
    # bad_columns.gff3 line 4 has 7 tab-separated columns (GFF3 has 9; specification 1.26)
    check_error(["compare", DATA / "bad_columns.gff3", CDS_REF], 1, "bad_columns.gff3 line 4", "9")


def test_unknown_seqid_length() -> None:
    check_error(
        ["compare", DATA / "no_length_pred.gff3", CDS_REF],
        1,
        "no_length_pred.gff3 line 4",
        "'ctgZ'",
        "##sequence-region",
    )
    # a region on ctgZ gives the span: no error
    code, out, _ = run(["compare", DATA / "no_length_pred.gff3", CDS_REF, "--region", "ctgZ:1-20"])
    assert code == 0 and "ctgZ:1-20, 20 bases" in out


def test_feature_outside_its_sequence_is_an_error(tmp_path) -> None:
    ref = tmp_path / "ref.gff3"
    ref.write_text(CDS_REF.read_text().replace("ctgA 1 100", "ctgA 1 85"))
    # the predicted CDS 86-90 (line 9 of cds_pred.gff3) lies past base 85
    check_error(["compare", CDS_PRED, ref], 1, "cds_pred.gff3 line 9", "86-90", "ctgA:1-85")


def test_usage_errors(tmp_path) -> None:
    check_error(["compare", CDS_PRED, CDS_REF, "-o", tmp_path / "r.txt"], 2, ".tsv or .json")
    check_error(["compare", CDS_PRED, CDS_REF, "--region", "ctgA:50-150"], 2, "outside")
    check_error(["compare", CDS_PRED, CDS_REF, "--region", "ctgA:9-3"], 2, "START")
    check_error(["compare", "-", CDS_REF], 2, "standard input")
    both = tmp_path / "both.gff3"
    both.write_text(
        "##gff-version 3\nctgA\tt\tgene\t1\t9\t.\t+\t.\tID=g\nctgA\tt\texon\t1\t9\t.\t+\t.\tID=e\n"
    )
    check_error(["compare", both, both], 2, "gene", "exon", "--type")


def test_bad_sequence_region_line(tmp_path) -> None:
    ref = tmp_path / "ref.gff3"
    ref.write_text(CDS_REF.read_text().replace("ctgA 1 100", "ctgA 100 1"))
    check_error(["compare", CDS_PRED, ref], 1, "ref.gff3 line 4", "##sequence-region")


def test_missing_file(tmp_path) -> None:
    check_error(["compare", tmp_path / "none.gff3", CDS_REF], 1, "none.gff3", "not found")


def test_gzip_input(tmp_path) -> None:
    import gzip

    gz = tmp_path / "ref.gff3.gz"
    with open(CDS_REF, "rb") as src, gzip.open(gz, "wb") as dst:
        shutil.copyfileobj(src, dst)
    assert compare_files(CDS_PRED, gz)["counts"] == compare_files(CDS_PRED, CDS_REF)["counts"]


# ---------------------------------------------------------------- transcripts and genes
# A transcript is right when every exon is exact and none is missing or extra; a gene
# when one of its transcripts is (common practice for gene-level accuracy, as the
# exon level of Burset & Guigó 1996 carried to whole transcripts; from memory).

GENE_REF = """##gff-version 3
##sequence-region ctgA 1 200
ctgA\tref\tgene\t11\t60\t.\t+\t.\tID=A
ctgA\tref\tmRNA\t11\t40\t.\t+\t.\tID=A1;Parent=A
ctgA\tref\tmRNA\t11\t60\t.\t+\t.\tID=A2;Parent=A
ctgA\tref\tCDS\t11\t20\t.\t+\t0\tID=a.c;Parent=A1,A2
ctgA\tref\tCDS\t31\t40\t.\t+\t2\tID=a1.c;Parent=A1
ctgA\tref\tCDS\t51\t60\t.\t+\t2\tID=a2.c;Parent=A2
ctgA\tref\tgene\t71\t80\t.\t-\t.\tID=B
ctgA\tref\tmRNA\t71\t80\t.\t-\t.\tID=B1;Parent=B
ctgA\tref\tCDS\t71\t80\t.\t-\t0\tParent=B1
ctgA\tref\tgene\t101\t130\t.\t+\t.\tID=C
ctgA\tref\tmRNA\t101\t130\t.\t+\t.\tID=C1;Parent=C
ctgA\tref\tCDS\t101\t110\t.\t+\t0\tParent=C1
ctgA\tref\tCDS\t121\t130\t.\t+\t2\tParent=C1
"""
GENE_PRED = """##gff-version 3
ctgA\tp\tgene\t11\t60\t.\t+\t.\tID=P1
ctgA\tp\tmRNA\t11\t60\t.\t+\t.\tID=P1.t;Parent=P1
ctgA\tp\tCDS\t11\t20\t.\t+\t0\tParent=P1.t
ctgA\tp\tCDS\t51\t60\t.\t+\t2\tParent=P1.t
ctgA\tp\tgene\t71\t80\t.\t-\t.\tID=P2
ctgA\tp\tmRNA\t71\t80\t.\t-\t.\tID=P2.t;Parent=P2
ctgA\tp\tCDS\t71\t80\t.\t-\t0\tParent=P2.t
ctgA\tp\tgene\t101\t133\t.\t+\t.\tID=P3
ctgA\tp\tmRNA\t101\t133\t.\t+\t.\tID=P3.t;Parent=P3
ctgA\tp\tCDS\t101\t110\t.\t+\t0\tParent=P3.t
ctgA\tp\tCDS\t121\t133\t.\t+\t2\tParent=P3.t
ctgA\tp\tgene\t150\t160\t.\t+\t.\tID=P4
ctgA\tp\tmRNA\t150\t160\t.\t+\t.\tID=P4.t;Parent=P4
ctgA\tp\tCDS\t150\t160\t.\t+\t0\tParent=P4.t
"""


@pytest.fixture
def gene_files(tmp_path: Path) -> tuple[Path, Path]:
    pred, ref = tmp_path / "pred.gff3", tmp_path / "ref.gff3"
    pred.write_text(GENE_PRED)
    ref.write_text(GENE_REF)
    return pred, ref


def test_transcript_and_gene_level_by_hand(gene_files) -> None:
    r = compare_files(*gene_files)
    # transcripts: reference A1, A2 (shares the exon 11-20 through two parents), B1, C1;
    # predicted P1.t = A2 exactly, P2.t = B1, P3.t differs from C1 in its last exon end,
    # P4.t lies where the reference has nothing
    assert r["counts"]["transcript"] == {
        "reference": 4,
        "predicted": 4,
        "matched_reference": 2,  # A2, B1
        "matched_predicted": 2,  # P1.t, P2.t
    }
    assert r["transcript"] == {"sensitivity": 2 / 4, "specificity": 2 / 4}
    assert r["counts"]["gene"] == {
        "reference": 3,
        "predicted": 4,
        "matched_reference": 2,  # A (through A2), B
        "matched_predicted": 2,  # P1, P2
        "missed_reference": 0,  # C is overlapped by P3
        "wrong_predicted": 1,  # P4 overlaps nothing
    }
    assert r["gene"] == {"sensitivity": 2 / 3, "specificity": 2 / 4, "missed": 0.0, "wrong": 0.25}
    assert r["missed_genes"] == [
        {
            "id": "C",
            "seqid": "ctgA",
            "start_1based": 101,
            "end_1based": 130,
            "strand": "+",
            "transcripts": 1,
            "overlapped": True,
        }
    ]
    assert [
        (g["id"], g["start_1based"], g["end_1based"], g["overlapped"]) for g in r["wrong_genes"]
    ] == [("P3", 101, 133, True), ("P4", 150, 160, False)]


def test_a_transcript_with_an_extra_or_missing_exon_is_not_right() -> None:
    def tx(parent: str, *spans: tuple[int, int]) -> list[Feature]:
        return [
            Feature("c", "t", "CDS", a - 1, b, None, "+", 0, [("Parent", parent)]) for a, b in spans
        ]

    ref = tx("r", (1, 10), (21, 30))
    for pred, right in (
        (tx("p", (1, 10), (21, 30)), True),
        (tx("p", (1, 10), (21, 30), (41, 50)), False),  # one exon more
        (tx("p", (1, 10)), False),  # one exon fewer
        (tx("p", (1, 10), (21, 31)), False),  # one end off by one
    ):
        r = compare_features(pred, ref, {"c": 60}, "CDS")
        assert r["counts"]["transcript"]["matched_reference"] == int(right), pred
        assert r["counts"]["gene"]["matched_predicted"] == int(right), pred
        assert (r["missed_genes"] == []) is right


def test_wrong_strand_transcript_is_not_right() -> None:
    ref = [Feature("c", "t", "CDS", 0, 10, None, "+", 0, [("Parent", "r")])]
    pred = [Feature("c", "t", "CDS", 0, 10, None, "-", 0, [("Parent", "p")])]
    r = compare_features(pred, ref, {"c": 20}, "CDS")
    assert r["gene"]["sensitivity"] == 0.0
    assert r["missed_genes"][0]["overlapped"] is False  # overlap needs the same strand


def test_gene_level_in_a_region_and_for_islands(gene_files) -> None:
    r = compare_files(*gene_files, region="ctgA:95-140")
    # only C (reference) and P3 (predicted) have an exon in 95-140
    assert r["counts"]["gene"]["reference"] == 1 and r["counts"]["gene"]["predicted"] == 1
    assert r["gene"]["sensitivity"] == 0.0
    # the overlap rule (islands) has no gene level
    assert "gene" not in compare_files(ISL_PRED, ISL_REF)


def test_gene_level_from_gtf_equals_gff3(gene_files, tmp_path: Path) -> None:
    # GFF3 -> GTF 2.2 twin (_as_gtf); a line with two parents becomes two GTF lines
    pred, ref = gene_files
    lines = []
    for line in GENE_REF.splitlines():
        if "Parent=A1,A2" in line:
            lines.append(line.replace("Parent=A1,A2", "Parent=A1"))
            lines.append(line.replace("Parent=A1,A2", "Parent=A2"))
        else:
            lines.append(line)
    ref2 = tmp_path / "ref2.gff3"
    ref2.write_text("\n".join(lines) + "\n")
    want = compare_files(pred, ref, region="ctgA:1-200")
    got = compare_files(
        _as_gtf(pred, tmp_path / "p.gtf"), _as_gtf(ref2, tmp_path / "r.gtf"), region="ctgA:1-200"
    )  # GTF has no ##sequence-region line: the length comes from the region
    for key in ("transcript", "gene", "missed_genes", "wrong_genes"):
        assert got[key] == want[key], key


def test_cli_lists_missed_and_wrong_genes(gene_files, tmp_path: Path) -> None:
    pred, ref = gene_files
    code, out, err = run(["compare", pred, ref])
    assert code == 0 and "gene Sn 0.6667" in err
    rows = {line[:24].strip(): line[24:].split(None, 1) for line in out.splitlines()}
    assert rows["gene Sn"] == ["0.6667", "2 of 3 reference genes with an exact transcript"]
    assert rows["transcript Sp"][0] == "0.5000"
    assert "  * C  ctgA:101-130 +" in out.splitlines()
    assert "    P4  ctgA:150-160 +" in out.splitlines()
    listing, report = tmp_path / "genes.tsv", tmp_path / "r.tsv"
    code, out, err = run(["compare", pred, ref, "-o", report, "--gene-list", listing])
    assert code == 0 and out == ""
    assert listing.read_text().splitlines() == [
        "type\tstatus\tfile\tgene_id\tseqid\tstart_1based\tend_1based\tstrand\ttranscripts"
        "\toverlapped",
        "CDS\tmissed\treference\tC\tctgA\t101\t130\t+\t1\tyes",
        "CDS\twrong\tpredicted\tP3\tctgA\t101\t133\t+\t1\tyes",
        "CDS\twrong\tpredicted\tP4\tctgA\t150\t160\t+\t1\tno",
    ]
    tsv = dict(line.split("\t") for line in report.read_text().splitlines()[1:])
    assert tsv["missed_genes"] == "C" and tsv["wrong_genes"] == "P3,P4"
    assert tsv["gene.sensitivity"] == "0.666667" and tsv["counts.gene.wrong_predicted"] == "1"
    # the gene list alone, the table still on stdout; an existing list needs --force
    code, out, _ = run(["compare", pred, ref, "--gene-list", listing])
    assert code == 2 and out == ""
    code, out, _ = run(["compare", pred, ref, "--gene-list", listing, "--force"])
    assert code == 0 and "gene Sn" in out


def test_gene_list_same_file_as_report_is_refused(gene_files, tmp_path: Path) -> None:
    pred, ref = gene_files
    same = tmp_path / "x.tsv"
    check_error(["compare", pred, ref, "-o", same, "--gene-list", same], 2, "same file")
    assert not same.exists()


def test_table_lists_at_most_ten_genes_and_says_how_many_more() -> None:
    from seqstate.commands.compare import report_table

    pred = [
        Feature("c", "t", "CDS", 10 * i, 10 * i + 5, None, "+", 0, [("ID", f"p{i:02d}")])
        for i in range(12)
    ]
    ref = [Feature("c", "t", "CDS", 200, 210, None, "+", 0, [("ID", "r")])]
    r = compare_features(pred, ref, {"c": 300}, "CDS")
    assert [g["id"] for g in r["wrong_genes"]] == [f"p{i:02d}" for i in range(12)]
    lines = report_table(r).splitlines()
    head = lines.index(
        "predicted genes not in the reference (12; 1-based; * overlaps the other file):"
    )
    assert lines[head + 1] == "    p00  c:1-5 +"
    assert lines[head + 10] == "    p09  c:91-95 +"
    assert lines[head + 11] == "  ... 2 more (all of them: --gene-list FILE.tsv)"
    assert "    r  c:201-210 +" in lines  # the one reference gene, missed


# ---------------------------------------------------------------- two assemblies
def test_files_of_two_assemblies_are_an_error_naming_both_id_sets(tmp_path):
    pred, ref = tmp_path / "p.gff3", tmp_path / "r.gff3"
    pred.write_text("##gff-version 3\nchr4\tx\tCDS\t1\t30\t.\t+\t0\tID=a\n")
    ref.write_text(
        "##gff-version 3\n"
        + "".join(f"NC_{k}\tx\tCDS\t1\t30\t.\t+\t0\tID=b{k}\n" for k in range(8))
    )
    line = check_error(["compare", pred, ref], 1, "share no sequence ID", "'chr4'", "'NC_0'")
    assert "(8 in all)" in line and "'NC_7'" not in line  # shortened
    assert check_error(["compare", pred, ref, "--all-sequences"], 1, "share no sequence ID")


def test_plot_reference_of_another_assembly_is_an_error(tmp_path):
    pytest.importorskip("matplotlib")
    fa = tmp_path / "s.fa"
    fa.write_text(">sim1\n" + "ACGT" * 100 + "\n")
    ref = tmp_path / "r.gff3"
    ref.write_text("##gff-version 3\nchrZ\tx\tCpG_island\t1\t30\t.\t.\t.\tID=b\n")
    out = tmp_path / "f.png"
    check_error(
        ["plot", fa, "--region", "sim1:1-100", "-m", "cpg-island", "-o", out, "--reference", ref],
        1,
        "share no sequence ID",
        "'chrZ'",
        "'sim1'",
    )
    assert not out.exists()
