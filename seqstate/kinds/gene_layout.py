"""The gene-segment layout: coding exons with codon phase, introns and intergenic DNA.

This module knows the layout of the built-in ``gene-segment`` model (our own
design): :func:`build_layout` gives the states, the allowed moves and the
emission zeros (a model skeleton with uniform probabilities over what is
allowed).  The two conversions fit and annotate need live beside it:

* :func:`seqstate.kinds.gene_labels.label_records` -- a GFF3 gene annotation
  (gene -> mRNA -> CDS with phase) -> one state path per record (the labelling
  rule used by ``fit``);
* :func:`seqstate.kinds.genes.genes_from_path` -- a decoded path -> GFF3
  ``gene``/``mRNA``/``exon``/``CDS`` features with their CDS phase (used by
  ``annotate``).

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

import dataclasses
import re
from dataclasses import dataclass, field

import numpy as np

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


@dataclass(frozen=True)
class GeneShape:
    """The sizes of a gene-segment layout (the defaults are the original layout).

    ``up_flank`` bases before the start codon (``up1..``), ``down_flank`` bases after
    the stop codon (``down1..``), ``donor_flank`` intron bases after GT (``d3..``),
    ``acceptor_flank`` intron bases before AG (``a1..``).  ``body_stages``: the
    intron body as parallel branches of chained states, one entry per branch giving
    its number of stages; each stage stays with its own fitted probability, so a
    branch of R stages has a negative-binomial length (at least R bases) and the
    body a mixture of them (``(1,)``: one self-looping state, a geometric length).
    ``signal_order``: the emission order of the flank states (0: a position weight
    matrix; 1: a first-order weight-array model).  ``repeat``: a ``repeat`` state
    beside ``intergenic`` (no feature, both strands in one state) whose emissions
    are fitted from the annotation's transposable elements and pseudogenes
    (:data:`REPEAT_TYPES`), so that their open reading frames are not taken for
    genes.

    Minimum structure and splice classes (all off in the defaults):
    ``start_codons``: codons after the start codon (states ``cds1_s1..``) from which
    the gene cannot reach its stop codon (it may leave for an intron), so a gene
    of one coding exon has at least ``6 + 3 * start_codons`` coding bases.
    ``exon_codons``: codons after an intron (states ``cds1_x1..``, after the rest of
    a codon split by the intron, ``cds2_x0``/``cds3_x0``) from which the exon cannot
    leave for another intron (it may reach the stop codon), so an internal exon has
    at least ``3 * exon_codons`` coding bases.  ``gc_donor``: beside GT donors a
    second donor class GC (state ``{copy}_d2c``, entered from ``d1`` with its own
    fitted probability), a minor class in plants and animals (common practice).
    """

    up_flank: int = UP_FLANK
    down_flank: int = 0
    donor_flank: int = DONOR_FLANK
    acceptor_flank: int = ACCEPTOR_FLANK
    body_stages: tuple[int, ...] = (1,)
    signal_order: int = 0
    repeat: bool = False
    start_codons: int = 0
    exon_codons: int = 0
    gc_donor: bool = False

    @property
    def min_intron(self) -> int:
        """The shortest intron the layout can hold (bases)."""
        return 2 + self.donor_flank + min(self.body_stages) + self.acceptor_flank + 2

    def body_names(self, copy: str) -> list[list[str]]:
        """Per branch, the names (without strand) of its stages, 5' to 3'."""
        if self.body_stages == (1,):
            return [[f"{copy}_body"]]
        return [
            [f"{copy}_body{b + 1}_{i + 1}" for i in range(r)]
            for b, r in enumerate(self.body_stages)
        ]


DEFAULT_SHAPE = GeneShape()

#: The shape of the shipped ``gene-segment-layout`` (chosen by held-out measurement on
#: fly chromosome 4, see models/README.md): wider first-order signal windows, a stop
#: flank and the repeat state; one geometric intron body (chains measured, not better).
SHIPPED_SHAPE = GeneShape(
    up_flank=12,
    down_flank=6,
    donor_flank=8,
    acceptor_flank=28,
    body_stages=(1,),
    signal_order=1,
    repeat=True,
)
#: ``[fit] interpolate`` strength of the shipped layout.
SHIPPED_INTERPOLATION = 32.0

#: The shape of the plant layout ``gene-segment-layout-plant`` and of the plant model
#: ``gene-segment-athaliana`` fitted from it: :data:`SHIPPED_SHAPE` with GC donors beside
#: GT donors, exons after an intron of at least 10 codons (30 coding bases; under 1 % of
#: the internal coding exons of the training stretch are shorter) and an acceptor window of
#: 50 bases before AG (28 in the fly layout), with content emissions of order
#: :data:`PLANT_ORDER`.  Chosen by cross-validation inside A. thaliana chromosome 1
#: positions 1-15,000,000 (halves 1-7,500,000 and 7,500,001-15,000,000, both ways,
#: ``benchmarks/accuracy_plant.py``; models/README.md has the table): against the fly
#: layout, gene Sn 0.397 -> 0.450 and 0.393 -> 0.432, gene Sp 0.243 -> 0.294 and
#: 0.361 -> 0.405, exact-exon Sp 0.559 -> 0.609 and 0.732 -> 0.759 (acceptor windows of
#: 40 and 60 measured: 0.433 / 0.426 and 0.403 on the second-to-first split).
PLANT_SHAPE = dataclasses.replace(SHIPPED_SHAPE, gc_donor=True, exon_codons=10, acceptor_flank=50)
#: The content emission order of the plant layout (order 5 measured worse, order 3 a
#: little worse: models/README.md).
PLANT_ORDER = 4
#: The name of the plant start layout (``models/gene-segment-layout-plant``, written by
#: models/build.py).
PLANT_LAYOUT_NAME = "gene-segment-layout-plant"

#: GFF3 types whose spans the ``repeat`` state is fitted from (Sequence Ontology terms).
REPEAT_TYPES = ("mobile_genetic_element", "transposable_element", "pseudogene")


def shape_of(names: list[str]) -> GeneShape:
    """The :class:`GeneShape` of a model built by :func:`build_layout`, from its state names."""
    have = set(names)

    def count(fmt: str, first: int = 1) -> int:
        i = first
        while fmt.format(i) in have:
            i += 1
        return i - first

    up = count("up{}+")
    down = count("down{}+")
    donor = count("i0_d{}+", 3)
    acceptor = count("i0_a{}+") - 2
    if "i0_body+" in have:
        stages: tuple[int, ...] = (1,)
    else:
        branches = []
        b = 1
        while f"i0_body{b}_1+" in have:
            branches.append(count(f"i0_body{b}_{{}}+"))
            b += 1
        stages = tuple(branches)
    return GeneShape(
        up,
        down,
        donor,
        acceptor,
        stages,
        0,
        "repeat" in have,
        start_codons=count("cds1_s{}+"),
        exon_codons=count("cds1_x{}+"),
        gc_donor="i0_d2c+" in have,
    )


def prefix_names(shape: GeneShape, kind: str) -> list[list[str]]:
    """The codon stages of a minimum-length prefix (names without strand), 5' to 3'.

    ``kind`` ``"s"``: the codons after the start codon (``shape.start_codons``);
    ``"x"``: the codons after an intron (``shape.exon_codons``).  One list of
    three names (codon positions 1, 2, 3) per stage.
    """
    k = shape.start_codons if kind == "s" else shape.exon_codons
    return [[f"cds{j}_{kind}{i}" for j in (1, 2, 3)] for i in range(1, k + 1)]


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


def _plus_layout(shape: GeneShape = DEFAULT_SHAPE) -> _Plus:
    p = _Plus()
    up_flank, donor_flank, acceptor_flank = shape.up_flank, shape.donor_flank, shape.acceptor_flank
    for i in range(1, up_flank + 1):
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
    # minimum-length prefixes: codons after the start codon, the rest of a codon split
    # by an intron, then codons after an intron
    stages_s, stages_x = prefix_names(shape, "s"), prefix_names(shape, "x")
    if stages_x:
        p.add("cds2_x0", "CDS")
        p.add("cds3_x0", "CDS")
    for stage in stages_s + stages_x:
        for name in stage:
            p.add(name, "CDS")
    p.add("stop_T", "CDS", "T")
    p.add("stop_A", "CDS", "A")
    p.add("stop_G", "CDS", "G")
    p.add("stop_AR", "CDS", "AG")
    p.add("stop_GA", "CDS", "A")
    for i in range(1, shape.down_flank + 1):
        p.add(f"down{i}", None)
    for c in INTRON_COPIES:
        p.add(f"{c}_d1", "intron", "G")
        p.add(f"{c}_d2", "intron", "T")
        if shape.gc_donor:
            p.add(f"{c}_d2c", "intron", "C")
        for i in range(3, 3 + donor_flank):
            p.add(f"{c}_d{i}", "intron")
        for branch in shape.body_names(c):
            for name in branch:
                p.add(name, "intron")
        for i in range(1, acceptor_flank + 1):
            p.add(f"{c}_a{i}", "intron")
        p.add(f"{c}_a{acceptor_flank + 1}", "intron", "A")
        p.add(f"{c}_a{acceptor_flank + 2}", "intron", "G")
    # moves
    chain = [f"up{i}" for i in range(1, up_flank + 1)] + ["start_A", "start_T", "start_G"]
    for a, b in zip(chain, chain[1:]):
        p.move(a, b)
    leave = ["cds1_T_i1", "cds1_V_i1", "cds1_T_i2", "cds1_V_i2", "i0_d1"]
    codon_next = ["cds1", *leave, "stop_T"]
    p.move("cds3", *codon_next)
    # after the start codon: the start prefix (no stop), then the free codons
    ends = ["start_G"] + [st[2] for st in stages_s]
    for end, stage in zip(ends, stages_s):
        p.move(end, stage[0], *leave)
    p.move(ends[-1], *codon_next)
    # after an intron: the exon prefix (no intron), then the free codons
    after = ["cds3_Y", "cds3_B"]
    if stages_x:
        ends = ["cds3_x0"] + [st[2] for st in stages_x]
        for end, stage in zip(ends, stages_x):
            p.move(end, stage[0], "stop_T")
        p.move(ends[-1], *codon_next)
        for end in after:
            p.move(end, stages_x[0][0], "stop_T")
        p.move("cds2_x0", "cds3_x0")
    else:
        for end in after:
            p.move(end, *codon_next)
    for stage in stages_s + stages_x:
        p.move(stage[0], stage[1])
        p.move(stage[1], stage[2])
    cds2_in = "cds2_x0" if stages_x else "cds2"  # the second codon base after an intron
    cds3_in = "cds3_x0" if stages_x else "cds3"  # the third
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
        donor = [f"{c}_d{i}" for i in range(1, 3 + donor_flank)]
        acceptor = [f"{c}_a{i}" for i in range(1, acceptor_flank + 3)]
        for chain in (donor, acceptor):
            for a, b in zip(chain, chain[1:]):
                p.move(a, b)
        if shape.gc_donor:
            p.move(donor[0], f"{c}_d2c")
            p.move(f"{c}_d2c", donor[2])
        for branch in shape.body_names(c):
            p.move(donor[-1], branch[0])
            for a, b in zip(branch, branch[1:]):
                p.move(a, b)
            for name in branch:
                p.move(name, name)
            p.move(branch[-1], acceptor[0])
    last = f"_a{acceptor_flank + 2}"
    if stages_x:
        p.move("i0" + last, stages_x[0][0], "stop_T")
    else:
        p.move("i0" + last, *[t for t in codon_next if t != "i0_d1"])
    p.move("i1T" + last, "cds2_A_j1T", "cds2_G_j1T", "cds2_Y_j1T")
    p.move("cds2_A_j1T", "cds3_Y")
    p.move("cds2_G_j1T", "cds3_B")
    p.move("cds2_Y_j1T", cds3_in)
    p.move("i1V" + last, cds2_in)
    p.move("i2TA" + last, "cds3_Y")
    p.move("i2TG" + last, "cds3_B")
    p.move("i2N" + last, cds3_in)
    p.move("stop_T", "stop_A", "stop_G")
    p.move("stop_A", "stop_AR")
    p.move("stop_G", "stop_GA")
    down = [f"down{i}" for i in range(1, shape.down_flank + 1)]
    for a, b in zip(down, down[1:]):
        p.move(a, b)
    if down:
        p.move("stop_AR", down[0])
        p.move("stop_GA", down[0])
    return p


def _comp(bases: str) -> str:
    return "".join(sorted(COMPLEMENT[b] for b in bases))


def layout_states(
    shape: GeneShape = DEFAULT_SHAPE,
) -> tuple[list[State], list[tuple[int, int]], dict[str, str]]:
    """States (intergenic, then plus, then minus), allowed moves and allowed bases."""
    p = _plus_layout(shape)
    states = [State("intergenic", None, None)]
    bases = {"intergenic": ANY}
    for n in p.names:
        states.append(State(f"{n}+", p.labels[n], "+"))
        bases[f"{n}+"] = p.bases[n]
    for n in p.names:
        states.append(State(f"{n}-", p.labels[n], "-"))
        bases[f"{n}-"] = _comp(p.bases[n])
    if shape.repeat:
        states.append(State("repeat", None, None))
        bases["repeat"] = ANY
    index = {s.name: i for i, s in enumerate(states)}
    moves = [(index["intergenic"], index["intergenic"])]
    if shape.repeat:
        r, g = index["repeat"], index["intergenic"]
        moves += [(g, r), (r, r), (r, g)]
    for a, b in p.moves:
        moves.append((index[f"{a}+"], index[f"{b}+"]))
        moves.append((index[f"{b}-"], index[f"{a}-"]))
    # the plus gene enters at up1 and leaves after the stop codon; the minus mirror
    # enters at the reversed stop codon and leaves after the reversed flank
    first = "up1" if shape.up_flank else "start_A"
    moves.append((index["intergenic"], index[f"{first}+"]))
    moves.append((index[f"{first}-"], index["intergenic"]))
    if shape.down_flank:
        last = f"down{shape.down_flank}"
        moves.append((index[f"{last}+"], index["intergenic"]))
        moves.append((index["intergenic"], index[f"{last}-"]))
    else:
        for s in ("stop_AR", "stop_GA"):
            moves.append((index[f"{s}+"], index["intergenic"]))
            moves.append((index["intergenic"], index[f"{s}-"]))
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


#: A codon state of a minimum-length prefix, without its strand (``cds3_s4``, ``cds1_x2``).
_PREFIX_CODON = re.compile(r"cds[123]_[sx]\d+")


def _allowed(name: str, bases: str, context: str) -> str:
    """Bases a state may emit after ``context`` (stop codons impossible inside exons)."""
    core, strand = name[:-1], name[-1:]
    free = core[:4] if core in ("cds1", "cds3") or _PREFIX_CODON.fullmatch(core) else ""
    if free == "cds3" and strand == "+":
        last2 = context[-2:]
        if last2 == "TA":
            return "".join(b for b in bases if b not in "AG")
        if last2 == "TG":
            return "".join(b for b in bases if b != "A")
    if free == "cds1" and strand == "-":
        # reading the plus strand, a minus codon ends here: its reverse complement is
        # x y z = comp(third) comp(second) comp(first); stops TAA TAG TGA read TTA CTA TCA
        last2 = context[-2:]
        if last2 in ("TT", "CT", "TC"):
            return "".join(b for b in bases if b != "A")
    return bases


def build_layout(
    order: int = 3,
    *,
    name: str = "gene-segment-layout",
    shape: GeneShape = DEFAULT_SHAPE,
    interpolation: float | None = None,
) -> Model:
    """The gene-segment skeleton: allowed moves and emissions, uniform over what is allowed.

    ``order``: the emission order of the content states (intergenic, coding, intron
    body).  ``shape``: the sizes of flanks, signal windows and intron-body chains
    (:class:`GeneShape`).  ``interpolation``: when given, ``seqstate fit`` estimates
    the content states' emissions as interpolated Markov chains with this strength
    (``[fit] interpolate``, see :func:`seqstate.commands.fit.estimation.interpolated_rows`);
    else by plain counts plus the pseudocount.
    """
    if order < 2:
        raise ValueError("the gene-segment layout needs emission order >= 2 (stop codons)")
    if shape.gc_donor and shape.donor_flank < 1:
        raise ValueError("a GC donor class needs a donor flank of at least 1 base")
    if shape.signal_order > order:
        raise ValueError(f"signal order {shape.signal_order} is above the emission order {order}")
    states, moves, bases = layout_states(shape)
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
            for base in allowed:
                emis[s, c, DNA.index(base)] = 1.0
            emis[s, c] /= emis[s, c].sum()
    start = np.zeros(m)
    start[0] = 1.0
    ties, orders = fit_rules(states, shape)
    fit: dict = {
        "state_rule": "gene_structure",
        "both_strands": True,
        "tie": ties,
    }
    if shape.body_stages == (1,):
        fit["tie_transitions"] = [[f"{c}_body{st}" for c in INTRON_COPIES] for st in "+-"]
    else:
        fit["length_chains"] = length_chains(shape)
    fit["emission_order"] = orders
    if interpolation is not None:
        fit["interpolate"] = {
            "strength": float(interpolation),
            "states": content_states(states, shape),
        }
    return make_model(
        name=name,
        description=(
            "Gene-segment model (layout: seqstate's own): intergenic, a start flank of "
            f"{shape.up_flank} bases, start codon, three codon positions, stop "
            "codons of NCBI translation table 1 (no in-frame stop inside a coding exon)"
            + (f", a stop flank of {shape.down_flank} bases" if shape.down_flank else "")
            + (
                ", a repeat state (transposable elements and pseudogenes of the annotation)"
                if shape.repeat
                else ""
            )
            + ", six intron copies that keep the reading frame and the bases of a split "
            f"codon, splice donor (GT + {shape.donor_flank}) and acceptor "
            f"({shape.acceptor_flank} + AG) chains"
            + (
                f" of order-{shape.signal_order} position-specific states"
                if shape.signal_order
                else ""
            )
            + (
                f", at least {shape.start_codons} codons between start codon and stop codon"
                if shape.start_codons
                else ""
            )
            + (
                f", at least {shape.exon_codons} codons in an exon after an intron "
                "before the next intron"
                if shape.exon_codons
                else ""
            )
            + (", GC donors beside GT donors" if shape.gc_donor else "")
            + (
                ", an intron body of "
                + " or ".join(f"{r} chained states" for r in shape.body_stages)
                if shape.body_stages != (1,)
                else ""
            )
            + "; the minus strand is the reverse-complement mirror. Probabilities: see "
            "[provenance] (the layout itself is uniform over the allowed moves and bases)."
        ),
        alphabet=DNA,
        states=states,
        start=start,
        transitions=trans,
        emissions=emis,
        order=order,
        decode="viterbi",
        extra={"fit": fit, "annotate": {"features": "gene_structure"}},
    )


def content_states(states: list[State], shape: GeneShape = DEFAULT_SHAPE) -> list[str]:
    """The states of full emission order: intergenic, the free coding states, intron bodies."""
    out = ["intergenic", "repeat"]
    for strand in "+-":
        out += [f"cds{i}{strand}" for i in (1, 2, 3)]
        if shape.exon_codons:
            out += [f"cds2_x0{strand}", f"cds3_x0{strand}"]
        out += [f"{n}{strand}" for k in "sx" for st in prefix_names(shape, k) for n in st]
        out += [f"{n}{strand}" for c in INTRON_COPIES for b in shape.body_names(c) for n in b]
    have = {s.name for s in states}
    return [n for n in out if n in have]


def length_chains(shape: GeneShape) -> dict[str, dict]:
    """``[fit] length_chains``: per strand and intron copy, the chained body states.

    Keyed by ``entry``, the state before the chain; each value: ``group`` (chains
    of one group share one fitted length distribution: the intron bodies of a
    strand), ``branches`` (per branch, its stages in path order) and ``exit`` (the
    state after it).
    """
    out = {}
    for strand in "+-":
        for c in INTRON_COPIES:
            branches = [[f"{n}{strand}" for n in b] for b in shape.body_names(c)]
            entry = f"{c}_d{2 + shape.donor_flank}{strand}"
            exit_ = f"{c}_a1{strand}"
            if strand == "-":
                # the mirror runs 3' to 5' along the plus strand: stages reversed
                branches = [b[::-1] for b in branches]
                entry, exit_ = f"{c}_a1-", f"{c}_d{2 + shape.donor_flank}-"
            out[entry] = {"group": f"intron body {strand}", "branches": branches, "exit": exit_}
    return out


def fit_rules(
    states: list[State], shape: GeneShape = DEFAULT_SHAPE
) -> tuple[list[list[str]], dict[str, int]]:
    """Emission tying (groups pooled in fit) and per-state effective orders."""
    ties: list[list[str]] = []
    orders: dict[str, int] = {}
    j = shape.signal_order
    stages = prefix_names(shape, "s") + prefix_names(shape, "x")
    for strand in "+-":
        ties.append([f"{n}{strand}" for c in INTRON_COPIES for b in shape.body_names(c) for n in b])
        if stages:
            # the prefix codons emit as the free codon positions do
            for j in (1, 2, 3):
                extra = [f"cds{j}_x0{strand}"] if shape.exon_codons and j > 1 else []
                ties.append([f"cds{j}{strand}", *extra, *(f"{st[j - 1]}{strand}" for st in stages)])
        for i in list(range(3, 3 + shape.donor_flank)):
            ties.append([f"{c}_d{i}{strand}" for c in INTRON_COPIES])
        for i in range(1, shape.acceptor_flank + 1):
            ties.append([f"{c}_a{i}{strand}" for c in INTRON_COPIES])
        for i in range(1, shape.up_flank + 1):
            orders[f"up{i}{strand}"] = j
        for i in range(1, shape.down_flank + 1):
            orders[f"down{i}{strand}"] = j
        for c in INTRON_COPIES:
            for i in range(3, 3 + shape.donor_flank):
                orders[f"{c}_d{i}{strand}"] = j
            for i in range(1, shape.acceptor_flank + 1):
                orders[f"{c}_a{i}{strand}"] = j
    return ties, orders


def coding_run_pmf(model: Model, entry: str, n_max: int) -> tuple[np.ndarray, np.ndarray]:
    """Length distribution of one coding exon (CDS piece) of a plus-strand gene, from the
    model's transition matrix (exact, no sampling).

    The path starts at state ``entry`` (``start_A+`` for the first exon of a gene; an
    acceptor's last state such as ``i0_a30+`` for an exon after an intron, whose moves
    then lead into the exon) and walks the plus-strand CDS states.  Returns
    ``(to_intron, to_end)``, indexed by the exon length in bases (0..n_max):
    the probability that the exon has that length and is followed by an intron
    (initial or internal exons), or by the end of the coding sequence (single or
    terminal exons: the stop codon's last base is the exon's last).  Both are
    unnormalised joint probabilities; mass of exons longer than ``n_max`` is left out.
    """
    names = model.state_names
    idx = {n: i for i, n in enumerate(names)}
    cds = [i for i, s in enumerate(model.states) if s.label == "CDS" and s.strand == "+"]
    intron = [i for i, s in enumerate(model.states) if s.label == "intron" and s.strand == "+"]
    local = {s: k for k, s in enumerate(cds)}
    T = np.asarray(model.transitions, dtype=np.float64)
    other = sorted(set(range(len(names))) - set(cds) - set(intron))
    inner = T[np.ix_(cds, cds)]
    into_intron = T[np.ix_(cds, intron)].sum(axis=1)
    leave = T[np.ix_(cds, other)].sum(axis=1)  # summed, not 1 - the rest: exact zeros
    e = idx[entry]
    v = np.zeros(len(cds))
    if e in local:
        v[local[e]] = 1.0
    else:
        v = T[e, cds].copy()
    to_intron = np.zeros(n_max + 1)
    to_end = np.zeros(n_max + 1)
    for n in range(1, n_max + 1):
        to_intron[n] = float(v @ into_intron)
        to_end[n] = float(v @ leave)
        v = v @ inner
    return to_intron, to_end
