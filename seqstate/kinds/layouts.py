"""Model layouts derived from other models (no I/O)."""

from __future__ import annotations

import numpy as np

from seqstate.model import Model, State, backoff_rows, make_model


def expand_to_symbol_states(
    model: Model, *, name: str | None = None, description: str | None = None
) -> Model:
    """The order-0 layout of an order-1 model: one state per (state, symbol).

    State ``(s, x)`` emits only ``x``; it keeps the label and strand of ``s``.
    ``start(s, x) = start(s) * P0(x | s)`` (the order-0 back-off row of ``s``),
    ``a((s, x), (t, y)) = a(s, t) * P(y | x; t)`` and ``end(s, x) = end(s)``.
    On sequences without unknown bases both layouts give the same likelihood and
    the same per-label posteriors.  New state names are ``<state>_<symbol>``;
    states are ordered by original state, then by symbol.  The decoding
    thresholds of ``[defaults]`` are kept (the labels mean the same).
    """
    if model.order != 1:
        raise ValueError("expand_to_symbol_states needs an order-1 model")
    a = len(model.alphabet)
    m = model.n_states
    p0 = backoff_rows(model)[0][:, 0, :]  # (m, a)
    p1 = model.emissions  # (m, a, a): [state, previous symbol, symbol]
    states = [
        State(f"{s.name}_{x}", s.label, s.strand) for s in model.states for x in model.alphabet
    ]
    start = (model.start[:, None] * p0).reshape(m * a)
    trans = np.zeros((m * a, m * a))
    for s in range(m):
        for x in range(a):
            row = model.transitions[s][:, None] * p1[:, x, :]  # (t, y)
            trans[s * a + x] = row.reshape(m * a)
    emissions = np.zeros((m * a, 1, a))
    for s in range(m):
        for x in range(a):
            emissions[s * a + x, 0, x] = 1.0
    end = None if model.end is None else np.repeat(model.end, a)
    return make_model(
        name=name or f"{model.name}-{m * a}",
        description=description or f"{model.name} in its one-state-per-symbol layout",
        alphabet=model.alphabet,
        states=states,
        start=start,
        transitions=trans,
        emissions=emissions,
        end=end,
        order=0,
        decode=model.decode,
        background_label=model.background_label,
        extra={"defaults": dict(model.extra["defaults"])} if "defaults" in model.extra else None,
    )
