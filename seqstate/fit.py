"""Fitting a model's tables to sequences: counting from known features, and Baum–Welch.

Two methods, usable together (counting first, then EM from the counted model):

**Counting from labels.**  Every base gets one state from the features that
cover it (GFF3 column 3 or BED column 4 is a label of the model; bases covered
by no feature take the model's background label, :attr:`Model.background_label`,
or, when that is None, the model's unlabelled states).  When a label has
several states, the model's *state rule* picks one per base (see
:func:`resolve_state_rule` and :func:`assign_states`, the one place the rules
live).  The counts of starts, transitions, ends (models with an end table) and
order-k emissions plus a pseudocount become probabilities.

State rules are declared in the model manifest as a ``[fit]`` table (kept in
:attr:`Model.extra`)::

    [fit]
    state_rule = "label_and_base"

``label`` (one state per label, and one unlabelled state), ``label_and_base``
(among the label's states, the one that emits the observed base: the
eight-state CpG layout, island_A..background_T) and ``label_and_strand`` (the
label's state on the feature's strand).  Without a declaration the rule is
inferred: ``label`` when every label (and the unlabelled group) has exactly one
state, else ``label_and_base`` when the model is order 0 and each state of a
multi-state label emits one distinct symbol with probability 1, else an error
asks for a declaration.  ``gene_structure`` reads a GFF3 gene annotation
(gene -> mRNA -> CDS with phase) through :func:`seqstate.genes.label_records`,
the labelling rule of the gene-segment layout (codon positions, intron copies
and splice chains, both strands).

**Baum–Welch (EM).**  Expected counts from a checkpointed forward–backward over
every record (:mod:`seqstate.engine.training`), pooled, then the same
normalisation; repeated until the relative gain ``(LL_i - LL_{i-1}) / |LL_{i-1}|``
falls below ``tol`` or ``max_iter`` updates have been made.

Rules shared by both:

* Zeros of the start model are structural: a forbidden transition, start or
  end, and a zero emission probability, stay exactly zero; pseudocounts are
  added only to the cells that are non-zero in the start model.  A labelled
  path that uses a forbidden move (or a zero emission) is an error naming the
  record, the 1-based position and the states.
* Emission counts come only from positions with a full order-k context (the
  emission code of :mod:`seqstate.engine.api` has j = k).  Positions within k
  bases of a record start or of an unknown base, and unknown bases themselves,
  count towards starts, transitions and ends but not towards emissions.  Their
  rows (the back-off rows, contexts shorter than k) are not re-estimated:
  counting drops any explicit back-off rows so that the engine derives them
  from the counted order-k table; EM holds them fixed at the EM start model's
  values (explicit rows as given, otherwise derived from its order-k table) and
  writes them explicitly, so that every EM update is an exact EM step (the
  log-likelihood never decreases) and the written model reproduces the
  reported log-likelihood.
* A row with no counts at all (a state never visited, with pseudocount 0) is
  kept from the start model and listed in the provenance.
* Frozen parts (``start``, ``transitions`` -- with the end table --,
  ``emissions``, or a state name: that state's transition row, end and
  emission rows) are copied from the start model unchanged.

Pseudocounts: ``--pseudocount`` defaults to 1 for counting and to 0 for EM (the
maximum-likelihood Baum–Welch update).  A value given explicitly applies to
both stages.  With a pseudocount p > 0 the EM update maximises
``LL + p * sum(log theta)`` over the cells that receive it (a Dirichlet prior);
that objective, not LL itself, is then the one that never decreases, and the
stop rule uses it.

Memory: the records are read whole; EM keeps their emission codes (one byte
per base for models with up to 255 codes) and works in O(M sqrt N) per record.

Coordinates: 0-based half-open inside; GFF3 is 1-based closed, BED 0-based
half-open; positions in messages are 1-based.  Log-likelihoods are natural logs.
"""

from __future__ import annotations

import hashlib
import math
import os
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from seqstate import __version__
from seqstate.engine import api, training
from seqstate.errors import (
    FeatureFormatError,
    ImpossibleSequenceError,
    ModelFormatError,
    SequenceFormatError,
    UsageError,
)
from seqstate.io.atomic import OutputSet, check_outputs
from seqstate.io.tables import MANIFEST, TABLE_FILES, load_model, model_sha256, render_tables
from seqstate.model import Model, make_model, validate

#: State rules that are implemented (see :func:`assign_states`).
STATE_RULES = ("label", "label_and_base", "label_and_strand", "gene_structure")
#: State rules the manifest may name but that are not available yet.  Extension point:
#: a gene model will need the codon position of each CDS base, taken from the GFF3
#: phase (column 8) of its CDS feature; add the rule to STATE_RULES and a branch to
#: assign_states (the per-base phase is already carried by LabelFeature).
PLANNED_STATE_RULES: dict[str, str] = {}
#: Keywords of ``--freeze`` (anything else must be a state name).
FREEZE_KEYWORDS = ("start", "transitions", "emissions")

_STRAND_CODE = {None: 0, "+": 1, "-": 2}
_STRAND_TEXT = {0: ".", 1: "+", 2: "-"}

Log = Callable[[str], None]


def _quiet(_: str) -> None:
    return None


def _s(n: int) -> str:
    return "" if n == 1 else "s"


# ================================================================ labels
@dataclass(frozen=True)
class LabelFeature:
    """One known feature: bases ``start0 .. end0 - 1`` of ``seqid`` carry ``label``.

    0-based half-open.  ``strand`` is '+', '-' or None; ``phase`` is the GFF3
    phase (0, 1, 2) or None; ``line0`` is the 0-based line of the file.
    """

    seqid: str
    start0: int
    end0: int
    label: str
    strand: str | None
    phase: int | None
    line0: int | None


def detect_label_format(path: str | os.PathLike) -> str:
    """``"gff3"`` or ``"bed"`` from the file name (``.gff3``/``.gff``/``.bed``, optionally
    ``.gz``), else from the content (a ``##gff-version`` line means GFF3)."""
    name = Path(path).name.lower()
    if name.endswith(".gz"):
        name = name[:-3]
    if name.endswith((".gff3", ".gff")):
        return "gff3"
    if name.endswith(".bed"):
        return "bed"
    from seqstate.io.fasta import open_input

    with open_input(path, FeatureFormatError, "GFF3 or BED") as handle:
        head = handle.read(4096)
    return "gff3" if head.lstrip().startswith(b"##gff-version") else "bed"


def read_labels(path: str | os.PathLike, model: Model, fmt: str = "auto") -> list[LabelFeature]:
    """The features of a GFF3 (1-based closed) or BED (0-based half-open) file.

    Every feature's type (GFF3 column 3) or name (BED column 4) must be a label
    of ``model``; a BED line without a name is read as the model's only label
    when it has exactly one.  Empty BED intervals (start = end) cover nothing
    and are dropped.  Raises :class:`FeatureFormatError` naming the line.
    """
    from seqstate.io.bed import read_bed
    from seqstate.io.fasta import display_name
    from seqstate.io.gff3 import iter_gff3

    shown = display_name(path)
    if fmt == "auto":
        fmt = detect_label_format(path)
    labels = model.labels
    known = ", ".join(f"'{x}'" for x in labels) or "none"
    out: list[LabelFeature] = []

    def check(label: str, line0: int, what: str) -> None:
        if label not in labels:
            raise FeatureFormatError(
                f"{what} '{label}' is not a label of model '{model.name}' (its labels: {known})",
                path=shown,
                line0=line0,
            )

    if fmt == "gff3":
        for f in iter_gff3(path):
            check(f.type, f.line0, "feature type")
            strand = f.strand if f.strand in ("+", "-") else None
            out.append(LabelFeature(f.seqid, f.start0, f.end0, f.type, strand, f.phase, f.line0))
    elif fmt == "bed":
        for b in read_bed(path):
            name = None if b.name in (None, "", ".") else b.name
            if name is None:
                if len(labels) != 1:
                    raise FeatureFormatError(
                        f"BED line has no name (column 4) and model '{model.name}' has "
                        f"{len(labels)} labels ({known}): name the label of every line",
                        path=shown,
                        line0=b.line0,
                    )
                name = labels[0]
            check(name, b.line0, "BED name")
            if b.end0 == b.start0:
                continue
            strand = b.strand if b.strand in ("+", "-") else None
            out.append(LabelFeature(b.seqid, b.start0, b.end0, name, strand, None, b.line0))
    else:
        raise UsageError(f"labels format '{fmt}' is not gff3, bed or auto")
    return out


def group_features(
    features: Sequence[LabelFeature], lengths: dict[str, int], path: str
) -> dict[str, list[LabelFeature]]:
    """Features by record, each inside its record; raises FeatureFormatError otherwise.

    ``lengths`` maps the FASTA record IDs to their lengths in bases.
    """
    by_record: dict[str, list[LabelFeature]] = {rid: [] for rid in lengths}
    for f in features:
        if f.seqid not in lengths:
            names = list(lengths)
            shown = ", ".join(f"'{x}'" for x in names[:5]) + (", ..." if len(names) > 5 else "")
            raise FeatureFormatError(
                f"seqid '{f.seqid}' is not a record of the FASTA input (records: {shown})",
                path=path,
                line0=f.line0,
            )
        n = lengths[f.seqid]
        if f.end0 > n:
            raise FeatureFormatError(
                f"feature {f.label} ends at position {f.end0} (1-based), past the end of the "
                f"record ({n} bases)",
                path=path,
                line0=f.line0,
                where=f"record '{f.seqid}'",
            )
        by_record[f.seqid].append(f)
    return by_record


@dataclass
class LabelTrack:
    """Per base of one record: label group and strand code, and the record's features.

    ``group[i]`` (int16) indexes :func:`label_groups`; ``strand[i]`` (int8) is 0
    (none), 1 ('+') or 2 ('-').  Three bytes per base; the feature behind a base
    is looked up only for messages.
    """

    group: np.ndarray
    strand: np.ndarray
    features: list[LabelFeature]

    def line0_at(self, pos: int) -> int | None:
        """0-based line of a feature covering 0-based ``pos`` (None if uncovered)."""
        f = _covering(self.features, pos)
        return f.line0 if f is not None else None


def _covering(features: Sequence[LabelFeature], pos: int) -> LabelFeature | None:
    for f in features:
        if f.start0 <= pos < f.end0:
            return f
    return None


def label_groups(model: Model) -> tuple[list[str], list[np.ndarray], int]:
    """(group names, states of each group, background group index).

    Groups are the model's labels in order, then the unlabelled states (name
    ``"(no label)"``).  Uncovered bases belong to the background group: the
    model's ``background_label`` or, when None, the unlabelled states.
    """
    names = list(model.labels) + ["(no label)"]
    states = [model.states_of_label(x) for x in model.labels]
    states.append(
        np.array([i for i, s in enumerate(model.states) if s.label is None], dtype=np.int64)
    )
    bg = model.labels.index(model.background_label) if model.background_label else len(names) - 1
    return names, states, bg


def paint_labels(
    model: Model, n: int, features: list[LabelFeature], *, record: str, path: str, rule: str
) -> LabelTrack:
    """Per-base label groups of one record of ``n`` bases; overlaps are checked.

    Features of the same label may overlap (their union counts).  Overlapping
    features of different labels are an error, and so, under the
    ``label_and_strand`` rule, are overlapping features of one label on
    different strands.
    """
    names, _, bg = label_groups(model)
    index = {x: i for i, x in enumerate(names[:-1])}
    group = np.full(n, -1, dtype=np.int16)
    strand = np.zeros(n, dtype=np.int8)
    for k, f in enumerate(features):
        g = index[f.label]
        sc = _STRAND_CODE[f.strand]
        seg = group[f.start0 : f.end0]
        clash = (seg >= 0) & (seg != g)
        if rule == "label_and_strand":
            clash |= (seg == g) & (strand[f.start0 : f.end0] != sc)
        if clash.any():
            j = int(np.flatnonzero(clash)[0])
            pos = f.start0 + j
            other = next(
                o
                for o in features[:k]
                if o.start0 <= pos < o.end0 and (o.label != f.label or _STRAND_CODE[o.strand] != sc)
            )
            what = (
                f"{other.label} ({_STRAND_TEXT[_STRAND_CODE[other.strand]]} strand)"
                if other.label == f.label
                else other.label
            )
            raise FeatureFormatError(
                f"feature {f.label} overlaps feature {what} of line {(other.line0 or 0) + 1} at "
                f"position {f.start0 + j + 1} (1-based): a base can carry one label only",
                path=path,
                line0=f.line0,
                where=f"record '{record}'",
            )
        seg[:] = g
        strand[f.start0 : f.end0] = sc
    group[group < 0] = bg
    return LabelTrack(group, strand, features)


# ================================================================ state rules
def resolve_state_rule(model: Model) -> str:
    """The model's rule that picks a state per labelled base (``[fit] state_rule``).

    Declared in the manifest as a ``[fit]`` table, e.g. ``state_rule =
    "label_and_base"``.  Without one: ``"label"`` when each label group (every
    label, and the unlabelled states if any) has exactly one state; else
    ``"label_and_base"`` when the model is order 0 and, in every group with
    several states, each state emits one symbol with probability 1 and no two
    emit the same one (the eight-state CpG layout); else a ModelFormatError
    asking for a declared rule.
    """
    fit_table = model.extra.get("fit", {})
    declared = fit_table.get("state_rule") if isinstance(fit_table, dict) else None
    if declared is not None:
        if declared in STATE_RULES:
            return declared
        if declared in PLANNED_STATE_RULES:
            raise ModelFormatError(
                f"[fit] state_rule '{declared}' ({PLANNED_STATE_RULES[declared]}) is not "
                f"available yet; implemented rules: {', '.join(STATE_RULES)}"
            )
        raise ModelFormatError(
            f"[fit] state_rule '{declared}' is unknown; expected one of {', '.join(STATE_RULES)}"
        )
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

    The one place the state rules live:

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
    names, groups, _ = label_groups(model)
    n_groups = len(names)
    g = track.group
    if rule == "label":
        table = np.full(n_groups, -1, dtype=np.int32)
        for k, st in enumerate(groups):
            if st.size == 1:
                table[k] = st[0]
            elif st.size > 1:
                raise ModelFormatError(
                    f"state rule 'label' needs one state per label, but {names[k]} has {st.size}"
                )
        states = table[g]
        bad = states < 0
        need = "state"
    elif rule == "label_and_base":
        a = len(model.alphabet)
        table = np.full((n_groups, a + 1), -1, dtype=np.int32)  # column a: unknown base
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
        states = table[g, col]
        bad = states == -1
        states[states == -2] = -1
        need = "state that emits the base"
    elif rule == "label_and_strand":
        table = np.full((n_groups, 3), -1, dtype=np.int32)
        for k, st in enumerate(groups):
            if st.size == 1:
                table[k, :] = st[0]
                continue
            for s in st:
                code = _STRAND_CODE[model.states[s].strand]
                if table[k, code] >= 0:
                    raise ModelFormatError(
                        f"state rule 'label_and_strand' needs one state per strand, but "
                        f"{names[k]} has two on strand {_STRAND_TEXT[code]}"
                    )
                table[k, code] = s
        states = table[g, track.strand]
        bad = states < 0
        need = "state on the feature's strand"
    elif rule in PLANNED_STATE_RULES:
        raise ModelFormatError(f"state rule '{rule}' is not available yet")
    else:
        raise ModelFormatError(f"unknown state rule '{rule}'")
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        k = int(g[i])
        detail = ""
        if rule == "label_and_base":
            detail = f" (base {model.alphabet[int(sym[i])]!r})"
        elif rule == "label_and_strand":
            detail = f" (strand {_STRAND_TEXT[int(track.strand[i])]})"
        what = "no label" if k == n_groups - 1 else f"label {names[k]}"
        raise FeatureFormatError(
            f"position {i + 1} (1-based) has {what}{detail} but the model has no {need} for "
            f"it under state rule '{rule}'",
            path=path,
            line0=track.line0_at(i),
            where=f"record '{record}'",
        )
    return states.astype(np.int32, copy=False)


# ================================================================ counts
@dataclass
class Counts:
    """Counts (or expected counts) of one or more records.

    ``start[s]``, ``transitions[s, t]``, ``end[s]`` (records ending in s) and
    ``emissions[s, c, x]`` (order-k context c, symbol x; full-order positions
    only).  ``loglik`` is the natural-log likelihood behind expected counts.
    """

    start: np.ndarray
    transitions: np.ndarray
    end: np.ndarray
    emissions: np.ndarray
    loglik: float = 0.0

    @classmethod
    def zeros(cls, model: Model) -> Counts:
        m, a, k = model.n_states, len(model.alphabet), model.order
        return cls(np.zeros(m), np.zeros((m, m)), np.zeros(m), np.zeros((m, a**k, a)))

    def add(self, other: Counts) -> None:
        self.start += other.start
        self.transitions += other.transitions
        self.end += other.end
        self.emissions += other.emissions
        self.loglik += other.loglik


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


def _require_label_units(features: Sequence[LabelFeature], model: Model, path: str) -> None:
    """Counting needs at least one feature of every label (the background label aside)."""
    labels = [x for x in model.labels if x != model.background_label]
    if not features:
        raise FeatureFormatError(
            "has no features: counting needs at least one feature of each label of model "
            f"'{model.name}' ({', '.join(labels) or 'none'})",
            path=path,
        )
    present = {f.label for f in features}
    missing = [x for x in labels if x not in present]
    if missing:
        raise FeatureFormatError(
            f"has no feature of label {', '.join(missing)} (found only "
            f"{', '.join(sorted(present))}): every label of model '{model.name}' needs at "
            "least one feature to count from",
            path=path,
        )


def _require_gene_units(features, pairs, report, model: Model, path: str) -> None:
    """A gene annotation must give at least one usable gene, and an example of every
    label (a coding exon and an intron)."""
    if report.used == 0:
        n_cds = sum(1 for f in features if f.type == "CDS")
        n_mrna = sum(1 for f in features if f.type == "mRNA")
        if not features:
            what = "has no features"
        elif n_cds == 0:
            what = f"has no CDS feature ({len(features)} feature(s) of other types)"
        elif not any(f.values("Parent") for f in features if f.type == "CDS"):
            what = (
                f"has {n_cds} CDS feature(s) but none with a Parent ({n_mrna} mRNA feature(s)): "
                "flat features are not genes"
            )
        else:
            skipped = ", ".join(f"{v} ({k})" for k, v in sorted(report.skipped.items()))
            what = f"has no gene the layout can use (skipped: {skipped or 'none'})"
        raise FeatureFormatError(
            f"{what}; counting model '{model.name}' needs gene -> mRNA -> CDS hierarchies "
            "with CDS phases",
            path=path,
        )
    for label in model.labels:
        idx = model.states_of_label(label)
        if not any(np.isin(states, idx).any() for _, states in pairs):
            raise FeatureFormatError(
                f"the {report.used} usable gene(s) have no base of label {label} (e.g. no "
                f"intron): every label of model '{model.name}' needs at least one example",
                path=path,
            )


# ================================================================ estimation
@dataclass(frozen=True)
class Frozen:
    """Parts copied unchanged from the start model (see module docstring)."""

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
    frozen: Frozen = Frozen(),
    lower: dict[int, np.ndarray] | None = None,
) -> tuple[Model, list[str]]:
    """New tables from ``counts`` (see module docstring); returns (model, rows kept).

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
        if model.end is not None:
            row, ok = _normalise(
                np.append(counts.transitions[s], counts.end[s]),
                np.append(model.transitions[s], model.end[s]),
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
    new = make_model(
        name=model.name,
        description=model.description,
        alphabet=model.alphabet,
        states=model.states,
        start=start,
        transitions=trans,
        emissions=emis,
        end=end,
        order=k,
        decode=model.decode,
        lower_emissions=new_lower,
        background_label=model.background_label,
        provenance=dict(model.provenance),
        extra=dict(model.extra),
        check=False,
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


# ================================================================ EM
def fixed_backoff(model: Model) -> dict[int, np.ndarray]:
    """Complete back-off rows of ``model`` (explicit where given, else derived)."""
    return {j: v.copy() for j, v in api.backoff_rows(model).items()}


def with_backoff(model: Model, lower: dict[int, np.ndarray]) -> Model:
    """A copy of ``model`` whose back-off rows are exactly ``lower`` (all explicit)."""
    return make_model(
        name=model.name,
        description=model.description,
        alphabet=model.alphabet,
        states=model.states,
        start=model.start,
        transitions=model.transitions,
        emissions=model.emissions,
        end=model.end,
        order=model.order,
        decode=model.decode,
        lower_emissions={j: v.copy() for j, v in lower.items()},
        background_label=model.background_label,
        provenance=dict(model.provenance),
        extra=dict(model.extra),
        check=False,
    )


def expected_counts(
    model: Model,
    codes_list: Sequence[np.ndarray],
    *,
    lower: dict[int, np.ndarray],
    record_ids: Sequence[str] | None = None,
    path: str | None = None,
    mode: int | None = None,
) -> Counts:
    """E-step: expected counts pooled over records, and the total log-likelihood (nat).

    ``lower`` are the back-off rows in use (see :func:`fixed_backoff`).  Raises
    ImpossibleSequenceError (naming the record and ``path``) for a record of
    probability zero.
    """
    tt = training.training_tables(model, lower, mode=mode)
    acc = training.Accumulators.zeros(tt)
    total = 0.0
    for r, codes in enumerate(codes_list):
        ll, fail = training.accumulate(tt, codes, acc)
        if fail >= 0:
            rid = record_ids[r] if record_ids is not None else str(r + 1)
            if fail >= codes.shape[0]:
                msg = (
                    "has probability zero under the model: no state that may end the "
                    "record can be reached at its last base"
                )
            else:
                msg = (
                    "has probability zero under the model: every state is impossible at "
                    f"position {fail + 1} (1-based)"
                )
            raise ImpossibleSequenceError(msg, path=path, where=f"record '{rid}'")
        total += ll
    m, a, k = model.n_states, len(model.alphabet), model.order
    lo, hi = int(tt.offsets[k]), int(tt.offsets[k + 1])
    emis = acc.emit[lo:hi].reshape(a**k, a, m).transpose(2, 0, 1).copy()
    return Counts(acc.start.copy(), acc.trans.copy(), acc.end.copy(), emis, total)


def em_step(
    model: Model,
    codes_list: Sequence[np.ndarray],
    *,
    lower: dict[int, np.ndarray],
    pseudocount: float = 0.0,
    frozen: Frozen = Frozen(),
    record_ids: Sequence[str] | None = None,
    path: str | None = None,
    mode: int | None = None,
) -> tuple[Model, float, list[str]]:
    """One Baum–Welch update: (new model, log-likelihood of ``model``, rows kept)."""
    counts = expected_counts(
        model, codes_list, lower=lower, record_ids=record_ids, path=path, mode=mode
    )
    new, kept = estimate(model, counts, pseudocount=pseudocount, frozen=frozen, lower=lower)
    return new, counts.loglik, kept


@dataclass
class EMResult:
    """Outcome of :func:`baum_welch`.

    ``model`` is the written model, ``loglik`` its log-likelihood (natural log)
    and ``objective`` the value the stop rule uses (equal to ``loglik`` with
    pseudocount 0); ``iterations`` counts updates; ``history`` holds
    (iteration, loglik, objective) from iteration 0 (the start model).
    """

    model: Model
    loglik: float
    objective: float
    iterations: int
    stop_reason: str
    converged: bool
    history: list[tuple[int, float, float]] = field(default_factory=list)
    kept_rows: list[str] = field(default_factory=list)


def baum_welch(
    model: Model,
    codes_list: Sequence[np.ndarray],
    *,
    max_iter: int = 50,
    tol: float = 1e-4,
    pseudocount: float = 0.0,
    frozen: Frozen = Frozen(),
    record_ids: Sequence[str] | None = None,
    path: str | None = None,
    log: Log = _quiet,
    mode: int | None = None,
) -> EMResult:
    """Baum–Welch from ``model`` over the encoded records (pooled).

    Iteration i evaluates the model after i updates (iteration 0: the start
    model) and prints one line: log-likelihood, change and relative gain
    ``(LL_i - LL_{i-1}) / |LL_{i-1}|`` (of the objective when the pseudocount
    is positive).  Stops when the relative gain is below ``tol`` ("converged")
    or after ``max_iter`` updates.  If the objective ever falls (rounding), the
    better previous model is kept.  Back-off rows are held fixed (module
    docstring).  Forbidden transitions and zero emissions stay exactly zero.
    """
    if max_iter < 0:
        raise UsageError(f"--max-iter {max_iter} must be at least 0")
    if not tol >= 0:
        raise UsageError(f"--tol {tol} must be a number >= 0")
    lower = fixed_backoff(model)
    current = with_backoff(model, lower) if lower else model
    history: list[tuple[int, float, float]] = []
    kept: list[str] = []
    prev_obj = None
    prev_model = None
    prev_ll = math.nan
    it = 0
    while True:
        t0 = time.perf_counter()
        counts = expected_counts(
            current, codes_list, lower=lower, record_ids=record_ids, path=path, mode=mode
        )
        ll = counts.loglik
        obj = objective(current, ll, pseudocount=pseudocount, frozen=frozen)
        history.append((it, ll, obj))
        extra = f"  objective {obj:.6f}" if pseudocount else ""
        if prev_obj is None:
            log(f"em: iteration {it:3d}  loglik {ll:.6f}{extra}  (start model)")
            gain = math.inf
        else:
            delta = obj - prev_obj
            gain = delta / abs(prev_obj) if prev_obj != 0 else 0.0
            log(
                f"em: iteration {it:3d}  loglik {ll:.6f}{extra}  change {delta:+.6g}  "
                f"relative {gain:+.3e}  ({time.perf_counter() - t0:.2f} s)"
            )
        what = "objective" if pseudocount else "log-likelihood"
        if prev_obj is not None and gain < 0 and prev_model is not None:
            reason = (
                f"stopped after {it} iteration{_s(it)}: the {what} fell by {prev_obj - obj:.3g} "
                f"(rounding), kept the model of iteration {it - 1}"
            )
            return EMResult(prev_model, prev_ll, prev_obj, it - 1, reason, True, history, kept)
        if prev_obj is not None and gain < tol:
            reason = (
                f"converged after {it} iteration{_s(it)}: relative gain {gain:.3e} "
                f"(change / |previous {what}|) below --tol {tol:g}"
            )
            return EMResult(current, ll, obj, it, reason, True, history, kept)
        if it >= max_iter:
            last = "" if prev_obj is None else f", last relative gain {gain:.3e}"
            reason = f"stopped at --max-iter {max_iter}{last} (not converged to --tol {tol:g})"
            return EMResult(current, ll, obj, it, reason, False, history, kept)
        new, kept = estimate(current, counts, pseudocount=pseudocount, frozen=frozen, lower=lower)
        prev_model, prev_obj, prev_ll = current, obj, ll
        current = new
        it += 1


# ================================================================ the command
@dataclass
class FitOptions:
    """Everything ``seqstate fit`` was asked to do."""

    model: str
    fasta: str
    out: str
    labels: str | None = None
    labels_format: str = "auto"
    em: bool = False
    max_iter: int = 50
    tol: float = 1e-4
    freeze: list[str] = field(default_factory=list)
    pseudocount: float | None = None
    masked: str = "base"
    name: str | None = None
    force: bool = False
    command_line: list[str] = field(default_factory=list)
    bad_genes: str = "skip"


@dataclass
class FitReport:
    """What ``fit`` did: the model written, where, and its provenance."""

    model: Model
    out: Path
    loglik: float
    method: str
    iterations: int
    stop_reason: str


def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 (hex) of a file's bytes as stored (compressed files are not unpacked)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _model_file_names() -> list[str]:
    """The files a model folder of ours consists of: manifest and tables."""
    return [MANIFEST, *TABLE_FILES.values()]


def _check_output(out: Path, force: bool, inputs: Sequence[str | os.PathLike | None] = ()) -> None:
    """The overwrite rule for a model folder: its own files (manifest and tables) are
    the outputs; the folder may exist and hold other files, which are never touched."""
    if not str(out):
        raise UsageError("-o/--out is empty: expected a model folder name")
    if (out.exists() or out.is_symlink()) and not out.is_dir():
        raise UsageError(f"output '{out}' exists and is not a folder: not replaced")
    files = [out / name for name in _model_file_names()]
    check_outputs(files, inputs, force=True)  # an input among them: always refused
    present = [f.name for f in files if f.exists() or f.is_symlink()]
    if present and not force:
        raise UsageError(
            f"output '{out}' already exists as a model ({', '.join(present)}): use --force "
            "to replace the model's files (other files in the folder are kept)"
        )


def write_model_folder(
    model: Model,
    out: str | os.PathLike,
    *,
    force: bool = False,
    inputs: Sequence[str | os.PathLike | None] = (),
) -> Path:
    """Write ``model``'s manifest and tables into the folder ``out`` all-or-nothing.

    The files are staged inside ``out``, read back and checked, then committed
    together (see :mod:`seqstate.io.atomic`).  Only the model's own files are
    written; with ``force`` existing ones are replaced, and any other file in
    the folder is left as it is.  ``inputs`` are never overwritten.  Returns the
    folder.
    """
    out = Path(out)
    _check_output(out, force, inputs)
    with OutputSet(out, force=force, inputs=inputs) as outs:
        stage = None
        for name, text in render_tables(model):
            with outs.open_text(name) as fh:
                fh.write(text)
                stage = Path(fh.name).parent
        back = load_model(stage)
        if not back.equals(model):
            raise RuntimeError("the written model does not read back identically")
    return out


def _read_sequences(path: str, model: Model) -> list:
    from seqstate.commands.inputs import read_records

    records = read_records(path, model)
    if not set(model.alphabet) <= set("ACGT"):
        allowed = set(model.alphabet) | set(model.alphabet.lower()) | set(model.alphabet.upper())
        for rec in records:
            text = rec.seq.decode("ascii", errors="replace")
            bad = [i for i, ch in enumerate(text) if ch not in allowed][:1]
            if bad:
                raise SequenceFormatError(
                    f"position {bad[0] + 1} has character {text[bad[0]]!r}, expected one of "
                    f"the model's symbols {model.alphabet!r}",
                    path=path,
                    where=f"record '{rec.id}'",
                )
    return records


def _fit_inputs(opts: FitOptions) -> list:
    from seqstate.commands.inputs import model_inputs

    return [opts.fasta, opts.labels, *model_inputs(opts.model)]


def fit(opts: FitOptions, *, log: Log = _quiet) -> FitReport:
    """Run ``seqstate fit``: count from labels and/or refine by EM; write the model folder.

    Nothing is written unless the whole run succeeds.
    """
    if not opts.labels and not opts.em:
        raise UsageError("nothing to do: give --labels FILE (counting), --em (Baum-Welch) or both")
    if opts.fasta == "-" or opts.labels == "-":
        raise UsageError(
            "--fasta and --labels need files (their SHA-256 goes into the provenance), not '-'"
        )
    if opts.pseudocount is not None and not (
        opts.pseudocount >= 0 and math.isfinite(opts.pseudocount)
    ):
        raise UsageError(f"--pseudocount {opts.pseudocount} must be a finite number >= 0")
    if opts.masked not in ("base", "unknown"):
        raise UsageError(f"--masked {opts.masked!r} is not base or unknown")
    if opts.em and opts.max_iter < 0:
        raise UsageError(f"--max-iter {opts.max_iter} must be at least 0")
    if opts.em and not opts.tol >= 0:
        raise UsageError(f"--tol {opts.tol} must be a number >= 0")
    out = Path(opts.out)
    inputs = _fit_inputs(opts)
    _check_output(out, opts.force, inputs)
    start_model = load_model(opts.model)
    frozen = parse_freeze(start_model, opts.freeze)
    rule = resolve_state_rule(start_model) if opts.labels else None
    for p, what in ((opts.fasta, "FASTA"), (opts.labels, "labels")):
        if p and not Path(p).is_file():
            err = SequenceFormatError if what == "FASTA" else FeatureFormatError
            raise err("file not found" if not Path(p).exists() else "is not a file", path=p)
    records = _read_sequences(opts.fasta, start_model)
    tables = api.prepare(start_model)
    masked = opts.masked == "unknown"
    ids = [r.id for r in records]
    lengths = {r.id: len(r.seq) for r in records}
    total_bases = sum(lengths.values())
    log(f"fit: {len(records)} record(s), {total_bases} bases from {opts.fasta}")
    pc_count = 1.0 if opts.pseudocount is None else float(opts.pseudocount)
    pc_em = 0.0 if opts.pseudocount is None else float(opts.pseudocount)
    model = start_model
    labelling_report: dict | None = None
    kept: list[str] = []
    methods: list[str] = []
    n_features = 0
    unseen: list[str] = []
    codes_list = []
    if opts.labels and rule == "gene_structure":
        from seqstate.io.gff3 import read_gff3
        from seqstate.kinds import gene_labels as genes

        features = read_gff3(opts.labels)
        n_features = len(features)
        pairs, gene_report = genes.label_records(
            start_model, records, features, path=opts.labels, bad_genes=opts.bad_genes
        )
        _require_gene_units(features, pairs, gene_report, start_model, opts.labels)
        counts = Counts.zeros(start_model)
        for k, (seq, states) in enumerate(pairs):
            rid = records[k // 2].id + ("" if k % 2 == 0 else " (reverse complement)")
            codes = api.encode(tables, seq, masked_unknown=masked)
            counts.add(count_path(start_model, tables, codes, states, record=rid, path=opts.labels))
            if k % 2 == 0:
                codes_list.append(codes)
        pool_counts(start_model, counts)
        unseen = states_without_counts(start_model, counts)
        model, kept = estimate(start_model, counts, pseudocount=pc_count, frozen=frozen)
        methods.append("counting from a gene annotation")
        log(
            f"fit: genes used {gene_report.used}, skipped "
            + (", ".join(f"{v} ({k})" for k, v in sorted(gene_report.skipped.items())) or "none")
        )
        labelling_report = gene_report.as_dict()
    elif opts.labels:
        features = read_labels(opts.labels, start_model, opts.labels_format)
        n_features = len(features)
        by_record = group_features(features, lengths, opts.labels)
        _require_label_units(features, start_model, opts.labels)
        counts = Counts.zeros(start_model)
        for rec in records:
            track = paint_labels(
                start_model,
                len(rec.seq),
                by_record[rec.id],
                record=rec.id,
                path=opts.labels,
                rule=rule,
            )
            sym = api.symbols_of(tables, rec.seq, masked_unknown=masked)
            states = assign_states(start_model, rule, track, sym, record=rec.id, path=opts.labels)
            codes = api.encode(tables, rec.seq, masked_unknown=masked)
            counts.add(
                count_path(
                    start_model, tables, codes, states, record=rec.id, path=opts.labels, track=track
                )
            )
            codes_list.append(codes)
        unseen = states_without_counts(start_model, counts)
        model, kept = estimate(start_model, counts, pseudocount=pc_count, frozen=frozen)
        methods.append("counting from labels")
        log(
            f"fit: counted the states of {n_features} feature(s) (state rule '{rule}', "
            f"pseudocount {pc_count:g})"
        )
    else:
        codes_list = [api.encode(tables, r.seq, masked_unknown=masked) for r in records]
    del records
    if unseen:
        log(
            f"fit: warning: {len(unseen)} state(s) had no counts, their probabilities come "
            f"from the pseudocount alone: {', '.join(unseen)}"
        )
    iterations = 0
    stop_reason = "counting only (no EM)"
    if opts.em:
        try:
            res = baum_welch(
                model,
                codes_list,
                max_iter=opts.max_iter,
                tol=opts.tol,
                pseudocount=pc_em,
                frozen=frozen,
                record_ids=ids,
                path=opts.fasta,
                log=log,
            )
        except ImpossibleSequenceError as exc:
            if opts.labels:
                raise ImpossibleSequenceError(
                    f"{exc.message}; the model is the one counted from the labels, and a "
                    "--pseudocount above 0 keeps the moves they never show possible",
                    path=exc.path,
                    where=exc.where,
                ) from None
            raise
        model = res.model
        kept = sorted(set(kept) | set(res.kept_rows))
        final_ll = res.loglik
        iterations = res.iterations
        stop_reason = res.stop_reason
        methods.append("Baum-Welch (EM)")
        log(f"em: {stop_reason}")
    else:
        fitted_tables = api.prepare(model)
        try:
            final_ll = float(sum(api.loglik(fitted_tables, c) for c in codes_list))
        except ImpossibleSequenceError:
            final_ll = -math.inf
            log(
                "fit: warning: a record has probability zero under the counted model "
                "(an unseen move between known states; a --pseudocount above 0 avoids it)"
            )
    prov: dict = {
        "tool": f"seqstate {__version__}",
        "command_line": " ".join(opts.command_line) if opts.command_line else "",
        "method": ", then ".join(methods),
        "start_model": start_model.name,
        "start_model_sha256": model_sha256(start_model),
        "fasta": str(opts.fasta),
        "fasta_sha256": file_sha256(opts.fasta),
    }
    if opts.labels:
        prov.update(
            {
                "labels": str(opts.labels),
                "labels_sha256": file_sha256(opts.labels),
                "labels_features": n_features,
                "state_rule": rule,
                "pseudocount_counting": pc_count,
            }
        )
    if labelling_report is not None:
        prov["labelling"] = labelling_report
    prov["records"] = len(ids)
    prov["bases"] = total_bases
    prov["masked"] = opts.masked
    if opts.em:
        prov.update(
            {
                "pseudocount_em": pc_em,
                "max_iter": opts.max_iter,
                "tol": opts.tol,
                "iterations": iterations,
            }
        )
    prov["stop_reason"] = stop_reason
    prov["frozen"] = frozen.describe(start_model)
    prov["loglik_nat"] = final_ll
    prov["log_base"] = "natural log"
    prov["rows_without_counts_kept"] = kept
    if opts.labels:
        prov["states_without_counts"] = unseen
    prov["emission_counts"] = "full-order contexts only; back-off rows " + (
        "held at the EM start model's and listed explicitly"
        if opts.em
        else "derived from the counted table"
    )
    name = opts.name or out.name or "fitted"
    description = (
        f"Fitted by seqstate fit ({prov['method']}) from model '{start_model.name}' "
        f"on {Path(opts.fasta).name}"
        + (f" with the features of {Path(opts.labels).name}" if opts.labels else "")
        + "; see [provenance]. Start model: "
        + start_model.description
    )
    final = make_model(
        name=name,
        description=description,
        alphabet=model.alphabet,
        states=model.states,
        start=model.start,
        transitions=model.transitions,
        emissions=model.emissions,
        end=model.end,
        order=model.order,
        decode=model.decode,
        lower_emissions=model.lower_emissions,
        background_label=model.background_label,
        provenance=prov,
        extra=dict(start_model.extra),
        check=False,
    )
    try:
        validate(final)
    except ModelFormatError as exc:
        raise ModelFormatError(
            f"the fitted model is not valid ({exc.message}); a --pseudocount above 0 keeps "
            "every allowed move possible"
        ) from None
    write_model_folder(final, out, force=opts.force, inputs=inputs)
    return FitReport(final, out, final_ll, prov["method"], iterations, stop_reason)


def stderr_log(line: str) -> None:
    """Write one progress line to standard error."""
    sys.stderr.write(line + "\n")
    sys.stderr.flush()
