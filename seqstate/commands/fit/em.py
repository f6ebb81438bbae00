"""Baum–Welch (EM) for ``seqstate fit``: expected counts, one update, and the loop.

Expected counts come from a checkpointed forward–backward over every record
(:mod:`seqstate.engine.training`), pooled, then the normalisation of
:func:`.estimation.estimate`; repeated until the relative gain
``(LL_i - LL_{i-1}) / |LL_{i-1}|`` falls below ``tol`` or ``max_iter`` updates have
been made.  The back-off rows (contexts shorter than k) are held fixed at the EM
start model's values (explicit rows as given, otherwise derived from its order-k
table) and written explicitly, so that every EM update is an exact EM step (the
log-likelihood never decreases) and the written model reproduces the reported
log-likelihood.  With ``mask`` (``--masked evidence``) the codes read soft-masked
bases as evidence (the doubled code layout of :mod:`seqstate.engine.tables`): the
emission counts of a base are the sum of its two codes, and the mask table is
re-estimated from the expected masked and unmasked bases of each state, pooled as
counting pools them (:func:`.estimation.estimate_mask`), every position counted.
With a pseudocount p > 0 the update maximises
``LL + p * sum(log theta)`` over the cells that receive it (a Dirichlet prior);
that objective, not LL itself, is then the one that never decreases, and the stop
rule uses it.  Log-likelihoods are natural logs.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np

from seqstate.commands.fit.counting import Counts
from seqstate.commands.fit.estimation import (
    NOTHING_FROZEN,
    Frozen,
    estimate,
    objective,
    replace_tables,
)
from seqstate.engine import api, training
from seqstate.engine._common import CHAIN_COLUMN, mask_blocks
from seqstate.errors import ImpossibleSequenceError, UsageError
from seqstate.model import Model

#: Default ``--tol``: the relative gain below which EM has converged.  The gain is relative
#: to the log-likelihood, which grows with the bases (about 1.35 nats a base on DNA), so
#: 1e-8 is about 1.4e-8 nats a base per iteration, well above rounding.  Measured on the
#: synthetic demo (``examples/cex_draft1.fa.gz``, 1 Mbp, ``-m cpg-island``): the gains are
#: 1.3e-5, 1.2e-8, 2.4e-10, ...: 1e-8 stops after 3 iterations, 1.9e-5 nats below the
#: log-likelihood reached with tol 1e-12 (6 iterations); 1e-4 stopped after the first
#: (0.016 nats below).
DEFAULT_TOL = 1e-8

#: Where progress lines go: one call per line.
Log = Callable[[str], None]


def quiet(_: str) -> None:
    """The :data:`Log` that drops every line."""
    return None


def _s(n: int) -> str:
    return "" if n == 1 else "s"


def fixed_backoff(model: Model) -> dict[int, np.ndarray]:
    """Complete back-off rows of ``model`` (explicit where given, else derived)."""
    return {j: v.copy() for j, v in api.backoff_rows(model).items()}


def with_backoff(model: Model, lower: dict[int, np.ndarray]) -> Model:
    """A copy of ``model`` whose back-off rows are exactly ``lower`` (all explicit)."""
    return replace_tables(model, lower_emissions={j: v.copy() for j, v in lower.items()})


def expected_counts(
    model: Model,
    codes_list: Sequence[np.ndarray],
    *,
    lower: dict[int, np.ndarray],
    record_ids: Sequence[str] | None = None,
    path: str | None = None,
    mode: int | None = None,
    mask: bool = False,
) -> Counts:
    """E-step: expected counts pooled over records, and the total log-likelihood (nat).

    ``lower`` are the back-off rows in use (see :func:`fixed_backoff`).  Raises
    ImpossibleSequenceError (naming the record and ``path``) for a record of
    probability zero.  ``mask``: the codes read the mask as evidence (module
    docstring); the counts then hold the expected mask counts too.
    """
    tt = training.training_tables(model, lower, mode=mode, mask=mask)
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
    emit = acc.emit[lo:hi]
    mask_counts = None
    if mask:
        u = int(tt.offsets[k + 1])
        assert model.mask is not None  # training_tables refuses a model without one
        blocks = mask_blocks(model.mask)
        emit = sum((acc.emit[b * u + lo : b * u + hi] for b in range(blocks)), np.zeros_like(emit))
        per_block = [acc.emit[b * u : (b + 1) * u].sum(axis=0) for b in range(blocks)]
        if blocks == 2:
            mask_counts = np.stack(per_block, 1)
        else:
            mask_counts = np.zeros((m, 3, 2))
            for b, v in enumerate(per_block):
                mask_counts[:, CHAIN_COLUMN[b // 2], b % 2] += v
    emis = emit.reshape(a**k, a, m).transpose(2, 0, 1).copy()
    return Counts(acc.start.copy(), acc.trans.copy(), acc.end.copy(), emis, total, mask=mask_counts)


def em_step(
    model: Model,
    codes_list: Sequence[np.ndarray],
    *,
    lower: dict[int, np.ndarray],
    pseudocount: float = 0.0,
    frozen: Frozen = NOTHING_FROZEN,
    record_ids: Sequence[str] | None = None,
    path: str | None = None,
    mode: int | None = None,
    mask: bool = False,
) -> tuple[Model, float, list[str]]:
    """One Baum–Welch update: (new model, log-likelihood of ``model``, rows kept)."""
    counts = expected_counts(
        model, codes_list, lower=lower, record_ids=record_ids, path=path, mode=mode, mask=mask
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


def _log_iteration(
    log: Log,
    it: int,
    ll: float,
    obj: float,
    prev_obj: float | None,
    pseudocount: float,
    t0: float,
) -> float:
    """Print the progress line of iteration ``it``; returns its relative gain (inf at 0)."""
    extra = f"  objective {obj:.6f}" if pseudocount else ""
    if prev_obj is None:
        log(f"em: iteration {it:3d}  loglik {ll:.6f}{extra}  (start model)")
        return math.inf
    delta = obj - prev_obj
    gain = delta / abs(prev_obj) if prev_obj != 0 else 0.0
    log(
        f"em: iteration {it:3d}  loglik {ll:.6f}{extra}  change {delta:+.6g}  "
        f"relative {gain:+.3e}  ({time.perf_counter() - t0:.2f} s)"
    )
    return gain


def baum_welch(
    model: Model,
    codes_list: Sequence[np.ndarray],
    *,
    max_iter: int = 50,
    tol: float = DEFAULT_TOL,
    pseudocount: float = 0.0,
    frozen: Frozen = NOTHING_FROZEN,
    record_ids: Sequence[str] | None = None,
    path: str | None = None,
    log: Log = quiet,
    mode: int | None = None,
    mask: bool = False,
) -> EMResult:
    """Baum–Welch from ``model`` over the encoded records (pooled).

    Iteration i evaluates the model after i updates (iteration 0: the start
    model) and prints one line: log-likelihood, change and relative gain
    ``(LL_i - LL_{i-1}) / |LL_{i-1}|`` (of the objective when the pseudocount
    is positive).  Stops when the relative gain is below ``tol`` ("converged")
    or after ``max_iter`` updates.  If the objective ever falls (rounding), the
    better previous model is kept.  Back-off rows are held fixed (module
    docstring).  Forbidden transitions and zero emissions stay exactly zero.  ``mask``:
    the codes read the mask as evidence and the mask table is re-estimated (module
    docstring).
    """
    if max_iter < 0:
        raise UsageError(f"--max-iter {max_iter} must be at least 0")
    if not tol >= 0:
        raise UsageError(f"--tol {tol} must be a number >= 0")
    lower = fixed_backoff(model)
    current = with_backoff(model, lower) if lower else model
    history: list[tuple[int, float, float]] = []
    kept: list[str] = []
    prev_obj: float | None = None
    prev_model: Model | None = None
    prev_ll = math.nan
    it = 0
    while True:
        t0 = time.perf_counter()
        counts = expected_counts(
            current,
            codes_list,
            lower=lower,
            record_ids=record_ids,
            path=path,
            mode=mode,
            mask=mask,
        )
        ll = counts.loglik
        obj = objective(current, ll, pseudocount=pseudocount, frozen=frozen, mask=mask)
        history.append((it, ll, obj))
        gain = _log_iteration(log, it, ll, obj, prev_obj, pseudocount, t0)
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
