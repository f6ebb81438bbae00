"""Inputs every command reads the same way: records checked against a model, model files."""

from __future__ import annotations

from pathlib import Path

from seqstate.errors import SequenceFormatError
from seqstate.io.fasta import Record, SkippedRecord, read_fasta
from seqstate.model import Model

DNA = "ACGT"


def read_records(
    path: str,
    model: Model,
    *,
    empty_records: str = "error",
    skipped: list[SkippedRecord] | None = None,
) -> list[Record]:
    """All FASTA records of ``path``, validated for the model's alphabet.

    ``empty_records`` and ``skipped``: as :func:`seqstate.io.fasta.iter_fasta`.
    """
    check = "dna" if set(model.alphabet) <= set(DNA) else None
    return read_fasta(path, alphabet_check=check, empty_records=empty_records, skipped=skipped)


def check_symbols(records: list[Record], model: Model, path: str) -> None:
    """For non-DNA alphabets: every character must be a symbol of the model (or its case)."""
    allowed = set(model.alphabet) | set(model.alphabet.lower()) | set(model.alphabet.upper())
    for rec in records:
        text = rec.seq.decode("ascii", errors="replace")
        for i, ch in enumerate(text):
            if ch not in allowed:
                raise SequenceFormatError(
                    f"position {i + 1} has character {ch!r}, expected one of the model's "
                    f"symbols {model.alphabet!r}",
                    path=path,
                    where=f"record '{rec.id}'",
                )


def read_model_records(
    path: str,
    model: Model,
    *,
    empty_records: str = "error",
    skipped: list[SkippedRecord] | None = None,
) -> list[Record]:
    """:func:`read_records`, and for a model whose alphabet is not DNA :func:`check_symbols`."""
    records = read_records(path, model, empty_records=empty_records, skipped=skipped)
    if not set(model.alphabet) <= set(DNA):
        check_symbols(records, model, path)
    return records


def model_inputs(spec: str) -> list[Path]:
    """The files of a model (manifest and tables) an output must never replace."""
    from seqstate.io.tables import TABLE_FILES, resolve_model_path

    manifest = resolve_model_path(spec)
    return [manifest] + [manifest.parent / name for name in TABLE_FILES.values()]
