"""Benchmark the FASTA reader: MB/s and peak RSS of iter_fasta and iter_sequences.

Samples one synthetic record from the built-in cpg-island model (default 200 Mbp, seed 7)
with `seqstate sample`, then reads it in a fresh subprocess per reader and repeat and
reports wall time, MB/s of the file and the child's peak RSS.  iter_sequences spills the
record to a temporary file (TMPDIR) and reads it back by range.

    python benchmarks/bench_fasta.py [--mbp 200] [--repeat 2]
"""

from __future__ import annotations

import argparse
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

_READ = {
    "iter_fasta": (
        "from seqstate.io.fasta import iter_fasta\n"
        "import sys\n"
        "n = sum(len(r.seq) for r in iter_fasta(sys.argv[1]))\n"
    ),
    "iter_sequences": (
        "from seqstate.io.fasta import iter_sequences\n"
        "import sys\n"
        "n = 0\n"
        "for r in iter_sequences(sys.argv[1]):\n"
        "    n += r.length\n"
        "    r.read(r.length // 2, r.length // 2 + 1000)\n"
        "    r.source.close()\n"
    ),
}


def run_child(cmd: list[str]) -> tuple[float, float]:
    """Wall seconds and peak RSS (MiB) of one child process (its own rusage, via wait4)."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    if os.waitstatus_to_exitcode(status) != 0:
        assert proc.stderr is not None
        sys.exit(f"benchmark child failed: {' '.join(cmd)}\n{proc.stderr.read().decode()}")
    return wall, usage.ru_maxrss / 1024.0


def main() -> None:
    ap = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    ap.add_argument("--mbp", type=float, default=200.0, help="record length in Mbp")
    ap.add_argument("--repeat", type=int, default=2)
    args = ap.parse_args()
    print(f"# {platform.platform()}, {os.cpu_count()} CPUs, Python {platform.python_version()}")
    with tempfile.TemporaryDirectory() as folder:
        fasta = Path(folder) / "synthetic.fa"
        sample = [sys.executable, "-m", "seqstate", "sample", "cpg-island"]
        sample += ["--length", str(int(args.mbp * 1e6)), "--seed", "7", "-o", str(fasta), "-q"]
        print("$", " ".join(sample))
        subprocess.run(sample, check=True)
        size = fasta.stat().st_size / 1e6
        print(f"{'reader':<16} {'seconds':>8} {'MB/s':>8} {'peak RSS MiB':>13}")
        for name, code in _READ.items():
            for _ in range(args.repeat):
                wall, rss = run_child([sys.executable, "-c", code, str(fasta)])
                print(f"{name:<16} {wall:8.2f} {size / wall:8.1f} {rss:13.0f}")


if __name__ == "__main__":
    main()
