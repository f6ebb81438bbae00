"""The numerics: compiled kernels, their NumPy reference, and a small API on top.

What is where:

* kernel families, one subpackage each, holding forward, backward, posterior, Viterbi,
  MEA and segment queries: :mod:`.generic` (any model), :mod:`.small` (at most two
  emitting states per code), :mod:`.sparse` (large models made mostly of chains);
* :mod:`.backends` -- chooses a model's family; :mod:`.passes` -- drives each family's
  posterior kernels over chunks of codes (whole record or streaming);
* the Python face: :mod:`.api` (whole-record calls), :mod:`.stream` (posteriors in bounded
  memory), :mod:`.stream_paths` (Viterbi and MEA paths in pieces), :mod:`.mea` (the MEA
  path and its NumPy reference);
* shared parts: :mod:`.tables` (a model's arrays), :mod:`._common` (compile options,
  rescaling rule, model arrays), :mod:`.buffers` (work arrays), :mod:`.jitcache` (the
  on-disk cache of compiled kernels);
* :mod:`.training` (expected counts for Baum-Welch), :mod:`.sampling` (records drawn from
  a model), :mod:`.reference` (slow plain-NumPy oracle of every pass).
"""

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
