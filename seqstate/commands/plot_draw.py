"""The figure of ``seqstate plot``: curves and lanes drawn from a :class:`PlotData`.

Layout, coordinates and styles: see :mod:`seqstate.commands.plot` (which gathers the data,
writes the file and re-exports these names).  Base i (0-based) is drawn at x = i + 1; a
feature ``[start0, end0)`` as a box from ``start0 + 0.5`` to ``end0 + 0.5``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from seqstate.errors import OptionalDependencyError

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure


#: Line styles of the posterior curves, in track-group order (then repeated).
LINE_STYLES = ["-", "--", ":", "-."]
#: Curve colours, light to dark in track-group order: the first curve is drawn widest
#: and lightest, each later one narrower and darker on top, so curves that coincide
#: stay visible one inside the other.
LINE_GREYS = ["0.7", "0.45", "0.2", "black"]
#: Width of the last curve (points); each earlier curve is LINE_STEP wider.
LINE_WIDTH = 0.9
LINE_STEP = 0.7
#: Above this many points per pixel column of the figure, curves are binned means.
MAX_POINTS_FACTOR = 2
#: At most this many models (genes, transcripts, features) labelled per lane.
MAX_LABELS = 40
#: Least height of the posterior panel (inches); the figure grows to keep it.
MIN_CURVE_INCHES = 1.5
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
    """A box in a lane: row index, 0-based half-open bounds on the record, and its text.

    ``strand`` is ``+``, ``-``, ``.`` or ``?``.  Boxes with the same ``model`` (a gene
    or transcript ID) in one row are one model: joined by a line, one arrowhead at
    the model's 3' end and one ``label`` (its gene ID).
    """

    row: int
    start0: int
    end0: int
    name: str = ""
    strand: str = "."
    model: str | None = None
    label: str = ""


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
    #: rows of the decoded lane (track groups; for gene models one row per strand)
    decoded_rows: list[str] = field(default_factory=list)
    #: what a decoded model is: "feature" or "gene"
    decoded_unit: str = "feature"
    #: reference types that were left out (not selected)
    reference_hidden: list[str] = field(default_factory=list)


def bin_size(n: int, max_points: int) -> int:
    """Bases per bin of a curve of ``n`` bases drawn with at most ``max_points`` points:
    1 (every base) when ``n <= max_points``, else ``ceil(n / (max_points // 2))``."""
    if n <= max_points:
        return 1
    bins = max(1, max_points // 2)
    return -(-n // bins)


def _curve_points(values: np.ndarray, x0: int, size: int) -> tuple[np.ndarray, np.ndarray]:
    """x and y of one curve: every base (``size`` 1), or the mean of each bin of
    ``size`` bases (the last bin may be shorter) at the bin's centre.

    x is the 1-based position (base i, 0-based, at x = i + 1).
    """
    n = values.shape[0]
    if size <= 1:
        return np.arange(x0 + 1, x0 + n + 1, dtype=np.float64), values.astype(np.float64)
    starts = np.arange(0, n, size, dtype=np.int64)
    ends = np.minimum(starts + size, n)
    sums = np.add.reduceat(values.astype(np.float64), starts)
    means = sums / (ends - starts)
    centre = x0 + 1 + (starts + ends - 1) / 2.0
    return centre, means


def _lane(
    ax,
    rows: list[str],
    features: list[LaneFeature],
    gid_prefix: str,
    face: str,
    hatch: str | None,
    linestyle: str,
    title: str,
    span: tuple[int, int] | None = None,
) -> None:
    from matplotlib.patches import Rectangle

    n_rows = max(1, len(rows))
    # models (boxes sharing a model in one row): intron line, 3' arrowhead, label
    models: dict[tuple[int, str], list[LaneFeature]] = {}
    for feat in features:
        key = (feat.row, feat.model if feat.model is not None else f"@{id(feat)}")
        models.setdefault(key, []).append(feat)
    in_view = [
        m
        for m in models.values()
        if span is None or (min(f.start0 for f in m) < span[1] and max(f.end0 for f in m) > span[0])
    ]
    labelled = len(in_view) <= MAX_LABELS
    lane = gid_prefix.removesuffix("-box")
    for k, ((row, _), members) in enumerate(
        sorted(models.items(), key=lambda kv: (min(f.start0 for f in kv[1]), kv[0][0])), 1
    ):
        y = n_rows - 1 - row
        lo = min(f.start0 for f in members) + 0.5
        hi = max(f.end0 for f in members) + 0.5
        strand = members[0].strand
        if len(members) > 1:
            ax.plot(
                [lo, hi], [y, y], color="black", linewidth=0.6, zorder=1, gid=f"{lane}-join-{k}"
            )
        if strand in ("+", "-"):
            ax.plot(
                [hi if strand == "+" else lo],
                [y],
                marker=">" if strand == "+" else "<",
                color="black",
                markersize=5,
                linestyle="none",
                zorder=3,
                gid=f"{lane}-strand-{k}",
            )
        label = next((f.label for f in members if f.label), "")
        if labelled and label:
            left = lo if span is None else max(lo, span[0] + 0.5)
            text = ax.text(
                left,
                y + 0.38,
                label,
                fontsize="x-small",
                va="bottom",
                ha="left",
                clip_on=False,
                gid=f"{lane}-label-{k}",
            )
            # the other anchor _place_labels may use: the model's right end, in view
            text.seqstate_right = hi if span is None else min(hi, span[1] + 0.5)
    if not labelled and any(f.label for f in features):
        title += f"; {len(in_view)} in view, IDs not written (at most {MAX_LABELS})"
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
            zorder=2,
        )
        box.set_gid(f"{gid_prefix}-{i}")
        ax.add_patch(box)
    ax.set_ylim(-0.6, n_rows - 0.1)  # room above the top row for its IDs
    ax.set_yticks(range(n_rows))
    ax.set_yticklabels(list(reversed(rows)) if rows else ["(none in region)"])
    ax.tick_params(axis="y", length=0)
    ax.set_title(title, loc="left", fontsize="small")
    for side in ("top", "right", "left"):
        ax.spines[side].set_visible(False)


def _place_labels(fig: Any, axes: list) -> int:
    """Keep the lanes' ID labels from overprinting: each label (left to right) stays above
    its box, else moves below it, else is removed; a label must lie inside its lane.
    Needs a drawn figure with a fixed layout; returns how many labels were removed."""
    renderer = fig.canvas.get_renderer()
    dropped = 0
    kept: list[Any] = []
    for ax in axes:
        box = ax.get_window_extent(renderer)
        texts = sorted(
            (t for t in ax.texts if (t.get_gid() or "").count("-label-")),
            key=lambda t: t.get_position()[0],
        )
        for text in texts:
            x, y = text.get_position()
            right = float(getattr(text, "seqstate_right", x))
            placed = False
            for dy, va, at, ha in (
                (0.0, "bottom", x, "left"),
                (0.0, "bottom", right, "right"),
                (-0.76, "top", x, "left"),
                (-0.76, "top", right, "right"),
            ):
                text.set_position((at, y + dy))
                text.set_va(va)
                text.set_ha(ha)
                ext = text.get_window_extent(renderer)
                inside = (
                    ext.x0 >= box.x0 - 1
                    and ext.x1 <= box.x1 + 1
                    and ext.y0 >= box.y0 - 1
                    and ext.y1 <= box.y1 + 1
                )
                if inside and not any(ext.overlaps(other) for other in kept):
                    kept.append(ext)
                    placed = True
                    break
            if not placed:
                text.remove()
                dropped += 1
    return dropped


def _lane_inches(n_rows: int) -> float:
    """Height of a lane of ``n_rows`` rows: room for its title and a readable row each."""
    return 0.4 + 0.25 * max(1, n_rows)


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

    dec_rows = data.decoded_rows or data.groups
    lanes = [0.0, _lane_inches(len(dec_rows))]
    if data.reference_rows is not None:
        lanes.append(_lane_inches(len(data.reference_rows)))
    # the curves get what the lanes leave, but never less than MIN_CURVE_INCHES: a
    # figure too short for its lanes is made taller rather than drawn unreadable
    margins = 1.2  # title, legend and x axis (inches)
    height = max(height, margins + MIN_CURVE_INCHES + sum(lanes))
    lanes[0] = height - margins - sum(lanes)
    fig = Figure(figsize=(width, height), dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    grid = fig.add_gridspec(len(lanes), 1, height_ratios=lanes)
    ax = fig.add_subplot(grid[0])
    max_points = int(MAX_POINTS_FACTOR * width * dpi)
    size = bin_size(data.values.shape[0], max_points)
    n_groups = len(data.groups)
    for g, name in enumerate(data.groups):
        xs, ys = _curve_points(data.values[:, g], data.start0, size)
        style = LINE_STYLES[g % len(LINE_STYLES)]
        grey = LINE_GREYS[len(LINE_GREYS) - n_groups + g] if n_groups <= len(LINE_GREYS) else None
        ax.plot(
            xs,
            ys,
            linestyle=style,
            color=grey or LINE_GREYS[g % len(LINE_GREYS)],
            linewidth=LINE_WIDTH + LINE_STEP * (n_groups - 1 - g),
            label=name,
            gid=f"posterior-{g + 1}",
            clip_on=False,
            zorder=2 + g,
        )
    ax.set_ylim(0.0, 1.0)
    ax.set_ylabel("posterior")
    ax.set_title(
        f"posterior probability (mean per {size:,}-base bin)"
        if size > 1
        else "posterior probability (every base)",
        loc="left",
        fontsize="small",
    )
    ax.legend(
        loc="lower right",
        bbox_to_anchor=(1.0, 1.0),
        ncols=max(1, len(data.groups)),
        frameon=False,
        fontsize="small",
        handlelength=3.0,
        borderaxespad=0.2,
    )
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    axes = [ax]
    ax_dec = fig.add_subplot(grid[1], sharex=ax)
    span = (data.start0, data.end0)
    _lane(
        ax_dec,
        dec_rows,
        data.decoded,
        "feature-box",
        "0.3",
        None,
        "-",
        f"decoded {data.decoded_unit}s ({data.decode_note})",
        span,
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
            f"reference features ({data.reference_name})"
            + (f"; not shown: {', '.join(data.reference_hidden)}" if data.reference_hidden else ""),
            span,
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
    # lay out once, then keep that layout while labels are placed and the file is written
    fig.canvas.draw()
    fig.set_layout_engine("none")
    for lane_ax in axes[1:]:
        dropped = _place_labels(fig, [lane_ax])
        if dropped:
            title = lane_ax.get_title(loc="left")
            lane_ax.set_title(
                f"{title}; {dropped} ID(s) not written (no room)", loc="left", fontsize="small"
            )
    return fig
