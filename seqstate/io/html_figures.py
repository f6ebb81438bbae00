"""The figures of the HTML run report, drawn by matplotlib and inlined as SVG: feature
lengths, score distributions, features per record, and the calibration figure's layout.
Greyscale-readable; needs the ``plot`` extra (:class:`~seqstate.errors.OptionalDependencyError`
otherwise).
"""

from __future__ import annotations

import io
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from seqstate.errors import OptionalDependencyError
from seqstate.io.html_data import (
    _length_of,
    _number,
    _records,
    _top_level,
    shown_records,
    table_rows,
)

_GREYS = ["0.1", "0.45", "0.7", "0.3", "0.6", "0.85"]


#: At most this many records get a panel of features along the record; more get bars.
ALONG_RECORDS = 3


#: Columns of the calibration figure on the page (one panel pair per track group).
CALIBRATION_COLUMNS = 2


# ---------------------------------------------------------------- figures
def inline_svg(svg: str, prefix: str) -> str:
    """Matplotlib SVG text made fit to sit inside an HTML5 page.

    Drops the XML prolog, the document type, the metadata block and the namespace
    declarations (an HTML parser gives ``<svg>`` its namespace), and prefixes every
    ``id`` (and its ``#id`` references) with ``prefix`` so several figures can share
    a page.
    """
    text = re.sub(r"<\?xml[^>]*\?>", "", svg)
    text = re.sub(r"<!DOCTYPE[^>]*>", "", text, flags=re.S)
    text = re.sub(r"<metadata>.*?</metadata>", "", text, flags=re.S)
    text = re.sub(r'\s+xmlns(:\w+)?="[^"]*"', "", text)
    ids = set(re.findall(r'\bid="([^"]+)"', text))

    def rename(match: re.Match[str]) -> str:
        name = match.group(2)
        if name not in ids:
            return match.group(0)
        return f"{match.group(1)}{prefix}-{name}"

    text = re.sub(r'(\bid=")([^"]+)(?=")', rename, text)
    text = re.sub(r"(#)([A-Za-z_][\w.\-]*)", rename, text)
    return text.strip()


def _matplotlib() -> Any:
    """The ``matplotlib`` module, or :class:`~seqstate.errors.OptionalDependencyError`."""
    try:
        import matplotlib
        from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: F401
    except ImportError:
        raise OptionalDependencyError(
            "the HTML report's figures need matplotlib: pip install 'seqstate[plot]'"
        ) from None
    return matplotlib


def _svg_of(fig: Any) -> str:
    matplotlib = _matplotlib()
    buf = io.StringIO()
    with matplotlib.rc_context({"svg.hashsalt": "seqstate", "svg.fonttype": "path"}):
        fig.savefig(buf, format="svg", metadata={"Creator": "seqstate", "Date": None})
    return buf.getvalue()


def _figure(width: float, height: float) -> Any:
    _matplotlib()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100)
    FigureCanvasAgg(fig)
    return fig


def _by_type(rows: Sequence[Mapping[str, Any]]) -> dict[str, list[Mapping[str, Any]]]:
    out: dict[str, list[Mapping[str, Any]]] = {}
    for row in rows:
        out.setdefault(str(row.get("type") or "feature"), []).append(row)
    return dict(sorted(out.items()))


def _empty_note(ax: Any, text: str) -> None:
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, color="0.3")
    ax.set_xticks([])
    ax.set_yticks([])


def _lengths_figure(rows: Sequence[Mapping[str, Any]]) -> Any:
    import numpy as np

    fig = _figure(6.4, 3.6)
    ax = fig.add_subplot(1, 1, 1)
    groups = _by_type(rows)
    lengths = {
        t: [n for n in (_length_of(r) for r in rs) if n and n > 0] for t, rs in groups.items()
    }
    every = [n for ns in lengths.values() for n in ns]
    if not every:
        _empty_note(ax, "no features")
    else:
        lo, hi = math.log10(min(every)), math.log10(max(every))
        edges = np.logspace(lo, hi + 1e-9 if hi > lo else lo + 1, 31)
        for k, (name, ns) in enumerate(lengths.items()):
            if ns:
                ax.hist(
                    ns,
                    bins=edges,
                    histtype="step",
                    color=_GREYS[k % len(_GREYS)],
                    linewidth=1.5,
                    linestyle=["-", "--", ":", "-."][k % 4],
                    label=f"{name} (n={len(ns):,})",
                )
        ax.set_xscale("log")
        ax.set_xlabel("feature length (bases)")
        ax.set_ylabel("features")
        ax.legend(frameon=False, fontsize="small")
    fig.tight_layout()
    return fig


def _scores_figure(rows: Sequence[Mapping[str, Any]]) -> Any:
    import numpy as np

    fig = _figure(8.0, 3.4)
    names = ("mean_posterior", "segment_probability")
    groups = _by_type(rows)
    edges = np.linspace(0.0, 1.0, 21)
    for col, name in enumerate(names):
        ax = fig.add_subplot(1, 2, col + 1)
        drawn = False
        for k, (label, rs) in enumerate(groups.items()):
            vals = [v for v in (_number(r.get(name)) for r in rs) if v is not None]
            if vals:
                drawn = True
                ax.hist(
                    np.clip(vals, 0.0, 1.0),
                    bins=edges,
                    histtype="step",
                    color=_GREYS[k % len(_GREYS)],
                    linewidth=1.5,
                    linestyle=["-", "--", ":", "-."][k % 4],
                    label=label,
                )
        if drawn:
            ax.set_xlim(0, 1)
            ax.set_xlabel(name.replace("_", " "))
            ax.set_ylabel("features")
            ax.legend(frameon=False, fontsize="small")
        else:
            _empty_note(ax, f"no {name.replace('_', ' ')}")
    fig.tight_layout()
    return fig


def _spans(records: Iterable[Any]) -> list[tuple[str, int, int]]:
    """(id, first, last) 1-based closed: the stretch of each record that was annotated."""
    out = []
    for rec in records:
        if isinstance(rec, Mapping) and "start_1based" in rec and "end_1based" in rec:
            out.append((str(rec["id"]), int(rec["start_1based"]), int(rec["end_1based"])))
        else:
            rid, n = _records([rec])[0]
            out.append((rid, 1, n))
    return out


def _round_width(span: int, bins: int) -> int:
    """A round bin width (1, 2 or 5 times a power of ten) giving at most about ``bins``
    bins over ``span`` bases."""
    target = max(1.0, span / bins)
    power = 10 ** math.floor(math.log10(target))
    for step in (1, 2, 5, 10):
        if step * power >= target:
            return int(step * power)
    return int(10 * power)  # pragma: no cover


def _bases_text(n: int) -> str:
    for size, unit in ((1_000_000, "Mbp"), (1_000, "kbp")):
        if n >= size and n % size == 0:
            return f"{n // size:,} {unit}"
    return f"{n:,} bases"


def _unit(rows: Sequence[Mapping[str, Any]]) -> str:
    kinds = sorted({str(r.get("type") or "feature") for r in rows})
    return f"{kinds[0]}s" if len(kinds) == 1 else "features"


def _density_figure(rows: Sequence[Mapping[str, Any]], records: Sequence[Any]) -> Any:
    """Features per record: for at most :data:`ALONG_RECORDS` records, counts in round bins
    along each record (one panel each); for more, bars of features per Mbp of the 40
    longest records, one readable row per record."""
    from matplotlib.ticker import FuncFormatter, MaxNLocator

    tops = _top_level(rows)
    unit = _unit(tops)
    spans = _spans(records)
    if not spans:
        fig = _figure(6.4, 2.0)
        _empty_note(fig.add_subplot(1, 1, 1), "no records")
        fig.tight_layout()
        return fig
    if len(spans) <= ALONG_RECORDS:
        fig = _figure(8.0, 0.6 + 1.9 * len(spans))
        for k, (rid, first, last) in enumerate(spans):
            ax = fig.add_subplot(len(spans), 1, k + 1)
            width = _round_width(last - first + 1, 60)
            starts = [
                int(v)
                for v in (_number(r.get("start_1based")) for r in tops if r.get("seqid") == rid)
                if v is not None
            ]
            edges = list(range(first, last + 1, width)) + [last + 1]
            ax.hist(starts, bins=edges, color="0.35", edgecolor="white", linewidth=0.3)
            ax.set_xlim(first, last + 1)
            ax.set_ylabel(f"{unit} per\n{_bases_text(width)}")
            ax.yaxis.set_major_locator(MaxNLocator(nbins=4, integer=True))
            ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{int(round(v)):,}"))
            ax.set_title(f"{rid}: {len(starts):,} {unit}", loc="left", fontsize="medium")
            for side in ("top", "right"):
                ax.spines[side].set_visible(False)
        fig.axes[-1].set_xlabel("start position (1-based)")
        fig.tight_layout()
        return fig
    counts: dict[str, int] = {}
    for row in tops:
        sid = str(row.get("seqid"))
        counts[sid] = counts.get(sid, 0) + 1
    shown = shown_records(_records(records))
    fig = _figure(8.0, 1.0 + 0.24 * len(shown))
    ax = fig.add_subplot(1, 1, 1)
    dens = [counts.get(rid, 0) / max(n, 1) * 1e6 for rid, n in shown]
    ax.barh(range(len(shown)), dens, color="0.35", height=0.7)
    ax.set_yticks(range(len(shown)))
    ax.set_yticklabels([rid for rid, _ in shown])
    ax.set_ylim(len(shown) - 0.5, -0.5)  # input order, top to bottom
    ax.set_xlabel(f"{unit} per Mbp")
    if len(spans) > len(shown):
        ax.set_title(f"the {len(shown)} longest of {len(spans):,} records", loc="left")
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    fig.tight_layout()
    return fig


def panels_in_columns(fig: Any, columns: int = CALIBRATION_COLUMNS) -> Any:
    """Lay out a figure of panel pairs side by side (a grid of 2 rows by n columns, as the
    calibration figure draws them) in at most ``columns`` columns, rows of pairs below one
    another, at a size where its text is read at 100 % on a page; returns ``fig``."""
    axes = [a for a in fig.axes if a.get_subplotspec() is not None]
    if not axes:
        return fig
    old = axes[0].get_subplotspec().get_gridspec()
    n_rows, n_cols = old.get_geometry()
    if n_rows != 2 or n_cols <= columns:
        return fig
    blocks = -(-n_cols // columns)
    ratios = list(old.get_height_ratios() or [1, 1])
    grid = fig.add_gridspec(2 * blocks, columns, height_ratios=ratios * blocks)
    for ax in axes:
        spec = ax.get_subplotspec()
        row, col = spec.rowspan.start, spec.colspan.start
        ax.set_subplotspec(grid[(col // columns) * 2 + row, col % columns])
    width, height = fig.get_size_inches()
    fig.set_size_inches(min(width, 5.0 * columns), height * blocks * 0.9)
    fig.set_layout_engine("constrained")
    return fig


def build_report_figures(
    features_rows: Sequence[Mapping[str, Any]], records: Iterable[Any]
) -> dict[str, str]:
    """The report's figures as SVG text: ``feature_lengths``, ``scores``, ``feature_density``.

    ``records`` are ``(id, bases)`` pairs or the run report's record dicts (their
    ``start_1based``/``end_1based`` give the bases annotated).  The length and score
    figures count a span once (:func:`table_rows`); the density figure counts features
    that are part of no other (genes, islands).  Needs matplotlib
    (:class:`~seqstate.errors.OptionalDependencyError` otherwise); greyscale-readable.
    """
    rows = list(features_rows)
    once = table_rows(rows)
    recs = list(records)
    return {
        "feature_lengths": _svg_of(_lengths_figure(once)),
        "scores": _svg_of(_scores_figure(once)),
        "feature_density": _svg_of(_density_figure(rows, recs)),
    }


def calibration_svg(fig: Any, truth_name: str | None = None, source: str = "truth") -> str:
    """The calibration figure (a matplotlib Figure of panel pairs) as SVG text for the
    page, laid out by :func:`panels_in_columns` so its text is readable; the word
    ``source`` in its title is replaced by ``truth_name`` (the file) when given."""
    title = fig.get_suptitle()
    if truth_name is not None and f"({source}," in title:
        fig.suptitle(title.replace(f"({source},", f"({truth_name},", 1), fontsize="medium")
    return _svg_of(panels_in_columns(fig))
