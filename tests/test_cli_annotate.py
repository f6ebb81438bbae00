"""``seqstate annotate`` end to end: golden files, reference parsers, engine cross-checks.

All inputs are synthetic: drawn by our own sampler from the built-in models or from the
test model ``tests/data/annotate/g-run-stranded`` (made-up parameters), sometimes edited
here (soft-masking, N runs, ambiguity codes) to reach the cases under test.
"""

from __future__ import annotations

import itertools
import json
import math
import os
import re
import subprocess
import sys
import urllib.parse
from pathlib import Path

import gffutils
import numpy as np
import pytest
from BCBio import GFF
from Bio import SeqIO
from Bio.SeqUtils import gc_fraction
from click.testing import CliRunner
from golden_util import (
    DATA,
    EXPECTED,
    GOLDEN_FASTA,
    GOLDEN_OUTPUTS,
    GOLDEN_TRUTH,
    assert_same_bytes,
    make_golden_input,
    run_golden_annotate,
)

from seqstate.cli import main
from seqstate.commands.sample import SampleOptions, sample
from seqstate.engine import api
from seqstate.io.tables import load_model
from seqstate.kinds import group_index, track_groups

REPO = Path(__file__).resolve().parent.parent
STRANDED_MODEL = DATA / "g-run-stranded"
#: GFF3 1.26 (Sequence Ontology), "Column 1: seqid": these characters may stand unescaped.
SEQID_SAFE = ".:^*$@!+_?-|"
#: Biopython's SeqFeature strand for GFF3 column 7 (bcbio-gff's mapping).
BIOPYTHON_STRAND = {"+": 1, "-": -1, ".": None}
SCORE_COLUMNS = [
    "mean_posterior",
    "min_posterior",
    "segment_probability",
    "log_odds_nat",
    "log_odds_bits",
    "length",
    "gc_fraction",
    "cpg_count",
    "cpg_oe",
    "meets_ggf1987",
    "meets_tj2002",
]

try:
    import pyBigWig

    HAVE_PYBIGWIG = True
except ImportError:  # the bigwig extra is optional
    HAVE_PYBIGWIG = False


# ---------------------------------------------------------------- helpers
def invoke(args: list[str]):
    """Run the CLI in-process; returns click's Result (exit_code, stdout, stderr)."""
    return CliRunner().invoke(main, [str(a) for a in args])


def annotate_ok(fasta: Path, out: Path, *options) -> Path:
    """Annotate ``fasta`` into ``out`` (quiet) and insist on exit status 0."""
    result = invoke(["annotate", fasta, "-o", out, "-q", *options])
    assert result.exit_code == 0, result.stderr
    return out


def read_fasta_bio(path: Path) -> dict:
    """The records of ``path`` as Biopython SeqRecords, by ID, in file order."""
    with open(path, encoding="utf-8") as handle:
        return SeqIO.to_dict(SeqIO.parse(handle, "fasta"))


def read_tsv(path: Path) -> list[dict[str, str]]:
    lines = path.read_text(encoding="utf-8").splitlines()
    header = lines[0].split("\t")
    return [dict(zip(header, line.split("\t"), strict=True)) for line in lines[1:]]


def gff_feature_lines(path: Path) -> list[list[str]]:
    """The 9 raw columns of each feature line (comments and directives skipped)."""
    out = []
    for line in path.read_text(encoding="utf-8").splitlines():
        if line and not line.startswith("#"):
            cols = line.split("\t")
            assert len(cols) == 9, line  # GFF3 1.26: nine tab-separated columns
            out.append(cols)
    return out


def decode_gff_line(cols: list[str]) -> tuple:
    """A feature line decoded by the GFF3 1.26 rules, with the standard library's decoder.

    Column 1 and column-9 tags and values are RFC 3986 percent-encoded (GFF3 1.26,
    Sequence Ontology); ';' separates attributes, '=' tag from value, ',' values.
    Returns ``(seqid, source, type, start0, end0, score_text, strand, attributes)``.
    """
    attrs: dict[str, list[str]] = {}
    for piece in cols[8].split(";"):
        tag, _, value = piece.partition("=")
        attrs[urllib.parse.unquote(tag)] = [urllib.parse.unquote(v) for v in value.split(",")]
    # GFF3 1.26: start and end are 1-based closed; 0-based half-open is (start - 1, end)
    return (
        urllib.parse.unquote(cols[0]),
        cols[1],
        cols[2],
        int(cols[3]) - 1,
        int(cols[4]),
        cols[5],
        cols[6],
        attrs,
    )


def tsv_as_features(rows: list[dict[str, str]]) -> list[tuple]:
    """TSV rows in the shape of :func:`decode_gff_line` (score = mean posterior)."""
    out = []
    for r in rows:
        attrs = {"ID": [r["id"]]}
        for col in SCORE_COLUMNS:
            if r.get(col, ""):
                attrs[col] = [r[col]]
        out.append(
            (
                r["seqid"],
                "seqstate",
                r["type"],
                int(r["start_1based"]) - 1,
                int(r["end_1based"]),
                r["mean_posterior"],
                r["strand"],
                attrs,
            )
        )
    return out


def read_bedgraph(path: Path) -> tuple[str, list[tuple[str, int, int, str]]]:
    """``(track line, [(seqid, start0, end0, value text), ...])``."""
    lines = path.read_text(encoding="utf-8").splitlines()
    rows = []
    for line in lines[1:]:
        seqid, s, e, v = line.split("\t")
        rows.append((seqid, int(s), int(e), v))
    return lines[0], rows


def expand_bedgraph(rows, spans: dict[str, tuple[int, int]], precision: int) -> dict:
    """Check the layout of bedGraph lines and expand them to one value per base.

    ``spans`` maps each record (in file order) to the 0-based half-open stretch that
    must be covered.  UCSC bedGraph format: 0-based half-open, one line per run.
    """
    pattern = re.compile(r"[0-9]+" + (rf"\.[0-9]{{{precision}}}" if precision else ""))
    order = [seqid for seqid, _ in itertools.groupby(r[0] for r in rows)]
    assert order == list(spans), "records must appear once each, in input order"
    values = {}
    for seqid, group in itertools.groupby(rows, key=lambda r: r[0]):
        group = list(group)
        lo, hi = spans[seqid]
        assert group[0][1] == lo and group[-1][2] == hi
        for (_, _, e, v), (_, s2, _, v2) in itertools.pairwise(group):
            assert e == s2, "lines must tile the record without gaps or overlaps"
            assert v != v2, "adjacent lines with equal values must be merged"
        for _, s, e, v in group:
            assert s < e
            assert pattern.fullmatch(v), f"{v!r} is not a value with {precision} decimals"
        lengths = np.array([e - s for _, s, e, _ in group])
        vals = np.array([float(v) for *_, v in group])
        values[seqid] = np.repeat(vals, lengths)
    return values


def engine_run(model_spec, seq: bytes, *, masked_unknown: bool = False):
    """Posteriors (float64, by track group) computed directly with the engine API."""
    model = load_model(model_spec)
    tables = api.prepare(model)
    groups = track_groups(model)
    codes = api.encode(tables, seq, masked_unknown=masked_unknown)
    post = api.posterior(
        tables, codes, group=group_index(model, groups), n_groups=len(groups), dtype=np.float64
    )
    return model, tables, groups, codes, post


def write_fasta_text(path: Path, records: list[tuple[str, str, str]]) -> Path:
    """Write (id, description, sequence) records, 60 bases a line."""
    with open(path, "w", encoding="utf-8") as fh:
        for rid, desc, seq in records:
            fh.write(f">{rid} {desc}\n")
            for i in range(0, len(seq), 60):
                fh.write(seq[i : i + 60] + "\n")
    return path


def golden_records() -> list[tuple[str, str, str]]:
    recs = read_fasta_bio(GOLDEN_FASTA)
    return [(r.id, r.description.split(None, 1)[1], str(r.seq)) for r in recs.values()]


def label_runs(labels: list) -> list[tuple[int, int, object]]:
    """Maximal runs ``(start0, end0, label)`` of a per-base label list, labelled runs only."""
    runs, pos = [], 0
    for lab, grp in itertools.groupby(labels):
        n = len(list(grp))
        if lab is not None:
            runs.append((pos, pos + n, lab))
        pos += n
    return runs


# ---------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def golden_run(tmp_path_factory) -> tuple[Path, Path]:
    out = tmp_path_factory.mktemp("golden") / "out"
    run_golden_annotate(GOLDEN_FASTA, out)
    return GOLDEN_FASTA, out


@pytest.fixture(scope="module")
def sampled(tmp_path_factory) -> Path:
    """Three 100 kb records drawn from cpg-island (seed 12: islands of several sizes)."""
    d = tmp_path_factory.mktemp("sampled")
    sample(
        SampleOptions(
            model="cpg-island",
            length=100_000,
            records=3,
            seed=12,
            out_fasta=str(d / "sampled.fa"),
            truth_gff3=str(d / "truth.gff3"),
        )
    )
    return d / "sampled.fa"


@pytest.fixture(scope="module")
def stranded(tmp_path_factory) -> tuple[Path, Path]:
    """Two 5 kb records drawn from the stranded test model, and their annotation by it."""
    d = tmp_path_factory.mktemp("stranded")
    sample(
        SampleOptions(
            model=str(STRANDED_MODEL),
            length=5000,
            records=2,
            seed=3,
            out_fasta=str(d / "st.fa"),
            prefix="s;t",
        )
    )
    return d / "st.fa", annotate_ok(d / "st.fa", d / "out", "-m", STRANDED_MODEL)


# ---------------------------------------------------------------- golden files
def test_golden_input_is_what_the_recipe_draws(tmp_path):
    fasta, truth = make_golden_input(tmp_path)
    assert_same_bytes(fasta, GOLDEN_FASTA)
    assert_same_bytes(truth, GOLDEN_TRUTH)


@pytest.mark.parametrize("name", GOLDEN_OUTPUTS)
def test_golden_outputs(golden_run, name):
    _, out = golden_run
    assert_same_bytes(out / name, EXPECTED / name)


def test_golden_input_has_a_feature_on_each_record(golden_run):
    # guards the golden set itself: both records (plain and escaped ID) carry an island
    rows = read_tsv(golden_run[1] / "small.features.tsv")
    assert {r["seqid"] for r in rows} == set(read_fasta_bio(GOLDEN_FASTA))


# ---------------------------------------------------------------- GFF3 round trips
@pytest.fixture(params=["golden", "stranded"])
def gff_case(request, golden_run, stranded):
    fasta, out = golden_run if request.param == "golden" else stranded
    stem = fasta.name.removesuffix(".fa")
    return fasta, out / f"{stem}.gff3", read_tsv(out / f"{stem}.features.tsv")


def test_gff3_lines_decode_to_the_feature_table(gff_case):
    _, gff, rows = gff_case
    decoded = [decode_gff_line(cols) for cols in gff_feature_lines(gff)]
    assert decoded == tsv_as_features(rows)
    assert rows, "the case must have features"


def test_gff3_ids_need_escaping_in_the_golden_case(golden_run):
    _, out = golden_run
    raw = [cols for cols in gff_feature_lines(out / "small.gff3") if "%" in cols[0]]
    # GFF3 1.26: ';' '=' '&' ',' and '%' must be percent-encoded in column 9, and every
    # character outside [a-zA-Z0-9.:^*$@!+_?-|] in column 1
    assert raw and all(re.search(r"%3B|%3D|%26|%2C|%25", cols[8]) for cols in raw)
    assert all(not re.search(r"[;=&,]", cols[0]) for cols in raw)


def test_gff3_round_trip_bcbio_onto_biopython_records(gff_case):
    fasta, gff, rows = gff_case
    records = read_fasta_bio(fasta)
    # bcbio-gff 0.7 looks up column 1 in base_dict without percent-decoding it, so the
    # records are keyed by their column-1 form (GFF3 1.26 column 1 escaping, done with
    # the standard library; none of these IDs holds '~', which quote() would keep)
    base = {urllib.parse.quote(rid, safe=SEQID_SAFE): rec for rid, rec in records.items()}
    with open(gff, encoding="utf-8") as handle:
        parsed = list(GFF.parse(handle, base_dict=base))
    got = []
    for rec in parsed:
        assert rec.id in records  # features landed on the SeqRecords of the FASTA
        assert str(rec.seq) == str(records[rec.id].seq)
        for f in rec.features:
            quals = {k: list(v) for k, v in f.qualifiers.items() if k not in ("source", "score")}
            got.append(
                (
                    rec.id,
                    f.qualifiers["source"][0],
                    f.type,
                    int(f.location.start),
                    int(f.location.end),
                    f.qualifiers["score"][0],
                    f.location.strand,
                    quals,
                )
            )
            # the Biopython feature extracts the bases of its GFF3 coordinates, reverse
            # complemented on the - strand (Biopython SeqFeature.extract)
            bases = rec.seq[int(f.location.start) : int(f.location.end)]
            if f.location.strand == -1:
                bases = bases.reverse_complement()
            assert str(f.extract(rec.seq)) == str(bases)
    want = [
        (sid, src, typ, s0, e0, score, BIOPYTHON_STRAND[strand], attrs)
        for sid, src, typ, s0, e0, score, strand, attrs in tsv_as_features(rows)
    ]
    key = lambda t: (t[0], t[3], t[4], t[2])  # noqa: E731
    assert sorted(got, key=key) == sorted(want, key=key)


def test_gff3_round_trip_gffutils(gff_case):
    _, gff, rows = gff_case
    db = gffutils.create_db(str(gff), ":memory:", merge_strategy="error")  # gffutils
    got = []
    for f in db.all_features():
        attrs = {k: list(v) for k, v in f.attributes.items()}
        # gffutils 0.14 leaves column 1 percent-encoded; decoded with the standard library
        got.append(
            (
                urllib.parse.unquote(f.seqid),
                f.source,
                f.featuretype,
                f.start - 1,
                f.end,
                f.score,
                f.strand,
                attrs,
            )
        )
    key = lambda t: (t[0], t[3], t[4], t[2])  # noqa: E731
    assert sorted(got, key=key) == sorted(tsv_as_features(rows), key=key)


def test_feature_ids_are_seqid_label_number(gff_case):
    fasta, _, rows = gff_case
    records = list(read_fasta_bio(fasta))  # IDs as Biopython reads the FASTA headers
    counts: dict[tuple[str, str], int] = {}
    for r in sorted(rows, key=lambda r: (records.index(r["seqid"]), int(r["start_1based"]))):
        track = r["type"] + {"+": ".plus", "-": ".minus", ".": ""}[r["strand"]]
        counts[(r["seqid"], track)] = counts.get((r["seqid"], track), 0) + 1
        # README "STEM.gff3": ID is SEQID.LABEL.N, N counting from 1 in position order
        assert r["id"] == f"{r['seqid']}.{track}.{counts[(r['seqid'], track)]}"


def test_stranded_features_follow_the_states_strands(stranded):
    fasta, out = stranded
    rows = read_tsv(out / "st.features.tsv")
    assert {r["strand"] for r in rows} == {"+", "-"}
    assert sorted(p.name for p in out.iterdir()) == [
        "st.G_run.minus.bedgraph",
        "st.G_run.plus.bedgraph",
        "st.features.tsv",
        "st.gff3",
        "st.records.tsv",
        "st.run.json",
    ]
    # the run_plus state is G-rich and run_minus C-rich (test model): a '+' feature has
    # more G than C, a '-' feature more C than G
    records = read_fasta_bio(fasta)
    for r in rows:
        seq = str(records[r["seqid"]].seq)[int(r["start_1based"]) - 1 : int(r["end_1based"])]
        if r["strand"] == "+":
            assert seq.count("G") > seq.count("C")
        else:
            assert seq.count("C") > seq.count("G")


# ---------------------------------------------------------------- bedGraph vs engine
@pytest.mark.parametrize("precision", [0, 2, 4, 6])
def test_bedgraph_equals_engine_posteriors(tmp_path, precision):
    out = annotate_ok(GOLDEN_FASTA, tmp_path / "out", "--precision", precision)
    records = read_fasta_bio(GOLDEN_FASTA)
    track, rows = read_bedgraph(out / "small.CpG_island.bedgraph")
    assert track.startswith("track type=bedGraph ")  # UCSC bedGraph: track line first
    spans = {rid: (0, len(rec.seq)) for rid, rec in records.items()}
    values = expand_bedgraph(rows, spans, precision)
    for rid, rec in records.items():
        *_, post = engine_run("cpg-island", str(rec.seq).encode())
        err = np.max(np.abs(values[rid] - post.values[:, 0]))
        # rounding to `precision` decimals, plus the float32 storage of the run's
        # posteriors (IEEE 754 binary32: relative error 2**-24)
        assert err <= 0.5 * 10.0**-precision + 1e-7, (rid, err)


def test_bedgraph_per_strand_tracks_equal_engine_posteriors(stranded):
    fasta, out = stranded
    records = read_fasta_bio(fasta)
    spans = {rid: (0, len(rec.seq)) for rid, rec in records.items()}
    model = load_model(STRANDED_MODEL)
    groups = track_groups(model)
    assert [g.track_name for g in groups] == ["G_run.plus", "G_run.minus"]
    for g, grp in enumerate(groups):
        track, rows = read_bedgraph(out / f"st.{grp.track_name}.bedgraph")
        assert track.startswith("track type=bedGraph ")
        values = expand_bedgraph(rows, spans, 4)
        for rid, rec in records.items():
            *_, post = engine_run(STRANDED_MODEL, str(rec.seq).encode())
            assert np.max(np.abs(values[rid] - post.values[:, g])) <= 0.5e-4 + 1e-7


def test_bigwig_holds_the_bedgraph_runs(tmp_path):
    result = invoke(["annotate", GOLDEN_FASTA, "-o", tmp_path / "out", "-q", "--tracks", "both"])
    if not HAVE_PYBIGWIG:
        # README: bigWig needs the optional extra; exit status 3 when it is missing
        assert result.exit_code == 3 and "seqstate[bigwig]" in result.stderr
        assert not (tmp_path / "out").exists()
        return
    assert result.exit_code == 0, result.stderr
    _, rows = read_bedgraph(tmp_path / "out" / "small.CpG_island.bedgraph")
    bw = pyBigWig.open(str(tmp_path / "out" / "small.CpG_island.bw"))  # pyBigWig
    try:
        lengths = {rid: len(rec.seq) for rid, rec in read_fasta_bio(GOLDEN_FASTA).items()}
        assert bw.chroms() == lengths
        entries = [(rid, s, e, v) for rid in lengths for s, e, v in bw.intervals(rid)]
    finally:
        bw.close()
    assert [(r, s, e) for r, s, e, _ in entries] == [(r, s, e) for r, s, e, _ in rows]
    # bigWig stores float32 values (UCSC bigWig format)
    assert all(abs(v - float(t)) <= 1e-7 for (*_, v), (*_, t) in zip(entries, rows, strict=True))


# ---------------------------------------------------------------- feature scores
@pytest.fixture(scope="module")
def cpg_cases(golden_run, sampled, tmp_path_factory):
    """(fasta, feature rows) of several runs of the CpG model, with many features in all."""
    d = tmp_path_factory.mktemp("cpgcases")
    cases = [(golden_run[0], read_tsv(golden_run[1] / "small.features.tsv"))]
    for mp in ("0.5", "0.3"):
        out = annotate_ok(sampled, d / f"out{mp}", "--min-posterior", mp)
        cases.append((sampled, read_tsv(out / "sampled.features.tsv")))
    assert sum(len(rows) for _, rows in cases) >= 8
    return cases


def test_segment_probability_equals_engine_and_bounded_by_min_posterior(cpg_cases):
    for fasta, rows in cpg_cases:
        records = read_fasta_bio(fasta)
        for rid, rec in records.items():
            mine = [r for r in rows if r["seqid"] == rid]
            if not mine:
                continue
            model, tables, groups, codes, post = engine_run("cpg-island", str(rec.seq).encode())
            mask = np.zeros(model.n_states, dtype=bool)
            mask[list(groups[0].states)] = True
            for r in mine:
                s0, e0 = int(r["start_1based"]) - 1, int(r["end_1based"])
                p = math.exp(api.segment_log_probability(tables, codes, post, s0, e0, mask))
                printed = float(r["segment_probability"])
                # printed with 4 significant digits
                assert abs(printed - p) <= 0.5 * 10.0 ** (math.floor(math.log10(p)) - 3)
                # P(all bases in the label) <= P(any one base in the label): Boole/Frechet
                # bound, common practice
                assert p <= float(post.values[s0:e0, 0].min()) + 1e-12
                assert printed <= float(r["min_posterior"]) + 0.5e-4 + 0.5e-3 * printed
                assert abs(float(r["min_posterior"]) - post.values[s0:e0, 0].min()) <= 5.1e-5
                assert abs(float(r["mean_posterior"]) - post.values[s0:e0, 0].mean()) <= 5.1e-5


def independent_cpg(seq: str) -> tuple[int, float]:
    """(CpG count, observed/expected) by Gardiner-Garden & Frommer 1987, J. Mol. Biol. 196:261:
    O/E = CpG count x length / (C count x G count), over the upper-cased bases."""
    up = seq.upper()
    cpg = sum(1 for i in range(len(up) - 1) if up[i] == "C" and up[i + 1] == "G")
    c, g = up.count("C"), up.count("G")
    return cpg, cpg * len(up) / (c * g)


def test_cpg_statistics_and_flags_follow_the_published_definitions(cpg_cases, tmp_path):
    # one more case: soft-masked (lowercase) bases inside both golden islands
    recs = golden_records()
    recs = [(rid, d, s[:3200] + s[3200:3500].lower() + s[3500:]) for rid, d, s in recs]
    fa = write_fasta_text(tmp_path / "lower.fa", recs)
    out = annotate_ok(fa, tmp_path / "out")
    cases = [*cpg_cases, (fa, read_tsv(out / "lower.features.tsv"))]
    seen_flags = set()
    for fasta, rows in cases:
        records = read_fasta_bio(fasta)
        for r in rows:
            seq = str(records[r["seqid"]].seq)[int(r["start_1based"]) - 1 : int(r["end_1based"])]
            n = len(seq)
            gc = gc_fraction(seq)  # Biopython Bio.SeqUtils.gc_fraction (ambiguous="remove")
            cpg, oe = independent_cpg(seq)
            assert int(r["length"]) == n
            assert abs(float(r["gc_fraction"]) - gc) <= 0.5e-4 + 1e-12, r
            assert int(r["cpg_count"]) == cpg
            assert abs(float(r["cpg_oe"]) - oe) <= 0.5e-4 + 1e-12, r
            # Gardiner-Garden & Frommer 1987: length >= 200, G+C > 50 %, O/E > 0.6
            ggf = n >= 200 and gc > 0.5 and oe > 0.6
            # Takai & Jones 2002, PNAS 99:3740: length >= 500, G+C >= 55 %, O/E >= 0.65
            tj = n >= 500 and gc >= 0.55 and oe >= 0.65
            assert r["meets_ggf1987"] == ("yes" if ggf else "no"), r
            assert r["meets_tj2002"] == ("yes" if tj else "no"), r
            seen_flags.add((r["meets_ggf1987"], r["meets_tj2002"]))
    assert ("yes", "yes") in seen_flags and ("yes", "no") in seen_flags


def test_gc_fraction_with_ambiguity_codes_matches_biopython(tmp_path):
    # IUPAC codes (S, W, R, Y, K, M, N, in both cases) inside the golden islands
    recs = golden_records()
    edited = []
    for rid, d, s in recs:
        chars = list(s)
        for k, code in enumerate("SWRYKMNswrykmn"):
            chars[3100 + 37 * k if rid == "chr1" else 300 + 37 * k] = code
        edited.append((rid, d, "".join(chars)))
    fa = write_fasta_text(tmp_path / "iupac.fa", edited)
    out = annotate_ok(fa, tmp_path / "out")
    rows = read_tsv(out / "iupac.features.tsv")
    records = read_fasta_bio(fa)
    assert len(rows) >= 2
    for r in rows:
        seq = str(records[r["seqid"]].seq)[int(r["start_1based"]) - 1 : int(r["end_1based"])]
        assert any(ch in seq for ch in "SWRYKMN")
        # Biopython gc_fraction, ambiguous="remove": G, C, S over A, C, G, T, S, W, U
        assert abs(float(r["gc_fraction"]) - gc_fraction(seq)) <= 0.5e-4 + 1e-12, r


def test_cpg_oe_leaves_unknown_bases_out_of_the_length(tmp_path):
    # one N every 10 bases inside the chr1 island: 60 unknown bases in ~740
    rid, d, s = golden_records()[0]
    chars = list(s)
    for i in range(3100, 3700, 10):
        chars[i] = "N"
    fa = write_fasta_text(tmp_path / "gappy.fa", [(rid, d, "".join(chars))])
    out = annotate_ok(fa, tmp_path / "out")
    rows = read_tsv(out / "gappy.features.tsv")
    assert len(rows) == 1
    r = rows[0]
    seq = "".join(chars)[int(r["start_1based"]) - 1 : int(r["end_1based"])].upper()
    known = sum(seq.count(b) for b in "ACGT")
    cpg = sum(1 for i in range(len(seq) - 1) if seq[i : i + 2] == "CG")
    # Gardiner-Garden & Frommer 1987, J. Mol. Biol. 196:261: O/E = CpG x N / (C x G) with N
    # the number of bases; an unknown base is neither C nor G and cannot start or end a
    # CpG, so N counts the known bases, as gc_fraction's denominator does (Biopython)
    expected = cpg * known / (seq.count("C") * seq.count("G"))
    assert abs(float(r["cpg_oe"]) - expected) <= 0.5e-4, (r["cpg_oe"], expected)


# ---------------------------------------------------------------- unknown bases
def scan_outputs_for_nan(out: Path) -> None:
    for p in out.iterdir():
        text = p.read_text(encoding="utf-8")
        assert not re.search(r"\b(nan|inf|infinity)\b", text, re.IGNORECASE), p.name
    report = json.loads(next(out.glob("*.run.json")).read_text(encoding="utf-8"))
    assert all(math.isfinite(r["loglik_nat"]) for r in report["records"])


def test_n_run_in_background(tmp_path):
    # 5 kb of N in the second golden record, well after its island (1-2286)
    recs = golden_records()
    rid, d, s = recs[1]
    recs[1] = (rid, d, s[:4000] + "N" * 5000 + s[9000:])
    fa = write_fasta_text(tmp_path / "nrun.fa", recs)
    out = annotate_ok(fa, tmp_path / "out")
    scan_outputs_for_nan(out)
    rows = read_tsv(out / "nrun.features.tsv")
    inside = [
        r
        for r in rows
        if r["seqid"] == rid and int(r["start_1based"]) <= 9000 and int(r["end_1based"]) >= 4001
    ]
    assert inside == []
    report = json.loads((out / "nrun.run.json").read_text(encoding="utf-8"))
    assert [r["unknown_bases"] for r in report["records"]] == [0, 5000]
    _, bg = read_bedgraph(out / "nrun.CpG_island.bedgraph")
    assert all(math.isfinite(float(v)) for *_, v in bg)


def test_n_run_right_after_an_island_reports_no_feature_inside_it(tmp_path):
    # the chr1 island ends near base 3774; 5 kb of N replace bases 3781-8780
    rid, d, s = golden_records()[0]
    seq = s[:3780] + "N" * 5000 + s[8780:]
    fa = write_fasta_text(tmp_path / "nafter.fa", [(rid, d, seq)])
    out = annotate_ok(fa, tmp_path / "out")
    scan_outputs_for_nan(out)
    rows = read_tsv(out / "nafter.features.tsv")
    assert any(int(r["end_1based"]) >= 3700 for r in rows), "the island must still be found"
    overlapping = [
        (r["start_1based"], r["end_1based"])
        for r in rows
        if int(r["start_1based"]) <= 8780 and int(r["end_1based"]) >= 3781
    ]
    # issue requirement: no feature reported inside a run of unknown bases
    assert overlapping == [], f"features reach into the N run 3781-8780: {overlapping}"


def test_masked_unknown_counts_lowercase_as_unknown(tmp_path):
    recs = golden_records()
    rid, d, s = recs[0]
    s = s[:100] + s[100:600].lower() + s[600:5000] + "N" * 10 + s[5010:7000] + "n" * 4 + s[7004:]
    recs[0] = (rid, d, s)
    fa = write_fasta_text(tmp_path / "masked.fa", recs)
    expected = []
    for _, _, seq in recs:
        lower = sum(ch.islower() for ch in seq)  # includes the lowercase n
        upper_n = seq.count("N")
        expected.append((lower + upper_n, seq.upper().count("N")))
    out_u = annotate_ok(fa, tmp_path / "unknown", "--masked", "unknown")
    out_b = annotate_ok(fa, tmp_path / "base", "--masked", "base")
    rep_u = json.loads((out_u / "masked.run.json").read_text(encoding="utf-8"))
    rep_b = json.loads((out_b / "masked.run.json").read_text(encoding="utf-8"))
    assert [r["unknown_bases"] for r in rep_u["records"]] == [u for u, _ in expected]
    assert [r["unknown_bases"] for r in rep_b["records"]] == [n for _, n in expected]
    assert expected[0][0] == 514
    # masked bases read as unknown: the track is that of the record with N in their place,
    # without the runs of at least --split-unknown (10) unknown bases, which cut features:
    # the 500 masked bases [100, 600) and the 10 N [5000, 5010); the 4 n stay in
    _, rows = read_bedgraph(out_u / "masked.CpG_island.bedgraph")
    as_n = "".join("N" if ch.islower() else ch for ch in s)
    *_, post = engine_run("cpg-island", as_n.encode())
    kept = np.ones(len(s), dtype=bool)
    kept[100:600] = kept[5000:5010] = False
    covered = np.zeros(len(s), dtype=bool)
    for seqid, start, end, value in rows:
        if seqid == rid:
            assert not covered[start:end].any()
            covered[start:end] = True
            assert np.max(np.abs(float(value) - post.values[start:end, 0])) <= 0.5e-4 + 1e-7
    assert covered.tolist() == kept.tolist()


# ---------------------------------------------------------------- Viterbi
@pytest.mark.parametrize("model", ["cpg-island", "casino"])
def test_viterbi_features_are_the_label_runs_of_the_path(tmp_path, sampled, model):
    if model == "casino":
        fasta = tmp_path / "dice.fa"
        sample(SampleOptions(model="casino", length=3000, records=2, seed=5, out_fasta=str(fasta)))
        out = annotate_ok(fasta, tmp_path / "out", "-m", "casino")  # model default: viterbi
    else:
        fasta = sampled
        out = annotate_ok(fasta, tmp_path / "out", "--decode", "viterbi")
    stem = fasta.name.removesuffix(".fa")
    rows = read_tsv(out / f"{stem}.features.tsv")
    report = json.loads((out / f"{stem}.run.json").read_text(encoding="utf-8"))
    assert report["decode"] == "viterbi"
    m = load_model(model)
    tables = api.prepare(m)
    want = []
    for rid, rec in read_fasta_bio(fasta).items():
        path, _ = api.viterbi(tables, api.encode(tables, str(rec.seq).encode()))
        labels = [m.states[int(z)].label for z in path]
        want += [(rid, s0 + 1, e0, lab) for s0, e0, lab in label_runs(labels)]
    got = [(r["seqid"], int(r["start_1based"]), int(r["end_1based"]), r["type"]) for r in rows]
    assert got == want
    assert len(want) >= 3


# ---------------------------------------------------------------- regions
@pytest.mark.parametrize(
    "rid,start,end,stem",
    [
        ("chr1", 2001, 8000, "small.chr1_2001-8000"),
        # characters outside A-Z a-z 0-9 . _ + - become '_' in the file name
        ("u;v=w&x,y%1", 1001, 6000, "small.u_v_w_x_y_1_1001-6000"),
    ],
)
def test_region_keeps_record_coordinates(tmp_path, rid, start, end, stem):
    out = annotate_ok(GOLDEN_FASTA, tmp_path / "out", "--region", f"{rid}:{start}-{end}")
    assert sorted(p.name for p in out.iterdir()) == sorted(
        f"{stem}.{x}"
        for x in ("gff3", "features.tsv", "records.tsv", "CpG_island.bedgraph", "run.json")
    )
    for suffix in ("gff3", "features.tsv", "records.tsv", "CpG_island.bedgraph", "run.json"):
        (out / f"{stem}.{suffix}").rename(out / f"small.{suffix}")
    gff_text = (out / "small.gff3").read_text(encoding="utf-8").splitlines()
    escaped = urllib.parse.quote(rid, safe=SEQID_SAFE)  # GFF3 1.26 column 1 escaping
    # GFF3 1.26: "##sequence-region seqid start end", 1-based closed
    assert [x for x in gff_text if x.startswith("##")] == [
        "##gff-version 3",
        f"##sequence-region {escaped} {start} {end}",
    ]
    features = [decode_gff_line(cols) for cols in gff_feature_lines(out / "small.gff3")]
    assert features, "the region holds (part of) an island"
    for seqid, *_rest in features:
        assert seqid == rid
    for f in features:
        assert start - 1 <= f[3] < f[4] <= end
    rows = read_tsv(out / "small.features.tsv")
    assert [(r["seqid"], int(r["start_1based"]), int(r["end_1based"])) for r in rows] == [
        (f[0], f[3] + 1, f[4]) for f in features
    ]
    _, bg = read_bedgraph(out / "small.CpG_island.bedgraph")
    values = expand_bedgraph(bg, {rid: (start - 1, end)}, 4)
    seq = str(read_fasta_bio(GOLDEN_FASTA)[rid].seq)[start - 1 : end]
    *_, post = engine_run("cpg-island", seq.encode())
    assert np.max(np.abs(values[rid] - post.values[:, 0])) <= 0.5e-4 + 1e-7
    report = json.loads((out / "small.run.json").read_text(encoding="utf-8"))
    assert [
        (r["id"], r["start_1based"], r["end_1based"], r["length"]) for r in report["records"]
    ] == [(rid, start, end, 10_000)]


@pytest.mark.parametrize(
    "region,rid,start,end",
    [("chr1", "chr1", 1, 10_000), ("chr1:2,001-8,000", "chr1", 2001, 8000)],
)
def test_region_as_id_alone_or_with_commas(tmp_path, region, rid, start, end):
    # README "annotate options": an ID alone is the whole record; commas are allowed
    out = annotate_ok(GOLDEN_FASTA, tmp_path / "out", "--region", region)
    stem = f"small.{rid}_{start}-{end}"
    report = json.loads((out / f"{stem}.run.json").read_text(encoding="utf-8"))
    assert [(r["id"], r["start_1based"], r["end_1based"]) for r in report["records"]] == [
        (rid, start, end)
    ]
    lines = (out / f"{stem}.gff3").read_text(encoding="utf-8").splitlines()
    assert f"##sequence-region {rid} {start} {end}" in lines


# ---------------------------------------------------------------- other inputs and options
def test_gzip_and_stdin_inputs_give_the_golden_outputs(tmp_path):
    import gzip

    gz = tmp_path / "small.fa.gz"
    gz.write_bytes(gzip.compress(GOLDEN_FASTA.read_bytes(), mtime=0))
    out = annotate_ok(gz, tmp_path / "gz")
    for name in GOLDEN_OUTPUTS:  # the stem drops .fa.gz (README "Output files")
        assert_same_bytes(out / name, EXPECTED / name)
    result = CliRunner().invoke(
        main,
        ["annotate", "-", "-o", str(tmp_path / "stdin"), "-q"],
        input=GOLDEN_FASTA.read_bytes(),
    )
    assert result.exit_code == 0, result.stderr
    for name in GOLDEN_OUTPUTS:  # '-' reads standard input, stem "stdin"
        got = tmp_path / "stdin" / name.replace("small.", "stdin.", 1)
        assert got.read_bytes() == (EXPECTED / name).read_bytes()


def test_min_length_only_drops_shorter_features(tmp_path, sampled):
    rows_all = read_tsv(annotate_ok(sampled, tmp_path / "all") / "sampled.features.tsv")
    rows_long = read_tsv(
        annotate_ok(sampled, tmp_path / "long", "--min-length", "300") / "sampled.features.tsv"
    )
    drop_id = lambda rows: [{k: v for k, v in r.items() if k != "id"} for r in rows]  # noqa: E731
    assert drop_id(rows_long) == drop_id([r for r in rows_all if int(r["length"]) >= 300])
    assert len(rows_long) < len(rows_all)


def test_tracks_none_writes_no_track(tmp_path):
    out = annotate_ok(GOLDEN_FASTA, tmp_path / "out", "--tracks", "none")
    assert sorted(p.name for p in out.iterdir()) == [
        "small.features.tsv",
        "small.gff3",
        "small.records.tsv",
        "small.run.json",
    ]
    assert_same_bytes(out / "small.gff3", EXPECTED / "small.gff3")


# ---------------------------------------------------------------- determinism
def test_two_runs_give_byte_identical_files(tmp_path, monkeypatch):
    tracks = "both" if HAVE_PYBIGWIG else "bedgraph"
    outputs = []
    for run in ("one", "two"):
        d = tmp_path / run
        d.mkdir()
        (d / "small.fa").write_bytes(GOLDEN_FASTA.read_bytes())
        monkeypatch.chdir(d)  # same relative paths, so the report's paths agree too
        annotate_ok(Path("small.fa"), Path("out"), "--tracks", tracks)
        outputs.append({p.name: p.read_bytes() for p in sorted((d / "out").iterdir())})
    assert outputs[0] == outputs[1]
    report = json.loads(outputs[0]["small.run.json"])
    assert sorted(outputs[0]) == report["outputs"]
    for name, data in outputs[0].items():
        if name.endswith((".gff3", ".tsv", ".bedgraph", ".json")):
            text = data.decode("utf-8")
            # no timestamp: no ISO 8601 date or clock time anywhere (ISO 8601)
            assert not re.search(r"\b(19|20)\d\d-\d\d-\d\d|\b\d\d:\d\d:\d\d\b", text), name


def test_run_report_records_the_command_line_it_was_given(tmp_path):
    args = ["annotate", str(GOLDEN_FASTA), "-o", str(tmp_path / "out"), "-q"]
    result = invoke(args)
    assert result.exit_code == 0, result.stderr
    report = json.loads((tmp_path / "out" / "small.run.json").read_text(encoding="utf-8"))
    assert report["command_line"] == ["seqstate", *args]


# ---------------------------------------------------------------- real processes
def run_process(cmd: list[str], cwd: Path) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    # run the checkout under test (and share its compiled-kernel cache)
    env["PYTHONPATH"] = os.pathsep.join([str(REPO), *filter(None, [env.get("PYTHONPATH")])])
    return subprocess.run(
        cmd, cwd=cwd, env=env, capture_output=True, text=True, timeout=600, stdin=subprocess.DEVNULL
    )


def test_console_script_and_python_m_write_the_same_outputs(tmp_path):
    script = Path(sys.executable).parent / "seqstate"
    assert script.is_file(), f"console script {script} missing: pip install -e ."
    outputs = []
    for name, cmd in (("script", [str(script)]), ("module", [sys.executable, "-m", "seqstate"])):
        d = tmp_path / name
        d.mkdir()
        (d / "small.fa").write_bytes(GOLDEN_FASTA.read_bytes())
        proc = run_process([*cmd, "annotate", "small.fa", "-o", "out"], d)
        assert proc.returncode == 0, proc.stderr
        # the summary line goes to stderr (README: progress and summary on stderr)
        assert proc.stdout == "" and proc.stderr.startswith("seqstate: 2 record(s), 20000 bases")
        outputs.append({p.name: p.read_bytes() for p in sorted((d / "out").iterdir())})
    assert sorted(outputs[0]) == [
        "small.CpG_island.bedgraph",
        "small.features.tsv",
        "small.gff3",
        "small.records.tsv",
        "small.run.json",
    ]
    assert outputs[0] == outputs[1]
    for name in GOLDEN_OUTPUTS:
        assert outputs[0][name] == (EXPECTED / name).read_bytes()


def test_debug_shows_a_traceback(tmp_path):
    proc = run_process(
        [sys.executable, "-m", "seqstate", "--debug", "annotate", "missing.fa", "-o", "out"],
        tmp_path,
    )
    assert proc.returncode != 0
    assert "Traceback (most recent call last)" in proc.stderr
    assert "SequenceFormatError" in proc.stderr and "missing.fa" in proc.stderr
    assert not (tmp_path / "out").exists()


# ---------------------------------------------------------------- model commands
def test_model_list_names_the_builtin_models():
    result = invoke(["model", "list"])
    assert result.exit_code == 0, result.stderr
    names = [line.split("\t")[0] for line in result.stdout.splitlines()]
    assert sorted(names) == [
        "casino",
        "cpg-island",
        "cpg-island-8",
        "gene-segment",
        "gene-segment-athaliana",
        "gene-segment-layout",
        "gene-segment-layout-plant",
    ]


def test_model_check_prints_states_and_expected_stays():
    result = invoke(["model", "check", "cpg-island"])
    assert result.exit_code == 0, result.stderr
    lines = result.stdout.splitlines()
    # the state table's rows start at column 0 (the transition lines are indented)
    table = {ln.split()[0]: ln.split() for ln in lines if ln.startswith(("island ", "background "))}
    # expected stay 1 / (1 - a_ss): 1 / 0.001 = 1000 and 1 / 1e-5 = 1e5 bases (geometric
    # run length, common practice), for the stays 0.999 and 0.99999 of models/cpg-island
    assert table["island"][1] == "CpG_island" and table["island"][-1] == "1000"
    assert table["background"][-1] == "1e+05"


def test_model_check_prints_the_default_thresholds():
    # cpg-island's [defaults]: a 200-base minimum (Gardiner-Garden & Frommer 1987,
    # J. Mol. Biol. 196:261); casino has no [defaults], so the built-in 0.5 and 1 apply
    for name, expected in (("cpg-island", "min_length 200 bases"), ("casino", "min_length 1 ")):
        result = invoke(["model", "check", name])
        assert result.exit_code == 0, result.stderr
        line = next(ln for ln in result.stdout.splitlines() if ln.startswith("features "))
        assert "min_posterior 0.5" in line and expected in line
