"""Writing decoded genes: GFF3 gene -> mRNA -> exon + CDS lines and feature-table rows
with their scores, the gene filter (``--min-cds-length``, ``--min-gene-posterior``)
and the per-stretch gene counts.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TextIO

import numpy as np

from seqstate.engine import api
from seqstate.io.gff3 import Feature, GFF3Writer
from seqstate.io.tsvtext import tsv_row
from seqstate.kinds.base import SOURCE, Group
from seqstate.kinds.gene_decoding import (
    GeneLine,
    GenePrediction,
    cds_length,
    gene_lines,
)
from seqstate.kinds.gene_exact import (
    EXACT_FORMAT,
    ExactScore,
    exact_allowed,
    exact_scorer,
)
from seqstate.kinds.segments import (
    SCORE_FORMATS,
    add_calibrated,
    format_value,
    score_segment,
    with_calibrated,
)
from seqstate.model import Model
from seqstate.model.recalibration import Recalibration

#: Keys of the per-stretch counts the gene kind fills (``RecordData.counts``).
COUNT_GENES = "genes"


COUNT_MRNAS = "mrnas"


FILTERED_CDS_LENGTH = "filtered_cds_length"


FILTERED_GENE_POSTERIOR = "filtered_gene_posterior"


@dataclass(frozen=True)
class GeneFilter:
    """Which decoded genes are written (annotate ``--min-cds-length``,
    ``--min-gene-posterior``).

    A gene is dropped when its mRNA has fewer than ``min_cds_length`` coding bases
    (:func:`cds_length`), else when its score -- the mean posterior, over the gene's
    span, of its strand's gene states (coding and intron), column 6 of its GFF3 gene
    line -- is below ``min_gene_posterior``.  Each dropped gene is counted once, under
    the first rule it fails (:data:`FILTERED_CDS_LENGTH`, then
    :data:`FILTERED_GENE_POSTERIOR`).  Genes that are written are numbered 1, 2, ...
    in genomic order, so numbers stay consecutive.
    """

    min_cds_length: int = 0
    min_gene_posterior: float = 0.0

    def reason(self, gene: GenePrediction, gene_score: Callable[[], float | None]) -> str | None:
        """Why ``gene`` is dropped (a count key), or None when it is written.
        ``gene_score()`` gives its score (None when unscored); it is asked for only when
        the posterior rule applies."""
        if cds_length(gene) < self.min_cds_length:
            return FILTERED_CDS_LENGTH
        if self.min_gene_posterior > 0.0:
            score = gene_score()
            if score is not None and score < self.min_gene_posterior:
                return FILTERED_GENE_POSTERIOR
        return None


# ---------------------------------------------------------------- writing
GENE_COLUMNS = [
    "seqid",
    "start_1based",
    "end_1based",
    "strand",
    "type",
    "id",
    "parent",
    "phase",
    "mean_posterior",
    "min_posterior",
    "segment_probability",
    "exon_probability",
    "structure_probability",
    "length",
]


def write_genes(
    gff: GFF3Writer,
    tsv: TextIO | None,
    model: Model,
    tables: api.EngineTables | None,
    codes: np.ndarray | None,
    post: api.Posterior | None,
    groups: list[Group],
    predictions: list[GenePrediction],
    seqid: str,
    offset0: int,
    *,
    id_stem: str | None = None,
    gene_filter: GeneFilter | None = None,
    counts: dict[str, int] | None = None,
    written: list[GenePrediction] | None = None,
) -> int:
    """Write decoded genes as GFF3 gene -> mRNA -> exon + CDS lines; returns the line count.

    ``gene_filter`` drops genes (:class:`GeneFilter`); the genes written are numbered
    from 1 and appended to ``written``; ``counts`` gets :data:`COUNT_GENES`,
    :data:`COUNT_MRNAS` and the filtered counts.  IDs start with ``id_stem`` (default
    ``seqid``; :func:`gene_lines`).

    ``predictions`` are :class:`GenePrediction` in genomic order
    (0-based, relative to ``offset0``).  gene and mRNA span the coding part (start
    codon to stop codon; the model has no untranslated regions), exon and CDS lines
    share coordinates, CDS phase as GFF3 1.26 defines it; lines in start order,
    parents first (:func:`gene_lines`).  A partial gene has
    ``partial=true`` and ``partial_reason`` (``record_end``, ``unknown_run``) on its
    gene and mRNA lines.  Scores (when ``post`` is given): the posterior of the
    strand's gene states (CDS and intron) on gene and mRNA, of the strand's CDS
    states on exon and CDS, and the exact probability that every base of the
    feature is in those states (``segment_probability``); on exon and CDS the exact
    probability of an exon with exactly these bounds and this frame
    (``exon_probability``, :func:`exon_query`), on mRNA that of the whole structure
    (``structure_probability``, :func:`structure_query`).  Without ``post`` (a
    sampled truth) the score column is ``.`` and only ``length`` is written.  ``tsv``
    may be None.
    """
    masks = gene_masks(model)
    values = {}
    if post is not None:
        for strand in "+-":
            gene_cols, cds_col = strand_columns(groups, strand)
            values[strand] = (
                post.values[:, gene_cols].sum(axis=1, dtype=np.float64),
                post.values[:, cds_col],
            )

    recal = model.recalibration
    cds_track = (
        {}
        if recal is None
        else {strand: groups[strand_columns(groups, strand)[1]].track_name for strand in "+-"}
    )

    def score_line(ln: GeneLine, strand: str, k: int) -> dict | None:
        if post is None or tables is None or codes is None:
            return None
        sc = score_segment(
            tables,
            codes,
            post,
            values[strand][k],
            masks[strand][k],
            ln.start0,
            ln.end0,
            log_odds=False,
        )
        if recal is not None and k == 1:  # CDS lines: the strand's CDS track
            vals = values[strand][k][ln.start0 : ln.end0]
            sc = add_calibrated(sc, vals, recal, cds_track[strand])
        return sc

    exact = None
    if post is not None and tables is not None and codes is not None:
        exact = exact_scorer(tables, codes, post, exact_allowed(model), codes.shape[0])
    count = 0
    tally = _Tally(gene_filter, counts, written)
    for gp in predictions:
        scored = _memo(score_line)
        number = tally.keep(gp, scored)
        if number:
            count += write_gene(
                gff,
                tsv,
                gp,
                number,
                seqid,
                offset0,
                scored,
                id_stem=id_stem,
                exact=exact,
                recal=recal,
                cds_track=cds_track.get(gp.strand),
            )
    return count


def _memo(
    score_line: Callable[[GeneLine, str, int], dict | None],
) -> Callable[[GeneLine, str, int], dict | None]:
    """``score_line`` remembering its answers for one gene (gene and mRNA lines share
    their span, and the filter asks for the gene line's score first)."""
    seen: dict[tuple[int, int, int], dict | None] = {}

    def scored(ln: GeneLine, strand: str, k: int) -> dict | None:
        key = (ln.start0, ln.end0, k)
        if key not in seen:
            seen[key] = score_line(ln, strand, k)
        return seen[key]

    return scored


class _Tally:
    """The filter of one stretch's genes, its counts, and the numbers of kept genes."""

    def __init__(
        self,
        gene_filter: GeneFilter | None,
        counts: dict[str, int] | None,
        written: list[GenePrediction] | None,
    ) -> None:
        self.filter = gene_filter or GeneFilter()
        self.counts = counts if counts is not None else {}
        for key in (COUNT_GENES, COUNT_MRNAS, FILTERED_CDS_LENGTH, FILTERED_GENE_POSTERIOR):
            self.counts.setdefault(key, 0)
        self.written = written
        self.kept = 0

    def keep(
        self, gene: GenePrediction, score_line: Callable[[GeneLine, str, int], dict | None]
    ) -> int:
        """The number of ``gene`` when it is written (1, 2, ...), else 0 (counted)."""

        def gene_score() -> float | None:
            g0, g1 = gene.span
            sc = score_line(GeneLine("gene", g0, g1, "", None, None, None), gene.strand, 0)
            return None if sc is None else float(sc["mean_posterior"])

        why = self.filter.reason(gene, gene_score)
        if why is not None:
            self.counts[why] += 1
            return 0
        self.kept += 1
        self.counts[COUNT_GENES] += 1
        self.counts[COUNT_MRNAS] += 1  # one mRNA per gene: the model has no isoforms
        if self.written is not None:
            self.written.append(gene)
        return self.kept


def gene_masks(model: Model) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Per strand, (the strand's gene states (CDS and intron), its CDS states) as
    booleans per state: the states gene/mRNA and exon/CDS lines are scored on."""
    masks = {}
    for strand in "+-":
        cds = np.zeros(model.n_states, dtype=np.bool_)
        gene = np.zeros(model.n_states, dtype=np.bool_)
        for i, st in enumerate(model.states):
            if st.strand == strand and st.label in ("CDS", "intron"):
                gene[i] = True
                cds[i] = st.label == "CDS"
        masks[strand] = (gene, cds)
    return masks


def strand_columns(groups: list[Group], strand: str) -> tuple[list[int], int]:
    """The track-group columns of one strand: (CDS and intron columns, the CDS column)."""
    col = {(g.label, g.strand): i for i, g in enumerate(groups)}
    gene_cols = [col[k] for k in (("CDS", strand), ("intron", strand)) if k in col]
    return gene_cols, col[("CDS", strand)]


def write_gene(
    gff: GFF3Writer,
    tsv: TextIO | None,
    gp: GenePrediction,
    number: int,
    seqid: str,
    offset0: int,
    score_line: Callable[[GeneLine, str, int], dict | None],
    *,
    id_stem: str | None = None,
    exact: ExactScore | None = None,
    recal: Recalibration | None = None,
    cds_track: str | None = None,
) -> int:
    """Write one gene's lines (see :func:`write_genes`); the count written.

    With a recalibration table ``recal`` (``cds_track``: the gene strand's CDS track
    name) each score gets a ``calibrated_`` counterpart after it where the table has a
    map (:func:`~seqstate.kinds.segments.add_calibrated`; ``score_line`` adds those of
    the posterior scores): ``exon_probability`` by the CDS track's map,
    ``structure_probability`` by ``mRNA.plus``/``mRNA.minus``'s.

    ``score_line(line, strand, k)`` gives the scores of one line (``k`` 0: scored on
    the strand's gene states, 1: on its CDS states), or None for an unscored line;
    ``exact`` the exon and structure probabilities of scored lines (None: none).
    IDs start with ``id_stem`` (default ``seqid``).
    """
    strand = gp.strand
    count = 0
    seen: dict[tuple[bool, int, int], float | None] = {}
    for ln in gene_lines(gp, seqid if id_stem is None else id_stem, number):
        a, b = ln.start0, ln.end0
        # the exact query first: it reads the forward vector one base before the line's
        # own segment query, so the queries' vector positions keep increasing
        px = None
        if exact is not None and ln.type != "gene":
            which = (ln.type == "mRNA", a, b)  # exon and CDS lines share one query
            if which not in seen:
                seen[which] = exact(ln, gp)
            px = seen[which]
        sc = score_line(ln, strand, 0 if ln.type in ("gene", "mRNA") else 1)
        attrs: list[tuple[str, str | list[str]]] = [("ID", ln.id)]
        if ln.parent:
            attrs.append(("Parent", ln.parent))
        if sc is None:
            px = None
        key_x = "structure_probability" if ln.type == "mRNA" else "exon_probability"
        cal_x = None
        if recal is not None and px is not None:
            word = "plus" if strand == "+" else "minus"
            m = recal.get(f"mRNA.{word}" if ln.type == "mRNA" else str(cds_track), key_x)
            cal_x = None if m is None else m.value(px)
        if sc is not None:
            for key in ("mean_posterior", "min_posterior", "segment_probability"):
                attrs.append((key, format_value(sc[key], SCORE_FORMATS[key])))
                if "calibrated_" + key in sc:
                    c_key = "calibrated_" + key
                    attrs.append((c_key, format_value(sc[c_key], SCORE_FORMATS[c_key])))
            if px is not None:
                attrs.append((key_x, format_value(px, EXACT_FORMAT)))
                if cal_x is not None:
                    attrs.append(("calibrated_" + key_x, format_value(cal_x, EXACT_FORMAT)))
        attrs.append(("length", str(b - a)))
        if gp.partial and ln.type in ("gene", "mRNA"):
            attrs.append(("partial", "true"))
            attrs.append(("partial_reason", list(gp.partial_reasons)))
        gff.write(
            Feature(
                seqid=seqid,
                source=SOURCE,
                type=ln.type,
                start0=a + offset0,
                end0=b + offset0,
                score=None if sc is None else sc["mean_posterior"],
                strand=strand,
                phase=ln.phase,
                attributes=attrs,
            )
        )
        if tsv is not None:
            row = [
                seqid,
                str(a + offset0 + 1),
                str(b + offset0),
                strand,
                ln.type,
                ln.id,
                ln.parent or "",
                "." if ln.phase is None else str(ln.phase),
            ]
            if recal is not None:
                cells = {
                    **({} if sc is None else sc),
                    **({key_x: px} if px is not None else {}),
                    **({"calibrated_" + key_x: cal_x} if cal_x is not None else {}),
                }
                for col in with_calibrated(GENE_COLUMNS[8:-1]):
                    v = cells.get(col)
                    exact_col = "exon_" in col or "structure_" in col
                    fmt = EXACT_FORMAT if exact_col else SCORE_FORMATS[col]
                    row.append("" if v is None else format_value(v, fmt))
            else:
                row += [
                    format_value(sc["mean_posterior"], ".4f") if sc else "",
                    format_value(sc["min_posterior"], ".4f") if sc else "",
                    format_value(sc["segment_probability"], ".4g") if sc else "",
                    format_value(px, EXACT_FORMAT) if px is not None and ln.type != "mRNA" else "",
                    format_value(px, EXACT_FORMAT) if px is not None and ln.type == "mRNA" else "",
                ]
            tsv.write(tsv_row([*row, str(b - a)]))
        count += 1
    return count
