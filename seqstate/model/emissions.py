"""Emission back-off maths: rows for contexts shorter than the model's order.

Where a context is cut short (the first ``k`` bases of a record, the bases after
an unknown one), an order-k model needs rows ``P_j(x | c')`` for ``j < k``.  They
come from the model's explicit lower-order rows when it has them; otherwise they
are derived from the order-k table of each state, weighted by the stationary
k-mer frequencies of that state's own order-k chain:
``P_j(x | c') = sum_u pi(u c') P(x | u c') / sum_u pi(u c')`` over the k-mers
``u c'`` that end in ``c'`` (uniform weights if every such k-mer has zero
frequency).  The stationary frequencies are found by power iteration of the
lazy chain ``(I + P) / 2``, which has the same fixed point and always converges.

Plain NumPy on a :class:`~seqstate.model.core.Model`; no files, no kernels.
"""

from __future__ import annotations

import numpy as np

from seqstate.model.core import Model


def stationary_kmers(cond: np.ndarray, n_symbols: int, order: int) -> np.ndarray:
    """Stationary k-mer frequencies of an order-k chain with rows ``cond[c, x]``.

    ``cond`` has shape (A**k, A).  Returns a vector of length A**k summing to 1.
    """
    a, k = n_symbols, order
    size = a**k
    pi = np.full(size, 1.0 / size)
    inner = a ** (k - 1)
    p3 = cond.reshape(a, inner, a)
    for _ in range(20000):
        step = (pi.reshape(a, inner)[:, :, None] * p3).sum(axis=0).reshape(size)
        new = 0.5 * (pi + step)
        new /= new.sum()
        if np.max(np.abs(new - pi)) < 1e-15:
            pi = new
            break
        pi = new
    return pi


def backoff_rows(model: Model) -> dict[int, np.ndarray]:
    """Emission rows for every order j < k: explicit rows where given, else derived."""
    a, k, m = len(model.alphabet), model.order, model.n_states
    out: dict[int, np.ndarray] = {}
    if k == 0:
        return out
    weights = np.zeros((m, a**k))  # every row is written below
    seen: dict[bytes, np.ndarray] = {}  # states that share a table share its k-mers
    for s in range(m):
        key = model.emissions[s].tobytes()
        if key not in seen:
            seen[key] = stationary_kmers(model.emissions[s], a, k)
        weights[s] = seen[key]
    for j in range(k):
        # group the k-mers by their last j symbols: index = c % a**j
        w = weights.reshape(m, a ** (k - j), a**j)
        p = model.emissions.reshape(m, a ** (k - j), a**j, a)
        num = (w[:, :, :, None] * p).sum(axis=1)
        den = w.sum(axis=1)
        uniform = p.mean(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            derived = np.where(den[:, :, None] > 0, num / den[:, :, None], uniform)
        derived /= derived.sum(axis=-1, keepdims=True)
        given = model.lower_emissions.get(j)
        if given is not None:
            have = ~np.all(np.isnan(given), axis=-1)
            derived[have] = given[have]
        out[j] = derived
    return out
