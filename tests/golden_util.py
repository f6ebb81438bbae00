"""Golden files of the annotate tests: the recipe of the small input, and a byte diff helper.

The small input ``tests/data/annotate/small.fa`` (with its true paths in
``small.truth.gff3``) is synthetic: each record is the first record our own
sampler draws from the built-in ``cpg-island`` model with the seed and ID prefix
listed in :data:`GOLDEN_RECORDS`.  ``tests/make_golden.py`` writes it, annotates
it with :data:`GOLDEN_ARGS` and stores the outputs in ``tests/expected/``; the
tests redo both steps and compare the bytes with :func:`assert_same_bytes`.
"""

from __future__ import annotations

import difflib
import tempfile
from pathlib import Path

from click.testing import CliRunner

TESTS = Path(__file__).resolve().parent
DATA = TESTS / "data" / "annotate"
EXPECTED = TESTS / "expected"

#: (ID prefix, seed, length) of each record of the small input, in file order.  The
#: second prefix holds every character that GFF3 column 9 reserves ('; = & ,') and '%',
#: so the GFF3 golden file shows the escaping of column 1 and of the ID attribute.
GOLDEN_RECORDS: list[tuple[str, int, int]] = [
    ("chr", 40, 10_000),  # one planted island inside the record
    ("u;v=w&x,y%", 34, 10_000),  # one planted island at the start of the record
]
GOLDEN_MODEL = "cpg-island"
GOLDEN_STEM = "small"
GOLDEN_FASTA = DATA / f"{GOLDEN_STEM}.fa"
GOLDEN_TRUTH = DATA / f"{GOLDEN_STEM}.truth.gff3"
#: Options of the golden annotate run (after ``annotate FASTA -o OUT``): the defaults.
GOLDEN_ARGS: list[str] = ["-q"]
#: The golden outputs compared byte for byte (the run report is left out: it holds the
#: command line and paths of the run).
GOLDEN_OUTPUTS = [
    f"{GOLDEN_STEM}.gff3",
    f"{GOLDEN_STEM}.features.tsv",
    f"{GOLDEN_STEM}.CpG_island.bedgraph",
]


def make_golden_input(dest: Path) -> tuple[Path, Path]:
    """Write the small input and its truth into ``dest``: ``(fasta, truth_gff3)``.

    Each record is drawn by ``seqstate sample`` on its own (one record per seed),
    then the FASTA texts are concatenated and the truth GFF3 files merged (the
    ``##sequence-region`` lines first, then the features, in record order).
    """
    from seqstate.cli import main

    dest.mkdir(parents=True, exist_ok=True)
    fasta_parts, regions, features = [], [], []
    with tempfile.TemporaryDirectory() as tmp:
        for i, (prefix, seed, length) in enumerate(GOLDEN_RECORDS):
            fa = Path(tmp) / f"part{i}.fa"
            truth = Path(tmp) / f"part{i}.gff3"
            result = CliRunner().invoke(
                main,
                [
                    "sample",
                    GOLDEN_MODEL,
                    "--length",
                    str(length),
                    "--records",
                    "1",
                    "--seed",
                    str(seed),
                    "--prefix",
                    prefix,
                    "-o",
                    str(fa),
                    "--truth",
                    str(truth),
                ],
            )
            if result.exit_code != 0:
                raise RuntimeError(f"seqstate sample failed: {result.stderr}")
            fasta_parts.append(fa.read_text(encoding="utf-8"))
            for line in truth.read_text(encoding="utf-8").splitlines(keepends=True):
                if line.startswith("##sequence-region"):
                    regions.append(line)
                elif not line.startswith("#"):
                    features.append(line)
    fasta = dest / GOLDEN_FASTA.name
    truth = dest / GOLDEN_TRUTH.name
    fasta.write_text("".join(fasta_parts), encoding="utf-8", newline="\n")
    truth.write_text(
        "##gff-version 3\n" + "".join(regions) + "".join(features), encoding="utf-8", newline="\n"
    )
    return fasta, truth


def run_golden_annotate(fasta: Path, out_dir: Path) -> None:
    """Annotate ``fasta`` into ``out_dir`` with the golden options (raises on failure)."""
    from seqstate.cli import main

    result = CliRunner().invoke(main, ["annotate", str(fasta), "-o", str(out_dir), *GOLDEN_ARGS])
    if result.exit_code != 0:
        raise RuntimeError(f"seqstate annotate failed ({result.exit_code}): {result.stderr}")


def assert_same_bytes(actual: Path, expected: Path, max_lines: int = 60) -> None:
    """Fail with a unified diff (also printed) unless the two files are byte-identical."""
    got = actual.read_bytes()
    want = expected.read_bytes()
    if got == want:
        return
    diff = list(
        difflib.unified_diff(
            want.decode("utf-8", errors="replace").splitlines(keepends=True),
            got.decode("utf-8", errors="replace").splitlines(keepends=True),
            fromfile=f"expected {expected}",
            tofile=f"actual {actual}",
        )
    )
    shown = "".join(diff[:max_lines])
    if len(diff) > max_lines:
        shown += f"... ({len(diff) - max_lines} more diff lines)\n"
    if not diff:  # same text lines, different bytes (line ends, trailing newline)
        shown = f"same lines but different bytes ({len(want)} vs {len(got)} bytes)\n"
    message = (
        f"{actual.name} differs from the golden file {expected}:\n{shown}"
        "If the change is intended, regenerate with: python tests/make_golden.py"
    )
    print(message)
    raise AssertionError(message)
