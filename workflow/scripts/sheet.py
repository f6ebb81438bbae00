"""The workflow's sample sheet: read and check it before any job runs.

A sample sheet is a tab-separated table with a header line.  Columns (any
order; other columns are ignored):

- ``assembly`` (required): a name for the assembly, used in file names and as
  the output stem: letters, digits, ``.``, ``_``, ``-``; unique in the sheet.
- ``fasta`` (required): the assembly's FASTA (plain or gzip); a relative path is
  taken from the sample sheet's folder.
- ``model`` (required column, the cell may be empty): a built-in model name or a
  model folder (a relative folder is taken from the sample sheet's folder); empty:
  the config's ``default_model``.
- ``reference`` (optional): a trusted GFF3 annotation; when given, the assembly's
  features are compared with it and the accuracy goes into the summary table.
- ``cds``, ``proteins``, ``report`` (optional): ``yes`` or ``no`` (also ``true``/
  ``false``, ``1``/``0``): write the spliced CDS, the protein translations (gene
  models) or the HTML page of the run for this assembly; an empty cell (or no
  column): the config's default.
- ``gene_formats`` (optional): ``bed12``, ``gtf`` or ``bed12,gtf`` (the gene structures
  ``seqstate annotate --gene-formats`` writes; gene models), or ``none``; an empty cell
  (or no column): the config's ``annotate.gene_formats``.

Blank lines and lines starting with ``#`` are skipped.  Every problem is a
:class:`SheetError` whose message names the sheet, the 1-based line and the
assembly of the row.
"""

from __future__ import annotations

import csv
import re
from dataclasses import dataclass, field
from pathlib import Path

REQUIRED = ("assembly", "fasta", "model")
GENE_OUTPUTS = ("cds", "proteins", "report")
OPTIONAL = ("reference", *GENE_OUTPUTS, "gene_formats")
GENE_FORMATS = ("bed12", "gtf")
YES = ("yes", "true", "1")
NO = ("no", "false", "0")
NAME = re.compile(r"[A-Za-z0-9._-]+")


class SheetError(Exception):
    """A sample sheet that cannot be used (the message is one line)."""


@dataclass(frozen=True)
class Assembly:
    """One row of the sample sheet, paths resolved."""

    name: str
    fasta: str
    #: built-in model name or model folder path
    model: str
    reference: str | None
    line: int
    #: the gene output cells: True, False or None (empty: the config's default), by column
    outputs: dict[str, bool | None] = field(default_factory=dict)
    #: the gene_formats cell: the formats (() for ``none``), or None (empty: the config's)
    gene_formats: tuple[str, ...] | None = None

    def wants(self, output: str, default: bool) -> bool:
        """Whether this assembly writes ``output`` (cds, proteins or report)."""
        value = self.outputs.get(output)
        return default if value is None else value


def parse_gene_formats(text: str) -> tuple[str, ...] | None:
    """``bed12``/``gtf`` comma-separated (each once), or ``none`` (no format); None if
    ``text`` is neither."""
    if text.strip().lower() == "none":
        return ()
    formats = tuple(f.strip() for f in text.split(","))
    if not formats or any(f not in GENE_FORMATS for f in formats):
        return None
    return formats if len(set(formats)) == len(formats) else None


def _resolve(base: Path, value: str) -> str:
    p = Path(value)
    return str(p if p.is_absolute() else base / p)


def read_sheet(path: str | Path, default_model: str = "cpg-island") -> list[Assembly]:
    """The rows of the sample sheet at ``path``, checked (see the module docstring)."""
    sheet = Path(path)
    shown = str(path)
    try:
        text = sheet.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise SheetError(f"sample sheet '{shown}' does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SheetError(f"sample sheet '{shown}' cannot be read: {exc}") from None
    rows = [
        (i + 1, line)
        for i, line in enumerate(text.splitlines())
        if line.strip() and not line.startswith("#")
    ]
    if not rows:
        raise SheetError(f"sample sheet '{shown}' is empty (expected a header line and rows)")
    header_line, header_text = rows[0]
    header = [h.strip() for h in next(csv.reader([header_text], delimiter="\t"))]
    missing = [c for c in REQUIRED if c not in header]
    if missing:
        raise SheetError(
            f"sample sheet '{shown}' line {header_line}: the header has no column "
            f"{', '.join(repr(c) for c in missing)} (expected the tab-separated columns "
            f"{', '.join(REQUIRED)} and optionally {', '.join(OPTIONAL)}; found "
            f"{', '.join(repr(h) for h in header)})"
        )
    base = sheet.parent
    seen: dict[str, int] = {}
    out: list[Assembly] = []
    for line, row_text in rows[1:]:
        cells = [c.strip() for c in next(csv.reader([row_text], delimiter="\t"))]
        if len(cells) < len(header):
            cells += [""] * (len(header) - len(cells))
        if len(cells) > len(header):
            raise SheetError(
                f"sample sheet '{shown}' line {line}: {len(cells)} cells, expected at most "
                f"{len(header)} (one per header column, separated by tabs)"
            )
        row = dict(zip(header, cells))
        name = row["assembly"]
        where = f"sample sheet '{shown}' line {line}"
        if not name:
            raise SheetError(f"{where}: the 'assembly' cell is empty (expected a name)")
        where += f" (assembly '{name}')"
        if not NAME.fullmatch(name) or name in (".", ".."):
            raise SheetError(
                f"{where}: the assembly name may use only letters, digits, '.', '_' and '-'"
            )
        if name in seen:
            raise SheetError(f"{where}: duplicate assembly name (first on line {seen[name]})")
        seen[name] = line
        if not row["fasta"]:
            raise SheetError(f"{where}: the 'fasta' cell is empty (expected a FASTA path)")
        fasta = _resolve(base, row["fasta"])
        if not Path(fasta).is_file():
            raise SheetError(f"{where}: FASTA '{fasta}' does not exist")
        model = row["model"] or default_model
        if "/" in model or (base / model).is_dir():
            model = _resolve(base, model)
            if not Path(model).exists():
                raise SheetError(f"{where}: model folder '{model}' does not exist")
        reference = row.get("reference") or None
        if reference is not None:
            reference = _resolve(base, reference)
            if not Path(reference).is_file():
                raise SheetError(f"{where}: reference '{reference}' does not exist")
        outputs: dict[str, bool | None] = {}
        for column in GENE_OUTPUTS:
            cell = row.get(column, "").lower()
            if cell and cell not in YES + NO:
                raise SheetError(
                    f"{where}: the '{column}' cell is {row[column]!r}, expected yes or no "
                    "(or empty: the config's default)"
                )
            outputs[column] = None if not cell else cell in YES
        formats = None
        if row.get("gene_formats"):
            formats = parse_gene_formats(row["gene_formats"])
            if formats is None:
                raise SheetError(
                    f"{where}: the 'gene_formats' cell is {row['gene_formats']!r}, expected "
                    "bed12, gtf, bed12,gtf or none (or empty: the config's default)"
                )
        out.append(Assembly(name, fasta, model, reference, line, outputs, formats))
    if not out:
        raise SheetError(f"sample sheet '{shown}' has a header and no rows")
    return out
