"""Exact exon and gene-structure probabilities: the constrained-path query of the engine.

The oracle is brute-force enumeration of every state path of a tiny gene-like model
(intergenic, three codon positions and an intron per strand): the probability of an
event is the summed joint probability of the paths in it over the total.  The kernels
are also checked against the plain-NumPy twin (``engine.reference``), the chain-sparse
family against the generic one, the windowed writer against the whole-record one, and
the order of the probabilities (common practice: a subset event is never more likely).
"""

from __future__ import annotations

import io
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seqstate.engine import api, reference
from seqstate.io.gff3 import GFF3Writer
from seqstate.io.tables import load_model
from seqstate.kinds import genes as gk
from seqstate.kinds import group_index, track_groups
from seqstate.model import State, make_model
from tests.helpers import kernel_family, sample_record
from tests.test_kinds_stream import _compare, _gene_record

# ----------------------------------------------------------------- the tiny gene model
NAMES = ["intergenic", "cds1", "cds2", "cds3", "i0"]
_MOVES_PLUS = [
    ("intergenic", "intergenic"),
    ("intergenic", "cds1+"),
    ("cds1+", "cds2+"),
    ("cds2+", "cds3+"),
    ("cds3+", "cds1+"),
    ("cds3+", "intergenic"),
    ("cds3+", "i0+"),
    ("i0+", "i0+"),
    ("i0+", "cds1+"),
]
# the minus strand in genomic order: codon positions run 3, 2, 1 from left to right
_MOVES_MINUS = [
    ("intergenic", "cds3-"),
    ("cds3-", "cds2-"),
    ("cds2-", "cds1-"),
    ("cds1-", "cds3-"),
    ("cds1-", "intergenic"),
    ("cds1-", "i0-"),
    ("i0-", "i0-"),
    ("i0-", "cds3-"),
]


def tiny_model(seed: int, strands: str = "+"):
    """Intergenic, cds1-3 and an intron per strand, random probabilities on the allowed
    moves, random order-0 emissions (some zero), end probabilities on intergenic and on
    the last codon position."""
    rng = np.random.default_rng(seed)
    states = [State("intergenic")]
    for s in strands:
        states += [State(f"cds{k}{s}", "CDS", s) for k in (1, 2, 3)]
        states.append(State(f"i0{s}", "intron", s))
    idx = {st.name: i for i, st in enumerate(states)}
    m = len(states)
    trans = np.zeros((m, m))
    moves = list(_MOVES_PLUS) + (_MOVES_MINUS if "-" in strands else [])
    for a, b in moves:
        if a in idx and b in idx:
            trans[idx[a], idx[b]] = rng.uniform(0.2, 1.0)
    emis = rng.uniform(0.05, 1.0, size=(m, 4))
    emis[rng.random((m, 4)) < 0.08] = 0.0
    emis[:, 0] += 0.05  # every state can emit A
    emis /= emis.sum(axis=1, keepdims=True)
    start = np.zeros(m)
    start[idx["intergenic"]] = 0.6
    for name in ("cds1+", "cds3-", "i0+"):
        if name in idx:
            start[idx[name]] = rng.uniform(0.1, 0.3)
    start /= start.sum()
    end = np.zeros(m)
    end[idx["intergenic"]] = 0.3
    for name in ("cds3+", "cds1-"):
        if name in idx:
            end[idx[name]] = 0.2
    # each row of moves plus its end probability sums to 1
    trans *= ((1.0 - end) / trans.sum(axis=1))[:, None]
    return make_model(
        name="tiny-gene",
        alphabet="ACGT",
        states=states,
        start=start,
        transitions=trans,
        emissions=emis,
        end=end,
        extra={"annotate": {"features": "gene_structure"}},
    )


def enumerate_paths(tables, lattice):
    """Every state path of positive probability (depth-first over allowed moves) with
    its joint probability; paths of probability 0 add nothing to any sum."""
    n, m = lattice.shape
    trans, start, end = tables.transitions, tables.start, tables.end
    out: list[tuple[tuple[int, ...], float]] = []

    def walk(path: list[int], p: float) -> None:
        i = len(path)
        if i == n:
            pe = p * end[path[-1]]
            if pe > 0:
                out.append((tuple(path), pe))
            return
        for s in range(m):
            q = (start[s] if i == 0 else p * trans[path[-1], s]) * lattice[i, s]
            if q > 0:
                walk([*path, s], q)

    walk([], 1.0)
    return out


def _record(model, seq: str):
    tables = api.prepare(model)
    codes = api.encode(tables, seq)
    return tables, codes, tables.E[codes.astype(np.int64)]


def _frames_of(model, path, lo, hi):
    frame = gk.codon_positions(model)
    return [int(frame[s]) for s in path[lo:hi]]


def exon_truth(model, paths, n, strand, a, b, phase):
    """P(exon [a, b) with this phase on ``strand``) by enumeration, from the definition:
    a maximal run of the strand's CDS states exactly over [a, b) whose 5' base has the
    codon position the GFF3 phase gives (frames advance along the exon)."""
    cds = np.array([s.label == "CDS" and s.strand == strand for s in model.states])
    first = (3 - phase) % 3
    want = [(first + k) % 3 for k in range(b - a)]
    if strand == "-":
        want = want[::-1]
    total = sum(p for _, p in paths)
    hit = 0.0
    for path, p in paths:
        if not all(cds[s] for s in path[a:b]):
            continue
        if a > 0 and cds[path[a - 1]]:
            continue
        if b < n and cds[path[b]]:
            continue
        if _frames_of(model, path, a, b) == want:
            hit += p
    return hit / total


def structure_truth(model, paths, gene: gk.GenePrediction, n: int) -> float:
    """P(the gene's whole structure) by enumeration: the decoded genes of a path
    (``genes_from_path``) include one with these pieces and phases on this strand, and
    the path's run of the strand's gene states is exactly the gene's span (a run that
    goes on as intron into an end of the record is another, longer structure)."""
    gene_state = np.array(
        [s.label in ("CDS", "intron") and s.strand == gene.strand for s in model.states]
    )
    g0, g1 = gene.span
    total = sum(p for _, p in paths)
    hit = 0.0
    for path, p in paths:
        if (g0 > 0 and gene_state[path[g0 - 1]]) or (g1 < n and gene_state[path[g1]]):
            continue
        for g in gk.genes_from_path(np.array(path), model):
            if (g.strand, g.pieces, g.phases) == (gene.strand, gene.pieces, gene.phases):
                hit += p
                break
    return hit / total


def _api_exon(model, tables, codes, post, n, strand, a, b, phase):
    lo, hi, cls = gk.exon_query(n, strand, a, b, phase)
    lp = api.constrained_log_probability(
        tables, codes, post, lo, hi, cls, gk.exact_allowed(model)[strand]
    )
    return math.exp(lp) if lp > -math.inf else 0.0


def _api_structure(model, tables, codes, post, n, gene):
    lo, hi, cls = gk.structure_query(n, gene)
    lp = api.constrained_log_probability(
        tables, codes, post, lo, hi, cls, gk.exact_allowed(model)[gene.strand]
    )
    return math.exp(lp) if lp > -math.inf else 0.0


def _all_genes(model, paths):
    seen = {}
    for path, _ in paths:
        for g in gk.genes_from_path(np.array(path), model):
            seen[(g.strand, tuple(g.pieces), tuple(g.phases or ()))] = g
    return list(seen.values())


CASES = [(2, "+", "AAGCTTAG"), (3, "+-", "ACGTTGCA"), (4, "+-", "AAAACGT"), (6, "+-", "GATTACA")]


@pytest.fixture(params=CASES, ids=[f"seed{c[0]}{c[1]}" for c in CASES], scope="module")
def tiny(request):
    seed, strands, seq = request.param
    model = tiny_model(seed, strands)
    tables, codes, lattice = _record(model, seq)
    paths = enumerate_paths(tables, lattice)
    assert paths, "the tiny record must be possible"
    return model, tables, codes, lattice, paths


def test_exon_probability_matches_enumeration(kernel, tiny):
    model, tables, codes, lattice, paths = tiny
    n = codes.shape[0]
    post = api.posterior(tables, codes)
    checked = nonzero = 0
    for strand in {s.strand for s in model.states if s.strand}:
        for a in range(n):
            for b in range(a + 1, n + 1):
                for phase in (0, 1, 2):
                    want = exon_truth(model, paths, n, strand, a, b, phase)
                    got = _api_exon(model, tables, codes, post, n, strand, a, b, phase)
                    # source: brute-force enumeration of every path (the definition)
                    assert got == pytest.approx(want, abs=1e-12, rel=1e-10)
                    checked += 1
                    nonzero += want > 0
    assert nonzero >= 3 and checked > nonzero


def test_structure_probability_matches_enumeration(kernel, tiny):
    model, tables, codes, lattice, paths = tiny
    n = codes.shape[0]
    post = api.posterior(tables, codes)
    genes = _all_genes(model, paths)
    assert len(genes) >= 3
    for gene in genes:
        want = structure_truth(model, paths, gene, n)
        got = _api_structure(model, tables, codes, post, n, gene)
        # source: brute-force enumeration of every path (the definition)
        assert got == pytest.approx(want, abs=1e-12, rel=1e-10)
        assert want > 0
    # a structure no path has: probability 0 (a piece whose frame cannot be reached)
    g = genes[0]
    wrong = gk.GenePrediction(g.strand, g.pieces, [(p + 1) % 3 for p in g.phases or []])
    assert _api_structure(model, tables, codes, post, n, wrong) == pytest.approx(
        structure_truth(model, paths, wrong, n), abs=1e-12
    )


def test_constrained_query_matches_numpy_reference_on_random_classes(tiny):
    model, tables, codes, lattice, paths = tiny
    n = codes.shape[0]
    post = api.posterior(tables, codes)
    rng = np.random.default_rng(5)
    m = tables.n_states
    total = sum(p for _, p in paths)
    for _ in range(40):
        k = int(rng.integers(1, 4))
        allowed = rng.random((k, m)) < 0.6
        a = int(rng.integers(0, n))
        b = int(rng.integers(a + 1, n + 1))
        cls = rng.integers(0, k, size=b - a)
        got = api.constrained_log_probability(tables, codes, post, a, b, cls, allowed)
        want = reference.constrained_log_probability(
            tables.start, tables.transitions, tables.end, lattice, a, b, cls, allowed
        )
        enum = sum(p for path, p in paths if all(allowed[cls[i - a], path[i]] for i in range(a, b)))
        if enum == 0:
            assert got == want == -math.inf
            continue
        # sources: the NumPy twin and brute-force enumeration
        assert got == pytest.approx(want, abs=1e-10)
        assert got == pytest.approx(math.log(enum / total), abs=1e-10)


# ----------------------------------------------------------------- the shipped model
@pytest.fixture(scope="module")
def gene_record():
    model = load_model("gene-segment")
    rng = np.random.default_rng(14)
    seq = sample_record(rng, 12000, model=model)  # two genes: 3 CDS pieces and 1
    return model, seq


def _queries(model, tables, codes, n):
    """Exon and structure queries of the genes decoded on the record."""
    genes = gk.decode_genes(model, tables, codes, np.zeros(n, bool), "viterbi", 0, "r")
    out = []
    allowed = gk.exact_allowed(model)
    for g in genes:
        out.append((*gk.structure_query(n, g), allowed[g.strand]))
        for (a, b), ph in zip(g.pieces, gk.cds_phases(g)):
            out.append((*gk.exon_query(n, g.strand, a, b, ph), allowed[g.strand]))
    return genes, out


@pytest.mark.parametrize("family", ["generic", "sparse"])
def test_kernels_equal_numpy_reference_on_the_gene_model(family):
    model = load_model("gene-segment")
    rng = np.random.default_rng(5)
    seq = sample_record(rng, 3000, model=model)  # one gene of 3 CDS pieces
    tables = api.prepare(model, kernels=family)
    assert kernel_family(tables) == family  # the test cannot pass on another family
    codes = api.encode(tables, seq)
    n = codes.shape[0]
    post = api.posterior(tables, codes)
    lattice = tables.E[codes.astype(np.int64)]
    trans = tables.transitions
    genes, queries = _queries(model, tables, codes, n)
    assert len(queries) >= 4
    for lo, hi, cls, allowed in queries:
        got = api.constrained_log_probability(tables, codes, post, lo, hi, cls, allowed)
        want = reference.constrained_log_probability(
            tables.start, trans, tables.end, lattice, lo, hi, cls, allowed
        )
        # source: the plain-NumPy twin (matrix products over the whole record)
        assert got == pytest.approx(want, abs=1e-9)


def test_sparse_family_equals_generic(gene_record):
    model, seq = gene_record
    tg = api.prepare(model, kernels="generic")
    ts = api.prepare(model, kernels="sparse")
    assert kernel_family(ts) == "sparse" and kernel_family(tg) == "generic"
    codes = api.encode(tg, seq)
    n = codes.shape[0]
    pg, ps = api.posterior(tg, codes), api.posterior(ts, codes)
    genes, queries = _queries(model, tg, codes, n)
    assert len(queries) >= 5
    rng = np.random.default_rng(2)
    for lo, hi, cls, allowed in queries:
        # a few random classes too, so rows of every kind are crossed
        noisy = np.where(rng.random(cls.shape[0]) < 0.05, 0, cls)
        for c in (cls, noisy):
            a = api.constrained_log_probability(tg, codes, pg, lo, hi, c, allowed)
            b = api.constrained_log_probability(ts, codes, ps, lo, hi, c, allowed)
            assert (a == b == -math.inf) or a == pytest.approx(b, abs=1e-9)


def test_one_class_is_the_segment_probability(gene_record):
    model, seq = gene_record
    tables = api.prepare(model)
    codes = api.encode(tables, seq)
    post = api.posterior(tables, codes)
    mask = gk.gene_masks(model)["+"][1]
    for a, b in ((0, 50), (100, 900), (4000, 12000)):
        cls = np.zeros(b - a, dtype=np.int64)
        got = api.constrained_log_probability(tables, codes, post, a, b, cls, mask[None])
        assert got == api.segment_log_probability(tables, codes, post, a, b, mask)


def test_bad_arguments_are_refused(gene_record):
    model, seq = gene_record
    tables = api.prepare(model)
    codes = api.encode(tables, seq[:300])
    post = api.posterior(tables, codes)
    allowed = np.ones((2, tables.n_states), dtype=bool)
    with pytest.raises(ValueError, match="one class per position"):
        api.constrained_log_probability(tables, codes, post, 10, 20, np.zeros(5), allowed)
    with pytest.raises(ValueError, match=r"in \[0, 2\)"):
        api.constrained_log_probability(tables, codes, post, 10, 12, np.array([0, 2]), allowed)
    with pytest.raises(ValueError, match="boolean array"):
        api.constrained_log_probability(tables, codes, post, 10, 12, np.zeros(2), allowed[:, :5])
    with pytest.raises(ValueError, match="not inside"):
        api.constrained_log_probability(tables, codes, post, 290, 310, np.zeros(20), allowed)


# ----------------------------------------------------------------- written attributes
def _attrs(line: str) -> dict[str, str]:
    return dict(kv.split("=", 1) for kv in line.rstrip("\n").split("\t")[8].split(";"))


def _written(model, seq: str) -> list[tuple[str, dict[str, str]]]:
    tables = api.prepare(model)
    groups = track_groups(model)
    sg = group_index(model, groups)
    codes = api.encode(tables, seq)
    post = api.posterior(tables, codes, group=sg, n_groups=len(groups))
    genes = gk.decode_genes(model, tables, codes, np.zeros(len(seq), bool), "viterbi", 0, "r")
    text, tsv = io.StringIO(), io.StringIO()
    gk.write_genes(GFF3Writer(text), tsv, model, tables, codes, post, groups, genes, "r", 0)
    rows = [ln.split("\t") for ln in tsv.getvalue().splitlines()]
    out = []
    lines = [ln for ln in text.getvalue().splitlines() if ln and not ln.startswith("#")]
    for ln, row in zip(lines, rows, strict=True):
        attrs = _attrs(ln)
        kind = ln.split("\t")[2]
        # the feature table carries the same numbers in its own columns
        names = gk.GeneKind().feature_columns(groups, model.recalibration is not None)
        col = dict(zip(names, row, strict=True))
        assert col["exon_probability"] == attrs.get("exon_probability", "")
        assert col["structure_probability"] == attrs.get("structure_probability", "")
        out.append((kind, attrs))
    return out


def test_written_probabilities_are_ordered(gene_record):
    model, seq = gene_record
    lines = _written(model, seq)
    kinds = [k for k, _ in lines]
    assert kinds.count("mRNA") >= 1 and kinds.count("CDS") >= 2
    mrna = None
    for kind, at in lines:
        if kind == "gene":
            assert "exon_probability" not in at and "structure_probability" not in at
        elif kind == "mRNA":
            mrna = float(at["structure_probability"])
            assert 0.0 <= mrna <= 1.0
            assert "exon_probability" not in at
        else:
            px = float(at["exon_probability"])
            assert 0.0 <= px <= 1.0
            # an exon with these bounds and frame lies inside "every base coding"
            # (4 significant digits written: compare with that rounding)
            assert px <= float(at["segment_probability"]) * (1 + 1e-3) + 1e-12
            # the whole structure is a sub-event of each of its exons
            assert mrna is not None and mrna <= px * (1 + 1e-3) + 1e-12


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), n=st.integers(3, 7))
def test_probability_order_property(seed, n):
    """Structure <= each exon of it <= every base of the exon coding <= 1 (common practice:
    the probability of a sub-event), on random tiny models and records."""
    model = tiny_model(seed % 50 + 100, "+-")
    rng = np.random.default_rng(seed)
    tables = api.prepare(model)
    for _ in range(20):
        seq = "".join(rng.choice(list("ACGT"), size=n))
        codes = api.encode(tables, seq)
        if api.loglik(tables, codes) > -math.inf:
            break
    post = api.posterior(tables, codes)
    paths = enumerate_paths(tables, tables.E[codes.astype(np.int64)])
    masks = gk.gene_masks(model)
    for gene in _all_genes(model, paths):
        ps = _api_structure(model, tables, codes, post, n, gene)
        assert 0.0 <= ps <= 1.0
        for (a, b), ph in zip(gene.pieces, gk.cds_phases(gene)):
            px = _api_exon(model, tables, codes, post, n, gene.strand, a, b, ph)
            lp = api.segment_log_probability(tables, codes, post, a, b, masks[gene.strand][1])
            seg = math.exp(lp) if lp > -math.inf else 0.0
            assert ps <= px * (1 + 1e-9) + 1e-15
            assert px <= seg * (1 + 1e-9) + 1e-15
            assert seg <= 1.0


# ----------------------------------------------------------------- windows
@pytest.mark.parametrize("block,window", [(500, 1500)])
def test_windowed_equals_whole_record(block, window):
    model, tables, seq = _gene_record(30_000, seed=17)
    feats = _compare(gk.GENES, model, tables, seq, "viterbi", 0.5, 1, 10, block, window)
    assert len(feats) >= 10
