"""Recalibration fitted on a truth set: forecasts gathered by ``calibrate``, maps chosen
by held-out measurement, and the new model folder (``calibrate --fit-into``).

Forecasts (0-based half-open coordinates inside a record):

- ``posterior``: each base's posterior of a track group, against whether the base
  truly carries the group;
- ``segment_probability``: each decoded feature's (``calibrate``'s features), against
  whether every base of its run truly carries the group;
- gene models: ``exon_probability`` of each decoded CDS piece, against whether the
  truth has a CDS run of the strand with exactly these bounds (the frame is not in a
  base-level truth), and ``structure_probability`` of each decoded gene (group
  ``mRNA.plus``/``mRNA.minus``), against whether the truth's CDS bases of the strand
  inside the gene are exactly its pieces, its gaps intron bases, and the bases just
  outside neither.

Folds: bases are cut into blocks of ``block`` bases counted over the records in order
(a feature goes by its first base), and block ``b`` falls in fold ``b mod folds``:
neighbouring bases, whose forecasts are alike, stay in one fold.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from seqstate.errors import UsageError
from seqstate.model import Model
from seqstate.model.recalibration import SCORES, FineBins, MapChoice, Recalibration, choose_map

__all__ = [
    "DEFAULT_BLOCK",
    "DEFAULT_FOLDS",
    "Collector",
    "fit_recalibration",
    "overlaps",
    "recalibrated_model",
    "stretches_of",
    "write_recalibrated",
]

DEFAULT_FOLDS = 5
DEFAULT_BLOCK = 100_000


@dataclass
class Collector:
    """Forecasts and outcomes per (group, score), in :class:`FineBins` per fold."""

    folds: int = DEFAULT_FOLDS
    block: int = DEFAULT_BLOCK
    bins: dict[tuple[str, str], FineBins] = field(default_factory=dict)
    #: bases of the records already added (the fold of a base counts across records)
    offset: int = 0

    def _bins(self, key: tuple[str, str]) -> FineBins:
        if key not in self.bins:
            self.bins[key] = FineBins(self.folds)
        return self.bins[key]

    def fold(self, pos0: int) -> int:
        """The fold of base ``pos0`` of the current record."""
        return ((self.offset + pos0) // self.block) % self.folds

    def add_bases(self, group: str, prob: np.ndarray, outcome: np.ndarray) -> None:
        """One record's per-base forecasts of ``group`` (call :meth:`next_record` after)."""
        bins = self._bins((group, "posterior"))
        n = int(prob.shape[0])
        lo = 0
        while lo < n:
            hi = min(n, lo + self.block - (self.offset + lo) % self.block)
            bins.add(self.fold(lo), prob[lo:hi], outcome[lo:hi])
            lo = hi

    def add_features(
        self,
        group: str,
        score: str,
        starts: Sequence[int],
        prob: Sequence[float],
        right: Sequence[bool],
    ) -> None:
        """Features of the current record: their first bases, forecasts and outcomes."""
        if not len(prob):
            return
        bins = self._bins((group, score))
        folds = np.array([self.fold(s) for s in starts])
        p, y = np.asarray(prob, dtype=np.float64), np.asarray(right, dtype=np.float64)
        for f in np.unique(folds):
            bins.add(int(f), p[folds == f], y[folds == f])

    def next_record(self, n: int) -> None:
        """The current record (``n`` bases) is done."""
        self.offset += n

    def merge(self, other: Collector) -> None:
        """Pool ``other``'s forecasts into these (same folds)."""
        if other.folds != self.folds:
            raise ValueError("collectors with different folds")
        for key, b in other.bins.items():
            mine = self._bins(key)
            for name in ("count", "sum_p", "sum_z", "sum_y"):
                getattr(mine, name).__iadd__(getattr(b, name))


def fit_recalibration(
    collector: Collector,
) -> tuple[Recalibration, dict[tuple[str, str], MapChoice]]:
    """One map per (group, score) with forecasts, chosen by :func:`choose_map`."""
    order = {s: i for i, s in enumerate(SCORES)}
    keys = sorted(collector.bins, key=lambda k: (order[k[1]], k[0]))
    choices = {k: choose_map(collector.bins[k]) for k in keys if collector.bins[k].n > 0}
    notes = [
        f"fitted on {collector.offset:,} bases; each map chosen among isotonic "
        "(pool-adjacent-violators), temperature and the raw scores (identity) by the Brier "
        "score on held-out folds "
        f"({collector.folds} folds of {collector.block:,}-base blocks)",
    ]
    notes += [c.note(k[0], k[1], collector.folds) for k, c in choices.items()]
    return Recalibration({k: c.map for k, c in choices.items()}, notes), choices


def recalibrated_model(model: Model, recal: Recalibration, meta: dict[str, Any]) -> Model:
    """A copy of ``model`` with the recalibration table and its ``[recalibration]``
    manifest table ``meta`` (truth, its SHA-256, the stretches fitted on, ...)."""
    import dataclasses

    extra = dict(model.extra)
    extra["recalibration"] = dict(meta)
    return dataclasses.replace(model, extra=extra, recalibration=recal)


def write_recalibrated(
    model: Model, out: str | os.PathLike, force: bool, inputs: Sequence[str | os.PathLike | None]
) -> Path:
    """Write ``model`` (with its table) as a model folder, as ``fit`` writes one."""
    from seqstate.commands.fit.writing import write_model_folder

    return write_model_folder(model, out, force=force, inputs=inputs)


def stretches_of(model: Model) -> list[str]:
    """The stretches ``model``'s recalibration table was fitted on (``[recalibration]``)."""
    meta = model.extra.get("recalibration", {})
    got = meta.get("stretches", []) if isinstance(meta, dict) else []
    return [str(s) for s in got] if isinstance(got, list) else []


def _parse(text: str) -> tuple[str, int, float]:
    # "ID:START-END" (1-based inclusive) or "ID" (a whole record) -> (id, start0, end0)
    seqid, sep, span = text.strip().rpartition(":")
    if sep and "-" in span:
        a, _, b = span.partition("-")
        try:
            return seqid, int(a.replace(",", "")) - 1, float(int(b.replace(",", "")))
        except ValueError:
            pass
    return text.strip(), 0, float("inf")


def overlaps(fitted: Sequence[str], measured: Sequence[str]) -> list[str]:
    """The stretches of ``measured`` that share a base with one of ``fitted``."""
    out = []
    for m in measured:
        mid, m0, m1 = _parse(m)
        for f in fitted:
            fid, f0, f1 = _parse(f)
            if fid == mid and max(m0, f0) < min(m1, f1):
                out.append(m)
                break
    return out


def check_out_of_sample(model: Model, measured: Sequence[str]) -> None:
    """Refuse to measure ``model``'s calibration on bases its table was fitted on."""
    shared = overlaps(stretches_of(model), measured)
    if shared:
        raise UsageError(
            f"model '{model.name}' was recalibrated on {', '.join(stretches_of(model))}: "
            f"calibration measured on {', '.join(shared)} would be in-sample; choose bases "
            "the table was not fitted on (--region, --records, or another --seed), or mark the "
            "figures with --in-sample"
        )
