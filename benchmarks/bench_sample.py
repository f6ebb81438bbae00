"""Benchmark `seqstate sample` memory: peak RSS per base at growing lengths.

Runs the installed CLI in a fresh subprocess per length (one record, fixed seed, FASTA and
truth GFF3 written to a temporary folder) and reports wall time and the child's peak RSS,
total and per base above a 1 Mbp run (the fixed cost: interpreter, numba, model).  Records
are drawn and written a chunk at a time, so the extra bytes per base should fall towards 0
as the length grows (a whole-record sampler costs a constant ~20 bytes per base).

    python benchmarks/bench_sample.py [--mbp 20 100] [--model cpg-island]
"""

from __future__ import annotations

import argparse
import os
import platform
import shutil
import sys
import tempfile
from pathlib import Path

from bench_annotate import run_child


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--mbp", type=float, nargs="+", default=[20.0, 100.0], help="lengths, Mbp")
    ap.add_argument("--model", default="cpg-island")
    args = ap.parse_args()

    import numba
    import numpy

    import seqstate

    print("command:", " ".join([Path(sys.executable).name, *sys.argv]))
    print(
        f"machine: {platform.machine()}, {os.cpu_count()} cores, Python "
        f"{platform.python_version()}, numpy {numpy.__version__}, numba {numba.__version__}, "
        f"seqstate {seqstate.__version__}"
    )
    work = Path(tempfile.mkdtemp(prefix="seqstate-bench-sample-"))
    try:
        rows = []
        base_rss = None
        for mbp in [1.0, *args.mbp]:
            n = int(mbp * 1e6)
            cmd = [sys.executable, "-m", "seqstate", "sample", args.model, "--length", str(n)]
            cmd += ["--seed", "1", "-o", str(work / "s.fa"), "--truth", str(work / "s.gff3")]
            wall, rss = run_child([*cmd, "--force", "-q"])
            if base_rss is None:
                base_rss = rss
            extra = (rss - base_rss) * 2**20 / n
            rows.append((mbp, wall, rss, rss * 2**20 / n, extra))
        print(f"model {args.model}, one record, seed 1")
        print(f"{'Mbp':>8} {'wall s':>8} {'peak MiB':>9} {'B/base':>8} {'B/base > 1 Mbp':>15}")
        for mbp, wall, rss, per, extra in rows:
            print(f"{mbp:8.1f} {wall:8.2f} {rss:9.1f} {per:8.2f} {extra:15.3f}")
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
