"""Model directories: a TOML manifest that points at TSV tables.

Layout (our own)::

    mymodel/
      model.toml        manifest: name, description, alphabet, order, states, tables
      start.tsv         state <TAB> start
      end.tsv           state <TAB> end          (optional)
      transitions.tsv   from <TAB> to-state ...  (rows = from, columns = to; empty = 0 = forbidden)
      emissions.tsv     state <TAB> context <TAB> one column per symbol
      mask.tsv          state <TAB> mask [<TAB> after_masked <TAB> after_unmasked]
                        (optional: P(soft-masked base | state), or a mask chain)
      recalibration.tsv group <TAB> score <TAB> method <TAB> temperature <TAB> forecast
                        <TAB> calibrated (optional, read only when [tables] names it:
                        monotone maps of the scores, :mod:`seqstate.io.recal_table`)

A model may also be given as the path of its manifest file; table paths are
relative to the manifest's folder.  Lines starting with ``#`` and blank lines
are ignored in tables.  The emission context is the preceding symbols, oldest
first; ``.`` stands for the empty context of order 0.  Rows for shorter contexts
than the model's order are optional back-off rows.

Everything is validated before any sequence is read; problems raise
:class:`~seqstate.errors.TableFormatError` naming the file and line.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from seqstate.errors import UsageError
from seqstate.io.atomic import atomic_folder
from seqstate.io.manifest import (
    FORMAT,
    MANIFEST,
    MAX_MANIFEST_BYTES,
    TABLE_FILES,
    load_manifest,
    render_manifest,
)
from seqstate.io.tsv_tables import EMPTY_CONTEXT
from seqstate.model import Model, sha256_of_text

__all__ = [
    "EMPTY_CONTEXT",
    "FORMAT",
    "MANIFEST",
    "MAX_MANIFEST_BYTES",
    "TABLE_FILES",
    "builtin_dir",
    "list_builtin",
    "load_model",
    "model_sha256",
    "render_tables",
    "resolve_model_path",
    "save_model",
]


# ---------------------------------------------------------------- built-ins
def builtin_dir() -> Path:
    """Folder of the built-in models (package data, or ``models/`` in a checkout)."""
    here = Path(__file__).resolve().parent.parent
    for cand in (here / "models", here.parent / "models"):
        if cand.is_dir():
            return cand
    return here / "models"


def list_builtin() -> list[str]:
    """Names of the built-in models, sorted."""
    base = builtin_dir()
    if not base.is_dir():
        return []
    return sorted(p.name for p in base.iterdir() if (p / MANIFEST).is_file())


def resolve_model_path(spec: str | os.PathLike) -> Path:
    """A model given as a built-in NAME or a PATH (folder or manifest) -> manifest path."""
    p = Path(spec)
    if p.is_dir():
        if (p / MANIFEST).is_file():
            return p / MANIFEST
        raise UsageError(f"model folder '{p}' has no {MANIFEST}")
    if p.is_file():
        return p
    name = str(spec)
    if name in list_builtin():
        return builtin_dir() / name / MANIFEST
    known = ", ".join(list_builtin()) or "none"
    raise UsageError(
        f"unknown model '{name}': not a file or folder, nor a built-in model (built-in: {known})"
    )


def load_model(spec: str | os.PathLike) -> Model:
    """Load and fully validate a model from a built-in name, a folder or a manifest."""
    manifest = resolve_model_path(spec)
    return load_manifest(manifest)


# ---------------------------------------------------------------- writing
def _fmt(x: float) -> str:
    """Shortest text that reads back as the same float64 (empty for 0 in sparse tables)."""
    return repr(float(x))


def render_tables(model: Model) -> list[tuple[str, str]]:
    """The canonical text of every file of ``model``: [(file name, text)], manifest first."""
    names = model.state_names
    out: list[tuple[str, str]] = [(MANIFEST, render_manifest(model))]
    out.append(
        (
            TABLE_FILES["start"],
            "state\tstart\n" + "".join(f"{n}\t{_fmt(v)}\n" for n, v in zip(names, model.start)),
        )
    )
    if model.end is not None:
        out.append(
            (
                TABLE_FILES["end"],
                "state\tend\n" + "".join(f"{n}\t{_fmt(v)}\n" for n, v in zip(names, model.end)),
            )
        )
    # values go through .tolist() (Python floats: repr is _fmt's text) row by row, the
    # contexts are spelled once per order: the same text, about 3x faster on 800 states
    lines = ["from\t" + "\t".join(names) + "\n"]
    for n, row in zip(names, model.transitions.tolist()):
        lines.append(n + "\t" + "\t".join(["" if v == 0 else repr(v) for v in row]) + "\n")
    out.append((TABLE_FILES["transitions"], "".join(lines)))
    a = len(model.alphabet)

    def contexts(j: int) -> list[str]:
        return [model.context_string(j, c) or EMPTY_CONTEXT for c in range(a**j)]

    lower = {j: (contexts(j), model.lower_emissions[j]) for j in sorted(model.lower_emissions)}
    top = contexts(model.order)
    lines = ["state\tcontext\t" + "\t".join(model.alphabet) + "\n"]
    for i, n in enumerate(names):
        for ctxs, arr in lower.values():
            given = ~np.all(np.isnan(arr[i]), axis=-1)
            for c, (ctx, row) in enumerate(zip(ctxs, arr[i].tolist())):
                if given[c]:
                    lines.append(f"{n}\t{ctx}\t" + "\t".join(map(repr, row)) + "\n")
        for ctx, row in zip(top, model.emissions[i].tolist()):
            lines.append(f"{n}\t{ctx}\t" + "\t".join(map(repr, row)) + "\n")
    out.append((TABLE_FILES["emissions"], "".join(lines)))
    if model.mask is not None:
        rows = model.mask.reshape(len(names), -1)
        cols = ["mask"] if model.mask.ndim == 1 else ["mask", "after_masked", "after_unmasked"]
        head = "state\t" + "\t".join(cols) + "\n"
        body = "".join(n + "".join(f"\t{_fmt(v)}" for v in r) + "\n" for n, r in zip(names, rows))
        out.append((TABLE_FILES["mask"], head + body))
    if model.recalibration is not None:
        from seqstate.io.recal_table import render_recalibration

        out.append((TABLE_FILES["recalibration"], render_recalibration(model.recalibration)))
    return out


def model_sha256(model: Model) -> str:
    """SHA-256 of the model's canonical text (:func:`render_tables`): the manifest as seqstate
    writes it (name, description, alphabet, order, decoding, states and every table of the
    manifest, ``[provenance]`` included) and the start, end, transition, emission and mask
    tables,
    each value in shortest round-trip form.  A new name or description changes it; comments,
    table file names, row and column order and number spelling in the folder do not."""
    return sha256_of_text(render_tables(model))


def save_model(model: Model, folder: str | os.PathLike) -> Path:
    """Write ``model`` as a model folder (created if absent), its files replaced together
    (:func:`~seqstate.io.atomic.atomic_folder`); returns the manifest path."""
    folder = atomic_folder(folder, render_tables(model), force=True)
    return folder / MANIFEST
