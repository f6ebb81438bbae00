"""Splice and start/stop signals as first-order weight-array models (Zhang & Marr 1993,
CABIOS 9:499-509, from memory): position-specific states whose emissions depend on the
base before them, fitted by ``seqstate fit`` from a gene annotation.

Data: a synthetic record drawn from the built-in ``gene-segment`` model by
``seqstate sample`` (its truth GFF3 is the annotation).
"""

from __future__ import annotations

import numpy as np
import pytest

from seqstate.commands.fit import FitOptions, fit
from seqstate.commands.sample import SampleOptions, sample
from seqstate.io.fasta import read_fasta
from seqstate.io.gff3 import read_gff3
from seqstate.io.tables import load_model, save_model
from seqstate.kinds import gene_labels, gene_layout

DNA = "ACGT"
SHAPE = gene_layout.GeneShape(
    up_flank=8, down_flank=4, donor_flank=4, acceptor_flank=10, signal_order=1, repeat=False
)


@pytest.fixture(scope="module")
def labelled(fitted):
    layout, _, fa, truth = fitted
    return _pairs(layout, fa, truth)


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("wam")
    fa, truth = tmp / "s.fa", tmp / "truth.gff3"
    sample(
        SampleOptions(
            model="gene-segment",
            length=150_000,
            records=1,
            seed=5,
            out_fasta=str(fa),
            truth_gff3=str(truth),
        )
    )
    layout = gene_layout.build_layout(3, shape=SHAPE)
    save_model(layout, tmp / "layout")
    fit(FitOptions(model=str(tmp / "layout"), fasta=str(fa), labels=str(truth), out=str(tmp / "m")))
    return layout, load_model(tmp / "m"), fa, truth


def _pairs(layout, fa, truth):
    pairs, report = gene_labels.label_records(
        layout, read_fasta(fa), read_gff3(truth), path=str(truth)
    )
    assert report.used >= 5
    return pairs


@pytest.mark.parametrize("position", ["a1+", "a6+", "a10+", "d3+", "d6+", "up1+", "up8+", "down4+"])
def test_weight_array_rows_are_the_counts_by_hand(fitted, labelled, position):
    # P(x | previous base) = (n(prev, x) + 1) / (n(prev) + 4): counts of base pairs over
    # every labelled position of the state's tie group (all intron copies), both
    # strands, pseudocount 1 (additive smoothing, common practice)
    layout, model, fa, truth = fitted
    names = {n: i for i, n in enumerate(layout.state_names)}
    if position[:2] in ("a1", "a6", "d3", "d6"):
        group = [names[f"{c}_{position}"] for c in gene_layout.INTRON_COPIES]
    else:
        group = [names[position]]
    n = np.zeros((4, 4))
    k = layout.order
    for seq, states in labelled:
        text = seq.decode().upper()
        for i in np.flatnonzero(np.isin(states, group)):
            if i < k or set(text[i - k : i + 1]) - set(DNA):
                continue  # emission counts need a full order-k context
            n[DNA.index(text[i - 1]), DNA.index(text[i])] += 1
    assert n.sum() >= 5
    want = (n + 1) / (n.sum(axis=1, keepdims=True) + 4)
    for c in range(4**k):
        prev = c % 4  # the newest base of the context
        for s in group:  # tied: every copy has the group's rows
            np.testing.assert_allclose(model.emissions[s, c], want[prev], rtol=1e-12)


def test_signal_states_depend_on_the_base_before_only(fitted):
    # first order: rows of contexts that share their newest base are equal, rows of
    # different newest bases differ (the counts above are not flat)
    _, model, _, _ = fitted
    s = model.state_names.index("i0_a5+")
    e = model.emissions[s].reshape(16, 4, 4)
    assert np.all(e == e[:1])
    assert not np.allclose(e[0, 0], e[0, 1])


_REVCOMP = str.maketrans("ACGT", "TGCA")
#: the fixed signals of the layout: states, in 5'->3' order on their strand, and the
#: words they may spell (standard genetic code starts and stops; GT..AG introns: common
#: practice, the canonical splice dinucleotides)
_SIGNALS = {
    "start": (["start_A", "start_T", "start_G"], {"ATG"}),
    "stop_A": (["stop_T", "stop_A", "stop_AR"], {"TAA", "TAG"}),
    "stop_G": (["stop_T", "stop_G", "stop_GA"], {"TGA"}),
}


def test_stop_flank_and_wide_windows_keep_genes_valid(fitted):
    # with a stop flank (down_flank=4) and wide first-order windows, the fitted model's
    # Viterbi genes on the record it was fitted on still start with ATG, end with a stop
    # codon followed by the flank states, and keep GT..AG introns, on both strands
    from seqstate.engine import api

    _, model, fa, _ = fitted
    names = model.state_names
    (record,) = read_fasta(fa)
    text = record.seq.decode().upper()
    tables = api.prepare(model)
    path, _ = api.viterbi(tables, api.encode(tables, text))
    decoded = [names[s] for s in path]

    def spelled(states, strand):
        """Every run of ``states`` (5'->3' on ``strand``) on the path, as its word."""
        chain = states if strand == "+" else states[::-1]
        chain = [f"{x}{strand}" for x in chain]
        words = []
        for i in range(len(decoded) - len(chain) + 1):
            if decoded[i : i + len(chain)] == chain:
                word = text[i : i + len(chain)]
                words.append((i, word if strand == "+" else word.translate(_REVCOMP)[::-1]))
        return words

    seen = {}
    for strand in "+-":
        for what, (states, allowed) in _SIGNALS.items():
            words = spelled(states, strand)
            assert {w for _, w in words} <= allowed, (what, strand, words)
            seen[what, strand] = len(words)
        # every stop codon is followed (5'->3') by the whole stop flank, down1..down4
        stops = spelled(["stop_T"], strand)
        for i, _ in stops:
            if strand == "+":
                after = decoded[i + 3 : i + 7]
                assert after == [f"down{k}+" for k in range(1, 5)], (i, after)
            else:
                before = decoded[i - 6 : i - 2]
                assert before == [f"down{k}-" for k in range(4, 0, -1)], (i, before)
        for c in gene_layout.INTRON_COPIES:
            donors = spelled([f"{c}_d1", f"{c}_d2"], strand)
            acceptors = spelled([f"{c}_a11", f"{c}_a12"], strand)
            assert {w for _, w in donors} <= {"GT"} and {w for _, w in acceptors} <= {"AG"}
            seen[c, strand] = len(donors)
    # genes were found on both strands, with introns (else the checks above are empty)
    for strand in "+-":
        assert seen["start", strand] > 0
        assert seen["stop_A", strand] + seen["stop_G", strand] > 0
        assert sum(seen[c, strand] for c in gene_layout.INTRON_COPIES) > 0
    # and the fitted tables allow nothing else: these states' other bases have probability 0
    for c in gene_layout.INTRON_COPIES:
        for st, base in (("d1", "G"), ("d2", "T"), ("a11", "A"), ("a12", "G")):
            row = model.emissions[names.index(f"{c}_{st}+")]
            assert np.all(row[:, DNA.index(base)] == 1.0), (c, st)
    for st, bases in (
        ("start_A", "A"),
        ("start_T", "T"),
        ("start_G", "G"),
        ("stop_T", "T"),
        ("stop_A", "A"),
        ("stop_AR", "AG"),  # TAA, TAG
        ("stop_G", "G"),
        ("stop_GA", "A"),  # TGA only (TGG is a codon)
    ):
        for strand, word in (("+", bases), ("-", bases.translate(_REVCOMP))):
            row = model.emissions[names.index(f"{st}{strand}")]
            allowed = [DNA.index(b) for b in word]
            np.testing.assert_allclose(row[:, allowed].sum(axis=1), 1.0, rtol=0, atol=1e-12)

    # the stop flank: a stop codon moves only into down1, down_k only into down_k+1
    def successors(state):
        return {names[j] for j in np.flatnonzero(model.transitions[names.index(state)] > 0)}

    assert successors("stop_AR+") == successors("stop_GA+") == {"down1+"}
    for k in range(1, 4):
        assert successors(f"down{k}+") == {f"down{k + 1}+"}
