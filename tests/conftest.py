"""Shared fixtures of the engine and model-table tests.

* a fixed-seed hypothesis profile (``derandomize=True``, no deadline, modest
  example counts) so that runs are reproducible and fast;
* ``random_model``: a factory of small random models (the tests' own random
  parameters, never results of the code under test);
* ``random_sequence``: random records over a model's alphabet with unknown
  symbols mixed in;
* ``kernel``: runs a test once with the engine's specialised kernels allowed
  (its normal dispatch) and once with the generic kernels only (the in-process
  equivalent of ``SEQSTATE_KERNELS=generic``).
"""

from __future__ import annotations

import bisect
import contextlib
from pathlib import Path

import numpy as np
import pytest
from hypothesis import settings

from seqstate.errors import ModelFormatError
from seqstate.model import State, make_model

settings.register_profile(
    "seqstate", derandomize=True, deadline=None, max_examples=50, print_blob=True
)
settings.load_profile("seqstate")

DATA = Path(__file__).resolve().parent / "data"
REPO = Path(__file__).resolve().parent.parent


def _random_rows(
    rng: np.random.Generator, shape: tuple[int, ...], p_zero: float, total: np.ndarray | float = 1.0
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
    """Emission rows (state, context, symbol) that are zero where ``allowed[s, x]`` is False."""
    x = rng.uniform(0.05, 1.0, size=shape) * allowed[:, None, :]
    if p_zero > 0:
        x[rng.random(shape) < p_zero] = 0.0
    for s in range(shape[0]):
        for c in range(shape[1]):
            if not np.any(x[s, c] > 0):
                x[s, c, rng.choice(np.flatnonzero(allowed[s]))] = rng.uniform(0.05, 1.0)
    return x / x.sum(axis=-1, keepdims=True)


def build_random_model(
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
    name: str = "random",
):
    """A valid random model (retries until the drawn tables pass validation).

    ``p_forbid`` zeroes transitions (and start entries), ``p_zero_emission``
    zeroes emission entries, ``lower_rows`` gives explicit back-off rows for a
    random subset of the shorter contexts (the rest are left to the engine).
    ``max_emitters`` limits how many states may emit each symbol (in every
    context), the layout that the engine's specialised kernels handle.
    """
    m, a = n_states, len(alphabet)
    labels = ["alpha", "beta", None]
    strands = ["+", "-", None]
    for _ in range(1000):
        states = [
            State(f"s{i}", labels[int(rng.integers(3))], strands[int(rng.integers(3))])
            for i in range(m)
        ]
        start = _random_rows(rng, (m,), p_forbid)
        end = None
        stay = np.ones(m)
        if with_end:
            end = rng.uniform(0.05, 0.6, size=m)
            end[rng.random(m) < 0.3] = 0.0
            if not np.any(end > 0):
                end[rng.integers(m)] = rng.uniform(0.05, 0.6)
            stay = 1.0 - end
        trans = _random_rows(rng, (m, m), p_forbid, stay)
        allowed = np.ones((m, a), dtype=bool)  # allowed[s, x]: state s may emit x
        if max_emitters is not None:
            allowed[:] = False
            for s in range(m):  # every state emits at least one symbol
                allowed[s, s % a] = True
            for x in range(a):
                have = int(allowed[:, x].sum())
                free = np.flatnonzero(~allowed[:, x])
                want = int(rng.integers(1, max_emitters + 1))  # every symbol has an emitter
                extra = min(len(free), max(0, want - have))
                allowed[rng.choice(free, size=extra, replace=False), x] = True
            if np.any(allowed.sum(axis=0) > max_emitters):
                continue
        emis = _masked_rows(rng, (m, a**order, a), p_zero_emission, allowed)
        lower = {}
        if lower_rows:
            for j in range(order):
                rows = _masked_rows(rng, (m, a**j, a), p_zero_emission, allowed)
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


def build_random_sequence(
    rng: np.random.Generator,
    n: int,
    alphabet: str = "ACGT",
    p_unknown: float = 0.0,
    p_lower: float = 0.0,
) -> str:
    """A random record over ``alphabet`` with 'N' (unknown) and soft-masked letters mixed in."""
    chars = [alphabet[int(i)] for i in rng.integers(len(alphabet), size=n)]
    for i in range(n):
        u = rng.random()
        if u < p_unknown:
            chars[i] = "N"
        elif u < p_unknown + p_lower:
            chars[i] = chars[i].lower()
    return "".join(chars)


def sample_record(
    rng: np.random.Generator, model, n: int, p_unknown: float = 0.0, p_lower: float = 0.0
) -> str:
    """A record of ``n`` symbols drawn from the model's own chain (common practice).

    The state path follows start and transitions (and ends in a state with a
    positive end probability when the model has an end table); each symbol is
    drawn from the state's row for its full context, or, within the first
    ``order`` bases, uniformly among the symbols that some row of that state can
    emit.  Unknown ('N') and soft-masked letters are then mixed in.  Built for
    models without zero emissions inside a state's allowed symbols, where such a
    record always has positive probability.
    """
    a, k = len(model.alphabet), model.order

    def cdf(rows: np.ndarray) -> list[list[float]]:
        out = []
        for row in rows.reshape(-1, rows.shape[-1]):
            if row.sum() > 0:
                c = np.cumsum(row / row.sum())
                c[np.flatnonzero(row > 0)[-1] :] = 1.0  # no rounding gap at the top
            else:
                c = np.ones(len(row))
            out.append(c.tolist())
        return out

    def draw(c: list[float], u: float) -> int:
        # first i with u < c[i]: entry i has probability c[i] - c[i-1] (never zero here)
        return min(bisect.bisect_right(c, u), len(c) - 1)

    t_cdf = cdf(model.transitions)
    e_cdf = cdf(model.emissions)  # index s * a**k + context
    s_cdf = cdf(model.start[None, :])[0]
    for _ in range(1000):
        z = [draw(s_cdf, rng.random())]
        ok = True
        for _ in range(n - 1):
            if model.transitions[z[-1]].sum() <= 0:
                ok = False
                break
            z.append(draw(t_cdf[z[-1]], rng.random()))
        if not ok or (model.end is not None and model.end[z[-1]] <= 0):
            continue
        sym: list[int] = []
        for i, s in enumerate(z):
            if i >= k:
                c = 0
                for y in sym[i - k : i]:
                    c = c * a + y
                sym.append(draw(e_cdf[s * a**k + c], rng.random()))
            else:
                can = np.flatnonzero(model.emissions[s].max(axis=0) > 0)
                sym.append(int(rng.choice(can)))
        chars = [model.alphabet[x] for x in sym]
        for i in range(n):
            u = rng.random()
            if u < p_unknown:
                chars[i] = "N"
            elif u < p_unknown + p_lower:
                chars[i] = chars[i].lower()
        return "".join(chars)
    raise RuntimeError("could not draw a record of this length")


@contextlib.contextmanager
def engine_kernels(kind: str):
    """Within the block: 'specialised' (the engine may pick its specialised kernels) or
    'generic' (the generic kernels only, as with SEQSTATE_KERNELS=generic)."""
    from seqstate.engine import api

    old = api._USE_SMALL
    api._USE_SMALL = kind != "generic"
    try:
        yield kind
    finally:
        api._USE_SMALL = old


@pytest.fixture(params=["specialised", "generic"])
def kernel(request):
    """Run the test under both kernel families (see engine_kernels)."""
    with engine_kernels(request.param):
        yield request.param


@pytest.fixture(scope="session")
def kernel_switch():
    """The engine_kernels context manager, for tests that draw the kernel family."""
    return engine_kernels


@pytest.fixture(scope="session")
def random_model():
    """Factory: ``random_model(rng, n_states=..., order=..., ...)`` (see build_random_model)."""
    return build_random_model


@pytest.fixture(scope="session")
def model_record():
    """Factory: ``model_record(rng, model, n, p_unknown, p_lower)`` (see sample_record)."""
    return sample_record


@pytest.fixture(scope="session")
def random_sequence():
    """Factory: ``random_sequence(rng, n, alphabet, p_unknown, p_lower)``."""
    return build_random_sequence


@pytest.fixture(scope="session")
def data_dir() -> Path:
    """The tests' data folder (tests/data)."""
    return DATA


@pytest.fixture(scope="session")
def repo_dir() -> Path:
    """The repository root (models/ and models/build.py live there)."""
    return REPO
