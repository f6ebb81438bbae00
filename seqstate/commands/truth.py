"""A trusted annotation for ``calibrate --truth`` and ``annotate --report --truth``.

The truth is read once and checked before any long work: every chosen feature type
must be a label of the model (``types``, the ``--type`` option; without it every
feature of the file must be one), its sequence IDs must meet the FASTA's, and each
label the truth lacks is left out with a ``warning:`` (never scored against nothing).
When the model has an ``intron`` label and the chosen features have none, introns are
derived from the CDS of each transcript (GFF3 ``Parent``, GTF ``transcript_id``): the
gaps between its consecutive CDS pieces.  GTF CDS get their stop codons joined (GTF
2.2 leaves them out; the model's CDS holds them), through
:func:`seqstate.io.intervals.read_gene_features`.

Coordinates: 0-based half-open inside.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

from seqstate import log
from seqstate.commands.records import id_listing, require_shared_ids
from seqstate.errors import FeatureFormatError, UsageError
from seqstate.io.files import display_name
from seqstate.io.intervals import read_gene_features, read_interval_file
from seqstate.kinds import Group
from seqstate.model import Model

__all__ = ["INTRON", "TruthFeature", "TruthSet", "derive_introns", "fasta_ids", "read_truth"]

#: The label whose features may be derived from the gaps between CDS pieces.
INTRON = "intron"
CDS = "CDS"


@dataclass(frozen=True)
class TruthFeature:
    """Bases ``start0 .. end0 - 1`` of ``seqid`` truly carry track group ``group``."""

    seqid: str
    start0: int
    end0: int
    group: int
    line0: int | None


@dataclass
class TruthSet:
    """The features of a truth file, by track group of the model."""

    path: str
    fmt: str
    features: list[TruthFeature]
    #: labels derived (not read): label -> number of features derived
    derived: dict[str, int] = field(default_factory=dict)

    @property
    def seqids(self) -> list[str]:
        """The sequence IDs of the features, in file order."""
        return list(dict.fromkeys(f.seqid for f in self.features))

    def check_fasta(self, lengths: dict[str, int] | None, ids: Sequence[str], fasta: str) -> None:
        """The truth must share a sequence ID with ``ids`` (the FASTA's); features past the
        end of their record (``lengths``, when known) are errors naming the line.  Features
        on sequences the FASTA lacks are ignored with one warning."""
        require_shared_ids(self.path, self.seqids, display_name(fasta), list(ids))
        known = set(ids)
        others = [s for s in self.seqids if s not in known]
        if others:
            n = sum(1 for f in self.features if f.seqid not in known)
            log.warn(
                f"{self.path}: {n} feature(s) on {len(others)} sequence(s) that "
                f"{display_name(fasta)} lacks ({id_listing(others)}) are ignored"
            )
        if lengths is None:
            return
        for f in self.features:
            n_bases = lengths.get(f.seqid)
            if n_bases is not None and f.end0 > n_bases:
                raise FeatureFormatError(
                    f"feature ends at base {f.end0} of '{f.seqid}', which has {n_bases} bases",
                    path=self.path,
                    line0=f.line0,
                )


def _group_for(groups: list[Group], label: str, strand: str) -> int | None:
    """The track group of a feature of ``label`` on ``strand`` (a label without strands
    takes its one group; an unstranded feature of a stranded label the first)."""
    same = [k for k, grp in enumerate(groups) if grp.label == label]
    if not same:
        return None
    if len(same) == 1:
        return same[0]
    for k in same:
        if groups[k].strand == strand:
            return k
    return same[0]


def derive_introns(features: Sequence[object]) -> list[tuple[str, int, int, str, int | None]]:
    """Introns of GFF3-style features: per transcript (each ``Parent`` of its CDS), the gaps
    between consecutive CDS pieces, 0-based half-open, as ``(seqid, start0, end0, strand,
    line0 of the CDS after the gap)``; in transcript order, each gap once per transcript."""
    pieces: dict[tuple[str, str], list] = defaultdict(list)
    for f in features:
        if getattr(f, "type", None) != CDS:
            continue
        for parent in f.values("Parent"):  # type: ignore[attr-defined]
            pieces[(f.seqid, parent)].append(f)  # type: ignore[attr-defined]
    out = []
    for (seqid, _), cds in pieces.items():
        cds = sorted(cds, key=lambda c: (c.start0, c.end0))
        for a, b in zip(cds, cds[1:]):
            if b.start0 > a.end0:
                out.append((seqid, a.end0, b.start0, a.strand, b.line0))
    return out


def read_truth(model: Model, groups: list[Group], path: str, types: Sequence[str] = ()) -> TruthSet:
    """Read and check the truth ``path`` (BED, GFF3 or GTF) for ``model``'s ``groups``.

    ``types`` (``--type``, repeatable) choose the GFF3/GTF features by column 3, each a
    label of the model; empty: every feature's type (BED: its name) must be a label.
    Errors: a missing file, a type (or feature) that is not a label (the labels listed
    once), ``--type`` with BED, a truth without any chosen feature.
    """
    shown = display_name(path)
    labels = list(dict.fromkeys(grp.label for grp in groups))
    listing = ", ".join(labels) or "(none)"
    chosen = list(dict.fromkeys(types))
    for t in chosen:
        if t not in labels:
            raise UsageError(
                f"--type {t}: not a label of model {model.name} (its labels: {listing})"
            )
    if not Path(path).exists():
        raise FeatureFormatError("truth file not found", path=shown)
    fmt, intervals = read_interval_file(path, types=set(chosen) or None)
    if chosen and fmt == "bed":
        raise UsageError(f"--type selects GFF3 or GTF features, but {shown} was read as BED")
    out: list[TruthFeature] = []
    for iv in intervals:
        label = (iv.type if fmt != "bed" else iv.name) or ""
        if fmt == "gtf" and label == CDS:
            continue  # from the gene hierarchy below, stop codons joined
        k = _group_for(groups, label, iv.strand)
        if k is None:
            raise FeatureFormatError(
                f"feature type {label!r} is not a label of model {model.name}; expected one "
                f"of {listing} (choose the truth's features with --type)",
                path=shown,
                line0=iv.line0 if iv.line0 >= 0 else None,
            )
        out.append(TruthFeature(iv.seqid, iv.start0, iv.end0, k, iv.line0))
    present = {groups[f.group].label for f in out}
    wants_cds = CDS in labels and (not chosen or CDS in chosen)
    wants_intron = INTRON in labels and INTRON not in present and (not chosen or CDS in chosen)
    derived: dict[str, int] = {}
    if fmt != "bed" and (fmt == "gtf" and wants_cds or wants_intron):
        _, hierarchy = read_gene_features(path)
        if fmt == "gtf" and wants_cds:
            for f in hierarchy:
                if f.type == CDS:
                    k = _group_for(groups, CDS, f.strand)
                    assert k is not None
                    out.append(TruthFeature(f.seqid, f.start0, f.end0, k, f.line0))
        if wants_intron:
            introns = derive_introns(hierarchy)
            for seqid, a, b, strand, line0 in introns:
                k = _group_for(groups, INTRON, strand)
                assert k is not None
                out.append(TruthFeature(seqid, a, b, k, line0))
            if introns:
                derived[INTRON] = len(introns)
                log.note(
                    f"note: {shown} has no intron features: {len(introns)} intron(s) derived "
                    "from the gaps between the CDS pieces of each transcript"
                )
    if not out:
        what = f"no feature of type {', '.join(chosen)}" if chosen else "no feature"
        raise FeatureFormatError(f"has {what}: nothing to calibrate on", path=shown)
    return TruthSet(shown, fmt, out, derived)


def fasta_ids(path: str, lengths: dict[str, int] | None) -> list[str] | None:
    """The record IDs of the FASTA ``path`` in file order: from ``lengths`` (its index)
    when given, else from its header lines (one quick pass, no bases kept); None for
    standard input (it can be read once only)."""
    if lengths is not None:
        return list(lengths)
    if path == "-":
        return None
    from seqstate.errors import SequenceFormatError
    from seqstate.io.files import display_name, iter_lines, open_input

    ids: list[str] = []
    with open_input(path, SequenceFormatError, "FASTA") as handle:
        for _, line in iter_lines(handle, display_name(path), SequenceFormatError):
            if line.startswith(b">"):
                words = line[1:].split(None, 1)
                if words:
                    ids.append(words[0].decode("utf-8", errors="replace"))
    return ids
