"""The ``#`` provenance lines every GFF3 seqstate writes carries after its header."""

from __future__ import annotations

from seqstate import __version__
from seqstate.io.gff3 import comment_lines

__all__ = ["gff3_provenance"]


def gff3_provenance(model_name: str, model_sha256: str) -> str:
    """``# tool seqstate VERSION``, ``# model NAME`` and ``# model_sha256 HEX`` lines.

    No time and no path: the same run gives the same bytes.  GFF3 1.26 reads a
    line starting with one ``#`` as a comment; these follow the ``##`` header lines.
    """
    return comment_lines(
        [
            ("tool", f"seqstate {__version__}"),
            ("model", model_name),
            ("model_sha256", model_sha256),
        ]
    )
