"""The gene kind: decoded paths -> gene -> mRNA -> exon + CDS features, and their writer.

A model is of this kind when its manifest says ``[annotate] features =
"gene_structure"`` (the built-in ``gene-segment`` model).  Its layout is in
:mod:`seqstate.kinds.gene_layout`, its fit labelling rule in
:mod:`seqstate.kinds.gene_labels`.  GFF3 coordinates are 1-based closed in
files, 0-based half-open inside.

This module holds the kind (:class:`GeneKind`, :data:`GENES`); decoding and gene lines
are in :mod:`seqstate.kinds.gene_decoding`, the exact queries in
:mod:`seqstate.kinds.gene_exact`, the writer in :mod:`seqstate.kinds.gene_writing`
(their public names are re-exported here); long records window by window in
:mod:`seqstate.kinds.gene_stream`.
"""

from __future__ import annotations

from typing import Any, TextIO

import numpy as np

from seqstate.io.gff3 import GFF3Writer
from seqstate.kinds.base import Group, Kind, RecordData
from seqstate.kinds.gene_decoding import (
    PARTIAL_RECORD_END,
    PARTIAL_UNKNOWN_RUN,
    GeneLine,
    GenePrediction,
    Run,
    cds_length,
    cds_phases,
    codon_positions,
    decode_genes,
    decoding_classes,
    gene_lines,
    genes_from_path,
    genes_from_runs,
    run_key,
    unknown_runs,
)
from seqstate.kinds.gene_exact import (
    EXACT_FORMAT,
    FRAME0,
    INTRON,
    NOT_CDS,
    NOT_GENE,
    ExactScore,
    exact_allowed,
    exact_scorer,
    exon_query,
    structure_query,
)
from seqstate.kinds.gene_writing import (
    COUNT_GENES,
    COUNT_MRNAS,
    FILTERED_CDS_LENGTH,
    FILTERED_GENE_POSTERIOR,
    GENE_COLUMNS,
    GeneFilter,
    gene_masks,
    strand_columns,
    write_gene,
    write_genes,
)
from seqstate.kinds.segments import (
    label_columns,
    label_scores,
    with_calibrated,
)
from seqstate.kinds.stream import StreamRecord, TrackSink
from seqstate.model import Model

__all__ = [
    "COUNT_GENES",
    "COUNT_MRNAS",
    "EXACT_FORMAT",
    "ExactScore",
    "FEATURES",
    "FILTERED_CDS_LENGTH",
    "FILTERED_GENE_POSTERIOR",
    "FRAME0",
    "GENES",
    "GENE_COLUMNS",
    "GeneFilter",
    "GeneKind",
    "GeneLine",
    "GenePrediction",
    "INTRON",
    "NOT_CDS",
    "NOT_GENE",
    "PARTIAL_RECORD_END",
    "PARTIAL_UNKNOWN_RUN",
    "Run",
    "cds_length",
    "cds_phases",
    "codon_positions",
    "decode_genes",
    "decoding_classes",
    "exact_allowed",
    "exact_scorer",
    "exon_query",
    "gene_lines",
    "gene_masks",
    "genes_from_path",
    "genes_from_runs",
    "run_key",
    "strand_columns",
    "structure_query",
    "unknown_runs",
    "write_gene",
    "write_genes",
]


#: ``[annotate] features`` value of a manifest whose model is of this kind.
FEATURES = "gene_structure"


class GeneKind(Kind):
    """Gene structures: decoded paths written as gene -> mRNA -> exon + CDS hierarchies."""

    name = "genes"
    state_rule = "gene_structure"

    def claims(self, model: Model) -> bool:
        table = model.extra.get("annotate", {})
        return isinstance(table, dict) and table.get("features") == FEATURES

    def feature_columns(self, groups: list[Group], calibrated: bool = False) -> list[str]:
        if calibrated:
            return GENE_COLUMNS[:8] + with_calibrated(GENE_COLUMNS[8:-1]) + GENE_COLUMNS[-1:]
        return list(GENE_COLUMNS)

    def write_record(self, rec: RecordData, gff: GFF3Writer, tsv: TextIO) -> int:
        predictions = decode_genes(
            rec.model, rec.tables, rec.codes, rec.unknown, rec.decode, rec.split_unknown, rec.seqid
        )
        written: list[GenePrediction] = []
        count = write_genes(
            gff,
            tsv,
            rec.model,
            rec.tables,
            rec.codes,
            rec.post,
            rec.groups,
            predictions,
            rec.seqid,
            rec.offset0,
            id_stem=rec.id_stem,
            gene_filter=rec.gene_filter,
            counts=rec.counts,
            written=written,
        )
        if rec.on_genes is not None:
            rec.on_genes(written)
        return count

    def write_stream(
        self, rec: StreamRecord, gff: GFF3Writer, tsv: TextIO, track_sink: TrackSink
    ) -> tuple[int, float, int]:
        from seqstate.kinds.gene_stream import GeneStream

        return GeneStream(rec, gff, tsv).run(track_sink)

    def truth_of(self, path: np.ndarray, model: Model, state_group: np.ndarray) -> list[Any]:
        return genes_from_path(path, model)

    def write_truth(
        self,
        gff: GFF3Writer,
        model: Model,
        groups: list[Group],
        truth: list[Any],
        seqid: str,
        offset0: int = 0,
        numbers: list[int] | None = None,
    ) -> int:
        # the true genes as a gene -> mRNA -> exon + CDS hierarchy, unscored, numbered
        # on from the record's earlier pieces (numbers[0]: the last gene number written)
        last = [0] if numbers is None else numbers
        if not last:
            last.append(0)
        count = 0
        for gp in truth:
            last[0] += 1
            count += write_gene(gff, None, gp, last[0], seqid, offset0, _unscored)
        return count

    def extra_columns(self, label: str) -> list[str]:
        return label_columns(label)

    def extra_scores(self, label: str, seq: bytes) -> dict[str, Any]:
        return label_scores(label, seq)


def _unscored(line: GeneLine, strand: str, k: int) -> dict | None:
    """The scores of a sampled truth's line: none."""
    return None


#: The gene kind.
GENES = GeneKind()
