"""Benchmark region reads through the FASTA index (plain and bgzip).

Writes one synthetic record (default 250 Mbp, random bases from a seeded NumPy generator,
60 bases a line) as plain FASTA and as bgzip (Biopython's BGZF writer), builds the index
with `seqstate index`, then reports for a 1 kb region in the middle of the record:

* the index build (wall seconds of `seqstate index`, a fresh process);
* the read alone, in process: seqstate.io.faidx.region_record, and pyfaidx when it is
  installed (the library this reader was chosen against);
* the whole command in a fresh process: `seqstate score --flank 0` on that region.

    python benchmarks/bench_region.py [--mbp 250] [--repeat 5] [--keep]
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np


def write_record(path: Path, n: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    alphabet = np.frombuffer(b"ACGT", dtype=np.uint8)
    width = 60
    with open(path, "wb") as out:
        out.write(b">synth1 synthetic record (seqstate region benchmark)\n")
        done = 0
        while done < n:
            k = min(width * 100_000, n - done)
            bases = alphabet[rng.integers(0, 4, k)]
            full = k // width
            lines = np.hstack(
                [bases[: full * width].reshape(full, width), np.full((full, 1), 10, np.uint8)]
            )
            out.write(lines.tobytes())
            if k % width:
                out.write(bases[full * width :].tobytes() + b"\n")
            done += k


def write_bgzip(src: Path, dst: Path) -> None:
    from Bio import bgzf

    with open(src, "rb") as handle, bgzf.BgzfWriter(str(dst), "wb") as writer:
        while chunk := handle.read(1 << 22):
            writer.write(chunk)


def wall(cmd: list[str]) -> float:
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    return time.perf_counter() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--mbp", type=float, default=250.0, help="record length in Mbp")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--seed", type=int, default=11)
    ap.add_argument("--keep", action="store_true", help="keep the temporary folder")
    args = ap.parse_args()

    import seqstate
    from seqstate.io import faidx
    from seqstate.io.regions import Region

    print("command:", " ".join([Path(sys.executable).name, *sys.argv]))
    print(
        f"machine: {platform.machine()}, {os.cpu_count()} cores, Python "
        f"{platform.python_version()}, seqstate {seqstate.__version__}, "
        f"load average {os.getloadavg()[0]:.1f}"
    )
    work = Path(tempfile.mkdtemp(prefix="seqstate-bench-region-"))
    n = int(args.mbp * 1e6)
    plain, packed = work / "big.fa", work / "big.fa.gz"
    write_record(plain, n, args.seed)
    write_bgzip(plain, packed)
    start0 = n // 2
    region = Region("synth1", start0, start0 + 1000)
    bed = work / "one.bed"
    bed.write_text(f"synth1\t{start0}\t{start0 + 1000}\n")
    exe = [sys.executable, "-m", "seqstate"]
    try:
        import pyfaidx
    except ImportError:
        pyfaidx = None
    rows = []
    for name, path in (("plain", plain), ("bgzip", packed)):
        build = wall([*exe, "index", str(path), "-q"])
        ours = []
        for _ in range(args.repeat):
            faidx.clear_memory()
            t0 = time.perf_counter()
            faidx.region_record(path, region)
            ours.append(time.perf_counter() - t0)
        theirs = []
        if pyfaidx is not None:
            for _ in range(args.repeat):
                t0 = time.perf_counter()
                fa = pyfaidx.Fasta(str(path), build_index=False)
                _ = fa["synth1"][region.start0 : region.end0].seq
                fa.close()
                theirs.append(time.perf_counter() - t0)
        command = [
            wall([*exe, "score", str(path), "--regions", str(bed), "--flank", "0", "-q"])
            for _ in range(args.repeat)
        ]
        rows.append(
            (
                name,
                build,
                statistics.median(ours),
                statistics.median(theirs) if theirs else float("nan"),
                statistics.median(command),
            )
        )
    print(f"record: {args.mbp:g} Mbp, seed {args.seed}; region: 1 kb at {start0 + 1:,}")
    print("file\tindex build s\tread seqstate s\tread pyfaidx s\tscore command s")
    for name, build, ours_s, theirs_s, command_s in rows:
        print(f"{name}\t{build:.2f}\t{ours_s:.4f}\t{theirs_s:.4f}\t{command_s:.2f}")
    if args.keep:
        print("kept:", work)
    else:
        for p in work.iterdir():
            p.unlink()
        work.rmdir()


if __name__ == "__main__":
    main()
