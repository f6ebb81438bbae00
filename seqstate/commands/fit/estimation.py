"""New tables from counts: normalisation with pseudocounts, frozen parts, the EM objective.

* Zeros of the start model are structural: a forbidden transition, start or
  end, and a zero emission probability, stay exactly zero; pseudocounts are
  added only to the cells that are non-zero in the start model.
* A row with no counts at all (a state never visited, with pseudocount 0) is
  kept from the start model and listed in the provenance.
* Frozen parts (``start``, ``transitions`` -- with the end table --,
  ``emissions``, or a state name: that state's transition row, end and
  emission rows) are copied from the start model unchanged.
* Back-off rows (contexts shorter than k) are not re-estimated: counting drops
  any explicit back-off rows so that the engine derives them from the counted
  order-k table; EM passes the rows it holds fixed (:mod:`.em`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from seqstate.commands.fit.counting import Counts
from seqstate.errors import UsageError
from seqstate.model import Model, make_model

#: Keywords of ``--freeze`` (anything else must be a state name).
FREEZE_KEYWORDS = ("start", "transitions", "emissions")


def replace_tables(model: Model, **changes: Any) -> Model:
    """A copy of ``model`` (unvalidated) with the :func:`make_model` fields in ``changes``
    replacing its own; provenance and extra are shallow copies."""
    fields: dict[str, Any] = {
        "name": model.name,
        "description": model.description,
        "alphabet": model.alphabet,
        "states": model.states,
        "start": model.start,
        "transitions": model.transitions,
        "emissions": model.emissions,
        "end": model.end,
        "order": model.order,
        "decode": model.decode,
        "lower_emissions": model.lower_emissions,
        "background_label": model.background_label,
        "provenance": dict(model.provenance),
        "extra": dict(model.extra),
    }
    fields.update(changes)
    return make_model(**fields, check=False)


@dataclass(frozen=True)
class Frozen:
    """Parts copied unchanged from the start model (see the module docstring)."""

    start: bool = False
    transitions: bool = False
    emissions: bool = False
    states: frozenset[int] = frozenset()

    def describe(self, model: Model) -> list[str]:
        out = [
            w
            for w, on in (
                ("start", self.start),
                ("transitions", self.transitions),
                ("emissions", self.emissions),
            )
            if on
        ]
        return out + [model.states[s].name for s in sorted(self.states)]


#: Nothing frozen: every part is re-estimated (the default).
NOTHING_FROZEN = Frozen()


def parse_freeze(model: Model, items: Sequence[str]) -> Frozen:
    """``--freeze`` values -> :class:`Frozen`: keywords start/transitions/emissions or states."""
    names = {n: i for i, n in enumerate(model.state_names)}
    flags = {w: False for w in FREEZE_KEYWORDS}
    states: set[int] = set()
    for item in items:
        for part in (p.strip() for p in item.split(",")):
            if not part:
                continue
            if part in flags:
                flags[part] = True
            elif part in names:
                states.add(names[part])
            else:
                raise UsageError(
                    f"--freeze {part!r} is neither {', '.join(FREEZE_KEYWORDS)} nor a state of "
                    f"model '{model.name}' (states: {', '.join(model.state_names)})"
                )
    return Frozen(flags["start"], flags["transitions"], flags["emissions"], frozenset(states))


def _normalise(counts: np.ndarray, old: np.ndarray, pc: float) -> tuple[np.ndarray, bool]:
    """One row: counts plus ``pc`` on the cells non-zero in ``old``, normalised.

    Returns (row, estimated); a row with no counts at all keeps ``old``.
    """
    allowed = old > 0
    raw = np.where(allowed, counts + pc, 0.0)
    total = raw.sum()
    if not total > 0:
        return old.copy(), False
    return raw / total, True


def estimate(
    model: Model,
    counts: Counts,
    *,
    pseudocount: float,
    frozen: Frozen = NOTHING_FROZEN,
    lower: dict[int, np.ndarray] | None = None,
) -> tuple[Model, list[str]]:
    """New tables from ``counts`` (see the module docstring); returns (model, rows kept).

    ``lower`` are the back-off rows of the new model (explicit); None drops the
    start model's explicit rows of every state whose emissions are
    re-estimated, so that the engine derives them from the new table.
    The second value lists the rows that had no counts and were kept.
    """
    m, a, k = model.n_states, len(model.alphabet), model.order
    names = model.state_names
    pc = float(pseudocount)
    kept: list[str] = []
    start = model.start.copy()
    if not frozen.start:
        start, ok = _normalise(counts.start, model.start, pc)
        if not ok:
            kept.append("start")
    trans = model.transitions.copy()
    end = None if model.end is None else model.end.copy()
    for s in range(m):
        if frozen.transitions or s in frozen.states:
            continue
        if end is not None:
            row, ok = _normalise(
                np.append(counts.transitions[s], counts.end[s]),
                np.append(model.transitions[s], end[s]),
                pc,
            )
            trans[s], end[s] = row[:-1], row[-1]
        else:
            trans[s], ok = _normalise(counts.transitions[s], model.transitions[s], pc)
        if not ok:
            kept.append(f"transitions of {names[s]}")
    emis = model.emissions.copy()
    for s in range(m):
        if frozen.emissions or s in frozen.states:
            continue
        empty = 0
        for c in range(a**k):
            emis[s, c], ok = _normalise(counts.emissions[s, c], model.emissions[s, c], pc)
            empty += not ok
        if empty:
            kept.append(f"emissions of {names[s]} ({empty} of {a**k} contexts)")
    if lower is None:
        new_lower = {}
        for j, arr in model.lower_emissions.items():
            keep = arr.copy()
            for s in range(m):
                if not (frozen.emissions or s in frozen.states):
                    keep[s] = np.nan
            if not np.all(np.isnan(keep)):
                new_lower[j] = keep
    else:
        new_lower = {j: v.copy() for j, v in lower.items()}
    new = replace_tables(
        model, start=start, transitions=trans, emissions=emis, end=end, lower_emissions=new_lower
    )
    return new, kept


def objective(model: Model, loglik: float, *, pseudocount: float, frozen: Frozen) -> float:
    """``loglik + p * sum(log theta)`` over the re-estimated cells that get the pseudocount p.

    Equal to ``loglik`` when p = 0.  Natural logs.
    """
    if pseudocount == 0:
        return loglik
    m = model.n_states
    total = 0.0

    def add(values: np.ndarray) -> float:
        v = values[values > 0]
        return float(np.log(v).sum())

    if not frozen.start:
        total += add(model.start)
    for s in range(m):
        if not (frozen.transitions or s in frozen.states):
            total += add(model.transitions[s])
            if model.end is not None:
                total += add(model.end[s : s + 1])
        if not (frozen.emissions or s in frozen.states):
            total += add(model.emissions[s])
    return loglik + pseudocount * total
