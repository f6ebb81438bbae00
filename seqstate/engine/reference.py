"""Slow plain-NumPy reference implementations, the oracle for the compiled kernels.

These take a dense emission lattice ``lattice[i, s]`` (the emission factor of
position i in state s, e.g. ``tables.E[codes]``), the start vector, the dense
transition matrix and the end vector, and hold full N x M arrays: use them on
small inputs only.  Natural logs throughout.
"""

from __future__ import annotations

import itertools

import numpy as np

from seqstate.engine.buffers import work_buffer


def _scaled_forward(
    start: np.ndarray, trans: np.ndarray, end: np.ndarray, lattice: np.ndarray
) -> tuple[np.ndarray, np.ndarray, float, float]:
    """Forward vectors normalised at every position, their sums, the final sum, loglik."""
    n, m = lattice.shape
    alpha = np.zeros((n, m))
    scale = np.zeros(n)
    a = start * lattice[0]
    scale[0] = a.sum()
    alpha[0] = a / scale[0]
    for i in range(1, n):
        a = (alpha[i - 1] @ trans) * lattice[i]
        scale[i] = a.sum()
        alpha[i] = a / scale[i]
    final = float(alpha[-1] @ end)
    return alpha, scale, final, float(np.log(scale).sum() + np.log(final))


def forward_backward(
    start: np.ndarray, trans: np.ndarray, end: np.ndarray, lattice: np.ndarray
) -> tuple[float, np.ndarray]:
    """Scaled forward-backward (Rabiner 1989, section V.A): (loglik, posterior N x M)."""
    n, m = lattice.shape
    alpha, scale, final, loglik = _scaled_forward(start, trans, end, lattice)
    beta = np.zeros((n, m))
    beta[-1] = end / final
    for i in range(n - 2, -1, -1):
        beta[i] = (trans @ (lattice[i + 1] * beta[i + 1])) / scale[i + 1]
    post = alpha * beta
    post /= post.sum(axis=1, keepdims=True)
    return loglik, post


def viterbi(
    start: np.ndarray, trans: np.ndarray, end: np.ndarray, lattice: np.ndarray
) -> tuple[np.ndarray, float]:
    """Log-space Viterbi with the same tie rule as the kernels (lowest index wins)."""
    n, m = lattice.shape
    with np.errstate(divide="ignore"):
        lt = np.log(trans)
        le = np.log(lattice)
        d = np.log(start) + le[0]
        lend = np.log(end)
    bp = np.zeros((n, m), dtype=np.int64)
    for i in range(1, n):
        cand = d[:, None] + lt  # from x to
        bp[i] = np.argmax(cand, axis=0)  # first maximum = lowest from-index
        d = cand[bp[i], np.arange(m)] + le[i]
    final = d + lend
    state = int(np.argmax(final))
    best = float(final[state])
    path = np.zeros(n, dtype=np.int64)
    path[-1] = state
    for i in range(n - 1, 0, -1):
        state = int(bp[i, state])
        path[i - 1] = state
    return path, best


def brute_force(start: np.ndarray, trans: np.ndarray, end: np.ndarray, lattice: np.ndarray) -> dict:
    """Enumerate every path: likelihood, posteriors, best path (tiny N and M only).

    Returns ``{"loglik", "posterior" (N x M), "best_path", "best_logp", "paths"}``
    where ``paths`` maps each path tuple to its joint probability.
    """
    n, m = lattice.shape
    total = 0.0
    post = np.zeros((n, m))
    best_p, best_path = -1.0, None
    paths = {}
    for path in itertools.product(range(m), repeat=n):
        p = start[path[0]] * lattice[0, path[0]]
        for i in range(1, n):
            p *= trans[path[i - 1], path[i]] * lattice[i, path[i]]
        p *= end[path[-1]]
        paths[path] = p
        total += p
        for i, s in enumerate(path):
            post[i, s] += p
        if p > best_p:  # itertools order is lexicographic: first max = lowest indices
            best_p, best_path = p, path
    return {
        "loglik": float(np.log(total)),
        "posterior": post / total,
        "best_path": np.array(best_path),
        "best_logp": float(np.log(best_p)),
        "paths": paths,
        "total": total,
    }


def encode_codes(
    sym: np.ndarray, order: int, n_symbols: int, offsets: np.ndarray, unknown_code: int
) -> np.ndarray:
    """Pure-Python twin of :func:`seqstate.engine.generic.kernels.encode_codes`."""
    out = work_buffer(len(sym), np.int64)
    for i, x in enumerate(sym):
        if x < 0:
            out[i] = unknown_code
            continue
        j = 0
        while j < order and i - j - 1 >= 0 and sym[i - j - 1] >= 0:
            j += 1
        ctx = 0
        for q in range(i - j, i):
            ctx = ctx * n_symbols + int(sym[q])
        out[i] = offsets[j] + ctx * n_symbols + int(x)
    return out


def expected_counts(
    start: np.ndarray,
    trans: np.ndarray,
    end: np.ndarray,
    lattice: np.ndarray,
    codes: np.ndarray,
    n_codes: int,
) -> dict:
    """Full-matrix twin of :func:`seqstate.engine.training.accumulate` (one record).

    Scaled forward and backward over the whole record (Rabiner 1989, section V.A),
    then the posteriors gamma_i(s) and the pair posteriors xi_i(s, t), each
    normalised at its own position.  Returns ``{"loglik", "start" (M,), "trans"
    (M, M), "end" (M,), "emit" (n_codes, M)}``: P(z_0 = s | x), the summed pair
    posteriors, P(z_last = s | x) and the posteriors summed by emission code.
    """
    n, m = lattice.shape
    alpha, scale, final, loglik = _scaled_forward(start, trans, end, lattice)
    beta = np.zeros((n, m))
    beta[-1] = end
    for i in range(n - 2, -1, -1):
        b = trans @ (lattice[i + 1] * beta[i + 1])
        beta[i] = b / b.sum()
    gamma = alpha * beta
    gamma /= gamma.sum(axis=1, keepdims=True)
    xi = np.zeros((m, m))
    for i in range(n - 1):
        x = alpha[i][:, None] * trans * (lattice[i + 1] * beta[i + 1])[None, :]
        xi += x / x.sum()
    emit = np.zeros((n_codes, m))
    np.add.at(emit, np.asarray(codes, dtype=np.int64), gamma)
    return {
        "loglik": loglik,
        "start": gamma[0].copy(),
        "trans": xi,
        "end": gamma[-1].copy(),
        "emit": emit,
    }


def constrained_log_probability(
    start: np.ndarray,
    trans: np.ndarray,
    end: np.ndarray,
    lattice: np.ndarray,
    start0: int,
    end0: int,
    cls: np.ndarray,
    allowed: np.ndarray,
) -> float:
    """Twin of :func:`seqstate.engine.api.constrained_log_probability` by whole-record
    matrix products: the forward recursion with the lattice of position i zeroed
    outside ``allowed[cls[i - start0]]`` for i in ``[start0, end0)``, its total over
    the unconstrained total.  Natural log; -inf when no allowed path exists."""
    n, _ = lattice.shape
    lat = np.array(lattice, dtype=np.float64)
    for i in range(start0, end0):
        lat[i] = np.where(np.asarray(allowed)[int(cls[i - start0])], lat[i], 0.0)
    _, _, _, total = _scaled_forward(start, trans, end, lattice)
    a = start * lat[0]
    acc = 0.0
    for i in range(n):
        if i > 0:
            a = (a @ trans) * lat[i]
        s = a.sum()
        if s <= 0.0:
            return -np.inf
        a = a / s
        acc += float(np.log(s))
    final = float(a @ end)
    if final <= 0.0:
        return -np.inf
    return acc + float(np.log(final)) - total
