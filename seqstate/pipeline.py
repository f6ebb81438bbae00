"""Per-record orchestration: read -> encode -> engine -> decode -> write.

Nothing here parses options or prints to the terminal except through the
``progress`` object it is handed; errors are raised as
:class:`~seqstate.errors.SeqstateError` subclasses for the CLI to report.
"""

from __future__ import annotations

import contextlib
import io
import json
import math
import re
import sys
import time
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import TextIO

import numpy as np

from seqstate import __version__
from seqstate.decode import (
    Group,
    Segment,
    cpg_statistics,
    group_index,
    score_segment,
    segments_from_path,
    segments_from_posterior,
    split_at_unknown,
    track_groups,
)
from seqstate.engine import api
from seqstate.errors import ImpossibleSequenceError, SequenceFormatError, UsageError
from seqstate.io import tracks
from seqstate.io.atomic import OutputSet, check_outputs
from seqstate.io.fasta import Record, SkippedRecord, read_fasta
from seqstate.io.gff3 import Feature, GFF3Writer
from seqstate.io.regions import Region, check_region, parse_region
from seqstate.io.tables import load_model, model_sha256
from seqstate.model import Model, resolve_thresholds

REPORT_SCHEMA = "seqstate-run-report/1"
SOURCE = "seqstate"
DNA = "ACGT"


class Progress:
    """Progress on stderr (bases done, rate, time left); silent unless enabled."""

    def __init__(self, total_bases: int, enabled: bool, stream=None) -> None:
        self.total = max(1, total_bases)
        self.enabled = enabled
        self.stream = stream or sys.stderr
        self.done = 0
        self.t0 = time.perf_counter()

    def advance(self, bases: int, what: str) -> None:
        self.done += bases
        if not self.enabled:
            return
        dt = max(time.perf_counter() - self.t0, 1e-9)
        rate = self.done / dt
        left = (self.total - self.done) / rate if rate > 0 else 0.0
        self.stream.write(
            f"\r{what}: {self.done / 1e6:.2f}/{self.total / 1e6:.2f} Mbp, "
            f"{rate / 1e6:.2f} Mbp/s, {left:.0f} s left   "
        )
        self.stream.flush()

    def finish(self) -> None:
        if self.enabled:
            self.stream.write("\n")
            self.stream.flush()


@dataclass
class AnnotateOptions:
    """Everything ``seqstate annotate`` was asked to do."""

    input: str
    model: str = "cpg-island"
    out_dir: str = "."
    decode: str | None = None
    #: None: the model's default (its ``[defaults]`` table, else 0.5 and 1)
    min_posterior: float | None = None
    min_length: int | None = None
    region: str | None = None
    masked: str = "base"
    tracks: str = "bedgraph"
    precision: int = 4
    split_unknown: int = 10
    #: a FASTA record with a header and no sequence: "skip" (warn, list it in the
    #: run report) or "error"
    empty_records: str = "skip"
    command_line: list[str] = field(default_factory=list)
    force: bool = False
    stem: str | None = None


#: ``out_dir`` that sends the GFF3 to standard output (no tracks, no other files).
STDOUT = "-"


def input_stem(path: str, region: Region | None = None) -> str:
    """File-name stem used for outputs: ``asm.fa.gz`` -> ``asm``; stdin -> ``stdin``.

    With a region the stem carries it, 1-based inclusive: ``asm.chr4_1001-2000``
    (characters of the record ID outside ``A-Z a-z 0-9 . _ + -`` become ``_``),
    so runs on different regions write different files.
    """
    if path == "-":
        name = "stdin"
    else:
        name = Path(path).name
        name = re.sub(r"\.(gz|bgz)$", "", name)
        name = re.sub(r"\.(fa|fasta|fna|fas|seq|txt)$", "", name, flags=re.IGNORECASE)
        name = name or "input"
    if region is not None:
        seqid = re.sub(r"[^A-Za-z0-9._+-]", "_", region.seqid)
        name += f".{seqid}_{region.start0 + 1}-{region.end0}"
    return name


def check_stem(stem: str) -> str:
    """A ``--stem`` value: a plain file-name part, no folder, no whitespace or control chars."""
    if (
        not stem
        or stem in (".", "..")
        or "/" in stem
        or "\\" in stem
        or any(ch.isspace() or ord(ch) < 0x20 or ord(ch) == 0x7F for ch in stem)
    ):
        raise UsageError(
            f"--stem {stem!r} must be a plain file-name part (no folder, no spaces or "
            "control characters)"
        )
    return stem


def output_names(stem: str, groups: list[Group], want_bedgraph: bool, want_bigwig: bool) -> list:
    """Every file name an annotate run writes into its output folder, in writing order."""
    names = [f"{stem}.gff3", f"{stem}.features.tsv"]
    for grp in groups:
        if want_bedgraph:
            names.append(f"{stem}.{grp.track_name}.bedgraph")
        if want_bigwig:
            names.append(f"{stem}.{grp.track_name}.bw")
    return names + [f"{stem}.run.json"]


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


def _check_symbols(records: list[Record], model: Model, path: str) -> None:
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


def _fmt(value: float, spec: str) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if math.isnan(value):
        return "nan"
    if math.isinf(value):
        return "inf" if value > 0 else "-inf"
    text = format(value, spec)
    if text.startswith("-") and float(text) == 0.0:
        text = text[1:]
    return text


SCORE_FORMATS = {
    "mean_posterior": ".4f",
    "min_posterior": ".4f",
    "segment_probability": ".4g",
    "log_odds_nat": ".3f",
    "log_odds_bits": ".3f",
    "length": "d",
    "gc_fraction": ".4f",
    "cpg_count": "d",
    "cpg_oe": ".4f",
    "meets_ggf1987": "",
    "meets_tj2002": "",
}
BASE_COLUMNS = [
    "mean_posterior",
    "min_posterior",
    "segment_probability",
    "log_odds_nat",
    "log_odds_bits",
    "length",
]
CPG_COLUMNS = ["gc_fraction", "cpg_count", "cpg_oe", "meets_ggf1987", "meets_tj2002"]


def score_segments(
    model: Model,
    tables: api.EngineTables,
    codes: np.ndarray,
    post: api.Posterior,
    groups: list[Group],
    segs: list[Segment],
    seq: bytes,
) -> None:
    """Fill ``seg.scores`` for every segment (posterior scores, and CpG statistics)."""
    masks = []
    for grp in groups:
        mask = np.zeros(model.n_states, dtype=np.bool_)
        mask[list(grp.states)] = True
        masks.append(mask)
    for seg in segs:
        grp = groups[seg.group]
        sc = score_segment(
            tables, codes, post, post.values[:, seg.group], masks[seg.group], seg.start0, seg.end0
        )
        sc["length"] = seg.end0 - seg.start0
        if grp.label == "CpG_island":
            stats = cpg_statistics(seq[seg.start0 : seg.end0])
            for key in CPG_COLUMNS:
                sc[key] = stats[key]
        seg.scores = sc


def feature_of(seqid: str, offset0: int, grp: Group, seg: Segment, number: int) -> Feature:
    """The GFF3 feature of a scored segment (``offset0`` shifts region coordinates)."""
    attrs: list[tuple[str, str | list[str]]] = [("ID", f"{seqid}.{grp.track_name}.{number}")]
    for key, value in seg.scores.items():
        attrs.append((key, _fmt(value, SCORE_FORMATS.get(key, ".6g"))))
    return Feature(
        seqid=seqid,
        source=SOURCE,
        type=grp.label,
        start0=seg.start0 + offset0,
        end0=seg.end0 + offset0,
        score=seg.scores.get("mean_posterior"),
        strand=grp.strand or ".",
        phase=None,
        attributes=attrs,
    )


def annotate(
    opts: AnnotateOptions, *, progress_enabled: bool = False, stdout: TextIO | None = None
) -> dict:
    """Run the main job; returns the run report (also written as JSON).

    ``opts.out_dir`` ``"-"`` writes only the GFF3, to ``stdout`` (default
    ``sys.stdout``), once every record is done; otherwise the outputs go into the
    folder and follow :func:`seqstate.io.atomic.check_outputs` (``opts.force``).
    """
    if not opts.out_dir:
        raise UsageError("-o/--out is empty: expected a folder name, or '-' for stdout")
    if opts.region is not None and not opts.region.strip():
        raise UsageError("--region is empty: expected ID:START-END or ID")
    to_stdout = opts.out_dir == STDOUT
    if to_stdout and opts.tracks != "none":
        raise UsageError(
            f"-o - writes only the GFF3 to standard output; --tracks {opts.tracks} needs an "
            "output folder"
        )
    if opts.stem is not None:
        check_stem(opts.stem)
    model = load_model(opts.model)
    decode = opts.decode or model.decode
    if decode not in ("posterior", "viterbi"):
        raise UsageError(f"decode '{decode}' is not posterior or viterbi")
    given = opts
    min_posterior, min_length, source = resolve_thresholds(
        model, opts.min_posterior, opts.min_length
    )
    opts = replace(opts, min_posterior=min_posterior, min_length=min_length)
    if not 0.0 <= opts.min_posterior <= 1.0:
        raise UsageError(f"--min-posterior {opts.min_posterior} is outside 0..1")
    if opts.min_length < 1:
        raise UsageError(f"--min-length {opts.min_length} must be at least 1")
    if opts.split_unknown < 1:
        raise UsageError(f"--split-unknown {opts.split_unknown} must be at least 1")
    tables = api.prepare(model)
    groups = track_groups(model)
    if not groups:
        raise UsageError(f"model '{model.name}' has no labelled states: nothing to annotate")
    state_group = group_index(model, groups)
    skipped: list[SkippedRecord] = []
    records = read_records(opts.input, model, empty_records=opts.empty_records, skipped=skipped)
    if not set(model.alphabet) <= set(DNA):
        _check_symbols(records, model, opts.input)
    lengths = {r.id: len(r.seq) for r in records}
    region: Region | None = None
    if opts.region is not None:
        region = check_region(parse_region(opts.region), lengths)
        records = [r for r in records if r.id == region.seqid]
    spans = []
    for rec in records:
        if region is not None:
            spans.append((rec, region.start0, region.end0))
        else:
            spans.append((rec, 0, len(rec.seq)))
    stem = opts.stem if opts.stem is not None else input_stem(opts.input, region)
    want_bedgraph = opts.tracks in ("bedgraph", "both")
    want_bigwig = opts.tracks in ("bigwig", "both")
    if want_bigwig:
        tracks.require_bigwig()
    if not to_stdout:
        names = output_names(stem, groups, want_bedgraph, want_bigwig)
        check_outputs([Path(opts.out_dir) / n for n in names], [opts.input], force=opts.force)
    sha = model_sha256(model)
    report: dict = {
        "schema": REPORT_SCHEMA,
        "tool": "seqstate",
        "version": __version__,
        "command_line": list(opts.command_line),
        "model": {
            "name": model.name,
            "sha256": sha,
            "alphabet": model.alphabet,
            "order": model.order,
            "states": model.n_states,
        },
        "options": {k: v for k, v in asdict(given).items() if k != "command_line"},
        "decode": decode,
        "thresholds": {
            "min_posterior": opts.min_posterior,
            "min_length": opts.min_length,
            "from": source,
        },
        "log_base": "natural log (ln)",
        "coordinates": {
            "gff3": "1-based closed",
            "bedgraph": "0-based half-open",
            "tsv": "1-based closed (start_1based, end_1based)",
        },
        "records": [],
        "skipped_records": [
            {"id": sk.id, "line": sk.line0 + 1, "reason": sk.reason} for sk in skipped
        ],
        "outputs": [],
    }
    report["options"]["decode"] = decode
    progress = Progress(sum(e - s for _, s, e in spans), progress_enabled)
    try:
        return _annotate_into(
            opts,
            model,
            decode,
            tables,
            groups,
            state_group,
            spans,
            stem,
            want_bedgraph,
            want_bigwig,
            report,
            progress,
            stdout,
        )
    except ImpossibleSequenceError as exc:
        raise ImpossibleSequenceError(exc.message, path=opts.input) from None


def _annotate_into(
    opts,
    model,
    decode,
    tables,
    groups,
    state_group,
    spans,
    stem,
    want_bedgraph,
    want_bigwig,
    report,
    progress,
    stdout=None,
) -> dict:
    to_stdout = opts.out_dir == STDOUT
    out_dir = None if to_stdout else opts.out_dir  # nothing is staged with -o -
    with OutputSet(out_dir, force=opts.force, inputs=[opts.input]) as outs:
        gff_name = f"{stem}.gff3"
        tsv_name = f"{stem}.features.tsv"
        if to_stdout:
            gff_text = io.StringIO()
            gff = GFF3Writer(gff_text)
            tsv = io.StringIO()  # the feature table is not written with -o -
        else:
            gff = GFF3Writer(outs.open_text(gff_name))
            tsv = outs.open_text(tsv_name)
        gff.header([(rec.id, s + 1, e) for rec, s, e in spans])
        gene_mode = is_gene_model(model)
        columns = ["seqid", "start_1based", "end_1based", "strand", "type", "id"] + BASE_COLUMNS
        if gene_mode:
            columns = GENE_COLUMNS
        elif any(g.label == "CpG_island" for g in groups):
            columns += CPG_COLUMNS
        tsv.write("\t".join(columns) + "\n")
        bedgraphs = []
        bigwigs = []
        names = [gff_name, tsv_name]
        for grp in groups:
            desc = f"posterior of {grp.label}" + (f" ({grp.strand} strand)" if grp.strand else "")
            desc += f" under model {model.name}"
            if want_bedgraph:
                name = f"{stem}.{grp.track_name}.bedgraph"
                names.append(name)
                bedgraphs.append(
                    tracks.BedGraphTrack(outs.open_text(name), grp.track_name, desc, opts.precision)
                )
            if want_bigwig:
                name = f"{stem}.{grp.track_name}.bw"
                names.append(name)
                bigwigs.append(
                    tracks.BigWigTrack(
                        outs.path(name),
                        [(rec.id, len(rec.seq)) for rec, _, _ in spans],
                        opts.precision,
                    )
                )
        for rec, s0, e0 in spans:
            seq = rec.seq[s0:e0]
            sym = api.symbols_of(tables, seq, masked_unknown=(opts.masked == "unknown"))
            codes = api.encode_symbols(tables, sym)
            unknown = int(np.count_nonzero(sym < 0))
            post = api.posterior(
                tables, codes, group=state_group, n_groups=len(groups), record=rec.id
            )
            progress.advance((e0 - s0) // 2, rec.id)
            if gene_mode:
                predictions = decode_genes(
                    model, tables, codes, sym < 0, decode, opts.split_unknown, rec.id
                )
                n_feat = write_genes(
                    gff, tsv, model, tables, codes, post, groups, predictions, rec.id, s0
                )
                segs = []
            elif decode == "viterbi":
                path, _ = api.viterbi(tables, codes, record=rec.id)
                segs = segments_from_path(path, state_group, opts.min_length)
                del path
            else:
                segs = segments_from_posterior(post.values, opts.min_posterior, opts.min_length)
            if not gene_mode:
                segs = split_at_unknown(segs, sym < 0, opts.min_length, opts.split_unknown)
                n_feat = len(segs)
            score_segments(model, tables, codes, post, groups, segs, seq)
            counters = [0] * len(groups)
            for seg in segs:
                counters[seg.group] += 1
                feat = feature_of(rec.id, s0, groups[seg.group], seg, counters[seg.group])
                gff.write(feat)
                row = [
                    tracks.escape_text(rec.id),
                    str(feat.start0 + 1),
                    str(feat.end0),
                    feat.strand,
                    feat.type,
                    tracks.escape_text(feat.get("ID") or ""),
                ]
                row += [
                    _fmt(seg.scores[c], SCORE_FORMATS[c]) if c in seg.scores else ""
                    for c in columns[6:]
                ]
                tsv.write("\t".join(row) + "\n")
            for g in range(len(groups)):
                values = post.values[:, g]
                if want_bedgraph:
                    bedgraphs[g].add(rec.id, values, s0)
                if want_bigwig:
                    bigwigs[g].add(rec.id, values, s0)
            report["records"].append(
                {
                    "id": rec.id,
                    "length": len(rec.seq),
                    "start_1based": s0 + 1,
                    "end_1based": e0,
                    "unknown_bases": unknown,
                    "loglik_nat": post.loglik,
                    "features": n_feat,
                }
            )
            progress.advance((e0 - s0) - (e0 - s0) // 2, rec.id)
            del post, codes
        for bw in bigwigs:
            bw.close()
        if to_stdout:
            report["outputs"] = []
        else:
            report["outputs"] = sorted(names + [f"{stem}.run.json"])
            report_name = f"{stem}.run.json"
            with outs.open_text(report_name) as fh:
                json.dump(report, fh, indent=2, sort_keys=False)
                fh.write("\n")
    progress.finish()
    if to_stdout:
        (stdout or sys.stdout).write(gff_text.getvalue())
    return report


# ---------------------------------------------------------------- gene structures
GENE_COLUMNS = [
    "seqid",
    "start_1based",
    "end_1based",
    "strand",
    "type",
    "id",
    "parent",
    "phase",
    "mean_posterior",
    "min_posterior",
    "segment_probability",
    "length",
]


def is_gene_model(model: Model) -> bool:
    """Models whose Viterbi paths are written as gene -> mRNA -> exon + CDS hierarchies."""
    table = model.extra.get("annotate", {})
    return isinstance(table, dict) and table.get("features") == "gene_structure"


def write_genes(
    gff: GFF3Writer,
    tsv,
    model: Model,
    tables: api.EngineTables | None,
    codes: np.ndarray | None,
    post: api.Posterior | None,
    groups: list[Group],
    predictions: list,
    seqid: str,
    offset0: int,
) -> int:
    """Write decoded genes as GFF3 gene -> mRNA -> exon + CDS lines; returns the line count.

    ``predictions`` are :class:`seqstate.genes.GenePrediction` in genomic order
    (0-based, relative to ``offset0``).  gene and mRNA span the coding part (start
    codon to stop codon; the model has no untranslated regions), exon and CDS lines
    share coordinates, CDS phase as GFF3 1.26 defines it; lines in start order,
    parents first (:func:`seqstate.genes.gene_lines`).  A partial gene has
    ``partial=true`` and ``partial_reason`` (``record_end``, ``unknown_run``) on its
    gene and mRNA lines.  Scores (when ``post`` is given): the posterior of the
    strand's gene states (CDS and intron) on gene and mRNA, of the strand's CDS
    states on exon and CDS, and the exact probability that every base of the
    feature is in those states; without ``post`` (a sampled truth) the score
    column is ``.`` and only ``length`` is written.  ``tsv`` may be None.
    """
    from seqstate import genes as gene_layout

    col = {(g.label, g.strand): i for i, g in enumerate(groups)}
    masks = {}
    values = {}
    for strand in "+-":
        cds = np.zeros(model.n_states, dtype=np.bool_)
        gene = np.zeros(model.n_states, dtype=np.bool_)
        for i, st in enumerate(model.states):
            if st.strand == strand and st.label in ("CDS", "intron"):
                gene[i] = True
                cds[i] = st.label == "CDS"
        masks[strand] = (gene, cds)
        if post is not None:
            cols = [col[k] for k in (("CDS", strand), ("intron", strand)) if k in col]
            values[strand] = (
                post.values[:, cols].sum(axis=1, dtype=np.float64),
                post.values[:, col[("CDS", strand)]],
            )
    count = 0
    for number, gp in enumerate(predictions, start=1):
        strand = gp.strand
        for ln in gene_layout.gene_lines(gp, seqid, number):
            a, b = ln.start0, ln.end0
            sc = None
            if post is not None:
                k = 0 if ln.type in ("gene", "mRNA") else 1
                sc = score_segment(
                    tables, codes, post, values[strand][k], masks[strand][k], a, b, log_odds=False
                )
            attrs: list[tuple[str, str | list[str]]] = [("ID", ln.id)]
            if ln.parent:
                attrs.append(("Parent", ln.parent))
            if sc is not None:
                for key in ("mean_posterior", "min_posterior", "segment_probability"):
                    attrs.append((key, _fmt(sc[key], SCORE_FORMATS[key])))
            attrs.append(("length", str(b - a)))
            if gp.partial and ln.type in ("gene", "mRNA"):
                attrs.append(("partial", "true"))
                attrs.append(("partial_reason", list(gp.partial_reasons)))
            gff.write(
                Feature(
                    seqid=seqid,
                    source=SOURCE,
                    type=ln.type,
                    start0=a + offset0,
                    end0=b + offset0,
                    score=None if sc is None else sc["mean_posterior"],
                    strand=strand,
                    phase=ln.phase,
                    attributes=attrs,
                )
            )
            if tsv is not None:
                tsv.write(
                    "\t".join(
                        [
                            seqid,
                            str(a + offset0 + 1),
                            str(b + offset0),
                            strand,
                            ln.type,
                            ln.id,
                            ln.parent or "",
                            "." if ln.phase is None else str(ln.phase),
                            _fmt(sc["mean_posterior"], ".4f") if sc else "",
                            _fmt(sc["min_posterior"], ".4f") if sc else "",
                            _fmt(sc["segment_probability"], ".4g") if sc else "",
                            str(b - a),
                        ]
                    )
                    + "\n"
                )
            count += 1
    return count


def decode_genes(
    model: Model,
    tables: api.EngineTables,
    codes: np.ndarray,
    unknown: np.ndarray,
    decode: str,
    split_unknown: int,
    record: str,
) -> list:
    """Gene structures of one encoded record, by Viterbi or by posterior decoding.

    Viterbi: the most probable path.  Posterior: the maximum expected accuracy
    path over the model's allowed moves (:func:`seqstate.engine.mea.mea`), whose
    gain at each base is the posterior of the state's class (non-gene; per strand,
    CDS by codon position and intron by phase: :func:`seqstate.genes.decoding_classes`).
    Genes are then cut at runs of at least ``split_unknown`` unknown bases.
    """
    from seqstate import genes as gene_layout
    from seqstate.engine import mea

    if decode == "viterbi":
        path, _ = api.viterbi(tables, codes, record=record)
    else:
        cls, n_cls = gene_layout.decoding_classes(model)
        fine = api.posterior(tables, codes, group=cls, n_groups=n_cls, record=record)
        path = mea.mea(tables, codes, fine.values, cls)
        del fine
    return gene_layout.genes_from_path(path, model, unknown, split_unknown)


# ---------------------------------------------------------------- sampling
#: Largest sample run: records x length, in bases (each base costs about 6 bytes of
#: memory while it is drawn: the state path, the symbol and the FASTA text).
MAX_SAMPLE_BASES = 250_000_000
#: Most records one sample run draws.
MAX_SAMPLE_RECORDS = 1_000_000


@dataclass
class SampleOptions:
    """Everything ``seqstate sample`` was asked to do."""

    model: str
    length: int
    records: int = 1
    seed: int = 0
    out_fasta: str = "sample.fa"
    truth_gff3: str | None = None
    prefix: str = "sim"
    width: int = 60
    force: bool = False


def model_inputs(spec: str) -> list[Path]:
    """The files of a model (manifest and tables) an output must never replace."""
    from seqstate.io.tables import TABLE_FILES, resolve_model_path

    manifest = resolve_model_path(spec)
    return [manifest] + [manifest.parent / name for name in TABLE_FILES.values()]


def check_prefix(prefix: str) -> str:
    """A record ID prefix: no whitespace or control characters (FASTA IDs end at a space)."""
    bad = [ch for ch in prefix if ch.isspace() or ord(ch) < 0x20 or ord(ch) == 0x7F]
    if bad:
        raise UsageError(
            f"--prefix {prefix!r} holds {bad[0]!r}: record IDs cannot contain whitespace or "
            "control characters"
        )
    return prefix


def sample(opts: SampleOptions) -> dict:
    """Draw records and their true paths; write FASTA and the truth as GFF3.

    Both files are checked by :func:`seqstate.io.atomic.check_outputs` before
    anything is drawn and committed together.
    """
    from seqstate.engine.sampling import sample_record
    from seqstate.io.fasta import write_fasta

    if opts.length < 1:
        raise UsageError(f"--length {opts.length} must be at least 1")
    if opts.records < 1:
        raise UsageError(f"--records {opts.records} must be at least 1")
    if opts.seed < 0:
        raise UsageError(f"--seed {opts.seed} must be 0 or more")
    check_prefix(opts.prefix)
    if not opts.out_fasta:
        raise UsageError("-o/--out is empty: expected a FASTA file name")
    if opts.truth_gff3 is not None and not opts.truth_gff3:
        raise UsageError("--truth is empty: expected a GFF3 file name")
    if "-" in (opts.out_fasta, opts.truth_gff3):
        raise UsageError("sample writes files: '-' (standard output) is not accepted")
    if opts.records > MAX_SAMPLE_RECORDS:
        raise UsageError(
            f"--records {opts.records:,} is more than the limit of {MAX_SAMPLE_RECORDS:,} records"
        )
    if opts.length * opts.records > MAX_SAMPLE_BASES:
        raise UsageError(
            f"--records {opts.records:,} x --length {opts.length:,} = "
            f"{opts.length * opts.records:,} bases is more than the limit of "
            f"{MAX_SAMPLE_BASES:,} bases per sample run (about "
            f"{MAX_SAMPLE_BASES * 6 / 2**30:.1f} GiB of memory); draw fewer or shorter records"
        )
    check_outputs([opts.out_fasta, opts.truth_gff3], model_inputs(opts.model), force=opts.force)
    model = load_model(opts.model)
    tables = api.prepare(model)
    groups = track_groups(model)
    state_group = group_index(model, groups)
    gene_model = is_gene_model(model)
    if gene_model:
        from seqstate.genes import genes_from_path
    rng = np.random.default_rng(opts.seed)
    alphabet = np.frombuffer(model.alphabet.encode("ascii"), dtype=np.uint8)
    records, truths = [], []
    for r in range(opts.records):
        rid = f"{opts.prefix}{r + 1}"
        path, sym = sample_record(tables, opts.length, rng)
        records.append(
            Record(
                rid,
                f"synthetic, sampled from model {model.name} seed {opts.seed}",
                alphabet[sym].tobytes(),
            )
        )
        if gene_model:
            truths.append((rid, genes_from_path(path, model)))
        else:
            truths.append((rid, segments_from_path(path, state_group)))
    n_features = 0
    truth_text = io.StringIO()  # written with the FASTA below, as one output set
    if opts.truth_gff3:
        with contextlib.nullcontext(truth_text) as fh:
            gff = GFF3Writer(fh)
            gff.header([(rec.id, 1, len(rec.seq)) for rec in records])
            for rid, segs in truths:
                if gene_model:
                    # the true genes as a gene -> mRNA -> exon + CDS hierarchy, unscored
                    n_features += write_genes(
                        gff, None, model, None, None, None, groups, segs, rid, 0
                    )
                    continue
                counters = [0] * len(groups)
                for seg in segs:
                    counters[seg.group] += 1
                    seg.scores = {"length": seg.end0 - seg.start0}
                    feat = feature_of(rid, 0, groups[seg.group], seg, counters[seg.group])
                    feat.score = None
                    gff.write(feat)
                    n_features += 1
    with OutputSet(force=opts.force, inputs=model_inputs(opts.model)) as outs:
        write_fasta(outs.open_text(opts.out_fasta), records, width=opts.width)
        if opts.truth_gff3:
            outs.open_text(opts.truth_gff3).write(truth_text.getvalue())
    return {"records": opts.records, "length": opts.length, "features": n_features}
