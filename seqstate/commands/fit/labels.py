"""Known features of ``seqstate fit`` -> one label group per base.

Every base gets one label group from the features that cover it (GFF3 column 3 or
BED column 4 is a label of the model); bases covered by no feature take the model's
background label (:attr:`Model.background_label`) or, when that is None, the model's
unlabelled states.  :func:`read_labels` is the one entry point that reads a file of
known features; the state rules (:mod:`.rules`) then pick a state per base.

Coordinates: 0-based half-open inside; GFF3 is 1-based closed, BED 0-based
half-open; positions in messages are 1-based.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from seqstate.errors import FeatureFormatError, UsageError
from seqstate.model import Model

if TYPE_CHECKING:
    from seqstate.io.gff3 import Feature
    from seqstate.kinds.gene_labels import LabelReport

#: Strand of a feature or state -> the code a :class:`LabelTrack` stores per base.
STRAND_CODE = {None: 0, "+": 1, "-": 2}
#: Strand code -> the text messages show.
STRAND_TEXT = {0: ".", 1: "+", 2: "-"}


@dataclass(frozen=True)
class LabelFeature:
    """One known feature: bases ``start0 .. end0 - 1`` of ``seqid`` carry ``label``.

    0-based half-open.  ``strand`` is '+', '-' or None; ``phase`` is the GFF3
    phase (0, 1, 2) or None; ``line0`` is the 0-based line of the file.
    """

    seqid: str
    start0: int
    end0: int
    label: str
    strand: str | None
    phase: int | None
    line0: int | None


def read_labels(path: str | Path, model: Model, fmt: str = "auto") -> list[LabelFeature]:
    """The features of a GFF3 or GTF (1-based closed) or BED (0-based half-open) file.

    Every feature's type (GFF3 and GTF column 3) or name (BED column 4) must be a label
    of ``model``; a BED line without a name is read as the model's only label
    when it has exactly one.  Empty BED intervals (start = end) cover nothing
    and are dropped.  Raises :class:`FeatureFormatError` naming the line.
    """
    from seqstate.io.files import display_name
    from seqstate.io.intervals import read_interval_file

    shown = display_name(path)
    if fmt not in ("auto", "gff3", "gtf", "bed"):
        raise UsageError(f"labels format '{fmt}' is not gff3, gtf, bed or auto")
    _, found = read_interval_file(path, None if fmt == "auto" else fmt, what="GFF3, GTF or BED")
    labels = model.labels
    known = ", ".join(f"'{x}'" for x in labels) or "none"
    out: list[LabelFeature] = []

    def check(label: str, line0: int | None, what: str) -> None:
        if label not in labels:
            raise FeatureFormatError(
                f"{what} '{label}' is not a label of model '{model.name}' (its labels: {known})",
                path=shown,
                line0=line0,
            )

    for b in found:
        if b.type is not None:  # GFF3 or GTF: the type is the label
            check(b.type, b.line0, "feature type")
            strand = b.strand if b.strand in ("+", "-") else None
            out.append(LabelFeature(b.seqid, b.start0, b.end0, b.type, strand, b.phase, b.line0))
            continue
        name = None if b.name in (None, "", ".") else b.name
        if name is None:
            if len(labels) != 1:
                raise FeatureFormatError(
                    f"BED line has no name (column 4) and model '{model.name}' has "
                    f"{len(labels)} labels ({known}): name the label of every line",
                    path=shown,
                    line0=b.line0,
                )
            name = labels[0]
        check(name, b.line0, "BED name")
        if b.end0 == b.start0:
            continue
        strand = b.strand if b.strand in ("+", "-") else None
        out.append(LabelFeature(b.seqid, b.start0, b.end0, name, strand, None, b.line0))
    return out


def group_features(
    features: Sequence[LabelFeature], lengths: dict[str, int], path: str
) -> dict[str, list[LabelFeature]]:
    """Features by record, each inside its record; raises FeatureFormatError otherwise.

    ``lengths`` maps the FASTA record IDs to their lengths in bases.
    """
    by_record: dict[str, list[LabelFeature]] = {rid: [] for rid in lengths}
    for f in features:
        if f.seqid not in lengths:
            names = list(lengths)
            shown = ", ".join(f"'{x}'" for x in names[:5]) + (", ..." if len(names) > 5 else "")
            raise FeatureFormatError(
                f"seqid '{f.seqid}' is not a record of the FASTA input (records: {shown})",
                path=path,
                line0=f.line0,
            )
        n = lengths[f.seqid]
        if f.end0 > n:
            raise FeatureFormatError(
                f"feature {f.label} ends at position {f.end0} (1-based), past the end of the "
                f"record ({n} bases)",
                path=path,
                line0=f.line0,
                where=f"record '{f.seqid}'",
            )
        by_record[f.seqid].append(f)
    return by_record


@dataclass
class LabelTrack:
    """Per base of one record: label group and strand code, and the record's features.

    ``group[i]`` (int16) indexes :func:`label_groups`; ``strand[i]`` (int8) is 0
    (none), 1 ('+') or 2 ('-').  Three bytes per base; the feature behind a base
    is looked up only for messages.
    """

    group: np.ndarray
    strand: np.ndarray
    features: list[LabelFeature]

    def line0_at(self, pos: int) -> int | None:
        """0-based line of a feature covering 0-based ``pos`` (None if uncovered)."""
        f = _covering(self.features, pos)
        return f.line0 if f is not None else None


def _covering(features: Sequence[LabelFeature], pos: int) -> LabelFeature | None:
    for f in features:
        if f.start0 <= pos < f.end0:
            return f
    return None


def label_groups(model: Model) -> tuple[list[str], list[np.ndarray], int]:
    """(group names, states of each group, background group index).

    Groups are the model's labels in order, then the unlabelled states (name
    ``"(no label)"``).  Uncovered bases belong to the background group: the
    model's ``background_label`` or, when None, the unlabelled states.
    """
    names = list(model.labels) + ["(no label)"]
    states = [model.states_of_label(x) for x in model.labels]
    states.append(
        np.array([i for i, s in enumerate(model.states) if s.label is None], dtype=np.int64)
    )
    bg = model.labels.index(model.background_label) if model.background_label else len(names) - 1
    return names, states, bg


def paint_labels(
    model: Model, n: int, features: list[LabelFeature], *, record: str, path: str, rule: str
) -> LabelTrack:
    """Per-base label groups of one record of ``n`` bases; overlaps are checked.

    Features of the same label may overlap (their union counts).  Overlapping
    features of different labels are an error, and so, under the
    ``label_and_strand`` rule, are overlapping features of one label on
    different strands.
    """
    names, _, bg = label_groups(model)
    index = {x: i for i, x in enumerate(names[:-1])}
    group = np.full(n, -1, dtype=np.int16)
    strand = np.zeros(n, dtype=np.int8)
    for k, f in enumerate(features):
        g = index[f.label]
        sc = STRAND_CODE[f.strand]
        seg = group[f.start0 : f.end0]
        clash = (seg >= 0) & (seg != g)
        if rule == "label_and_strand":
            clash |= (seg == g) & (strand[f.start0 : f.end0] != sc)
        if clash.any():
            j = int(np.flatnonzero(clash)[0])
            pos = f.start0 + j
            other = next(
                o
                for o in features[:k]
                if o.start0 <= pos < o.end0 and (o.label != f.label or STRAND_CODE[o.strand] != sc)
            )
            what = (
                f"{other.label} ({STRAND_TEXT[STRAND_CODE[other.strand]]} strand)"
                if other.label == f.label
                else other.label
            )
            raise FeatureFormatError(
                f"feature {f.label} overlaps feature {what} of line {(other.line0 or 0) + 1} at "
                f"position {f.start0 + j + 1} (1-based): a base can carry one label only",
                path=path,
                line0=f.line0,
                where=f"record '{record}'",
            )
        seg[:] = g
        strand[f.start0 : f.end0] = sc
    group[group < 0] = bg
    return LabelTrack(group, strand, features)


def require_label_units(features: Sequence[LabelFeature], model: Model, path: str) -> None:
    """Counting needs at least one feature of every label (the background label aside)."""
    labels = [x for x in model.labels if x != model.background_label]
    if not features:
        raise FeatureFormatError(
            "has no features: counting needs at least one feature of each label of model "
            f"'{model.name}' ({', '.join(labels) or 'none'})",
            path=path,
        )
    present = {f.label for f in features}
    missing = [x for x in labels if x not in present]
    if missing:
        raise FeatureFormatError(
            f"has no feature of label {', '.join(missing)} (found only "
            f"{', '.join(sorted(present))}): every label of model '{model.name}' needs at "
            "least one feature to count from",
            path=path,
        )


def require_gene_units(
    features: Sequence[Feature],
    pairs: Sequence[tuple[object, np.ndarray]],
    report: LabelReport,
    model: Model,
    path: str,
) -> None:
    """A gene annotation must give at least one usable gene, and an example of every
    label (a coding exon and an intron)."""
    if report.used == 0:
        n_cds = sum(1 for f in features if f.type == "CDS")
        n_mrna = sum(1 for f in features if f.type == "mRNA")
        if not features:
            what = "has no features"
        elif n_cds == 0:
            what = f"has no CDS feature ({len(features)} feature(s) of other types)"
        elif not any(f.values("Parent") for f in features if f.type == "CDS"):
            what = (
                f"has {n_cds} CDS feature(s) but none with a Parent ({n_mrna} mRNA feature(s)): "
                "flat features are not genes"
            )
        else:
            skipped = ", ".join(f"{v} ({k})" for k, v in sorted(report.skipped.items()))
            what = f"has no gene the layout can use (skipped: {skipped or 'none'})"
        raise FeatureFormatError(
            f"{what}; counting model '{model.name}' needs gene -> mRNA -> CDS hierarchies "
            "with CDS phases",
            path=path,
        )
    for label in model.labels:
        idx = model.states_of_label(label)
        if not any(np.isin(states, idx).any() for _, states in pairs):
            raise FeatureFormatError(
                f"the {report.used} usable gene(s) have no base of label {label} (e.g. no "
                f"intron): every label of model '{model.name}' needs at least one example",
                path=path,
            )


def read_gene_labels(
    model: Model, records: list, path: str, *, bad_genes: str = "skip"
) -> tuple[int, list[tuple[bytes, np.ndarray]], LabelReport]:
    """A GFF3 or GTF gene annotation -> (number of features, state path per record and
    its reverse-complement mirror, labelling report).  GTF is read as its gene ->
    transcript hierarchy (:func:`seqstate.io.intervals.read_gene_features`).

    The labelling rule is the gene layout's own (:func:`seqstate.kinds.gene_labels.label_records`:
    gene -> mRNA -> CDS with phase); the annotation must give a usable gene and an
    example of every label (see :func:`require_gene_units`).
    """
    from seqstate.io.intervals import read_gene_features
    from seqstate.kinds import gene_labels as genes

    _, features = read_gene_features(path)
    pairs, report = genes.label_records(model, records, features, path=path, bad_genes=bad_genes)
    require_gene_units(features, pairs, report, model, path)
    return len(features), pairs, report
