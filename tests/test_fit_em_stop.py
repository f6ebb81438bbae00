"""`seqstate fit --em`: the default --tol converges on the synthetic demo, and the summary line
says why EM stopped (converged below --tol, or --max-iter reached)."""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.commands.fit import DEFAULT_TOL
from seqstate.io.tables import load_model

DEMO = Path(__file__).resolve().parent.parent / "examples" / "cex_draft1.fa.gz"


def _fit(tmp_path: Path, name: str, *extra: str):
    res = CliRunner().invoke(
        main, ["fit", str(DEMO), "-m", "cpg-island", "--em", *extra, "-o", str(tmp_path / name)]
    )
    assert res.exit_code == 0, res.output
    summary = [x for x in res.stderr.splitlines() if x.startswith("seqstate: ")]
    assert len(summary) == 1, res.stderr
    return summary[0], load_model(tmp_path / name).provenance


def test_cli_default_tol_is_the_fit_default():
    opt = next(p for p in main.commands["fit"].params if p.name == "tol")
    assert opt.default == DEFAULT_TOL


@pytest.fixture(scope="module")
def limit(tmp_path_factory) -> float:
    """The demo's EM log-likelihood at a much tighter tolerance (the value EM tends to)."""
    _, prov = _fit(tmp_path_factory.mktemp("limit"), "m", "--tol", "1e-12", "--max-iter", "200")
    assert prov["iterations"] < 200  # it did converge to 1e-12
    return float(prov["loglik_nat"])


def test_default_tol_converges_on_the_demo(tmp_path, limit):
    line, prov = _fit(tmp_path, "m")
    # more than one update, and within 1e-3 nats of the tight run's log-likelihood: the
    # default stops where further iterations change nothing that matters (common practice:
    # EM is stopped once the log-likelihood gain is negligible, not after the first step)
    assert prov["iterations"] >= 2
    assert abs(float(prov["loglik_nat"]) - limit) < 1e-3
    assert prov["stop_reason"].startswith(f"converged after {prov['iterations']} iterations")
    assert re.search(
        r"; EM converged after \d+ iterations: relative gain \S+ \(change / \|previous "
        r"log-likelihood\|\) below --tol 1e-08 -> ",
        line,
    ), line


def test_summary_says_max_iter_was_reached(tmp_path):
    line, prov = _fit(tmp_path, "m", "--max-iter", "1")
    assert prov["iterations"] == 1
    assert "; EM stopped at --max-iter 1, last relative gain " in line, line
    assert "(not converged to --tol 1e-08)" in line, line


def test_counting_alone_has_no_em_stop_in_its_summary(tmp_path):
    truth = DEMO.with_name("cex_draft1.truth.gff3")
    res = CliRunner().invoke(
        main,
        ["fit", str(DEMO), "-m", "cpg-island", "--labels", str(truth), "-o", str(tmp_path / "c")],
    )
    assert res.exit_code == 0, res.output
    (line,) = [x for x in res.stderr.splitlines() if x.startswith("seqstate: ")]
    assert "EM" not in line.split(":", 1)[1].replace("(EM)", ""), line
