"""Regenerate the golden files of the annotate tests.

Usage, from the repository root::

    python tests/make_golden.py

What it writes (all synthetic, from our own sampler; see tests/golden_util.py for the
recipe: model, seeds, ID prefixes, lengths and annotate options):

* ``tests/data/annotate/small.fa`` and ``small.truth.gff3``: the small input, two
  10 kb records drawn from the built-in ``cpg-island`` model, and their true paths;
* ``tests/expected/small.gff3``, ``small.features.tsv`` and
  ``small.CpG_island.bedgraph``: what ``seqstate annotate small.fa`` writes with the
  default options.

``tests/test_cli_annotate.py`` redoes both steps and compares the bytes with these
files, so any change of the sampler, the engine, the decoding or the writers shows up as
a diff.  Run this script only when such a change is intended, read ``git diff
tests/expected tests/data/annotate`` to check that the new outputs are right, and commit
them with the change.
"""

from __future__ import annotations

import shutil
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent))

import golden_util  # noqa: E402


def main() -> None:
    golden_util.make_golden_input(golden_util.DATA)
    golden_util.EXPECTED.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "out"
        golden_util.run_golden_annotate(golden_util.GOLDEN_FASTA, out)
        for name in golden_util.GOLDEN_OUTPUTS:
            shutil.copyfile(out / name, golden_util.EXPECTED / name)
            print(f"wrote {golden_util.EXPECTED / name}")
    print(f"wrote {golden_util.GOLDEN_FASTA} and {golden_util.GOLDEN_TRUTH}")


if __name__ == "__main__":
    main()
