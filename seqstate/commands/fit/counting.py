"""Counts of starts, transitions, ends and emissions: from a known path, and pooled.

:class:`Counts` holds counts or expected counts (Baum–Welch, :mod:`.em`).  Emission
counts come only from positions with a full order-k context (the emission code of
:mod:`seqstate.engine.api` has j = k): positions within k bases of a record start
or of an unknown base, and unknown bases themselves, count towards starts,
transitions and ends but not towards emissions.  A labelled path that uses a
forbidden move (or a zero emission) is an error naming the record, the 1-based
position and the states.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from seqstate.commands.fit.labels import LabelTrack
from seqstate.engine import api, training
from seqstate.errors import FeatureFormatError, ModelFormatError
from seqstate.model import Model


@dataclass
class Counts:
    """Counts (or expected counts) of one or more records.

    ``start[s]``, ``transitions[s, t]``, ``end[s]`` (records ending in s) and
    ``emissions[s, c, x]`` (order-k context c, symbol x; full-order positions
    only).  ``loglik`` is the natural-log likelihood behind expected counts.
    ``mask[s]`` (``--masked evidence`` only, else None): the known bases of state s
    in upper case (column 0) and soft-masked (column 1), every position, whatever its
    context.
    """

    start: np.ndarray
    transitions: np.ndarray
    end: np.ndarray
    emissions: np.ndarray
    loglik: float = 0.0
    mask: np.ndarray | None = None

    @classmethod
    def zeros(cls, model: Model) -> Counts:
        m, a, k = model.n_states, len(model.alphabet), model.order
        return cls(np.zeros(m), np.zeros((m, m)), np.zeros(m), np.zeros((m, a**k, a)), mask=None)

    def add(self, other: Counts) -> None:
        self.start += other.start
        self.transitions += other.transitions
        self.end += other.end
        self.emissions += other.emissions
        self.loglik += other.loglik
        if other.mask is not None:
            self.mask = other.mask.copy() if self.mask is None else self.mask + other.mask


def count_mask(
    tables: api.EngineTables, seq: bytes, states: np.ndarray, *, chain: bool = False
) -> np.ndarray:
    """Per state, its known bases in upper case and soft-masked: ``(M, 2)`` counts, or
    with ``chain`` ``(M, 3, 2)``: the same split by what precedes the base (the columns
    of a mask chain: no known base, a masked one, an unmasked one).

    ``states`` is the record's known path (-1: no state, skipped); unknown bases (N,
    ambiguity codes, in either case) are skipped, as the engine ignores their mask.
    """
    m = tables.n_states
    raw = np.frombuffer(seq, dtype=np.uint8)
    base = tables.symbol_lookup[raw] >= 0
    known = base & (states >= 0)
    lower = (raw >= ord("a")) & (raw <= ord("z"))
    st = states.astype(np.int64)
    if not chain:
        out = np.zeros((m, 2))
        out[:, 0] = np.bincount(st[known & ~lower], minlength=m)[:m]
        out[:, 1] = np.bincount(st[known & lower], minlength=m)[:m]
        return out
    col = np.zeros(raw.shape[0], dtype=np.int64)  # 0: no known base before
    col[1:] = np.where(base[:-1], np.where(lower[:-1], 1, 2), 0)
    cell = (st * 3 + col) * 2 + lower
    counts = np.bincount(cell[known], minlength=m * 6)[: m * 6]
    return counts.reshape(m, 3, 2).astype(np.float64)


def pool_counts(model: Model, counts: Counts) -> None:
    """Pool emission counts as the manifest's ``[fit]`` table asks (in place).

    ``emission_order = {STATE = j}``: the state's counts are summed over the
    oldest k - j context symbols, so its rows depend on the last j bases only
    (order j inside an order-k table).  ``tie = [[STATE, ...], ...]``: the
    emission counts of each group are summed and shared, so tied states get one
    table.  Used for position-specific states with few observations.
    ``tie_transitions = [[STATE, ...], ...]``: the states of each group share one
    probability of staying (their self-loop): the self-loop counts of the group are
    summed, and so are the counts of leaving; each state must have a self-loop and
    exactly one other allowed move (and no end probability), as the copies of an
    intron body do.  A copy that no training gene shows then takes the length
    distribution of the others instead of its pseudocount-only 0.5.
    """
    fit_table = model.extra.get("fit", {})
    if not isinstance(fit_table, dict):
        return
    names = {n: i for i, n in enumerate(model.state_names)}
    a, k = len(model.alphabet), model.order
    for name, j in dict(fit_table.get("emission_order", {})).items():
        if name not in names:
            raise ModelFormatError(f"[fit] emission_order names unknown state '{name}'")
        j = int(j)
        if not 0 <= j <= k:
            raise ModelFormatError(f"[fit] emission_order of '{name}' is {j}, expected 0..{k}")
        s = names[name]
        e = counts.emissions[s].reshape(a ** (k - j), a**j, a)
        counts.emissions[s] = np.broadcast_to(e.sum(axis=0), e.shape).reshape(a**k, a)
    for group in fit_table.get("tie", []):
        idx = []
        for name in group:
            if name not in names:
                raise ModelFormatError(f"[fit] tie names unknown state '{name}'")
            idx.append(names[name])
        total = counts.emissions[idx].sum(axis=0)
        counts.emissions[idx] = total
    for group in fit_table.get("tie_transitions", []):
        pairs = []
        for name in group:
            if name not in names:
                raise ModelFormatError(f"[fit] tie_transitions names unknown state '{name}'")
            s = names[name]
            others = [t for t in np.flatnonzero(model.transitions[s] > 0) if t != s]
            has_end = model.end is not None and model.end[s] > 0
            if model.transitions[s, s] <= 0 or len(others) != 1 or has_end:
                raise ModelFormatError(
                    f"[fit] tie_transitions: state '{name}' needs a self-loop and exactly one "
                    "other allowed move (and no end probability)"
                )
            pairs.append((s, int(others[0])))
        stay = sum(counts.transitions[s, s] for s, _ in pairs)
        leave = sum(counts.transitions[s, t] for s, t in pairs)
        for s, t in pairs:
            counts.transitions[s, s] = stay
            counts.transitions[s, t] = leave


def count_path(
    model: Model,
    tables: api.EngineTables,
    codes: np.ndarray,
    states: np.ndarray,
    *,
    record: str,
    path: str,
    track: LabelTrack | None = None,
) -> Counts:
    """Counts of one record's known state path (``-1`` = unknown state, skipped).

    ``tables`` are the start model's engine tables (for the codes and zero
    emissions).  Transitions touching an unknown state are not counted; only
    full-order positions count towards emissions.  Raises FeatureFormatError
    where the path uses a move the model forbids (a start, transition or end of
    probability 0) or a zero emission, naming the record, the 1-based position
    and the states.
    """
    m, a, k = model.n_states, len(model.alphabet), model.order
    names = model.state_names
    where = f"record '{record}'"

    def line(i: int) -> int | None:
        return track.line0_at(i) if track is not None else None

    out = Counts.zeros(model)
    n = states.shape[0]
    if states[0] >= 0:
        s0 = int(states[0])
        if model.start[s0] == 0:
            raise FeatureFormatError(
                f"the labels start the record in state '{names[s0]}' (position 1), which the "
                f"start table of model '{model.name}' forbids",
                path=path,
                line0=line(0),
                where=where,
            )
        out.start[s0] += 1
    if model.end is not None and states[n - 1] >= 0:
        sl = int(states[n - 1])
        if model.end[sl] == 0:
            raise FeatureFormatError(
                f"the labels end the record in state '{names[sl]}' (position {n}), which the "
                f"end table of model '{model.name}' forbids",
                path=path,
                line0=line(n - 1),
                where=where,
            )
        out.end[sl] += 1
    lo, hi = int(tables.offsets[k]), int(tables.offsets[k + 1])
    emit = np.zeros((m, a ** (k + 1)))
    kind, i = training.count_known_path(
        codes, states, tables.E, model.transitions, lo, hi, out.transitions, emit
    )
    if kind == 1:
        ln = line(i + 1)
        raise FeatureFormatError(
            f"the labels step from state '{names[int(states[i])]}' at position {i + 1} to "
            f"state '{names[int(states[i + 1])]}' at position {i + 2} (1-based), a transition "
            f"model '{model.name}' forbids",
            path=path,
            line0=ln if ln is not None else line(i),
            where=where,
        )
    if kind == 2:
        base = model.alphabet[int(codes[i]) % a]  # every code block starts at a multiple of A
        raise FeatureFormatError(
            f"the labels put position {i + 1} (1-based, base {base!r}) in state "
            f"'{names[int(states[i])]}', whose emission probability for it is zero in model "
            f"'{model.name}'",
            path=path,
            line0=line(i),
            where=where,
        )
    out.emissions += emit.reshape(m, a**k, a)
    return out


def states_without_counts(model: Model, counts: Counts) -> list[str]:
    """States with a free parameter that the counts never reached (after pooling).

    A state is listed when its transition row (with its end) has at least two
    allowed cells and no count, or when its emission rows have no count at all and
    at least one of them allows two or more symbols: its probabilities then come
    from the pseudocount (or the start model) alone.  Rows with one allowed cell
    are fixed by the model's structure and need no count.
    """
    out = []
    for s, name in enumerate(model.state_names):
        allowed_t = int(np.count_nonzero(model.transitions[s] > 0))
        seen_t = float(counts.transitions[s].sum())
        if model.end is not None:
            allowed_t += int(model.end[s] > 0)
            seen_t += float(counts.end[s])
        free_e = bool(np.any(np.count_nonzero(model.emissions[s] > 0, axis=-1) > 1))
        no_t = allowed_t > 1 and seen_t == 0
        no_e = free_e and float(counts.emissions[s].sum()) == 0
        if no_t or no_e:
            out.append(name)
    return out


def chain_runs(model: Model, states: np.ndarray) -> dict[str, list[int]]:
    """Lengths (bases) of the runs through each ``[fit] length_chains`` chain, by group.

    A run is a maximal stretch of a chain's states entered from its ``entry`` state
    and left to its ``exit`` state (runs cut by an unknown state, -1, are left out).
    """
    chains = model.extra.get("fit", {}).get("length_chains", {})
    names = {n: i for i, n in enumerate(model.state_names)}
    out: dict[str, list[int]] = {}
    st = np.asarray(states, dtype=np.int64)
    n = st.shape[0]
    for entry_name, ch in chains.items():
        member = np.zeros(model.n_states + 1, dtype=bool)
        for branch in ch["branches"]:
            for name in branch:
                if name not in names:
                    raise ModelFormatError(f"[fit] length_chains names unknown state '{name}'")
                member[names[name]] = True
        entry, exit_ = names[entry_name], names[ch["exit"]]
        inside = member[np.where(st >= 0, st, model.n_states)]
        padded = np.concatenate([[False], inside, [False]])
        edges = np.flatnonzero(padded[1:] != padded[:-1])
        runs = out.setdefault(ch["group"], [])
        for a, b in zip(edges[0::2].tolist(), edges[1::2].tolist()):
            if a > 0 and b < n and st[a - 1] == entry and st[b] == exit_:
                runs.append(b - a)
    return out
