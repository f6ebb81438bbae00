"""The in-memory model (:mod:`.core`) and its emission back-off maths (:mod:`.emissions`).

``from seqstate.model import Model, State, make_model`` is the usual import.
"""

from seqstate.model.core import (
    DECODINGS,
    DEFAULT_THRESHOLDS,
    LABEL_PATTERN,
    MAX_EMISSION_CELLS,
    MAX_MODEL_CELLS,
    MAX_ORDER,
    MAX_TRANSITION_CELLS,
    SO_ACCESSIONS,
    STRANDS,
    SUM_TOLERANCE,
    Model,
    State,
    check_reachability,
    default_thresholds,
    emission_size_problem,
    label_problem,
    make_model,
    model_size_problem,
    normalize_rows,
    resolve_thresholds,
    sha256_of_text,
    thresholds_problem,
    validate,
)
from seqstate.model.emissions import backoff_rows, stationary_kmers

__all__ = [
    "DECODINGS",
    "DEFAULT_THRESHOLDS",
    "LABEL_PATTERN",
    "MAX_EMISSION_CELLS",
    "MAX_MODEL_CELLS",
    "MAX_ORDER",
    "MAX_TRANSITION_CELLS",
    "SO_ACCESSIONS",
    "STRANDS",
    "SUM_TOLERANCE",
    "Model",
    "State",
    "backoff_rows",
    "check_reachability",
    "default_thresholds",
    "emission_size_problem",
    "label_problem",
    "make_model",
    "model_size_problem",
    "normalize_rows",
    "resolve_thresholds",
    "sha256_of_text",
    "stationary_kmers",
    "thresholds_problem",
    "validate",
]
