"""seqstate.kinds.segments: track groups, segments from paths and posteriors, scores, CpG
statistics.

Expected values are worked out by hand in the comments, taken from published
definitions, from Biopython, or from brute-force enumeration of every state path of
a tiny made-up model (the definition of a posterior, common practice).
"""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import numpy as np
import pytest
from Bio.SeqUtils import gc_fraction
from golden_util import DATA, GOLDEN_FASTA, run_golden_annotate
from hypothesis import given
from hypothesis import strategies as st

from seqstate.engine import api
from seqstate.io.tables import builtin_dir, load_model
from seqstate.kinds.segments import (
    cpg_statistics,
    group_index,
    runs_above,
    score_segment,
    segments_from_path,
    segments_from_posterior,
    track_groups,
)
from seqstate.model import State, make_model

REPO = Path(__file__).resolve().parent.parent


# ---------------------------------------------------------------- track groups
def test_track_groups_of_the_builtin_and_test_models():
    g = track_groups(load_model("cpg-island"))
    assert [(x.label, x.strand, x.states, x.track_name) for x in g] == [
        ("CpG_island", None, (0,), "CpG_island")
    ]
    # cpg-island-8: island_A..island_T are states 0-3 (models/cpg-island-8/model.toml)
    g = track_groups(load_model("cpg-island-8"))
    assert [(x.label, x.states, x.track_name) for x in g] == [
        ("CpG_island", (0, 1, 2, 3), "CpG_island")
    ]
    g = track_groups(load_model("casino"))
    assert [(x.label, x.states) for x in g] == [("loaded", (1,))]
    m = load_model(DATA / "g-run-stranded")
    g = track_groups(m)
    assert [(x.label, x.strand, x.states, x.track_name) for x in g] == [
        ("G_run", "+", (1,), "G_run.plus"),
        ("G_run", "-", (2,), "G_run.minus"),
    ]
    assert group_index(m, g).tolist() == [-1, 0, 1]


# ---------------------------------------------------------------- segments
def test_runs_above_is_inclusive_and_filters_by_length():
    v = np.array([0.2, 0.6, 0.7, 0.4, 0.5, 0.5, 0.5, 0.1, 0.9])
    # by hand: >= 0.5 at 1-2, 4-6 and 8
    assert runs_above(v, 0.5, 1) == [(1, 3), (4, 7), (8, 9)]
    assert runs_above(v, 0.5, 3) == [(4, 7)]
    assert runs_above(v, 0.95, 1) == []
    assert runs_above(np.ones(4), 0.5, 4) == [(0, 4)]


def test_segments_from_posterior_sorted_by_start_over_groups():
    post = np.array([[0.9, 0.0], [0.9, 0.0], [0.1, 0.8], [0.0, 0.8], [0.7, 0.1]])
    segs = segments_from_posterior(post, 0.5, 1)
    assert [(s.group, s.start0, s.end0) for s in segs] == [(0, 0, 2), (1, 2, 4), (0, 4, 5)]
    segs = segments_from_posterior(post, 0.5, 2)
    assert [(s.group, s.start0, s.end0) for s in segs] == [(0, 0, 2), (1, 2, 4)]


def test_segments_from_path_merges_states_of_one_group():
    state_group = np.array([0, 0, -1, 1])  # states 0 and 1 share group 0
    path = np.array([2, 0, 1, 1, 0, 2, 2, 3, 3, 0])
    segs = segments_from_path(path, state_group)
    assert [(s.group, s.start0, s.end0) for s in segs] == [(0, 1, 5), (1, 7, 9), (0, 9, 10)]
    segs = segments_from_path(path, state_group, min_length=2)
    assert [(s.group, s.start0, s.end0) for s in segs] == [(0, 1, 5), (1, 7, 9)]
    assert segments_from_path(np.array([2, 2]), state_group) == []


# ---------------------------------------------------------------- CpG statistics
@given(st.text(alphabet="ACGTURYSWKMBDHVNacgtswn-", min_size=1, max_size=80))
def test_gc_fraction_is_biopythons(seq):
    # Biopython Bio.SeqUtils.gc_fraction, ambiguous="remove"
    assert cpg_statistics(seq.encode())["gc_fraction"] == pytest.approx(gc_fraction(seq), abs=1e-12)


def test_cpg_statistics_by_hand():
    s = cpg_statistics(b"CGCG")  # 2 CpG, C = G = 2, length 4: O/E = 2 * 4 / (2 * 2) = 2
    assert (s["length"], s["cpg_count"], s["gc_fraction"], s["cpg_oe"]) == (4, 2, 1.0, 2.0)
    s = cpg_statistics(b"acgTTgca")  # lowercase counts: 1 CpG, C = G = 2: 1 * 8 / 4 = 2
    assert (s["cpg_count"], s["gc_fraction"], s["cpg_oe"]) == (1, 0.5, 2.0)
    assert cpg_statistics(b"ATAT")["cpg_oe"] == 0.0  # no C, no G: O/E defined as 0 here


def island_like(n_cpg: int, c_and_g: int, at: int) -> bytes:
    """``n_cpg`` CpGs, then the rest of the C and G in blocks that make no more CpG."""
    rest = c_and_g - n_cpg
    return b"CG" * n_cpg + b"G" * rest + b"C" * rest + b"A" * at + b"T" * at


@pytest.mark.parametrize(
    "seq,ggf,tj",
    [
        # Gardiner-Garden & Frommer 1987, J. Mol. Biol. 196:261: length >= 200, G+C > 0.5,
        # O/E > 0.6.  Takai & Jones 2002, PNAS 99:3740: length >= 500, G+C >= 0.55, O/E >= 0.65.
        (b"CG" * 100, True, False),  # 200 bp, G+C 1, O/E 2: long enough for GGF only
        (b"CG" * 99 + b"C", False, False),  # 199 bp
        (b"CG" * 50 + b"AT" * 50, False, False),  # G+C exactly 0.5: not > 0.5
        (b"CG" * 51 + b"AT" * 49, True, False),  # G+C 0.51, O/E 51 * 200 / 51**2 = 3.92
        (island_like(54, 300, 200), False, False),  # 1000 bp, G+C 0.6, O/E 54000/90000 = 0.6
        (island_like(55, 300, 200), True, False),  # O/E 0.611
        (island_like(117, 600, 400), True, True),  # 2000 bp, G+C 0.6, O/E exactly 0.65
        (island_like(116, 600, 400), True, False),  # O/E 0.644
        (b"CG" * 275 + b"AT" * 225, True, True),  # 1000 bp, G+C exactly 0.55
        (b"CG" * 274 + b"AT" * 226, True, False),  # G+C 0.548
    ],
)
def test_island_flags_follow_the_published_thresholds(seq, ggf, tj):
    s = cpg_statistics(seq)
    assert (s["meets_ggf1987"], s["meets_tj2002"]) == (ggf, tj), s


# ---------------------------------------------------------------- scores vs brute force
def tiny_model():
    """A made-up two-state order-0 model (numbers of our choosing)."""
    return make_model(
        name="tiny",
        alphabet="ACGT",
        states=[State("in", "thing", None), State("out", None, None)],
        start=[0.3, 0.7],
        transitions=[[0.8, 0.2], [0.25, 0.75]],
        emissions=[[0.1, 0.4, 0.4, 0.1], [0.3, 0.2, 0.2, 0.3]],
    )


def brute_force(model, seq: str):
    """P(path, x) for every path: the definition of the HMM joint probability."""
    idx = [model.alphabet.index(ch) for ch in seq]
    out = {}
    for path in itertools.product(range(model.n_states), repeat=len(seq)):
        p = model.start[path[0]] * model.emissions[path[0], 0, idx[0]]
        for i in range(1, len(seq)):
            p *= model.transitions[path[i - 1], path[i]] * model.emissions[path[i], 0, idx[i]]
        out[path] = p
    return out


@pytest.mark.parametrize("start0,end0", [(0, 3), (2, 5), (4, 8), (0, 8), (5, 6)])
def test_score_segment_against_brute_force(start0, end0):
    model = tiny_model()
    seq = "CGGATCGC"
    joint = brute_force(model, seq)
    total = sum(joint.values())
    inside = sum(p for path, p in joint.items() if all(z == 0 for z in path[start0:end0]))
    per_base = [
        sum(p for path, p in joint.items() if path[i] == 0) / total for i in range(len(seq))
    ]
    tables = api.prepare(model)
    codes = api.encode(tables, seq)
    post = api.posterior(tables, codes, dtype=np.float64)
    mask = np.array([True, False])
    sc = score_segment(tables, codes, post, post.values[:, 0], mask, start0, end0)
    assert sc["segment_probability"] == pytest.approx(inside / total, rel=1e-10)
    assert sc["mean_posterior"] == pytest.approx(np.mean(per_base[start0:end0]), rel=1e-10)
    assert sc["min_posterior"] == pytest.approx(min(per_base[start0:end0]), rel=1e-10)
    assert sc["segment_probability"] <= sc["min_posterior"] + 1e-15
    # order-0, two states: the log-odds is the sum of log(e_in(x) / e_out(x)) over the
    # segment (log-likelihood ratio, Durbin et al. 1998, Biological Sequence Analysis, ch. 3)
    e = model.emissions[:, 0, :]
    lo = sum(math.log(e[0, "ACGT".index(ch)] / e[1, "ACGT".index(ch)]) for ch in seq[start0:end0])
    assert sc["log_odds_nat"] == pytest.approx(lo, rel=1e-10)
    assert sc["log_odds_bits"] == pytest.approx(lo / math.log(2), rel=1e-10)


def read_cpg_tables() -> dict[str, dict[str, list[float]]]:
    """models/cpg-island/emissions.tsv read directly, rows renormalised (the manifest
    says normalize = true; the printed + table's C row sums to 1.001)."""
    rows: dict[str, dict[str, list[float]]] = {}
    path = builtin_dir() / "cpg-island" / "emissions.tsv"
    for line in path.read_text(encoding="utf-8").splitlines():
        if line.startswith(("#", "state")) or not line.strip():
            continue
        state, ctx, *vals = line.split("\t")
        p = [float(v) for v in vals]
        rows.setdefault(state, {})[ctx] = [v / sum(p) for v in p]
    return rows


def test_cpg_log_odds_is_the_dinucleotide_log_ratio_sum(tmp_path):
    # Durbin et al. 1998, Biological Sequence Analysis, ch. 3: the log-odds of a stretch
    # under the + and - chains is the sum of log(a+_{st} / a-_{st}) over its dinucleotides
    # (the first base conditioned on the base before the stretch)
    tab = read_cpg_tables()
    out = tmp_path / "out"
    run_golden_annotate(GOLDEN_FASTA, out)
    from Bio import SeqIO  # Biopython FASTA parser

    with open(GOLDEN_FASTA, encoding="utf-8") as handle:
        seqs = {r.id: str(r.seq) for r in SeqIO.parse(handle, "fasta")}
    lines = (out / "small.features.tsv").read_text(encoding="utf-8").splitlines()
    header = lines[0].split("\t")
    checked = 0
    for line in lines[1:]:
        r = dict(zip(header, line.split("\t"), strict=True))
        s0, e0 = int(r["start_1based"]) - 1, int(r["end_1based"])
        if s0 == 0:
            continue  # the first base of a record has no preceding base
        seq = seqs[r["seqid"]]
        lo = sum(
            math.log(
                tab["island"][seq[i - 1]]["ACGT".index(seq[i])]
                / tab["background"][seq[i - 1]]["ACGT".index(seq[i])]
            )
            for i in range(s0, e0)
        )
        assert abs(float(r["log_odds_nat"]) - lo) <= 0.5e-3 + 1e-9, (r, lo)
        assert abs(float(r["log_odds_bits"]) - lo / math.log(2)) <= 0.5e-3 + 1e-9
        checked += 1
    assert checked >= 1


# ---------------------------------------------------------------- unknown runs
def test_split_at_unknown_takes_a_threshold_and_returns_start_order():
    from seqstate.kinds.segments import Segment, split_at_unknown

    unknown = np.zeros(120, dtype=bool)
    unknown[40:55] = True  # 15 unknown bases
    segs = [Segment(0, 0, 100), Segment(1, 30, 70)]
    out = split_at_unknown(segs, unknown)  # default: runs of 10 or more split
    assert [(s.group, s.start0, s.end0) for s in out] == [
        (0, 0, 40),
        (1, 30, 40),
        (1, 55, 70),
        (0, 55, 100),
    ]
    kept = split_at_unknown([Segment(0, 0, 100), Segment(1, 30, 70)], unknown, threshold=16)
    assert [(s.group, s.start0, s.end0) for s in kept] == [(0, 0, 100), (1, 30, 70)]


# ---------------------------------------------------------------- posterior gene paths
def _gated_model():
    """Three states (our own numbers): x emits only A and may not follow z; z may not end."""
    states = [State("x", "p", None), State("y", "q", None), State("z", None, None)]
    trans = np.array([[0.5, 0.3, 0.1], [0.2, 0.5, 0.2], [0.0, 0.4, 0.4]])
    end = np.array([0.1, 0.1, 0.2])
    end[2] = 0.0
    trans[2] = [0.0, 0.5, 0.5]
    emis = np.array([[1.0, 0.0, 0.0, 0.0], [0.25] * 4, [0.1, 0.2, 0.3, 0.4]])
    return make_model(
        name="gated",
        alphabet="ACGT",
        states=states,
        start=np.array([0.5, 0.0, 0.5]),
        transitions=trans,
        emissions=emis,
        end=end,
    )


@pytest.mark.parametrize("seed", range(12))
def test_mea_path_is_the_best_allowed_path_by_brute_force(seed):
    from seqstate.engine import mea

    model = _gated_model()
    tables = api.prepare(model)
    rng = np.random.default_rng(seed)
    n = int(rng.integers(1, 8))
    seq = "".join(rng.choice(list("AACG"), n))
    codes = api.encode(tables, seq.encode())
    cls = np.array([1, 2, 0])
    gain = rng.random((n, 3)).astype(np.float32)
    path = mea.mea(tables, codes, gain, cls, block=int(rng.integers(1, 4)))
    best, best_path = -1.0, None
    for cand in itertools.product(range(3), repeat=n):  # every path of positive probability
        if model.start[cand[0]] == 0 or model.end[cand[-1]] == 0:
            continue
        if any(model.transitions[a, b] == 0 for a, b in zip(cand, cand[1:])):
            continue
        if any(model.emissions[s, 0, "ACGT".index(ch)] == 0 for s, ch in zip(cand, seq)):
            continue
        g = sum(float(gain[i, cls[s]]) for i, s in enumerate(cand))
        if g > best + 1e-9:
            best, best_path = g, cand
    assert best_path is not None
    got = sum(float(gain[i, cls[s]]) for i, s in enumerate(path))
    assert got == pytest.approx(best, abs=1e-9)
    assert tuple(path.tolist()) == best_path  # random gains: the optimum is unique
