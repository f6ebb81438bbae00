"""Whole genomes on one machine: `seqstate annotate` end to end, --jobs 2 against --jobs 1.

Inputs are synthetic, made by `seqstate sample` with fixed seeds (stated in the output):
an assembly of many records (default 2,000 records of 100 kb = 200 Mbp, cpg-island, seed
101), and single records of 50 and 250 Mbp (cpg-island, seeds 102 and 103).  For each run
the child's wall time, Mbp/s and peak RSS (its own rusage) are printed in one table, with
the ratio of --jobs 2 to --jobs 1 side by side.  Targets (issue "whole genomes"):

- cpg-island, tracks on: >= 25 Mbp/s with --jobs 2 and >= 1.7x --jobs 1 (assembly);
- gene-segment, all scores: >= 2 Mbp/s with --jobs 2 (assembly);
- peak RSS < 1 GB on the 250 Mbp record for either model, and at 250 Mbp within 1.25x of
  the peak at 50 Mbp;
- --region of 1 kb from the 250 Mbp file (plain and bgzip) in < 0.5 s once indexed.

    python benchmarks/bench_genome.py [--scale 1.0] [--skip-genes] [--keep]

``--scale 0.1`` makes every input ten times smaller (a quick check, not the targets).
"""

from __future__ import annotations

import argparse
import os
import platform
import shutil
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
    code = os.waitstatus_to_exitcode(status)
    if code != 0:
        assert proc.stderr is not None
        sys.exit(f"benchmark child failed: {' '.join(cmd)}\n{proc.stderr.read().decode()}")
    return wall, usage.ru_maxrss / 1024.0


EXE = [sys.executable, "-m", "seqstate"]


def sample(model: str, length: int, records: int, seed: int, out: Path) -> None:
    if out.exists():
        return
    cmd = EXE + ["sample", model, "--length", str(length), "--records", str(records)]
    run_child(cmd + ["--seed", str(seed), "-o", str(out), "-q"])


def annotate(
    fasta: Path, out: Path, model: str, jobs: int, extra: list[str]
) -> tuple[float, float]:
    cmd = EXE + ["annotate", str(fasta), "-m", model, "-o", str(out), "--force", "-q"]
    return run_child(cmd + ["--jobs", str(jobs), *extra])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scale", type=float, default=1.0)
    ap.add_argument("--skip-genes", action="store_true")
    ap.add_argument("--skip-cpg", action="store_true")
    ap.add_argument("--skip-regions", action="store_true")
    ap.add_argument(
        "--gene-records",
        type=int,
        default=None,
        help="gene-segment on the first N records of the assembly only (default: all)",
    )
    ap.add_argument(
        "--gene-single-jobs-2-only",
        action="store_true",
        help="gene-segment on the single records with --jobs 2 only (peak RSS rows)",
    )
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder")
    ap.add_argument("--work", default=None, help="folder for the inputs (reused if present)")
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
    work = Path(args.work) if args.work else Path(tempfile.mkdtemp(prefix="seqstate-genome-"))
    work.mkdir(parents=True, exist_ok=True)
    s = args.scale
    n_asm, len_asm = max(2, int(2000 * s)), 100_000
    len50, len250 = int(50e6 * s), int(250e6 * s)
    asm = work / "assembly.fa"
    r50 = work / "r50.fa"
    r250 = work / "r250.fa"
    print(
        f"inputs: {asm.name}: cpg-island, {n_asm} x {len_asm} bases, seed 101; "
        f"{r50.name}: 1 x {len50}, seed 102; {r250.name}: 1 x {len250}, seed 103"
    )
    sample("cpg-island", len_asm, n_asm, 101, asm)
    sample("cpg-island", len50, 1, 102, r50)
    sample("cpg-island", len250, 1, 103, r250)
    # warm the kernel cache so no row pays the first compile
    run_child(
        EXE
        + [
            "sample",
            "gene-segment",
            "--length",
            "20000",
            "--seed",
            "1",
            "-o",
            str(work / "warm.fa"),
            "--force",
            "-q",
        ]
    )
    for model in ("cpg-island", "gene-segment"):
        annotate(work / "warm.fa", work / "warm-out", model, 2, [])

    rows: list[tuple[str, str, float, float, float, float, float]] = []
    nan = float("nan")

    def pair(
        label: str, fasta: Path, bases: int, model: str, extra: list[str], one: bool = True
    ) -> None:
        t1, m1 = annotate(fasta, work / "out1", model, 1, extra) if one else (nan, nan)
        t2, m2 = annotate(fasta, work / "out2", model, 2, extra)
        rows.append((label, model, bases / t1 / 1e6, bases / t2 / 1e6, t1 / t2, m1, m2))
        print(f"  done: {label} {model}", flush=True)

    asm_bases = n_asm * len_asm
    if not args.skip_cpg:
        pair(f"assembly {asm_bases / 1e6:.0f} Mbp, tracks", asm, asm_bases, "cpg-island", [])
        pair(f"record {len50 / 1e6:.0f} Mbp, tracks", r50, len50, "cpg-island", [])
        pair(f"record {len250 / 1e6:.0f} Mbp, tracks", r250, len250, "cpg-island", [])
    if not args.skip_genes:
        gasm, gbases = asm, asm_bases
        if args.gene_records:
            gasm = work / f"assembly-first{args.gene_records}.fa"
            parts = asm.read_text().split(">")[1 : args.gene_records + 1]
            gasm.write_text("".join(">" + x for x in parts))
            gbases = args.gene_records * len_asm
        none = ["--tracks", "none"]
        one = not args.gene_single_jobs_2_only
        pair(f"assembly {gbases / 1e6:.0f} Mbp", gasm, gbases, "gene-segment", none)
        pair(f"record {len50 / 1e6:.0f} Mbp", r50, len50, "gene-segment", none, one)
        pair(f"record {len250 / 1e6:.0f} Mbp", r250, len250, "gene-segment", none, one)

    print()
    print(
        "| input | model | --jobs 1 Mbp/s | --jobs 2 Mbp/s | ratio "
        "| peak RSS j1 (MiB) | peak RSS j2 (MiB) |"
    )
    print("|---|---|---|---|---|---|---|")
    for label, model, v1, v2, ratio, m1, m2 in rows:
        print(f"| {label} | {model} | {v1:.2f} | {v2:.2f} | {ratio:.2f}x | {m1:.0f} | {m2:.0f} |")

    if not args.skip_regions:
        # regions through the index
        print()
        print("| --region 1 kb of the 250 Mbp record | wall s (index exists) |")
        print("|---|---|")
        mid = len250 // 2
        region = f"sim1:{mid + 1}-{mid + 1000}"
        gz = work / "r250.fa.gz"
        if not gz.exists():
            bgzip = shutil.which("bgzip")
            if bgzip:
                subprocess.run([bgzip, "-k", "-@2", str(r250)], check=True)
            else:
                from Bio import bgzf

                with open(r250, "rb") as src, bgzf.BgzfWriter(str(gz), "wb") as dst:
                    shutil.copyfileobj(src, dst, 1 << 22)
        for fasta in (r250, gz):
            run_child(EXE + ["index", str(fasta), "--force"])
            t, _ = run_child(
                EXE
                + [
                    "annotate",
                    str(fasta),
                    "--region",
                    region,
                    "-o",
                    str(work / "reg"),
                    "--force",
                    "-q",
                ]
            )
            print(f"| {fasta.name} | {t:.2f} |")
    if not args.keep and not args.work:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
