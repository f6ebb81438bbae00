"""Benchmark the many-genomes workflow against `seqstate annotate` on each assembly in turn.

Samples N synthetic assemblies from the built-in cpg-island model (default 6 of 50 Mbp, 10
records each, seeds 101..106), then times, on the same inputs:

- sequential: `seqstate annotate ASM.fa --jobs C` for each assembly, one after another
  (without `--jobs` when this seqstate has no such option);
- workflow: `snakemake --cores C` on workflow/Snakefile (index, split, annotate groups,
  merge, summary), from a fresh results folder;

and prints the wall times, the throughput and the workflow's overhead (workflow / sequential
- 1).  It also checks that both give the same GFF3 bytes, so the two did the same work.

    python benchmarks/bench_workflow.py [--assemblies 6] [--mbp 50] [--records 10]
        [--cores 2] [--group-mbp 20] [--keep]

Do not run the full size on a shared machine; `--mbp 2 --group-mbp 1` is a quick check.
"""

from __future__ import annotations

import argparse
import os
import platform
import shlex
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent


def run(cmd: list[str], cwd: Path | None = None) -> float:
    """Wall seconds of one child process; exits with its stderr if it fails."""
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        sys.exit(f"benchmark child failed: {shlex.join(cmd)}\n{proc.stderr[-4000:]}")
    return wall


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--assemblies", type=int, default=6)
    ap.add_argument("--mbp", type=float, default=50.0, help="bases per assembly, in Mbp")
    ap.add_argument("--records", type=int, default=10, help="records per assembly")
    ap.add_argument("--cores", type=int, default=2)
    ap.add_argument("--group-mbp", type=float, default=20.0, help="workflow scatter size")
    ap.add_argument("--model", default="cpg-island")
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder")
    args = ap.parse_args()

    import numba
    import numpy

    import seqstate

    print("command:", " ".join([Path(sys.executable).name, *sys.argv]))
    print(
        f"machine: {platform.machine()}, {os.cpu_count()} cores "
        f"({len(os.sched_getaffinity(0))} usable), Python {platform.python_version()}, "
        f"numpy {numpy.__version__}, numba {numba.__version__}, seqstate {seqstate.__version__}"
    )
    exe = [sys.executable, "-m", "seqstate"]
    work = Path(tempfile.mkdtemp(prefix="seqstate-bench-wf-"))
    try:
        length = int(args.mbp * 1e6 / args.records)
        names = [f"asm{i + 1}" for i in range(args.assemblies)]
        for i, name in enumerate(names):
            run([*exe, "sample", args.model, "--length", str(length), "--records",
                 str(args.records), "--seed", str(101 + i), "--prefix", f"{name}_",
                 "-o", str(work / f"{name}.fa"), "-q"])  # fmt: skip
        total = length * args.records * args.assemblies
        help_text = subprocess.run(
            [*exe, "annotate", "--help"], capture_output=True, text=True
        ).stdout
        jobs = ["--jobs", str(args.cores)] if "--jobs" in help_text else []

        t_seq = 0.0
        for name in names:
            t_seq += run([*exe, "annotate", str(work / f"{name}.fa"), "-m", args.model,
                          "-o", str(work / "seq" / name), "--stem", name, "-q", *jobs])  # fmt: skip

        sheet = work / "samples.tsv"
        sheet.write_text(
            "assembly\tfasta\tmodel\n" + "".join(f"{n}\t{n}.fa\t{args.model}\n" for n in names)
        )
        t_wf = run([
            sys.executable, "-m", "snakemake", "-s", str(REPO / "workflow" / "Snakefile"),
            "--configfile", str(REPO / "workflow" / "config.yaml"),
            "--directory", str(work / "wf"), "--cores", str(args.cores), "--quiet",
            "--config", f"samples={sheet}", "seqstate=" + shlex.join(exe),
            f"scatter={{'group_bases': {int(args.group_mbp * 1e6)}, 'max_groups': 64}}",
        ])  # fmt: skip
        for name in names:
            a = (work / "seq" / name / f"{name}.gff3").read_bytes()
            b = (work / "wf" / "results" / name / f"{name}.gff3").read_bytes()
            if a != b:
                sys.exit(f"{name}: workflow GFF3 differs from the direct run's")
        groups = sum(
            len(list((work / "wf" / "results" / n / "groups.d").glob("*.txt"))) for n in names
        )
        print(
            f"input: {args.assemblies} assemblies x {args.mbp:g} Mbp ({args.records} records "
            f"of {length:,} bases), model {args.model}, {groups} groups in the workflow, "
            f"annotate {' '.join(jobs) or '(no --jobs option)'}"
        )
        print(f"{'run':<34}{'wall s':>10}{'Mbp/s':>10}")
        print(f"{'sequential seqstate annotate':<34}{t_seq:>10.1f}{total / 1e6 / t_seq:>10.2f}")
        print(f"{'workflow (snakemake --cores ' + str(args.cores) + ')':<34}"
              f"{t_wf:>10.1f}{total / 1e6 / t_wf:>10.2f}")  # fmt: skip
        print(f"workflow overhead: {100 * (t_wf / t_seq - 1):+.1f} % (same GFF3 bytes)")
    finally:
        if args.keep:
            print("kept:", work)
        else:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
