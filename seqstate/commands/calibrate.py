"""``seqstate calibrate``: do a model's posteriors mean what they say?

Two sources of truth:

- *sampled* (default): records drawn from the model with their true state paths
  (:mod:`seqstate.engine.sampling`, as ``seqstate sample`` draws them).  A model is
  calibrated on its own samples by construction, so this checks the engine's numbers;
  :func:`sampled_records` can draw from one model while another decodes (a wrong model
  must then show up as miscalibrated).
- *a trusted annotation*: ``--fasta SEQS --truth KNOWN.gff3|bed|gtf``; features whose
  type is a label of the model mark the bases truly in that label.

Per track group (label, strand) two reliability tables (:mod:`.calibration`):
``bases`` (each base's posterior of the group against whether it truly carries the
group) and ``features`` (each decoded feature's ``segment_probability`` against
whether every base of its run truly carries the group).  Features are decoded as
``annotate`` decodes them with the model's own defaults.  Coordinates: 0-based
half-open inside.

With ``--fit-into MODEL_DIR`` the run's forecasts also fit a recalibration table
(:mod:`seqstate.commands.recalibrate`), written with the model as a new folder.  A
recalibrated model gets the same tables for its calibrated forecasts, and is never
measured on the stretches its table was fitted on (refused, or marked in-sample).

This module holds the run (options checked, outputs written); the options, report and
its writing are in :mod:`seqstate.commands.calibrate_report`, the records and forecasts
in :mod:`seqstate.commands.calibrate_collect` (their public names re-exported here).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from seqstate import log
from seqstate.commands.calibrate_collect import (
    TruthRecord,
    calibrate_records,
    file_records,
    gene_forecasts,
    measured_stretches,
    sampled_records,
)
from seqstate.commands.calibrate_report import (
    DEFAULT_LENGTH,
    DEFAULT_RECORDS,
    FIGURE_FORMATS,
    MAX_BINS,
    MAX_RECORD_BASES,
    MAX_RECORDS,
    REPORT_FORMATS,
    TSV_COLUMNS,
    CalibrateOptions,
    CalibrateReport,
    LabelCalibration,
    _save_figure,
    _suffix,
    figure_svg,
    reliability_figure,
    write_json,
    write_tsv,
)
from seqstate.commands.inputs import read_set
from seqstate.commands.recalibrate import (
    Collector,
    check_out_of_sample,
    fit_recalibration,
    overlaps,
    recalibrated_model,
    stretches_of,
    write_recalibrated,
)
from seqstate.errors import UsageError
from seqstate.io.atomic import OutputSet, check_outputs
from seqstate.io.tables import load_model
from seqstate.model import Model

__all__ = [
    "CalibrateOptions",
    "CalibrateReport",
    "DEFAULT_LENGTH",
    "DEFAULT_RECORDS",
    "FIGURE_FORMATS",
    "LabelCalibration",
    "MAX_BINS",
    "MAX_RECORDS",
    "MAX_RECORD_BASES",
    "REPORT_FORMATS",
    "TSV_COLUMNS",
    "TruthRecord",
    "calibrate",
    "calibrate_records",
    "figure_svg",
    "file_records",
    "fitted_model",
    "gene_forecasts",
    "measured_stretches",
    "reliability_figure",
    "sampled_records",
    "write_json",
    "write_tsv",
]


__all__ = [
    "CalibrateOptions",
    "CalibrateReport",
    "LabelCalibration",
    "TruthRecord",
    "calibrate",
    "calibrate_records",
    "file_records",
    "reliability_figure",
    "sampled_records",
    "write_json",
    "write_tsv",
]


def _given(*options: tuple[str, object]) -> list[str]:
    """The names of the options whose value is not None, in the order given."""
    return [name for name, value in options if value is not None]


def _check(opts: CalibrateOptions) -> None:
    if opts.fasta is None:
        given = _given(
            ("--type", opts.types or None),
            ("--region", opts.region),
            ("--records-file", opts.record_ids),
        )
        if given:
            raise UsageError(
                f"{', '.join(given)} only apply to --fasta with --truth: give them, or leave "
                f"{'it' if len(given) == 1 else 'them'} out to sample"
            )
    if opts.fasta is not None:
        if opts.region is not None and opts.record_ids is not None:
            raise UsageError("--records cannot be combined with --region (a region names one)")
        given = _given(("--length", opts.length), ("--seed", opts.seed))
        if given:
            raise UsageError(
                f"{', '.join(given)} only apply to sampled records: leave them out with --fasta"
            )
    if opts.length is None:
        opts.length = DEFAULT_LENGTH
    if opts.records is None:
        opts.records = DEFAULT_RECORDS
    if opts.seed is None:
        opts.seed = 0
    if opts.length < 1:
        raise UsageError(f"--length {opts.length} must be at least 1")
    if opts.length > MAX_RECORD_BASES:
        raise UsageError(f"--length {opts.length:,} is more than {MAX_RECORD_BASES:,} bases")
    if opts.records < 1:
        raise UsageError(f"--records {opts.records} must be at least 1")
    if opts.records > MAX_RECORDS:
        raise UsageError(f"--records {opts.records:,} is more than {MAX_RECORDS:,}")
    if opts.seed < 0:
        raise UsageError(f"--seed {opts.seed} must be 0 or more")
    if not 1 <= opts.bins <= MAX_BINS:
        raise UsageError(f"--bins {opts.bins} must be between 1 and {MAX_BINS}")
    if (opts.fasta is None) != (opts.truth is None):
        raise UsageError("--fasta and --truth go together: give both, or neither to sample")
    if opts.out is not None:
        _suffix(opts.out, REPORT_FORMATS, "report")
    if opts.figure is not None:
        _suffix(opts.figure, FIGURE_FORMATS, "figure")
    if "-" in (opts.out, opts.figure, opts.fit_into):
        raise UsageError("calibrate writes files: '-' (standard output) is not accepted")
    if not 2 <= opts.folds <= 100:
        raise UsageError(f"--folds {opts.folds} must be between 2 and 100")
    if opts.block < 1:
        raise UsageError(f"--fold-block {opts.block} must be at least 1 base")


def calibrate(opts: CalibrateOptions, quiet: bool = True) -> CalibrateReport:
    """Run ``seqstate calibrate``: check, measure, then write report and figure together."""
    _check(opts)
    inputs = read_set(
        fasta=opts.fasta, model=opts.model, files=[opts.truth], records=opts.record_ids
    )
    check_outputs([opts.out, opts.figure], inputs, force=opts.force)
    if opts.fit_into is not None:
        from seqstate.commands.fit.writing import check_model_folder

        check_model_folder(Path(opts.fit_into), opts.force, inputs)
    if opts.figure is not None:
        from seqstate.commands.plot import require_matplotlib

        require_matplotlib()
    model = load_model(opts.model)
    collector = Collector(opts.folds, opts.block) if opts.fit_into is not None else None
    if collector is not None and model.recalibration is not None:
        # forecasts are the raw scores: the old table is replaced, never stacked
        import dataclasses

        model = dataclasses.replace(model, recalibration=None)
    progress = log.progress_for(quiet, "calibrate")
    if opts.fasta is not None and opts.truth is not None:
        recs, keep = file_records(
            model,
            opts.fasta,
            opts.truth,
            types=opts.types,
            region=opts.region,
            record_ids=opts.record_ids,
        )
        total = sum(int(r.symbols.shape[0]) for r in recs)
        measured = measured_stretches(opts, recs)
        in_sample = _in_sample(model, measured, opts)
        labs, n_rec, n_bases = calibrate_records(model, recs, opts.bins, progress, total, collector)
        labs = [labs[k] for k in keep]
        report = CalibrateReport(model.name, "truth", n_rec, n_bases, opts.bins, None, labs)
        if opts.region is not None:
            report.stretch = opts.region.strip()
        elif opts.record_ids is not None:
            report.stretch = ", ".join(r.id for r in recs)
    else:
        assert opts.length is not None and opts.records is not None and opts.seed is not None
        it = sampled_records(model, opts.length, opts.records, opts.seed)
        total = opts.length * opts.records
        measured = measured_stretches(opts, None)
        in_sample = _in_sample(model, measured, opts)
        labs, n_rec, n_bases = calibrate_records(model, it, opts.bins, progress, total, collector)
        report = CalibrateReport(model.name, "sampled", n_rec, n_bases, opts.bins, opts.seed, labs)
    report.out, report.figure = opts.out, opts.figure
    report.in_sample = in_sample
    new_model = None
    if collector is not None and opts.fit_into is not None:
        new_model = fitted_model(opts, model, collector, measured)
        report.fitted_into, report.maps = opts.fit_into, len(new_model.recalibration.maps)  # type: ignore[union-attr]
    if opts.out is None and opts.figure is None:
        if new_model is not None and opts.fit_into is not None:
            write_recalibrated(new_model, opts.fit_into, opts.force, inputs)
        return report
    fig = reliability_figure(report) if opts.figure is not None else None
    if new_model is not None and opts.fit_into is not None:
        write_recalibrated(new_model, opts.fit_into, opts.force, inputs)
    with OutputSet(force=opts.force, inputs=inputs) as outs:
        if opts.out is not None:
            handle = outs.open_text(opts.out)
            if _suffix(opts.out, REPORT_FORMATS, "report") == "json":
                write_json(handle, report)
            else:
                write_tsv(handle, report)
        if fig is not None and opts.figure is not None:
            _save_figure(fig, outs.path(opts.figure), _suffix(opts.figure, FIGURE_FORMATS, "x"))
    return report


def _in_sample(model: Model, measured: list[str], opts: CalibrateOptions) -> bool:
    """Whether a recalibrated ``model`` is measured on bases its table was fitted on:
    refused, unless ``opts.in_sample`` (then the report is marked)."""
    if model.recalibration is None:
        return False
    if not opts.in_sample:
        check_out_of_sample(model, measured)
        return False
    return bool(overlaps(stretches_of(model), measured))


def fitted_model(
    opts: CalibrateOptions, model: Model, collector: Collector, measured: list[str]
) -> Model:
    """``model`` with a recalibration table fitted on ``collector``'s forecasts, named
    after the ``--fit-into`` folder; its ``[recalibration]`` table names the truth and
    FASTA (with their SHA-256) and the stretches fitted on."""
    import dataclasses

    from seqstate.commands.fit.writing import file_sha256
    from seqstate.io.tables import model_sha256

    recal, _ = fit_recalibration(collector)
    assert opts.fit_into is not None
    meta: dict[str, Any] = {"forecasts_of": model.name, "forecasts_sha256": model_sha256(model)}
    if opts.truth is not None and opts.fasta is not None:
        meta.update(
            {
                "truth": str(opts.truth),
                "truth_sha256": file_sha256(opts.truth),
                "fasta": str(opts.fasta),
                "fasta_sha256": file_sha256(opts.fasta),
            }
        )
        if opts.types:
            meta["types"] = list(opts.types)
    else:
        meta["truth"] = "the model's own samples (sampled paths)"
    meta.update({"stretches": measured, "folds": opts.folds, "fold_block": opts.block})
    name = Path(opts.fit_into).name or model.name
    return recalibrated_model(dataclasses.replace(model, name=name), recal, meta)
