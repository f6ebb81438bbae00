"""New tables from counts: normalisation with pseudocounts, frozen parts, the EM objective.

* Zeros of the start model are structural: a forbidden transition, start or
  end, and a zero emission probability, stay exactly zero; pseudocounts are
  added only to the cells that are non-zero in the start model.
* A row with no counts at all (a state never visited, with pseudocount 0) is
  kept from the start model and listed in the provenance.
* Frozen parts (``start``, ``transitions`` -- with the end table --,
  ``emissions``, or a state name: that state's transition row, end and
  emission rows) are copied from the start model unchanged.
* Interpolated Markov chains (``[fit] interpolate = {strength = K, states =
  [...]}``): the emission rows of the listed states are built order by order,
  each context's counts pulled towards the row of its one-shorter context with
  weight K (:func:`interpolated_rows`), so a context seen rarely keeps the
  shape of its shorter context instead of the uniform pseudocount row.
* Length chains (``[fit] length_chains``): the moves into, along and out of
  chained states are set from the lengths of the labelled runs through them
  (:func:`set_length_chains`, :mod:`seqstate.model.lengths`), not from counts.
* The mask table (``--masked evidence``, P(masked | state)): the soft-masked share
  of each pool's known bases plus the pseudocount on both sides,
  ``(masked + p) / (known + 2p)``; a pool is the states of one label (all CDS
  states, all intron states, ...) or, for the unlabelled states, of one name stem
  (the name without its digits and strand sign: ``up1+`` ... ``up12-`` are one pool,
  ``intergenic`` and ``repeat`` one each), so thin states get a stable value
  (:func:`mask_pools`).  A pool without counts keeps the start model's values (0.5
  when it has none); frozen emissions keep the mask, a frozen state its own value.
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
        "mask": model.mask,
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


def interpolated_rows(
    counts: np.ndarray, allowed: np.ndarray, n_symbols: int, order: int, strength: float, pc: float
) -> np.ndarray:
    """Emission rows of one state as an interpolated Markov chain (order ``order``).

    ``counts[c, x]``: counts of symbol x after order-k context c (oldest symbol most
    significant, as the emission tables are laid out).  With n_j(s, x) the counts
    summed over the contexts ending in the j newest symbols s:

        P_0(x) = (n_0(x) + pc) / (n_0 + A pc)
        P_j(x | s) = (n_j(s, x) + K P_{j-1}(x | s')) / (n_j(s) + K)

    where s' drops the oldest symbol of s and K = ``strength``: the weight of the
    order-j counts against the shorter context grows with their number,
    n_j(s) / (n_j(s) + K) (interpolation by counts; a Dirichlet prior centred on the
    shorter context's row).  The order-k rows are then multiplied by ``allowed``
    (the structural zeros of the start model) and normalised.
    """
    a, k = n_symbols, order
    c = np.asarray(counts, dtype=np.float64).reshape(a**k, a)
    n0 = c.sum(axis=0)
    prev = ((n0 + pc) / (n0.sum() + a * pc))[None, :]  # one context of length 0
    for j in range(1, k + 1):
        nj = c.reshape(a ** (k - j), a**j, a).sum(axis=0)  # contexts of the j newest symbols
        shorter = prev[np.arange(a**j) % a ** (j - 1)]  # drop the oldest of the j symbols
        prev = (nj + strength * shorter) / (nj.sum(axis=1, keepdims=True) + strength)
    rows = np.where(allowed, prev, 0.0)
    total = rows.sum(axis=1, keepdims=True)
    uniform = allowed / np.maximum(allowed.sum(axis=1, keepdims=True), 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, rows / total, uniform)


def _interpolation(model: Model) -> tuple[float, set[int]]:
    table = model.extra.get("fit", {})
    spec = table.get("interpolate") if isinstance(table, dict) else None
    if not spec:
        return 0.0, set()
    names = {n: i for i, n in enumerate(model.state_names)}
    states = set()
    for name in spec.get("states", []):
        if name not in names:
            raise UsageError(f"[fit] interpolate names unknown state '{name}'")
        states.add(names[name])
    strength = float(spec.get("strength", 0.0))
    if not strength >= 0:
        raise UsageError(f"[fit] interpolate strength {strength} must be >= 0")
    return strength, states


def mask_pools(model: Model) -> tuple[np.ndarray, list[str]]:
    """The mask-table pool of every state (see the module docstring) and the pool names.

    Returns ``(pool, names)``: ``pool[s]`` indexes ``names``; a pool is named by its
    label, or by ``name stem`` for unlabelled states.
    """
    keys: list[str] = []
    pool = np.zeros(model.n_states, dtype=np.int64)
    for s, st in enumerate(model.states):
        if st.label is not None:
            key = st.label
        else:
            stem = "".join(ch for ch in st.name if not ch.isdigit()).rstrip("+-") or st.name
            key = f"{stem} (unlabelled)"
        if key not in keys:
            keys.append(key)
        pool[s] = keys.index(key)
    return pool, keys


def estimate_mask(
    model: Model, counts: np.ndarray, *, pseudocount: float, frozen: Frozen = NOTHING_FROZEN
) -> tuple[np.ndarray, list[str]]:
    """The mask table from ``counts`` (``(M, 2)``: upper-case and soft-masked known
    bases per state; ``(M, 3, 2)`` for a mask chain, one pair per column), pooled by
    :func:`mask_pools`; returns (table, pools kept)."""
    counts = np.asarray(counts, dtype=np.float64)
    chain = counts.ndim == 3
    shape = (model.n_states, 3) if chain else (model.n_states,)
    old = model.mask
    if old is None or old.shape != shape:
        old = np.full(shape, 0.5)
    if frozen.emissions and model.mask is not None and model.mask.shape == shape:
        return old.copy(), []
    pool, names = mask_pools(model)
    pc = float(pseudocount)
    out = old.copy()
    kept: list[str] = []
    cells = counts.reshape(model.n_states, -1, 2)
    view = out.reshape(model.n_states, -1)
    for g, name in enumerate(names):
        members = pool == g
        for j in range(cells.shape[1]):
            n0, n1 = (float(v) for v in cells[members, j].sum(axis=0))
            total = n0 + n1 + 2 * pc
            if total > 0:
                view[members, j] = (n1 + pc) / total
            else:
                kept.append(f"mask of {name}" + (f" ({j + 1} of 3)" if chain else ""))
    for s in frozen.states:
        out[s] = old[s]
    return out, kept


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
    strength, interpolated = _interpolation(model)
    for s in range(m):
        if frozen.emissions or s in frozen.states:
            continue
        if s in interpolated and k > 0:
            if counts.emissions[s].sum() > 0:
                emis[s] = interpolated_rows(
                    counts.emissions[s], model.emissions[s] > 0, a, k, strength, pc
                )
            else:
                kept.append(f"emissions of {names[s]} ({a**k} of {a**k} contexts)")
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
    mask = model.mask
    if counts.mask is not None:
        mask, mask_kept = estimate_mask(model, counts.mask, pseudocount=pc, frozen=frozen)
        kept.extend(mask_kept)
    new = replace_tables(
        model,
        start=start,
        transitions=trans,
        emissions=emis,
        end=end,
        lower_emissions=new_lower,
        mask=mask,
    )
    return new, kept


def objective(
    model: Model, loglik: float, *, pseudocount: float, frozen: Frozen, mask: bool = False
) -> float:
    """``loglik + p * sum(log theta)`` over the re-estimated cells that get the pseudocount p.

    Equal to ``loglik`` when p = 0.  Natural logs.  ``mask``: the mask table is
    re-estimated too (one P(masked) and one P(unmasked) per pool).
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
    if mask and model.mask is not None and not frozen.emissions:
        pool, _ = mask_pools(model)
        first = np.unique(pool, return_index=True)[1]
        values = np.ravel(model.mask[first])
        total += add(values) + add(1.0 - values)
    return loglik + pseudocount * total


def set_length_chains(model: Model, runs: dict[str, list[int]]) -> tuple[Model, dict[str, Any]]:
    """The moves of every ``[fit] length_chains`` chain from its group's run lengths.

    For each group, :func:`seqstate.model.lengths.fit_branches` fits the entry and
    stay probabilities of its branches (stage counts fixed by the layout) to the
    observed lengths; every chain of the group gets them: ``entry -> first stage of
    branch b`` = w_b (the entry state's other moves keep their share of the rest),
    each stage stays with p_b and moves on with 1 - p_b, the last stage to ``exit``.
    A group without runs keeps its start-model moves.  Returns the model and, per
    group, the fit (for the provenance).
    """
    from seqstate.model.lengths import fit_branches

    chains = model.extra.get("fit", {}).get("length_chains", {})
    if not chains:
        return model, {}
    names = {n: i for i, n in enumerate(model.state_names)}
    trans = model.transitions.copy()
    fits: dict[str, Any] = {}
    for entry_name, ch in chains.items():
        group = ch["group"]
        stages = [len(b) for b in ch["branches"]]
        lengths = runs.get(group, [])
        if not lengths:
            continue
        if group not in fits:
            fits[group] = fit_branches(lengths, stages)
        f = fits[group]
        entry = names[entry_name]
        firsts = [names[b[0]] for b in ch["branches"]]
        into = trans[entry, firsts].sum()
        trans[entry, firsts] = into * np.asarray(f.weights)
        for branch, p in zip(ch["branches"], f.stays):
            idx = [names[x] for x in branch] + [names[ch["exit"]]]
            for s0, s1 in zip(idx, idx[1:]):
                trans[s0] = 0.0
                trans[s0, s0] = p
                trans[s0, s1] = 1.0 - p
    report = {
        g: {
            "stages": list(f.stages),
            "weights": [round(w, 6) for w in f.weights],
            "stays": [round(p, 8) for p in f.stays],
            "mean_length": round(f.mean(), 2),
            "runs": f.n,
        }
        for g, f in fits.items()
    }
    return replace_tables(model, transitions=trans), report
