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

#: 10 records of 200,000 bases = 2 Mbp per model (the size README.md states), seeds 1 and 2 (a run
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
    # ECE (Guo et al. 2017) with 10 bins over 2 Mbp: at most 0.002, as README.md says
    # (our bound; measured 0.00009-0.00144 over these models and seeds by
    # benchmarks/calibration_ece.py, so the margin is at least 28 %)
    assert lab.bases.n == LENGTH * RECORDS
    assert lab.bases.ece() <= 0.002
    assert lab.features.n == lab.n_features > 0
    wrong = sampled(model, seed, with_stay(model, label, stay))
    (bad,) = [x for x in wrong if x.label == label]
    # the wrong model, decoding the same samples: its base-level ECE (Guo et al. 2017) is at
    # least 10 times the right model's (our threshold; measured 21.7-166x), and its decoded
    # features are far from their segment probabilities (ECE >= 0.3, measured 0.63-0.78;
    # right models here: 0.004-0.136; benchmarks/calibration_ece.py prints them)
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
    assert "share no sequence ID" in line and "'chrX'" in line and "'sim1'" in line
    assert not out.exists()


def test_truth_on_some_absent_sequences_is_ignored_with_a_warning(tmp_path: Path) -> None:
    fa, truth = sample_files(tmp_path, "casino", 2000, 1, 1)
    more = tmp_path / "more.gff3"
    more.write_text(truth.read_text() + "chrX\tx\tloaded\t1\t10\t.\t.\t.\tID=x\n")
    code, lines = run(["calibrate", "casino", "--fasta", fa, "--truth", more])
    assert code == 0, lines
    warns = [line for line in lines if line.startswith("warning:")]
    assert len(warns) == 1 and "'chrX'" in warns[0] and "ignored" in warns[0]


def test_truth_past_record_end(tmp_path: Path) -> None:
    fa, _ = sample_files(tmp_path, "casino", 500, 1, 1)
    bad = tmp_path / "bad.bed"
    bad.write_text("sim1\t490\t510\tloaded\n")
    line = one_error(["calibrate", "casino", "--fasta", fa, "--truth", bad], 1)
    assert "bad.bed line 1" in line and "510" in line and "500 bases" in line


def _segment_probability_oracle(model: Model, x: np.ndarray, runs, state: int) -> list[float]:
    """P(every base of [a, b) is in ``state`` | x) for an order-0 model, by the tests' own
    scaled forward-backward (the HMM definition; no seqstate code): a forward pass held
    in ``state`` over the run, joined to the backward vector at its last base."""
    trans, emis = model.transitions, model.emissions[:, 0, :]
    n, k = len(x), model.n_states
    end = np.ones(k) if model.end is None else model.end
    alpha, scale = np.zeros((n, k)), np.zeros(n)
    for t in range(n):
        a = (model.start if t == 0 else alpha[t - 1] @ trans) * emis[:, x[t]]
        scale[t] = a.sum()
        alpha[t] = a / scale[t]
    beta = np.zeros((n, k))
    beta[-1] = end / (alpha[-1] @ end)
    for t in range(n - 2, -1, -1):
        beta[t] = trans @ (emis[:, x[t + 1]] * beta[t + 1]) / scale[t + 1]
    keep = np.zeros(k)
    keep[state] = 1.0
    out = []
    for a0, b0 in runs:
        held = (model.start if a0 == 0 else alpha[a0 - 1] @ trans) * emis[:, x[a0]] * keep
        held /= scale[a0]
        for t in range(a0 + 1, b0):
            held = (held @ trans) * emis[:, x[t]] * keep / scale[t]
        out.append(float(held @ beta[b0 - 1]))
    return out


def test_segment_probability_is_what_is_binned() -> None:
    # the features table bins each decoded feature's exact segment probability, and the
    # outcome is "every base truly in the label"; checked against an oracle that shares
    # no code with seqstate: the Viterbi path of hmmlearn 0.3.3 (CategoricalHMM, same
    # tables) gives the features (casino decodes by Viterbi, min_length 1), the tests'
    # own forward-backward their probabilities, the sampled path the outcomes
    from hmmlearn import hmm

    model = load_model("casino")
    (rec,) = list(sampled_records(model, 3000, 1, 9))
    (lab,) = calibrate_records(model, [rec], 10)[0]
    x = rec.symbols.astype(np.int64)
    ref = hmm.CategoricalHMM(n_components=2, init_params="", params="")
    ref.startprob_, ref.transmat_ = model.start, model.transitions
    ref.emissionprob_ = model.emissions[:, 0, :]
    _, path = ref.decode(x.reshape(-1, 1), algorithm="viterbi")
    loaded = np.flatnonzero(np.diff(np.r_[0, path == 1, 0].astype(np.int8)))
    runs = list(zip(loaded[::2], loaded[1::2]))
    probs = _segment_probability_oracle(model, x, runs, 1)
    truth = [bool(np.all(rec.group[a:b] == 0)) for a, b in runs]  # group 0: loaded
    want = Reliability(10)
    want.add(np.array(probs), np.array(truth))
    assert lab.n_features == len(runs) > 10
    assert np.array_equal(lab.features.count, want.count)
    np.testing.assert_allclose(lab.features.sum_prob, want.sum_prob, rtol=1e-9, atol=1e-12)
    assert np.array_equal(lab.features.sum_true, want.sum_true)
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


# ---------------------------------------------------------------- chosen types, derived introns
GENE_FASTA_LENGTH = 6000


def gene_files(tmp: Path) -> tuple[Path, Path]:
    """A synthetic record and a synthetic database-style GFF3 (region, gene, mRNA, exon,
    CDS; no intron lines): two transcripts, one per strand, and one CDS without parent."""
    rng = np.random.default_rng(5)
    seq = "".join(rng.choice(list("ACGT"), GENE_FASTA_LENGTH))
    fa = tmp / "g.fa"
    fa.write_text(">chrS synthetic\n" + "\n".join(seq[i : i + 60] for i in range(0, len(seq), 60)))
    rows = [
        ("region", 1, GENE_FASTA_LENGTH, "+", ".", "ID=chrS"),
        ("gene", 101, 1500, "+", ".", "ID=g1"),
        ("mRNA", 101, 1500, "+", ".", "ID=t1;Parent=g1"),
        ("exon", 101, 400, "+", ".", "Parent=t1"),
        ("CDS", 201, 400, "+", "0", "Parent=t1"),
        ("CDS", 601, 700, "+", "1", "Parent=t1"),
        ("CDS", 1001, 1300, "+", "0", "Parent=t1"),
        ("pseudogene", 2001, 2500, "+", ".", "ID=p1"),
        ("gene", 3001, 4500, "-", ".", "ID=g2"),
        ("mRNA", 3001, 4500, "-", ".", "ID=t2;Parent=g2"),
        ("CDS", 3101, 3300, "-", "0", "Parent=t2"),
        ("CDS", 3901, 4200, "-", "0", "Parent=t2"),
    ]
    gff = tmp / "g.gff3"
    gff.write_text(
        "##gff-version 3\n"
        + "".join(f"chrS\tsyn\t{t}\t{a}\t{b}\t.\t{s}\t{p}\t{at}\n" for t, a, b, s, p, at in rows)
    )
    return fa, gff


def test_database_gff3_needs_type_and_lists_labels_once(tmp_path: Path) -> None:
    fa, gff = gene_files(tmp_path)
    line = one_error(["calibrate", "gene-segment", "--fasta", fa, "--truth", gff], 1)
    assert "'region'" in line and "g.gff3 line 2" in line and "--type" in line
    assert line.count("CDS") == 1 and "expected one of CDS, intron " in line
    one_error(
        ["calibrate", "gene-segment", "--fasta", fa, "--truth", gff, "--type", "exon"],
        2,
        "--type exon",
        "its labels: CDS, intron)",
    )
    bed = tmp_path / "t.bed"
    bed.write_text("chrS\t0\t10\tCDS\n")
    one_error(
        ["calibrate", "gene-segment", "--fasta", fa, "--truth", bed, "--type", "CDS"],
        2,
        "read as BED",
    )


def test_type_cds_derives_introns_from_the_gaps_between_cds(tmp_path: Path) -> None:
    from seqstate.commands.calibrate import file_records
    from seqstate.kinds import track_groups

    fa, gff = gene_files(tmp_path)
    model = load_model("gene-segment")
    (rec,), keep = file_records(model, str(fa), str(gff), types=["CDS"])
    names = [g.track_name for g in track_groups(model)]
    assert [names[k] for k in keep] == names  # CDS and intron, both strands
    want = {name: np.zeros(GENE_FASTA_LENGTH, dtype=bool) for name in names}
    # the rows of gene_files, 1-based closed -> 0-based half-open, by hand
    for a, b in ((200, 400), (600, 700), (1000, 1300)):
        want["CDS.plus"][a:b] = True
    for a, b in ((400, 600), (700, 1000)):
        want["intron.plus"][a:b] = True
    for a, b in ((3100, 3300), (3900, 4200)):
        want["CDS.minus"][a:b] = True
    want["intron.minus"][3300:3900] = True
    assert rec.truth is not None
    for k, name in enumerate(names):
        assert np.array_equal(rec.truth[:, k], want[name]), name
    out = tmp_path / "r.json"
    code, lines = run(
        ["calibrate", "gene-segment", "--fasta", fa, "--truth", gff, "--type", "CDS", "-o", out]
    )
    assert code == 0, lines
    assert any(line.startswith("note:") and "3 intron(s) derived" in line for line in lines)
    doc = json.loads(out.read_text())
    assert [lab["track"] for lab in doc["labels"]] == names


def test_label_absent_from_the_truth_is_left_out_with_a_warning(tmp_path: Path) -> None:
    # flat CDS lines (no transcript) give no intron: the intron tracks are left out,
    # never scored against a truth that has none
    fa, _ = gene_files(tmp_path)
    flat = tmp_path / "flat.gff3"
    flat.write_text("##gff-version 3\nchrS\tsyn\tCDS\t201\t400\t.\t+\t0\tID=c1\n")
    out = tmp_path / "r.json"
    code, lines = run(["calibrate", "gene-segment", "--fasta", fa, "--truth", flat, "-o", out])
    assert code == 0, lines
    warns = [line for line in lines if line.startswith("warning:")]
    assert len(warns) == 1 and "no intron feature" in warns[0], warns
    assert "intron.plus, intron.minus left out" in warns[0]
    doc = json.loads(out.read_text())
    assert [lab["track"] for lab in doc["labels"]] == ["CDS.plus", "CDS.minus"]
    assert "intron" not in lines[-1]


def test_region_counts_only_its_bases_and_cuts_features_at_the_edge(tmp_path: Path) -> None:
    from seqstate.commands.calibrate import file_records

    fa, truth = sample_files(tmp_path, "casino", 3000, 2, 1)
    model = load_model("casino")
    whole, _ = file_records(model, str(fa), str(truth))
    (part,), _ = file_records(model, str(fa), str(truth), region="sim2:1001-2000")
    assert part.id == "sim2:1001-2000" and part.symbols.shape[0] == 1000
    assert whole[1].truth is not None and part.truth is not None
    assert np.array_equal(part.truth, whole[1].truth[1000:2000])  # cut at both edges
    out = tmp_path / "r.json"
    code, lines = run(
        ["calibrate", "casino", "--fasta", fa, "--truth", truth, "--region", "sim2:1001-2000"]
        + ["-o", out]
    )
    assert code == 0, lines
    doc = json.loads(out.read_text())
    assert doc["bases"] == 1000 and doc["records"] == 1 and doc["stretch"] == "sim2:1001-2000"
    assert doc["labels"][0]["bases"]["forecasts"] == 1000


def test_records_selection_on_truth(tmp_path: Path) -> None:
    fa, truth = sample_files(tmp_path, "casino", 2000, 3, 1)
    out = tmp_path / "r.json"
    code, lines = run(
        ["calibrate", "casino", "--fasta", fa, "--truth", truth, "--records", "sim3,sim1"]
        + ["-o", out]
    )
    assert code == 0, lines
    doc = json.loads(out.read_text())
    assert doc["records"] == 2 and doc["bases"] == 4000 and doc["stretch"] == "sim1, sim3"
    ids = tmp_path / "ids.txt"
    ids.write_text("sim2\n")
    code, lines = run(
        ["calibrate", "casino", "--fasta", fa, "--truth", truth, "--records-file", ids]
    )
    assert code == 0 and "1 truth record(s), 2000 bases" in lines[-1], lines
    one_error(
        ["calibrate", "casino", "--fasta", fa, "--truth", truth, "--records", "simX"],
        2,
        "'simX'",
    )
    one_error(
        ["calibrate", "casino", "--fasta", fa, "--truth", truth, "--records", "sim1"]
        + ["--region", "sim1"],
        2,
        "cannot be combined",
    )


@pytest.mark.parametrize(
    "extra, must",
    [
        (["--region", "sim1:1-10"], "--region only apply to --fasta"),
        (["--type", "loaded"], "--type only apply to --fasta"),
        (["--records", "sim1"], "sampling takes a number of records"),
    ],
)
def test_stretch_options_need_a_truth_file(extra: list, must: str) -> None:
    one_error(["calibrate", "casino", *extra], 2, must)
