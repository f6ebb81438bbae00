"""Recalibration tables: pool-adjacent-violators, temperature maps, the table file,
``calibrate --fit-into`` and the ``calibrated_`` scores of ``annotate``.

References: isotonic regression by pool-adjacent-violators (Ayer, Brunk, Ewing, Reid &
Silverman 1955, Ann. Math. Stat. 26:641; used for calibration by Zadrozny & Elkan 2002,
KDD) is checked against brute force over every partition into consecutive blocks (the
least-squares non-decreasing fit is constant on such blocks, at each block's weighted
mean: common practice) and against scikit-learn's ``IsotonicRegression`` (the reference
library); temperature maps as Guo, Pleiss, Sun & Weinberger 2017 (ICML) define them.
"""

from __future__ import annotations

import itertools
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from hypothesis import given, settings
from hypothesis import strategies as st

from seqstate.cli import main
from seqstate.io.recal_table import render_recalibration
from seqstate.io.tables import load_model
from seqstate.model.recalibration import (
    FineBins,
    Map,
    Recalibration,
    choose_map,
    fit_isotonic,
    fit_temperature,
    pav,
)


def run(args: list) -> tuple[int, list[str]]:
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    assert "Traceback" not in result.stderr
    return result.exit_code, result.stderr.splitlines()


def one_error(args: list, *must: str) -> str:
    code, lines = run(args)
    assert code != 0, lines
    assert len(lines) == 1 and lines[0].startswith("error: "), lines
    for text in must:
        assert text in lines[0], (text, lines[0])
    return lines[0]


# ---------------------------------------------------------------- pool-adjacent-violators
def brute_isotonic(y: np.ndarray, w: np.ndarray) -> np.ndarray:
    """Least-squares non-decreasing fit by trying every partition into consecutive blocks."""
    n = len(y)
    best, best_sse = None, np.inf
    for cuts in itertools.product((False, True), repeat=n - 1):
        edges = [0] + [i + 1 for i, c in enumerate(cuts) if c] + [n]
        fit = np.empty(n)
        for a, b in zip(edges, edges[1:]):
            fit[a:b] = np.sum(w[a:b] * y[a:b]) / np.sum(w[a:b])
        if np.any(np.diff(fit) < -1e-12):
            continue
        sse = float(np.sum(w * (fit - y) ** 2))
        if sse < best_sse - 1e-12:
            best, best_sse = fit, sse
    assert best is not None
    return best


@pytest.mark.parametrize("seed", range(40))
def test_pav_matches_brute_force(seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 9))
    y = rng.integers(0, 4, n) / 3.0 if seed % 2 else rng.random(n)
    w = rng.integers(1, 5, n).astype(float)
    assert np.allclose(pav(y, w), brute_isotonic(y, w), atol=1e-12)  # brute force, above


@pytest.mark.parametrize("seed", range(10))
def test_pav_matches_scikit_learn(seed: int) -> None:
    sklearn_isotonic = pytest.importorskip("sklearn.isotonic")
    rng = np.random.default_rng(100 + seed)
    n = int(rng.integers(2, 300))
    x = np.sort(rng.random(n))
    y = (rng.random(n) < x**2).astype(float)
    w = rng.integers(1, 20, n).astype(float)
    ref = sklearn_isotonic.IsotonicRegression().fit_transform(x, y, sample_weight=w)
    assert np.allclose(pav(y, w), ref, atol=1e-10)  # scikit-learn IsotonicRegression


def test_pav_refuses_weights_that_are_not_positive() -> None:
    with pytest.raises(ValueError):
        pav(np.array([0.5, 0.2]), np.array([1.0, 0.0]))


# ---------------------------------------------------------------- maps
def _grid() -> np.ndarray:
    return np.concatenate([[0.0, 1e-9, 1e-4], np.linspace(0, 1, 501), [1 - 1e-9, 1.0]])


@settings(max_examples=60, deadline=None)
@given(
    st.lists(
        st.tuples(st.floats(0, 1, allow_nan=False), st.booleans(), st.integers(1, 50)),
        min_size=1,
        max_size=60,
    ),
    st.sampled_from(["isotonic", "temperature"]),
)
def test_maps_are_monotone_into_the_unit_interval(points, kind) -> None:
    x = np.array([p[0] for p in points])
    y = np.array([float(p[1]) for p in points])
    w = np.array([float(p[2]) for p in points])
    if kind == "isotonic":
        m = fit_isotonic(x, y, w)
    else:
        from seqstate.model.recalibration import logit

        m = fit_temperature(logit(x), w, w * y)
    g = np.sort(_grid())
    v = m.apply(g)
    assert np.all(np.diff(v) >= 0)  # monotone: the property the issue asks for
    assert np.all((v >= 0) & (v <= 1))


@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.floats(0, 1, allow_nan=False), min_size=2, max_size=80),
    st.integers(0, 2**31),
)
def test_applying_a_map_never_reorders_forecasts(forecasts, seed) -> None:
    rng = np.random.default_rng(seed)
    x = rng.random(200)
    y = (rng.random(200) < x ** rng.uniform(0.3, 3)).astype(float)
    for m in (
        fit_isotonic(x, y, np.ones(200)),
        Map("temperature", temperature=rng.uniform(0.2, 5)),
    ):
        p = np.array(forecasts)
        c = m.apply(p)
        i, j = np.meshgrid(np.arange(len(p)), np.arange(len(p)))
        assert not np.any((p[i] < p[j]) & (c[i] > c[j]))  # no pair swaps its order


def test_isotonic_recovers_a_known_curve() -> None:
    # forecasts p come true with probability p**2: the map must find p -> p**2
    rng = np.random.default_rng(3)
    p = rng.random(400_000)
    y = rng.random(400_000) < p**2
    bins = FineBins(5)
    for f in range(5):
        bins.add(f, p[f::5], y[f::5])
    choice = choose_map(bins)
    assert choice.map.kind == "isotonic"
    g = np.linspace(0.05, 0.95, 19)
    assert np.max(np.abs(choice.map.apply(g) - g**2)) < 0.02


def test_temperature_recovers_a_known_temperature() -> None:
    # outcomes drawn at sigmoid(z / 2): the fitted temperature is close to 2
    rng = np.random.default_rng(4)
    z = rng.normal(0, 3, 200_000)
    p = 1 / (1 + np.exp(-z))
    y = rng.random(z.shape[0]) < 1 / (1 + np.exp(-z / 2))
    bins = FineBins(1)
    bins.add(0, p, y)
    n, _, zz, s = bins.pooled([0])
    assert abs(fit_temperature(zz, n, s).temperature - 2.0) < 0.05


def test_thin_data_does_not_try_isotonic() -> None:
    bins = FineBins(5)
    bins.add(0, np.array([0.2, 0.9, 0.8]), np.array([0, 1, 1]))
    bins.add(1, np.array([0.3, 0.7]), np.array([0, 1]))
    choice = choose_map(bins)
    assert choice.thin and choice.map.kind == "temperature"
    assert "isotonic" not in choice.held_out


# ---------------------------------------------------------------- on a model's own samples
@pytest.fixture(scope="module")
def casino_recal(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("recal") / "casino-r"
    code, lines = run(
        ["calibrate", "casino", "--length", 200_000, "--records", 10, "--seed", 1]
        + ["--fit-into", out, "--quiet"]
    )
    assert code == 0, lines
    return out


def test_own_samples_leave_the_model_nearly_unchanged(casino_recal: Path) -> None:
    m = load_model(casino_recal)
    assert m.recalibration is not None
    assert set(m.recalibration.maps) == {("loaded", "posterior"), ("loaded", "segment_probability")}
    g = _grid()
    for key, mp in m.recalibration.maps.items():
        # a model is calibrated on its own samples: every map within 0.01 of the identity
        assert np.max(np.abs(mp.apply(g) - g)) <= 0.01, key


def test_table_listed_in_the_manifest_and_input_unchanged(casino_recal: Path) -> None:
    text = (casino_recal / "model.toml").read_text()
    assert 'recalibration = "recalibration.tsv"' in text
    assert "[recalibration]" in text and "stretches" in text
    assert (casino_recal / "recalibration.tsv").read_text().startswith("# seqstate recalibration")
    base = load_model("casino")
    assert base.recalibration is None  # the input model is never changed
    m = load_model(casino_recal)
    for name in ("start", "transitions", "emissions"):
        assert np.array_equal(getattr(m, name), getattr(base, name))


def test_model_check_shows_the_table(casino_recal: Path) -> None:
    result = CliRunner().invoke(main, ["model", "check", str(casino_recal)])
    assert result.exit_code == 0
    assert "recalib.  recalibration.tsv: 2 maps" in result.stdout
    assert "loaded segment_probability" in result.stdout


def test_refuses_to_measure_in_sample(casino_recal: Path) -> None:
    one_error(
        ["calibrate", casino_recal, "--length", 200_000, "--records", 10, "--seed", 1],
        "in-sample",
    )
    code, lines = run(["calibrate", casino_recal, "--length", 20_000, "--records", 2, "--seed", 2])
    assert code == 0 and "(calibrated " in lines[-1], lines


def test_fit_into_refuses_an_existing_folder(casino_recal: Path) -> None:
    one_error(["calibrate", "casino", "--length", 1000, "--fit-into", casino_recal], "--force")


def test_fit_into_never_writes_over_its_input(casino_recal: Path) -> None:
    one_error(
        ["calibrate", casino_recal, "--length", 1000, "--seed", 9, "--fit-into", casino_recal]
        + ["--force"]
    )


def test_annotate_writes_raw_and_calibrated_scores(casino_recal: Path, tmp_path: Path) -> None:
    fa = tmp_path / "s.fa"
    assert run(["sample", "casino", "--length", 20_000, "--seed", 5, "-o", fa])[0] == 0
    assert run(["annotate", fa, "-m", "casino", "-o", tmp_path / "raw", "--quiet"])[0] == 0
    assert run(["annotate", fa, "-m", casino_recal, "-o", tmp_path / "cal", "--quiet"])[0] == 0
    raw = (tmp_path / "raw" / "s.features.tsv").read_text().splitlines()
    cal = (tmp_path / "cal" / "s.features.tsv").read_text().splitlines()
    head = cal[0].split("\t")
    assert head[head.index("segment_probability") + 1] == "calibrated_segment_probability"
    assert head[head.index("mean_posterior") + 1] == "calibrated_mean_posterior"
    assert len(raw) == len(cal) > 5
    raw_head = raw[0].split("\t")
    rows = [dict(zip(head, r.split("\t"))) for r in cal[1:]]
    for r_raw, r_cal in zip(raw[1:], rows):
        # same features in the same order, raw scores unchanged
        assert dict(zip(raw_head, r_raw.split("\t"))) == {k: r_cal[k] for k in raw_head}
    p = np.array([float(r["segment_probability"]) for r in rows])
    c = np.array([float(r["calibrated_segment_probability"]) for r in rows])
    i, j = np.meshgrid(np.arange(len(p)), np.arange(len(p)))
    assert not np.any((p[i] < p[j]) & (c[i] > c[j]))  # the ranking is kept
    gff = (tmp_path / "cal" / "s.gff3").read_text()
    assert "segment_probability=" in gff and "calibrated_segment_probability=" in gff


def test_fit_on_one_region_and_measure_on_another(tmp_path: Path) -> None:
    fa, truth = tmp_path / "s.fa", tmp_path / "s.gff3"
    code, _ = run(["sample", "casino", "--length", 60_000, "--seed", 3, "-o", fa, "--truth", truth])
    assert code == 0
    out = tmp_path / "r"
    code, lines = run(
        ["calibrate", "casino", "--fasta", fa, "--truth", truth, "--region", "sim1:1-30000"]
        + ["--fit-into", out, "--fold-block", 5000, "--quiet"]
    )
    assert code == 0, lines
    meta = load_model(out).extra["recalibration"]
    assert meta["stretches"] == ["sim1:1-30000"] and len(meta["truth_sha256"]) == 64
    one_error(
        ["calibrate", out, "--fasta", fa, "--truth", truth, "--region", "sim1:29001-40000"],
        "in-sample",
    )
    one_error(["calibrate", out, "--fasta", fa, "--truth", truth], "in-sample")
    report = tmp_path / "m.json"
    code, lines = run(
        ["calibrate", out, "--fasta", fa, "--truth", truth, "--region", "sim1:30001-60000"]
        + ["-o", report, "--quiet"]
    )
    assert code == 0, lines
    lab = json.loads(report.read_text())["labels"][0]
    assert lab["calibrated"]["bases"]["forecasts"] == 30_000


def test_models_without_a_table_write_no_calibrated_columns(tmp_path: Path) -> None:
    fa = tmp_path / "s.fa"
    assert run(["sample", "casino", "--length", 5000, "--seed", 5, "-o", fa])[0] == 0
    assert run(["annotate", fa, "-m", "casino", "-o", tmp_path / "a", "--quiet"])[0] == 0
    assert "calibrated" not in (tmp_path / "a" / "s.features.tsv").read_text()
    assert "calibrated" not in (tmp_path / "a" / "s.gff3").read_text()


def test_table_round_trip(casino_recal: Path) -> None:
    m = load_model(casino_recal)
    assert m.recalibration is not None
    text = render_recalibration(m.recalibration)
    assert text == (casino_recal / "recalibration.tsv").read_text()
    iso = Recalibration(
        {("loaded", "posterior"): Map("isotonic", np.array([0.1, 0.5]), np.array([0.0, 0.7]))}
    )
    (casino_recal.parent / "copy").mkdir(exist_ok=True)
    shutil.copytree(casino_recal, casino_recal.parent / "copy" / "m", dirs_exist_ok=True)
    (casino_recal.parent / "copy" / "m" / "recalibration.tsv").write_text(render_recalibration(iso))
    back = load_model(casino_recal.parent / "copy" / "m").recalibration
    assert back is not None and back.equals(iso)


# ---------------------------------------------------------------- bad tables
HEAD = "group\tscore\tmethod\ttemperature\tforecast\tcalibrated\n"
BAD_TABLES = {
    "header": ("group\tscore\tmethod\n", "header is"),
    "empty": ("# only a comment\n", "table is empty"),
    "no map": (HEAD, "no map"),
    "columns": (HEAD + "loaded\tposterior\tisotonic\t\t0.5\n", "found 5 columns"),
    "group": (HEAD + "island\tposterior\ttemperature\t1.0\t\t\n", "not a track"),
    "score": (HEAD + "loaded\tmean\ttemperature\t1.0\t\t\n", "score 'mean'"),
    "method": (HEAD + "loaded\tposterior\tspline\t\t0.5\t0.5\n", "method 'spline'"),
    "mixed": (
        HEAD + "loaded\tposterior\tisotonic\t\t0.5\t0.5\nloaded\tposterior\ttemperature\t1\t\t\n",
        "one map has one method",
    ),
    "two temperatures": (
        HEAD + "loaded\tposterior\ttemperature\t1\t\t\nloaded\tposterior\ttemperature\t2\t\t\n",
        "second temperature row",
    ),
    "temperature zero": (HEAD + "loaded\tposterior\ttemperature\t0\t\t\n", "above 0"),
    "temperature text": (HEAD + "loaded\tposterior\ttemperature\thot\t\t\n", "above 0"),
    "temperature with knot": (
        HEAD + "loaded\tposterior\ttemperature\t1\t0.5\t0.5\n",
        "empty forecast and calibrated",
    ),
    "knot with temperature": (
        HEAD + "loaded\tposterior\tisotonic\t1\t0.5\t0.5\n",
        "empty temperature cell",
    ),
    "forecast above 1": (HEAD + "loaded\tposterior\tisotonic\t\t1.5\t0.5\n", "outside 0..1"),
    "calibrated below 0": (HEAD + "loaded\tposterior\tisotonic\t\t0.5\t-0.1\n", "outside 0..1"),
    "not a number": (HEAD + "loaded\tposterior\tisotonic\t\tx\t0.5\n", "not a number"),
    "not increasing": (
        HEAD + "loaded\tposterior\tisotonic\t\t0.5\t0.5\nloaded\tposterior\tisotonic\t\t0.5\t0.6\n",
        "does not increase",
    ),
    "not monotone": (
        HEAD + "loaded\tposterior\tisotonic\t\t0.2\t0.5\nloaded\tposterior\tisotonic\t\t0.6\t0.4\n",
        "monotone",
    ),
}


@pytest.mark.parametrize("case", sorted(BAD_TABLES))
def test_bad_table_is_one_error_line(tmp_path: Path, casino_recal: Path, case: str) -> None:
    text, must = BAD_TABLES[case]
    folder = tmp_path / "m"
    shutil.copytree(casino_recal, folder)
    (folder / "recalibration.tsv").write_text(text)
    line = one_error(["model", "check", folder], "recalibration.tsv", must)
    assert "line" in line or case in ("empty",), line


# ---------------------------------------------------------------- tracks, streaming, report
def _annotate(fa: Path, model: Path | str, out: Path, *extra) -> None:
    code, lines = run(["annotate", fa, "-m", model, "-o", out, "--quiet", *extra])
    assert code == 0, lines


def test_calibrated_tracks_are_the_map_of_the_raw_track(casino_recal: Path, tmp_path: Path) -> None:
    fa = tmp_path / "s.fa"
    assert run(["sample", "casino", "--length", 3000, "--seed", 5, "-o", fa])[0] == 0
    _annotate(fa, casino_recal, tmp_path / "a", "--calibrated-tracks", "--precision", 6)
    raw = (tmp_path / "a" / "s.loaded.bedgraph").read_text().splitlines()[1:]
    cal = (tmp_path / "a" / "s.loaded.calibrated.bedgraph").read_text().splitlines()[1:]
    m = load_model(casino_recal).recalibration.get("loaded", "posterior")  # type: ignore[union-attr]
    assert m is not None

    def per_base(lines: list[str]) -> np.ndarray:
        out = np.full(3000, np.nan)
        for ln in lines:
            _, a, b, v = ln.split("\t")
            out[int(a) : int(b)] = float(v)
        return out

    r, c = per_base(raw), per_base(cal)
    assert not np.isnan(r).any() and not np.isnan(c).any()
    assert np.max(np.abs(m.apply(r) - c)) < 2e-6  # rounding to 6 digits, both sides
    one_error(
        ["annotate", fa, "-m", "casino", "-o", tmp_path / "b", "--calibrated-tracks"],
        "needs a recalibrated model",
    )


@pytest.mark.parametrize("name", ["casino", "gene-segment"])
def test_streaming_path_writes_the_same_calibrated_scores(
    name: str, casino_recal: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from seqstate.commands import annotate_run

    if name == "casino":
        model = casino_recal
        fa = tmp_path / "s.fa"
        assert run(["sample", "casino", "--length", 30_000, "--seed", 6, "-o", fa])[0] == 0
    else:
        model = tmp_path / "gs-r"
        code, lines = run(
            ["calibrate", "gene-segment", "--length", 60_000, "--records", 2, "--seed", 4]
            + ["--fit-into", model, "--quiet"]
        )
        assert code == 0, lines
        fa = tmp_path / "s.fa"
        assert run(["sample", "gene-segment", "--length", 60_000, "--seed", 8, "-o", fa])[0] == 0
    _annotate(fa, model, tmp_path / "whole", "--calibrated-tracks")
    monkeypatch.setattr(annotate_run, "long_threshold", lambda *a: 1000)
    monkeypatch.setattr(annotate_run, "window_length", lambda *a: 8192)
    _annotate(fa, model, tmp_path / "stream", "--calibrated-tracks")
    for f in sorted((tmp_path / "whole").iterdir()):
        if f.suffix in (".tsv", ".gff3", ".bedgraph") and "records" not in f.name:
            assert f.read_text() == (tmp_path / "stream" / f.name).read_text(), f.name
    tsv = (tmp_path / "whole" / "s.features.tsv").read_text()
    assert "calibrated_segment_probability" in tsv.splitlines()[0]
    if name == "gene-segment":
        head = tsv.splitlines()[0].split("\t")
        assert head[head.index("exon_probability") + 1] == "calibrated_exon_probability"
        assert "calibrated_structure_probability" in head
        assert "calibrated_exon_probability=" in (tmp_path / "whole" / "s.gff3").read_text()


def test_html_report_shows_raw_and_calibrated_reliability(tmp_path: Path) -> None:
    pytest.importorskip("matplotlib")
    fa, truth = tmp_path / "s.fa", tmp_path / "s.gff3"
    assert (
        run(["sample", "casino", "--length", 40_000, "--seed", 3, "-o", fa, "--truth", truth])[0]
        == 0
    )
    model = tmp_path / "r"
    code, lines = run(
        ["calibrate", "casino", "--fasta", fa, "--truth", truth, "--region", "sim1:1-20000"]
        + ["--fit-into", model, "--fold-block", 2000, "--quiet"]
    )
    assert code == 0, lines
    out = tmp_path / "a"
    _annotate(
        fa, model, out, "--region", "sim1:20001-40000", "--report", "r.html", "--truth", truth
    )
    page = (out / "r.html").read_text()
    assert "calibrated bases" in page and "calibrated features" in page
    assert "in-sample" not in page
    _annotate(fa, model, tmp_path / "b", "--report", "r.html", "--truth", truth)
    assert "in-sample" in (tmp_path / "b" / "r.html").read_text()  # marked, not refused


def test_shipped_plant_table_is_fitted_inside_the_training_half() -> None:
    from seqstate.commands.recalibrate import overlaps, stretches_of

    m = load_model("gene-segment-athaliana")
    assert m.recalibration is not None and len(m.recalibration.maps) == 12
    fitted = stretches_of(m)
    assert sorted(fitted) == ["NC_003070.9:1-7500000", "NC_003070.9:7500001-15000000"]
    # the data rule: fitting and tuning only on positions 1-15,000,000
    assert overlaps(fitted, ["NC_003070.9:15000001-30427671"]) == []
    assert overlaps(fitted, ["NC_003070.9:14999000-15001000"]) != []
    assert overlaps(fitted, ["NC_003070.9"]) != []  # a whole record holds them
    g = np.sort(_grid())
    for mp in m.recalibration.maps.values():
        v = mp.apply(g)
        assert np.all(np.diff(v) >= 0) and v.min() >= 0 and v.max() <= 1


@pytest.mark.parametrize("opt", [["--folds", 3], ["--fold-block", 1000]])
def test_fold_options_need_fit_into(opt: list) -> None:
    one_error(["calibrate", "casino", "--length", 1000, *opt], "only apply to --fit-into")


@pytest.mark.parametrize(
    "opt, must", [(["--folds", 1], "--folds 1"), (["--fold-block", 0], "--fold-block 0")]
)
def test_fold_options_are_checked(tmp_path: Path, opt: list, must: str) -> None:
    one_error(["calibrate", "casino", "--length", 1000, "--fit-into", tmp_path / "x", *opt], must)
    assert not (tmp_path / "x").exists()
