"""Stand-in for ``seqstate index``: write the 5-column FASTA index (.fai) of a FASTA.

Columns (tab-separated, one line per record, in file order): record ID, length
in bases, byte offset of the first base (in the decompressed text), bases per
line, bytes per line (with the line end).  The workflow reads only the first two
(to split an assembly into groups); the file has the shared .fai layout so that
``seqstate index`` can replace this script without changing the workflow.

Usage: python index_fasta.py FASTA OUT.fai    (FASTA plain or gzip)

Record IDs are the first word of the header, as seqstate reads them.  Memory is
one line at a time.  Errors are one ``error:`` line naming file and line, exit 1,
and no output file is left behind.
"""

from __future__ import annotations

import gzip
import os
import sys


def _open(path: str):
    with open(path, "rb") as fh:
        magic = fh.read(2)
    return gzip.open(path, "rb") if magic == b"\x1f\x8b" else open(path, "rb")


class IndexError_(Exception):
    pass


def index_lines(path: str):
    """Yield (id, length, offset, line_bases, line_bytes) per record."""
    offset = 0
    rec = None  # [id, length, offset, line_bases, line_bytes, short_line_seen, header_line]
    with _open(path) as fh:
        for line0, raw in enumerate(fh):
            size = len(raw)
            if raw.startswith(b">"):
                if rec is not None:
                    yield tuple(rec[:5])
                parts = raw[1:].decode("utf-8", errors="replace").split(None, 1)
                if not parts:
                    raise IndexError_(f"{path} line {line0 + 1}: header has no record ID")
                rec = [parts[0], 0, offset + size, 0, 0, False, line0 + 1]
            elif rec is None:
                if raw.strip():
                    raise IndexError_(
                        f"{path} line {line0 + 1}: expected a header line starting with '>'"
                    )
            else:
                bases = len(raw.rstrip(b"\r\n"))
                if bases:
                    if rec[5] or (rec[3] and bases > rec[3]):
                        raise IndexError_(
                            f"{path} line {line0 + 1}: record '{rec[0]}' has lines of "
                            "different lengths (an index needs every line but the last "
                            "of a record to have the same length)"
                        )
                    if rec[3] == 0:
                        rec[3], rec[4] = bases, size
                    elif bases < rec[3] or size != rec[4]:
                        rec[5] = True
                    rec[1] += bases
                elif rec[1]:
                    rec[5] = True  # a blank line: only the end of the record may follow
            offset += size
    if rec is not None:
        yield tuple(rec[:5])


def main(argv: list[str]) -> int:
    if len(argv) != 2:
        print("usage: index_fasta.py FASTA OUT.fai", file=sys.stderr)
        return 2
    fasta, out = argv
    temp = f"{out}.tmp-{os.getpid()}"
    try:
        with open(temp, "w", encoding="utf-8", newline="\n") as fh:
            for row in index_lines(fasta):
                fh.write("\t".join(str(v) for v in row) + "\n")
        os.replace(temp, out)
    except (IndexError_, OSError, EOFError) as exc:
        if os.path.exists(temp):
            os.remove(temp)
        print(f"error: {exc}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
