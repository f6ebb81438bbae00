"""What ``seqstate fit`` writes: the provenance, the fitted model, and its model folder.

The model folder follows the overwrite rule of :mod:`seqstate.io.atomic`: only the
model's own files (manifest and tables) are outputs; the folder may exist and hold
other files, which are never touched.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from seqstate import __version__
from seqstate.commands.fit.estimation import replace_tables
from seqstate.errors import ModelFormatError, UsageError
from seqstate.io.atomic import atomic_folder, check_outputs
from seqstate.io.tables import MANIFEST, TABLE_FILES, load_model, model_sha256, render_tables
from seqstate.model import Model, validate

if TYPE_CHECKING:
    from seqstate.commands.fit import FitOptions, FitRun


def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 (hex) of a file's bytes as stored (compressed files are not unpacked)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _model_file_names() -> list[str]:
    """The files a model folder of ours consists of: manifest and tables."""
    return [MANIFEST, *TABLE_FILES.values()]


def check_model_folder(
    out: Path, force: bool, inputs: Sequence[str | os.PathLike | None] = ()
) -> None:
    """The overwrite rule for a model folder: its own files (manifest and tables) are
    the outputs; the folder may exist and hold other files, which are never touched."""
    if not str(out):
        raise UsageError("-o/--out is empty: expected a model folder name")
    if (out.exists() or out.is_symlink()) and not out.is_dir():
        raise UsageError(f"output '{out}' exists and is not a folder: not replaced")
    files = [out / name for name in _model_file_names()]
    check_outputs(files, inputs, force=True)  # an input among them: always refused
    present = [f.name for f in files if f.exists() or f.is_symlink()]
    if present and not force:
        raise UsageError(
            f"output '{out}' already exists as a model ({', '.join(present)}): use --force "
            "to replace the model's files (other files in the folder are kept)"
        )


def write_model_folder(
    model: Model,
    out: str | os.PathLike,
    *,
    force: bool = False,
    inputs: Sequence[str | os.PathLike | None] = (),
) -> Path:
    """Write ``model``'s manifest and tables into the folder ``out`` all-or-nothing.

    The files are staged inside ``out``, read back and checked, then committed
    together (see :mod:`seqstate.io.atomic`).  Only the model's own files are
    written; with ``force`` existing ones are replaced, and any other file in
    the folder is left as it is.  ``inputs`` are never overwritten.  Returns the
    folder.
    """
    out = Path(out)
    check_model_folder(out, force, inputs)

    def reads_back(stage: Path) -> None:
        if not load_model(stage).equals(model):
            raise RuntimeError("the written model does not read back identically")

    return atomic_folder(out, render_tables(model), force=force, inputs=inputs, check=reads_back)


def provenance(opts: FitOptions, run: FitRun) -> dict[str, Any]:
    """The ``[provenance]`` table of the fitted model: inputs and their SHA-256, methods,
    settings, stop reason, log-likelihood (natural log) and the rows the counts missed."""
    start_model = run.start_model
    prov: dict[str, Any] = {
        "tool": f"seqstate {__version__}",
        "command_line": " ".join(opts.command_line) if opts.command_line else "",
        "method": ", then ".join(run.methods),
        "start_model": start_model.name,
        "start_model_sha256": model_sha256(start_model),
        "fasta": str(opts.fasta),
        "fasta_sha256": file_sha256(opts.fasta),
    }
    if opts.labels:
        prov.update(
            {
                "labels": str(opts.labels),
                "labels_sha256": file_sha256(opts.labels),
                "labels_features": run.n_features,
                "state_rule": run.rule,
                "pseudocount_counting": run.pc_count,
            }
        )
    if run.labelling is not None:
        prov["labelling"] = run.labelling
    prov["records"] = len(run.ids)
    prov["bases"] = run.bases
    prov["stretch"] = run.stretch
    prov["masked"] = opts.masked
    if opts.masked == "evidence":
        from seqstate.commands.fit.estimation import mask_pools

        how = []
        if run.mask_note:
            how.append(run.mask_note)
        if opts.labels:
            how.append(
                "a mask chain counted from the labelled bases (soft-masked share of the known "
                "bases by what precedes them, "
                f"pseudocount {run.pc_count:g} on both sides)"
            )
        if opts.em:
            how.append("re-estimated by Baum-Welch from the expected masked and unmasked bases")
        prov["mask_table"] = "; ".join(how) + "; pooled by " + ", ".join(mask_pools(start_model)[1])
    elif start_model.mask is not None:
        prov["mask_table"] = "copied from the start model (not used with --masked " + (
            opts.masked + ")"
        )
    if opts.em:
        prov.update(
            {
                "pseudocount_em": run.pc_em,
                "max_iter": opts.max_iter,
                "tol": opts.tol,
                "iterations": run.iterations,
            }
        )
    prov["stop_reason"] = run.stop_reason
    prov["frozen"] = run.frozen.describe(start_model)
    prov["loglik_nat"] = run.loglik
    prov["log_base"] = "natural log"
    prov["rows_without_counts_kept"] = run.kept
    if opts.labels:
        prov["states_without_counts"] = run.unseen
    prov["emission_counts"] = "full-order contexts only; back-off rows " + (
        "held at the EM start model's and listed explicitly"
        if opts.em
        else "derived from the counted table"
    )
    return prov


def fitted_model(opts: FitOptions, run: FitRun, prov: dict[str, Any]) -> Model:
    """The model to write: the fitted tables under the new name, description and
    provenance, with the start model's manifest extras; validated."""
    start_model = run.start_model
    name = opts.name or Path(opts.out).name or "fitted"
    description = (
        f"Fitted by seqstate fit ({prov['method']}) from model '{start_model.name}' "
        f"on {Path(opts.fasta).name}"
        + (f" with the features of {Path(opts.labels).name}" if opts.labels else "")
        + "; see [provenance]. Start model: "
        + start_model.description
    )
    final = replace_tables(
        run.model,
        name=name,
        description=description,
        provenance=prov,
        extra=dict(start_model.extra),
    )
    try:
        validate(final)
    except ModelFormatError as exc:
        raise ModelFormatError(
            f"the fitted model is not valid ({exc.message}); a --pseudocount above 0 keeps "
            "every allowed move possible"
        ) from None
    return final
