"""Inputs every command reads the same way: records checked against a model, and the read
set (every file a command reads, which no output may replace)."""

from __future__ import annotations

import os
import re
import stat
import sys
from collections.abc import Iterable, Sequence
from pathlib import Path

from seqstate.commands.records import RecordSelection
from seqstate.errors import SequenceFormatError
from seqstate.io import faidx
from seqstate.io.fasta import Record, SkippedRecord, read_fasta
from seqstate.io.regions import Region
from seqstate.model import Model

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

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


# ---------------------------------------------------------------- the read set
# Every command builds one list of every file it reads (:func:`read_set`); the overwrite
# rule (:func:`seqstate.io.atomic.check_outputs`, :class:`~seqstate.io.atomic.OutputSet`)
# refuses any output that is one of them, with --force too.

#: ``[[states]]`` headers of a manifest (counted before it is parsed, as the loader does).
_STATES_HEADER = re.compile(rb"^[ \t]*\[\[[ \t]*states[ \t]*\]\]", re.MULTILINE)


def _usable(path: str | os.PathLike | None) -> bool:
    return path is not None and os.fspath(path) not in ("", "-")


def _named_tables(manifest: Path) -> dict[str, str] | None:
    """The ``[tables]`` key -> file name of ``manifest``, or None when it cannot be read.

    Never blocks and never reads much: a manifest that is not a regular file, bigger
    than :data:`~seqstate.io.manifest.MAX_MANIFEST_BYTES`, declaring more states than
    the transition budget allows, not UTF-8 or not TOML gives None (the model loader
    refuses it with its own message before any table is read).
    """
    from seqstate.io.manifest import MAX_MANIFEST_BYTES
    from seqstate.model import MAX_TRANSITION_CELLS

    try:
        fd = os.open(manifest, os.O_RDONLY | os.O_NONBLOCK)
    except (OSError, ValueError):
        return None
    try:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode) or info.st_size > MAX_MANIFEST_BYTES:
            return None
        with os.fdopen(os.dup(fd), "rb") as fh:
            data = fh.read(MAX_MANIFEST_BYTES + 1)
    except OSError:
        return None
    finally:
        os.close(fd)
    declared = len(_STATES_HEADER.findall(data))
    if len(data) > MAX_MANIFEST_BYTES or declared * declared > MAX_TRANSITION_CELLS:
        return None
    try:
        doc = tomllib.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError, RecursionError, ValueError):
        return None
    tables = doc.get("tables", {})
    if not isinstance(tables, dict):
        return None
    return {
        str(key): rel
        for key, rel in tables.items()
        if isinstance(rel, str) and rel.strip() and "\x00" not in rel
    }


def model_inputs(spec: str | os.PathLike) -> list[Path]:
    """The files of a model an output must never replace: the manifest and every table
    it reads.

    ``spec`` is a built-in NAME (its package files), a folder or a manifest path; an
    unknown one raises :class:`~seqstate.errors.UsageError` as the model loader does.
    The tables are those the manifest's ``[tables]`` names (every key, the optional
    ``end`` and ``mask`` too), relative to its folder, and the default file name of
    each table it does not name (but ``recalibration``, read only when named); when
    the manifest cannot be parsed, every default name
    (:data:`~seqstate.io.manifest.TABLE_FILES`).
    """
    from seqstate.io.tables import TABLE_FILES, resolve_model_path

    manifest = resolve_model_path(spec)
    named = _named_tables(manifest)
    if named is None:
        names = dict(TABLE_FILES)
    else:  # the recalibration table is read only when [tables] names it
        defaults = {k: v for k, v in TABLE_FILES.items() if k != "recalibration"}
        names = {**defaults, **named}
    tables = [manifest.parent / rel for rel in dict.fromkeys(names.values())]
    return [manifest, *tables]


def fasta_inputs(path: str | os.PathLike | None) -> list[Path]:
    """A FASTA file and its index files (``PATH.fai``, ``PATH.gzi``: read when present,
    :mod:`seqstate.io.faidx`); nothing for None or standard input (``-``)."""
    if not _usable(path):
        return []
    assert path is not None
    return [Path(path), faidx.fai_path(path), faidx.gzi_path(path)]


def records_inputs(selection: Sequence[str] | None) -> list[Path]:
    """The ``--records-file`` a record selection was read from (nothing for ``--records``
    or no selection; see :class:`seqstate.commands.records.RecordSelection`)."""
    source = selection.source if isinstance(selection, RecordSelection) else None
    return [Path(source)] if source is not None and _usable(source) else []


def file_inputs(paths: Iterable[str | os.PathLike | None]) -> list[Path]:
    """Plain input files (regions, truth, reference, labels, run reports, group files),
    each read as it is; None and standard input (``-``) are left out."""
    return [Path(p) for p in paths if _usable(p) and p is not None]


def read_set(
    *,
    fasta: str | os.PathLike | None = None,
    model: str | os.PathLike | None = None,
    files: Iterable[str | os.PathLike | None] = (),
    records: Sequence[str] | None = None,
) -> list[Path]:
    """Every file a command reads, once each, in this order: the FASTA and its index
    files (:func:`fasta_inputs`), the model's manifest and tables (:func:`model_inputs`),
    the plain ``files`` (:func:`file_inputs`) and the records file of ``records``
    (:func:`records_inputs`).  Commands pass it as the inputs of the overwrite rule."""
    found = [
        *fasta_inputs(fasta),
        *(model_inputs(model) if model is not None else []),
        *file_inputs(files),
        *records_inputs(records),
    ]
    return list(dict.fromkeys(found))
