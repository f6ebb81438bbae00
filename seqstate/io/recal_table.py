"""The recalibration table of a model folder (``recalibration.tsv``): read and write.

Layout (our own)::

    # seqstate recalibration table: monotone maps from a raw score to the observed frequency
    # CDS.plus posterior: isotonic (lowest held-out Brier score over 5 folds; ...)
    group     score                method       temperature  forecast  calibrated
    CDS.plus  posterior            isotonic                  0.0012    0.0004
    CDS.plus  posterior            isotonic                  0.31      0.22
    CDS.plus  segment_probability  temperature  1.21

One map per (group, score): ``isotonic`` maps are their knots, one row each, forecasts
strictly increasing and calibrated values non-decreasing, both from 0 to 1 (the
``temperature`` cell empty); a ``temperature`` map is one row with T > 0 and the
``forecast``/``calibrated`` cells empty.  ``group`` is a track name of the model, or
``mRNA.plus``/``mRNA.minus`` (gene models: the ``structure_probability`` of an mRNA);
``score`` one of :data:`~seqstate.model.recalibration.SCORES`.  The comment lines at
the top (``#``) say how each map was chosen; they are kept as notes.  Any problem is a
:class:`~seqstate.errors.TableFormatError` naming the file and line.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from seqstate.errors import TableFormatError
from seqstate.io.tsv_tables import _lines, _shown_cells, read_text
from seqstate.model.recalibration import KINDS, SCORES, Map, Recalibration

__all__ = ["COLUMNS", "TITLE", "group_names", "read_recalibration", "render_recalibration"]

COLUMNS = ["group", "score", "method", "temperature", "forecast", "calibrated"]
TITLE = "seqstate recalibration table: monotone maps from a raw score to the observed frequency"
_STRAND_WORD = {"+": "plus", "-": "minus", None: "unstranded"}


def group_names(states: tuple, gene_model: bool) -> list[str]:
    """The group names a table of this model may use: its track names (label, plus
    ``.plus``/``.minus`` when the label is on both strands, as
    :func:`seqstate.kinds.track_groups` names them), and for a gene model
    ``mRNA.plus`` and ``mRNA.minus``."""
    order: list[tuple[str, str | None]] = []
    for s in states:
        if s.label is not None and (s.label, s.strand) not in order:
            order.append((s.label, s.strand))
    strands: dict[str, set] = {}
    for label, strand in order:
        strands.setdefault(label, set()).add(strand)
    names = [
        label if len(strands[label]) == 1 else f"{label}.{_STRAND_WORD[strand]}"
        for label, strand in order
    ]
    if gene_model:
        names += ["mRNA.plus", "mRNA.minus"]
    return names


def _probability(cell: str, what: str, path: Path, line0: int) -> float:
    text = cell.strip()
    try:
        value = float(text)
    except ValueError:
        raise TableFormatError(
            f"{what} '{text[:30]}' is not a number, expected a probability from 0 to 1",
            path=path,
            line0=line0,
        ) from None
    if not (math.isfinite(value) and 0.0 <= value <= 1.0):
        raise TableFormatError(
            f"{what} {text[:30]} is outside 0..1, expected a probability from 0 to 1",
            path=path,
            line0=line0,
        )
    return value


def read_recalibration(path: Path, groups: list[str]) -> Recalibration:
    """Read and check ``recalibration.tsv`` against the model's group names ``groups``."""
    notes = []
    for raw in read_text(path, TableFormatError, "TSV table").splitlines():
        line = raw.decode("utf-8", errors="replace")
        if line.startswith("#"):
            text = line[1:].strip()
            if text and text != TITLE:
                notes.append(text)
        elif line.strip():
            break
    lines = list(_lines(path))
    if not lines:
        raise TableFormatError(
            "table is empty, expected a header and one row per map knot", path=path
        )
    line0, head = lines[0]
    if [f.strip() for f in head] != COLUMNS:
        raise TableFormatError(
            f"header is {_shown_cells(head, 6)}, expected '" + "<TAB>".join(COLUMNS) + "'",
            path=path,
            line0=line0,
        )
    rows: dict[tuple[str, str], list[tuple[int, str, float, float, float]]] = {}
    for line0, fields in lines[1:]:
        if len(fields) != len(COLUMNS):
            raise TableFormatError(
                f"found {len(fields)} columns, expected {len(COLUMNS)}", path=path, line0=line0
            )
        group, score, method, temp, fc, cal = (f.strip() for f in fields)
        if group not in groups:
            raise TableFormatError(
                f"group {group[:40]!r} is not a track of the model; expected one of "
                + ", ".join(groups),
                path=path,
                line0=line0,
            )
        if score not in SCORES:
            raise TableFormatError(
                f"score {score[:40]!r} is not known; expected one of {', '.join(SCORES)}",
                path=path,
                line0=line0,
            )
        if method not in KINDS:
            raise TableFormatError(
                f"method {method[:40]!r} is not known; expected {' or '.join(KINDS)}",
                path=path,
                line0=line0,
            )
        key = (group, score)
        if key in rows and rows[key][0][1] != method:
            raise TableFormatError(
                f"{group} {score}: method {method} after {rows[key][0][1]}; one map has one method",
                path=path,
                line0=line0,
            )
        if method == "temperature":
            if fc or cal:
                raise TableFormatError(
                    f"{group} {score}: a temperature row has empty forecast and calibrated cells",
                    path=path,
                    line0=line0,
                )
            if key in rows:
                raise TableFormatError(
                    f"{group} {score}: a second temperature row; a temperature map is one row",
                    path=path,
                    line0=line0,
                )
            try:
                t = float(temp)
            except ValueError:
                t = math.nan
            if not (math.isfinite(t) and t > 0):
                raise TableFormatError(
                    f"{group} {score}: temperature {temp[:30]!r} is not a number above 0",
                    path=path,
                    line0=line0,
                )
            rows[key] = [(line0, method, t, 0.0, 0.0)]
            continue
        if temp:
            raise TableFormatError(
                f"{group} {score}: an isotonic knot has an empty temperature cell",
                path=path,
                line0=line0,
            )
        x = _probability(fc, f"{group} {score}: forecast", path, line0)
        y = _probability(cal, f"{group} {score}: calibrated value", path, line0)
        prev = rows.get(key)
        if prev:
            _, _, _, px, py = prev[-1]
            if x <= px:
                raise TableFormatError(
                    f"{group} {score}: forecast {fc} does not increase (after {px!r}); "
                    "knots are listed by strictly increasing forecast",
                    path=path,
                    line0=line0,
                )
            if y < py:
                raise TableFormatError(
                    f"{group} {score}: calibrated value {cal} is below the previous knot's "
                    f"({py!r}); a map is monotone (non-decreasing)",
                    path=path,
                    line0=line0,
                )
        rows.setdefault(key, []).append((line0, method, 0.0, x, y))
    if not rows:
        raise TableFormatError("table has a header but no map", path=path, line0=line0)
    maps: dict[tuple[str, str], Map] = {}
    for key, got in rows.items():
        if got[0][1] == "temperature":
            maps[key] = Map("temperature", temperature=got[0][2])
        else:
            maps[key] = Map(
                "isotonic", np.array([r[3] for r in got]), np.array([r[4] for r in got])
            )
    return Recalibration(maps, notes)


def render_recalibration(recal: Recalibration) -> str:
    """The canonical text of a recalibration table (maps in group, then score order as
    given; numbers in shortest round-trip form)."""
    out = [f"# {TITLE}\n"]
    out += [f"# {note}\n" for note in recal.notes]
    out.append("\t".join(COLUMNS) + "\n")
    for (group, score), m in recal.maps.items():
        if m.kind == "temperature":
            out.append(f"{group}\t{score}\ttemperature\t{float(m.temperature)!r}\t\t\n")
            continue
        for x, y in zip(m.knots_x, m.knots_y):
            out.append(f"{group}\t{score}\tisotonic\t\t{float(x)!r}\t{float(y)!r}\n")
    return "".join(out)
