"""A self-contained HTML5 run report: summary, inline SVG figures, a table of top features.

The page needs no network: no external script, style sheet, font or image; figures are
inline SVG drawn by matplotlib (:func:`build_report_figures`), the table is sorted and
searched by a small inline script.  Everything taken from the data is HTML-escaped.  The
page holds no timestamp, so the same input gives the same bytes.

``features_rows`` are the rows of annotate's feature table (dicts keyed by the columns
of :meth:`seqstate.kinds.base.Kind.feature_columns`, values as written in the TSV or as
numbers); coordinates in them are 1-based closed (``start_1based``, ``end_1based``).
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
    "build_report_figures",
    "inline_svg",
    "shown_records",
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


def _density_figure(rows: Sequence[Mapping[str, Any]], records: list[tuple[str, int]]) -> Any:
    fig = _figure(6.4, 3.6)
    ax = fig.add_subplot(1, 1, 1)
    counts: dict[str, int] = {}
    for row in rows:
        sid = str(row.get("seqid"))
        counts[sid] = counts.get(sid, 0) + 1
    shown = shown_records(records)
    if not shown:
        _empty_note(ax, "no records")
    else:
        dens = [counts.get(rid, 0) / max(n, 1) * 1e6 for rid, n in shown]
        ax.bar(range(len(shown)), dens, color="0.35")
        ax.set_xticks(range(len(shown)))
        ax.set_xticklabels([rid for rid, _ in shown], rotation=60, ha="right", fontsize="x-small")
        ax.set_ylabel("features per Mbp")
        more = f" ({len(shown)} longest of {len(records)})" if len(records) > len(shown) else ""
        ax.set_xlabel(f"record{more}")
    fig.tight_layout()
    return fig


def build_report_figures(
    features_rows: Sequence[Mapping[str, Any]], records: Iterable[Any]
) -> dict[str, str]:
    """The report's figures as SVG text: ``feature_lengths``, ``scores``, ``feature_density``.

    ``records`` are ``(id, bases)`` pairs or the run report's record dicts (their
    ``start_1based``/``end_1based`` give the bases annotated).  Needs matplotlib
    (:class:`~seqstate.errors.OptionalDependencyError` otherwise); greyscale-readable.
    """
    rows = list(features_rows)
    recs = _records(records)
    return {
        "feature_lengths": _svg_of(_lengths_figure(rows)),
        "scores": _svg_of(_scores_figure(rows)),
        "feature_density": _svg_of(_density_figure(rows, recs)),
    }


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


def _fmt(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return "" if not math.isfinite(value) else f"{value:.6g}"
    return str(value)


def _top(rows: Sequence[Mapping[str, Any]], n: int) -> list[Mapping[str, Any]]:
    def rank(item: tuple[int, Mapping[str, Any]]) -> tuple[float, float, int]:
        i, row = item
        sp = _number(row.get("segment_probability"))
        mp = _number(row.get("mean_posterior"))
        return (-(sp if sp is not None else -1.0), -(mp if mp is not None else -1.0), i)

    return [row for _, row in sorted(enumerate(rows), key=rank)[:n]]


def _kv_table(pairs: Iterable[tuple[str, Any]]) -> str:
    body = "".join(f"<tr><th>{_e(k)}</th><td>{_e(_fmt(v))}</td></tr>" for k, v in pairs)
    return f"<table class='kv'>{body}</table>"


def _calibration_section(calibration: Any) -> str:
    data = calibration.to_dict() if hasattr(calibration, "to_dict") else dict(calibration)
    head = (
        "<tr><th>track</th><th>forecast</th><th>forecasts</th><th>ECE</th><th>Brier</th>"
        "<th>largest bin gap</th></tr>"
    )
    rows = []
    for lab in data.get("labels", []):
        for name in ("bases", "features"):
            part = lab.get(name, {})
            cells = [lab.get("track"), name, part.get("forecasts"), part.get("ece")]
            cells += [part.get("brier"), part.get("max_gap")]
            rows.append(
                "<tr>"
                + "".join(
                    f"<td class='n'>{_e(_fmt(c))}</td>" if i >= 2 else f"<td>{_e(_fmt(c))}</td>"
                    for i, c in enumerate(cells)
                )
                + "</tr>"
            )
    src = data.get("source", "")
    return (
        "<section id='calibration'><h2>Calibration</h2>"
        f"<p class='note'>Truth: {_e(src)}; {_e(_fmt(data.get('records')))} record(s), "
        f"{_e(_fmt(data.get('bases')))} bases, {_e(_fmt(data.get('bins')))} bins. ECE: expected "
        "calibration error (Guo et al. 2017); Brier score (Brier 1950). Empty cells: no "
        "forecast.</p>"
        f"<table id='calibration-table'><thead>{head}</thead><tbody>{''.join(rows)}</tbody>"
        "</table></section>"
    )


def write_html_report(
    handle: TextIO,
    report_dict: Mapping[str, Any],
    features_rows: Sequence[Mapping[str, Any]],
    figures: Mapping[str, str],
    calibration: Any = None,
    *,
    top: int = TOP_FEATURES,
) -> None:
    """Write the HTML5 page to ``handle``.

    ``report_dict`` is annotate's run report (:meth:`AnnotateReport.to_dict`: model with
    name and sha256, options, records); ``figures`` maps figure keys (see
    :data:`FIGURE_TITLES`; others follow in key order) to matplotlib SVG text;
    ``calibration`` is a calibration report (``CalibrateReport`` or its ``to_dict()``)
    or None.  The table lists the ``top`` best features.
    """
    model = report_dict.get("model") or {}
    if not isinstance(model, Mapping):
        model = {"name": model}
    records = list(report_dict.get("records") or [])
    bases = 0
    for rec in _records(records):
        bases += rec[1]
    per_label: dict[str, int] = {}
    for row in features_rows:
        t = str(row.get("type") or "feature")
        per_label[t] = per_label.get(t, 0) + 1
    title = f"seqstate run report: {model.get('name', 'model')}"
    out: list[str] = [
        "<!DOCTYPE html>",
        "<html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>{_e(title)}</title><style>{_STYLE}</style></head><body>",
        f"<h1>{_e(title)}</h1>",
        "<section id='summary'><h2>Run summary</h2>",
    ]
    summary = [
        ("records", len(records)),
        ("bases", bases),
        ("features", len(features_rows)),
        ("model", model.get("name", "")),
        ("model sha256", model.get("sha256", "")),
    ]
    for key in ("tool", "version", "decode"):
        if key in report_dict:
            summary.append((key, report_dict[key]))
    out.append(_kv_table(summary))
    out.append("<h3>Features per label</h3>")
    out.append(_kv_table(sorted(per_label.items())) if per_label else "<p>No features.</p>")
    options = report_dict.get("options") or {}
    if options:
        out.append("<h3>Options</h3>")
        out.append(_kv_table((k, v) for k, v in options.items()))
    out.append("</section>")
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
        out.append(_calibration_section(calibration))
    rows = _top(features_rows, top)
    cols = [c for c in TABLE_COLUMNS if any(c in r for r in features_rows)]
    numeric = {c for c in cols if c not in ("seqid", "strand", "type", "id")}
    out.append("<section id='top-features'><h2>Top features</h2>")
    out.append(
        f"<p class='note'>The {len(rows)} best of {len(features_rows)} feature(s) by segment "
        "probability, then mean posterior; coordinates 1-based closed. Click a heading to "
        "sort; type to search.</p>"
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
            v = _fmt(row.get(c, ""))
            cls = " class='n'" if c in numeric else ""
            cells.append(f"<td{cls} data-v='{_e(v)}'>{_e(v)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table></section>")
    out.append(f"<script>{_SCRIPT}</script>")
    out.append("</body></html>")
    handle.write("\n".join(out) + "\n")
