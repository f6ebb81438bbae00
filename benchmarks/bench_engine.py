#!/usr/bin/env python
"""Engine benchmark: seqstate against hmmlearn on the same input, one table.

Not a test (pytest does not collect it: the file name does not start with
``test_``).  Run from the repository root::

    PYTHONPATH=. python benchmarks/bench_engine.py            # N = 1e6 and 1e7
    PYTHONPATH=. python benchmarks/bench_engine.py --quick    # small, for a smoke run
    PYTHONPATH=. python benchmarks/bench_engine.py --big      # adds the 100 Mbp RSS run

What is measured, each in a fresh subprocess (so that peak memory belongs to one
measurement; the child reports ``VmHWM`` from ``/proc/self/status``, in MB):

* the eight-state CpG layout (built-in ``cpg-island-8``): seqstate and hmmlearn
  (``CategoricalHMM``, ``implementation="scaling"``, the same start, transition
  and emission matrices): log-likelihood (forward), posterior, Viterbi;
* the two-state CpG model (``cpg-island``, order 1), seqstate only (hmmlearn has no
  higher-order emissions);
* with ``--big``: the cpg-island posterior (per-label float32 output) on a
  100 Mbp record, for its peak RSS;
* start-up: a subprocess that imports seqstate, loads cpg-island and decodes
  (posterior) 1 kb, first with an empty numba cache (a fresh temporary
  ``NUMBA_CACHE_DIR``, so every kernel compiles) and then again (warm cache).

Throughput is bases per second of wall time in Mbp/s, the median of ``--repeat``
runs inside the child after one warm-up call on a short prefix (compilation is
not timed).  seqstate's posterior is timed with per-label float32 output (the
pipeline's) and, for the eight-state layout, also with per-state float32 output
(N x 8, like hmmlearn's N x 8 float64).  The input is one record drawn from the
two-state model itself (its island/background switching and dinucleotide
tables), the same bases for every tool.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shlex
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parent.parent
CHILD_ENV_DROP = ("OPENBLAS_CORETYPE", "OPENBLAS_L2_SIZE")


# ----------------------------------------------------------------- input
def sample_cpg_record(n: int, seed: int = 12345) -> np.ndarray:
    """``n`` ASCII bases (uint8) drawn from the two-state cpg-island model's own tables.

    The state path follows the model's transitions; each base is drawn from its
    state's dinucleotide row given the previous base (the first base from the
    row of A).  Chunked, so memory is about n bytes plus a few MB.
    """
    from numba import njit

    from seqstate.io.tables import load_model

    model = load_model("cpg-island")
    trans_cdf = np.cumsum(model.transitions, axis=1)
    emit_cdf = np.cumsum(model.emissions, axis=2)  # (state, previous base, base)
    start_cdf = np.cumsum(model.start)

    @njit(cache=False)
    def fill(u, out, state, prev, trans_cdf, emit_cdf):
        for i in range(out.shape[0]):
            r = u[2 * i]
            s = 0
            while s < trans_cdf.shape[1] - 1 and r >= trans_cdf[state, s]:
                s += 1
            state = s
            r = u[2 * i + 1]
            x = 0
            while x < 3 and r >= emit_cdf[state, prev, x]:
                x += 1
            out[i] = x
            prev = x
        return state, prev

    rng = np.random.default_rng(seed)
    sym = np.empty(n, dtype=np.uint8)
    state = int(np.searchsorted(start_cdf, rng.random(), side="right"))
    prev = 0
    chunk = 1 << 22
    for lo in range(0, n, chunk):
        hi = min(n, lo + chunk)
        u = rng.random(2 * (hi - lo))
        state, prev = fill(u, sym[lo:hi], state, prev, trans_cdf, emit_cdf)
    return np.frombuffer(b"ACGT", dtype=np.uint8)[sym]


# ----------------------------------------------------------------- child side
def _peak_rss_mb() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _child(spec: dict) -> dict:
    """Run one measurement described by ``spec``; returns times (s), result and peak RSS."""
    seq = np.load(spec["seq"])
    n = seq.shape[0]
    times = []
    if spec["tool"] == "seqstate":
        from seqstate.engine import api
        from seqstate.io.tables import load_model

        model = load_model(spec["model"])
        tables = api.prepare(model)
        codes = api.encode(tables, seq)
        del seq
        group, n_groups = model.label_index(), 1
        op = spec["op"]

        def run(c):
            if op == "forward":
                return api.loglik(tables, c)
            if op == "posterior":
                return api.posterior(tables, c, group=group, n_groups=n_groups).loglik
            if op == "posterior-states":
                return api.posterior(tables, c).loglik
            if op == "viterbi":
                return api.viterbi(tables, c)[1]
            raise ValueError(op)

        run(codes[:1000])
        for _ in range(spec["repeat"]):
            t0 = time.perf_counter()
            result = run(codes)
            times.append(time.perf_counter() - t0)
    else:
        import hmmlearn
        from hmmlearn.hmm import CategoricalHMM

        from seqstate.io.tables import load_model

        model = load_model(spec["model"])
        lookup = np.full(256, -1, dtype=np.int64)
        for i, ch in enumerate(model.alphabet):
            lookup[ord(ch)] = i
        x = lookup[seq].reshape(-1, 1)
        del seq
        hmm = CategoricalHMM(
            n_components=model.n_states, implementation="scaling", init_params="", params=""
        )
        hmm.n_features = len(model.alphabet)
        hmm.startprob_ = model.start / model.start.sum()
        hmm.transmat_ = model.transitions / model.transitions.sum(axis=1, keepdims=True)
        hmm.emissionprob_ = model.emissions[:, 0, :]
        op = spec["op"]

        def run(v):
            if op == "forward":
                return float(hmm.score(v))
            if op == "posterior":
                post = hmm.predict_proba(v)
                return float(post[:, 0].sum())
            if op == "viterbi":
                return float(hmm.decode(v, algorithm="viterbi")[0])
            raise ValueError(op)

        run(x[:1000])
        for _ in range(spec["repeat"]):
            t0 = time.perf_counter()
            result = run(x)
            times.append(time.perf_counter() - t0)
        spec["version"] = hmmlearn.__version__
    return {"times": times, "n": int(n), "result": float(result), "peak_mb": _peak_rss_mb()}


STARTUP_CODE = """
import time
t0 = time.perf_counter()
import numpy as np
from seqstate.engine import api
from seqstate.io.tables import load_model
m = load_model("cpg-island")
t = api.prepare(m)
rng = np.random.default_rng(0)
seq = rng.choice(np.frombuffer(b"ACGT", np.uint8), 1000).tobytes()
p = api.posterior(t, api.encode(t, seq), group=m.label_index(), n_groups=1)
print(time.perf_counter() - t0)
"""


# ----------------------------------------------------------------- parent side
def _env(numba_cache: str | None = None, drop_blas: bool = False) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + (
        os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else ""
    )
    if numba_cache is not None:
        env["NUMBA_CACHE_DIR"] = numba_cache
    if drop_blas:
        for key in CHILD_ENV_DROP:
            env.pop(key, None)
    return env


def measure(spec: dict) -> dict:
    """Run ``spec`` in a fresh interpreter (this file with ``--child``)."""
    proc = subprocess.run(
        [sys.executable, __file__, "--child", json.dumps(spec)],
        capture_output=True,
        text=True,
        env=_env(drop_blas=spec["tool"] == "hmmlearn"),
        cwd=REPO,
    )
    if proc.returncode != 0:
        raise RuntimeError(f"child failed for {spec}:\n{proc.stderr[-3000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def startup(tmp: str) -> tuple[float, float, float, float]:
    """(first wall s, first in-process s, warm wall s, warm in-process s) of the 1 kb decode."""
    cache = tempfile.mkdtemp(prefix="numba-cache-", dir=tmp)
    out = []
    for _ in range(2):
        t0 = time.perf_counter()
        proc = subprocess.run(
            [sys.executable, "-c", STARTUP_CODE],
            capture_output=True,
            text=True,
            env=_env(numba_cache=cache),
            cwd=tmp,
        )
        wall = time.perf_counter() - t0
        if proc.returncode != 0:
            raise RuntimeError(proc.stderr[-3000:])
        out += [wall, float(proc.stdout.strip().splitlines()[-1])]
    return tuple(out)


def machine_info() -> list[str]:
    import numba

    try:
        import hmmlearn

        hv = hmmlearn.__version__
    except ImportError:  # pragma: no cover
        hv = "not installed"
    cpu = platform.processor() or "?"
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    blas = ", ".join(f"{k}={os.environ[k]}" for k in CHILD_ENV_DROP if k in os.environ)
    return [
        f"command: {shlex.join([sys.executable] + sys.argv)}",
        f"machine: {platform.machine()}, {cpu}, {os.cpu_count()} logical CPUs "
        f"(single-threaded measurements; the host may be shared)",
        f"python {platform.python_version()}, numpy {np.__version__}, numba {numba.__version__}, "
        f"hmmlearn {hv}",
        f"environment: {blas or 'no OPENBLAS_* overrides'}"
        + (" (dropped for the hmmlearn children)" if blas else ""),
    ]


def _fmt_n(n: int) -> str:
    if n >= 10**6:
        return f"{n / 1e6:g}M"
    if n >= 10**3:
        return f"{n / 1e3:g}k"
    return str(n)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument(
        "--sizes",
        default="1e6,1e7",
        help="comma-separated record lengths in bases (default 1e6,1e7)",
    )
    ap.add_argument("--repeat", type=int, default=3, help="runs per measurement (median)")
    ap.add_argument(
        "--quick",
        action="store_true",
        help="sizes 2e5 and 1e6, one run each, no hmmlearn Viterbi repeats",
    )
    ap.add_argument(
        "--big",
        action="store_true",
        help="add the cpg-island posterior on a 100 Mbp record (peak RSS)",
    )
    ap.add_argument("--no-hmmlearn", action="store_true", help="skip the hmmlearn rows")
    ap.add_argument("--no-startup", action="store_true", help="skip the start-up measurement")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(_child(json.loads(args.child))))
        return 0
    sizes = [int(float(s)) for s in args.sizes.split(",") if s.strip()]
    repeat = args.repeat
    if args.quick:
        sizes, repeat = [200_000, 1_000_000], 1
    for line in machine_info():
        print(line)
    print(
        f"input: one record drawn from cpg-island's own tables; throughput = median of "
        f"{repeat} run(s) in a fresh subprocess per row, after a warm-up call; "
        f"peak RSS = the child's VmHWM"
    )
    print(flush=True)
    rows = []
    with tempfile.TemporaryDirectory(prefix="seqstate-bench-") as tmp:
        seqs = {}
        for n in sizes + ([100_000_000] if args.big else []):
            path = os.path.join(tmp, f"seq{n}.npy")
            np.save(path, sample_cpg_record(n))
            seqs[n] = path
        plan = []
        for n in sizes:
            for op in ("forward", "posterior", "posterior-states", "viterbi"):
                plan.append(("cpg-island-8", "seqstate", op, n))
            if not args.no_hmmlearn:
                for op in ("forward", "posterior", "viterbi"):
                    plan.append(("cpg-island-8", "hmmlearn", op, n))
            for op in ("forward", "posterior", "viterbi"):
                plan.append(("cpg-island", "seqstate", op, n))
        if args.big:
            plan.append(("cpg-island", "seqstate", "posterior", 100_000_000))
        header = (
            f"{'model':<13} {'tool':<9} {'N':>5} {'operation':<28} "
            f"{'Mbp/s':>7} {'peak RSS MB':>11}  result"
        )
        print(header)
        print("-" * len(header), flush=True)
        for model, tool, op, n in plan:
            spec = {
                "tool": tool,
                "model": model,
                "op": op,
                "seq": seqs[n],
                "repeat": 1 if n >= 100_000_000 else repeat,
            }
            res = measure(spec)
            med = float(np.median(res["times"]))
            mbps = n / 1e6 / med
            label = {
                "forward": "log-likelihood (forward)",
                "posterior": (
                    "posterior, per-label f32"
                    if tool == "seqstate"
                    else "posterior (predict_proba)"
                ),
                "posterior-states": "posterior, per-state f32",
                "viterbi": "Viterbi",
            }[op]
            rows.append((model, tool, op, n, mbps, res["peak_mb"], res["result"]))
            print(
                f"{model:<13} {tool:<9} {_fmt_n(n):>5} {label:<28} {mbps:>7.1f} "
                f"{res['peak_mb']:>11.0f}  {res['result']:.6g}",
                flush=True,
            )
        print()
        for n in sizes:
            get = {(t, o): v for (m, t, o, nn, v, _, _) in rows if m == "cpg-island-8" and nn == n}
            if ("hmmlearn", "posterior") in get:
                hl = get[("hmmlearn", "posterior")]
                ratios = (
                    get[("seqstate", "posterior")] / hl,
                    get[("seqstate", "posterior-states")] / hl,
                    get[("seqstate", "forward")] / get[("hmmlearn", "forward")],
                    get[("seqstate", "viterbi")] / get[("hmmlearn", "viterbi")],
                )
                print(
                    f"cpg-island-8, N={_fmt_n(n)}: seqstate / hmmlearn throughput: posterior "
                    f"{ratios[0]:.1f}x (per-label), {ratios[1]:.1f}x (per-state); forward "
                    f"{ratios[2]:.1f}x; Viterbi {ratios[3]:.1f}x"
                )
        if not args.no_startup:
            w1, p1, w2, p2 = startup(tmp)
            print(
                f"start-up (import seqstate, load cpg-island, posterior of 1 kb), "
                f"wall time of the whole process: first run with an empty numba cache "
                f"{w1:.2f} s (in-process {p1:.2f} s), second run {w2:.2f} s "
                f"(in-process {p2:.2f} s)"
            )
    return 0


if __name__ == "__main__":
    sys.exit(main())
