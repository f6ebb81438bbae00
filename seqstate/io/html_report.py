"""A self-contained HTML5 run report: summary, inline SVG figures, a table of top features.

The page needs no network: no external script, style sheet, font or image; figures are
inline SVG drawn by matplotlib (:func:`build_report_figures`), the table is sorted and
searched by a small inline script.  Everything taken from the data is HTML-escaped.  The
page holds no timestamp, so the same input gives the same bytes.

This module writes the page (its sections, style and script); the page's data (numbers,
table rows, records, accuracy) is in :mod:`seqstate.io.html_data`, its figures in
:mod:`seqstate.io.html_figures` (their public names re-exported here).
"""

from __future__ import annotations

import html
from collections.abc import Iterable, Mapping, Sequence
from typing import Any, TextIO

from seqstate.io.html_data import (
    TABLE_COLUMNS,
    TOP_FEATURES,
    _number,
    _records,
    _type_counts,
    accuracy_rows,
    fmt_number,
    shown_records,
    table_rows,
)
from seqstate.io.html_figures import (
    build_report_figures,
    calibration_svg,
    inline_svg,
    panels_in_columns,
)

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


#: Figure keys in the order the page shows them, and their headings.
FIGURE_TITLES = {
    "feature_lengths": "Feature length distribution",
    "scores": "Score distributions",
    "feature_density": "Features per record",
    "calibration": "Calibration (reliability diagram)",
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
