"""``seqstate plot``: a figure of one region, posterior curves over lanes of features.

The figure has, top to bottom: one posterior curve per track group of the model
(label, and strand when a label occurs on both), y from 0 to 1; a lane of the
decoded features (the model's default decoding, as annotate, one row per
track group); and, with a reference file, a lane of its features (one row per
feature type).  The x axis is the record's 1-based base position: base i
(0-based) is drawn at x = i + 1 and a feature ``[start0, end0)`` as a box from
``start0 + 0.5`` to ``end0 + 0.5``.  Lanes are told apart by position and by
line style and hatching, not by colour: everything is black, white or grey.

Posteriors and decoding run on the whole record, so the curves and boxes match
annotate on the whole file; with a flank they run on the region plus that many
bases each side, treated as a record of its own (see :mod:`seqstate.commands.score`).

matplotlib is an optional extra, imported only inside the functions that draw;
the figure is drawn without pyplot on an Agg canvas (PNG), and saved as SVG or
PDF by matplotlib's own writers for those formats.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from seqstate import __version__
from seqstate.commands.inputs import (
    indexed_lengths,
    model_inputs,
    read_model_records,
    read_model_region,
)
from seqstate.commands.score import read_regions
from seqstate.engine import api
from seqstate.errors import ImpossibleSequenceError, OptionalDependencyError, UsageError
from seqstate.io.atomic import OutputSet, check_outputs
from seqstate.io.files import display_name
from seqstate.io.regions import Region, check_region, parse_region
from seqstate.io.tables import load_model
from seqstate.kinds import group_index, track_groups
from seqstate.kinds.segments import decode_segments
from seqstate.model import resolve_thresholds

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

__all__ = [
    "FIGURE_FORMATS",
    "MAX_REGION",
    "PlotData",
    "PlotOptions",
    "draw",
    "plot",
    "plot_data",
    "require_matplotlib",
]

#: Largest region (bases) plotted without ``force``.
MAX_REGION = 2_000_000
#: Output formats, chosen by the file name's extension.
FIGURE_FORMATS = ("png", "svg", "pdf")
#: Line styles of the posterior curves, in track-group order (then repeated, thicker).
LINE_STYLES = ["-", "--", ":", "-."]
#: Curve colours: black and a dark grey, alternating (distinct styles do the work).
LINE_GREYS = ["black", "0.4"]
#: Above this many points per curve, each curve is drawn as per-pixel min/max columns.
MAX_POINTS_FACTOR = 2

_MISSING = "plotting needs the optional extra: pip install 'seqstate[plot]'"


def require_matplotlib() -> Any:
    """The ``matplotlib`` module, or :class:`~seqstate.errors.OptionalDependencyError`."""
    try:
        import matplotlib
        from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: F401
        from matplotlib.figure import Figure  # noqa: F401
    except ImportError:
        raise OptionalDependencyError(_MISSING) from None
    return matplotlib


@dataclass
class LaneFeature:
    """A box in a lane: row index, 0-based half-open bounds on the record, and its text."""

    row: int
    start0: int
    end0: int
    name: str = ""


@dataclass
class PlotData:
    """Everything drawn, in record coordinates (0-based half-open).

    ``values[i, g]`` is the posterior of track group ``g`` at base
    ``start0 + i``.  ``reference_rows`` is None without a reference file.
    """

    seqid: str
    start0: int
    end0: int
    model: str
    decode: str
    decode_note: str
    groups: list[str]
    values: np.ndarray
    decoded: list[LaneFeature]
    reference_rows: list[str] | None = None
    reference: list[LaneFeature] = field(default_factory=list)
    reference_name: str = ""
    flank: int | None = None


@dataclass
class PlotOptions:
    """Everything ``seqstate plot`` was asked to do (sizes in inches, ``dpi`` dots/inch)."""

    input: str
    region: str
    out: str
    model: str = "cpg-island"
    reference: str | None = None
    flank: int | None = None
    width: float = 10.0
    height: float = 4.0
    dpi: int = 100
    force: bool = False  # replace an existing figure file
    allow_large: bool = False  # regions over MAX_REGION bases
    decode: str | None = None
    min_posterior: float | None = None  # None: the model's default
    min_length: int | None = None  # None: the model's default
    split_unknown: int = 10  # no feature spans a run of this many unknown bases
    masked: str = "base"


def figure_format(out: str) -> str:
    """``png``, ``svg`` or ``pdf`` from the output name; UsageError otherwise."""
    suffix = Path(out).suffix.lower().lstrip(".")
    if suffix not in FIGURE_FORMATS:
        raise UsageError(
            f"output '{out}': the name must end in .png, .svg or .pdf (the format is taken from it)"
        )
    return suffix


def _check_options(opts: PlotOptions) -> None:
    figure_format(opts.out)
    check_outputs([opts.out], _inputs(opts), force=opts.force)
    if not (opts.width > 0 and opts.height > 0):
        raise UsageError(f"--width {opts.width} and --height {opts.height} must be positive")
    if opts.dpi < 10:
        raise UsageError(f"--dpi {opts.dpi} must be at least 10")
    if opts.width * opts.dpi > 20000 or opts.height * opts.dpi > 20000:
        raise UsageError("the figure would be more than 20000 pixels wide or high")
    if opts.flank is not None and opts.flank < 0:
        raise UsageError(f"--flank {opts.flank} must be 0 or more")
    if opts.min_posterior is not None and not 0.0 <= opts.min_posterior <= 1.0:
        raise UsageError(f"--min-posterior {opts.min_posterior} is outside 0..1")
    if opts.min_length is not None and opts.min_length < 1:
        raise UsageError(f"--min-length {opts.min_length} must be at least 1")
    if opts.split_unknown < 1:
        raise UsageError(f"--split-unknown {opts.split_unknown} must be at least 1")
    if opts.masked not in ("base", "unknown"):
        raise UsageError(f"--masked {opts.masked!r} is not base or unknown")
    if opts.reference == "-" and opts.input == "-":
        raise UsageError("FASTA and --reference cannot both be standard input ('-')")


def _inputs(opts: PlotOptions) -> list:
    return [opts.input, opts.reference, *model_inputs(opts.model)]


def plot_data(opts: PlotOptions) -> PlotData:
    """Read, check and compute everything :func:`draw` needs (no matplotlib here).

    The region is 1-based inclusive as typed (``ID:START-END``, or ``ID`` for a
    whole record); regions longer than :data:`MAX_REGION` bases need
    ``opts.allow_large``.  Decoded features are those of the whole record (or the
    flank window) that overlap the region, decoded as annotate does (split at
    runs of unknown bases, unknown ends trimmed).
    """
    _check_options(opts)
    model = load_model(opts.model)
    min_posterior, min_length, _ = resolve_thresholds(model, opts.min_posterior, opts.min_length)
    opts = replace(opts, min_posterior=min_posterior, min_length=min_length)
    decode = opts.decode or model.decode
    if decode not in ("posterior", "viterbi"):
        raise UsageError(f"decode '{decode}' is not posterior or viterbi")
    groups = track_groups(model)
    if not groups:
        raise UsageError(f"model '{model.name}' has no labelled states: nothing to plot")
    region = parse_region(opts.region)
    # through the FASTA index when there is one (only the window's bytes are read)
    lengths = indexed_lengths(opts.input, model)
    records = read_model_records(opts.input, model) if lengths is None else []
    if lengths is None:
        lengths = {r.id: len(r.seq) for r in records}
    region = check_region(region, lengths)
    size = region.end0 - region.start0
    if size > MAX_REGION and not opts.allow_large:
        raise UsageError(
            f"region {region.to_text()} is {size:,} bases, more than the "
            f"{MAX_REGION:,} plotted without --allow-large"
        )
    ref = read_regions(opts.reference) if opts.reference is not None else None
    seqid, record_length = region.seqid, lengths[region.seqid]
    if opts.flank is None:
        w0, w1 = 0, record_length
        name = seqid
    else:
        w0 = max(0, region.start0 - opts.flank)
        w1 = min(record_length, region.end0 + opts.flank)
        name = f"{seqid}:{w0 + 1}-{w1}"
    if records:
        window = next(r for r in records if r.id == seqid).seq[w0:w1]
        del records
    else:
        got = read_model_region(opts.input, model, Region(seqid, w0, w1))
        assert got is not None  # the index was there a moment ago
        window = got.seq
    tables = api.prepare(model)
    state_group = group_index(model, groups)
    unknown_masked = opts.masked == "unknown"
    codes = api.encode(tables, window, masked_unknown=unknown_masked)
    try:
        post = api.posterior(tables, codes, group=state_group, n_groups=len(groups), record=name)
        # as annotate: features never claim long runs of unknown bases, nor unknown ends
        symbols = api.symbols_of(tables, window, masked_unknown=unknown_masked)
        segs = decode_segments(
            tables,
            codes,
            post,
            state_group,
            symbols,
            decode=decode,
            min_posterior=min_posterior,
            min_length=min_length,
            split_unknown=opts.split_unknown,
            record=name,
        )
    except ImpossibleSequenceError as exc:
        raise ImpossibleSequenceError(exc.message, path=display_name(opts.input)) from None
    if decode == "viterbi":
        note = "Viterbi path"
    else:
        note = f"posterior at least {min_posterior:g}"
    if min_length > 1:
        note += f", at least {min_length} bases"
    decoded = [
        LaneFeature(s.group, s.start0 + w0, s.end0 + w0)
        for s in segs
        if s.start0 + w0 < region.end0 and s.end0 + w0 > region.start0
    ]
    values = np.array(post.values[region.start0 - w0 : region.end0 - w0], dtype=np.float32)
    del post, codes
    data = PlotData(
        seqid,
        region.start0,
        region.end0,
        model.name,
        decode,
        note,
        [g.track_name for g in groups],
        values,
        decoded,
        flank=opts.flank,
    )
    if ref is not None:
        rows: list[str] = []
        for reg in ref.regions:
            if reg.seqid != seqid or reg.end0 <= region.start0 or reg.start0 >= region.end0:
                continue
            kind = reg.type if ref.format != "bed" and reg.type else "interval"
            if kind not in rows:
                rows.append(kind)
            data.reference.append(LaneFeature(rows.index(kind), reg.start0, reg.end0, reg.name))
        data.reference_rows = rows
        data.reference_name = Path(ref.path).name
    return data


def _curve_points(values: np.ndarray, x0: int, max_points: int) -> tuple[np.ndarray, np.ndarray]:
    """x and y of one curve: every base, or per-bin (min, max) pairs when too many bases.

    Binned, each bin becomes two points at its centre (its minimum and maximum),
    which at the figure's resolution draws the same ink as every base would.
    """
    n = values.shape[0]
    x = np.arange(x0 + 1, x0 + n + 1, dtype=np.float64)
    if n <= max_points:
        return x, values.astype(np.float64)
    bins = max(1, max_points // 2)
    edges = np.linspace(0, n, bins + 1).astype(np.int64)
    edges = np.unique(edges)
    lo = np.minimum.reduceat(values, edges[:-1]).astype(np.float64)
    hi = np.maximum.reduceat(values, edges[:-1]).astype(np.float64)
    centre = x0 + 1 + (edges[:-1] + edges[1:] - 1) / 2.0
    xs = np.repeat(centre, 2)
    ys = np.empty(2 * lo.shape[0])
    ys[0::2] = lo
    ys[1::2] = hi
    return xs, ys


def _lane(
    ax,
    rows: list[str],
    features: list[LaneFeature],
    gid_prefix: str,
    face: str,
    hatch: str | None,
    linestyle: str,
    title: str,
) -> None:
    from matplotlib.patches import Rectangle

    n_rows = max(1, len(rows))
    for i, feat in enumerate(sorted(features, key=lambda f: (f.start0, f.end0, f.row)), 1):
        y = n_rows - 1 - feat.row
        box = Rectangle(
            (feat.start0 + 0.5, y - 0.35),
            feat.end0 - feat.start0,
            0.7,
            facecolor=face,
            edgecolor="black",
            hatch=hatch,
            linestyle=linestyle,
            linewidth=0.8,
        )
        box.set_gid(f"{gid_prefix}-{i}")
        ax.add_patch(box)
    ax.set_ylim(-0.6, n_rows - 0.4)
    ax.set_yticks(range(n_rows))
    ax.set_yticklabels(list(reversed(rows)) if rows else ["(none in region)"])
    ax.tick_params(axis="y", length=0)
    ax.set_title(title, loc="left", fontsize="small")
    for side in ("top", "right", "left"):
        ax.spines[side].set_visible(False)


def draw(data: PlotData, width: float = 10.0, height: float = 4.0, dpi: int = 100) -> Figure:
    """The matplotlib Figure of ``data``: ``width`` x ``height`` inches at ``dpi``.

    Returns a ``matplotlib.figure.Figure`` on an Agg canvas (no pyplot state).
    Decoded boxes have gids ``feature-box-N`` and reference boxes
    ``reference-box-N`` (N from 1 in position order), which SVG output keeps
    as element ids.
    """
    require_matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.ticker import FuncFormatter, MaxNLocator

    fig = Figure(figsize=(width, height), dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    n_dec = max(1, len(data.groups))
    lanes = [3.0, 0.5 + 0.4 * n_dec]
    if data.reference_rows is not None:
        lanes.append(0.5 + 0.4 * max(1, len(data.reference_rows)))
    grid = fig.add_gridspec(len(lanes), 1, height_ratios=lanes)
    ax = fig.add_subplot(grid[0])
    max_points = int(MAX_POINTS_FACTOR * width * dpi)
    for g, name in enumerate(data.groups):
        xs, ys = _curve_points(data.values[:, g], data.start0, max_points)
        style = LINE_STYLES[g % len(LINE_STYLES)]
        lw = 1.2 + 0.6 * (g // len(LINE_STYLES))
        ax.plot(
            xs,
            ys,
            linestyle=style,
            color=LINE_GREYS[g % len(LINE_GREYS)],
            linewidth=lw,
            label=name,
            gid=f"posterior-{g + 1}",
            clip_on=False,
        )
    ax.set_ylim(0.0, 1.0)
    ax.set_ylabel("posterior probability")
    ax.legend(
        loc="upper left",
        bbox_to_anchor=(1.005, 1.0),
        frameon=False,
        fontsize="small",
        handlelength=3.0,
    )
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    axes = [ax]
    ax_dec = fig.add_subplot(grid[1], sharex=ax)
    _lane(
        ax_dec,
        data.groups,
        data.decoded,
        "feature-box",
        "0.3",
        None,
        "-",
        f"decoded features ({data.decode_note})",
    )
    axes.append(ax_dec)
    if data.reference_rows is not None:
        ax_ref = fig.add_subplot(grid[2], sharex=ax)
        _lane(
            ax_ref,
            data.reference_rows,
            data.reference,
            "reference-box",
            "white",
            "////",
            "--",
            f"reference features ({data.reference_name})",
        )
        axes.append(ax_ref)
    ax.set_xlim(data.start0 + 0.5, data.end0 + 0.5)
    for a in axes[:-1]:
        a.tick_params(axis="x", labelbottom=False)
    bottom = axes[-1]
    bottom.xaxis.set_major_locator(MaxNLocator(nbins=8, integer=True))
    bottom.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{int(round(v)):,}"))
    bottom.set_xlabel(f"position on {data.seqid} (1-based)")
    context = "whole record" if data.flank is None else f"region ± {data.flank:,} bases"
    fig.suptitle(
        f"{data.seqid}:{data.start0 + 1}-{data.end0}   model {data.model}   "
        f"(posteriors from {context})",
        fontsize="medium",
    )
    return fig


def _metadata(fmt: str) -> dict:
    creator = f"seqstate {__version__}"
    if fmt == "png":
        return {"Software": creator}
    if fmt == "svg":
        return {"Creator": creator, "Date": None}
    return {"Creator": creator, "Producer": creator, "CreationDate": None}


def save(
    fig: Figure, out: str, dpi: int, *, force: bool = False, inputs: list | tuple = ()
) -> None:
    """Write ``fig`` to ``out`` (format from its extension) all-or-nothing, no timestamp.

    The overwrite rule of :mod:`seqstate.io.atomic` applies (``force``, ``inputs``).
    """
    matplotlib = require_matplotlib()
    fmt = figure_format(out)
    with matplotlib.rc_context({"svg.hashsalt": "seqstate", "svg.fonttype": "path"}):
        with OutputSet(force=force, inputs=inputs) as outs:
            tmp = outs.path(out)
            try:
                fig.savefig(str(tmp), format=fmt, dpi=dpi, metadata=_metadata(fmt))
            except OSError as exc:
                raise UsageError(
                    f"output file '{out}' cannot be written: {exc.strerror or exc}"
                ) from None


@dataclass
class PlotReport:
    """What a plot run drew: counts of decoded and reference boxes, and the file."""

    out: str
    decoded: int
    reference: int
    region: str
    #: whether a reference file was given (its count is then in the summary)
    with_reference: bool = False

    def summary(self) -> str:
        """The summary line (after ``seqstate: ``)."""
        ref = f", {self.reference} reference" if self.with_reference else ""
        return f"{self.region}, {self.decoded} decoded{ref} feature(s) -> {self.out}"


def plot(opts: PlotOptions) -> PlotReport:
    """Run ``seqstate plot``: compute, draw and write the figure (nothing left on error)."""
    _check_options(opts)
    require_matplotlib()
    data = plot_data(opts)
    fig = draw(data, opts.width, opts.height, opts.dpi)
    save(fig, opts.out, opts.dpi, force=opts.force, inputs=_inputs(opts))
    return PlotReport(
        opts.out,
        len(data.decoded),
        len(data.reference),
        f"{data.seqid}:{data.start0 + 1}-{data.end0}",
        opts.reference is not None,
    )
