"""``seqstate fit``: fit a model's tables to sequences, by counting from known
features, by Baum–Welch, or both (counting first, then EM from the counted model).

**Counting from labels.**  Every base gets one state from the features that cover
it (:mod:`.labels` reads them; :mod:`.rules` picks a state of the label per base,
or the gene layout labels whole records).  The counts of starts, transitions, ends
(models with an end table) and order-k emissions (:mod:`.counting`) plus a
pseudocount become probabilities (:mod:`.estimation`).

**Baum–Welch (EM).**  Expected counts from a checkpointed forward–backward over
every record, pooled, then the same normalisation, repeated until the relative
gain falls below ``tol`` or ``max_iter`` updates have been made (:mod:`.em`).

Pseudocounts: ``--pseudocount`` defaults to 1 for counting and to 0 for EM (the
maximum-likelihood Baum–Welch update).  A value given explicitly applies to both
stages.  Zeros of the start model stay exactly zero, rows without counts are kept,
frozen parts are copied (:mod:`.estimation`); emission counts come from full-order
contexts only and back-off rows are not re-estimated (:mod:`.counting`, :mod:`.em`).
The model folder and its provenance are written by :mod:`.writing`; nothing is
written unless the whole run succeeds.

**The mask table** (``--masked evidence``): a mask chain (P(masked | state) with no
known base before, after a masked base, after an unmasked one).  Counting adds, per
state and column, the known bases of the labelled path in upper case and soft-masked,
pooled by label (:func:`.estimation.estimate_mask`) with the counting pseudocount, and
writes the model's mask table; Baum–Welch then runs on codes that read the mask as evidence and
re-estimates the mask table from the expected counts, pooled the same way.  EM
without labels starts every state from the soft-masked share of all known bases
(when the start model has no mask table).  With ``base`` or ``unknown`` a mask table
of the start model is copied unchanged.

Memory: the records are read whole; EM keeps their emission codes (one byte per
base for models with up to 255 codes) and works in O(M sqrt N) per record.

Coordinates: 0-based half-open inside; GFF3 is 1-based closed, BED 0-based
half-open; positions in messages are 1-based.  Log-likelihoods are natural logs.
"""

from __future__ import annotations

import math
import os
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from seqstate.commands.fit.counting import (
    Counts,
    chain_runs,
    count_mask,
    count_path,
    pool_counts,
    states_without_counts,
)
from seqstate.commands.fit.em import (
    DEFAULT_TOL,
    EMResult,
    Log,
    baum_welch,
    em_step,
    expected_counts,
    fixed_backoff,
    quiet,
    with_backoff,
)
from seqstate.commands.fit.estimation import (
    FREEZE_KEYWORDS,
    Frozen,
    estimate,
    objective,
    parse_freeze,
    replace_tables,
    set_length_chains,
)
from seqstate.commands.fit.labels import (
    LabelFeature,
    LabelTrack,
    group_features,
    label_groups,
    paint_labels,
    read_gene_labels,
    read_labels,
    require_gene_units,
    require_label_units,
)
from seqstate.commands.fit.rules import (
    STATE_RULES,
    assign_states,
    default_state_rule,
    resolve_state_rule,
)
from seqstate.commands.fit.stretch import CUT_GENE, Stretch, cut_genes, outside_unknown
from seqstate.commands.fit.writing import (
    check_model_folder,
    file_sha256,
    fitted_model,
    provenance,
    write_model_folder,
)
from seqstate.commands.masking import check_masked
from seqstate.commands.records import choose_stretches, describe_stretches
from seqstate.engine import api
from seqstate.errors import (
    FeatureFormatError,
    ImpossibleSequenceError,
    SequenceFormatError,
    UsageError,
)
from seqstate.io.regions import Region
from seqstate.io.tables import load_model
from seqstate.model import Model

__all__ = [
    "DEFAULT_TOL",
    "FREEZE_KEYWORDS",
    "STATE_RULES",
    "Counts",
    "EMResult",
    "FitOptions",
    "FitReport",
    "FitRun",
    "Frozen",
    "LabelFeature",
    "LabelTrack",
    "Log",
    "assign_states",
    "baum_welch",
    "chain_runs",
    "check_model_folder",
    "count_path",
    "default_state_rule",
    "em_step",
    "estimate",
    "expected_counts",
    "file_sha256",
    "fit",
    "fitted_model",
    "fixed_backoff",
    "group_features",
    "label_groups",
    "objective",
    "paint_labels",
    "parse_freeze",
    "pool_counts",
    "provenance",
    "quiet",
    "read_gene_labels",
    "read_labels",
    "replace_tables",
    "resolve_state_rule",
    "set_length_chains",
    "states_without_counts",
    "stderr_log",
    "with_backoff",
    "write_model_folder",
]


@dataclass
class FitOptions:
    """Everything ``seqstate fit`` was asked to do."""

    model: str
    fasta: str
    out: str
    labels: str | None = None
    labels_format: str = "auto"
    em: bool = False
    max_iter: int = 50
    tol: float = DEFAULT_TOL
    freeze: list[str] = field(default_factory=list)
    pseudocount: float | None = None
    masked: str = "base"
    name: str | None = None
    force: bool = False
    command_line: list[str] = field(default_factory=list)
    bad_genes: str = "skip"
    #: only this stretch (``ID:START-END``, 1-based inclusive, or ``ID``), or only these
    #: record IDs (kept in input order), as on ``annotate``; None: every record
    region: str | None = None
    records: list[str] | None = None


@dataclass
class FitReport:
    """What ``fit`` did: the model written, where, and its provenance."""

    model: Model
    out: Path
    loglik: float
    method: str
    iterations: int
    stop_reason: str
    #: the stretch counted (``all N record(s)``, a region, the records selected)
    stretch: str = ""


@dataclass
class FitRun:
    """What the steps of one :func:`fit` run have found so far; the provenance and the
    report are made of it.  ``model`` is the current fit (the start model at first)."""

    start_model: Model
    frozen: Frozen
    rule: str | None
    pc_count: float
    pc_em: float
    ids: list[str]
    bases: int
    model: Model
    codes: list[np.ndarray] = field(default_factory=list)
    methods: list[str] = field(default_factory=list)
    kept: list[str] = field(default_factory=list)
    unseen: list[str] = field(default_factory=list)
    n_features: int = 0
    labelling: dict[str, Any] | None = None
    #: the stretch counted, as a person reads it (``all N record(s)``, a region, records)
    stretch: str = ""
    regions: list[Region] = field(default_factory=list)
    #: every record ID of the FASTA (the stretch may count fewer)
    fasta_ids: list[str] = field(default_factory=list)
    loglik: float = math.nan
    iterations: int = 0
    stop_reason: str = "counting only (no EM)"
    #: how the mask table was made (``--masked evidence``), for the provenance
    mask_note: str = ""


def _read_sequences(path: str, model: Model) -> list:
    from seqstate.commands.inputs import read_records

    records = read_records(path, model)
    if not set(model.alphabet) <= set("ACGT"):
        allowed = set(model.alphabet) | set(model.alphabet.lower()) | set(model.alphabet.upper())
        for rec in records:
            text = rec.seq.decode("ascii", errors="replace")
            bad = [i for i, ch in enumerate(text) if ch not in allowed][:1]
            if bad:
                raise SequenceFormatError(
                    f"position {bad[0] + 1} has character {text[bad[0]]!r}, expected one of "
                    f"the model's symbols {model.alphabet!r}",
                    path=path,
                    where=f"record '{rec.id}'",
                )
    return records


def _fit_inputs(opts: FitOptions) -> list[str | os.PathLike | None]:
    from seqstate.commands.inputs import read_set

    return [
        *read_set(fasta=opts.fasta, model=opts.model, files=[opts.labels], records=opts.records)
    ]


def check_options(opts: FitOptions) -> None:
    """The checks of ``opts`` that need no file: a UsageError for the first problem."""
    if not opts.labels and not opts.em:
        raise UsageError("nothing to do: give --labels FILE (counting), --em (Baum-Welch) or both")
    if opts.fasta == "-" or opts.labels == "-":
        raise UsageError(
            "--fasta and --labels need files (their SHA-256 goes into the provenance), not '-'"
        )
    if opts.pseudocount is not None and not (
        opts.pseudocount >= 0 and math.isfinite(opts.pseudocount)
    ):
        raise UsageError(f"--pseudocount {opts.pseudocount} must be a finite number >= 0")
    check_masked(opts.masked)
    if opts.em and opts.max_iter < 0:
        raise UsageError(f"--max-iter {opts.max_iter} must be at least 0")
    if opts.em and not opts.tol >= 0:
        raise UsageError(f"--tol {opts.tol} must be a number >= 0")


def _check_input_files(opts: FitOptions) -> None:
    for p, what in ((opts.fasta, "FASTA"), (opts.labels, "labels")):
        if p and not Path(p).is_file():
            err = SequenceFormatError if what == "FASTA" else FeatureFormatError
            raise err("file not found" if not Path(p).exists() else "is not a file", path=p)


def fit(opts: FitOptions, *, log: Log = quiet) -> FitReport:
    """Run ``seqstate fit``: count from labels and/or refine by EM; write the model folder.

    Nothing is written unless the whole run succeeds.
    """
    check_options(opts)
    out = Path(opts.out)
    inputs = _fit_inputs(opts)
    check_model_folder(out, opts.force, inputs)
    start_model = load_model(opts.model)
    frozen = parse_freeze(start_model, opts.freeze)
    rule = resolve_state_rule(start_model) if opts.labels else None
    _check_input_files(opts)
    records = _read_sequences(opts.fasta, start_model)
    lengths = {r.id: len(r.seq) for r in records}
    regions = choose_stretches(lengths, opts.region, opts.records, opts.fasta)
    tables = api.prepare(start_model)
    run = FitRun(
        start_model=start_model,
        frozen=frozen,
        rule=rule,
        pc_count=1.0 if opts.pseudocount is None else float(opts.pseudocount),
        pc_em=0.0 if opts.pseudocount is None else float(opts.pseudocount),
        ids=[r.to_text() if opts.region is not None else r.seqid for r in regions],
        bases=sum(r.end0 - r.start0 for r in regions),
        model=start_model,
        stretch=describe_stretches(regions, lengths),
        regions=regions,
        fasta_ids=list(lengths),
    )
    wanted = set(Stretch(regions).ids)
    records = [r for r in records if r.id in wanted]
    log(f"fit: {len(regions)} stretch(es), {run.bases} bases from {opts.fasta} ({run.stretch})")
    masked = opts.masked == "unknown"
    if opts.labels and rule == "gene_structure":
        _count_genes(run, records, tables, opts.labels, opts, log)
    elif opts.labels and rule is not None:
        _count_labels(run, records, tables, opts.labels, rule, opts, log)
    else:
        by_id = {r.id: r for r in records}
        run.codes = []
        lower = known = 0
        for g in regions:
            seq = by_id[g.seqid].seq[g.start0 : g.end0]
            codes = api.encode(tables, seq, masked_unknown=masked)
            if opts.masked == "evidence":
                raw = np.frombuffer(seq, dtype=np.uint8)
                ok = codes != tables.unknown_code
                known += int(np.count_nonzero(ok))
                lower += int(np.count_nonzero(ok & (raw >= ord("a")) & (raw <= ord("z"))))
                codes = api.mask_evidence_codes(tables, seq, codes, MASK_BLOCKS)
            run.codes.append(codes)
        if opts.masked == "evidence" and run.model.mask is None:
            share = lower / known if known else 0.5
            run.model = replace_tables(run.model, mask=np.full((run.model.n_states, 3), share))
            run.mask_note = (
                f"every state started from the soft-masked share of all known bases ({share:.6g})"
            )
    del records
    if run.unseen:
        log(
            f"fit: warning: {len(run.unseen)} state(s) had no counts, their probabilities come "
            f"from the pseudocount alone: {', '.join(run.unseen)}"
        )
    if opts.em:
        _refine_by_em(run, opts, log)
    else:
        _score_counted(run, log, mask=opts.masked == "evidence")
    prov = provenance(opts, run)
    final = fitted_model(opts, run, prov)
    write_model_folder(final, out, force=opts.force, inputs=inputs)
    return FitReport(
        final, out, run.loglik, prov["method"], run.iterations, run.stop_reason, run.stretch
    )


def _estimate_counted(run: FitRun, counts: Counts, method: str) -> None:
    """Counts -> the counted model (pseudocount of counting, frozen parts kept)."""
    run.unseen = states_without_counts(run.start_model, counts)
    run.model, run.kept = estimate(
        run.start_model, counts, pseudocount=run.pc_count, frozen=run.frozen
    )
    run.methods.append(method)


def _count_genes(
    run: FitRun, records: list, tables: api.EngineTables, path: str, opts: FitOptions, log: Log
) -> None:
    """Counting from a gene annotation: both strands of every record (the mirror path
    on the reverse complement), pooled as the manifest asks."""
    from seqstate.commands.records import require_shared_ids
    from seqstate.io.intervals import read_gene_features
    from seqstate.kinds import gene_labels as genes

    start_model = run.start_model
    masked = opts.masked == "unknown"
    _, features = read_gene_features(path)
    require_shared_ids(path, [f.seqid for f in features], opts.fasta, [r.id for r in records])
    stretch = Stretch(run.regions)
    kept, cut = cut_genes(features, stretch, set(run.fasta_ids) - set(stretch.ids))
    pairs, report = genes.label_records(
        start_model, records, kept, path=path, bad_genes=opts.bad_genes
    )
    for seqid, a, b, gid in cut:
        report.skip(CUT_GENE, gid)
        for k, rec in enumerate(records):
            if rec.id == seqid:
                n = len(rec.seq)
                pairs[2 * k][1][a:b] = -1
                pairs[2 * k + 1][1][n - b : n - a] = -1
    for k, rec in enumerate(records):
        for m in (0, 1):
            outside_unknown(pairs[2 * k + m][1], stretch.on(rec.id), mirrored=m == 1)
    require_gene_units(kept, pairs, report, start_model, path)
    run.n_features = len(kept)
    counts = Counts.zeros(start_model)
    runs: dict[str, list[int]] = {}
    for k, (seq, states) in enumerate(pairs):
        rid = records[k // 2].id + ("" if k % 2 == 0 else " (reverse complement)")
        codes = api.encode(tables, seq, masked_unknown=masked)
        counts.add(count_path(start_model, tables, codes, states, record=rid, path=path))
        if opts.masked == "evidence":
            counts.add(_mask_only(start_model, count_mask(tables, seq, states, chain=True)))
        for group, lengths in chain_runs(start_model, states).items():
            runs.setdefault(group, []).extend(lengths)
        if k % 2 == 0:
            if opts.masked == "evidence":
                codes = api.mask_evidence_codes(tables, seq, codes, MASK_BLOCKS)
            run.codes.extend(codes[g.start0 : g.end0] for g in stretch.on(records[k // 2].id))
    pool_counts(start_model, counts)
    _estimate_counted(run, counts, "counting from a gene annotation")
    chains: dict[str, Any] = {}
    if not (run.frozen.transitions or run.frozen.states):
        run.model, chains = set_length_chains(run.model, runs)
    log(
        f"fit: genes used {report.used}, skipped "
        + (", ".join(f"{v} ({k})" for k, v in sorted(report.skipped.items())) or "none")
    )
    run.labelling = report.as_dict()
    if chains:
        run.labelling["length_chains"] = chains


def _count_labels(
    run: FitRun,
    records: list,
    tables: api.EngineTables,
    path: str,
    rule: str,
    opts: FitOptions,
    log: Log,
) -> None:
    """Counting from labelled features: one state per base by the state rule."""
    start_model = run.start_model
    masked = opts.masked == "unknown"
    from seqstate.commands.records import require_shared_ids

    features = read_labels(path, start_model, opts.labels_format)
    require_shared_ids(path, [f.seqid for f in features], opts.fasta, [r.id for r in records])
    stretch = Stretch(run.regions)
    fasta_ids = set(run.fasta_ids)
    # features on records outside the stretch are ignored; on none of the FASTA, an error
    features = [
        f
        for f in features
        if f.seqid not in fasta_ids or stretch.overlaps(f.seqid, f.start0, f.end0)
    ]
    cut = sum(1 for f in features if stretch.crosses(f.seqid, f.start0, f.end0))
    run.n_features = len(features)
    by_record = group_features(features, {r.id: len(r.seq) for r in records}, path)
    require_label_units(features, start_model, path)
    if cut:
        log(f"fit: {cut} feature(s) cross an edge of the stretch: only their bases inside count")
    counts = Counts.zeros(start_model)
    for rec in records:
        track = paint_labels(
            start_model, len(rec.seq), by_record[rec.id], record=rec.id, path=path, rule=rule
        )
        sym = api.symbols_of(tables, rec.seq, masked_unknown=masked)
        states = assign_states(start_model, rule, track, sym, record=rec.id, path=path)
        outside_unknown(states, stretch.on(rec.id), mirrored=False)
        codes = api.encode(tables, rec.seq, masked_unknown=masked)
        counts.add(
            count_path(start_model, tables, codes, states, record=rec.id, path=path, track=track)
        )
        if opts.masked == "evidence":
            counts.add(_mask_only(start_model, count_mask(tables, rec.seq, states, chain=True)))
            codes = api.mask_evidence_codes(tables, rec.seq, codes, MASK_BLOCKS)
        run.codes.extend(codes[g.start0 : g.end0] for g in stretch.on(rec.id))
    _estimate_counted(run, counts, "counting from labels")
    log(
        f"fit: counted the states of {run.n_features} feature(s) (state rule '{rule}', "
        f"pseudocount {run.pc_count:g})"
    )


def _refine_by_em(run: FitRun, opts: FitOptions, log: Log) -> None:
    """Baum–Welch from the current model (the counted one after counting)."""
    try:
        res = baum_welch(
            run.model,
            run.codes,
            max_iter=opts.max_iter,
            tol=opts.tol,
            pseudocount=run.pc_em,
            frozen=run.frozen,
            record_ids=run.ids,
            path=opts.fasta,
            log=log,
            mask=opts.masked == "evidence",
        )
    except ImpossibleSequenceError as exc:
        if opts.labels:
            raise ImpossibleSequenceError(
                f"{exc.message}; the model is the one counted from the labels, and a "
                "--pseudocount above 0 keeps the moves they never show possible",
                path=exc.path,
                where=exc.where,
            ) from None
        raise
    run.model = res.model
    run.kept = sorted(set(run.kept) | set(res.kept_rows))
    run.loglik = res.loglik
    run.iterations = res.iterations
    run.stop_reason = res.stop_reason
    run.methods.append("Baum-Welch (EM)")
    log(f"em: {run.stop_reason}")


#: ``fit --masked evidence`` writes a mask chain (6 code blocks; see
#: :func:`seqstate.engine._common.code_table`).
MASK_BLOCKS = 6


def _mask_only(model: Model, mask: np.ndarray) -> Counts:
    """Counts that hold only the mask counts ``mask`` (``(M, 2)``)."""
    out = Counts.zeros(model)
    out.mask = mask
    return out


def _score_counted(run: FitRun, log: Log, *, mask: bool = False) -> None:
    """The log-likelihood of the records under the counted model (no EM)."""
    fitted_tables = api.prepare(run.model, mask=mask)
    try:
        run.loglik = float(sum(api.loglik(fitted_tables, c) for c in run.codes))
    except ImpossibleSequenceError:
        run.loglik = -math.inf
        log(
            "fit: warning: a record has probability zero under the counted model "
            "(an unseen move between known states; a --pseudocount above 0 avoids it)"
        )


def stderr_log(line: str) -> None:
    """Write one progress line to standard error."""
    sys.stderr.write(line + "\n")
    sys.stderr.flush()
