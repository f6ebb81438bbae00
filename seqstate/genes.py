"""The gene-segment layout: coding exons with codon phase, introns and intergenic DNA.

This module knows the layout of the built-in ``gene-segment`` model (our own
design) and the two conversions fit and annotate need:

* :func:`build_layout` -- the states, the allowed moves and the emission zeros
  (a model skeleton with uniform probabilities over what is allowed);
* :func:`label_records` -- a GFF3 gene annotation (gene -> mRNA -> CDS with
  phase) -> one state path per record (the labelling rule used by ``fit``);
* :func:`genes_from_path` -- a decoded path -> GFF3 ``gene``/``mRNA``/``exon``/
  ``CDS`` features with their CDS phase (used by ``annotate``).

Layout, plus strand, read 5' to 3' (the minus strand is the reverse-complement
mirror: every plus state ``x+`` has a twin ``x-``, every move ``x+ -> y+`` a move
``y- -> x-``, and ``x-`` emits on the plus strand what ``x+`` emits on the minus
strand):

``intergenic`` -> ``up1..up6`` (the six bases before the start codon) ->
``start_A start_T start_G`` (ATG) -> codons ``cds1 cds2 cds3`` ... ->
``stop_T`` then ``stop_A stop_AR`` (TAA, TAG) or ``stop_G stop_GA`` (TGA) ->
``intergenic``.

Introns come in six copies so that the reading frame, and the bases of a codon
split by the intron, survive it: ``i0`` (between codons), ``i1T``/``i1V`` (after
the first base of a codon, which was T / not T), ``i2TA``/``i2TG``/``i2N`` (after
the first two bases, which were TA / TG / anything else).  Each copy is a
donor chain ``d1 d2`` (GT) and ``d3..d6``, an intron body with a self-loop, and
an acceptor chain ``a1..a10`` (branch point and pyrimidine tract) and ``a11
a12`` (AG).  Short coding states before and after the intron (``cds1_T_i1``,
``cds2_A_j1T``, ``cds3_Y`` ...) emit only the bases that keep the memory true,
so that a stop codon is impossible inside a coding exon, whether the codon is
split by an intron or not.  Within a codon, ``cds3`` (plus strand) and
``cds1-`` (minus strand) have zero probability for the bases that would
complete TAA, TAG or TGA after their context (NCBI translation table 1).

GFF3 coordinates are 1-based closed in files, 0-based half-open inside.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass, field

import numpy as np

from seqstate.errors import FeatureFormatError
from seqstate.io.gff3 import Feature
from seqstate.model import Model, State, make_model

DNA = "ACGT"
COMPLEMENT = {"A": "T", "C": "G", "G": "C", "T": "A"}
STOPS = ("TAA", "TAG", "TGA")
UP_FLANK = 6
DONOR_FLANK = 4  # d3..d6
ACCEPTOR_FLANK = 10  # a1..a10
INTRON_COPIES = ("i0", "i1T", "i1V", "i2TA", "i2TG", "i2N")
MIN_INTRON = 2 + DONOR_FLANK + 1 + ACCEPTOR_FLANK + 2

ANY = "ACGT"


@dataclass
class _Plus:
    """The plus-strand half of the layout: names, labels, allowed bases, moves."""

    names: list[str] = field(default_factory=list)
    labels: dict[str, str | None] = field(default_factory=dict)
    bases: dict[str, str] = field(default_factory=dict)
    moves: list[tuple[str, str]] = field(default_factory=list)

    def add(self, name: str, label: str | None, bases: str = ANY) -> None:
        self.names.append(name)
        self.labels[name] = label
        self.bases[name] = bases

    def move(self, a: str, *targets: str) -> None:
        for b in targets:
            self.moves.append((a, b))


def _plus_layout() -> _Plus:
    p = _Plus()
    for i in range(1, UP_FLANK + 1):
        p.add(f"up{i}", None)
    p.add("start_A", "CDS", "A")
    p.add("start_T", "CDS", "T")
    p.add("start_G", "CDS", "G")
    for name in ("cds1", "cds2", "cds3"):
        p.add(name, "CDS")
    # codons split by an intron: states that remember the bases before it
    p.add("cds1_T_i1", "CDS", "T")
    p.add("cds1_V_i1", "CDS", "ACG")
    p.add("cds1_T_i2", "CDS", "T")
    p.add("cds1_V_i2", "CDS", "ACG")
    p.add("cds2_A_i2", "CDS", "A")
    p.add("cds2_G_i2", "CDS", "G")
    p.add("cds2_Y_i2", "CDS", "CT")
    p.add("cds2_N_i2", "CDS")
    p.add("cds2_A_j1T", "CDS", "A")
    p.add("cds2_G_j1T", "CDS", "G")
    p.add("cds2_Y_j1T", "CDS", "CT")
    p.add("cds3_Y", "CDS", "CT")  # after TA: not A, not G
    p.add("cds3_B", "CDS", "CGT")  # after TG: not A
    p.add("stop_T", "CDS", "T")
    p.add("stop_A", "CDS", "A")
    p.add("stop_G", "CDS", "G")
    p.add("stop_AR", "CDS", "AG")
    p.add("stop_GA", "CDS", "A")
    for c in INTRON_COPIES:
        p.add(f"{c}_d1", "intron", "G")
        p.add(f"{c}_d2", "intron", "T")
        for i in range(3, 3 + DONOR_FLANK):
            p.add(f"{c}_d{i}", "intron")
        p.add(f"{c}_body", "intron")
        for i in range(1, ACCEPTOR_FLANK + 1):
            p.add(f"{c}_a{i}", "intron")
        p.add(f"{c}_a{ACCEPTOR_FLANK + 1}", "intron", "A")
        p.add(f"{c}_a{ACCEPTOR_FLANK + 2}", "intron", "G")
    # moves
    chain = [f"up{i}" for i in range(1, UP_FLANK + 1)] + ["start_A", "start_T", "start_G"]
    for a, b in zip(chain, chain[1:]):
        p.move(a, b)
    codon_next = ["cds1", "cds1_T_i1", "cds1_V_i1", "cds1_T_i2", "cds1_V_i2", "i0_d1", "stop_T"]
    for end in ("start_G", "cds3", "cds3_Y", "cds3_B"):
        p.move(end, *codon_next)
    p.move("cds1", "cds2")
    p.move("cds2", "cds3")
    p.move("cds1_T_i1", "i1T_d1")
    p.move("cds1_V_i1", "i1V_d1")
    p.move("cds1_T_i2", "cds2_A_i2", "cds2_G_i2", "cds2_Y_i2")
    p.move("cds1_V_i2", "cds2_N_i2")
    p.move("cds2_A_i2", "i2TA_d1")
    p.move("cds2_G_i2", "i2TG_d1")
    p.move("cds2_Y_i2", "i2N_d1")
    p.move("cds2_N_i2", "i2N_d1")
    for c in INTRON_COPIES:
        chain = [f"{c}_d{i}" for i in range(1, 3 + DONOR_FLANK)] + [f"{c}_body"]
        chain += [f"{c}_a{i}" for i in range(1, ACCEPTOR_FLANK + 3)]
        for a, b in zip(chain, chain[1:]):
            p.move(a, b)
        p.move(f"{c}_body", f"{c}_body")
    last = f"_a{ACCEPTOR_FLANK + 2}"
    p.move("i0" + last, *[t for t in codon_next if t != "i0_d1"])
    p.move("i1T" + last, "cds2_A_j1T", "cds2_G_j1T", "cds2_Y_j1T")
    p.move("cds2_A_j1T", "cds3_Y")
    p.move("cds2_G_j1T", "cds3_B")
    p.move("cds2_Y_j1T", "cds3")
    p.move("i1V" + last, "cds2")
    p.move("i2TA" + last, "cds3_Y")
    p.move("i2TG" + last, "cds3_B")
    p.move("i2N" + last, "cds3")
    p.move("stop_T", "stop_A", "stop_G")
    p.move("stop_A", "stop_AR")
    p.move("stop_G", "stop_GA")
    return p


def _comp(bases: str) -> str:
    return "".join(sorted(COMPLEMENT[b] for b in bases))


def layout_states() -> tuple[list[State], list[tuple[int, int]], dict[str, str]]:
    """States (intergenic, then plus, then minus), allowed moves and allowed bases."""
    p = _plus_layout()
    states = [State("intergenic", None, None)]
    bases = {"intergenic": ANY}
    for n in p.names:
        states.append(State(f"{n}+", p.labels[n], "+"))
        bases[f"{n}+"] = p.bases[n]
    for n in p.names:
        states.append(State(f"{n}-", p.labels[n], "-"))
        bases[f"{n}-"] = _comp(p.bases[n])
    index = {s.name: i for i, s in enumerate(states)}
    moves = [(index["intergenic"], index["intergenic"])]
    for a, b in p.moves:
        moves.append((index[f"{a}+"], index[f"{b}+"]))
        moves.append((index[f"{b}-"], index[f"{a}-"]))
    # the plus gene enters at up1 and leaves after the stop codon; the minus mirror
    # enters at the reversed stop codon and leaves after the reversed flank
    moves.append((index["intergenic"], index["up1+"]))
    for s in ("stop_AR+", "stop_GA+"):
        moves.append((index[s], index["intergenic"]))
    moves.append((index["intergenic"], index["stop_AR-"]))
    moves.append((index["intergenic"], index["stop_GA-"]))
    moves.append((index["up1-"], index["intergenic"]))
    return states, moves, bases


def mirror_index(states: list[State]) -> np.ndarray:
    """For each state, the index of its other-strand twin (intergenic is its own)."""
    index = {s.name: i for i, s in enumerate(states)}
    out = np.arange(len(states), dtype=np.int64)
    for i, s in enumerate(states):
        if s.name.endswith("+"):
            out[i] = index[s.name[:-1] + "-"]
        elif s.name.endswith("-"):
            out[i] = index[s.name[:-1] + "+"]
    return out


def _allowed(name: str, bases: str, context: str) -> str:
    """Bases a state may emit after ``context`` (stop codons impossible inside exons)."""
    if name == "cds3+":
        last2 = context[-2:]
        if last2 == "TA":
            return "".join(b for b in bases if b not in "AG")
        if last2 == "TG":
            return "".join(b for b in bases if b != "A")
    if name == "cds1-":
        # reading the plus strand, a minus codon ends here: its reverse complement is
        # x y z = comp(third) comp(second) comp(first); stops TAA TAG TGA read TTA CTA TCA
        last2 = context[-2:]
        if last2 in ("TT", "CT", "TC"):
            return "".join(b for b in bases if b != "A")
    return bases


def build_layout(order: int = 3, *, name: str = "gene-segment-layout") -> Model:
    """The gene-segment skeleton: allowed moves and emissions, uniform over what is allowed."""
    if order < 2:
        raise ValueError("the gene-segment layout needs emission order >= 2 (stop codons)")
    states, moves, bases = layout_states()
    m = len(states)
    trans = np.zeros((m, m))
    for a, b in moves:
        trans[a, b] = 1.0
    trans /= trans.sum(axis=1, keepdims=True)
    a = len(DNA)
    emis = np.zeros((m, a**order, a))
    for s, st in enumerate(states):
        for c in range(a**order):
            ctx = "".join(DNA[(c // a ** (order - 1 - q)) % a] for q in range(order))
            allowed = _allowed(st.name, bases[st.name], ctx)
            for b in allowed:
                emis[s, c, DNA.index(b)] = 1.0
            emis[s, c] /= emis[s, c].sum()
    start = np.zeros(m)
    start[0] = 1.0
    ties, orders = fit_rules(states)
    return make_model(
        name=name,
        description=(
            "Gene-segment model (layout: seqstate's own): intergenic, a six-base start "
            "flank, start codon, three codon positions, six intron copies that keep the "
            "reading frame and the bases of a split codon, splice donor (GT + 4) and "
            "acceptor (10 + AG) chains, stop codons of NCBI translation table 1 (no "
            "in-frame stop inside a coding exon); the minus strand is the "
            "reverse-complement mirror. Probabilities: see [provenance] (the layout itself "
            "is uniform over the allowed moves and bases)."
        ),
        alphabet=DNA,
        states=states,
        start=start,
        transitions=trans,
        emissions=emis,
        order=order,
        decode="viterbi",
        extra={
            "fit": {
                "state_rule": "gene_structure",
                "both_strands": True,
                "tie": ties,
                "tie_transitions": [[f"{c}_body{st}" for c in INTRON_COPIES] for st in "+-"],
                "emission_order": orders,
            },
            "annotate": {"features": "gene_structure"},
        },
    )


def fit_rules(states: list[State]) -> tuple[list[list[str]], dict[str, int]]:
    """Emission tying (groups pooled in fit) and per-state effective orders."""
    ties: list[list[str]] = []
    orders: dict[str, int] = {}
    for strand in "+-":
        ties.append([f"{c}_body{strand}" for c in INTRON_COPIES])
        for i in list(range(3, 3 + DONOR_FLANK)):
            ties.append([f"{c}_d{i}{strand}" for c in INTRON_COPIES])
        for i in range(1, ACCEPTOR_FLANK + 1):
            ties.append([f"{c}_a{i}{strand}" for c in INTRON_COPIES])
        for i in range(1, UP_FLANK + 1):
            orders[f"up{i}{strand}"] = 0
        for c in INTRON_COPIES:
            for i in range(3, 3 + DONOR_FLANK):
                orders[f"{c}_d{i}{strand}"] = 0
            for i in range(1, ACCEPTOR_FLANK + 1):
                orders[f"{c}_a{i}{strand}"] = 0
    return ties, orders


# ====================================================================== labelling
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


def check_transcript(tx: Transcript, seq: bytes, rc: bytes) -> str | None:
    """Why this transcript cannot be labelled (None if it can).

    Checks: CDS length a multiple of 3, GFF3 phases consistent with the lengths,
    ATG start, a stop codon at the end and none inside, GT..AG introns of at least
    :data:`MIN_INTRON` bases, no intron inside the start or stop codon, a clean
    start flank.
    """
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
    if pieces[0][0] < UP_FLANK:
        return "start flank runs off the record"
    if set(s[pieces[0][0] - UP_FLANK : pieces[0][0]].upper()) - set(b"ACGT"):
        return "unknown bases in the start flank"
    for (_, b0), (a1, _) in zip(pieces, pieces[1:]):
        intron = s[b0:a1].upper()
        if len(intron) < MIN_INTRON:
            return f"intron shorter than {MIN_INTRON} bases"
        if intron[:2] != b"GT" or intron[-2:] != b"AG":
            return "intron not GT..AG"
    return None


def plus_path(tx: Transcript, seq_plus: bytes, names: dict[str, int]) -> list[tuple[int, int]]:
    """(position, state) pairs of one checked transcript on its own strand's sequence.

    ``seq_plus`` is the sequence in the transcript's orientation; states are the
    plus-strand ones (``names`` maps plus names without the strand sign).
    """
    length = len(seq_plus)
    pieces = _oriented(tx, length)
    out: list[tuple[int, int]] = []
    first = pieces[0][0]
    for i in range(UP_FLANK):
        out.append((first - UP_FLANK + i, names[f"up{i + 1}"]))
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
            donor = [f"{copy}_d{i}" for i in range(1, 3 + DONOR_FLANK)]
            acceptor = [f"{copy}_a{i}" for i in range(1, ACCEPTOR_FLANK + 3)]
            n_body = len(intron) - len(donor) - len(acceptor)
            labels = donor + [f"{copy}_body"] * n_body + acceptor
            for pos, st in zip(intron, labels):
                out.append((pos, names[st]))
    return out


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
                spans.append((max(0, lo - UP_FLANK), min(n, hi + UP_FLANK), gid))
        spans.sort()
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
                why = check_transcript(tx, rec.seq, rc)
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
            pairs = plus_path(best, seq_o, plus_names)
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


# ====================================================================== decoding
#: ``partial_reason`` values: the gene reaches the end of the annotated stretch, or it
#: was cut at a run of unknown bases (``annotate --split-unknown``).
PARTIAL_RECORD_END = "record_end"
PARTIAL_UNKNOWN_RUN = "unknown_run"


@dataclass
class GenePrediction:
    """One decoded gene: strand and CDS pieces (plus-strand coordinates, 0-based).

    ``phases`` (genomic order) come from the codon position of each piece's 5'-most
    base on the path, so they are right even for a gene that lacks its start or
    stop codon.  ``partial_reasons`` says why a gene is incomplete (empty for a
    complete one): :data:`PARTIAL_RECORD_END` (it runs into an end of the annotated
    stretch) and/or :data:`PARTIAL_UNKNOWN_RUN` (cut at a long run of unknown bases).
    """

    strand: str
    pieces: list[tuple[int, int]]  # in genomic order
    phases: list[int] | None = None
    partial_reasons: tuple[str, ...] = ()

    @property
    def partial(self) -> bool:
        return bool(self.partial_reasons)

    @property
    def span(self) -> tuple[int, int]:
        return self.pieces[0][0], self.pieces[-1][1]


def unknown_runs(unknown: np.ndarray, threshold: int) -> list[tuple[int, int]]:
    """Maximal runs (0-based half-open) of at least ``threshold`` unknown bases."""
    u = np.asarray(unknown, dtype=bool)
    if not u.any():
        return []
    padded = np.concatenate([[False], u, [False]])
    edges = np.flatnonzero(padded[1:] != padded[:-1])
    return [
        (int(a), int(b)) for a, b in zip(edges[0::2], edges[1::2]) if int(b) - int(a) >= threshold
    ]


def genes_from_path(
    path: np.ndarray,
    model: Model,
    unknown: np.ndarray | None = None,
    split_unknown: int | None = None,
) -> list[GenePrediction]:
    """Runs of one strand's gene states (CDS and intron) along a path -> genes.

    A gene is a maximal run of CDS and intron states of one strand; its CDS pieces
    are the maximal runs of CDS states inside it.  With ``unknown`` (a boolean per
    base) and ``split_unknown`` (a length), every run of at least ``split_unknown``
    unknown bases inside a gene cuts it: the parts on either side become genes of
    their own, marked partial (:data:`PARTIAL_UNKNOWN_RUN`), and unknown bases are
    trimmed from the outer ends of every part.  A gene touching the first or last
    base of the path is partial (:data:`PARTIAL_RECORD_END`).  Parts without a
    coding base are dropped.  Genes come in genomic order.
    """
    m = model.n_states
    strand_of = np.zeros(m, dtype=np.int8)  # 1 plus gene state, 2 minus, 0 other
    is_cds = np.zeros(m, dtype=bool)
    for i, s in enumerate(model.states):
        if s.label in ("CDS", "intron"):
            strand_of[i] = 1 if s.strand == "+" else 2
        is_cds[i] = s.label == "CDS"
    p = np.asarray(path, dtype=np.int64)
    frame = codon_positions(model)
    g = strand_of[p]
    c = is_cds[p]
    n = p.shape[0]
    if unknown is None:
        unknown = np.zeros(n, dtype=bool)
    unknown = np.asarray(unknown, dtype=bool)
    gaps = unknown_runs(unknown, split_unknown) if split_unknown else []
    change = np.flatnonzero(g[1:] != g[:-1]) + 1
    starts = np.concatenate([[0], change])
    ends = np.concatenate([change, [n]])
    genes = []
    for s0, e0 in zip(starts.tolist(), ends.tolist()):
        if g[s0] == 0:
            continue
        strand = "+" if g[s0] == 1 else "-"
        # the run minus the long unknown runs inside it: (lo, hi, cut_left, cut_right)
        parts = []
        lo, cut_left = s0, False
        for a, b in gaps:
            if b <= s0 or a >= e0:
                continue
            if a > lo:
                parts.append((lo, a, cut_left, True))
            lo, cut_left = max(b, lo), True
        if lo < e0:
            parts.append((lo, e0, cut_left, False))
        for lo, hi, cut_l, cut_r in parts:
            while lo < hi and unknown[lo]:
                lo += 1
            while hi > lo and unknown[hi - 1]:
                hi -= 1
            cc = c[lo:hi]
            padded = np.concatenate([[False], cc, [False]])
            edges = np.flatnonzero(padded[1:] != padded[:-1])
            pieces = [(lo + int(a), lo + int(b)) for a, b in zip(edges[0::2], edges[1::2])]
            if not pieces:
                continue
            # outer ends of the part are trimmed of unknown bases (inner ones stay)
            a0, b0 = pieces[0]
            while a0 < b0 and unknown[a0]:
                a0 += 1
            pieces[0] = (a0, b0)
            a1, b1 = pieces[-1]
            while b1 > a1 and unknown[b1 - 1]:
                b1 -= 1
            pieces[-1] = (a1, b1)
            pieces = [(a, b) for a, b in pieces if b > a]
            if not pieces:
                continue
            five = [a if strand == "+" else b - 1 for a, b in pieces]
            phases = [(3 - int(frame[p[q]])) % 3 for q in five]
            reasons = []
            if s0 == 0 or e0 == n:
                reasons.append(PARTIAL_RECORD_END)
            if cut_l or cut_r:
                reasons.append(PARTIAL_UNKNOWN_RUN)
            genes.append(GenePrediction(strand, pieces, phases, tuple(reasons)))
    return genes


def codon_positions(model: Model) -> np.ndarray:
    """Per state, the codon position (0, 1, 2) of the base it emits, in the transcript's
    own orientation; -1 for non-coding states."""
    out = np.full(model.n_states, -1, dtype=np.int64)
    for i, s in enumerate(model.states):
        base = s.name[:-1] if s.name[-1:] in "+-" else s.name
        if base in ("start_A", "stop_T") or base.startswith("cds1"):
            out[i] = 0
        elif base in ("start_T", "stop_A", "stop_G") or base.startswith("cds2"):
            out[i] = 1
        elif base in ("start_G", "stop_AR", "stop_GA") or base.startswith("cds3"):
            out[i] = 2
    return out


def decoding_classes(model: Model) -> tuple[np.ndarray, int]:
    """Per state, its class for posterior decoding of gene structures; and the count.

    Class 0 is every non-gene state (intergenic and start flanks).  Per strand
    (plus first): three CDS classes, one per codon position, then three intron
    classes, one per intron phase (``i0``, ``i1*``, ``i2*`` copies).  The classes
    carry the reading frame, so a path that maximises the expected number of bases
    in their right class keeps the frame the posterior supports.
    """
    frame = codon_positions(model)
    out = np.zeros(model.n_states, dtype=np.int64)
    for i, s in enumerate(model.states):
        if s.label not in ("CDS", "intron"):
            continue
        base = 1 if s.strand == "+" else 7
        if s.label == "CDS":
            out[i] = base + int(frame[i])
        else:
            phase = int(s.name[1]) if s.name[:1] == "i" and s.name[1:2].isdigit() else 0
            out[i] = base + 3 + phase
    return out, 13


def cds_phases(gene: GenePrediction) -> list[int]:
    """GFF3 phase of each CDS piece, in genomic order.

    GFF3 1.26: the phase is the number of bases to remove from the 5' end of the
    piece (on its strand) to reach the first base of the next codon.  Taken from
    the path when the gene has them, else from the lengths (a complete gene).
    """
    if gene.phases is not None:
        return list(gene.phases)
    order = gene.pieces if gene.strand == "+" else gene.pieces[::-1]
    phases = []
    done = 0
    for a, b in order:
        phases.append((3 - done % 3) % 3)
        done += b - a
    return phases if gene.strand == "+" else phases[::-1]


@dataclass(frozen=True)
class GeneLine:
    """One GFF3 line of a gene hierarchy (0-based half-open, plus-strand coordinates).

    ``piece`` is the index of the CDS piece in genomic order (None for gene and mRNA).
    """

    type: str
    start0: int
    end0: int
    id: str
    parent: str | None
    phase: int | None
    piece: int | None


_TYPE_RANK = {"gene": 0, "mRNA": 1, "exon": 2, "CDS": 3}


def gene_lines(gene: GenePrediction, seqid: str, number: int) -> list[GeneLine]:
    """The gene -> mRNA -> exon + CDS lines of one gene, in file order.

    IDs: ``SEQID.gene.N``, ``SEQID.mRNA.N``, ``SEQID.mRNA.N.exon.K`` and
    ``SEQID.mRNA.N.CDS.K`` with K counted from the 5' end on the gene's strand.
    File order is by start (then parent before child: gene, mRNA, exon, CDS), the
    order index tools need (common practice), whatever the strand.
    """
    g0, g1 = gene.span
    gid = f"{seqid}.gene.{number}"
    mid = f"{seqid}.mRNA.{number}"
    lines = [GeneLine("gene", g0, g1, gid, None, None, None)]
    lines.append(GeneLine("mRNA", g0, g1, mid, gid, None, None))
    phases = cds_phases(gene)
    k_of = range(len(gene.pieces)) if gene.strand == "+" else range(len(gene.pieces) - 1, -1, -1)
    for k, i in enumerate(k_of, start=1):
        a, b = gene.pieces[i]
        lines.append(GeneLine("exon", a, b, f"{mid}.exon.{k}", mid, None, i))
        lines.append(GeneLine("CDS", a, b, f"{mid}.CDS.{k}", mid, phases[i], i))
    lines.sort(key=lambda ln: (ln.start0, _TYPE_RANK[ln.type]))
    return lines
