"""Per-record orchestration: read -> encode -> engine -> decode -> write.

Nothing here parses options or prints to the terminal except through the
``progress`` object it is handed; errors are raised as
:class:`~seqstate.errors.SeqstateError` subclasses for the CLI to report.
"""

from __future__ import annotations

import json
import math
import re
import sys
import time
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

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
from seqstate.io.atomic import OutputSet
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
    #: a FASTA record with a header and no sequence: "skip" (warn, list it in the
    #: run report) or "error"
    empty_records: str = "skip"
    command_line: list[str] = field(default_factory=list)


def input_stem(path: str) -> str:
    """File-name stem used for outputs: ``asm.fa.gz`` -> ``asm``; stdin -> ``stdin``."""
    if path == "-":
        return "stdin"
    name = Path(path).name
    name = re.sub(r"\.(gz|bgz)$", "", name)
    name = re.sub(r"\.(fa|fasta|fna|fas|seq|txt)$", "", name, flags=re.IGNORECASE)
    return name or "input"


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


def annotate(opts: AnnotateOptions, *, progress_enabled: bool = False) -> dict:
    """Run the main job; returns the run report (also written as JSON)."""
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
    if opts.region:
        region = check_region(parse_region(opts.region), lengths)
        records = [r for r in records if r.id == region.seqid]
    spans = []
    for rec in records:
        if region is not None:
            spans.append((rec, region.start0, region.end0))
        else:
            spans.append((rec, 0, len(rec.seq)))
    stem = input_stem(opts.input)
    want_bedgraph = opts.tracks in ("bedgraph", "both")
    want_bigwig = opts.tracks in ("bigwig", "both")
    if want_bigwig:
        tracks.require_bigwig()
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
) -> dict:
    with OutputSet(opts.out_dir) as outs:
        gff_name = f"{stem}.gff3"
        tsv_name = f"{stem}.features.tsv"
        gff = GFF3Writer(outs.open_text(gff_name))
        gff.header([(rec.id, s + 1, e) for rec, s, e in spans])
        tsv = outs.open_text(tsv_name)
        gene_mode = decode == "viterbi" and is_gene_model(model)
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
                path, _ = api.viterbi(tables, codes, record=rec.id)
                n_feat = write_genes(
                    gff, tsv, model, tables, codes, post, groups, path, rec.id, s0, seq
                )
                segs = []
                del path
            elif decode == "viterbi":
                path, _ = api.viterbi(tables, codes, record=rec.id)
                segs = segments_from_path(path, state_group, opts.min_length)
                del path
            else:
                segs = segments_from_posterior(post.values, opts.min_posterior, opts.min_length)
            if not gene_mode:
                segs = split_at_unknown(segs, sym < 0, opts.min_length)
                n_feat = len(segs)
            score_segments(model, tables, codes, post, groups, segs, seq)
            counters = [0] * len(groups)
            for seg in segs:
                counters[seg.group] += 1
                feat = feature_of(rec.id, s0, groups[seg.group], seg, counters[seg.group])
                gff.write(feat)
                row = [
                    rec.id,
                    str(feat.start0 + 1),
                    str(feat.end0),
                    feat.strand,
                    feat.type,
                    feat.get("ID") or "",
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
        report["outputs"] = sorted(names + [f"{stem}.run.json"])
        report_name = f"{stem}.run.json"
        with outs.open_text(report_name) as fh:
            json.dump(report, fh, indent=2, sort_keys=False)
            fh.write("\n")
    progress.finish()
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
    tables: api.EngineTables,
    codes: np.ndarray,
    post: api.Posterior,
    groups: list[Group],
    path: np.ndarray,
    seqid: str,
    offset0: int,
    seq: bytes,
) -> int:
    """Write the genes of a decoded path as a GFF3 hierarchy; returns the feature count.

    gene and mRNA span the coding part (start codon to stop codon; the model has
    no untranslated regions), exon and CDS lines share coordinates, CDS phase as
    GFF3 1.26 defines it.  Scores: the posterior of the strand's gene states (CDS
    and intron) on gene and mRNA, of the strand's CDS states on CDS; the exact
    probability that every base of the feature is in those states.
    """
    from seqstate import genes as gene_layout

    col = {(g.label, g.strand): i for i, g in enumerate(groups)}
    masks = {}
    for strand in "+-":
        cds = np.zeros(model.n_states, dtype=np.bool_)
        gene = np.zeros(model.n_states, dtype=np.bool_)
        for i, st in enumerate(model.states):
            if st.strand == strand and st.label in ("CDS", "intron"):
                gene[i] = True
                cds[i] = st.label == "CDS"
        masks[strand] = (gene, cds)
    count = 0
    predictions = gene_layout.genes_from_path(path, model)
    gene_values_of = {}
    for strand in "+-":
        cols = [col[k] for k in (("CDS", strand), ("intron", strand)) if k in col]
        gene_values_of[strand] = post.values[:, cols].sum(axis=1, dtype=np.float64)
    for number, gp in enumerate(predictions, start=1):
        strand = gp.strand
        g0, g1 = gp.span
        gene_mask, cds_mask = masks[strand]
        gene_values = gene_values_of[strand]
        gsc = score_segment(tables, codes, post, gene_values, gene_mask, g0, g1, log_odds=False)
        gid = f"{seqid}.gene.{number}"
        mid = f"{seqid}.mRNA.{number}"

        def emit(ftype, a, b, fid, parent, sc, phase=None, strand=strand, gp=gp):
            attrs: list[tuple[str, str | list[str]]] = [("ID", fid)]
            if parent:
                attrs.append(("Parent", parent))
            for key in ("mean_posterior", "min_posterior", "segment_probability"):
                attrs.append((key, _fmt(sc[key], SCORE_FORMATS[key])))
            attrs.append(("length", str(b - a)))
            if gp.partial and ftype in ("gene", "mRNA"):
                attrs.append(("partial", "cut by the record end"))
            gff.write(
                Feature(
                    seqid=seqid,
                    source=SOURCE,
                    type=ftype,
                    start0=a + offset0,
                    end0=b + offset0,
                    score=sc["mean_posterior"],
                    strand=strand,
                    phase=phase,
                    attributes=attrs,
                )
            )
            tsv.write(
                "\t".join(
                    [
                        seqid,
                        str(a + offset0 + 1),
                        str(b + offset0),
                        strand,
                        ftype,
                        fid,
                        parent or "",
                        "." if phase is None else str(phase),
                        _fmt(sc["mean_posterior"], ".4f"),
                        _fmt(sc["min_posterior"], ".4f"),
                        _fmt(sc["segment_probability"], ".4g"),
                        str(b - a),
                    ]
                )
                + "\n"
            )

        emit("gene", g0, g1, gid, None, gsc)
        emit("mRNA", g0, g1, mid, gid, gsc)
        phases = gene_layout.cds_phases(gp)
        cds_values = post.values[:, col[("CDS", strand)]]
        order = range(len(gp.pieces)) if strand == "+" else range(len(gp.pieces) - 1, -1, -1)
        for k, i in enumerate(order, start=1):
            a, b = gp.pieces[i]
            sc = score_segment(tables, codes, post, cds_values, cds_mask, a, b, log_odds=False)
            emit("exon", a, b, f"{mid}.exon.{k}", mid, sc)
            emit("CDS", a, b, f"{mid}.CDS.{k}", mid, sc, phase=phases[i])
        count += 2 + 2 * len(gp.pieces)
    return count


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


def sample(opts: SampleOptions) -> dict:
    """Draw records and their true paths; write FASTA and the truth as GFF3."""
    from seqstate.engine.sampling import sample_record
    from seqstate.io.atomic import atomic_text
    from seqstate.io.fasta import write_fasta

    if opts.length < 1:
        raise UsageError(f"--length {opts.length} must be at least 1")
    if opts.records < 1:
        raise UsageError(f"--records {opts.records} must be at least 1")
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
    model = load_model(opts.model)
    tables = api.prepare(model)
    groups = track_groups(model)
    state_group = group_index(model, groups)
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
        truths.append((rid, segments_from_path(path, state_group)))
    with atomic_text(opts.out_fasta) as fh:
        write_fasta(fh, records, width=opts.width)
    n_features = 0
    if opts.truth_gff3:
        with atomic_text(opts.truth_gff3) as fh:
            gff = GFF3Writer(fh)
            gff.header([(rec.id, 1, len(rec.seq)) for rec in records])
            for rid, segs in truths:
                counters = [0] * len(groups)
                for seg in segs:
                    counters[seg.group] += 1
                    seg.scores = {"length": seg.end0 - seg.start0}
                    feat = feature_of(rid, 0, groups[seg.group], seg, counters[seg.group])
                    feat.score = None
                    gff.write(feat)
                    n_features += 1
    return {"records": opts.records, "length": opts.length, "features": n_features}
