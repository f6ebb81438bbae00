#!/usr/bin/env python
"""Streaming posterior benchmark (seqstate.engine.stream): one table, one process.

Not a test.  Run from the repository root::

    PYTHONPATH=. python benchmarks/bench_stream.py          # cpg-island 10, gene-segment 1 Mbp
    PYTHONPATH=. python benchmarks/bench_stream.py --quick  # 1 Mbp and 0.2 Mbp

For each built-in model, one synthetic record drawn from the model itself
(``seqstate.engine.sampling``, seed 2026) with the label groups the pipeline asks
for: the whole-record ``api.posterior``, then ``stream.checkpoints`` (one and two
threads, chunks of 1 Mi positions) and ``stream.posterior_blocks`` over every block
(one and two threads).  Mbp/s of wall time, the best of ``--repeat`` runs after one
warm-up call on a short prefix (compilation is not timed), with the CPU seconds of all
threads of that run beside (wall above CPU: the process did not get its cores).  The
shared machines are noisy: compare only numbers from one run.
"""

from __future__ import annotations

import argparse
import os
import platform
import time

import numpy as np

from seqstate.engine import api, sampling, stream
from seqstate.io.tables import load_model


def _best(fn, repeat: int) -> tuple[float, float]:
    """(best wall seconds, process CPU seconds of that run: all threads)."""
    best = (float("inf"), 0.0)
    for _ in range(repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        fn()
        best = min(best, (time.perf_counter() - t0, time.process_time() - c0))
    return best


def run(name: str, n: int, repeat: int) -> list[tuple[str, tuple[float, float]]]:
    model = load_model(name)
    t = api.prepare(model)
    _, sym = sampling.sample_record(t, n, np.random.default_rng(2026))
    codes = api.encode_symbols(t, sym)
    labels = model.label_index()
    group, ng = labels, int(labels.max()) + 1

    def read(a: int, b: int) -> np.ndarray:
        return codes[a:b]

    # warm-up (compilation) on a prefix
    w = min(n, 5000)
    ckw = stream.checkpoints(t, w, read, group=group, n_groups=ng, threads=2)
    stream.posterior_blocks(t, ckw, codes[:w], 0, ckw.nblocks, group, ng, threads=2)
    api.posterior(t, codes[:w], group=group, n_groups=ng)
    rows = [("whole-record api.posterior", _best(lambda: api.posterior(
        t, codes, group=group, n_groups=ng), repeat))]  # fmt: skip
    for threads in (1, 2):
        sec = _best(
            lambda th=threads: stream.checkpoints(t, n, read, group=group, n_groups=ng, threads=th),
            repeat,
        )
        rows.append((f"checkpoints threads={threads}", sec))
    ck = stream.checkpoints(t, n, read, group=group, n_groups=ng)
    for threads in (1, 2):
        sec = _best(
            lambda th=threads: stream.posterior_blocks(
                t, ck, codes, 0, ck.nblocks, group, ng, threads=th
            ),
            repeat,
        )
        rows.append((f"posterior_blocks threads={threads}", sec))
    return [(f"{name} ({t.kernels}) {n / 1e6:g} Mbp: {what}", sec) for what, sec in rows]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()
    sizes = {"cpg-island": 1_000_000, "gene-segment": 200_000} if args.quick else {
        "cpg-island": 10_000_000, "gene-segment": 1_000_000}  # fmt: skip
    print(f"# {platform.node()} {platform.processor() or platform.machine()}, "
          f"{os.cpu_count()} cpus; repeat={args.repeat}")  # fmt: skip
    print(f"# load average {os.getloadavg()[0]:.1f} (1 min) at start")
    print(f"{'case':<66} {'wall s':>7} {'cpu s':>7} {'Mbp/s':>7}")
    for name, n in sizes.items():
        for label, (sec, cpu) in run(name, n, args.repeat):
            print(f"{label:<66} {sec:7.3f} {cpu:7.3f} {n / 1e6 / sec:7.2f}")


if __name__ == "__main__":
    main()
