"""``seqstate score`` (seqstate.commands.score and its CLI command).

Oracles: exhaustive enumeration of every state path of a tiny model (the HMM
definition: a path's joint probability is start * emissions * transitions *
end; Rabiner 1989, Proc. IEEE 77:257-286, section III, from memory), through
``seqstate.engine.reference.brute_force`` and this file's own enumeration;
the planted islands of the synthetic demo (examples/cex_draft1.truth.gff3,
the sampler's true path); and the two coordinate conventions (BED 0-based
half-open: BED specification v1, Niu, Denisko & Hoffman 2022, samtools/hts-specs;
GFF3 1-based closed: GFF3 specification, The-Sequence-Ontology/Specifications
gff3.md).
"""

from __future__ import annotations

import gzip
import itertools
import math
import shutil
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from scipy.stats import mannwhitneyu

from seqstate.cli import main
from seqstate.commands.inputs import read_records
from seqstate.commands.score import (
    InputRegion,
    choose_label,
    read_regions,
    score_regions,
)
from seqstate.engine import reference
from seqstate.errors import UsageError
from seqstate.io.fasta import Record
from seqstate.io.gff3 import read_gff3
from seqstate.io.intervals import detect_interval_format as detect_region_format
from seqstate.io.tables import load_model, save_model
from seqstate.model import State, make_model

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
DEMO = REPO / "examples" / "cex_draft1.fa.gz"
TRUTH = REPO / "examples" / "cex_draft1.truth.gff3"
CAND_BED = HERE / "data" / "score" / "candidates.bed"
CAND_GFF = HERE / "data" / "score" / "candidates.gff3"
TOL = 1e-12
F32 = 1e-6  # per-base posteriors are stored as float32


def run(args: list[str], stdin: str | bytes | None = None):
    return CliRunner().invoke(main, args, input=stdin, catch_exceptions=False)


def rows_of(text: str) -> tuple[list[str], list[list[str]]]:
    lines = text.rstrip("\n").split("\n")
    return lines[0].split("\t"), [line.split("\t") for line in lines[1:]]


# ---------------------------------------------------------------- tiny model
def _rows(rng: np.random.Generator, shape: tuple[int, ...], total=1.0) -> np.ndarray:
    x = rng.uniform(0.05, 1.0, size=shape)
    return x / x.sum(axis=-1, keepdims=True) * np.asarray(total)[..., None]


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    """A random 3-state order-0 model (two 'alpha' states, one unlabelled) with end
    probabilities, saved as a model folder, and a FASTA of two short records."""
    rng = np.random.default_rng(4242)
    end = rng.uniform(0.1, 0.4, size=3)
    model = make_model(
        name="tiny",
        alphabet="ACGT",
        states=[State("a1", "alpha"), State("a2", "alpha", "+"), State("bg", None)],
        start=_rows(rng, (3,)),
        transitions=_rows(rng, (3, 3), 1.0 - end),
        emissions=_rows(rng, (3, 4)),
        end=end,
    )
    root = tmp_path_factory.mktemp("tiny")
    manifest = save_model(model, root / "model")
    fasta = root / "two.fa"
    fasta.write_text(">r1 first\nACGGTCA\n>r2\nTTGCAG\n")
    return load_model(manifest), manifest, fasta


def _lattice(model, seq: bytes) -> np.ndarray:
    # order 0: the emission factor of base i in state s is the model's table entry
    idx = [model.alphabet.index(chr(b)) for b in seq]
    return model.emissions[:, 0, :][:, idx].T


def _enumerate(model, seq: bytes):
    """(paths array, joint probabilities, total) over every path (HMM definition)."""
    lat = _lattice(model, seq)
    m, n = model.n_states, len(seq)
    paths = np.array(list(itertools.product(range(m), repeat=n)), dtype=np.int64)
    p = model.start[paths[:, 0]] * lat[0, paths[:, 0]]
    for i in range(1, n):
        p = p * model.transitions[paths[:, i - 1], paths[:, i]] * lat[i, paths[:, i]]
    p = p * model.end[paths[:, -1]]
    return paths, p, p.sum()


def _tiny_regions(model, fasta: Path, tmp_path: Path, bed: str):
    path = tmp_path / "r.bed"
    path.write_text(bed)
    rf = read_regions(str(path))
    recs = {r.id: r for r in read_records(str(fasta), model)}
    return rf, recs


TINY_BED = (
    "r2\t1\t4\tmid2\n"  # out of record order: rows must come back in this order
    "r1\t0\t7\twhole1\n"
    "r1\t2\t3\tone_base\n"
    "r1\t3\t6\tmid1\n"
    "r2\t0\t6\twhole2\n"
    "r1\t6\t7\tlast_base\n"
)


def test_region_probability_matches_enumeration(tiny, tmp_path):
    model, _, fasta = tiny
    rf, recs = _tiny_regions(model, fasta, tmp_path, TINY_BED)
    mask = np.array([s.label == "alpha" for s in model.states])
    got = score_regions(model, list(recs.values()), rf.regions, "alpha")
    assert [r.name for r in rf.regions] == [
        "mid2",
        "whole1",
        "one_base",
        "mid1",
        "whole2",
        "last_base",
    ]
    for reg, sc in zip(rf.regions, got):
        seq = recs[reg.seqid].seq
        paths, p, total = _enumerate(model, seq)
        inside = mask[paths[:, reg.start0 : reg.end0]].all(axis=1)
        # P(every base of the region in a label state | x): sum over the paths that
        # stay in the label's states on the region (HMM definition)
        want = p[inside].sum() / total
        assert abs(sc["segment_probability"] - want) <= TOL, reg.name
        # per-base posterior of the label: sum over paths with a label state there
        per_base = np.array(
            [p[mask[paths[:, i]]].sum() / total for i in range(reg.start0, reg.end0)]
        )
        assert abs(sc["mean_posterior"] - per_base.mean()) <= F32, reg.name
        assert abs(sc["min_posterior"] - per_base.min()) <= F32, reg.name
        assert abs(sc["max_posterior"] - per_base.max()) <= F32, reg.name
        assert sc["length"] == reg.end0 - reg.start0


def test_region_probability_agrees_with_reference_brute_force(tiny, tmp_path):
    model, _, fasta = tiny
    rf, recs = _tiny_regions(model, fasta, tmp_path, TINY_BED)
    mask = np.array([s.label == "alpha" for s in model.states])
    got = score_regions(model, list(recs.values()), rf.regions, "alpha")
    for reg, sc in zip(rf.regions, got):
        seq = recs[reg.seqid].seq
        bf = reference.brute_force(model.start, model.transitions, model.end, _lattice(model, seq))
        keep = sum(
            prob
            for path, prob in bf["paths"].items()
            if all(mask[path[i]] for i in range(reg.start0, reg.end0))
        )
        # the project's enumeration oracle (HMM definition, see module docstring)
        assert abs(sc["segment_probability"] - keep / bf["total"]) <= TOL, reg.name
        if reg.end0 - reg.start0 == 1:
            # one base: P(z_i in label | x) is that base's summed posterior (HMM definition)
            post = bf["posterior"][reg.start0, mask].sum()
            assert abs(sc["segment_probability"] - post) <= TOL, reg.name
            assert abs(sc["mean_posterior"] - post) <= F32, reg.name


def test_whole_record_is_probability_whole_path_carries_label(tiny, tmp_path):
    model, _, fasta = tiny
    rf, recs = _tiny_regions(model, fasta, tmp_path, "r1\t0\t7\nr2\t0\t6\n")
    got = score_regions(model, list(recs.values()), rf.regions, "alpha")
    for reg, sc in zip(rf.regions, got):
        seq = recs[reg.seqid].seq
        lat = _lattice(model, seq)
        # only paths through the label's states (0 and 1), enumerated directly
        keep = 0.0
        for path in itertools.product([0, 1], repeat=len(seq)):
            q = model.start[path[0]] * lat[0, path[0]]
            for i in range(1, len(seq)):
                q *= model.transitions[path[i - 1], path[i]] * lat[i, path[i]]
            keep += q * model.end[path[-1]]
        total = _enumerate(model, seq)[2]
        assert abs(sc["segment_probability"] - keep / total) <= TOL


def test_log_odds_matches_enumeration(tiny, tmp_path):
    model, _, fasta = tiny
    rf, recs = _tiny_regions(model, fasta, tmp_path, TINY_BED)
    mask = np.array([s.label == "alpha" for s in model.states])
    got = score_regions(model, list(recs.values()), rf.regions, "alpha")
    for reg, sc in zip(rf.regions, got):
        seq = recs[reg.seqid].seq
        lat = _lattice(model, seq)
        e0, s0 = reg.end0, reg.start0
        paths = np.array(list(itertools.product(range(3), repeat=e0)), dtype=np.int64)
        tp = model.start[paths[:, 0]].copy()
        for i in range(1, e0):
            tp *= model.transitions[paths[:, i - 1], paths[:, i]]
        emit_all = np.prod([lat[i, paths[:, i]] for i in range(e0)], axis=0)
        emit_pre = np.prod([lat[i, paths[:, i]] for i in range(s0)], axis=0) if s0 else 1.0
        terms = []
        for msk in (mask, ~mask):
            ind = msk[paths[:, s0:e0]].all(axis=1)
            terms.append(math.log((tp * emit_all)[ind].sum() / (tp * emit_pre)[ind].sum()))
        # log P(x_reg | x_before, z_reg in label) - log P(x_reg | x_before, z_reg outside),
        # each a ratio of path sums over the prefix paths (the api's documented definition)
        want = terms[0] - terms[1]
        assert abs(sc["log_odds_nat"] - want) <= 1e-10 * max(1.0, abs(want)), reg.name
        # bits are the same number in base 2 (change of base)
        assert abs(sc["log_odds_bits"] - want / math.log(2)) <= 1e-9 * max(1.0, abs(want))


def test_flank_window_is_scored_as_a_record_of_its_own(tiny, tmp_path):
    model, _, fasta = tiny
    rf, recs = _tiny_regions(model, fasta, tmp_path, "r1\t3\t5\tmid\nr1\t0\t2\tstart\n")
    mask = np.array([s.label == "alpha" for s in model.states])
    got = score_regions(model, list(recs.values()), rf.regions, "alpha", flank=1)
    for reg, sc in zip(rf.regions, got):
        w0, w1 = max(0, reg.start0 - 1), min(7, reg.end0 + 1)
        window = recs["r1"].seq[w0:w1]
        paths, p, total = _enumerate(model, window)
        inside = mask[paths[:, reg.start0 - w0 : reg.end0 - w0]].all(axis=1)
        # documented --flank semantics: the window is a record (start and end
        # probabilities at its edges); enumeration over the window's paths
        assert abs(sc["segment_probability"] - p[inside].sum() / total) <= TOL, reg.name


def test_flank_covering_the_record_changes_nothing(tiny, tmp_path):
    model, _, fasta = tiny
    rf, recs = _tiny_regions(model, fasta, tmp_path, TINY_BED)
    whole = score_regions(model, list(recs.values()), rf.regions, "alpha")
    flanked = score_regions(model, list(recs.values()), rf.regions, "alpha", flank=7)
    # a window that reaches both record ends is the record itself (same computation)
    assert whole == flanked


def test_label_choice(tiny):
    model, _, _ = tiny
    assert choose_label(model, None) == "alpha"
    with pytest.raises(UsageError, match="not a label of model 'tiny' .labels: alpha"):
        choose_label(model, "beta")
    two = make_model(
        name="two",
        alphabet="AC",
        states=[State("x", "alpha"), State("y", "beta")],
        start=[0.5, 0.5],
        transitions=[[0.9, 0.1], [0.1, 0.9]],
        emissions=[[0.5, 0.5], [0.5, 0.5]],
    )
    with pytest.raises(UsageError, match="has labels alpha, beta: choose one with --label"):
        choose_label(two, None)
    assert choose_label(two, "beta") == "beta"


def test_no_cpg_columns_for_other_labels(tiny, tmp_path):
    _, manifest, fasta = tiny
    bed = tmp_path / "r.bed"
    bed.write_text("r1\t0\t3\n")
    res = run(["score", str(fasta), "--regions", str(bed), "-m", str(manifest)])
    assert res.exit_code == 0, res.stderr
    header, rows = rows_of(res.stdout)
    assert header == [
        "seqid",
        "start_0based",
        "end_exclusive",
        "name",
        "label",
        "scored_strand",
        "length",
        "mean_posterior",
        "min_posterior",
        "max_posterior",
        "segment_probability",
        "log_odds_nat",
        "log_odds_bits",
    ]
    # alpha has a '+' state (a2): a BED line without a strand scores both strands
    assert rows == [rows[0]] and rows[0][:7] == ["r1", "0", "3", "", "alpha", "both", "3"]


# ---------------------------------------------------------------- formats on the demo
@pytest.fixture(scope="module")
def demo_scores():
    res = run(["score", str(DEMO), "--regions", str(CAND_BED), "-q"])
    assert res.exit_code == 0, res.stderr
    return res.stdout


def test_bed_and_gff3_score_identically(demo_scores):
    res = run(["score", str(DEMO), "--regions", str(CAND_GFF), "-q"])
    assert res.exit_code == 0, res.stderr
    hb, bed_rows = rows_of(demo_scores)
    hg, gff_rows = rows_of(res.stdout)
    # BED start s (0-based) is GFF3 start s + 1 (1-based); the ends are the same number
    # (BED specification v1, 2022: 0-based half-open; GFF3 specification, The-Sequence-
    # Ontology/Specifications gff3.md: "positive 1-based integer coordinates")
    assert hb[1:3] == ["start_0based", "end_exclusive"]
    assert hg[1:3] == ["start_1based", "end_1based"]
    assert hb[3:] == hg[3:]
    assert len(bed_rows) == len(gff_rows) == 7
    for b, g in zip(bed_rows, gff_rows):
        assert int(b[1]) + 1 == int(g[1]) and b[2] == g[2]
        assert b[0] == g[0] and b[3:] == g[3:]


def test_rows_in_input_order_and_cpg_columns(demo_scores):
    header, rows = rows_of(demo_scores)
    assert [r[3] for r in rows] == [
        "planted_3_2",
        "background_a",
        "planted_1_2",
        "planted_4_1_wide",
        "last_base",
        "first_base",
        "island_edge",
    ]
    assert header[-5:] == ["gc_fraction", "cpg_count", "cpg_oe", "meets_ggf1987", "meets_tj2002"]
    by = {r[3]: dict(zip(header, r)) for r in rows}
    # the planted 1474-base island on cex_ctg3 is long, G+C rich and CpG dense:
    # both published criteria hold (Gardiner-Garden & Frommer 1987, J. Mol. Biol.
    # 196:261; Takai & Jones 2002, PNAS 99:3740; thresholds as in the README)
    isl = by["planted_3_2"]
    assert isl["length"] == "1474" and isl["meets_ggf1987"] == "yes"
    assert isl["meets_tj2002"] == "yes"
    assert by["background_a"]["meets_ggf1987"] == "no"
    # probability can only shrink from one base to all bases (monotonicity of probability,
    # common practice): segment probability <= min posterior
    for r in by.values():
        assert float(r["segment_probability"]) <= float(r["min_posterior"]) + 1e-4


def test_detection_by_content_gzip_and_stdin(demo_scores, tmp_path):
    for src, name in ((CAND_BED, "cands.txt"), (CAND_GFF, "cands.list")):
        plain = tmp_path / name
        shutil.copy(src, plain)
        packed = tmp_path / (name + ".gz")
        packed.write_bytes(gzip.compress(src.read_bytes()))
        outs = [
            run(["score", str(DEMO), "--regions", str(p), "-q"]).stdout for p in (plain, packed)
        ]
        outs.append(
            run(
                ["score", str(DEMO), "--regions", "-", "-q"], stdin=gzip.compress(src.read_bytes())
            ).stdout
        )
        want = (
            demo_scores
            if src == CAND_BED
            else run(["score", str(DEMO), "--regions", str(src), "-q"]).stdout
        )
        assert outs == [want, want, want], name


def test_detect_region_format():
    assert detect_region_format([b"##gff-version 3\n"]) == "gff3"
    assert detect_region_format([b"# c\n", b"c\t.\tx\t1\t5\t.\t+\t.\tID=a\n"]) == "gff3"
    # a BED9 line has nine columns, but its 7th is thickStart, not a strand
    # (BED specification v1, 2022: field 7 is thickStart)
    assert detect_region_format([b"c\t0\t5\tn\t0\t+\t0\t5\t0,0,0\n"]) == "bed"
    assert detect_region_format([b"track name=x\n", b"c 0 5\n"]) == "bed"
    assert detect_region_format([]) == "bed"


def test_output_file_and_gff(demo_scores, tmp_path):
    out = tmp_path / "sub" / "scores.tsv"
    gff = tmp_path / "scored.gff3"
    res = run(["score", str(DEMO), "--regions", str(CAND_BED), "-o", str(out), "--gff", str(gff)])
    assert res.exit_code == 0, res.stderr
    assert res.stdout == ""
    assert res.stderr.startswith("seqstate: 7 region(s) (bed) scored for CpG_island")
    assert out.read_text() == demo_scores
    feats = read_gff3(gff)
    header, rows = rows_of(demo_scores)
    assert len(feats) == len(rows)
    for f, r in zip(feats, rows):
        row = dict(zip(header, r))
        assert (f.seqid, f.start0, f.end0) == (r[0], int(r[1]), int(r[2]))
        assert f.type == "region" and f.get("Name") == row["name"]
        assert f.get("segment_probability") == row["segment_probability"]
        assert f.get("scored_label") == "CpG_island"
    assert feats[0].strand == "+" and feats[3].strand == "-"
    # provenance as annotate writes it: '#' comment lines after the '##' header
    # (GFF3 1.26, Sequence Ontology gff3.md: a single '#' starts a comment)
    from seqstate import __version__
    from seqstate.io.tables import load_model, model_sha256

    comments = [line for line in gff.read_text().splitlines() if line.startswith("# ")]
    assert comments == [
        f"# tool seqstate {__version__}",
        "# model cpg-island",
        f"# model_sha256 {model_sha256(load_model('cpg-island'))}",
    ]


def test_gff_to_stdout_needs_table_file(tmp_path):
    res = run(["score", str(DEMO), "--regions", str(CAND_BED), "--gff", "-"])
    assert res.exit_code == 2
    assert res.stderr.startswith("error: the table and --gff cannot both go to standard output")


def test_gff3_input_keeps_type_and_attributes(tmp_path):
    gff = tmp_path / "scored.gff3"
    res = run(
        [
            "score",
            str(DEMO),
            "--regions",
            str(TRUTH),
            "-o",
            str(tmp_path / "t.tsv"),
            "--gff",
            str(gff),
            "--type",
            "CpG_island",
            "-q",
        ]
    )
    assert res.exit_code == 0, res.stderr
    truth, scored = read_gff3(TRUTH), read_gff3(gff)
    assert [(f.seqid, f.start0, f.end0, f.type, f.get("ID")) for f in scored] == [
        (f.seqid, f.start0, f.end0, f.type, f.get("ID")) for f in truth
    ]
    # the input's own length attribute is replaced, not repeated
    assert all(len(f.values("length")) == 1 for f in scored)


# ---------------------------------------------------------------- ranking on the demo
def test_planted_islands_outrank_background_of_same_length():
    model = load_model("cpg-island")
    records = read_records(str(DEMO), model)
    lengths = {r.id: len(r.seq) for r in records}
    islands = read_regions(str(TRUTH)).regions
    rng = np.random.default_rng(2024)
    background = []
    for isl in islands:
        size = isl.end0 - isl.start0
        near = [o for o in islands if o.seqid == isl.seqid]
        drawn = 0
        while drawn < 5:
            s0 = int(rng.integers(0, lengths[isl.seqid] - size))
            if any(s0 < o.end0 + 1000 and s0 + size > o.start0 - 1000 for o in near):
                continue  # background: at least 1 kb from every planted island
            background.append(InputRegion(isl.seqid, s0, s0 + size, "bg", ".", 0))
            drawn += 1
    scores = score_regions(model, records, islands + background, "CpG_island")
    n = len(islands)
    assert n == 11  # examples/README.md: eleven planted islands
    for key in ("segment_probability", "log_odds_nat"):
        pos = [s[key] for s in scores[:n]]
        neg = [s[key] for s in scores[n:]]
        u, p = mannwhitneyu(pos, neg, alternative="greater")
        # rank test (Mann & Whitney 1947, Ann. Math. Stat. 18:50; scipy.stats.mannwhitneyu):
        # planted islands rank above background of the same lengths, p < 0.01, and the
        # area under the ROC curve, U / (n1 n2), is at least 0.95 (our stated threshold)
        assert p < 0.01, key
        assert u / (len(pos) * len(neg)) >= 0.95, key


def test_flank_on_the_demo_fades_into_whole_record_values():
    model = load_model("cpg-island")
    records = read_records(str(DEMO), model)
    islands = read_regions(str(TRUTH)).regions
    whole = score_regions(model, records, islands, "CpG_island")
    wide = score_regions(model, records, islands, "CpG_island", flank=1000)
    alone = score_regions(model, records, islands, "CpG_island", flank=0)
    keys = ("mean_posterior", "min_posterior", "max_posterior", "segment_probability")
    for w, f in zip(whole, wide):
        # what the docs state for the built-in model: 1 kb of context each side gives the
        # whole-record values (to float32 rounding of the per-base posteriors)
        assert all(abs(w[k] - f[k]) <= 1e-6 for k in keys)
        assert abs(w["log_odds_nat"] - f["log_odds_nat"]) <= 1e-9 * max(1.0, abs(w["log_odds_nat"]))
    # and a region with no context at all is a different question: the docs' warning
    assert max(abs(w[k] - a[k]) for w, a in zip(whole, alone) for k in keys) > 0.1


# ---------------------------------------------------------------- bad input
@pytest.fixture()
def small_fasta(tmp_path):
    path = tmp_path / "small.fa"
    path.write_text(">c1\n" + "ACGT" * 25 + "\n>c2\n" + "GGCC" * 10 + "\n")
    return path


def _bad(tmp_path, fasta, name, text, *extra):
    src = tmp_path / name
    src.write_text(text)
    out = tmp_path / "out.tsv"
    res = run(["score", str(fasta), "--regions", str(src), "-o", str(out), *extra])
    lines = res.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), res.stderr
    assert res.stdout == ""
    assert not out.exists()  # no half-written output
    return res.exit_code, lines[0]


@pytest.mark.parametrize(
    "name, text, code, expect",
    [
        ("unknown.bed", "c1\t0\t5\nchrX\t0\t5\n", 1, "unknown.bed line 2: no record 'chrX' in "),
        (
            "reversed.bed",
            "# header\nc1\t10\t5\n",
            1,
            "reversed.bed line 2: start 10 is greater than end 5",
        ),
        (
            "reversed.gff3",
            "##gff-version 3\nc1\t.\tregion\t10\t5\t.\t.\t.\t.\n",
            1,
            "reversed.gff3 line 2: start 10 is greater than end 5",
        ),
        (
            "outside.bed",
            "c1\t0\t5\nc2\t30\t41\tlong\n",
            1,
            "outside.bed line 2: interval 30-41 (BED, 0-based half-open) ends past the end "
            "of record 'c2' (length 40)",
        ),
        (
            "outside.gff3",
            "c1\t.\tregion\t1\t5\t.\t.\t.\t.\nc1\t.\tregion\t90\t101\t.\t.\t.\t.\n",
            1,
            "outside.gff3 line 2: feature 90-101 (GFF3, 1-based closed) ends past the end",
        ),
        (
            "empty.bed",
            "c1\t0\t5\nc1\t7\t7\n",
            1,
            "empty.bed line 2: interval 7-7 (BED, 0-based half-open) is empty",
        ),
        (
            "malformed.bed",
            "c1\t0\t5\nc1\tten\t20\n",
            1,
            "malformed.bed line 2: column 2 (start) 'ten' is not a whole number",
        ),
        (
            "malformed.gff3",
            "##gff-version 3\nc1\t.\tregion\t1\t5\t.\t.\n",
            1,
            "malformed.gff3 line 2: found 7 tab-separated columns, expected 9",
        ),
    ],
)
def test_bad_regions(tmp_path, small_fasta, name, text, code, expect):
    got_code, line = _bad(tmp_path, small_fasta, name, text)
    assert got_code == code
    assert expect in line


def test_bad_label_and_flank(tmp_path, small_fasta):
    code, line = _bad(tmp_path, small_fasta, "ok.bed", "c1\t0\t5\n", "--label", "CDS")
    assert code == 2 and "label 'CDS' is not a label of model 'cpg-island'" in line
    code, line = _bad(tmp_path, small_fasta, "ok.bed", "c1\t0\t5\n", "--flank", "-1")
    assert code == 2 and "--flank" in line
    code, line = _bad(tmp_path, small_fasta, "ok.bed", "c1\t0\t5\n", "--type", "gene")
    assert code == 2 and "--type selects GFF3 features, but" in line


def test_impossible_region_reports_record(tmp_path):
    # a base the model cannot emit anywhere: every state has emission 0 for 'T'
    model = make_model(
        name="noT",
        alphabet="ACGT",
        states=[State("x", "alpha")],
        start=[1.0],
        transitions=[[1.0]],
        emissions=[[0.5, 0.25, 0.25, 0.0]],
    )
    manifest = save_model(model, tmp_path / "noT")
    fasta = tmp_path / "t.fa"
    fasta.write_text(">t1\nACGTA\n")
    code, line = _bad(tmp_path, fasta, "r.bed", "t1\t0\t2\n", "-m", str(manifest))
    assert code == 1 and "record 't1'" in line and "position 4" in line
    assert line.startswith(f"error: {fasta}: ")  # the FASTA is named, as annotate does


def test_scores_do_not_depend_on_other_regions(tiny):
    # two regions of one record share one whole-record pass; the result must not
    # depend on what else is asked on the record (same computation)
    model, _, fasta = tiny
    records = [Record("r1", "", b"ACGGTCA")]
    one = score_regions(model, records, [InputRegion("r1", 2, 5, "", ".", 0)], "alpha")
    two = score_regions(
        model,
        records,
        [InputRegion("r1", 0, 1, "", ".", 0), InputRegion("r1", 2, 5, "", ".", 1)],
        "alpha",
    )
    assert one[0] == two[1]


# ---------------------------------------------------------------- stranded labels
@pytest.fixture(scope="module")
def stranded(tmp_path_factory):
    """A random 3-state order-0 model: background, 'CDS' on '+', 'CDS' on '-' (the
    shape of a gene model's coding states), saved, with a FASTA of one record."""
    rng = np.random.default_rng(977)
    end = rng.uniform(0.1, 0.4, size=3)
    model = make_model(
        name="stranded",
        alphabet="ACGT",
        states=[State("bg", None), State("cds_f", "CDS", "+"), State("cds_r", "CDS", "-")],
        start=_rows(rng, (3,)),
        transitions=_rows(rng, (3, 3), 1.0 - end),
        emissions=_rows(rng, (3, 4)),
        end=end,
    )
    root = tmp_path_factory.mktemp("stranded")
    manifest = save_model(model, root / "model")
    fasta = root / "one.fa"
    fasta.write_text(">s1\nGATTACAGC\n")
    return load_model(manifest), manifest, fasta


def test_region_strand_chooses_the_labels_states(stranded, tmp_path):
    model, _, fasta = stranded
    bed = "s1\t2\t6\tfwd\t0\t+\ns1\t2\t6\trev\t0\t-\ns1\t2\t6\tany\t0\t.\ns1\t2\t6\tnone\n"
    rf, recs = _tiny_regions(model, fasta, tmp_path, bed)
    got = score_regions(model, list(recs.values()), rf.regions, "CDS")
    seq = recs["s1"].seq
    paths, p, total = _enumerate(model, seq)
    # the states each region is scored with: cds_f on '+', cds_r on '-', both otherwise
    want_states = {"fwd": [1], "rev": [2], "any": [1, 2], "none": [1, 2]}
    want_scored = {"fwd": "+", "rev": "-", "any": "both", "none": "both"}
    for reg, sc in zip(rf.regions, got):
        mask = np.isin(np.arange(3), want_states[reg.name])
        inside = mask[paths[:, reg.start0 : reg.end0]].all(axis=1)
        # P(every base of the region in a scored state | x), by enumeration (HMM definition)
        assert abs(sc["segment_probability"] - p[inside].sum() / total) <= TOL, reg.name
        per_base = np.array(
            [p[mask[paths[:, i]]].sum() / total for i in range(reg.start0, reg.end0)]
        )
        assert abs(sc["mean_posterior"] - per_base.mean()) <= F32, reg.name
        assert abs(sc["min_posterior"] - per_base.min()) <= F32, reg.name
        assert sc["scored_strand"] == want_scored[reg.name]
    # the two strands are different evidence: '+' and '-' scores differ, and their
    # per-base posteriors add up to the unstranded one
    by = {reg.name: sc for reg, sc in zip(rf.regions, got)}
    assert by["fwd"]["mean_posterior"] != by["rev"]["mean_posterior"]
    total_mean = by["fwd"]["mean_posterior"] + by["rev"]["mean_posterior"]
    assert abs(total_mean - by["any"]["mean_posterior"]) <= 4 * F32


def test_scored_strand_in_the_table_and_gff(stranded, tmp_path):
    _, manifest, fasta = stranded
    bed = tmp_path / "r.bed"
    bed.write_text("s1\t0\t4\ta\t0\t-\ns1\t3\t9\tb\t0\t+\ns1\t1\t2\tc\n")
    gff = tmp_path / "scored.gff3"
    out = tmp_path / "scores.tsv"
    res = run(
        ["score", str(fasta), "--regions", str(bed), "-m", str(manifest), "-o", str(out)]
        + ["--gff", str(gff), "-q"]
    )
    assert res.exit_code == 0, res.stderr
    header, rows = rows_of(out.read_text())
    assert header[4:6] == ["label", "scored_strand"]
    assert [r[5] for r in rows] == ["-", "+", "both"]
    assert [f.get("scored_strand") for f in read_gff3(gff)] == ["-", "+", "both"]


def test_unstranded_label_ignores_the_region_strand():
    # the cpg-island label has no stranded state: '+', '-' and '.' give the same
    # numbers, and scored_strand says '.'
    model = load_model("cpg-island")
    records = [Record("r", "", b"ACGCGCGTATACGCGAT")]
    regs = [InputRegion("r", 2, 12, "", s, i) for i, s in enumerate("+-.")]
    got = score_regions(model, records, regs, "CpG_island")
    assert [g.pop("scored_strand") for g in got] == [".", ".", "."]
    assert got[0] == got[1] == got[2]


def test_gene_segment_cds_on_each_strand():
    """The shipped gene model: a region on '+' is scored with the CDS '+' states only,
    on '-' with the '-' ones; the per-base posteriors of the two add up to the
    unstranded region's (a sampled record, the sampler's own output)."""
    from seqstate.engine import api as engine_api
    from seqstate.engine.sampling import sample_record

    model = load_model("gene-segment")
    tables = engine_api.prepare(model)
    _, sym = sample_record(tables, 6000, np.random.default_rng(5))
    seq = np.frombuffer(model.alphabet.encode(), np.uint8)[sym].tobytes()
    records = [Record("g", "", seq)]
    regs = [InputRegion("g", 1000, 1600, "", s, i) for i, s in enumerate("+-.")]
    plus, minus, both = score_regions(model, records, regs, "CDS")
    assert (plus["scored_strand"], minus["scored_strand"], both["scored_strand"]) == (
        "+",
        "-",
        "both",
    )
    assert plus["mean_posterior"] != minus["mean_posterior"]
    total = plus["mean_posterior"] + minus["mean_posterior"]
    assert abs(total - both["mean_posterior"]) <= 1e-4  # float32 per-base posteriors
    assert both["segment_probability"] >= max(
        plus["segment_probability"], minus["segment_probability"]
    )
