"""The labelling rule of gene models: a GFF3 gene annotation -> state paths (for ``fit``).

Genes (gene -> mRNA -> CDS with phase) are checked against the sequence and turned
into one path of the gene-segment layout (:mod:`seqstate.kinds.gene_layout`) per
record, plus its reverse-complement mirror.  GFF3 coordinates are 1-based closed
in files, 0-based half-open inside.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass, field

import numpy as np

from seqstate.errors import FeatureFormatError
from seqstate.io.gff3 import Feature
from seqstate.kinds.gene_layout import (
    DEFAULT_SHAPE,
    REPEAT_TYPES,
    STOPS,
    GeneShape,
    mirror_index,
    shape_of,
)
from seqstate.model import Model


@dataclass
class Transcript:
    """One coding transcript: strand and its CDS pieces, 0-based half-open, 5' to 3'."""

    gene: str
    mrna: str
    strand: str
    pieces: list[tuple[int, int]]
    phases: list[int | None]
    line0: int | None = None

    @property
    def coding_length(self) -> int:
        return sum(e - s for s, e in self.pieces)

    @property
    def span(self) -> tuple[int, int]:
        return min(s for s, _ in self.pieces), max(e for _, e in self.pieces)


@dataclass
class LabelReport:
    """How many genes the labelling used and skipped, and why."""

    used: int = 0
    skipped: dict[str, int] = field(default_factory=lambda: defaultdict(int))
    examples: dict[str, str] = field(default_factory=dict)

    def skip(self, reason: str, gene: str) -> None:
        self.skipped[reason] += 1
        self.examples.setdefault(reason, gene)

    def as_dict(self) -> dict:
        return {"genes_used": self.used, "genes_skipped": dict(sorted(self.skipped.items()))}


_RC = bytes.maketrans(b"ACGTacgtNn", b"TGCAtgcaNn")


def reverse_complement(seq: bytes) -> bytes:
    """Reverse complement of DNA bytes (IUPAC codes other than ACGTN map to themselves)."""
    return seq.translate(_RC)[::-1]


def transcripts_from_gff3(features: list[Feature]) -> tuple[dict, dict]:
    """Group GFF3 features into genes -> coding transcripts.

    Returns ``(genes, transcripts)``: ``genes[id] = Feature`` for every ``gene``-like
    top-level feature (any feature that is a Parent of an mRNA, or type gene /
    pseudogene / ncRNA_gene), and ``transcripts[gene_id] = [Transcript, ...]``.
    """
    by_id: dict[str, Feature] = {}
    for f in features:
        fid = f.get("ID")
        if fid:
            by_id[fid] = f
    cds_by_parent: dict[str, list[Feature]] = defaultdict(list)
    for f in features:
        if f.type == "CDS":
            for parent in f.values("Parent"):
                cds_by_parent[parent].append(f)
    genes: dict[str, Feature] = {}
    for f in features:
        if f.type in ("gene", "pseudogene", "ncRNA_gene", "transposable_element_gene"):
            genes[f.get("ID") or f"line{f.line0}"] = f
    transcripts: dict[str, list[Transcript]] = defaultdict(list)
    for parent, cds in cds_by_parent.items():
        rna = by_id.get(parent)
        gene_id = parent
        if rna is not None and rna.values("Parent"):
            gene_id = rna.values("Parent")[0]
        strand = cds[0].strand
        pieces = sorted({(c.start0, c.end0, c.phase) for c in cds})
        if strand == "-":
            pieces = pieces[::-1]
        transcripts[gene_id].append(
            Transcript(
                gene=gene_id,
                mrna=parent,
                strand=strand,
                pieces=[(s, e) for s, e, _ in pieces],
                phases=[p for _, _, p in pieces],
                line0=cds[0].line0,
            )
        )
        if gene_id not in genes and rna is not None:
            genes[gene_id] = rna
    return genes, transcripts


def _oriented(tx: Transcript, length: int) -> list[tuple[int, int]]:
    """CDS pieces in the orientation of the transcript's own strand (5' to 3')."""
    if tx.strand == "+":
        return list(tx.pieces)
    return [(length - e, length - s) for s, e in tx.pieces]


def check_transcript(
    tx: Transcript, seq: bytes, rc: bytes, shape: GeneShape = DEFAULT_SHAPE
) -> str | None:
    """Why this transcript cannot be labelled (None if it can).

    Checks: CDS length a multiple of 3, GFF3 phases consistent with the lengths,
    ATG start, a stop codon at the end and none inside, GT..AG introns (and GC..AG
    with ``shape.gc_donor``) of at least
    ``shape.min_intron`` bases, no intron inside the start or stop codon, clean
    start and stop flanks.
    """
    up_flank, down_flank, min_intron = shape.up_flank, shape.down_flank, shape.min_intron
    length = len(seq)
    pieces = _oriented(tx, length)
    s = seq if tx.strand == "+" else rc
    coding = b"".join(s[a:b] for a, b in pieces).upper()
    if len(coding) % 3 != 0:
        return "CDS length not a multiple of 3"
    done = 0
    for (a, b), phase in zip(pieces, tx.phases):
        expect = (3 - done % 3) % 3
        if phase is not None and phase != expect:
            return "CDS phase contradicts the lengths"
        done += b - a
    if coding[:3] != b"ATG":
        return "no ATG start codon"
    if coding[-3:].decode() not in STOPS:
        return "no stop codon at the end"
    for i in range(0, len(coding) - 3, 3):
        if coding[i : i + 3].decode() in STOPS:
            return "in-frame stop codon inside the CDS"
    if set(coding) - set(b"ACGT"):
        return "unknown bases in the CDS"
    if pieces[0][1] - pieces[0][0] < 3 or pieces[-1][1] - pieces[-1][0] < 3:
        return "intron inside the start or stop codon"
    if pieces[0][0] < up_flank:
        return "start flank runs off the record"
    if set(s[pieces[0][0] - up_flank : pieces[0][0]].upper()) - set(b"ACGT"):
        return "unknown bases in the start flank"
    if pieces[-1][1] + down_flank > length:
        return "stop flank runs off the record"
    if set(s[pieces[-1][1] : pieces[-1][1] + down_flank].upper()) - set(b"ACGT"):
        return "unknown bases in the stop flank"
    donors = (b"GT", b"GC") if shape.gc_donor else (b"GT",)
    for (_, b0), (a1, _) in zip(pieces, pieces[1:]):
        intron = s[b0:a1].upper()
        if len(intron) < min_intron:
            return f"intron shorter than {min_intron} bases"
        if intron[-2:] != b"AG" or intron[:2] not in donors:
            return "intron not GT..AG" + (" or GC..AG" if shape.gc_donor else "")
    return None


def body_labels(n_body: int, shape: GeneShape, copy: str) -> list[str]:
    """The body states of an intron body of ``n_body`` bases (5' to 3').

    The first branch with at most ``n_body`` stages is used, its stages as even as
    possible (longer ones first).  Which branch and split a gene gets does not
    matter for the fit: the body states share one emission table and the chain's
    moves are fitted from the body lengths alone (``[fit] length_chains``).
    """
    branches = shape.body_names(copy)
    branch = next((b for b in branches if len(b) <= n_body), None)
    if branch is None:
        raise ValueError(f"intron body of {n_body} bases is shorter than every branch")
    r = len(branch)
    sizes = [n_body // r + (1 if i < n_body % r else 0) for i in range(r)]
    return [name for name, k in zip(branch, sizes) for _ in range(k)]


def plus_path(
    tx: Transcript, seq_plus: bytes, names: dict[str, int], shape: GeneShape = DEFAULT_SHAPE
) -> list[tuple[int, int]]:
    """(position, state) pairs of one checked transcript on its own strand's sequence.

    ``seq_plus`` is the sequence in the transcript's orientation; states are the
    plus-strand ones (``names`` maps plus names without the strand sign).
    """
    length = len(seq_plus)
    pieces = _oriented(tx, length)
    out: list[tuple[int, int]] = []
    first = pieces[0][0]
    up_flank = shape.up_flank
    for i in range(up_flank):
        out.append((first - up_flank + i, names[f"up{i + 1}"]))
    coding_pos = 0
    total = sum(b - a for a, b in pieces)
    up = seq_plus.upper()
    for k, (a, b) in enumerate(pieces):
        for pos in range(a, b):
            frame = coding_pos % 3
            if coding_pos < 3:
                st = ("start_A", "start_T", "start_G")[coding_pos]
            elif coding_pos >= total - 3:
                st = _stop_state(coding_pos - (total - 3), up, pieces, coding_pos)
            else:
                st = _coding_state(frame, pos, a, b, k, pieces, up)
            out.append((pos, names[st]))
            coding_pos += 1
        if k + 1 < len(pieces):
            copy = _intron_copy(coding_pos, pieces, k, up)
            a1 = pieces[k + 1][0]
            intron = list(range(b, a1))
            donor = [f"{copy}_d{i}" for i in range(1, 3 + shape.donor_flank)]
            if up[b + 1 : b + 2] == b"C":  # a GC donor (check_transcript allowed it)
                donor[1] = f"{copy}_d2c"
            acceptor = [f"{copy}_a{i}" for i in range(1, shape.acceptor_flank + 3)]
            n_body = len(intron) - len(donor) - len(acceptor)
            labels = donor + body_labels(n_body, shape, copy) + acceptor
            for pos, st in zip(intron, labels):
                out.append((pos, names[st]))
    end = pieces[-1][1]
    for i in range(shape.down_flank):
        out.append((end + i, names[f"down{i + 1}"]))
    if shape.start_codons or shape.exon_codons:
        out = _prefix_states(out, pieces, shape, names)
    return out


def _prefix_states(
    out: list[tuple[int, int]], pieces, shape: GeneShape, names: dict[str, int]
) -> list[tuple[int, int]]:
    """The path with the minimum-length prefixes of the layout in place.

    The first ``shape.start_codons`` whole codons after the start codon, and in every
    exon after an intron the rest of a codon the intron split (``cds2_x0`` and
    ``cds3_x0`` where the free ``cds2``/``cds3`` stood) and the next
    ``shape.exon_codons`` whole codons, get the prefix states; other states stay.
    An exon too short for its prefix keeps free states where the prefix would go on,
    and the layout's moves then refuse the path (the gene is skipped).
    """
    from seqstate.kinds.gene_layout import prefix_names

    state_of = dict(out)
    plain = {names[f"cds{j}"]: j for j in (1, 2, 3)}
    x0 = {2: names.get("cds2_x0"), 3: names.get("cds3_x0")}
    stages = {k: prefix_names(shape, k) for k in "sx"}
    coding = [pos for a, b in pieces for pos in range(a, b)]
    piece_of = [k for k, (a, b) in enumerate(pieces) for _ in range(a, b)]
    i = 3  # the first base after the start codon
    stage = 0
    while i < len(coding) and stage < len(stages["s"]) and piece_of[i] == 0:
        j = plain.get(state_of[coding[i]])
        if j is None:
            break
        state_of[coding[i]] = names[stages["s"][stage][j - 1]]
        stage += j == 3
        i += 1
    if stages["x"]:
        first = {a for a, _ in pieces[1:]}
        for i, pos in enumerate(coding):
            if pos not in first:
                continue
            # the rest of the split codon, then whole codons
            q = i
            while q < len(coding) and q % 3 != 0:
                j = plain.get(state_of[coding[q]])
                if j is not None and x0[j] is not None:
                    state_of[coding[q]] = int(x0[j])  # type: ignore[arg-type]
                q += 1
            stage = 0
            while q < len(coding) and stage < len(stages["x"]):
                j = plain.get(state_of[coding[q]])
                if j is None:
                    break
                state_of[coding[q]] = names[stages["x"][stage][j - 1]]
                stage += j == 3
                q += 1
    return [(pos, state_of[pos]) for pos, _ in out]


def _codon_bases(pieces, up, coding_index: int) -> bytes:
    """The three bases of the codon holding coding base ``coding_index`` (spliced)."""
    start = coding_index - coding_index % 3
    bases = []
    idx = 0
    for a, b in pieces:
        for pos in range(a, b):
            if start <= idx < start + 3:
                bases.append(up[pos])
            idx += 1
            if idx >= start + 3:
                return bytes(bases)
    return bytes(bases)


def _stop_state(j: int, up, pieces, coding_pos: int) -> str:
    codon = _codon_bases(pieces, up, coding_pos).decode()
    if j == 0:
        return "stop_T"
    if j == 1:
        return "stop_A" if codon[1] == "A" else "stop_G"
    return "stop_AR" if codon[1] == "A" else "stop_GA"


def _coding_state(frame, pos, a, b, k, pieces, up) -> str:
    """The coding state of one base, with the split-codon states next to introns."""
    last_piece = k == len(pieces) - 1
    first_piece = k == 0
    # bases before an intron in this codon
    if not last_piece:
        left_in_piece = b - pos  # bases from pos to the piece end
        if frame == 0 and left_in_piece == 1:  # phase-1 intron follows
            return "cds1_T_i1" if chr(up[pos]) == "T" else "cds1_V_i1"
        if frame == 0 and left_in_piece == 2:  # phase-2 intron follows after cds2
            return "cds1_T_i2" if chr(up[pos]) == "T" else "cds1_V_i2"
        if frame == 1 and left_in_piece == 1:
            first = chr(up[pos - 1])
            here = chr(up[pos])
            if first == "T":
                return {"A": "cds2_A_i2", "G": "cds2_G_i2"}.get(here, "cds2_Y_i2")
            return "cds2_N_i2"
    if not first_piece:
        into_piece = pos - a  # bases of this piece before pos
        prev_a, prev_b = pieces[k - 1]
        if frame == 1 and into_piece == 0:  # first base after a phase-1 intron
            if chr(up[prev_b - 1]) == "T":
                return {"A": "cds2_A_j1T", "G": "cds2_G_j1T"}.get(chr(up[pos]), "cds2_Y_j1T")
            return "cds2"
        if frame == 2 and into_piece == 1 and pos - 1 >= a:
            # cds3 after a phase-1 intron and cds2_*_j1T
            if chr(up[prev_b - 1]) == "T":
                c2 = chr(up[pos - 1])
                return {"A": "cds3_Y", "G": "cds3_B"}.get(c2, "cds3")
        if frame == 2 and into_piece == 0:  # first base after a phase-2 intron
            c1, c2 = chr(up[prev_b - 2]), chr(up[prev_b - 1])
            if c1 == "T" and c2 == "A":
                return "cds3_Y"
            if c1 == "T" and c2 == "G":
                return "cds3_B"
            return "cds3"
    return ("cds1", "cds2", "cds3")[frame]


def _intron_copy(coding_done: int, pieces, k: int, up) -> str:
    phase = coding_done % 3
    b = pieces[k][1]
    if phase == 0:
        return "i0"
    if phase == 1:
        return "i1T" if chr(up[b - 1]) == "T" else "i1V"
    c1, c2 = chr(up[b - 2]), chr(up[b - 1])
    if c1 == "T" and c2 == "A":
        return "i2TA"
    if c1 == "T" and c2 == "G":
        return "i2TG"
    return "i2N"


def _frames(tx: Transcript, length: int) -> dict[int, int]:
    """Codon position of each coding base (plus-strand coordinates)."""
    out = {}
    done = 0
    for a, b in tx.pieces:
        rng = range(a, b) if tx.strand == "+" else range(b - 1, a - 1, -1)
        for pos in rng:
            out[pos] = done % 3
            done += 1
    return out


def label_records(
    model: Model, records: list, features: list[Feature], *, path: str, bad_genes: str = "skip"
) -> tuple[list[tuple[bytes, np.ndarray]], LabelReport]:
    """The labelling rule: GFF3 genes -> one state path per record, and its mirror.

    For each gene, the longest transcript that passes :func:`check_transcript` is
    used; a gene is skipped (its coding span marked unknown, -1) when no
    transcript passes, when two transcripts put a shared coding base in different
    codon positions (the isoforms disagree on the frame), or when its coding span
    (first to last coding base of any transcript, with the start flank) overlaps
    another coding gene's.  Spans of pseudogenes are unknown; every other base
    (untranslated regions and non-coding genes included) is intergenic.  With
    ``bad_genes="fail"`` a gene none of whose transcripts passes is an error
    naming the gene, the reason and the line of its first CDS.  Returns
    ``[(sequence, states), ...]`` with each record twice: as given, and reverse
    complemented with the strands of its labels flipped (the counts of both
    strands), plus the report of genes used and skipped.
    """
    names = {s.name: i for i, s in enumerate(model.states)}
    plus_names = {n[:-1]: i for n, i in names.items() if n.endswith("+")}
    mirror = mirror_index(list(model.states))
    lengths = {r.id: len(r.seq) for r in records}
    seqids = {f.seqid for f in features}
    for sid in sorted(seqids - set(lengths)):
        first = next(f for f in features if f.seqid == sid)
        raise FeatureFormatError(
            f"feature on seqid '{sid}', which is not in the FASTA", path=path, line0=first.line0
        )
    genes, transcripts = transcripts_from_gff3(features)
    shape = shape_of(list(model.state_names))
    report = LabelReport()
    from seqstate.engine import api

    tables = api.prepare(model)
    allowed = model.transitions > 0
    out: list[tuple[bytes, np.ndarray]] = []
    for rec in records:
        n = len(rec.seq)
        states = np.zeros(n, dtype=np.int32)  # intergenic
        rc = reverse_complement(rec.seq)
        spans = []
        for gid, g in genes.items():
            if g.seqid == rec.id:
                if g.end0 > n:
                    raise FeatureFormatError(
                        f"feature ends at {g.end0}, past the end of record '{rec.id}' (length {n})",
                        path=path,
                        line0=g.line0,
                    )
                if not transcripts.get(gid):
                    if g.type != "gene":
                        states[g.start0 : g.end0] = -1  # pseudogenes: neither coding nor not
                    continue
                # a coding locus: from its first coding base (less the start flank) to
                # its last, over all its transcripts
                lo = min(t.span[0] for t in transcripts[gid])
                hi = max(t.span[1] for t in transcripts[gid])
                pad = max(shape.up_flank, shape.down_flank)
                spans.append((max(0, lo - pad), min(n, hi + pad), gid))
        spans.sort()
        if "repeat" in names:
            # transposable elements and pseudogenes outside every coding locus (and one
            # base from it, so that each gene is entered from intergenic DNA)
            rep = np.zeros(n, dtype=bool)
            for f in features:
                if f.seqid == rec.id and f.type in REPEAT_TYPES:
                    rep[f.start0 : min(f.end0, n)] = True
            for s0, e0, _ in spans:
                rep[max(0, s0 - 1) : min(n, e0 + 1)] = False
            states[rep] = names["repeat"]
        used_spans: list[tuple[int, int, str]] = []
        overlapping = set()
        for i in range(len(spans)):
            for j in range(i + 1, len(spans)):
                if spans[j][0] >= spans[i][1]:
                    break
                overlapping.add(spans[i][2])
                overlapping.add(spans[j][2])
        for s0, e0, gid in spans:
            txs = transcripts.get(gid, [])
            if gid in overlapping:
                report.skip("overlaps another coding gene", gid)
                states[s0:e0] = -1
                continue
            frames: dict[int, int] = {}
            disagree = False
            for tx in txs:
                for pos, fr in _frames(tx, n).items():
                    if frames.setdefault(pos, fr) != fr:
                        disagree = True
            if disagree:
                report.skip("isoforms disagree on the reading frame", gid)
                states[s0:e0] = -1
                continue
            good = []
            reasons = []
            for tx in txs:
                why = check_transcript(tx, rec.seq, rc, shape)
                if why is None:
                    good.append(tx)
                else:
                    reasons.append(why)
            if not good:
                if bad_genes == "fail":
                    raise FeatureFormatError(
                        f"gene '{gid}': {reasons[0]} (no transcript of the gene can be "
                        "used; --bad-genes skip leaves such genes out)",
                        path=path,
                        line0=txs[0].line0,
                        where=f"record '{rec.id}'",
                    )
                report.skip(reasons[0], gid)
                states[s0:e0] = -1
                continue
            best = max(good, key=lambda t: (t.coding_length, t.mrna))
            seq_o = rec.seq if best.strand == "+" else rc
            pairs = plus_path(best, seq_o, plus_names, shape)
            pos_a = np.array([p for p, _ in pairs], dtype=np.int64)
            st_a = np.array([q for _, q in pairs], dtype=np.int64)
            if best.strand == "-":
                pos_a = n - 1 - pos_a
                st_a = mirror[st_a]
            order_ = np.argsort(pos_a)
            pos_a, st_a = pos_a[order_], st_a[order_]
            if np.any(~allowed[st_a[:-1], st_a[1:]]) or np.any(np.diff(pos_a) != 1):
                report.skip("gene structure the layout cannot represent", gid)
                states[s0:e0] = -1
                continue
            states[pos_a] = st_a
            used_spans.append((int(pos_a[0]), int(pos_a[-1]) + 1, gid))
            report.used += 1
        # moves between genes and intergenic DNA, and emissions, must be allowed too
        codes = api.encode(tables, rec.seq)
        for g0, g1, gid in used_spans:
            lo, hi = max(g0 - 1, 0), min(g1 + 1, n)
            st = states[lo:hi]
            ok = True
            for i in range(len(st) - 1):
                if st[i] >= 0 and st[i + 1] >= 0 and not allowed[st[i], st[i + 1]]:
                    ok = False
                    break
            if ok:
                e = tables.E[codes[g0:g1].astype(np.int64), states[g0:g1]]
                ok = bool(np.all(e > 0))
            if not ok:
                report.used -= 1
                report.skip("gene next to another gene or with a base the layout forbids", gid)
                states[g0:g1] = -1
        out.append((rec.seq, states))
        rc_states = np.where(states >= 0, mirror[np.maximum(states, 0)], -1)[::-1]
        out.append((rc, np.ascontiguousarray(rc_states.astype(np.int32))))
    return out, report
