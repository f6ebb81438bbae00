"""``seqstate calibrate``: its options, its report and how the report is written.

:class:`CalibrateOptions` in, :class:`CalibrateReport` out (one
:class:`LabelCalibration`, two reliability tables, per track group); the report as TSV
(one row per bin, then an ``all`` row per table) or JSON, and the reliability figure
(PNG, SVG or PDF; needs the ``plot`` extra).  The collection of forecasts is in
:mod:`seqstate.commands.calibrate_collect`, the run in :mod:`seqstate.commands.calibrate`.
"""

from __future__ import annotations

import io
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from seqstate.commands.calibration import Reliability
from seqstate.errors import UsageError
from seqstate.io.tsvtext import tsv_row

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
