"""``seqstate plot``: a figure of one region, posterior curves over lanes of features.

The figure has, top to bottom: one posterior curve per track group of the model
(label, and strand when a label occurs on both), y from 0 to 1; a lane of the
decoded features (the model's default decoding, as annotate, one row per
track group); and, with a reference file, a lane of its features (one row per
feature type).  The x axis is the record's 1-based base position: base i
(0-based) is drawn at x = i + 1 and a feature ``[start0, end0)`` as a box from
``start0 + 0.5`` to ``end0 + 0.5``.  Lanes are told apart by position and by
line style and hatching, not by colour: everything is black, white or grey.

Gene models (a model of the gene kind, :mod:`seqstate.kinds.genes`) are decoded as
annotate decodes them: the decoded lane has one row per strand, each gene drawn as
its CDS boxes joined by a thin intron line, an arrowhead at its 3' end, and its ID
(``SEQID.gene.N`` as annotate numbers the record's genes; with a flank, numbered in
the window and prefixed with it).  Reference features that share a parent (GFF3
``Parent``, GTF ``transcript_id``) are drawn the same way, labelled with their gene
(the parent's parent, or GTF ``gene_id``).  Every stranded box has an arrowhead on
its 3' side.  Overlapping features of one reference row are stacked in tiers.
Reference types are chosen by ``reference_types``; by default the types that are the
model's labels (:func:`default_reference_types`), else every type except those that
describe a whole sequence (:data:`WHOLE_SEQUENCE_TYPES`).  A gene's ID is written once per
lane; labels that would overprint another or leave their lane are moved (above or below
their model, left- or right-aligned) or left out, and the lane title counts those left out.
The figure's height is the least one: lanes of many rows make it taller.

Where things are: this module checks the options, gathers the data (decoding, reference
lanes) and writes the file; :mod:`seqstate.commands.plot_draw` draws the figure (curves,
lanes, labels) from a :class:`PlotData`.  Both modules' public names import from here.

When a curve has more bases than :data:`MAX_POINTS_FACTOR` points per pixel column
allows, it is summarised: the mean posterior of each bin of equal bases is drawn
(the bin size is in the y-axis title), not every base.  IDs are written only when at
most :data:`MAX_LABELS` models are in view (the lane title says so otherwise).

Posteriors and decoding run on the whole record, so the curves and boxes match
annotate on the whole file; with a flank they run on the region plus that many
bases each side, treated as a record of its own (see :mod:`seqstate.commands.score`).

matplotlib is an optional extra, imported only inside the functions that draw;
the figure is drawn without pyplot on an Agg canvas (PNG), and saved as SVG or
PDF by matplotlib's own writers for those formats.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from seqstate import __version__
from seqstate.commands.inputs import (
    indexed_lengths,
    read_model_records,
    read_model_region,
    read_set,
)
from seqstate.commands.masking import check_masked, prepare_masked
from seqstate.commands.plot_draw import (
    MAX_LABELS,
    MAX_POINTS_FACTOR,
    MIN_CURVE_INCHES,
    LaneFeature,
    PlotData,
    bin_size,
    draw,
    require_matplotlib,
)
from seqstate.commands.plot_draw import _curve_points as _curve_points
from seqstate.commands.plot_draw import _lane_inches as _lane_inches
from seqstate.commands.score import read_regions
from seqstate.engine import api
from seqstate.errors import ImpossibleSequenceError, UsageError
from seqstate.io.atomic import OutputSet, check_outputs
from seqstate.io.files import display_name
from seqstate.io.regions import Region, check_region, parse_region
from seqstate.io.tables import load_model
from seqstate.kinds import group_index, kind_of, track_groups
from seqstate.kinds.genes import GENES, decode_genes
from seqstate.kinds.segments import decode_segments
from seqstate.model import resolve_thresholds

if TYPE_CHECKING:  # pragma: no cover
    from matplotlib.figure import Figure

__all__ = [
    "FIGURE_FORMATS",
    "MAX_LABELS",
    "MAX_POINTS_FACTOR",
    "MAX_REGION",
    "MIN_CURVE_INCHES",
    "LaneFeature",
    "PlotData",
    "PlotOptions",
    "draw",
    "plot",
    "bin_size",
    "plot_data",
    "require_matplotlib",
]

#: Largest region (bases) plotted without ``force``.
MAX_REGION = 2_000_000
#: Output formats, chosen by the file name's extension.
FIGURE_FORMATS = ("png", "svg", "pdf")
#: Reference types left out unless asked for: they describe a whole sequence.
WHOLE_SEQUENCE_TYPES = ("region", "chromosome", "contig", "scaffold", "supercontig")


@dataclass
class PlotOptions:
    """Everything ``seqstate plot`` was asked to do (sizes in inches, ``dpi`` dots/inch)."""

    input: str
    region: str
    out: str
    model: str = "cpg-island"
    reference: str | None = None
    #: reference types drawn (GFF3/GTF column 3); empty: all but WHOLE_SEQUENCE_TYPES;
    #: ("all",): every type
    reference_types: tuple[str, ...] = ()
    flank: int | None = None
    width: float = 10.0
    height: float = 4.0
    dpi: int = 100
    force: bool = False  # replace an existing figure file
    allow_large: bool = False  # regions over MAX_REGION bases
    decode: str | None = None
    min_posterior: float | None = None  # None: the model's default
    min_length: int | None = None  # None: the model's default
    split_unknown: int = 10  # no feature spans a run of this many unknown bases
    masked: str = "base"


def figure_format(out: str) -> str:
    """``png``, ``svg`` or ``pdf`` from the output name; UsageError otherwise."""
    suffix = Path(out).suffix.lower().lstrip(".")
    if suffix not in FIGURE_FORMATS:
        raise UsageError(
            f"output '{out}': the name must end in .png, .svg or .pdf (the format is taken from it)"
        )
    return suffix


def _check_options(opts: PlotOptions) -> None:
    figure_format(opts.out)
    check_outputs([opts.out], _inputs(opts), force=opts.force)
    if not (opts.width > 0 and opts.height > 0):
        raise UsageError(f"--width {opts.width} and --height {opts.height} must be positive")
    if opts.dpi < 10:
        raise UsageError(f"--dpi {opts.dpi} must be at least 10")
    if opts.width * opts.dpi > 20000 or opts.height * opts.dpi > 20000:
        raise UsageError("the figure would be more than 20000 pixels wide or high")
    if opts.flank is not None and opts.flank < 0:
        raise UsageError(f"--flank {opts.flank} must be 0 or more")
    if opts.min_posterior is not None and not 0.0 <= opts.min_posterior <= 1.0:
        raise UsageError(f"--min-posterior {opts.min_posterior} is outside 0..1")
    if opts.min_length is not None and opts.min_length < 1:
        raise UsageError(f"--min-length {opts.min_length} must be at least 1")
    if opts.split_unknown < 1:
        raise UsageError(f"--split-unknown {opts.split_unknown} must be at least 1")
    check_masked(opts.masked)
    if opts.reference == "-" and opts.input == "-":
        raise UsageError("FASTA and --reference cannot both be standard input ('-')")


def _inputs(opts: PlotOptions) -> list:
    return read_set(fasta=opts.input, model=opts.model, files=[opts.reference])


def plot_data(opts: PlotOptions) -> PlotData:
    """Read, check and compute everything :func:`draw` needs (no matplotlib here).

    The region is 1-based inclusive as typed (``ID:START-END``, or ``ID`` for a
    whole record); regions longer than :data:`MAX_REGION` bases need
    ``opts.allow_large``.  Decoded features are those of the whole record (or the
    flank window) that overlap the region, decoded as annotate does (split at
    runs of unknown bases, unknown ends trimmed).
    """
    _check_options(opts)
    model = load_model(opts.model)
    min_posterior, min_length, _ = resolve_thresholds(model, opts.min_posterior, opts.min_length)
    opts = replace(opts, min_posterior=min_posterior, min_length=min_length)
    decode = opts.decode or model.decode
    if decode not in ("posterior", "viterbi"):
        raise UsageError(f"decode '{decode}' is not posterior or viterbi")
    groups = track_groups(model)
    if not groups:
        raise UsageError(f"model '{model.name}' has no labelled states: nothing to plot")
    region = parse_region(opts.region)
    # through the FASTA index when there is one (only the window's bytes are read)
    lengths = indexed_lengths(opts.input, model)
    records = read_model_records(opts.input, model) if lengths is None else []
    if lengths is None:
        lengths = {r.id: len(r.seq) for r in records}
    region = check_region(region, lengths)
    size = region.end0 - region.start0
    if size > MAX_REGION and not opts.allow_large:
        raise UsageError(
            f"region {region.to_text()} is {size:,} bases, more than the "
            f"{MAX_REGION:,} plotted without --allow-large"
        )
    ref = read_regions(opts.reference) if opts.reference is not None else None
    if ref is not None:
        from seqstate.commands.records import require_shared_ids

        ref_ids = list(dict.fromkeys(r.seqid for r in ref.regions))
        require_shared_ids(ref.path, ref_ids, display_name(opts.input), list(lengths))
    seqid, record_length = region.seqid, lengths[region.seqid]
    if opts.flank is None:
        w0, w1 = 0, record_length
        name = seqid
    else:
        w0 = max(0, region.start0 - opts.flank)
        w1 = min(record_length, region.end0 + opts.flank)
        name = f"{seqid}:{w0 + 1}-{w1}"
    if records:
        window = next(r for r in records if r.id == seqid).seq[w0:w1]
        del records
    else:
        got = read_model_region(opts.input, model, Region(seqid, w0, w1))
        assert got is not None  # the index was there a moment ago
        window = got.seq
    tables = prepare_masked(model, opts.masked)
    state_group = group_index(model, groups)
    unknown_masked = opts.masked == "unknown"
    codes = api.encode(tables, window, masked_unknown=unknown_masked)
    genes = kind_of(model) is GENES
    try:
        post = api.posterior(tables, codes, group=state_group, n_groups=len(groups), record=name)
        # as annotate: features never claim long runs of unknown bases, nor unknown ends
        symbols = api.symbols_of(tables, window, masked_unknown=unknown_masked)
        if genes:
            predictions = decode_genes(
                model, tables, codes, symbols < 0, decode, opts.split_unknown, name
            )
        else:
            segs = decode_segments(
                tables,
                codes,
                post,
                state_group,
                symbols,
                decode=decode,
                min_posterior=min_posterior,
                min_length=min_length,
                split_unknown=opts.split_unknown,
                record=name,
            )
    except ImpossibleSequenceError as exc:
        raise ImpossibleSequenceError(exc.message, path=display_name(opts.input)) from None
    if decode == "viterbi":
        note = "Viterbi path"
    else:
        note = f"posterior at least {min_posterior:g}"
    if genes:
        note = "Viterbi path" if decode == "viterbi" else "maximum expected accuracy path"
        decoded_rows = ["genes +", "genes -"]
        decoded = []
        for number, gp in enumerate(predictions, start=1):
            g0, g1 = gp.span
            if not (g0 + w0 < region.end0 and g1 + w0 > region.start0):
                continue
            gid = f"{name}.gene.{number}"
            label = gid + (" (partial)" if gp.partial else "")
            row = 0 if gp.strand == "+" else 1
            decoded += [
                LaneFeature(row, a + w0, b + w0, gid, gp.strand, gid, label) for a, b in gp.pieces
            ]
    else:
        if min_length > 1:
            note += f", at least {min_length} bases"
        decoded_rows = [g.track_name for g in groups]
        decoded = [
            LaneFeature(s.group, s.start0 + w0, s.end0 + w0, strand=groups[s.group].strand or ".")
            for s in segs
            if s.start0 + w0 < region.end0 and s.end0 + w0 > region.start0
        ]
    values = np.array(post.values[region.start0 - w0 : region.end0 - w0], dtype=np.float32)
    del post, codes
    data = PlotData(
        seqid,
        region.start0,
        region.end0,
        model.name,
        decode,
        note,
        [g.track_name for g in groups],
        values,
        decoded,
        flank=opts.flank,
        decoded_rows=decoded_rows,
        decoded_unit="gene" if genes else "feature",
    )
    if ref is not None:
        rows, feats, hidden = _reference_lane(
            ref, seqid, region.start0, region.end0, opts, [g.label for g in groups]
        )
        data.reference_rows = rows
        data.reference = feats
        data.reference_hidden = hidden
        data.reference_name = Path(ref.path).name
    return data


def default_reference_types(ref: Any, labels: list[str]) -> set[str]:
    """The reference types drawn without ``--reference-type``: those that are labels of the
    model (CDS for a gene model, CpG_island for the CpG model); when the file has none
    of them, every type but :data:`WHOLE_SEQUENCE_TYPES`."""
    present = {reg.type if ref.format != "bed" and reg.type else "interval" for reg in ref.regions}
    match = present & set(labels)
    return match or (present - set(WHOLE_SEQUENCE_TYPES))


def _reference_lane(
    ref: Any, seqid: str, r0: int, r1: int, opts: PlotOptions, labels: list[str] | None = None
) -> tuple[list[str], list[LaneFeature], list[str]]:
    """Rows (one per selected type, more tiers where features overlap), boxes and the
    types left out, of the reference features of ``seqid`` that overlap ``[r0, r1)``.

    Types drawn: ``opts.reference_types``, else :func:`default_reference_types` of the
    model's ``labels``.  A gene's ID is written once per type, on its first transcript."""
    chosen = set(opts.reference_types)
    every = "all" in chosen
    default = default_reference_types(ref, labels or [])
    by_id = {_attr(reg, "ID"): reg for reg in ref.regions if _attr(reg, "ID")}
    kinds: list[str] = []
    hidden: list[str] = []
    picked = []
    for reg in ref.regions:
        if reg.seqid != seqid or reg.end0 <= r0 or reg.start0 >= r1:
            continue
        kind = reg.type if ref.format != "bed" and reg.type else "interval"
        shown = every or (kind in chosen if chosen else kind in default)
        if not shown:
            if kind not in hidden:
                hidden.append(kind)
            continue
        if kind not in kinds:
            kinds.append(kind)
        picked.append((kind, reg))
    if chosen and not every:
        present = sorted({r.type or "interval" for r in ref.regions})
        missing = sorted(chosen - set(present))
        if missing:
            raise UsageError(
                f"--reference-type {', '.join(missing)}: no such type in {ref.path} "
                f"(types there: {', '.join(present[:10]) or 'none'})"
            )
    rows: list[str] = []
    out: list[LaneFeature] = []
    for kind in kinds:
        models: dict[str, list] = {}
        for k, reg in picked:
            if k != kind:
                continue
            key, label = _model_of(reg, by_id, ref.format)
            models.setdefault(key or f"line{reg.line0}", []).append((reg, key, label))
        # stack models that overlap (with a small gap) into tiers, first fit
        tiers: list[int] = []  # end of the last model of each tier
        gap = max(1, (r1 - r0) // 200)
        first_row = len(rows)
        written: set[str] = set()  # gene IDs already written in this type's rows
        for members in sorted(models.values(), key=lambda m: min(r.start0 for r, _, _ in m)):
            gene = members[0][2]
            if gene in written:
                members = [(reg, key, "") for reg, key, _ in members]
            elif gene:
                written.add(gene)
            lo = min(r.start0 for r, _, _ in members)
            hi = max(r.end0 for r, _, _ in members)
            tier = next((t for t, end in enumerate(tiers) if end + gap <= lo), None)
            if tier is None:
                tiers.append(hi)
                tier = len(tiers) - 1
            else:
                tiers[tier] = hi
            for reg, key, label in members:
                out.append(
                    LaneFeature(
                        first_row + tier, reg.start0, reg.end0, reg.name, reg.strand, key, label
                    )
                )
        rows += [kind] + [""] * (len(tiers) - 1)
    return rows, out, hidden


def _attr(reg: Any, key: str) -> str | None:
    for k, v in reg.attributes:
        if k == key:
            return v if isinstance(v, str) else v[0]
    return None


def _model_of(reg: Any, by_id: dict, fmt: str) -> tuple[str | None, str]:
    """The model a reference feature belongs to (its parent transcript, else itself)
    and the label written for it (the gene: the parent's parent, GTF ``gene_id``)."""
    if fmt == "gtf":
        tid, gid = _attr(reg, "transcript_id"), _attr(reg, "gene_id")
        if tid is not None and reg.type not in ("gene", "transcript"):
            return tid, gid or tid
        return None, gid or reg.name
    parent = _attr(reg, "Parent")
    if parent is not None and reg.type in ("CDS", "exon", "five_prime_UTR", "three_prime_UTR"):
        grand = by_id.get(parent)
        gene = _attr(grand, "Parent") if grand is not None else None
        return parent, gene or parent
    return None, reg.name


def _metadata(fmt: str) -> dict:
    creator = f"seqstate {__version__}"
    if fmt == "png":
        return {"Software": creator}
    if fmt == "svg":
        return {"Creator": creator, "Date": None}
    return {"Creator": creator, "Producer": creator, "CreationDate": None}


def save(
    fig: Figure, out: str, dpi: int, *, force: bool = False, inputs: list | tuple = ()
) -> None:
    """Write ``fig`` to ``out`` (format from its extension) all-or-nothing, no timestamp.

    The overwrite rule of :mod:`seqstate.io.atomic` applies (``force``, ``inputs``).
    """
    matplotlib = require_matplotlib()
    fmt = figure_format(out)
    with matplotlib.rc_context({"svg.hashsalt": "seqstate", "svg.fonttype": "path"}):
        with OutputSet(force=force, inputs=inputs) as outs:
            tmp = outs.path(out)
            try:
                fig.savefig(str(tmp), format=fmt, dpi=dpi, metadata=_metadata(fmt))
            except OSError as exc:
                raise UsageError(
                    f"output file '{out}' cannot be written: {exc.strerror or exc}"
                ) from None


@dataclass
class PlotReport:
    """What a plot run drew: counts of decoded and reference boxes, and the file."""

    out: str
    decoded: int
    reference: int
    region: str
    #: whether a reference file was given (its count is then in the summary)
    with_reference: bool = False

    #: what a decoded model is: "feature" or "gene"
    unit: str = "feature"

    def summary(self) -> str:
        """The summary line (after ``seqstate: ``)."""
        ref = f", {self.reference} reference feature(s)" if self.with_reference else ""
        if self.unit == "feature":
            ref = ref.replace(" feature(s)", "")
            return f"{self.region}, {self.decoded} decoded{ref} feature(s) -> {self.out}"
        return f"{self.region}, {self.decoded} decoded {self.unit}(s){ref} -> {self.out}"


def plot(opts: PlotOptions) -> PlotReport:
    """Run ``seqstate plot``: compute, draw and write the figure (nothing left on error)."""
    _check_options(opts)
    require_matplotlib()
    data = plot_data(opts)
    fig = draw(data, opts.width, opts.height, opts.dpi)
    save(fig, opts.out, opts.dpi, force=opts.force, inputs=_inputs(opts))
    n_decoded = len({(f.row, f.model or id(f)) for f in data.decoded})
    return PlotReport(
        opts.out,
        n_decoded,
        len(data.reference),
        f"{data.seqid}:{data.start0 + 1}-{data.end0}",
        opts.reference is not None,
        data.decoded_unit,
    )
