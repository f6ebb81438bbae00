"""Benchmark one Baum–Welch iteration: seqstate against hmmlearn, same model, same data.

Samples one record (default 3 Mbp, fixed seed) from the built-in eight-state model
``cpg-island-8``, then times one EM iteration (expected counts over the record plus the
update) in a fresh child process per implementation and repeat:

* seqstate: ``seqstate.commands.fit.em_step`` (checkpointed forward-backward kernel);
* hmmlearn: ``CategoricalHMM(n_components=8, n_iter=1, implementation="scaling",
  init_params="", params="ste")`` with the same start, transition and emission tables.

Reports seconds per iteration and per Mbp (median of the repeats), the speed-up, each
child's peak RSS, and the largest difference between the two updated tables (they must
agree).  Target: seqstate at least 3x faster.  Not run by pytest.

    python benchmarks/bench_fit.py [--mbp 3] [--repeat 3] [--seed 7]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

MODEL = "cpg-island-8"


def child(impl: str, data: Path, out: Path) -> None:
    """Run one iteration of ``impl`` on the symbols in ``data``; write timings to ``out``."""
    from seqstate.io.tables import load_model

    model = load_model(MODEL)
    sym = np.load(data)
    if impl == "seqstate":
        from seqstate.commands import fit
        from seqstate.engine import api

        tables = api.prepare(model)
        warm = api.encode(tables, b"ACGTACGTTTGACCA" * 10)
        fit.em_step(model, [warm], lower={})  # load the compiled kernel from the cache
        codes = api.encode(tables, np.frombuffer(model.alphabet.encode(), np.uint8)[sym])
        t0 = time.perf_counter()
        new, ll, _ = fit.em_step(model, [codes], lower={}, pseudocount=0.0)
        wall = time.perf_counter() - t0
        start, trans, emis = new.start, new.transitions, new.emissions[:, 0, :]
    else:
        import warnings

        from hmmlearn import hmm

        X = sym.astype(np.int64).reshape(-1, 1)
        ref = hmm.CategoricalHMM(
            n_components=model.n_states,
            n_features=4,
            n_iter=1,
            init_params="",
            params="ste",
            tol=0,
            implementation="scaling",
        )
        ref.startprob_ = model.start.copy()
        ref.transmat_ = model.transitions.copy()
        ref.emissionprob_ = model.emissions[:, 0, :].copy()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t0 = time.perf_counter()
            ref.fit(X)
            wall = time.perf_counter() - t0
        ll = float(ref.monitor_.history[0])
        start, trans, emis = ref.startprob_, ref.transmat_, ref.emissionprob_
    out.write_text(
        json.dumps(
            {
                "wall": wall,
                "loglik": ll,
                "start": start.tolist(),
                "trans": trans.tolist(),
                "emis": emis.tolist(),
            }
        )
    )


def run_child(impl: str, data: Path, out: Path) -> tuple[dict, float]:
    cmd = [sys.executable, __file__, "--child", impl, str(data), str(out)]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    if os.waitstatus_to_exitcode(status) != 0:
        sys.exit(f"benchmark child failed: {' '.join(cmd)}\n{proc.stderr.read().decode()}")
    return json.loads(out.read_text()), usage.ru_maxrss / 1024.0


def cpu_name() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown CPU"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--mbp", type=float, default=3.0, help="record length in Mbp")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--child", nargs=3, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        child(args.child[0], Path(args.child[1]), Path(args.child[2]))
        return

    import hmmlearn
    import numba

    import seqstate
    from seqstate.engine import api
    from seqstate.engine.sampling import sample_record
    from seqstate.io.tables import load_model

    print("command:", " ".join([Path(sys.executable).name, *sys.argv]))
    print(
        f"machine: {cpu_name()}, {platform.machine()}, {os.cpu_count()} cores, "
        f"{platform.system()} {platform.release()}"
    )
    print(
        f"software: Python {platform.python_version()}, numpy {np.__version__}, numba "
        f"{numba.__version__}, hmmlearn {hmmlearn.__version__}, seqstate "
        f"{seqstate.__version__}"
    )
    n = int(args.mbp * 1e6)
    model = load_model(MODEL)
    work = Path(tempfile.mkdtemp(prefix="seqstate-bench-fit-"))
    _, sym = sample_record(api.prepare(model), n, np.random.default_rng(args.seed))
    data = work / "sym.npy"
    np.save(data, sym)
    print(
        f"data: {n / 1e6:.2f} Mbp sampled from {MODEL} (8 states, order 0), seed "
        f"{args.seed}; one record; each run in a fresh process"
    )
    results: dict[str, list[dict]] = {"seqstate": [], "hmmlearn": []}
    rss: dict[str, list[float]] = {"seqstate": [], "hmmlearn": []}
    for r in range(args.repeat):
        for impl in ("seqstate", "hmmlearn"):
            res, peak = run_child(impl, data, work / f"{impl}{r}.json")
            results[impl].append(res)
            rss[impl].append(peak)
    mbp = n / 1e6
    med = {k: statistics.median(x["wall"] for x in v) for k, v in results.items()}
    a, b = results["seqstate"][0], results["hmmlearn"][0]
    diff = max(
        float(np.max(np.abs(np.array(a[key]) - np.array(b[key]))))
        for key in ("start", "trans", "emis")
    )
    print()
    print(
        f"| implementation | s per iteration (median of {args.repeat}) | s per Mbp "
        "| speed-up | peak RSS (MiB) |"
    )
    print("|---|---|---|---|---|")
    for impl in ("seqstate", "hmmlearn"):
        speed = med["hmmlearn"] / med[impl]
        print(
            f"| {impl} | {med[impl]:.3f} | {med[impl] / mbp:.3f} | {speed:.1f}x "
            f"| {max(rss[impl]):.0f} |"
        )
    print()
    print(
        f"log-likelihood before the update: seqstate {a['loglik']:.6f}, hmmlearn "
        f"{b['loglik']:.6f}; largest difference between the updated tables {diff:.2e}"
    )
    target = med["hmmlearn"] / med["seqstate"]
    print(
        f"target >= 3x faster than hmmlearn: {'met' if target >= 3 else 'NOT met'} ({target:.1f}x)"
    )
    for f in work.iterdir():
        f.unlink()
    work.rmdir()


if __name__ == "__main__":
    main()
