"""The in-memory model: states, labels, strands and probability tables.

A :class:`Model` is what a model directory (see :mod:`seqstate.io.tables`) holds,
as plain NumPy arrays:

* ``start[s]`` -- P(z_0 = s);
* ``transitions[s, t]`` -- P(z_{i+1} = t | z_i = s); a zero is a forbidden move;
* ``end[s]`` (optional) -- P(the sequence ends | z_last = s).  When an end table is
  given, each state's transitions *plus* its end probability sum to 1 (the end
  is one more way out of the state); without one, the transitions sum to 1 and
  any state may be the last;
* ``emissions[s, c, x]`` -- P(x_i = x | z_i = s, previous ``order`` symbols = c).
  The context index ``c`` reads the previous ``order`` symbols as digits in base
  ``len(alphabet)``, the oldest symbol most significant, so the most recent ``j``
  symbols are ``c % A**j``;
* ``lower_emissions[j]`` (optional, ``j < order``) -- rows for shorter contexts,
  shape ``(M, A**j, A)``, NaN where a row was not given.  The engine uses them
  where a context is cut short (record start, unknown base) and derives the rest.

Probabilities are plain (not log) float64.  Nothing here reads files or
sequences; :func:`validate` checks the semantic rules every model must meet.
"""

from __future__ import annotations

import hashlib
from collections import deque
from dataclasses import dataclass, field

import numpy as np

from seqstate.errors import ModelFormatError

#: Tolerance on every probability row sum.
SUM_TOLERANCE = 1e-6
#: Largest supported emission order.
MAX_ORDER = 8
DECODINGS = ("posterior", "viterbi")
STRANDS = ("+", "-")

#: Sequence Ontology accessions of labels the built-in models use.
SO_ACCESSIONS = {
    "CpG_island": "SO:0000307",
    "CDS": "SO:0000316",
    "intron": "SO:0000188",
    "exon": "SO:0000147",
    "gene": "SO:0000704",
    "mRNA": "SO:0000234",
    "five_prime_cis_splice_site": "SO:0000163",
    "three_prime_cis_splice_site": "SO:0000164",
    "start_codon": "SO:0000318",
    "stop_codon": "SO:0000319",
}


@dataclass(frozen=True)
class State:
    """One hidden state.

    ``label`` is the feature type the state reports (a Sequence Ontology term
    such as ``CpG_island`` or ``CDS``) or None for background; ``strand`` is
    ``'+'``, ``'-'`` or None.
    """

    name: str
    label: str | None = None
    strand: str | None = None


@dataclass(eq=False)
class Model:
    """A hidden Markov model over a declared alphabet (see module docstring)."""

    name: str
    description: str
    alphabet: str
    order: int
    states: tuple[State, ...]
    start: np.ndarray
    transitions: np.ndarray
    emissions: np.ndarray
    end: np.ndarray | None = None
    decode: str = "posterior"
    lower_emissions: dict[int, np.ndarray] = field(default_factory=dict)
    background_label: str | None = None
    provenance: dict = field(default_factory=dict)
    extra: dict = field(default_factory=dict)

    # -- derived views -------------------------------------------------
    @property
    def n_states(self) -> int:
        return len(self.states)

    @property
    def state_names(self) -> list[str]:
        return [s.name for s in self.states]

    @property
    def labels(self) -> list[str]:
        """Distinct non-empty labels, in order of first appearance among the states."""
        seen: list[str] = []
        for s in self.states:
            if s.label is not None and s.label not in seen:
                seen.append(s.label)
        return seen

    def label_index(self) -> np.ndarray:
        """Per state, the index of its label in :attr:`labels`, or -1 for none."""
        labels = self.labels
        return np.array(
            [labels.index(s.label) if s.label is not None else -1 for s in self.states],
            dtype=np.int64,
        )

    def states_of_label(self, label: str) -> np.ndarray:
        """Indices of the states that report ``label``."""
        return np.array([i for i, s in enumerate(self.states) if s.label == label], dtype=np.int64)

    def expected_stay(self) -> np.ndarray:
        """Expected run length in bases, 1 / (1 - p_stay), per state (inf if p_stay = 1)."""
        p = np.diag(self.transitions).astype(float)
        with np.errstate(divide="ignore"):
            return np.where(p < 1.0, 1.0 / (1.0 - p), np.inf)

    def allowed_transitions(self) -> list[tuple[int, int]]:
        """The (from, to) pairs with non-zero probability, row-major."""
        rows, cols = np.nonzero(self.transitions > 0)
        return list(zip(rows.tolist(), cols.tolist()))

    def equals(self, other: Model) -> bool:
        """Exact equality of every field and table (used for load/save round trips)."""
        if not isinstance(other, Model):
            return False
        same_meta = (
            self.name == other.name
            and self.description == other.description
            and self.alphabet == other.alphabet
            and self.order == other.order
            and self.states == other.states
            and self.decode == other.decode
            and self.background_label == other.background_label
            and self.provenance == other.provenance
            and self.extra == other.extra
        )
        if not same_meta:
            return False
        if (self.end is None) != (other.end is None):
            return False
        arrays = [(self.start, other.start), (self.transitions, other.transitions)]
        arrays.append((self.emissions, other.emissions))
        if self.end is not None:
            arrays.append((self.end, other.end))
        if set(self.lower_emissions) != set(other.lower_emissions):
            return False
        for j in self.lower_emissions:
            arrays.append((self.lower_emissions[j], other.lower_emissions[j]))
        return all(a.shape == b.shape and np.array_equal(a, b, equal_nan=True) for a, b in arrays)

    def context_string(self, order: int, index: int) -> str:
        """The k-mer string of context ``index`` at ``order`` (oldest symbol first)."""
        a = len(self.alphabet)
        chars = []
        for _ in range(order):
            chars.append(self.alphabet[index % a])
            index //= a
        return "".join(reversed(chars))


def make_model(
    *,
    name: str,
    alphabet: str,
    states: list[State] | tuple[State, ...],
    start,
    transitions,
    emissions,
    end=None,
    order: int | None = None,
    description: str = "",
    decode: str = "posterior",
    lower_emissions: dict[int, np.ndarray] | None = None,
    background_label: str | None = None,
    provenance: dict | None = None,
    extra: dict | None = None,
    check: bool = True,
) -> Model:
    """Build and validate a model from arrays.

    ``emissions`` may be ``(M, A)`` for order 0 or ``(M, A**k, A)`` for order k;
    ``order`` is inferred from its shape when not given.
    """
    emissions = np.asarray(emissions, dtype=np.float64)
    a = len(alphabet)
    if emissions.ndim == 2:
        emissions = emissions[:, None, :]
    if order is None:
        n_ctx = emissions.shape[1]
        order = 0
        while a**order < n_ctx:
            order += 1
    model = Model(
        name=name,
        description=description,
        alphabet=alphabet,
        order=int(order),
        states=tuple(states),
        start=np.asarray(start, dtype=np.float64).copy(),
        transitions=np.asarray(transitions, dtype=np.float64).copy(),
        emissions=emissions.copy(),
        end=None if end is None else np.asarray(end, dtype=np.float64).copy(),
        decode=decode,
        lower_emissions={
            int(j): np.asarray(v, dtype=np.float64) for j, v in (lower_emissions or {}).items()
        },
        background_label=background_label,
        provenance=dict(provenance or {}),
        extra=dict(extra or {}),
    )
    if check:
        validate(model)
    return model


def validate(model: Model, *, path: str | None = None) -> None:
    """Check shapes, sums, names, reachability; raise ModelFormatError on the first problem.

    Row sums are checked to :data:`SUM_TOLERANCE`.  ``path`` names the manifest in
    messages.
    """

    def fail(msg: str) -> None:
        raise ModelFormatError(msg, path=path)

    alphabet = model.alphabet
    if len(alphabet) < 1 or len(set(alphabet)) != len(alphabet):
        fail(f"alphabet {alphabet!r} must list distinct symbols")
    bad = [c for c in alphabet if c.isspace() or c in "#.\t" or ord(c) > 126 or ord(c) < 33]
    if bad:
        fail(f"alphabet symbol {bad[0]!r} is not allowed (printable ASCII other than '#' and '.')")
    if not 0 <= model.order <= MAX_ORDER:
        fail(f"emission order {model.order} is outside 0..{MAX_ORDER}")
    if model.decode not in DECODINGS:
        fail(f"decode {model.decode!r} is not one of {', '.join(DECODINGS)}")
    m = model.n_states
    if m == 0:
        fail("the model has no states")
    names = model.state_names
    seen: set[str] = set()
    for n in names:
        if not n or any(c.isspace() for c in n):
            fail(f"state name {n!r} is empty or contains white space")
        if n in seen:
            fail(f"duplicate state name {n!r}")
        seen.add(n)
    for s in model.states:
        if s.strand is not None and s.strand not in STRANDS:
            fail(f"state {s.name!r} has strand {s.strand!r}, expected '+', '-' or none")
    a = len(alphabet)
    k = model.order
    shapes = {
        "start": (model.start, (m,)),
        "transitions": (model.transitions, (m, m)),
        "emissions": (model.emissions, (m, a**k, a)),
    }
    if model.end is not None:
        shapes["end"] = (model.end, (m,))
    for j, arr in model.lower_emissions.items():
        if not 0 <= j < k:
            fail(f"lower-order emission rows of order {j} given for an order-{k} model")
        shapes[f"order-{j} emissions"] = (arr, (m, a**j, a))
    for what, (arr, shape) in shapes.items():
        if arr.shape != shape:
            fail(f"{what} table has shape {arr.shape}, expected {shape}")
        finite = arr[~np.isnan(arr)] if what.startswith("order-") else arr
        if not np.all(np.isfinite(finite)):
            fail(f"{what} table holds a non-finite value")
        if np.any(finite < 0):
            fail(f"{what} table holds a negative value")

    def check_sum(total: float, what: str) -> None:
        if abs(total - 1.0) > SUM_TOLERANCE:
            fail(f"{what} sums to {total:.9g}, expected 1 (tolerance {SUM_TOLERANCE:g})")

    check_sum(float(model.start.sum()), "start probabilities")
    for i, n in enumerate(names):
        total = float(model.transitions[i].sum())
        if model.end is not None:
            total += float(model.end[i])
            check_sum(total, f"transitions plus end of state {n!r}")
        else:
            check_sum(total, f"transitions of state {n!r}")
    tables = [(k, model.emissions)] + sorted(model.lower_emissions.items())
    for j, arr in tables:
        sums = arr.sum(axis=-1)
        bad = np.abs(sums - 1.0) > SUM_TOLERANCE
        if j != k:
            bad &= ~np.all(np.isnan(arr), axis=-1)
        if bad.any():
            i, c = (int(v) for v in np.argwhere(bad)[0])
            check_sum(
                float(sums[i, c]),
                f"emissions of state {names[i]!r} context {model.context_string(j, c) or '.'!r}",
            )
    check_reachability(model, path=path)


def check_reachability(model: Model, *, path: str | None = None) -> None:
    """Every state must be reachable from the start and able to reach an end."""
    allowed = model.transitions > 0
    m = model.n_states
    forward = _closure(np.flatnonzero(model.start > 0), allowed)
    for i in range(m):
        if not forward[i]:
            raise ModelFormatError(
                f"state {model.states[i].name!r} cannot be reached from the start", path=path
            )
    if model.end is not None:
        back = _closure(np.flatnonzero(model.end > 0), allowed.T)
        for i in range(m):
            if not back[i]:
                raise ModelFormatError(
                    f"no end can be reached from state {model.states[i].name!r}", path=path
                )


def _closure(seeds: np.ndarray, allowed: np.ndarray) -> np.ndarray:
    seen = np.zeros(allowed.shape[0], dtype=bool)
    queue = deque(int(s) for s in seeds)
    for s in queue:
        seen[s] = True
    while queue:
        s = queue.popleft()
        for t in np.flatnonzero(allowed[s]):
            if not seen[t]:
                seen[t] = True
                queue.append(int(t))
    return seen


def normalize_rows(model: Model) -> None:
    """Turn raw counts into probabilities in place (``normalize = true`` in a manifest)."""

    def norm(v: np.ndarray, what: str) -> np.ndarray:
        total = v.sum(axis=-1, keepdims=True)
        if np.any(total <= 0):
            raise ModelFormatError(f"{what}: a row sums to 0 and cannot be normalised")
        return v / total

    model.start = norm(model.start, "start probabilities")
    if model.end is not None:
        joined = np.concatenate([model.transitions, model.end[:, None]], axis=1)
        joined = norm(joined, "transitions")
        model.transitions = joined[:, :-1].copy()
        model.end = joined[:, -1].copy()
    else:
        model.transitions = norm(model.transitions, "transitions")
    model.emissions = norm(model.emissions, "emissions")
    for j, arr in list(model.lower_emissions.items()):
        out = arr.copy()
        given = ~np.all(np.isnan(arr), axis=-1)
        out[given] = norm(arr[given], "emissions")
        model.lower_emissions[j] = out


def sha256_of_text(parts: list[tuple[str, str]]) -> str:
    """SHA-256 hex digest of named text parts, in the given order."""
    h = hashlib.sha256()
    for name, text in parts:
        h.update(name.encode())
        h.update(b"\0")
        h.update(text.encode())
        h.update(b"\0")
    return h.hexdigest()
