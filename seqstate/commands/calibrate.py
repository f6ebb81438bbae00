"""``seqstate calibrate``: do a model's posteriors mean what they say?

Two sources of truth:

- *sampled* (default): records drawn from the model with their true state paths
  (:mod:`seqstate.engine.sampling`, as ``seqstate sample`` draws them).  A model is
  calibrated on its own samples by construction, so this checks the engine's numbers;
  :func:`sampled_records` can draw from one model while another decodes (a wrong model
  must then show up as miscalibrated).
- *a trusted annotation*: ``--fasta SEQS --truth KNOWN.gff3|bed|gtf``; features whose
  type is a label of the model mark the bases truly in that label.

Per track group (label, strand) two reliability tables (:mod:`.calibration`):
``bases`` (each base's posterior of the group against whether it truly carries the
group) and ``features`` (each decoded feature's ``segment_probability`` against
whether every base of its run truly carries the group).  Features are decoded as
``annotate`` decodes them with the model's own defaults.  Coordinates: 0-based
half-open inside.

With ``--fit-into MODEL_DIR`` the run's forecasts also fit a recalibration table
(:mod:`seqstate.commands.recalibrate`), written with the model as a new folder.  A
recalibrated model gets the same tables for its calibrated forecasts, and is never
measured on the stretches its table was fitted on (refused, or marked in-sample).
"""

from __future__ import annotations

import io
import json
import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from seqstate import log
from seqstate.commands.calibration import Reliability
from seqstate.commands.inputs import (
    indexed_lengths,
    read_model_records,
    read_model_region,
    read_set,
)
from seqstate.commands.recalibrate import (
    Collector,
    check_out_of_sample,
    fit_recalibration,
    overlaps,
    recalibrated_model,
    stretches_of,
    write_recalibrated,
)
from seqstate.commands.records import choose_stretches
from seqstate.commands.truth import TruthSet, read_truth
from seqstate.engine import api
from seqstate.engine.sampling import sample_record
from seqstate.errors import FeatureFormatError, UsageError
from seqstate.io.atomic import OutputSet, check_outputs
from seqstate.io.tables import load_model
from seqstate.io.tsvtext import tsv_row
from seqstate.kinds import GENES, Group, group_index, track_groups
from seqstate.kinds.segments import decode_segments
from seqstate.model import Model
from seqstate.model.core import default_thresholds

__all__ = [
    "CalibrateOptions",
    "CalibrateReport",
    "LabelCalibration",
    "TruthRecord",
    "calibrate",
    "calibrate_records",
    "file_records",
    "reliability_figure",
    "sampled_records",
    "write_json",
    "write_tsv",
]

#: Sampled records and their length when the options do not say (2 Mbp in all).
DEFAULT_LENGTH = 200_000
DEFAULT_RECORDS = 10
#: Most bases one record of a sampled calibration run may have (as ``sample``).
MAX_RECORD_BASES = 250_000_000
#: Most sampled records.
MAX_RECORDS = 1_000_000
#: Most bins of a reliability table.
MAX_BINS = 1000
REPORT_FORMATS = ("tsv", "json")
FIGURE_FORMATS = ("png", "svg", "pdf")
#: Columns of the TSV report (one row per bin, then one ``all`` row per table).
TSV_COLUMNS = [
    "label",
    "forecast",
    "bin_low",
    "bin_high",
    "count",
    "mean_forecast",
    "fraction_true",
    "ece",
    "brier",
]


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


@dataclass
class LabelCalibration:
    """The two reliability tables of one track group."""

    track: str
    label: str
    strand: str | None
    bases: Reliability
    features: Reliability
    #: decoded features, and those whose whole run is truly the group
    n_features: int = 0
    n_correct: int = 0
    #: with a recalibrated model: the same tables for the calibrated forecasts
    calibrated_bases: Reliability | None = None
    calibrated_features: Reliability | None = None


@dataclass
class CalibrateOptions:
    """Everything ``seqstate calibrate`` was asked to do."""

    model: str
    #: sampling only (None: :data:`DEFAULT_LENGTH`, :data:`DEFAULT_RECORDS`, seed 0)
    length: int | None = None
    records: int | None = None
    seed: int | None = None
    bins: int = 10
    out: str | None = None
    figure: str | None = None
    fasta: str | None = None
    truth: str | None = None
    force: bool = False
    #: truth features: only these GFF3/GTF types (each a label of the model); empty: all
    types: tuple[str, ...] = ()
    #: with --fasta: one stretch (``ID:START-END``, 1-based inclusive) or these records
    region: str | None = None
    record_ids: list[str] | None = None
    #: fit a recalibration table and write MODEL with it into this folder
    fit_into: str | None = None
    folds: int = 5
    block: int = 100_000
    #: a recalibrated model on the bases its table was fitted on: measure, and mark the
    #: report in-sample (False: refuse)
    in_sample: bool = False


@dataclass
class CalibrateReport:
    """What a calibration run measured."""

    model: str
    source: str  # "sampled" or "truth"
    records: int
    bases: int
    bins: int
    seed: int | None
    labels: list[LabelCalibration] = field(default_factory=list)
    out: str | None = None
    figure: str | None = None
    #: with a truth file: the stretches calibrated on (1-based inclusive) or None (all)
    stretch: str | None = None
    #: with --fit-into: the folder written and the table's maps
    fitted_into: str | None = None
    maps: int = 0
    #: a recalibrated model measured on bases its table was fitted on (allowed only by
    #: :attr:`CalibrateOptions.in_sample`)
    in_sample: bool = False

    def summary(self) -> str:
        """The summary line (after ``seqstate: ``)."""
        parts = []
        for lab in self.labels:
            ece = lab.bases.ece()
            part = f"{lab.track} ECE {'NA' if ece is None else f'{ece:.4f}'}"
            if lab.calibrated_bases is not None:
                cal = lab.calibrated_bases.ece()
                part += f" (calibrated {'NA' if cal is None else f'{cal:.4f}'})"
            parts.append(part)
        files = [self.out, self.figure]
        if self.fitted_into:
            files.append(f"{self.fitted_into}/ ({self.maps} recalibration maps)")
        dest = ", ".join(p for p in files if p) or "no file"
        return (
            f"{self.records} {self.source} record(s), {self.bases} bases, "
            f"{'; '.join(parts) or 'no label'} -> {dest}"
        )

    def to_dict(self) -> dict[str, Any]:
        """The report as plain data (the JSON report)."""
        return {
            "model": self.model,
            "source": self.source,
            "records": self.records,
            "bases": self.bases,
            "bins": self.bins,
            "seed": self.seed,
            "stretch": self.stretch,
            **({"in_sample": True} if self.in_sample else {}),
            "labels": [
                {
                    "track": lab.track,
                    "label": lab.label,
                    "strand": lab.strand,
                    "bases": lab.bases.summary(),
                    "features": {
                        "decoded": lab.n_features,
                        "whole_run_correct": lab.n_correct,
                        **lab.features.summary(),
                    },
                    **(
                        {
                            "calibrated": {
                                "bases": lab.calibrated_bases.summary(),
                                "features": lab.calibrated_features.summary(),
                            }
                        }
                        if lab.calibrated_bases is not None and lab.calibrated_features is not None
                        else {}
                    ),
                }
                for lab in self.labels
            ],
        }


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


# ---------------------------------------------------------------- writing
def _cell(value: float | int | None, spec: str) -> str:
    if value is None:
        return ""
    if isinstance(value, int):
        return str(value)
    return format(value, spec)


def write_tsv(handle: io.TextIOBase | Any, report: CalibrateReport) -> None:
    """The TSV report: per table its bins (empty cells for an empty bin), then an ``all`` row."""
    handle.write(tsv_row(TSV_COLUMNS))
    for lab in report.labels:
        tables: list[tuple[str, Reliability]] = [("bases", lab.bases), ("features", lab.features)]
        if lab.calibrated_bases is not None and lab.calibrated_features is not None:
            tables += [
                ("calibrated_bases", lab.calibrated_bases),
                ("calibrated_features", lab.calibrated_features),
            ]
        for name, rel in tables:
            for row in rel.rows():
                cells = [
                    lab.track,
                    name,
                    f"{row['bin_low']:.4g}",
                    f"{row['bin_high']:.4g}",
                    str(row["count"]),
                    _cell(row["mean_forecast"], ".6f"),
                    _cell(row["fraction_true"], ".6f"),
                    "",
                    "",
                ]
                handle.write(tsv_row(cells))
            n = rel.n
            cells = [
                lab.track,
                name,
                "all",
                "all",
                str(n),
                _cell(float(rel.sum_prob.sum() / n) if n else None, ".6f"),
                _cell(float(rel.sum_true.sum() / n) if n else None, ".6f"),
                _cell(rel.ece(), ".6f"),
                _cell(rel.brier(), ".6f"),
            ]
            handle.write(tsv_row(cells))


def write_json(handle: io.TextIOBase | Any, report: CalibrateReport) -> None:
    """The JSON report (:meth:`CalibrateReport.to_dict`), keys in a fixed order."""
    json.dump(report.to_dict(), handle, indent=2, allow_nan=False)
    handle.write("\n")


def reliability_figure(report: CalibrateReport) -> Any:
    """A matplotlib Figure: per track group, reliability curves over bin-count bars.

    Greyscale: bases in black circles and a solid line, features in grey squares and
    a dashed line, the diagonal dotted; bars show each bin's count (log scale).
    """
    from seqstate.commands.plot import require_matplotlib

    require_matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    n = max(1, len(report.labels))
    fig = Figure(figsize=(max(6.0, 4.6 * n), 5.6), dpi=100)
    FigureCanvasAgg(fig)
    grid = fig.add_gridspec(2, n, height_ratios=[3, 1], hspace=0.08)
    width = 1.0 / report.bins
    for col, lab in enumerate(report.labels):
        ax = fig.add_subplot(grid[0, col])
        bar = fig.add_subplot(grid[1, col], sharex=ax)
        ax.plot([0, 1], [0, 1], linestyle=":", color="0.5", linewidth=1, label="ideal")
        styles: list[tuple[str, Reliability, str, str, str, float | None]] = [
            ("bases", lab.bases, "o", "-", "0.0", -width / 4),
            ("features", lab.features, "s", "--", "0.55", width / 4),
        ]
        if lab.calibrated_bases is not None and lab.calibrated_features is not None:
            styles += [
                ("calibrated bases", lab.calibrated_bases, "^", "-.", "0.25", None),
                ("calibrated features", lab.calibrated_features, "v", ":", "0.7", None),
            ]
        for name, rel, marker, line, colour, shift in styles:
            rows = [r for r in rel.rows() if r["count"]]
            xs = [r["mean_forecast"] for r in rows]
            ys = [r["fraction_true"] for r in rows]
            ece = rel.ece()
            shown = "NA" if ece is None else f"{ece:.4f}"
            ax.plot(
                xs,
                ys,
                marker=marker,
                linestyle=line,
                color=colour,
                markersize=5,
                label=f"{name} (n={rel.n:,}, ECE {shown})",
            )
            if shift is None:  # calibrated curves: the bars stay those of the raw forecasts
                continue
            lows = np.array([r["bin_low"] for r in rel.rows()]) + width / 2 + shift
            counts = rel.count
            bar.bar(lows, np.where(counts > 0, counts, np.nan), width=width / 2, color=colour)
        ax.set_xlim(0, 1)
        ax.set_ylim(-0.02, 1.02)
        ax.set_title(lab.track)
        ax.set_ylabel("fraction truly in label")
        ax.legend(loc="lower right", fontsize="small", frameon=False)
        ax.tick_params(labelbottom=False)
        bar.set_yscale("log")
        bar.set_ylabel("count")
        bar.set_xlabel("forecast probability (bin)")
    fig.suptitle(
        f"Calibration of {report.model} ({report.source}, {report.bases:,} bases"
        + (
            ", in-sample: the recalibration table was fitted on these bases"
            if report.in_sample
            else ""
        )
        + ")",
        fontsize="medium",
    )
    return fig


def figure_svg(fig: Any) -> str:
    """The SVG text of a matplotlib Figure, without timestamp (for the HTML report)."""
    from seqstate.commands.plot import require_matplotlib

    matplotlib = require_matplotlib()
    buf = io.StringIO()
    with matplotlib.rc_context({"svg.hashsalt": "seqstate", "svg.fonttype": "path"}):
        fig.savefig(buf, format="svg", metadata={"Creator": "seqstate", "Date": None})
    return buf.getvalue()


def _save_figure(fig: Any, path: Path, fmt: str) -> None:
    """Write ``fig`` to the staged ``path`` in ``fmt``, with no timestamp in the file."""
    from seqstate import __version__
    from seqstate.commands.plot import require_matplotlib

    matplotlib = require_matplotlib()
    creator = f"seqstate {__version__}"
    metas: dict[str, dict[str, Any]] = {
        "png": {"Software": creator},
        "svg": {"Creator": creator, "Date": None},
        "pdf": {"Creator": creator, "Producer": creator, "CreationDate": None},
    }
    meta = metas[fmt]
    with matplotlib.rc_context({"svg.hashsalt": "seqstate", "svg.fonttype": "path"}):
        fig.savefig(str(path), format=fmt, dpi=100, metadata=meta)


# ---------------------------------------------------------------- the command
def _suffix(name: str, allowed: tuple[str, ...], what: str) -> str:
    suffix = Path(name).suffix.lower().lstrip(".")
    if suffix not in allowed:
        raise UsageError(
            f"{what} '{name}': the name must end in "
            f"{', '.join('.' + a for a in allowed)} (the format is taken from it)"
        )
    return suffix


def _check(opts: CalibrateOptions) -> None:
    if opts.fasta is None:
        given = [
            name
            for name, value in (
                ("--type", opts.types or None),
                ("--region", opts.region),
                ("--records-file", opts.record_ids),
            )
            if value is not None
        ]
        if given:
            raise UsageError(
                f"{', '.join(given)} only apply to --fasta with --truth: give them, or leave "
                f"{'it' if len(given) == 1 else 'them'} out to sample"
            )
    if opts.fasta is not None:
        if opts.region is not None and opts.record_ids is not None:
            raise UsageError("--records cannot be combined with --region (a region names one)")
        given = [
            name
            for name, value in (
                ("--length", opts.length),
                ("--seed", opts.seed),
            )
            if value is not None
        ]
        if given:
            raise UsageError(
                f"{', '.join(given)} only apply to sampled records: leave them out with --fasta"
            )
    if opts.length is None:
        opts.length = DEFAULT_LENGTH
    if opts.records is None:
        opts.records = DEFAULT_RECORDS
    if opts.seed is None:
        opts.seed = 0
    if opts.length < 1:
        raise UsageError(f"--length {opts.length} must be at least 1")
    if opts.length > MAX_RECORD_BASES:
        raise UsageError(f"--length {opts.length:,} is more than {MAX_RECORD_BASES:,} bases")
    if opts.records < 1:
        raise UsageError(f"--records {opts.records} must be at least 1")
    if opts.records > MAX_RECORDS:
        raise UsageError(f"--records {opts.records:,} is more than {MAX_RECORDS:,}")
    if opts.seed < 0:
        raise UsageError(f"--seed {opts.seed} must be 0 or more")
    if not 1 <= opts.bins <= MAX_BINS:
        raise UsageError(f"--bins {opts.bins} must be between 1 and {MAX_BINS}")
    if (opts.fasta is None) != (opts.truth is None):
        raise UsageError("--fasta and --truth go together: give both, or neither to sample")
    if opts.out is not None:
        _suffix(opts.out, REPORT_FORMATS, "report")
    if opts.figure is not None:
        _suffix(opts.figure, FIGURE_FORMATS, "figure")
    if "-" in (opts.out, opts.figure, opts.fit_into):
        raise UsageError("calibrate writes files: '-' (standard output) is not accepted")
    if not 2 <= opts.folds <= 100:
        raise UsageError(f"--folds {opts.folds} must be between 2 and 100")
    if opts.block < 1:
        raise UsageError(f"--fold-block {opts.block} must be at least 1 base")


def measured_stretches(opts: CalibrateOptions, recs: Sequence[TruthRecord] | None) -> list[str]:
    """The stretches a run measures (or fits on): ``ID:START-END`` / record IDs, or the
    sampled records' description (``sampled:seed=S,records=N,length=L``)."""
    if recs is None:
        return [f"sampled:seed={opts.seed},records={opts.records},length={opts.length}"]
    if opts.region is not None:
        return [opts.region.strip()]
    return [r.id for r in recs]


def calibrate(opts: CalibrateOptions, quiet: bool = True) -> CalibrateReport:
    """Run ``seqstate calibrate``: check, measure, then write report and figure together."""
    _check(opts)
    inputs = read_set(
        fasta=opts.fasta, model=opts.model, files=[opts.truth], records=opts.record_ids
    )
    check_outputs([opts.out, opts.figure], inputs, force=opts.force)
    if opts.fit_into is not None:
        from seqstate.commands.fit.writing import check_model_folder

        check_model_folder(Path(opts.fit_into), opts.force, inputs)
    if opts.figure is not None:
        from seqstate.commands.plot import require_matplotlib

        require_matplotlib()
    model = load_model(opts.model)
    collector = Collector(opts.folds, opts.block) if opts.fit_into is not None else None
    if collector is not None and model.recalibration is not None:
        # forecasts are the raw scores: the old table is replaced, never stacked
        import dataclasses

        model = dataclasses.replace(model, recalibration=None)
    progress = log.progress_for(quiet, "calibrate")
    if opts.fasta is not None and opts.truth is not None:
        recs, keep = file_records(
            model,
            opts.fasta,
            opts.truth,
            types=opts.types,
            region=opts.region,
            record_ids=opts.record_ids,
        )
        total = sum(int(r.symbols.shape[0]) for r in recs)
        measured = measured_stretches(opts, recs)
        in_sample = _in_sample(model, measured, opts)
        labs, n_rec, n_bases = calibrate_records(model, recs, opts.bins, progress, total, collector)
        labs = [labs[k] for k in keep]
        report = CalibrateReport(model.name, "truth", n_rec, n_bases, opts.bins, None, labs)
        if opts.region is not None:
            report.stretch = opts.region.strip()
        elif opts.record_ids is not None:
            report.stretch = ", ".join(r.id for r in recs)
    else:
        assert opts.length is not None and opts.records is not None and opts.seed is not None
        it = sampled_records(model, opts.length, opts.records, opts.seed)
        total = opts.length * opts.records
        measured = measured_stretches(opts, None)
        in_sample = _in_sample(model, measured, opts)
        labs, n_rec, n_bases = calibrate_records(model, it, opts.bins, progress, total, collector)
        report = CalibrateReport(model.name, "sampled", n_rec, n_bases, opts.bins, opts.seed, labs)
    report.out, report.figure = opts.out, opts.figure
    report.in_sample = in_sample
    new_model = None
    if collector is not None and opts.fit_into is not None:
        new_model = fitted_model(opts, model, collector, measured)
        report.fitted_into, report.maps = opts.fit_into, len(new_model.recalibration.maps)  # type: ignore[union-attr]
    if opts.out is None and opts.figure is None:
        if new_model is not None and opts.fit_into is not None:
            write_recalibrated(new_model, opts.fit_into, opts.force, inputs)
        return report
    fig = reliability_figure(report) if opts.figure is not None else None
    if new_model is not None and opts.fit_into is not None:
        write_recalibrated(new_model, opts.fit_into, opts.force, inputs)
    with OutputSet(force=opts.force, inputs=inputs) as outs:
        if opts.out is not None:
            handle = outs.open_text(opts.out)
            if _suffix(opts.out, REPORT_FORMATS, "report") == "json":
                write_json(handle, report)
            else:
                write_tsv(handle, report)
        if fig is not None and opts.figure is not None:
            _save_figure(fig, outs.path(opts.figure), _suffix(opts.figure, FIGURE_FORMATS, "x"))
    return report


def _in_sample(model: Model, measured: list[str], opts: CalibrateOptions) -> bool:
    """Whether a recalibrated ``model`` is measured on bases its table was fitted on:
    refused, unless ``opts.in_sample`` (then the report is marked)."""
    if model.recalibration is None:
        return False
    if not opts.in_sample:
        check_out_of_sample(model, measured)
        return False
    return bool(overlaps(stretches_of(model), measured))


def fitted_model(
    opts: CalibrateOptions, model: Model, collector: Collector, measured: list[str]
) -> Model:
    """``model`` with a recalibration table fitted on ``collector``'s forecasts, named
    after the ``--fit-into`` folder; its ``[recalibration]`` table names the truth and
    FASTA (with their SHA-256) and the stretches fitted on."""
    import dataclasses

    from seqstate.commands.fit.writing import file_sha256
    from seqstate.io.tables import model_sha256

    recal, _ = fit_recalibration(collector)
    assert opts.fit_into is not None
    meta: dict[str, Any] = {"forecasts_of": model.name, "forecasts_sha256": model_sha256(model)}
    if opts.truth is not None and opts.fasta is not None:
        meta.update(
            {
                "truth": str(opts.truth),
                "truth_sha256": file_sha256(opts.truth),
                "fasta": str(opts.fasta),
                "fasta_sha256": file_sha256(opts.fasta),
            }
        )
        if opts.types:
            meta["types"] = list(opts.types)
    else:
        meta["truth"] = "the model's own samples (sampled paths)"
    meta.update({"stretches": measured, "folds": opts.folds, "fold_block": opts.block})
    name = Path(opts.fit_into).name or model.name
    return recalibrated_model(dataclasses.replace(model, name=name), recal, meta)
