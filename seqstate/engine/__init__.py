"""The numerics: compiled kernels, their NumPy reference, and a small API on top."""

from seqstate.engine.api import (
    EngineTables,
    Posterior,
    encode,
    loglik,
    posterior,
    prepare,
    segment_log_odds,
    segment_log_probability,
    viterbi,
)

__all__ = [
    "EngineTables",
    "Posterior",
    "encode",
    "loglik",
    "posterior",
    "prepare",
    "segment_log_odds",
    "segment_log_probability",
    "viterbi",
]
