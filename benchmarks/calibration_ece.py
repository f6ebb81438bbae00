#!/usr/bin/env python
"""The calibration figures of README.md ("Calibration"): ECE of right and wrong models.

Not a test.  Run from the repository root::

    PYTHONPATH=. python benchmarks/calibration_ece.py
    PYTHONPATH=. python benchmarks/calibration_ece.py --model cpg-island --seeds 1,2,7

For each model and seed: ``--records`` records of ``--length`` bases drawn from the model
(the draws of ``seqstate calibrate MODEL --length N --records R --seed S``), decoded by the
model itself and by the wrong model of ``tests/test_calibrate.py`` (the same label's stay
probability set to 0.9, loaded die 0.5); the expected calibration error (Guo et al. 2017,
ICML; 10 equal bins) of the per-base posteriors and of the decoded features' segment
probabilities, and the ratio of the base ECEs.  The test asserts bounds on the same
figures (``test_calibrated_on_own_samples_and_wrong_model_detected``); this prints them.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from benchmarks.benchutil import markdown_table, print_header  # noqa: E402
from seqstate.commands.calibrate import calibrate_records, sampled_records  # noqa: E402
from seqstate.io.tables import load_model  # noqa: E402
from tests.test_calibrate import LENGTH, RECORDS, SEEDS, WRONG, with_stay  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", action="append", help="model (repeatable; default: the three)")
    ap.add_argument("--seeds", default=",".join(map(str, SEEDS)))
    ap.add_argument("--length", type=int, default=LENGTH)
    ap.add_argument("--records", type=int, default=RECORDS)
    args = ap.parse_args()
    print_header()
    rows = []
    worst = {"right_base": 0.0, "ratio": float("inf"), "wrong_feature": float("inf")}
    right_feature = []
    for name in args.model or list(WRONG):
        model = load_model(name)
        label, stay = WRONG[name]
        wrong_model = with_stay(model, label, stay)
        for seed in (int(s) for s in args.seeds.split(",")):
            figures = []
            for decoder in (model, wrong_model):
                labs, _, _ = calibrate_records(
                    decoder, sampled_records(model, args.length, args.records, seed), 10
                )
                (lab,) = [x for x in labs if x.label == label]
                figures.append((lab.bases.ece(), lab.features.ece(), lab.n_features))
            (rb, rf, rn), (wb, wf, _) = figures
            ratio = wb / rb
            worst["right_base"] = max(worst["right_base"], rb)
            worst["ratio"] = min(worst["ratio"], ratio)
            worst["wrong_feature"] = min(worst["wrong_feature"], wf)
            right_feature.append(rf)
            rows.append(
                [name, str(seed), label, f"{rb:.5f}", f"{wb:.5f}", f"{ratio:.1f}x"]
                + [f"{rf:.4f}", f"{wf:.4f}", str(rn)]
            )
    print(f"{args.records} records of {args.length:,} bases per model and seed; 10 bins")
    head = ["model", "seed", "label", "base ECE", "base ECE, wrong model", "ratio"]
    head += ["feature ECE", "feature ECE, wrong model", "features"]
    print(markdown_table(head, rows))
    print(
        f"largest base ECE {worst['right_base']:.5f}; smallest ratio {worst['ratio']:.1f}x; "
        f"right models' feature ECE {min(right_feature):.4f}-{max(right_feature):.4f}; "
        f"smallest wrong feature ECE {worst['wrong_feature']:.4f}"
    )


if __name__ == "__main__":
    main()
