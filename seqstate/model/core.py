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
  where a context is cut short (record start, unknown base) and derives the rest;
* ``mask[s]`` (optional) -- P(a base is soft-masked, lowercase | z_i = s): the mask as
  an observed channel beside the base, used when a run reads lowercase bases as
  evidence (``--masked evidence``); the base and its mask are independent given
  the state, and an unknown base carries no mask evidence.  A mask *chain* has shape
  ``(M, 3)``: P(masked | s) at a base with no known base before it (record start,
  after an unknown base), after a masked base, and after an unmasked one: soft-masking
  comes in runs, and the chain scores a run by its start and length, not base by base.

Probabilities are plain (not log) float64.  Nothing here reads files or
sequences; :func:`validate` checks the semantic rules every model must meet.
"""

from __future__ import annotations

import hashlib
import math
import re
from collections import deque
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike

from seqstate.errors import ModelFormatError
from seqstate.model.recalibration import Recalibration

#: Tolerance on every probability row sum.
SUM_TOLERANCE = 1e-6
#: Largest supported emission order.
MAX_ORDER = 8
DECODINGS = ("posterior", "viterbi")
STRANDS = ("+", "-")
#: Largest emission table a model may declare: states x symbols**(order + 1)
#: probabilities, 2**24 (128 MiB as float64).  Checked before anything is allocated.
MAX_EMISSION_CELLS = 2**24
#: Largest transition table a model may declare: states**2 probabilities, 2**24 (128 MiB as
#: float64), that is at most 4,096 states.  Checked from the manifest alone, before any
#: table is read or allocated.
MAX_TRANSITION_CELLS = 2**24
#: The memory budget of a model's arrays: transitions (states**2), emissions (states x
#: symbols**(order + 1)) and back-off rows (states x symbols**j x symbols for each shorter
#: context j), start and end (states each), all float64: at most 2**25 values (256 MiB).
#: Preparing the engine makes a few working copies (log tables, move lists), so a run's
#: model memory stays within a small multiple of this, whatever the sequence.
MAX_MODEL_CELLS = 2**25
#: A label (the feature type a state reports): a letter, then letters, digits, '_' or
#: '-', at most 64 characters in all.  Labels become GFF3 column 3 values, parts of
#: feature IDs, TSV cells and track file names, so nothing that breaks a file name or
#: a column (space, tab, newline, control characters, '/', '\\', ';', '=', ',', '.', ...)
#: is allowed.  Sequence Ontology term names (``CpG_island``, ``CDS``,
#: ``five_prime_cis_splice_site``) all fit.
LABEL_PATTERN = re.compile(r"[A-Za-z][A-Za-z0-9_-]{0,63}")
#: Decoding thresholds a manifest's ``[defaults]`` table may set, and the values used
#: when it does not: the smallest per-base posterior inside a feature (0..1) and the
#: shortest feature in bases (at least 1).  Options given on the command line win.
DEFAULT_THRESHOLDS: dict[str, float | int] = {"min_posterior": 0.5, "min_length": 1}

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
    mask: np.ndarray | None = None
    #: the recalibration table (:mod:`seqstate.model.recalibration`), or None
    recalibration: Recalibration | None = None

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
        if (self.mask is None) != (other.mask is None):
            return False
        if (self.recalibration is None) != (other.recalibration is None):
            return False
        if self.recalibration is not None and not self.recalibration.equals(other.recalibration):
            return False
        arrays = [(self.start, other.start), (self.transitions, other.transitions)]
        arrays.append((self.emissions, other.emissions))
        if self.end is not None and other.end is not None:
            arrays.append((self.end, other.end))
        if self.mask is not None and other.mask is not None:
            arrays.append((self.mask, other.mask))
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


def label_problem(label: str) -> str | None:
    """Why ``label`` is not allowed as a label (see :data:`LABEL_PATTERN`), or None."""
    if LABEL_PATTERN.fullmatch(label):
        return None
    rule = (
        "a label is a Sequence Ontology-like name: a letter, then letters, digits, '_' or "
        "'-', at most 64 characters (labels become GFF3 types and track file names)"
    )
    if len(label) > 64:
        return f"label of {len(label)} characters is too long; {rule}"
    if not label[:1].isascii() or not label[:1].isalpha():
        return f"label {label!r} does not start with a letter; {rule}"
    bad = next(ch for ch in label if not (ch.isascii() and (ch.isalnum() or ch in "_-")))
    return f"label {label!r} has the character {bad!r}, which is not allowed; {rule}"


def emission_size_problem(n_states: int, n_symbols: int, order: int) -> str | None:
    """Why an emission table of this shape is refused (over :data:`MAX_EMISSION_CELLS`)."""
    cells = n_states * n_symbols ** (order + 1)
    if cells <= MAX_EMISSION_CELLS:
        return None
    return (
        f"the emission table would hold {cells:,} probabilities ({n_states} states x "
        f"{n_symbols} symbols^{order + 1} for order {order}), {_bytes(cells * 8)} as float64; "
        f"the limit is {MAX_EMISSION_CELLS:,} ({_bytes(MAX_EMISSION_CELLS * 8)}): use a lower "
        "order, fewer symbols or fewer states"
    )


def model_size_problem(n_states: int, n_symbols: int, order: int) -> str | None:
    """Why a model of this shape is refused, from its manifest alone (no table read).

    Checks, in order, the emission table (:data:`MAX_EMISSION_CELLS`), the transition
    table (:data:`MAX_TRANSITION_CELLS`) and the total of every array
    (:data:`MAX_MODEL_CELLS`); None when the model fits the budget.
    """
    problem = emission_size_problem(n_states, n_symbols, order)
    if problem:
        return problem
    square = n_states * n_states
    if square > MAX_TRANSITION_CELLS:
        return (
            f"the transition table would hold {square:,} probabilities ({n_states:,} states "
            f"squared), {_bytes(square * 8)} as float64; the limit is "
            f"{MAX_TRANSITION_CELLS:,} ({_bytes(MAX_TRANSITION_CELLS * 8)}, at most "
            f"{math.isqrt(MAX_TRANSITION_CELLS):,} states): use fewer states"
        )
    lower = sum(n_symbols ** (j + 1) for j in range(order))
    total = square + n_states * (n_symbols ** (order + 1) + lower + 2)
    if total > MAX_MODEL_CELLS:
        return (
            f"the model's arrays would hold {total:,} values ({_bytes(total * 8)} as float64: "
            f"transitions, emissions with their back-off rows, start and end); the limit is "
            f"{MAX_MODEL_CELLS:,} ({_bytes(MAX_MODEL_CELLS * 8)}): use fewer states or a "
            "lower order"
        )
    return None


def _bytes(n: int) -> str:
    size: float = n
    for unit in ("bytes", "KiB", "MiB", "GiB", "TiB", "PiB"):
        if size < 1024 or unit == "PiB":
            return f"{size} bytes" if unit == "bytes" else f"{size:.3g} {unit}"
        size /= 1024
    return f"{size:.3g} PiB"  # pragma: no cover


def thresholds_problem(table: object) -> str | None:
    """Why a ``[defaults]`` table is not valid (see :data:`DEFAULT_THRESHOLDS`), or None."""
    if not isinstance(table, dict):
        return "[defaults] must be a table of decoding thresholds (min_posterior, min_length)"
    for key, value in table.items():
        if key not in DEFAULT_THRESHOLDS:
            return f"[defaults] has unknown key {key!r}; known: {', '.join(DEFAULT_THRESHOLDS)}"
        number = isinstance(value, (int, float)) and not isinstance(value, bool)
        if key == "min_posterior" and not (number and math.isfinite(value) and 0 <= value <= 1):
            return f"[defaults] min_posterior = {value!r} must be a number from 0 to 1"
        if key == "min_length" and not (
            isinstance(value, int) and not isinstance(value, bool) and value >= 1
        ):
            return f"[defaults] min_length = {value!r} must be a whole number of bases, at least 1"
    return None


def default_thresholds(model: Model) -> dict[str, float | int]:
    """The model's decoding thresholds: its ``[defaults]`` over :data:`DEFAULT_THRESHOLDS`."""
    out = dict(DEFAULT_THRESHOLDS)
    table = model.extra.get("defaults", {})
    if isinstance(table, dict):
        out.update({k: v for k, v in table.items() if k in out})
    out["min_posterior"] = float(out["min_posterior"])
    out["min_length"] = int(out["min_length"])
    return out


def resolve_thresholds(
    model: Model, min_posterior: float | None, min_length: int | None
) -> tuple[float, int, dict[str, str]]:
    """Thresholds to decode with: a given value wins, None takes the model's default.

    Returns ``(min_posterior, min_length, source)`` where ``source`` maps each name to
    ``"option"`` or ``"model"``.
    """
    defaults = default_thresholds(model)
    source = {
        "min_posterior": "model" if min_posterior is None else "option",
        "min_length": "model" if min_length is None else "option",
    }
    mp = defaults["min_posterior"] if min_posterior is None else min_posterior
    ml = defaults["min_length"] if min_length is None else min_length
    return float(mp), int(ml), source


def make_model(
    *,
    name: str,
    alphabet: str,
    states: list[State] | tuple[State, ...],
    start: ArrayLike,
    transitions: ArrayLike,
    emissions: ArrayLike,
    end: ArrayLike | None = None,
    order: int | None = None,
    description: str = "",
    decode: str = "posterior",
    lower_emissions: dict[int, np.ndarray] | None = None,
    background_label: str | None = None,
    provenance: dict | None = None,
    extra: dict | None = None,
    mask: ArrayLike | None = None,
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
        mask=None if mask is None else np.asarray(mask, dtype=np.float64).copy(),
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
    size = model_size_problem(model.n_states, len(alphabet), model.order)
    if size:
        fail(size)
    if model.decode not in DECODINGS:
        fail(f"decode {model.decode!r} is not one of {', '.join(DECODINGS)}")
    m = model.n_states
    if m == 0:
        fail("the model has no states")
    names = model.state_names
    seen: set[str] = set()
    for n in names:
        if not isinstance(n, str) or not n or not n.isprintable() or any(c.isspace() for c in n):
            fail(f"state name {n!r} is empty or contains white space or control characters")
        if n in seen:
            fail(f"duplicate state name {n!r}")
        seen.add(n)
    for s in model.states:
        if s.label is not None:
            problem = label_problem(s.label) if isinstance(s.label, str) else "not a string"
            if problem:
                fail(f"state {s.name!r}: {problem}")
        if s.strand is not None and s.strand not in STRANDS:
            fail(f"state {s.name!r} has strand {s.strand!r}, expected '+', '-' or none")
    problem = thresholds_problem(model.extra.get("defaults", {}))
    if problem:
        fail(problem)
    a = len(alphabet)
    k = model.order
    shapes = {
        "start": (model.start, (m,)),
        "transitions": (model.transitions, (m, m)),
        "emissions": (model.emissions, (m, a**k, a)),
    }
    if model.end is not None:
        shapes["end"] = (model.end, (m,))
    if model.mask is not None:
        shapes["mask"] = (model.mask, (m,) if model.mask.ndim == 1 else (m, 3))
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

    if model.mask is not None and np.any(model.mask > 1):
        i = int(np.argwhere(model.mask > 1)[0][0])
        fail(
            f"mask table: state {names[i]!r} has P(masked) = "
            f"{float(np.max(model.mask[i]))!r}, expected a probability from 0 to 1"
        )
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
        with np.errstate(over="ignore"):
            total = v.sum(axis=-1, keepdims=True)
        if np.any(total <= 0):
            raise ModelFormatError(f"{what}: a row sums to 0 and cannot be normalised")
        if not np.all(np.isfinite(total)):
            raise ModelFormatError(
                f"{what}: a row sums to more than the largest number (overflow); "
                "scale the counts down"
            )
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
