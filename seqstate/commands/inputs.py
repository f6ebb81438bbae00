"""Inputs every command reads the same way: records checked against a model, model files."""

from __future__ import annotations

from pathlib import Path

from seqstate.errors import SequenceFormatError
from seqstate.io import faidx
from seqstate.io.fasta import Record, SkippedRecord, read_fasta
from seqstate.io.regions import Region
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
    return read_fasta(
        path, alphabet_check=alphabet_check_of(model), empty_records=empty_records, skipped=skipped
    )


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


def alphabet_check_of(model: Model) -> str | None:
    """``"dna"`` when the model reads nucleotides (the FASTA readers check them), else None."""
    return "dna" if set(model.alphabet) <= set(DNA) else None


def indexed_lengths(path: str, model: Model) -> dict[str, int] | None:
    """Record ID -> length (bases) from the FASTA index of ``path``, in file order.

    The index is built on first use for a large file (:func:`seqstate.io.faidx.load_index`);
    None when ``path`` has no usable index (standard input, plain gzip, a small file):
    the caller reads the records with :func:`read_model_records`.
    """
    return faidx.record_lengths(path, alphabet_check=alphabet_check_of(model))


def read_model_region(path: str, model: Model, region: Region) -> Record | None:
    """The bases of ``region`` (0-based half-open) read through the FASTA index, checked
    for the model's alphabet as :func:`read_model_records` checks them; None when the file
    has no usable index (see :func:`indexed_lengths`).  ``seq[0]`` is the base at
    ``region.start0``."""
    record = faidx.region_record(path, region, alphabet_check=alphabet_check_of(model))
    if record is not None and alphabet_check_of(model) is None:
        check_symbols([record], model, path)
    return record


def model_inputs(spec: str) -> list[Path]:
    """The files of a model (manifest and tables) an output must never replace."""
    from seqstate.io.tables import TABLE_FILES, resolve_model_path

    manifest = resolve_model_path(spec)
    return [manifest] + [manifest.parent / name for name in TABLE_FILES.values()]
