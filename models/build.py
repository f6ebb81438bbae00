"""Rebuild the derived built-in models from their sources.

Run from the repository root:  python models/build.py
Writes models/cpg-island-8 from models/cpg-island, models/gene-segment-layout (the
gene-segment skeleton, uniform over its allowed moves and bases; seqstate fit turns it into
models/gene-segment, see models/README.md) and models/gene-segment-layout-plant (the same
skeleton with GC donors beside GT donors, a minimum exon length after an intron and order-4
content; fitted into models/gene-segment-athaliana).
"""

from pathlib import Path

from seqstate.io.tables import load_model, save_model
from seqstate.kinds.layouts import expand_to_symbol_states

HERE = Path(__file__).resolve().parent

DESCRIPTION_8 = (
    "The cpg-island model in its eight-state layout: one state per nucleotide per class "
    "(island_A..island_T, background_A..background_T), order 0, each state emitting only its "
    "own base. Built by models/build.py from models/cpg-island: a((s,x),(t,y)) = a(s,t) * "
    "P(y | x; t) with the emission tables of Durbin, Eddy, Krogh & Mitchison (1998), "
    "Biological Sequence Analysis, ch. 3, pp. 50-51; start(s,x) = start(s) * P0(x | s) from "
    "the order-0 back-off of each class. Gives the same island posterior as cpg-island on "
    "sequences without unknown bases."
)


def build_cpg8():
    two = load_model(HERE / "cpg-island")
    eight = expand_to_symbol_states(two, name="cpg-island-8", description=DESCRIPTION_8)
    eight.provenance = {
        "source": "derived from cpg-island by models/build.py (expand_to_symbol_states)",
    }
    return eight


def _gene_layout(shape_name, name_arg="", order_name=""):
    """A gene layout of ``seqstate.kinds.gene_layout`` built from the shape of that name
    (and the content order of that name; 3 without one)."""
    from seqstate.kinds import gene_layout

    kwargs = {"name": getattr(gene_layout, name_arg)} if name_arg else {}
    order = getattr(gene_layout, order_name) if order_name else 3
    layout = gene_layout.build_layout(
        order,
        shape=getattr(gene_layout, shape_name),
        interpolation=gene_layout.SHIPPED_INTERPOLATION,
        **kwargs,
    )
    call = f"{order_name or 3}, shape={shape_name}, interpolation=SHIPPED_INTERPOLATION" + (
        f", name={name_arg}" if name_arg else ""
    )
    layout.provenance = {
        "source": f"seqstate.kinds.gene_layout.build_layout({call}) via models/build.py; "
        "uniform over the allowed moves and bases (fit with seqstate fit, see "
        "models/README.md)",
    }
    return layout


def build_gene_layout():
    return _gene_layout("SHIPPED_SHAPE")


def build_plant_layout():
    return _gene_layout("PLANT_SHAPE", "PLANT_LAYOUT_NAME", "PLANT_ORDER")


def main() -> None:
    save_model(build_cpg8(), HERE / "cpg-island-8")
    save_model(build_gene_layout(), HERE / "gene-segment-layout")
    save_model(build_plant_layout(), HERE / "gene-segment-layout-plant")


if __name__ == "__main__":
    main()
