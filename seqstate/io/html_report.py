"""A self-contained HTML5 run report: summary, inline SVG figures, a table of top features.

The page needs no network: no external script, style sheet, font or image; figures are
inline SVG drawn by matplotlib (:func:`build_report_figures`), the table is sorted and
searched by a small inline script.  Everything taken from the data is HTML-escaped.  The
page holds no timestamp, so the same input gives the same bytes.

``features_rows`` are the rows of annotate's feature table (dicts keyed by the columns
of :meth:`seqstate.kinds.base.Kind.feature_columns`, values as written in the TSV or as
numbers); coordinates in them are 1-based closed (``start_1based``, ``end_1based``).

Numbers are written one way throughout the page (:func:`fmt_number`): whole numbers with
a comma between thousands, fractions with :data:`DECIMALS` decimals (as ``seqstate
compare`` prints them), ``NA`` for a measure that is undefined.
"""

from __future__ import annotations

import html
import io
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from typing import Any, TextIO

from seqstate.errors import OptionalDependencyError

__all__ = [
    "TOP_FEATURES",
    "accuracy_rows",
    "build_report_figures",
    "fmt_number",
    "inline_svg",
    "calibration_svg",
    "panels_in_columns",
    "shown_records",
    "table_rows",
    "write_html_report",
]

#: Most features listed in the table (the best by segment probability, then posterior).
TOP_FEATURES = 500
#: Figure keys in the order the page shows them, and their headings.
FIGURE_TITLES = {
    "feature_lengths": "Feature length distribution",
    "scores": "Score distributions",
    "feature_density": "Features per record",
    "calibration": "Calibration (reliability diagram)",
}
#: Columns shown in the table of top features, when the rows have them.
TABLE_COLUMNS = [
    "seqid",
    "start_1based",
    "end_1based",
    "strand",
    "type",
    "id",
    "length",
    "mean_posterior",
    "min_posterior",
    "segment_probability",
    "log_odds_bits",
]

_GREYS = ["0.1", "0.45", "0.7", "0.3", "0.6", "0.85"]
#: Decimals of every fraction on the page (posteriors, ECE, Brier, Sn, Sp).
DECIMALS = 4
#: At most this many records get a panel of features along the record; more get bars.
ALONG_RECORDS = 3
#: Columns of the calibration figure on the page (one panel pair per track group).
CALIBRATION_COLUMNS = 2


def fmt_number(value: Any, *, missing: str = "") -> str:
    """The page's one number format: ``1,348,131``, ``0.0134``; ``missing`` for None/NaN.

    Whole numbers (ints, or text that reads as an int) get thousands separators;
    other numbers get :data:`DECIMALS` decimals; text that is no number is kept.
    Booleans are written ``yes``/``no``.
    """
    if value is None:
        return missing
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:.{DECIMALS}f}" if math.isfinite(value) else missing
    text = str(value)
    if re.fullmatch(r"[+-]?\d+", text):
        return f"{int(text):,}"
    num = _number(text)
    if num is not None and re.fullmatch(r"[+-]?(\d+\.\d*|\.\d+|\d+(\.\d*)?[eE][+-]?\d+)", text):
        return f"{num:.{DECIMALS}f}"
    if text.lower() in ("nan", "na"):
        return missing
    return text


def _number(value: Any) -> float | None:
    if value is None or value == "":
        return None
    try:
        out = float(value)
    except (TypeError, ValueError):
        return None
    return out if math.isfinite(out) else None


def _length_of(row: Mapping[str, Any]) -> int | None:
    length = _number(row.get("length"))
    if length is not None:
        return int(length)
    s, e = _number(row.get("start_1based")), _number(row.get("end_1based"))
    if s is None or e is None:
        return None
    return int(e - s + 1)


def table_rows(rows: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """The feature rows with each span listed once: a row with the same seqid, start, end
    and strand as an earlier row that is its sibling (an mRNA's exon and CDS) or its parent
    (a gene and its only mRNA) is folded into that row, whose ``type`` then names both
    (``exon + CDS``, ``gene + mRNA``).  Rows keep their order; other rows are kept as they are.
    """
    out: list[dict[str, Any]] = []
    seen: dict[tuple[str, str, str, str], list[dict[str, Any]]] = {}
    for row in rows:
        key = tuple(str(row.get(c, "")) for c in ("seqid", "start_1based", "end_1based", "strand"))
        parent = str(row.get("parent") or "")
        kind = str(row.get("type") or "feature")
        host = None
        for other in seen.get(key, []):  # type: ignore[arg-type]
            if kind in str(other["type"]).split(" + "):
                continue
            if parent == str(other.get("id") or "") or (
                parent and parent == str(other.get("parent") or "")
            ):
                host = other
                break
        if host is not None:
            host["type"] = f"{host['type']} + {kind}"
            continue
        copy = dict(row)
        copy["type"] = kind
        out.append(copy)
        seen.setdefault(key, []).append(copy)  # type: ignore[arg-type]
    return out


def _top_level(rows: Sequence[Mapping[str, Any]]) -> list[Mapping[str, Any]]:
    """Rows that are no part of another (no ``parent``): genes, islands, segments."""
    return [r for r in rows if not str(r.get("parent") or "")]


def _records(records: Iterable[Any]) -> list[tuple[str, int]]:
    """(id, bases) pairs from (id, length) pairs or run-report record dicts."""
    out = []
    for rec in records:
        if isinstance(rec, Mapping):
            if "start_1based" in rec and "end_1based" in rec:
                n = int(rec["end_1based"]) - int(rec["start_1based"]) + 1
            else:
                n = int(rec["length"])
            out.append((str(rec["id"]), n))
        else:
            rid, n = rec
            out.append((str(rid), int(n)))
    return out


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


def shown_records(records: list[tuple[str, int]], most: int = 40) -> list[tuple[str, int]]:
    """The ``most`` longest records (ties: the first), in input order: the density bars."""
    longest = sorted(range(len(records)), key=lambda i: (-records[i][1], i))[:most]
    return [records[i] for i in sorted(longest)]


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


# ---------------------------------------------------------------- the page
_STYLE = """
body{font-family:sans-serif;margin:1.5em auto;max-width:72em;color:#111;background:#fff}
h1{font-size:1.5em}h2{font-size:1.2em;border-bottom:1px solid #999;margin-top:1.6em}
table{border-collapse:collapse;font-size:.9em}
th,td{border:1px solid #bbb;padding:.2em .5em;text-align:left}
td.n{text-align:right;font-variant-numeric:tabular-nums}
th.sort{cursor:pointer;background:#eee}th.sort:hover{background:#ddd}
figure{margin:1em 0}figure svg{max-width:100%;height:auto}
.note{color:#444;font-size:.9em}
"""

_SCRIPT = """
(function(){
var table=document.getElementById('features');if(!table){return;}
var body=table.tBodies[0];var search=document.getElementById('feature-search');
var count=document.getElementById('feature-count');
function key(cell,numeric){var t=cell.getAttribute('data-v');
 if(numeric){var x=parseFloat(t);return isNaN(x)?-Infinity:x;}return t.toLowerCase();}
var heads=table.tHead.rows[0].cells;
for(var c=0;c<heads.length;c++){(function(col){var th=heads[col];
 th.addEventListener('click',function(){
  var numeric=th.getAttribute('data-type')==='number';
  var up=th.getAttribute('data-dir')!=='asc';
  for(var j=0;j<heads.length;j++){heads[j].removeAttribute('data-dir');
   heads[j].setAttribute('aria-sort','none');}
  th.setAttribute('data-dir',up?'asc':'desc');
  th.setAttribute('aria-sort',up?'ascending':'descending');
  var rows=Array.prototype.slice.call(body.rows);
  rows.sort(function(a,b){var x=key(a.cells[col],numeric),y=key(b.cells[col],numeric);
   return x<y?(up?-1:1):x>y?(up?1:-1):0;});
  for(var i=0;i<rows.length;i++){body.appendChild(rows[i]);}
 });})(c);}
function filter(){var q=search.value.toLowerCase();var shown=0;
 for(var i=0;i<body.rows.length;i++){var r=body.rows[i];
  var hit=r.textContent.toLowerCase().indexOf(q)>=0;r.hidden=!hit;if(hit){shown++;}}
 count.textContent=shown+' of '+body.rows.length+' shown';}
search.addEventListener('input',filter);filter();
})();
"""


def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _fmt(value: Any, missing: str = "") -> str:
    """A value of the data as written on the page: numbers by :func:`fmt_number`, text
    as it is (a record ID or a file name that looks like a number stays as typed)."""
    if value is None or isinstance(value, (bool, int, float)):
        return fmt_number(value, missing=missing)
    return str(value)


def _top(rows: Sequence[Mapping[str, Any]], n: int) -> list[Mapping[str, Any]]:
    def rank(item: tuple[int, Mapping[str, Any]]) -> tuple[float, float, int]:
        i, row = item
        sp = _number(row.get("segment_probability"))
        mp = _number(row.get("mean_posterior"))
        return (-(sp if sp is not None else -1.0), -(mp if mp is not None else -1.0), i)

    return [row for _, row in sorted(enumerate(rows), key=rank)[:n]]


def _kv_table(pairs: Iterable[tuple[str, Any]], css: str = "kv") -> str:
    rows = []
    for k, v in pairs:
        cls = " class='n'" if isinstance(v, (int, float)) and not isinstance(v, bool) else ""
        rows.append(f"<tr><th>{_e(k)}</th><td{cls}>{_e(_fmt(v))}</td></tr>")
    return f"<table class='{css}'>{''.join(rows)}</table>"


def _cells(values: Sequence[Any], first_text: int, missing: str = "") -> str:
    """Table cells: the first ``first_text`` as text, the others as numbers."""
    out = []
    for i, v in enumerate(values):
        if i >= first_text:
            out.append(f"<td class='n'>{_e(_fmt(v, missing))}</td>")
        else:
            out.append(f"<td>{_e(_fmt(v))}</td>")
    return "".join(out)


def _calibration_section(calibration: Any, truth_name: str | None) -> str:
    data = calibration.to_dict() if hasattr(calibration, "to_dict") else dict(calibration)
    head = (
        "<tr><th>track</th><th>forecast</th><th>forecasts</th><th>ECE</th><th>Brier</th>"
        "<th>largest bin gap</th></tr>"
    )
    rows = []
    for lab in data.get("labels", []):
        parts = [(name, lab.get(name, {})) for name in ("bases", "features")]
        cal = lab.get("calibrated")
        if isinstance(cal, dict):  # a recalibrated model: its calibrated forecasts too
            parts += [(f"calibrated {name}", cal.get(name, {})) for name in ("bases", "features")]
        for name, part in parts:
            cells = [lab.get("track"), name, part.get("forecasts"), part.get("ece")]
            cells += [part.get("brier"), part.get("max_gap")]
            rows.append(f"<tr>{_cells(cells, 2, 'NA')}</tr>")
    src = truth_name or data.get("source", "")
    if data.get("in_sample"):
        src += " (in-sample: the model's recalibration table was fitted on these bases)"
    return (
        "<section id='calibration'><h2>Calibration</h2>"
        f"<p class='note'>Truth: <span id='truth-name'>{_e(src)}</span>; "
        f"{_e(_fmt(data.get('records')))} record(s), "
        f"{_e(_fmt(data.get('bases')))} bases, {_e(_fmt(data.get('bins')))} bins. ECE: expected "
        "calibration error (Guo et al. 2017); Brier score (Brier 1950). NA: no "
        "forecast.</p>"
        f"<table id='calibration-table'><thead>{head}</thead><tbody>{''.join(rows)}</tbody>"
        "</table></section>"
    )


def accuracy_rows(result: Mapping[str, Any]) -> list[tuple[str, Any, Any, str]]:
    """(level, Sn, Sp, counts) of a comparison as ``seqstate compare`` returns it
    (:func:`seqstate.commands.compare.compare_files`): bases (strand-aware), features
    (exons for CDS and exon), and for those also transcripts and genes.  Sn and Sp are
    fractions or None (undefined)."""
    counts = result["counts"]
    exon = result.get("rule") == "exon"
    word = "exons" if exon else f"{result.get('type', 'feature')} features"
    nuc, nc = result["nucleotide"]["strand_aware"], counts["nucleotide"]["strand_aware"]
    fe, fc = result["feature"], counts["feature"]
    rows = [
        (
            "bases (strand-aware)",
            nuc["sensitivity"],
            nuc["specificity"],
            f"{nc['tp']:,} of {nc['tp'] + nc['fn']:,} reference and of "
            f"{nc['tp'] + nc['fp']:,} predicted bases",
        ),
        (
            word,
            fe["sensitivity"],
            fe["specificity"],
            f"{fc['matched_reference']:,} of {fc['reference']:,} reference and "
            f"{fc['matched_predicted']:,} of {fc['predicted']:,} predicted matched",
        ),
    ]
    for level in ("transcript", "gene"):
        if level in result:
            m, c = result[level], counts[level]
            rows.append(
                (
                    f"{level}s",
                    m["sensitivity"],
                    m["specificity"],
                    f"{c['matched_reference']:,} of {c['reference']:,} reference and "
                    f"{c['matched_predicted']:,} of {c['predicted']:,} predicted "
                    + (
                        "with every exon exact"
                        if level == "transcript"
                        else "with an exact transcript"
                    ),
                )
            )
    return rows


def _accuracy_section(accuracy: Mapping[str, Any], truth_name: str | None) -> str:
    if "error" in accuracy:  # the comparison could not be made; say why
        return (
            "<section id='accuracy'><h2>Accuracy against the truth</h2>"
            f"<p class='note'>{_e(accuracy['error'])}</p></section>"
        )
    rule = (
        "a predicted exon matches when both ends and the strand are equal; a transcript "
        "or gene when every exon does"
        if accuracy.get("rule") == "exon"
        else "a match shares at least half of the shorter feature, on the same strand"
    )
    where = accuracy.get("region") or ", ".join(
        s["seqid"] for s in accuracy.get("sequences", [])[:10]
    )
    head = "<tr><th>level</th><th>Sn</th><th>Sp</th><th>counts</th></tr>"
    body = "".join(
        f"<tr>{_cells([level, sn, sp], 1, 'NA')}<td>{_e(counts)}</td></tr>"
        for level, sn, sp, counts in accuracy_rows(accuracy)
    )
    n_bases = accuracy.get("counts", {}).get("bases")
    return (
        "<section id='accuracy'><h2>Accuracy against the truth</h2>"
        f"<p class='note'>{_e(accuracy.get('type', ''))} features of this run against "
        f"<span class='truth'>{_e(truth_name or '')}</span> on {_e(where)} "
        f"({_e(_fmt(n_bases))} bases), as <code>seqstate compare</code> computes them: "
        f"Sn = TP/(TP+FN), Sp = TP/(TP+FP); {_e(rule)}. NA: nothing to count.</p>"
        f"<table id='accuracy-table'><thead>{head}</thead><tbody>{body}</tbody></table>"
        "</section>"
    )


def _type_counts(rows: Sequence[Mapping[str, Any]]) -> list[tuple[str, int]]:
    """Features per type, types in the order they first appear (gene, mRNA, exon, CDS)."""
    counts: dict[str, int] = {}
    for row in rows:
        t = str(row.get("type") or "feature")
        counts[t] = counts.get(t, 0) + 1
    return list(counts.items())


def write_html_report(
    handle: TextIO,
    report_dict: Mapping[str, Any],
    features_rows: Sequence[Mapping[str, Any]],
    figures: Mapping[str, str],
    calibration: Any = None,
    *,
    top: int = TOP_FEATURES,
    truth_name: str | None = None,
    accuracy: Mapping[str, Any] | None = None,
) -> None:
    """Write the HTML5 page to ``handle``.

    ``report_dict`` is annotate's run report (:meth:`AnnotateReport.to_dict`: model with
    name and sha256, options, records); ``figures`` maps figure keys (see
    :data:`FIGURE_TITLES`; others follow in key order) to matplotlib SVG text;
    ``calibration`` is a calibration report (``CalibrateReport`` or its ``to_dict()``)
    or None.  ``truth_name`` names the trusted annotation (the file as given);
    ``accuracy`` is the result of ``seqstate compare`` of this run's features against
    it (:func:`seqstate.commands.compare.compare_files`), or ``{"error": text}`` when
    none could be made.  The table lists the ``top`` best features, each span once
    (:func:`table_rows`).
    """
    model = report_dict.get("model") or {}
    if not isinstance(model, Mapping):
        model = {"name": model}
    records = list(report_dict.get("records") or [])
    bases = 0
    for rec in _records(records):
        bases += rec[1]
    n_records = len(records)
    totals = report_dict.get("totals")
    if isinstance(totals, Mapping):  # the report lists only the first records
        n_records, bases = totals.get("records", n_records), totals.get("bases", bases)
    per_type = _type_counts(features_rows)
    title = f"seqstate run report: {model.get('name', 'model')}"
    out: list[str] = [
        "<!DOCTYPE html>",
        "<html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>{_e(title)}</title><style>{_STYLE}</style></head><body>",
        f"<h1>{_e(title)}</h1>",
        "<section id='summary'><h2>Run summary</h2>",
    ]
    summary: list[tuple[str, Any]] = [
        ("records", n_records),
        ("bases", bases),
        ("features", len(features_rows)),
        ("model", model.get("name", "")),
        ("model sha256", model.get("sha256", "")),
    ]
    for key in ("tool", "version", "decode"):
        if key in report_dict:
            summary.append((key, report_dict[key]))
    if truth_name is not None:
        summary.append(("truth", truth_name))
    out.append(_kv_table(summary))
    out.append("<h3>Features per type</h3>")
    out.append(_kv_table(per_type, "kv per-type") if per_type else "<p>No features.</p>")
    options = report_dict.get("options") or {}
    if options:
        out.append("<h3>Options</h3>")
        out.append(_kv_table((k, v) for k, v in options.items()))
    out.append("</section>")
    if accuracy is not None:
        out.append(_accuracy_section(accuracy, truth_name))
    keys = [k for k in FIGURE_TITLES if k in figures] + sorted(
        k for k in figures if k not in FIGURE_TITLES
    )
    if keys:
        out.append("<section id='figures'><h2>Figures</h2>")
        for n, key in enumerate(keys):
            caption = FIGURE_TITLES.get(key, key.replace("_", " "))
            out.append(
                f"<figure id='figure-{_e(key)}' class='figure'>"
                f"{inline_svg(figures[key], f'f{n}')}"
                f"<figcaption>{_e(caption)}</figcaption></figure>"
            )
        out.append("</section>")
    if calibration is not None:
        out.append(_calibration_section(calibration, truth_name))
    once = table_rows(features_rows)
    rows = _top(once, top)
    cols = [c for c in TABLE_COLUMNS if any(c in r for r in features_rows)]
    numeric = {c for c in cols if c not in ("seqid", "strand", "type", "id")}
    folded = len(features_rows) - len(once)
    out.append("<section id='top-features'><h2>Top features</h2>")
    out.append(
        f"<p class='note'>The {fmt_number(len(rows))} best of {fmt_number(len(once))} "
        "feature(s) by segment probability, then mean posterior; coordinates 1-based closed."
        + (
            f" A span that is two features (an exon and its CDS, a gene and its only mRNA) "
            f"is one row ({fmt_number(folded)} folded)."
            if folded
            else ""
        )
        + " Click a heading to sort; type to search.</p>"
    )
    out.append(
        "<p><label for='feature-search'>Search </label>"
        "<input id='feature-search' type='search' autocomplete='off'> "
        "<span id='feature-count'></span></p>"
    )
    head = "".join(
        f"<th class='sort' scope='col' data-type='{'number' if c in numeric else 'text'}' "
        f"aria-sort='none'>{_e(c)}</th>"
        for c in cols
    )
    out.append(f"<table id='features'><thead><tr>{head}</tr></thead><tbody>")
    for row in rows:
        cells = []
        for c in cols:
            raw = row.get(c, "")
            raw = "" if raw is None else raw
            if c in numeric:
                num = _number(raw)
                key = "" if num is None else repr(num)
                cells.append(f"<td class='n' data-v='{_e(key)}'>{_e(fmt_number(raw))}</td>")
            else:
                cells.append(f"<td data-v='{_e(raw)}'>{_e(raw)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table></section>")
    out.append(f"<script>{_SCRIPT}</script>")
    out.append("</body></html>")
    handle.write("\n".join(out) + "\n")
