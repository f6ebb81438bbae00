"""The file names of an annotate run: the stem (``--stem`` or from the input and
region), feature ID stems of a ``--region`` run, and every output name in writing order.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from pathlib import Path

from seqstate.commands.records_table import (
    TABLE_SUFFIX,
)
from seqstate.errors import UsageError
from seqstate.io.regions import Region
from seqstate.kinds import Group

#: Default cds / proteins file names (``--cds`` / ``--proteins`` without a name).
CDS_SUFFIX = ".cds.fna"


PROTEINS_SUFFIX = ".proteins.faa"


#: ``out_dir`` that sends the GFF3 to standard output (no tracks, no other files).
STDOUT = "-"


def input_stem(path: str, region: Region | None = None) -> str:
    """File-name stem used for outputs: ``asm.fa.gz`` -> ``asm``; stdin -> ``stdin``.

    With a region the stem carries it, 1-based inclusive: ``asm.chr4_1001-2000``
    (characters of the record ID outside ``A-Z a-z 0-9 . _ + -`` become ``_``),
    so runs on different regions write different files.
    """
    if path == "-":
        name = "stdin"
    else:
        name = Path(path).name
        name = re.sub(r"\.(gz|bgz)$", "", name)
        name = re.sub(r"\.(fa|fasta|fna|fas|seq|txt)$", "", name, flags=re.IGNORECASE)
        name = name or "input"
    if region is not None:
        seqid = re.sub(r"[^A-Za-z0-9._+-]", "_", region.seqid)
        name += f".{seqid}_{region.start0 + 1}-{region.end0}"
    return name


def feature_id_stem(region: Region) -> str:
    """What feature IDs of a ``--region`` run start with: ``ID:START-END``, 1-based
    closed (``chr4:1001-2000.gene.3``), so runs on different stretches of a record
    never share an ID, and concatenating their GFF3s keeps every ID unique."""
    return region.to_text()


def check_stem(stem: str) -> str:
    """A ``--stem`` value: a plain file-name part, no folder, no whitespace or control chars."""
    if (
        not stem
        or stem in (".", "..")
        or "/" in stem
        or "\\" in stem
        or any(ch.isspace() or ord(ch) < 0x20 or ord(ch) == 0x7F for ch in stem)
    ):
        raise UsageError(
            f"--stem {stem!r} must be a plain file-name part (no folder, no spaces or "
            "control characters)"
        )
    return stem


def output_names(
    stem: str,
    groups: list[Group],
    want_bedgraph: bool,
    want_bigwig: bool,
    calibrated: Sequence[int] = (),
) -> list[str]:
    """Every file name an annotate run writes into its output folder, in writing order;
    ``calibrated``: the groups whose calibrated posterior is also written."""
    names = [f"{stem}.gff3", f"{stem}.features.tsv", f"{stem}{TABLE_SUFFIX}"]
    for grp in groups:
        if want_bedgraph:
            names.append(f"{stem}.{grp.track_name}.bedgraph")
        if want_bigwig:
            names.append(f"{stem}.{grp.track_name}.bw")
    for g in calibrated:
        if want_bedgraph:
            names.append(f"{stem}.{groups[g].track_name}{CALIBRATED_TRACK}.bedgraph")
        if want_bigwig:
            names.append(f"{stem}.{groups[g].track_name}{CALIBRATED_TRACK}.bw")
    return names + [f"{stem}.run.json"]


#: Part of a calibrated track's file name after the track name.
CALIBRATED_TRACK = ".calibrated"
