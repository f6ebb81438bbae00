"""State rules of ``seqstate fit``: which state of a label each known base is in.

When a label has several states, the model's *state rule* picks one per base.
State rules are declared in the model manifest as a ``[fit]`` table (kept in
:attr:`Model.extra`)::

    [fit]
    state_rule = "label_and_base"

``label`` (one state per label, and one unlabelled state), ``label_and_base``
(among the label's states, the one that emits the observed base: the
eight-state CpG layout, island_A..background_T) and ``label_and_strand`` (the
label's state on the feature's strand).  Without a declaration the rule is
inferred (:func:`default_state_rule`): ``label`` when every label (and the
unlabelled group) has exactly one state, else ``label_and_base`` when the model
is order 0 and each state of a multi-state label emits one distinct symbol with
probability 1, else an error asks for a declaration.  ``gene_structure`` reads a
GFF3 gene annotation (gene -> mRNA -> CDS with phase) through
:func:`seqstate.kinds.gene_labels.label_records`, the labelling rule of the gene-segment
layout (codon positions, intron copies and splice chains, both strands); see
:func:`.labels.read_gene_labels`.  :func:`assign_states` is the one place the
per-base rules live.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from seqstate.commands.fit.labels import STRAND_CODE, STRAND_TEXT, LabelTrack, label_groups
from seqstate.errors import FeatureFormatError, ModelFormatError
from seqstate.model import Model

#: State rules that are implemented (see :func:`assign_states`; ``gene_structure``
#: labels whole records through the gene layout instead).
STATE_RULES = ("label", "label_and_base", "label_and_strand", "gene_structure")


def resolve_state_rule(model: Model) -> str:
    """The model's rule that picks a state per labelled base (``[fit] state_rule``).

    Declared in the manifest as a ``[fit]`` table, e.g. ``state_rule =
    "label_and_base"``; without one, :func:`default_state_rule`.
    """
    fit_table = model.extra.get("fit", {})
    declared = fit_table.get("state_rule") if isinstance(fit_table, dict) else None
    if declared is not None:
        if declared in STATE_RULES:
            return str(declared)
        raise ModelFormatError(
            f"[fit] state_rule '{declared}' is unknown; expected one of {', '.join(STATE_RULES)}"
        )
    return default_state_rule(model)


def default_state_rule(model: Model) -> str:
    """The state rule of a model whose manifest declares none.

    ``"label"`` when each label group (every label, and the unlabelled states if
    any) has exactly one state; else ``"label_and_base"`` when the model is order 0
    and, in every group with several states, each state emits one symbol with
    probability 1 and no two emit the same one (the eight-state CpG layout); else a
    ModelFormatError asking for a declared rule.
    """
    names, groups, _ = label_groups(model)
    multi = [(nm, g) for nm, g in zip(names, groups) if g.size > 1]
    if not multi:
        return "label"
    if model.order == 0 and all(_base_table(model, g) is not None for _, g in multi):
        return "label_and_base"
    nm = multi[0][0]
    raise ModelFormatError(
        f"model '{model.name}': label {nm} has {multi[0][1].size} states and the manifest "
        "declares no rule to pick one per base; add a [fit] table with state_rule = "
        f"one of {', '.join(repr(r) for r in STATE_RULES)}"
    )


def _base_table(model: Model, states: np.ndarray) -> np.ndarray | None:
    """Symbol -> state among ``states`` when each emits one distinct symbol with
    probability 1 (order 0); None otherwise."""
    if model.order != 0:
        return None
    table = np.full(len(model.alphabet), -1, dtype=np.int64)
    for s in states:
        row = model.emissions[s, 0]
        nz = np.flatnonzero(row > 0)
        if nz.size != 1 or row[nz[0]] != 1.0 or table[nz[0]] >= 0:
            return None
        table[nz[0]] = s
    return table


def assign_states(
    model: Model, rule: str, track: LabelTrack, sym: np.ndarray, *, record: str, path: str
) -> np.ndarray:
    """The state of every base of one record (int32; -1 where it cannot be told).

    The one place the per-base state rules live (:data:`PER_BASE_RULES`):

    * ``label``: the group's only state;
    * ``label_and_base``: the state of the group that emits the observed base
      (a group of one state takes every base); at an unknown base the state
      cannot be told (-1);
    * ``label_and_strand``: the group's state on the feature's strand (an
      unstranded feature, or an uncovered base, takes the unstranded state); a
      group of one state takes every strand.

    ``sym`` holds the symbol indices (-1 unknown).  Raises FeatureFormatError
    (with the feature's line) where the group has no fitting state.
    """
    if rule not in PER_BASE_RULES:
        raise ModelFormatError(f"unknown state rule '{rule}'")
    pick, need = PER_BASE_RULES[rule]
    names, groups, _ = label_groups(model)
    states, bad = pick(model, names, groups, track, sym)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        k = int(track.group[i])
        detail = ""
        if rule == "label_and_base":
            detail = f" (base {model.alphabet[int(sym[i])]!r})"
        elif rule == "label_and_strand":
            detail = f" (strand {STRAND_TEXT[int(track.strand[i])]})"
        what = "no label" if k == len(names) - 1 else f"label {names[k]}"
        raise FeatureFormatError(
            f"position {i + 1} (1-based) has {what}{detail} but the model has no {need} for "
            f"it under state rule '{rule}'",
            path=path,
            line0=track.line0_at(i),
            where=f"record '{record}'",
        )
    return states.astype(np.int32, copy=False)


def _by_label(
    model: Model, names: list[str], groups: list[np.ndarray], track: LabelTrack, sym: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Rule ``label``: (state per base, where no state fits)."""
    table = np.full(len(names), -1, dtype=np.int32)
    for k, st in enumerate(groups):
        if st.size == 1:
            table[k] = st[0]
        elif st.size > 1:
            raise ModelFormatError(
                f"state rule 'label' needs one state per label, but {names[k]} has {st.size}"
            )
    states = table[track.group]
    return states, states < 0


def _by_label_and_base(
    model: Model, names: list[str], groups: list[np.ndarray], track: LabelTrack, sym: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Rule ``label_and_base``: (state per base, where no state fits); -1 at unknown bases."""
    a = len(model.alphabet)
    table = np.full((len(names), a + 1), -1, dtype=np.int32)  # column a: unknown base
    for k, st in enumerate(groups):
        if st.size == 1:
            table[k, :] = st[0]
        elif st.size > 1:
            bt = _base_table(model, st)
            if bt is None:
                raise ModelFormatError(
                    f"state rule 'label_and_base' needs the states of {names[k]} to emit "
                    "one distinct symbol each with probability 1 (order 0)"
                )
            table[k, :a] = bt
            table[k, a] = -2  # undetermined, not an error
    col = np.where(sym < 0, a, sym)
    states = table[track.group, col]
    bad = states == -1
    states[states == -2] = -1
    return states, bad


def _by_label_and_strand(
    model: Model, names: list[str], groups: list[np.ndarray], track: LabelTrack, sym: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Rule ``label_and_strand``: (state per base, where no state fits)."""
    table = np.full((len(names), 3), -1, dtype=np.int32)
    for k, st in enumerate(groups):
        if st.size == 1:
            table[k, :] = st[0]
            continue
        for s in st:
            code = STRAND_CODE[model.states[s].strand]
            if table[k, code] >= 0:
                raise ModelFormatError(
                    f"state rule 'label_and_strand' needs one state per strand, but "
                    f"{names[k]} has two on strand {STRAND_TEXT[code]}"
                )
            table[k, code] = s
    states = table[track.group, track.strand]
    return states, states < 0


_Pick = Callable[
    [Model, list[str], list[np.ndarray], LabelTrack, np.ndarray], tuple[np.ndarray, np.ndarray]
]
#: Per-base state rules: name -> (state picker, what a message says is missing).
PER_BASE_RULES: dict[str, tuple[_Pick, str]] = {
    "label": (_by_label, "state"),
    "label_and_base": (_by_label_and_base, "state that emits the base"),
    "label_and_strand": (_by_label_and_strand, "state on the feature's strand"),
}
