"""Sorted, bgzip-compressed, tabix-indexed copies of text outputs (``--index-outputs``).

A GFF3, GTF or BED12 is sorted for tabix (:func:`sort_gff_lines`): its records in
the file's order (FASTA order for seqstate's files), each record's lines by start (a
stable sort: a gene stays before its mRNA and first exon); ``#`` lines before the
first feature are kept as the header.  A bedGraph keeps its order (seqstate writes it
record by record, by start) and its ``track`` line.  The copy is BGZF-compressed
(``NAME.gz``) and indexed: ``NAME.gz.tbi``, or ``NAME.gz.csi`` when a record of the
run (its GFF3's ``##sequence-region`` end) passes 2^29 bases (512 Mbp), which the
tabix index cannot address.

Why pysam (its ``tabix_compress`` / ``tabix_index``, htslib inside) rather than
Debian's ``bgzip``/``tabix`` programs (htslib 1.16): measured on a 114 MB GFF3 (1 M lines)
and a 58 MB bedGraph (2 M lines), pysam 0.24.1 takes 1.4 s + 0.3 s (GFF3) and 2.5 s +
0.3 s (bedGraph) against the programs' 1.2 s + 0.25 s and 1.9 s + 0.25 s; its files are
18 % larger on the GFF3 (15.0 against 12.7 MB: its wheel is built without libdeflate)
and 2 % smaller on the bedGraph.  Against that, pysam is one pip-installable wheel
(14 MB installed, no dependencies) that works wherever the rest of seqstate installs:
no system package (Debian's is 2.2 MB but needs root and apt in CI), no subprocess, and
the bytes depend on the pysam release rather than on each machine's htslib build.
Both give byte-identical files on a rerun.

Every file is written to paths the caller stages (:class:`seqstate.io.atomic.OutputSet`),
so the indexed outputs appear with the rest of the run or not at all.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any, TextIO

from seqstate.errors import OptionalDependencyError, UsageError
from seqstate.io.atomic import OutputSet

__all__ = [
    "browser_names",
    "CSI_ABOVE",
    "INDEXED_KINDS",
    "index_names",
    "index_suffix",
    "indexed_copy",
    "require_pysam",
    "sort_gff_lines",
    "write_browser_outputs",
]

#: Longest record (bases) a tabix (.tbi) index addresses; longer ones need CSI.
CSI_ABOVE = 1 << 29
#: File kinds indexed, with their tabix columns (seq, start, end; 0-based) and whether
#: the coordinates are 0-based half-open.
INDEXED_KINDS = {
    "gff": (0, 3, 4, False),
    "bed": (0, 1, 2, True),
    "bed12": (0, 1, 2, True),
}
#: Kinds sorted before compressing (by the column of their start); a bedGraph is
#: written sorted, record by record, and is compressed as it is.
_SORT_COLUMN = {"gff": 3, "bed12": 1}


def require_pysam() -> Any:
    """The pysam module; raise :class:`OptionalDependencyError` if it is missing."""
    try:
        import pysam
    except ImportError:
        raise OptionalDependencyError(
            "--index-outputs needs the optional extra: pip install 'seqstate[index]' (pysam)"
        ) from None
    return pysam


def index_suffix(longest: int) -> str:
    """``.tbi``, or ``.csi`` when the longest record has more than :data:`CSI_ABOVE` bases."""
    return ".csi" if longest > CSI_ABOVE else ".tbi"


def index_names(name: str) -> list[str]:
    """Every name ``--index-outputs`` may write for output ``name``: the compressed
    copy and both index kinds (checked against the overwrite rule before the run)."""
    return [f"{name}.gz", f"{name}.gz.tbi", f"{name}.gz.csi"]


def sort_gff_lines(src: Path, dest: Path, start_column: int = 3) -> None:
    """Write ``src`` (a GFF3 or GTF; a BED with ``start_column`` 1) to ``dest`` sorted for
    tabix: the header ``#`` lines first, then the lines of each seqid by start, stably.

    Seqids keep the order of the file (seqstate writes records in FASTA order, which its
    ``##sequence-region`` lines follow too) and memory holds one seqid's lines; a file
    whose seqids come back after others is sorted whole in memory, its seqids in the
    order of its ``##sequence-region`` lines, then of first appearance.
    """
    order: dict[str, int] = {}
    header: list[str] = []
    runs: list[str] = []  # seqids in file order, one entry per contiguous block
    with open(src, encoding="utf-8", newline="\n") as fh:
        body = False
        for line in fh:
            if line.startswith("#"):
                if not body and line.startswith("##sequence-region"):
                    parts = line.split()
                    if len(parts) > 1:
                        order.setdefault(parts[1], len(order))
                if not body:
                    header.append(line)
                continue
            if line.strip():
                body = True
                seqid = line.split("\t", 1)[0]
                if not runs or runs[-1] != seqid:
                    runs.append(seqid)
    contiguous = len(set(runs)) == len(runs)
    for seqid in runs:
        order.setdefault(seqid, len(order))
    with (
        open(src, encoding="utf-8", newline="\n") as fh,
        open(dest, "w", encoding="utf-8", newline="\n") as out,
    ):
        out.writelines(header)
        block: list[tuple[int, int, str]] = []
        blocks: dict[str, list[tuple[int, int, str]]] = {}
        current = None
        for k, line in enumerate(fh):
            if line.startswith("#") or not line.strip():
                continue  # the header is written; later comments are dropped
            seqid = line.split("\t", 1)[0]
            start = int(line.split("\t", start_column + 1)[start_column])
            if not contiguous:
                blocks.setdefault(seqid, []).append((start, k, line))
                continue
            if seqid != current:
                out.writelines(text for _, _, text in sorted(block))
                block, current = [], seqid
            block.append((start, k, line))
        out.writelines(text for _, _, text in sorted(block))
        for seqid in sorted(blocks, key=order.__getitem__):
            out.writelines(text for _, _, text in sorted(blocks.pop(seqid)))


def _leading_header_lines(path: Path) -> int:
    """Lines at the top of a BED-like file that are ``track``/``browser``/``#`` lines."""
    n = 0
    with open(path, encoding="utf-8") as fh:
        for line in fh:
            if line.startswith(("#", "track", "browser")) or not line.strip():
                n += 1
            else:
                break
    return n


def indexed_copy(src: Path, dest_gz: Path, dest_index: Path, kind: str, scratch: Path) -> None:
    """Write the sorted (``gff``) or as-is (``bed``) copy of ``src`` BGZF-compressed to
    ``dest_gz`` and its tabix index to ``dest_index`` (CSI when its name ends ``.csi``).

    ``scratch`` holds the sorted text while it is compressed (removed after).  Raises
    :class:`UsageError` when htslib refuses the file (unsorted, bad coordinates).
    """
    pysam = require_pysam()
    seq_col, start_col, end_col, zero = INDEXED_KINDS[kind]
    source = src
    sorted_path = scratch / f"{dest_gz.name}.sorted"
    try:
        if kind in _SORT_COLUMN:
            sort_gff_lines(src, sorted_path, _SORT_COLUMN[kind])
            source = sorted_path
        skip = 0 if kind == "gff" else _leading_header_lines(source)
        pysam.tabix_compress(str(source), str(dest_gz), force=False)
        try:
            pysam.tabix_index(
                str(dest_gz),
                seq_col=seq_col,
                start_col=start_col,
                end_col=end_col,
                zerobased=zero,
                line_skip=skip,
                meta_char="#",
                index=str(dest_index),
                csi=dest_index.name.endswith(".csi"),
                force=True,
            )
        except OSError as exc:
            raise UsageError(f"{src.name} cannot be indexed by tabix: {exc}") from None
    finally:
        if sorted_path.exists():
            os.unlink(sorted_path)


def _longest_end(gff3: Path) -> int:
    """The largest end of the ``##sequence-region`` lines of a GFF3 (0 without any)."""
    longest = 0
    with open(gff3, encoding="utf-8") as fh:
        for line in fh:
            if not line.startswith("#"):
                break
            parts = line.split()
            if parts[0] == "##sequence-region" and len(parts) == 4 and parts[3].isdigit():
                longest = max(longest, int(parts[3]))
    return longest


def write_browser_outputs(
    outs: OutputSet,
    stem: str,
    gff3: TextIO,
    bedgraphs: Sequence[TextIO],
    *,
    index: bool,
    gene_formats: Sequence[str],
) -> list[str]:
    """The browser outputs of an annotate run, staged in ``outs``; returns their names.

    ``gff3`` and ``bedgraphs`` are the run's staged text outputs (complete; flushed
    here).  ``gene_formats`` (:func:`seqstate.io.gene_formats.parse_gene_formats`):
    ``STEM.genes.bed`` / ``STEM.genes.gtf`` from the GFF3.  With ``index``, the GFF3,
    every bedGraph and the gene files also as ``NAME.gz`` with ``NAME.gz.tbi`` (or
    ``.csi``, see :func:`index_suffix`, by the GFF3's ``##sequence-region`` ends).
    """
    from seqstate.io.gene_formats import SUFFIXES, write_gene_formats

    for handle in (gff3, *bedgraphs):
        handle.flush()
    gff_path = Path(gff3.name)
    names: list[str] = []
    plain: list[tuple[str, Path, str]] = [(f"{stem}.gff3", gff_path, "gff")]
    if gene_formats:
        handles = {fmt: outs.open_text(f"{stem}{SUFFIXES[fmt]}") for fmt in gene_formats}
        write_gene_formats(gff_path, handles)
        for fmt, handle in handles.items():
            handle.flush()
            name = f"{stem}{SUFFIXES[fmt]}"
            names.append(name)
            plain.append((name, Path(handle.name), "gff" if fmt == "gtf" else "bed12"))
    if not index:
        return names
    plain += [(Path(h.name).name, Path(h.name), "bed") for h in bedgraphs]
    suffix = index_suffix(_longest_end(gff_path))
    scratch = outs.scratch_dir()
    for name, path, kind in plain:
        gz, idx = f"{name}.gz", f"{name}.gz{suffix}"
        indexed_copy(path, outs.path(gz), outs.path(idx), kind, scratch)
        names += [gz, idx]
    return names


def browser_names(
    stem: str, names: Sequence[str], index: bool, gene_formats: Sequence[str]
) -> list[str]:
    """The names :func:`write_browser_outputs` may write, for the overwrite check before
    the run (``names``: the run's other outputs, whose GFF3 and bedGraphs are indexed)."""
    from seqstate.io.gene_formats import SUFFIXES

    genes = [f"{stem}{SUFFIXES[fmt]}" for fmt in gene_formats]
    if not index:
        return genes
    plain = [n for n in names if n == f"{stem}.gff3" or n.endswith(".bedgraph")] + genes
    return genes + [x for n in plain for x in index_names(n)]
