#!/usr/bin/env python
"""The layout table of models/README.md: held-out accuracy of each layout tried (not a test).

Run from the repository root::

    PYTHONPATH=. python benchmarks/ablation_genes.py              # every row (about an hour)
    PYTHONPATH=. python benchmarks/ablation_genes.py --rows 1,11  # some rows
    PYTHONPATH=. python benchmarks/ablation_genes.py --list       # the rows and their options

Each row is one ``benchmarks/accuracy_genes.py`` measurement (fit on one half of
*D. melanogaster* chromosome 4, annotate the other, both ways; the means of the two
directions), with the options printed in its ``options`` column: the same command with
those options gives that row alone.  Rows marked ``instead`` change the row they name
rather than the one above.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(REPO))

from benchmarks.accuracy_genes import layout_of, run  # noqa: E402
from benchmarks.benchutil import markdown_table, print_header  # noqa: E402
from seqstate.io.tables import save_model  # noqa: E402

FIRST_WINDOWS = {"repeat": True, "signal_order": 1, "up_flank": 12, "down_flank": 6}

#: (description, shape, order, settings); settings replace GeneShape fields or interpolation.
ROWS: list[tuple[str, str, int, dict]] = [
    (
        "first layout (`DEFAULT_SHAPE`, 289 states): flanks 6 / GT+4 / 10+AG of order 0, "
        "geometric intron body",
        "first",
        3,
        {},
    ),
    ("instead: order 5, interpolated (strength 8)", "first", 5, {"interpolation": 8}),
    ("instead: order-1 signal windows alone (sizes as before)", "first", 3, {"signal_order": 1}),
    ("instead: intron body a chain of 3 + 1 stages alone", "first", 3, {"body_stages": [3, 1]}),
    ("repeat state (transposable elements and pseudogenes)", "first", 3, {"repeat": True}),
    (
        "+ order-1 windows: start flank 12, stop flank 6, GT+4, 20+AG",
        "first",
        3,
        {**FIRST_WINDOWS, "acceptor_flank": 20},
    ),
    (
        "+ interpolated content emissions (strength 8)",
        "first",
        3,
        {**FIRST_WINDOWS, "acceptor_flank": 20, "interpolation": 8},
    ),
    (
        "instead: order 4 with interpolation (strength 8; repeat state, old windows)",
        "first",
        4,
        {"repeat": True, "interpolation": 8},
    ),
    (
        "+ donor window GT+8",
        "first",
        3,
        {**FIRST_WINDOWS, "acceptor_flank": 20, "interpolation": 8, "donor_flank": 8},
    ),
    (
        "+ interpolation strength 32",
        "first",
        3,
        {**FIRST_WINDOWS, "acceptor_flank": 20, "interpolation": 32, "donor_flank": 8},
    ),
    ("+ acceptor window 28+AG (**shipped**)", "shipped", 3, {}),
    ("shipped + intron body chain of 4 + 1 stages", "shipped", 3, {"body_stages": [4, 1]}),
]


def options(shape: str, order: int, settings: dict) -> str:
    """The ``accuracy_genes.py`` options of one row."""
    out = [] if shape == "shipped" else [f"--shape {shape}"]
    if order != 3:
        out.append(f"--order {order}")
    out += [f"--set {k}={json.dumps(v, separators=(',', ':'))}" for k, v in settings.items()]
    return " ".join(out) or "(none)"


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", help="row numbers to run, from 1 (default: all)")
    ap.add_argument("--list", action="store_true", help="print the rows and their options")
    ap.add_argument("--json", type=Path, help="write every row's figures as JSON here")
    args = ap.parse_args()
    chosen = range(1, len(ROWS) + 1)
    if args.rows:
        chosen = [int(x) for x in args.rows.split(",")]
    if args.list:
        for i in chosen:
            desc, shape, order, settings = ROWS[i - 1]
            print(f"{i}. {desc}: {options(shape, order, settings)}")
        return
    print_header()
    done, table = {}, []
    for i in chosen:
        desc, shape, order, settings = ROWS[i - 1]
        print(f"row {i}: {desc} [{options(shape, order, settings)}]", flush=True)
        with tempfile.TemporaryDirectory(prefix="seqstate-ablation-") as tmp:
            layout = Path(tmp) / "layout"
            save_model(layout_of(shape, order, settings), layout)
            res = run(layout, Path(tmp), log=lambda line: print("  " + line, flush=True))
        done[i] = res
        mm = res["mean"]
        table.append(
            [str(i), desc, f"`{options(shape, order, settings)}`"]
            + [f"{mm[k]:.3f}" for k in ("sn", "sp", "exon_sn", "exon_sp", "gene_sn")]
        )
    print()
    print(
        markdown_table(
            ["row", "layout", "options", "Sn", "Sp", "exon Sn", "exon Sp", "gene Sn"], table
        )
    )
    if args.json:
        args.json.write_text(json.dumps(done, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    main()
