"""Benchmark `seqstate annotate` end to end (read, engine, decode, write).

Samples one record from the built-in cpg-island model (default 50 Mbp, fixed seed), then
runs the installed CLI in a fresh subprocess for each repeat and reports wall time,
throughput (Mbp/s) and the child's peak RSS.  Targets: at least 5 Mbp/s end to end on one
core, peak RSS under 1 GB.

    python benchmarks/bench_annotate.py [--mbp 50] [--repeat 3] [--decode posterior]
"""

from __future__ import annotations

import argparse
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def run_child(cmd: list[str]) -> tuple[float, float]:
    """Wall seconds and peak RSS (MiB) of one child process (its own rusage, via wait4)."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        sys.exit(f"benchmark child failed: {' '.join(cmd)}\n{proc.stderr.read().decode()}")
    return wall, usage.ru_maxrss / 1024.0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--mbp", type=float, default=50.0, help="record length in Mbp")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--decode", default="posterior", choices=["posterior", "viterbi"])
    ap.add_argument("--model", default="cpg-island")
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder")
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
    work = Path(tempfile.mkdtemp(prefix="seqstate-bench-"))
    n = int(args.mbp * 1e6)
    fasta = work / "bench.fa"
    exe = [sys.executable, "-m", "seqstate"]
    t0 = time.perf_counter()
    subprocess.run(
        exe
        + [
            "sample",
            args.model,
            "--length",
            str(n),
            "--seed",
            "11",
            "-o",
            str(fasta),
            "--prefix",
            "bench",
        ],
        check=True,
    )
    print(f"sampled {n / 1e6:.1f} Mbp from {args.model} in {time.perf_counter() - t0:.1f} s")
    # warm the numba cache so that compile time is not measured
    small = work / "small.fa"
    subprocess.run(
        exe + ["sample", args.model, "--length", "5000", "--seed", "1", "-o", str(small)],
        check=True,
    )
    subprocess.run(
        exe
        + [
            "annotate",
            str(small),
            "-o",
            str(work / "warm"),
            "-q",
            "--decode",
            args.decode,
            "-m",
            args.model,
        ],
        check=True,
    )
    walls, rss = [], []
    for r in range(args.repeat):
        out = work / f"out{r}"
        wall, peak = run_child(
            exe
            + [
                "annotate",
                str(fasta),
                "-o",
                str(out),
                "-q",
                "--decode",
                args.decode,
                "-m",
                args.model,
            ]
        )
        walls.append(wall)
        rss.append(peak)
        shutil.rmtree(out)
    wall = statistics.median(walls)
    print()
    print(
        f"| model | decode | length (Mbp) | wall (s, median of {args.repeat}) | Mbp/s "
        "| peak RSS (MiB) |"
    )
    print("|---|---|---|---|---|---|")
    print(
        f"| {args.model} | {args.decode} | {n / 1e6:.1f} | {wall:.2f} | {n / 1e6 / wall:.2f} "
        f"| {max(rss):.0f} |"
    )
    print("\ntargets: >= 5 Mbp/s end to end on one core; peak RSS < 1024 MiB")
    if not args.keep:
        shutil.rmtree(work)


if __name__ == "__main__":
    main()
