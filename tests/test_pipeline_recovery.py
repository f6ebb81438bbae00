"""Planted-island recovery: annotate what the built-in cpg-island model itself generates.

4 Mbp (four 1 Mbp records) are drawn from ``cpg-island`` with a fixed seed (synthetic
data, our own sampler) and annotated with the same model, posterior decoding at the
default threshold, features of at least 200 bp.  A predicted island matches a planted
one when they overlap by at least half the shorter of the two.

Recall is over the planted islands of at least 200 bp, the minimum island length of
Gardiner-Garden & Frommer 1987 (J. Mol. Biol. 196:261): with an island stay of 0.999
and a background-to-island switch of 1e-5, shorter planted runs carry too little
signal for any decoder to find.  Precision is over the predictions, a prediction being
right when it matches any planted island (a planted island of 190 bp found as 205 bp is
no false call).
"""

from __future__ import annotations

from pathlib import Path

from seqstate.commands.annotate import AnnotateOptions, annotate
from seqstate.commands.sample import SampleOptions, sample
from seqstate.io.gff3 import read_gff3

SEED = 2024
RECORDS = 4
LENGTH = 1_000_000
MIN_ISLAND = 200  # Gardiner-Garden & Frommer 1987: islands are at least 200 bp
TARGET = 0.9  # the target for recall and precision


def matches(a, b) -> bool:
    """Same record and overlap of at least half the shorter interval."""
    if a.seqid != b.seqid:
        return False
    overlap = min(a.end0, b.end0) - max(a.start0, b.start0)
    return overlap >= 0.5 * min(a.end0 - a.start0, b.end0 - b.start0)


def test_planted_islands_are_recovered(tmp_path: Path, record_property):
    fasta, truth_path = tmp_path / "planted.fa", tmp_path / "planted.truth.gff3"
    sample(
        SampleOptions(
            model="cpg-island",
            length=LENGTH,
            records=RECORDS,
            seed=SEED,
            out_fasta=str(fasta),
            truth_gff3=str(truth_path),
        )
    )
    annotate(
        AnnotateOptions(
            input=str(fasta),
            model="cpg-island",
            out_dir=str(tmp_path / "out"),
            min_length=MIN_ISLAND,
            tracks="none",
        )
    )
    truth = read_gff3(truth_path)
    predicted = read_gff3(tmp_path / "out" / "planted.gff3")
    assert all(p.end0 - p.start0 >= MIN_ISLAND for p in predicted)
    planted = [t for t in truth if t.end0 - t.start0 >= MIN_ISLAND]
    found = [t for t in planted if any(matches(t, p) for p in predicted)]
    right = [p for p in predicted if any(matches(p, t) for t in truth)]
    recall = len(found) / len(planted)
    precision = len(right) / len(predicted)
    missed = [(t.seqid, t.start0 + 1, t.end0) for t in planted if t not in found]
    false = [(p.seqid, p.start0 + 1, p.end0) for p in predicted if p not in right]
    figures = (
        f"seed {SEED}, {RECORDS} x {LENGTH} bp: {len(truth)} planted islands, "
        f"{len(planted)} of >= {MIN_ISLAND} bp; {len(predicted)} predicted; "
        f"recall {recall:.3f} ({len(found)}/{len(planted)}), precision {precision:.3f} "
        f"({len(right)}/{len(predicted)}); missed {missed}; false {false}"
    )
    print(figures)
    record_property("recall", round(recall, 4))  # in --junitxml reports, without -s
    record_property("precision", round(precision, 4))
    assert len(planted) >= 20, figures  # enough islands for the figures to mean something
    assert recall >= TARGET, figures
    assert precision >= TARGET, figures
