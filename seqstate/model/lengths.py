"""Length distributions as chains of states (phase-type lengths).

A *branch* of ``R`` chained states, each staying with probability ``p`` and moving
on with ``1 - p``, spends a negative-binomial number of bases in the chain:

    P(L) = C(L - 1, R - 1) (1 - p)^R p^(L - R),    L >= R

(a sum of R geometric lengths of at least one base each).  Branches side by side,
entered with probabilities ``w``, give a mixture of them: a short, peaked branch
beside a long, flat one describes intron lengths far better than one geometric
length.  :func:`fit_branches` fits ``w`` and ``p`` to observed lengths by EM for
the mixture (maximum likelihood for the fixed stage counts); :func:`chain_pmf`
gives the distribution the chain states define.  Lengths are in bases.  Plain
NumPy/SciPy; no files, no kernels.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.special import gammaln

#: A stay probability is kept inside [STAY_MIN, STAY_MAX] (a branch of R stages then
#: has a mean length of at most R / (1 - STAY_MAX) bases).
STAY_MIN = 0.0
STAY_MAX = 1.0 - 1e-7


@dataclass(frozen=True)
class BranchFit:
    """A fitted chain: per branch its stage count, entry probability and stay probability."""

    stages: tuple[int, ...]
    weights: tuple[float, ...]
    stays: tuple[float, ...]
    loglik: float
    n: int

    def mean(self) -> float:
        """Mean length (bases)."""
        return float(sum(w * r / (1 - p) for r, w, p in zip(self.stages, self.weights, self.stays)))


def branch_logpmf(lengths: np.ndarray, stages: int, stay: float) -> np.ndarray:
    """log P(L) of one branch (natural log; -inf below ``stages``)."""
    L = np.asarray(lengths, dtype=np.float64)
    r = float(stages)
    out = np.full(L.shape, -np.inf)
    ok = L >= r
    x = L[ok]
    log_binom = gammaln(x) - gammaln(r) - gammaln(x - r + 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_stay = np.log(stay) if stay > 0 else -np.inf
        term = np.where(x > r, (x - r) * log_stay, 0.0)
        out[ok] = log_binom + r * np.log1p(-stay) + term
    return out


def chain_pmf(
    stages: Sequence[int], weights: Sequence[float], stays: Sequence[float], n_max: int
) -> np.ndarray:
    """P(L) for L = 0..n_max of the mixture of branches (index = length in bases)."""
    L = np.arange(n_max + 1)
    total = np.zeros(n_max + 1)
    for r, w, p in zip(stages, weights, stays):
        if w > 0:
            total += w * np.exp(branch_logpmf(L, r, p))
    return total


def fit_branches(
    lengths: Sequence[int], stages: Sequence[int], *, max_iter: int = 500, tol: float = 1e-10
) -> BranchFit:
    """Entry and stay probabilities of branches of fixed stage counts, by EM (ML).

    ``lengths``: observed lengths (bases), each at least ``min(stages)``.  The
    branches start from the sorted lengths cut into equal shares (shortest share to
    the first branch); each EM step gives every length its branch responsibilities
    and sets ``w_b`` to their mean and ``p_b = sum r (L - R_b) / sum r L`` (the ML
    stay of R_b chained geometric lengths).  Stops when the log-likelihood gains
    less than ``tol`` (relative) or after ``max_iter`` steps.
    """
    L = np.asarray(lengths, dtype=np.float64)
    R = np.asarray(stages, dtype=np.float64)
    k = len(R)
    if L.size == 0:
        raise ValueError("no lengths to fit")
    if np.any(L < R.min()):
        raise ValueError(f"a length below the fewest stages ({int(R.min())})")
    order = np.sort(L)
    shares = np.array_split(order, k)
    weights = np.full(k, 1.0 / k)
    stays = np.array(
        [
            np.clip(
                1.0 - R[b] / max(float(np.mean(shares[b])) if len(shares[b]) else R[b], R[b]),
                STAY_MIN,
                STAY_MAX,
            )
            for b in range(k)
        ]
    )
    prev = -np.inf
    ll = -np.inf
    for _ in range(max_iter):
        logp = np.stack(
            [
                np.log(weights[b]) + branch_logpmf(L, int(R[b]), stays[b])
                if weights[b] > 0
                else np.full(L.shape, -np.inf)
                for b in range(k)
            ]
        )
        top = logp.max(axis=0)
        ll_each = top + np.log(np.exp(logp - top).sum(axis=0))
        ll = float(ll_each.sum())
        resp = np.exp(logp - ll_each)
        weights = resp.mean(axis=1)
        for b in range(k):
            den = float((resp[b] * L).sum())
            if den > 0:
                stays[b] = np.clip(float((resp[b] * (L - R[b])).sum()) / den, STAY_MIN, STAY_MAX)
        if np.isfinite(prev) and abs(ll - prev) <= tol * abs(ll):
            break
        prev = ll
    # the log-likelihood of the returned parameters (the loop's is one step behind)
    final = np.stack(
        [
            np.log(weights[b]) + branch_logpmf(L, int(R[b]), stays[b])
            if weights[b] > 0
            else np.full(L.shape, -np.inf)
            for b in range(k)
        ]
    )
    top = final.max(axis=0)
    ll = float((top + np.log(np.exp(final - top).sum(axis=0))).sum())
    return BranchFit(
        tuple(int(r) for r in R),
        tuple(float(w) for w in weights),
        tuple(float(p) for p in stays),
        ll,
        int(L.size),
    )
