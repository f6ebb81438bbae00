#!/usr/bin/env python
"""Benchmark of the streaming paths (seqstate.engine.stream_paths) against the whole-record ones.

Not a test (pytest collects ``tests/`` only).  Run from the repository root::

    PYTHONPATH=. python benchmarks/bench_stream_paths.py            # 1 Mbp, both models
    PYTHONPATH=. python benchmarks/bench_stream_paths.py --n 200000 --repeat 1

Inputs are synthetic records drawn with :func:`seqstate.engine.sampling.sample_record`
from each built-in model (seed 2026).  Rows, each the median of ``--repeat`` timed calls
after one warm-up call on a 5 kb prefix (compilation is not timed), in Mbp/s of wall time:

* ``api.viterbi`` (whole record in memory) and ``viterbi_pieces`` (chunks of codes, pieces
  consumed one by one), with the default back-pointer budget and with none (every block
  recomputed from its checkpoint: the cost on records far beyond the budget);
* for gene-segment, the MEA path: ``mea.mea`` (whole record in memory) and ``mea_pieces``
  (the same streaming kernels), on the posteriors of the gene model's decoding classes.

The shared machines are noisy: compare only numbers from one run.
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import time

import numpy as np

from seqstate.engine import api, mea, sampling, stream_paths
from seqstate.io.tables import load_model


def _median_rate(fn, n: int, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return n / statistics.median(times) / 1e6


def _consume(pieces) -> int:
    k = 0
    for p in pieces:
        k += p.states.shape[0]
    return k


def _rows(name: str, n: int) -> list[tuple[str, object]]:
    """The timed calls of one model: (label, zero-argument callable)."""
    model = load_model(name)
    t = api.prepare(model)
    _, sym = sampling.sample_record(t, n, np.random.default_rng(2026))
    codes = api.encode_symbols(t, sym)

    def reader(a: int, b: int) -> np.ndarray:
        return codes[a:b]

    warm = codes[:5000]
    api.viterbi(t, warm)
    _consume(stream_paths.viterbi_pieces(t, 5000, lambda a, b: warm[a:b])[1])

    def no_budget():
        old = stream_paths.BACKPOINTER_BUDGET
        stream_paths.BACKPOINTER_BUDGET = 0
        try:
            _consume(stream_paths.viterbi_pieces(t, n, reader)[1])
        finally:
            stream_paths.BACKPOINTER_BUDGET = old

    rows = [
        ("api.viterbi (whole record)", lambda: api.viterbi(t, codes)),
        ("viterbi_pieces", lambda: _consume(stream_paths.viterbi_pieces(t, n, reader)[1])),
        ("viterbi_pieces, no kept pointers", no_budget),
    ]
    if name == "gene-segment":
        from seqstate.kinds.genes import decoding_classes

        cls, n_cls = decoding_classes(model)
        gain = api.posterior(t, codes, group=cls, n_groups=n_cls).values

        def greader(a: int, b: int) -> np.ndarray:
            return gain[a:b]

        mea.mea(t, warm, gain[:5000], cls)
        rows += [
            ("mea.mea", lambda: mea.mea(t, codes, gain, cls)),
            ("mea_pieces", lambda: _consume(stream_paths.mea_pieces(t, n, reader, greader, cls))),
        ]
    return rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--n", type=int, default=1_000_000, help="record length (bases)")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--models", nargs="+", default=["cpg-island", "gene-segment"])
    args = ap.parse_args()
    n = args.n
    print(f"# {platform.node()} {platform.processor() or platform.machine()} cpus={os.cpu_count()}")
    print(f"# PYTHONPATH=. python benchmarks/bench_stream_paths.py --n {n} --repeat {args.repeat}")
    print(f"{'model':14} {'path':34} {'Mbp/s':>8}")
    for name in args.models:
        rows = _rows(name, n)
        for label, fn in rows:
            print(f"{name:14} {label:34} {_median_rate(fn, n, args.repeat):8.2f}", flush=True)


if __name__ == "__main__":
    main()
