"""What ``fit`` counts: a ``--region`` or the ``--records`` selected, and the known features
that lie in it.

Bases outside the stretch are unknown (state ``-1``): their labels are ignored, never
counted as intergenic or background.  A label feature across an edge counts with its
bases inside; a gene across an edge is left out whole (skipped with a reason, its
bases inside unknown), because a gene cut short is not a gene the layout can read.
Coordinates: 0-based half-open.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from seqstate.io.gff3 import Feature
from seqstate.io.regions import Region

__all__ = ["CUT_GENE", "GENE_TYPES", "Stretch", "cut_genes", "outside_unknown"]

#: The reason a gene cut by an edge of the stretch is skipped (fit's labelling report).
CUT_GENE = "cut by an edge of the counted stretch"
#: Top-level types that are genes even without a CDS below them.
GENE_TYPES = ("gene", "pseudogene", "ncRNA_gene", "transposable_element_gene")


@dataclass(frozen=True)
class Stretch:
    """The stretches of one run: by record ID, the regions counted (in input order)."""

    regions: list[Region]

    @property
    def ids(self) -> list[str]:
        """The records counted, in input order, once each."""
        return list(dict.fromkeys(r.seqid for r in self.regions))

    def on(self, seqid: str) -> list[Region]:
        """The regions of record ``seqid``."""
        return [r for r in self.regions if r.seqid == seqid]

    def overlaps(self, seqid: str, start0: int, end0: int) -> bool:
        """Whether ``[start0, end0)`` of ``seqid`` meets a stretch."""
        return any(r.start0 < end0 and start0 < r.end0 for r in self.on(seqid))

    def crosses(self, seqid: str, start0: int, end0: int) -> bool:
        """Whether ``[start0, end0)`` meets a stretch without lying inside it."""
        return any(
            r.start0 < end0 and start0 < r.end0 and not (r.start0 <= start0 and end0 <= r.end0)
            for r in self.on(seqid)
        )


def outside_unknown(states: np.ndarray, regions: Sequence[Region], mirrored: bool) -> None:
    """Set the states outside ``regions`` to -1 (unknown), in place.  ``mirrored``: the
    path is of the reverse complement, so region ``[a, b)`` is ``[n - b, n - a)``."""
    n = states.shape[0]
    keep = np.zeros(n, dtype=np.bool_)
    for r in regions:
        a, b = (n - r.end0, n - r.start0) if mirrored else (r.start0, r.end0)
        keep[a:b] = True
    states[~keep] = -1


def _root_of(features: Sequence[Feature]) -> list[int]:
    """Per feature, the index of its top-level ancestor (itself when it has no Parent)."""
    index = {f.get("ID"): i for i, f in enumerate(features) if f.get("ID")}
    roots: list[int] = []
    for i in range(len(features)):
        seen = {i}
        j = i
        while True:
            parents = features[j].values("Parent")
            k = index.get(parents[0]) if parents else None
            if k is None or k in seen:
                break
            seen.add(k)
            j = k
        roots.append(j)
    return roots


def cut_genes(
    features: Sequence[Feature], stretch: Stretch, drop: set[str]
) -> tuple[list[Feature], list[tuple[str, int, int, str]]]:
    """The gene annotation reduced to the stretch: features of the records ``drop`` (those
    of the FASTA outside the stretch) and every top-level feature (with all below it)
    outside the stretch are dropped; so is every gene (a top-level feature
    of :data:`GENE_TYPES`, or with a CDS below it) that meets the stretch without lying
    inside it.  Returns the features kept and the cut genes as ``(seqid, start0, end0,
    gene ID)`` (their span over every feature of the gene)."""
    wanted = set(stretch.ids)
    roots = _root_of(features)
    spans: dict[int, list[int]] = {}
    coding: set[int] = set()
    for f, r in zip(features, roots):
        span = spans.setdefault(r, [f.start0, f.end0])
        span[0], span[1] = min(span[0], f.start0), max(span[1], f.end0)
        if f.type == "CDS":
            coding.add(r)
    cut: set[int] = set()
    outside: set[int] = set()
    for r, (a, b) in spans.items():
        top = features[r]
        if top.seqid in wanted and not stretch.overlaps(top.seqid, a, b):
            outside.add(r)
        elif r in coding or top.type in GENE_TYPES:
            if top.seqid in wanted and stretch.crosses(top.seqid, a, b):
                cut.add(r)
    kept = [
        f
        for f, r in zip(features, roots)
        if f.seqid not in drop and r not in cut and r not in outside
    ]
    genes = [
        (features[r].seqid, spans[r][0], spans[r][1], features[r].get("ID") or f"line{r + 1}")
        for r in sorted(cut)
    ]
    return kept, genes
