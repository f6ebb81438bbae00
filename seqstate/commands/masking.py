"""``--masked``: how a command reads lowercase (soft-masked) bases.

* ``base`` -- as their base (the case is ignored);
* ``unknown`` -- as unknown bases (marginalised, like N);
* ``evidence`` -- as their base plus an observed mask, scored by the model's mask table
  (P(masked | state), see :mod:`seqstate.model.core`): a stretch of soft-masked bases
  then weighs against the states that are rarely masked.  An unknown base carries no
  mask evidence.  A model without a mask table cannot be run this way (a usage error);
  with ``base`` or ``unknown`` a model's mask table is not used.
"""

from __future__ import annotations

from seqstate.engine import api
from seqstate.errors import UsageError
from seqstate.model import Model

#: The values of ``--masked``.
MASKED_CHOICES = ("base", "unknown", "evidence")


def check_masked(value: str) -> None:
    """A UsageError unless ``value`` is one of :data:`MASKED_CHOICES`."""
    if value not in MASKED_CHOICES:
        raise UsageError(f"--masked {value!r} is not base, unknown or evidence")


def require_mask(model: Model, masked: str) -> None:
    """A UsageError when ``masked`` is ``evidence`` and ``model`` has no mask table."""
    if masked == "evidence" and model.mask is None:
        raise UsageError(
            f"--masked evidence: model '{model.name}' has no mask table (P(masked | state)); "
            "fit one with 'seqstate fit FASTA -m MODEL --labels FILE --masked evidence -o "
            "FOLDER' on a soft-masked FASTA, or use --masked base or unknown"
        )
    if masked == "evidence" and (
        len(model.alphabet) > 63 or any(c.islower() for c in model.alphabet)
    ):
        raise UsageError(
            f"--masked evidence: model '{model.name}' has lower-case symbols or more than 63 "
            f"in its alphabet {model.alphabet!r}, so lower case cannot mark soft-masked bases"
        )


def prepare_masked(model: Model, masked: str) -> api.EngineTables:
    """The engine tables of ``model`` for a run with ``--masked masked``."""
    check_masked(masked)
    require_mask(model, masked)
    return api.prepare(model, mask=masked == "evidence")
