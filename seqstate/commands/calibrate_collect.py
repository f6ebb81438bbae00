"""``seqstate calibrate``: the records and their truth, and the forecasts collected.

Truth sources: records sampled from a model with their true paths
(:func:`sampled_records`), or a FASTA with a trusted annotation (:func:`file_records`);
:func:`calibrate_records` decodes each record and fills the reliability tables of each
track group (per base and per decoded feature; :func:`gene_forecasts` for a gene
model).  Coordinates: 0-based half-open.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from seqstate import log
from seqstate.commands.calibrate_report import (
    CalibrateOptions,
    LabelCalibration,
)
from seqstate.commands.calibration import Reliability
from seqstate.commands.inputs import (
    indexed_lengths,
    read_model_records,
    read_model_region,
)
from seqstate.commands.recalibrate import (
    Collector,
)
from seqstate.commands.records import choose_stretches
from seqstate.commands.truth import TruthSet, read_truth
from seqstate.engine import api
from seqstate.engine.sampling import sample_record
from seqstate.errors import FeatureFormatError
from seqstate.kinds import GENES, Group, group_index, track_groups
from seqstate.kinds.segments import decode_segments
from seqstate.model import Model
from seqstate.model.core import default_thresholds


@dataclass
class TruthRecord:
    """One record to calibrate on: its symbols and, per group, which bases truly carry it.

    ``symbols`` are symbol indices (int8, -1 unknown).  The truth is either ``group``,
    one group index per base (-1 for none; a sampled path, 2 bytes a base), or
    ``truth``, a boolean ``N x groups`` array (an annotation, whose features may
    overlap).
    """

    id: str
    symbols: np.ndarray
    truth: np.ndarray | None = None
    group: np.ndarray | None = None

    def carries(self, k: int, start0: int = 0, end0: int | None = None) -> np.ndarray:
        """Booleans: which bases of ``[start0, end0)`` truly carry group ``k``."""
        if self.group is not None:
            return self.group[start0:end0] == k
        assert self.truth is not None
        return self.truth[start0:end0, k]


# ---------------------------------------------------------------- truth sources
def sampled_records(
    model: Model, length: int, records: int, seed: int, groups: list[Group] | None = None
) -> Iterator[TruthRecord]:
    """Records drawn from ``model`` with their true paths, one at a time (``sim1``, ...).

    Drawn exactly as ``seqstate sample`` draws them for the same seed (PCG64).
    ``groups`` are the track groups the truth is given for (default: ``model``'s).
    """
    tables = api.prepare(model)
    groups = track_groups(model) if groups is None else groups
    state_group = _state_group_for(model, groups)
    rng = np.random.default_rng(seed)
    for r in range(records):
        path, sym = sample_record(tables, length, rng)
        g = state_group.astype(np.int16)[path]
        del path
        yield TruthRecord(f"sim{r + 1}", sym, group=g)


def _state_group_for(model: Model, groups: list[Group]) -> np.ndarray:
    """Per state of ``model``, the index in ``groups`` of its (label, strand), or -1."""
    keys = {(grp.label, grp.strand): k for k, grp in enumerate(groups)}
    return np.array(
        [keys.get((s.label, s.strand), -1) if s.label else -1 for s in model.states],
        dtype=np.int64,
    )


def file_records(
    model: Model,
    fasta: str,
    truth_path: str | TruthSet,
    *,
    types: Sequence[str] = (),
    region: str | None = None,
    record_ids: Sequence[str] | None = None,
) -> tuple[list[TruthRecord], list[int]]:
    """The stretches of ``fasta`` to calibrate on, with the truth of ``truth_path``.

    The truth (BED, GFF3 or GTF, or a :class:`~seqstate.commands.truth.TruthSet` already
    read) is read by :func:`~seqstate.commands.truth.read_truth` (``types``: the
    ``--type`` option).  The stretches are ``region`` (``ID:START-END``, 1-based
    inclusive, as on ``annotate``), the records ``record_ids``, or every record
    (:func:`~seqstate.commands.records.choose_stretches`); features outside them are
    ignored, features across an edge are cut at it.  Without a region, records without
    any true feature are left out with a warning.  Returns the records and the indices
    of the track groups whose label the truth has in those stretches; every other
    label is left out with a warning (never scored against a truth that lacks it).
    """
    groups = track_groups(model)
    truth = (
        truth_path
        if isinstance(truth_path, TruthSet)
        else read_truth(model, groups, truth_path, types)
    )
    lengths = indexed_lengths(fasta, model)
    records = read_model_records(fasta, model) if lengths is None else []
    if lengths is None:
        lengths = {rec.id: len(rec.seq) for rec in records}
    truth.check_fasta(lengths, list(lengths), fasta)
    stretches = choose_stretches(lengths, region, record_ids, fasta)
    by_id = {rec.id: rec for rec in records}
    on: dict[str, list] = {}
    for f in truth.features:
        on.setdefault(f.seqid, []).append(f)
    tables = api.prepare(model)
    out: list[TruthRecord] = []
    for st in stretches:
        n = st.end0 - st.start0
        marks = np.zeros((n, len(groups)), dtype=np.bool_)
        for f in on.get(st.seqid, []):
            a, b = max(f.start0, st.start0), min(f.end0, st.end0)
            if a < b:
                marks[a - st.start0 : b - st.start0, f.group] = True
        if region is None and not marks.any():
            continue
        if st.seqid in by_id:
            seq = by_id[st.seqid].seq[st.start0 : st.end0]
        else:
            got = read_model_region(fasta, model, st)
            assert got is not None  # the index was there a moment ago
            seq = got.seq
        rid = st.seqid if region is None else st.to_text()
        out.append(TruthRecord(rid, api.symbols_of(tables, seq), marks))
    del records, by_id
    shown = truth.path
    if not out:
        raise FeatureFormatError(
            f"no feature of {shown} lies on a record of {fasta}: nothing to calibrate on",
            path=shown,
        )
    if region is None and len(out) < len(stretches):
        left = len(stretches) - len(out)
        log.warn(
            f"{shown} has features on {len(out)} of {len(stretches)} record(s) of {fasta}; "
            f"the {left} record(s) without any are left out"
        )
    present = [bool(any(rec.truth[:, k].any() for rec in out)) for k in range(len(groups))]  # type: ignore[index]
    by_label: dict[str, bool] = {}
    for grp, here in zip(groups, present):
        by_label[grp.label] = by_label.get(grp.label, False) or here
    absent = [label for label, here in by_label.items() if not here]
    if len(absent) == len(by_label):
        where = f"region {region}" if region is not None else fasta
        raise FeatureFormatError(
            f"no feature of {shown} lies in {where}: nothing to calibrate on", path=shown
        )
    for label in absent:
        tracks = ", ".join(grp.track_name for grp in groups if grp.label == label)
        log.warn(
            f"{shown} has no {label} feature in the stretch calibrated on: {tracks} left out "
            "(not scored against a truth without them)"
        )
    keep = [k for k, grp in enumerate(groups) if by_label[grp.label]]
    return out, keep


# ---------------------------------------------------------------- the measure
def calibrate_records(
    model: Model,
    records: Iterator[TruthRecord] | list[TruthRecord],
    bins: int,
    progress: log.Progress | None = None,
    total_bases: int = 0,
    collector: Collector | None = None,
) -> tuple[list[LabelCalibration], int, int]:
    """Decode every record with ``model`` and fill one pair of tables per track group.

    Returns (tables, records, bases).  Records are handled one at a time, so memory is
    that of the longest record.  With a recalibrated model each group also gets the
    tables of its calibrated forecasts; ``collector`` gathers the forecasts a
    recalibration table is fitted on (:mod:`seqstate.commands.recalibrate`).
    """
    tables = api.prepare(model)
    groups = track_groups(model)
    state_group = group_index(model, groups)
    thresholds = default_thresholds(model)
    masks = []
    for grp in groups:
        mask = np.zeros(model.n_states, dtype=np.bool_)
        mask[list(grp.states)] = True
        masks.append(mask)
    out = [
        LabelCalibration(
            grp.track_name, grp.label, grp.strand, Reliability(bins), Reliability(bins)
        )
        for grp in groups
    ]
    recal = model.recalibration
    if recal is not None:
        for lab in out:
            lab.calibrated_bases, lab.calibrated_features = Reliability(bins), Reliability(bins)
    gene_scores = GENES.claims(model) and (collector is not None or recal is not None)
    progress = progress or log.QuietProgress()
    progress.start(total_bases)
    n_rec = n_bases = 0
    for rec in records:
        progress.working(rec.id, int(rec.symbols.shape[0]))
        codes = api.encode_symbols(tables, rec.symbols)
        post = api.posterior(tables, codes, group=state_group, n_groups=len(groups), record=rec.id)
        segs = decode_segments(
            tables,
            codes,
            post,
            state_group,
            rec.symbols,
            decode=model.decode,
            min_posterior=float(thresholds["min_posterior"]),
            min_length=int(thresholds["min_length"]),
            split_unknown=10,
            record=rec.id,
        )
        for k, lab in enumerate(out):
            lab.bases.add(post.values[:, k], rec.carries(k))
            if collector is not None:
                collector.add_bases(lab.track, post.values[:, k], rec.carries(k))
            m = None if recal is None else recal.get(lab.track, "posterior")
            if lab.calibrated_bases is not None:
                col = post.values[:, k]
                lab.calibrated_bases.add(col if m is None else m.apply(col), rec.carries(k))
        probs: list[list[float]] = [[] for _ in groups]
        right: list[list[bool]] = [[] for _ in groups]
        starts: list[list[int]] = [[] for _ in groups]
        for seg in segs:
            lp = api.segment_log_probability(
                tables, codes, post, seg.start0, seg.end0, masks[seg.group]
            )
            probs[seg.group].append(math.exp(lp) if lp > -math.inf else 0.0)
            right[seg.group].append(bool(rec.carries(seg.group, seg.start0, seg.end0).all()))
            starts[seg.group].append(seg.start0)
        for k, lab in enumerate(out):
            if probs[k]:
                lab.features.add(np.array(probs[k]), np.array(right[k]))
                lab.n_features += len(probs[k])
                lab.n_correct += int(sum(right[k]))
                if collector is not None:
                    collector.add_features(
                        lab.track, "segment_probability", starts[k], probs[k], right[k]
                    )
                if lab.calibrated_features is not None:
                    m = None if recal is None else recal.get(lab.track, "segment_probability")
                    p = np.array(probs[k])
                    lab.calibrated_features.add(p if m is None else m.apply(p), np.array(right[k]))
        if gene_scores and collector is not None:
            for key, (st, pr, ok) in gene_forecasts(
                model, tables, codes, post, rec, groups
            ).items():
                collector.add_features(key[0], key[1], st, pr, ok)
        if collector is not None:
            collector.next_record(int(rec.symbols.shape[0]))
        n_rec += 1
        n_bases += int(rec.symbols.shape[0])
        progress.advance(int(rec.symbols.shape[0]), rec.id)
        del post, codes
    progress.finish()
    return out, n_rec, n_bases


def gene_forecasts(
    model: Model,
    tables: api.EngineTables,
    codes: np.ndarray,
    post: api.Posterior,
    rec: TruthRecord,
    groups: list[Group],
) -> dict[tuple[str, str], tuple[list[int], list[float], list[bool]]]:
    """A gene model's exact forecasts on one record, as annotate scores its genes, with
    their outcomes against the truth (:mod:`seqstate.commands.recalibrate`): per
    (``CDS.plus``, ``exon_probability``) one entry per decoded CDS piece, per
    (``mRNA.plus``, ``structure_probability``) one per decoded gene; (first bases,
    forecasts, outcomes)."""
    from seqstate.kinds.genes import (
        decode_genes,
        exact_allowed,
        exact_scorer,
        gene_lines,
        strand_columns,
    )

    n = int(rec.symbols.shape[0])
    genes = decode_genes(model, tables, codes, rec.symbols < 0, model.decode, 10, rec.id)
    exact = exact_scorer(tables, codes, post, exact_allowed(model), n)
    names = {g: grp.track_name for g, grp in enumerate(groups)}
    out: dict[tuple[str, str], tuple[list[int], list[float], list[bool]]] = {}

    def mark(k: int, a: int, b: int) -> np.ndarray:
        return rec.carries(k, a, b)

    for gp in genes:
        gene_cols, cds = strand_columns(groups, gp.strand)
        intron = next((c for c in gene_cols if c != cds), None)
        word = "plus" if gp.strand == "+" else "minus"
        for ln in gene_lines(gp, rec.id, 1):
            if ln.type not in ("mRNA", "CDS"):
                continue
            p = exact(ln, gp)
            if p is None:
                continue
            a, b = ln.start0, ln.end0
            edge_ok = (a == 0 or not mark(cds, a - 1, a).any()) and (
                b >= n or not mark(cds, b, b + 1).any()
            )
            if ln.type == "CDS":
                ok = bool(mark(cds, a, b).all()) and edge_ok
                key = (names[cds], "exon_probability")
            else:
                inside = np.zeros(b - a, dtype=np.bool_)
                for p0, p1 in gp.pieces:
                    inside[p0 - a : p1 - a] = True
                ok = bool(np.array_equal(mark(cds, a, b), inside)) and edge_ok
                if intron is not None:
                    ok = ok and bool(np.array_equal(mark(intron, a, b), ~inside))
                    ok = ok and (a == 0 or not mark(intron, a - 1, a).any())
                    ok = ok and (b >= n or not mark(intron, b, b + 1).any())
                key = (f"mRNA.{word}", "structure_probability")
            got = out.setdefault(key, ([], [], []))
            got[0].append(a)
            got[1].append(float(p))
            got[2].append(ok)
    return out


def measured_stretches(opts: CalibrateOptions, recs: Sequence[TruthRecord] | None) -> list[str]:
    """The stretches a run measures (or fits on): ``ID:START-END`` / record IDs, or the
    sampled records' description (``sampled:seed=S,records=N,length=L``)."""
    if recs is None:
        return [f"sampled:seed={opts.seed},records={opts.records},length={opts.length}"]
    if opts.region is not None:
        return [opts.region.strip()]
    return [r.id for r in recs]
