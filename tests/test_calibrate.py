"""``seqstate calibrate``: reliability tables, ECE and Brier score, on samples or a truth file.

Measures: the Brier score (Brier 1950, "Verification of forecasts expressed in terms of
probability", Monthly Weather Review 78:1) and the expected calibration error (Guo, Pleiss,
Sun & Weinberger 2017, "On calibration of modern neural networks", ICML), both as defined
there (equal-width bins for ECE).  scikit-learn's ``brier_score_loss`` is the reference
library for the Brier score.
"""

from __future__ import annotations

import copy
import json
import math
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands.calibrate import (
    CalibrateReport,
    calibrate_records,
    sampled_records,
    write_tsv,
)
from seqstate.commands.calibration import Reliability, bin_of
from seqstate.commands.inputs import read_model_records
from seqstate.engine import api
from seqstate.io.tables import load_model
from seqstate.model import Model

#: 10 records of 200,000 bases = 2 Mbp per model (the issue's size), seeds 1 and 2 (a run
#: of the three models and both seeds takes about 10 s here after the kernels are compiled;
#: seed 7 was also tried by hand and passes).
LENGTH, RECORDS, SEEDS = 200_000, 10, (1, 2)
#: The label whose stay probability the wrong models change, and the wrong value.
WRONG = {"cpg-island": ("CpG_island", 0.9), "cpg-island-8": ("CpG_island", 0.9)}
WRONG["casino"] = ("loaded", 0.5)


def run(args: list) -> tuple[int, list[str]]:
    """The CLI in-process: (exit status, stderr lines); never a crash, nothing on stdout."""
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    assert "Traceback" not in result.stderr and result.stdout == ""
    return result.exit_code, result.stderr.splitlines()


def one_error(args: list, status: int, *must: str) -> str:
    code, lines = run(args)
    assert code == status, lines
    assert len(lines) == 1 and lines[0].startswith("error: "), lines
    for text in must:
        assert text in lines[0], (text, lines[0])
    return lines[0]


def with_stay(model: Model, label: str, stay: float) -> Model:
    """``model`` with P(stay among the states of ``label``) set to ``stay`` from each of them,
    the rest of each row scaled so it still sums to 1 (a deliberately wrong model)."""
    wrong = copy.deepcopy(model)
    t = wrong.transitions.copy()
    inside = np.zeros(model.n_states, dtype=bool)
    inside[model.states_of_label(label)] = True
    for i in np.flatnonzero(inside):
        s = t[i, inside].sum()
        t[i, inside] *= stay / s
        t[i, ~inside] *= (1.0 - stay) / (1.0 - s)
    wrong.transitions = t
    return wrong


# ---------------------------------------------------------------- the measures
def test_measures_by_hand() -> None:
    rel = Reliability(10)
    rel.add(np.array([0.05, 0.15, 0.95, 0.95]), np.array([0, 0, 1, 0]))
    # by hand from the definitions (Guo et al. 2017; Brier 1950):
    # ECE = (1 * 0.05 + 1 * 0.15 + 2 * |0.95 - 0.5|) / 4
    assert rel.ece() == pytest.approx((0.05 + 0.15 + 0.9) / 4, abs=1e-12)
    # Brier = mean squared difference
    assert rel.brier() == pytest.approx((0.05**2 + 0.15**2 + 0.05**2 + 0.95**2) / 4, abs=1e-12)
    rows = rel.rows()
    assert [r["count"] for r in rows] == [1, 1, 0, 0, 0, 0, 0, 0, 0, 2]
    # an empty bin has no mean and no fraction (None, not NaN)
    assert rows[4]["mean_forecast"] is None and rows[4]["fraction_true"] is None
    assert rows[9]["fraction_true"] == 0.5 and rows[9]["mean_forecast"] == pytest.approx(0.95)


def test_bin_edges() -> None:
    # equal-width bins, lower edge inside, 1.0 in the last bin (common practice)
    assert bin_of(np.array([0.0, 0.1, 0.0999, 0.5, 0.9999, 1.0]), 10).tolist() == [
        0,
        1,
        0,
        5,
        9,
        9,
    ]


def test_brier_against_scikit_learn() -> None:
    sklearn_metrics = pytest.importorskip("sklearn.metrics")
    rng = np.random.default_rng(5)
    p = rng.random(1000)
    y = rng.random(1000) < p
    rel = Reliability(7)
    rel.add(p[:400], y[:400])  # added in two parts: accumulation is exact
    rel.add(p[400:], y[400:])
    # reference library: scikit-learn brier_score_loss
    assert rel.brier() == pytest.approx(sklearn_metrics.brier_score_loss(y, p), rel=1e-12)
    # ECE against a direct loop over the definition (Guo et al. 2017)
    b = np.minimum((p * 7).astype(int), 6)
    direct = sum(abs(p[b == k].mean() - y[b == k].mean()) * (b == k).sum() for k in range(7))
    assert rel.ece() == pytest.approx(direct / 1000, rel=1e-12)


def test_empty_reliability() -> None:
    rel = Reliability(4)
    assert rel.ece() is None and rel.brier() is None and rel.n == 0
    assert json.dumps(rel.summary(), allow_nan=False)  # no NaN anywhere


# ---------------------------------------------------------------- on samples
def sampled(model: Model, seed: int, decoder: Model | None = None):
    labs, n_rec, n_bases = calibrate_records(
        decoder or model, sampled_records(model, LENGTH, RECORDS, seed), 10
    )
    assert (n_rec, n_bases) == (RECORDS, LENGTH * RECORDS)
    return labs


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("name", ["cpg-island", "cpg-island-8", "casino"])
def test_calibrated_on_own_samples_and_wrong_model_detected(name: str, seed: int) -> None:
    model = load_model(name)
    right = sampled(model, seed)
    label, stay = WRONG[name]
    (lab,) = [x for x in right if x.label == label]
    # issue 14 target: ECE (Guo et al. 2017) at most 0.02 with 10 bins over 2 Mbp
    assert lab.bases.n == LENGTH * RECORDS
    assert lab.bases.ece() <= 0.02
    assert lab.features.n == lab.n_features > 0
    wrong = sampled(model, seed, with_stay(model, label, stay))
    (bad,) = [x for x in wrong if x.label == label]
    # the wrong model, decoding the same samples: its base-level ECE (Guo et al. 2017) is at
    # least 10 times the right model's (our threshold; measured 37-165x), and its decoded
    # features are far from their segment probabilities (ECE >= 0.3; right models here:
    # 0.004-0.09, measured)
    assert bad.bases.ece() >= 10 * lab.bases.ece()
    assert bad.features.ece() is not None and bad.features.ece() >= 0.3
    # Brier (Brier 1950): the wrong model forecasts worse on the same outcomes
    assert bad.bases.brier() > lab.bases.brier()


def test_sampled_records_are_those_of_sample(tmp_path: Path) -> None:
    # calibrate draws exactly what `seqstate sample` writes for the same seed
    fa = tmp_path / "s.fa"
    code, _ = run(["sample", "casino", "--length", 500, "--records", 3, "--seed", 4, "-o", fa])
    assert code == 0
    model = load_model("casino")
    recs = read_model_records(str(fa), model)
    tables = api.prepare(model)
    drawn = list(sampled_records(model, 500, 3, 4))
    assert [r.id for r in drawn] == [r.id for r in recs]
    for rec, tr in zip(recs, drawn):
        assert np.array_equal(api.symbols_of(tables, rec.seq), tr.symbols)


def test_empty_bins_written_empty() -> None:
    model = load_model("casino")
    labs, n_rec, n_bases = calibrate_records(model, sampled_records(model, 300, 1, 0), 50)
    report = CalibrateReport("casino", "sampled", n_rec, n_bases, 50, 0, labs)
    import io

    buf = io.StringIO()
    write_tsv(buf, report)
    lines = [line.split("\t") for line in buf.getvalue().splitlines()]
    empty = [cells for cells in lines[1:] if cells[4] == "0"]
    assert empty, "50 bins over 300 bases leave some bin empty"
    for cells in empty:
        assert cells[5] == "" and cells[6] == ""
    assert "nan" not in buf.getvalue().lower()
    json.dumps(report.to_dict(), allow_nan=False)


# ---------------------------------------------------------------- the command
def test_cli_reports_figures_and_determinism(tmp_path: Path) -> None:
    outs = {}
    for run_no in (1, 2):
        d = tmp_path / str(run_no)
        d.mkdir()
        args = ["calibrate", "casino", "--length", 20000, "--records", 2, "--seed", 3]
        code, lines = run([*args, "-o", d / "r.tsv", "--figure", d / "f.svg"])
        assert code == 0, lines
        assert lines[-1].startswith("seqstate: 2 sampled record(s), 40000 bases, loaded ECE")
        code, lines = run([*args, "-o", d / "r.json", "--figure", d / "f.png", "-q"])
        assert code == 0 and lines == []
        outs[run_no] = {p.name: p.read_bytes() for p in d.iterdir()}
    assert outs[1] == outs[2]  # byte-identical for the same input
    data = json.loads(outs[1]["r.json"])
    assert data["source"] == "sampled" and data["seed"] == 3 and data["bases"] == 40000
    (lab,) = data["labels"]
    assert sum(b["count"] for b in lab["bases"]["bins"]) == 40000
    assert outs[1]["f.png"].startswith(b"\x89PNG")
    assert b"<svg" in outs[1]["f.svg"]
    tsv = outs[1]["r.tsv"].decode().splitlines()
    assert tsv[0].split("\t")[:5] == ["label", "forecast", "bin_low", "bin_high", "count"]
    assert len(tsv) == 1 + 2 * 11  # per table 10 bins and an "all" row


def test_cli_refuses_existing_output(tmp_path: Path) -> None:
    out = tmp_path / "r.tsv"
    out.write_text("mine\n")
    one_error(["calibrate", "casino", "--length", 100, "-o", out], 2, "already exists")
    assert out.read_text() == "mine\n"
    code, _ = run(["calibrate", "casino", "--length", 100, "-o", out, "--force", "-q"])
    assert code == 0 and out.read_text().startswith("label\t")


@pytest.mark.parametrize(
    "extra, must",
    [
        (["--bins", 0], "--bins 0"),
        (["--length", 0], "--length 0"),
        (["--records", 0], "--records 0"),
        (["--seed", -1], "--seed -1"),
        (["-o", "r.txt"], ".tsv, .json"),
        (["--figure", "f.gif"], ".png, .svg, .pdf"),
        (["--fasta", "x.fa"], "--fasta and --truth"),
        (["--fasta", "x.fa", "--truth", "t.bed", "--seed", 1], "--seed only apply"),
    ],
)
def test_cli_bad_options(tmp_path: Path, extra: list, must: str) -> None:
    one_error(["calibrate", "casino", *extra], 2, must)


# ---------------------------------------------------------------- against a truth file
def sample_files(tmp: Path, model: str, length: int, records: int, seed: int):
    fa, truth = tmp / "s.fa", tmp / "s.truth.gff3"
    code, lines = run(
        ["sample", model, "--length", length, "--records", records, "--seed", seed, "-o", fa]
        + ["--truth", truth]
    )
    assert code == 0, lines
    return fa, truth


def test_truth_file_gives_the_sampled_tables(tmp_path: Path) -> None:
    # the truth `sample` writes, read back, must give exactly the tables of the sampled run
    # (casino: every record holds loaded runs, so no record is left out for lack of truth)
    fa, truth = sample_files(tmp_path, "casino", 30000, 3, 2)
    code, lines = run(
        ["calibrate", "casino", "--fasta", fa, "--truth", truth, "-o"] + [tmp_path / "t.json"]
    )
    assert code == 0, lines
    code, _ = run(
        ["calibrate", "casino", "--length", 30000, "--records", 3, "--seed", 2]
        + ["-o", tmp_path / "s.json"]
    )
    assert code == 0
    t = json.loads((tmp_path / "t.json").read_text())
    s = json.loads((tmp_path / "s.json").read_text())
    assert t["source"] == "truth" and s["source"] == "sampled"
    assert t["labels"] == s["labels"]
    assert t["bases"] == s["bases"] == 90000


def test_truth_as_bed(tmp_path: Path) -> None:
    fa, truth = sample_files(tmp_path, "casino", 2000, 1, 1)
    bed = tmp_path / "t.bed"
    lines = []
    for line in truth.read_text().splitlines():
        if line and not line.startswith("#"):
            c = line.split("\t")
            lines.append(f"{c[0]}\t{int(c[3]) - 1}\t{c[4]}\t{c[2]}\n")  # GFF3 1-based -> BED
    bed.write_text("".join(lines))
    for t, name in ((truth, "g.json"), (bed, "b.json")):
        code, _ = run(["calibrate", "casino", "--fasta", fa, "--truth", t, "-o", tmp_path / name])
        assert code == 0
    g = json.loads((tmp_path / "g.json").read_text())
    b = json.loads((tmp_path / "b.json").read_text())
    assert g["labels"] == b["labels"]


def test_truth_partial_coverage_warns(tmp_path: Path) -> None:
    fa, truth = sample_files(tmp_path, "casino", 2000, 2, 1)
    kept = [
        line
        for line in truth.read_text().splitlines()
        if line.startswith("#") or line.split("\t")[0] == "sim1"
    ]
    part = tmp_path / "part.gff3"
    part.write_text("\n".join(kept) + "\n")
    code, lines = run(["calibrate", "casino", "--fasta", fa, "--truth", part])
    assert code == 0, lines
    warns = [line for line in lines if line.startswith("warning:")]
    assert len(warns) == 1 and "1 of 2 record(s)" in warns[0]
    assert lines[-1].startswith("seqstate: 1 truth record(s), 2000 bases")


def test_truth_label_the_model_lacks(tmp_path: Path) -> None:
    fa, _ = sample_files(tmp_path, "casino", 500, 1, 1)
    bad = tmp_path / "bad.gff3"
    bad.write_text("##gff-version 3\nsim1\tx\tCpG_island\t1\t10\t.\t.\t.\tID=a\n")
    out = tmp_path / "r.tsv"
    line = one_error(["calibrate", "casino", "--fasta", fa, "--truth", bad, "-o", out], 1)
    assert "bad.gff3 line 2" in line and "'CpG_island'" in line and "loaded" in line
    assert not out.exists()


def test_truth_on_absent_sequence(tmp_path: Path) -> None:
    fa, _ = sample_files(tmp_path, "casino", 500, 1, 1)
    bad = tmp_path / "bad.gtf"
    bad.write_text('chrX\tx\tloaded\t1\t10\t.\t+\t.\tgene_id "g"; transcript_id "t";\n')
    out = tmp_path / "r.json"
    line = one_error(["calibrate", "casino", "--fasta", fa, "--truth", bad, "-o", out], 1)
    assert "bad.gtf line 1" in line and "'chrX'" in line and "sim1" in line
    assert not out.exists()


def test_truth_past_record_end(tmp_path: Path) -> None:
    fa, _ = sample_files(tmp_path, "casino", 500, 1, 1)
    bad = tmp_path / "bad.bed"
    bad.write_text("sim1\t490\t510\tloaded\n")
    line = one_error(["calibrate", "casino", "--fasta", fa, "--truth", bad], 1)
    assert "bad.bed line 1" in line and "510" in line and "500 bases" in line


def test_segment_probability_is_what_is_binned() -> None:
    # the features table bins each decoded feature's exact segment probability (the engine's
    # restricted forward of seqstate), and the outcome is "every base truly in the label"
    model = load_model("casino")
    (rec,) = list(sampled_records(model, 3000, 1, 9))
    (lab,) = calibrate_records(model, [rec], 10)[0]
    assert lab.n_features == lab.features.n > 0
    assert 0 <= lab.n_correct <= lab.n_features
    assert lab.features.sum_true.sum() == lab.n_correct
    assert all(0.0 <= v <= 1.0 for v in lab.features.sum_prob / np.maximum(lab.features.count, 1))
    assert math.isfinite(lab.features.brier())


def test_chunked_accumulation_is_exact(monkeypatch: pytest.MonkeyPatch) -> None:
    # adding in chunks gives the counts of one pass (the same code of seqstate, chunk 1<<20
    # against a chunk of 7 forecasts)
    from seqstate.commands import calibration

    rng = np.random.default_rng(2)
    p, y = rng.random(100), rng.random(100) < 0.3
    whole = Reliability(10)
    whole.add(p, y)
    monkeypatch.setattr(calibration, "CHUNK", 7)
    parts = Reliability(10)
    parts.add(p, y)
    assert np.array_equal(whole.count, parts.count)
    assert np.allclose(whole.sum_prob, parts.sum_prob, rtol=1e-14)
    assert np.array_equal(whole.sum_true, parts.sum_true)
    assert parts.brier() == pytest.approx(whole.brier(), rel=1e-12)


def test_truth_without_any_feature_on_the_records(tmp_path: Path) -> None:
    fa, _ = sample_files(tmp_path, "casino", 500, 1, 1)
    empty = tmp_path / "empty.gff3"
    empty.write_text("##gff-version 3\n")
    one_error(["calibrate", "casino", "--fasta", fa, "--truth", empty], 1, "nothing to calibrate")
    one_error(["calibrate", "casino", "--fasta", fa, "--truth", tmp_path / "no.gff3"], 1, "no.gff3")
