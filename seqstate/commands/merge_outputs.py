"""The gene and browser outputs of ``seqstate merge``: which ones the groups wrote, their
names in the gathered set, and how they are gathered.

Merge infers the outputs from the groups' run reports (no option of its own): the
``cds`` and ``proteins`` options (``--cds``/``--proteins``: the FASTA names written),
``gene_formats`` (``STEM.genes.bed``, ``STEM.genes.gtf``) and ``index_outputs``
(``NAME.gz`` with ``NAME.gz.tbi`` or ``.csi``).  Every group must have been run with the
same ones (:func:`output_difference` names the first that differs).

- The CDS and protein FASTA: every group's file, whole, in the gathered record order.
  Their records are named by the mRNA IDs of the record they are on and come in
  record order in a whole run, so the concatenation is the whole run's file.
- ``STEM.genes.bed`` (no header) likewise; ``STEM.genes.gtf``: its ``#gtf-version``
  line once, then every group's lines.  A whole run writes them mRNA by mRNA in the
  order of its GFF3, which is record by record.
- The indexed copies are made again (:func:`seqstate.io.indexed.indexed_copy`, as a
  whole run makes them) from the gathered plain files, never copied from the groups:
  one group's copy knows only its records, and the index kind (``.tbi``, or ``.csi``
  past :data:`seqstate.io.indexed.CSI_ABOVE` bases) follows the longest record of the
  whole set.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from seqstate.commands.annotate import CDS_SUFFIX, PROTEINS_SUFFIX
from seqstate.errors import escape_text
from seqstate.io import indexed
from seqstate.io.atomic import OutputSet

__all__ = [
    "DEFAULT_SUFFIX",
    "INDEX_ENDS",
    "gathered_name",
    "index_kind",
    "indexed_bases",
    "output_difference",
    "same_kind",
    "write_indexed",
]

#: The file a group's ``--cds``/``--proteins`` writes when given without a name.
DEFAULT_SUFFIX = {"cds": CDS_SUFFIX, "proteins": PROTEINS_SUFFIX}

#: How the names of the two index kinds end.
INDEX_ENDS = (".gz.tbi", ".gz.csi")

#: The options that choose a run's gene and browser outputs, and their flags.
OUTPUT_OPTIONS = {
    "cds": "--cds",
    "proteins": "--proteins",
    "gene_formats": "--gene-formats",
    "index_outputs": "--index-outputs",
}

#: Tabix kind (:data:`seqstate.io.indexed.INDEXED_KINDS`) of each indexed plain file.
_INDEX_KIND = {".gff3": "gff", ".genes.gtf": "gff", ".genes.bed": "bed12", ".bedgraph": "bed"}


def _normal(option: str, value: Any, stem: str) -> Any:
    """An output option's value with the group's own default name taken out."""
    if option in DEFAULT_SUFFIX and value == stem + DEFAULT_SUFFIX[option]:
        return "STEM" + DEFAULT_SUFFIX[option]
    if option == "index_outputs":
        return bool(value)
    if option == "gene_formats":
        return list(value or [])
    return value


def _described(option: str, value: Any) -> str:
    flag = OUTPUT_OPTIONS[option]
    if value is None or value is False or value == []:
        return f"without {flag}"
    if value is True:
        return f"with {flag}"
    if isinstance(value, list):
        return f"with {flag} {escape_text(','.join(str(v) for v in value))}"
    return f"with {flag} ({escape_text(str(value))})"


def output_difference(
    a: dict[str, Any], a_stem: str, b: dict[str, Any], b_stem: str
) -> tuple[str, str, str] | None:
    """The first output option (``cds``, ...) whose value differs between two groups'
    ``options`` (a default file name counts as the same in groups of other stems):
    ``(option, how a was run, how b was run)``, or None when they write the same outputs."""
    for option in OUTPUT_OPTIONS:
        va, vb = _normal(option, a.get(option), a_stem), _normal(option, b.get(option), b_stem)
        if va != vb:
            return option, _described(option, a.get(option)), _described(option, b.get(option))
    return None


def gathered_name(role: str, group_name: str, group_stem: str, stem: str) -> str:
    """The gathered set's name of a group output: ``role`` (what
    :func:`seqstate.commands.groupfiles.output_role` says it is) ``cds``/``proteins``
    keeps a name the group chose and follows ``stem`` for the default one; every other
    output is ``stem`` + its role."""
    if role in DEFAULT_SUFFIX:
        if group_name == group_stem + DEFAULT_SUFFIX[role]:
            return stem + DEFAULT_SUFFIX[role]
        return group_name
    return stem + role


def same_kind(role: str) -> str:
    """A role with its index kind taken out (``.gff3.gz.tbi`` and ``.gff3.gz.csi`` are
    one output to compare groups by: the kind follows the group's longest record)."""
    for end in INDEX_ENDS:
        if role.endswith(end):
            return role[: -len(end)] + ".gz.index"
    return role


def indexed_bases(roles: list[str]) -> list[str]:
    """The plain roles (``.gff3``, ``.genes.gtf``, ``.CDS.plus.bedgraph``, ...) the
    groups also wrote as compressed, indexed copies, in the roles' order."""
    return [r[: -len(".gz")] for r in roles if r.endswith(".gz")]


def index_kind(base: str) -> str:
    """The tabix kind of a plain role (:data:`_INDEX_KIND`, by how its name ends)."""
    return next(kind for end, kind in _INDEX_KIND.items() if base.endswith(end))


def write_indexed(outs: OutputSet, plain: list[tuple[str, Path, str]], longest: int) -> list[str]:
    """The compressed, indexed copy of each gathered plain file ``(name, staged path,
    tabix kind)``, staged in ``outs``; returns their names (``NAME.gz`` and its index,
    ``.tbi`` or ``.csi`` by ``longest``, the set's longest record in bases)."""
    suffix = indexed.index_suffix(longest)
    scratch = outs.scratch_dir()
    names: list[str] = []
    for name, path, kind in plain:
        gz, idx = f"{name}.gz", f"{name}.gz{suffix}"
        indexed.indexed_copy(path, outs.path(gz), outs.path(idx), kind, scratch)
        names += [gz, idx]
    return names
