"""Split an assembly into groups of consecutive records of about equal total length.

Usage: python split_groups.py ASM.fai OUT_DIR GROUP_BASES MAX_GROUPS

Reads the record IDs and lengths (columns 1 and 2) of a FASTA index and writes
``OUT_DIR/g0001.txt``, ``g0002.txt``, ... with one record ID per line (the
``--records-file`` of ``seqstate annotate``).  The number of groups is
``ceil(total / GROUP_BASES)``, at most ``MAX_GROUPS`` and at most the number of
records with bases.  Groups are consecutive stretches of the file's records, so
gathering them in name order gives the records in input order; each cut is put
where the running total is nearest to an equal share, and every group holds at
least one record with bases (records of length 0 stay with their neighbours).
"""

from __future__ import annotations

import bisect
import math
import os
import sys


def read_fai(path: str) -> list[tuple[str, int]]:
    out = []
    with open(path, encoding="utf-8") as fh:
        for line0, line in enumerate(fh):
            cols = line.rstrip("\n").split("\t")
            if len(cols) < 2 or not cols[1].isdigit():
                raise ValueError(
                    f"{path} line {line0 + 1}: expected ID<TAB>LENGTH<TAB>..., found {line!r}"
                )
            out.append((cols[0], int(cols[1])))
    if not out:
        raise ValueError(f"{path}: no records")
    return out


def cuts(lengths: list[int], groups: int) -> list[int]:
    """Indices where groups start (after the first), consecutive records, near-equal totals."""
    prefix = [0]
    for n in lengths:
        prefix.append(prefix[-1] + n)
    total = prefix[-1]
    # a cut may go after a record with bases only (so no group is all empty records)
    allowed = [j for j in range(1, len(lengths)) if lengths[j - 1] > 0 and prefix[j] < total]
    chosen: list[int] = []
    for i in range(1, groups):
        target = total * i / groups
        k = bisect.bisect_left([prefix[j] for j in allowed], target)
        best = None
        for c in (k - 1, k):
            if 0 <= c < len(allowed) and (not chosen or allowed[c] > chosen[-1]):
                if best is None or abs(prefix[allowed[c]] - target) < abs(prefix[best] - target):
                    best = allowed[c]
        if best is not None:
            chosen.append(best)
    return chosen


def split(records: list[tuple[str, int]], group_bases: int, max_groups: int) -> list[list[str]]:
    lengths = [n for _, n in records]
    total = sum(lengths)
    with_bases = sum(1 for n in lengths if n > 0)
    groups = max(1, min(math.ceil(total / group_bases), max_groups, with_bases))
    starts = [0] + cuts(lengths, groups) + [len(records)]
    return [[rid for rid, _ in records[a:b]] for a, b in zip(starts, starts[1:])]


def main(argv: list[str]) -> int:
    if len(argv) != 4:
        print("usage: split_groups.py ASM.fai OUT_DIR GROUP_BASES MAX_GROUPS", file=sys.stderr)
        return 2
    fai, out_dir, group_bases, max_groups = argv[0], argv[1], int(argv[2]), int(argv[3])
    if group_bases < 1 or max_groups < 1:
        print("error: GROUP_BASES and MAX_GROUPS must be at least 1", file=sys.stderr)
        return 2
    try:
        groups = split(read_fai(fai), group_bases, max_groups)
    except (OSError, ValueError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    os.makedirs(out_dir, exist_ok=True)
    for i, ids in enumerate(groups):
        with open(os.path.join(out_dir, f"g{i + 1:04d}.txt"), "w", encoding="utf-8") as fh:
            fh.write("".join(rid + "\n" for rid in ids))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
