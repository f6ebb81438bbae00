"""The record loop of ``seqstate annotate``: records streamed, run in parallel, written in order.

Records are read one at a time (:func:`seqstate.io.fasta.iter_sequences`; a long
record's bases are spilled to a scratch file and read back by range), so memory
never holds the whole input.  With ``jobs > 1`` the short records run on a pool
of threads (the kernels release the GIL), at most ``jobs + 1`` in flight, and
their outputs are written in input order; a long record runs alone, window by
window (:mod:`seqstate.kinds.stream`), with the engine's forward and backward
passes and its per-block recombination spread over ``jobs`` threads.  Either
way the bytes written are those of ``jobs = 1``.

Coordinates: 0-based half-open inside; the GFF3 writer turns them 1-based closed.
"""

from __future__ import annotations

import io
import os
from collections import deque
from collections.abc import Callable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from concurrent.futures import TimeoutError as FutureTimeout
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from seqstate import log
from seqstate.commands.inputs import alphabet_check_of
from seqstate.engine import api
from seqstate.errors import SequenceFormatError, UsageError
from seqstate.io import tracks
from seqstate.io.atomic import hold_point, stop_requested
from seqstate.io.deferred import DeferredBigWig, DeferredGFF3, RunCarry
from seqstate.io.gff3 import GFF3Writer, header_text
from seqstate.kinds import Group, Kind, RecordData
from seqstate.model import Model

__all__ = [
    "LONG_RECORD_BUDGET",
    "Item",
    "RecordOutput",
    "Runner",
    "available_cores",
    "long_threshold",
    "resolve_jobs",
    "window_length",
]

#: Bytes of per-base working arrays one record may use on the whole-record path; longer
#: records go window by window (and are spilled to scratch while they are read).
LONG_RECORD_BUDGET = 128 << 20
#: Bytes of posterior values one window of a long record may hold.
WINDOW_BUDGET = 96 << 20
#: Bytes of working arrays per base on the whole-record path, beyond the posterior columns
#: (the bases, symbols, emission codes and decoding scratch).
_FIXED_BYTES_PER_BASE = 16


def available_cores() -> int:
    """The cores this process may run on (its CPU affinity where the system tells it)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)


def resolve_jobs(requested: int | None) -> tuple[int, str | None]:
    """``--jobs``: None -> every available core; below 1 or above the cores -> clamped,
    with the note to show."""
    cores = available_cores()
    if requested is None:
        return cores, None
    if requested < 1:
        return 1, f"note: --jobs {requested} is below 1; using 1 job"
    if requested > cores:
        return cores, (
            f"note: --jobs {requested} is more than the {cores} core(s) this process may use; "
            f"using {cores}"
        )
    return requested, None


def _columns(model: Model, kind: Kind, groups: list[Group]) -> int:
    """Posterior columns a record of this model keeps per base: its track groups, plus the
    decoding classes of a gene model (its posterior decoding keeps both)."""
    extra = 0
    if kind.name == "genes":
        from seqstate.kinds.genes import decoding_classes

        extra = int(decoding_classes(model)[1])
    return len(groups) + extra


def long_threshold(model: Model, kind: Kind, groups: list[Group]) -> int:
    """Records longer than this (bases) run window by window, with bounded memory."""
    per_base = 4 * _columns(model, kind, groups) + _FIXED_BYTES_PER_BASE
    return int(min(16 << 20, max(1 << 20, LONG_RECORD_BUDGET // per_base)))


def window_length(model: Model, kind: Kind, groups: list[Group]) -> int:
    """Bases per window of a long record (the kind rounds it to whole checkpoint blocks)."""
    per_base = 4 * _columns(model, kind, groups) + _FIXED_BYTES_PER_BASE
    return int(min(8 << 20, max(1 << 18, WINDOW_BUDGET // per_base)))


@dataclass
class Item:
    """One stretch to annotate: bases ``start0 .. end0-1`` of record ``id`` (``length``
    bases in all), read through ``read(a, b)`` in record coordinates."""

    id: str
    length: int
    start0: int
    end0: int
    read: Callable[[int, int], bytes]
    close: Callable[[], None]
    long: bool
    #: feature IDs start with this (None: ``id``); ``ID:START-END`` for a region run
    id_stem: str | None = None
    #: the records the reader skipped just before this one (header-only records)
    skipped_before: list[Any] = field(default_factory=list)

    @property
    def bases(self) -> int:
        return self.end0 - self.start0


@dataclass
class RecordOutput:
    """What one record gives: the report fields and its output text, to write in order."""

    id: str
    length: int
    start0: int
    end0: int
    unknown: int
    loglik: float
    features: int
    gff: str = ""
    tsv: str = ""
    bedgraph: list[str] = field(default_factory=list)
    bigwig: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = field(default_factory=list)
    cds: str = ""
    proteins: str = ""
    #: counts the kind reported (gene kinds: genes, mrnas, filtered_*)
    counts: dict[str, int] = field(default_factory=dict)


def bedgraph_text(
    seqid: str,
    values: np.ndarray,
    offset0: int,
    precision: int,
    spans: list[tuple[int, int]] | None = None,
) -> str:
    """The bedGraph lines :class:`~seqstate.io.tracks.BedGraphTrack` writes for one whole
    stretch's values (``values[i]`` is position ``offset0 + i``; without the track line):
    only the positions of ``spans`` (record coordinates, 0-based half-open; None: all)."""
    buf = io.StringIO()
    track = tracks.BedGraphTrack(buf, "x", "", precision)
    start = buf.tell()
    for a, b in _spans_or_all(values, offset0, spans):
        track.add(seqid, values[a - offset0 : b - offset0], a)
    track.end_record(seqid)
    return buf.getvalue()[start:]


def _spans_or_all(
    values: np.ndarray, offset0: int, spans: list[tuple[int, int]] | None
) -> list[tuple[int, int]]:
    return [(offset0, offset0 + int(values.shape[0]))] if spans is None else spans


def bigwig_runs(
    values: np.ndarray, offset0: int, precision: int, spans: list[tuple[int, int]] | None = None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The merged runs (record coordinates) a bigWig gets for one whole stretch's values,
    only over ``spans`` (as :func:`bedgraph_text`)."""
    carry = RunCarry(precision)
    parts = [
        carry.add(values[a - offset0 : b - offset0], a)
        for a, b in _spans_or_all(values, offset0, spans)
    ]
    parts.append(carry.close())
    return (
        np.concatenate([p[0] for p in parts]),
        np.concatenate([p[1] for p in parts]),
        np.concatenate([p[2] for p in parts]),
    )


def track_spans(
    read_symbols: Callable[[int, int], np.ndarray],
    n: int,
    a: int,
    b: int,
    split_unknown: int,
) -> list[tuple[int, int]]:
    """The positions of ``[a, b)`` (stretch coordinates, 0-based half-open) a track
    writes: all but the runs of at least ``split_unknown`` unknown bases, the runs that
    cut features.  ``read_symbols`` reads the stretch of ``n`` bases (negative symbol:
    unknown); a run crossing an end of ``[a, b)`` is measured on up to
    ``split_unknown`` bases beyond it, so the pieces of a window equal those of the
    whole stretch."""
    lo, hi = max(0, a - split_unknown), min(n, b + split_unknown)
    flags = np.asarray(read_symbols(lo, hi)) < 0
    return tracks.spans_outside_runs(flags, lo, a, b, split_unknown)


@dataclass
class Runner:
    """Everything the record loop needs, set up by :func:`seqstate.commands.annotate.annotate`."""

    model: Model
    kind: Kind
    tables: api.EngineTables
    groups: list[Group]
    state_group: np.ndarray
    decode: str
    min_posterior: float
    min_length: int
    split_unknown: int
    masked_unknown: bool
    precision: int
    jobs: int
    progress: log.Progress
    check_symbols: Callable[[str, bytes, int], None] | None = None
    want_bedgraph: bool = False
    want_bigwig: bool = False
    want_cds: bool = False
    want_proteins: bool = False
    translation_table: int = 1
    #: gene models: which decoded genes are written (:class:`seqstate.kinds.genes.GeneFilter`)
    gene_filter: Any = None
    #: --calibrated-tracks: (group, its posterior map) per calibrated track, written after
    #: the raw tracks (track index ``len(groups) + i``)
    calibrated: list[tuple[int, Any]] = field(default_factory=list)

    def _gene_writer(
        self, item: Item, read: Callable[[int, int], bytes], cds: Any, prot: Any
    ) -> Callable[[list[Any]], None] | None:
        """The callback that writes a stretch's CDS and proteins (gene models), or None.

        ``read(a, b)`` takes stretch positions, as the genes' pieces do
        (:mod:`seqstate.io.cds`); ``item.start0`` is added only to the spans written.
        """
        if not (self.want_cds or self.want_proteins):
            return None
        from seqstate.io.cds import write_cds_and_proteins

        def on_genes(genes: list[Any]) -> None:
            write_cds_and_proteins(
                genes,
                item.id,
                read,
                cds,
                prot,
                self.translation_table,
                offset0=item.start0,
                id_stem=item.id_stem,
            )

        return on_genes

    # ------------------------------------------------------------ one record
    def short_record(self, item: Item) -> RecordOutput:
        """The whole-record path (as before streaming): posterior, the kind's features,
        tracks; outputs kept as text for the writer thread."""
        tables, groups = self.tables, self.groups
        self.progress.working(item.id, item.bases)  # the line names it and moves on
        seq = item.read(item.start0, item.end0)
        item.close()
        if self.check_symbols is not None:
            self.check_symbols(item.id, seq, item.start0)
        sym = api.symbols_of(tables, seq, masked_unknown=self.masked_unknown)
        codes = api.encode_symbols(tables, sym)
        unknown = int(np.count_nonzero(sym < 0))
        n = item.bases
        post = api.posterior(
            tables, codes, group=self.state_group, n_groups=len(groups), record=item.id
        )
        self.progress.advance(n // 2, item.id)
        data = RecordData(
            model=self.model,
            tables=tables,
            groups=groups,
            state_group=self.state_group,
            seqid=item.id,
            offset0=item.start0,
            seq=seq,
            codes=codes,
            symbols=sym,
            post=post,
            decode=self.decode,
            min_posterior=self.min_posterior,
            min_length=self.min_length,
            split_unknown=self.split_unknown,
            id_stem=item.id_stem,
            gene_filter=self.gene_filter,
        )
        gff_text = io.StringIO()
        tsv_text = io.StringIO()
        cds_text = io.StringIO() if self.want_cds else None
        prot_text = io.StringIO() if self.want_proteins else None
        # the stretch's own bases, in stretch positions (as the genes' pieces are)
        data.on_genes = self._gene_writer(item, lambda a, b: seq[a:b], cds_text, prot_text)
        n_feat = self.kind.write_record(data, GFF3Writer(gff_text, body_only=True), tsv_text)
        counts = data.counts
        del data
        out = RecordOutput(
            item.id,
            item.length,
            item.start0,
            item.end0,
            unknown,
            post.loglik,
            n_feat,
            gff_text.getvalue(),
            tsv_text.getvalue(),
            cds=cds_text.getvalue() if cds_text is not None else "",
            proteins=prot_text.getvalue() if prot_text is not None else "",
            counts=counts,
        )
        # tracks leave out the runs of unknown bases that cut features (record coordinates)
        spans = [
            (item.start0 + a, item.start0 + b)
            for a, b in track_spans(lambda a, b: sym[a:b], n, 0, n, self.split_unknown)
        ]
        columns = [post.values[:, g] for g in range(len(groups))]
        columns += [m.apply(post.values[:, g]).astype(np.float32) for g, m in self.calibrated]
        for values in columns:
            if self.want_bedgraph:
                out.bedgraph.append(
                    bedgraph_text(item.id, values, item.start0, self.precision, spans)
                )
            if self.want_bigwig:
                out.bigwig.append(bigwig_runs(values, item.start0, self.precision, spans))
        self.progress.advance(n - n // 2, item.id)
        return out

    def long_record(self, item: Item, writer: OutputWriter) -> RecordOutput:
        """The window-by-window path of a long record, written straight to the outputs."""
        from seqstate.kinds.stream import StreamRecord

        tables = self.tables
        order = tables.order
        start0 = item.start0
        n = item.bases
        self.progress.working(item.id, n)

        def read_bases(a: int, b: int) -> bytes:
            return item.read(start0 + a, start0 + b)

        def read_symbols(a: int, b: int) -> np.ndarray:
            return api.symbols_of(tables, read_bases(a, b), masked_unknown=self.masked_unknown)

        def read_codes(a: int, b: int) -> np.ndarray:
            lo = max(0, a - max(order, 1))  # a mask chain reads the base before too
            codes = api.encode_symbols(tables, read_symbols(lo, b))
            return codes[a - lo :]

        if self.check_symbols is not None:
            step = 1 << 22
            for a in range(0, n, step):
                self.check_symbols(item.id, read_bases(a, min(n, a + step)), start0 + a)
        rec = StreamRecord(
            model=self.model,
            tables=tables,
            groups=self.groups,
            state_group=self.state_group,
            seqid=item.id,
            n=n,
            offset0=start0,
            read_bases=read_bases,
            read_codes=read_codes,
            read_symbols=read_symbols,
            decode=self.decode,
            min_posterior=self.min_posterior,
            min_length=self.min_length,
            split_unknown=self.split_unknown,
            threads=self.jobs,
            window=window_length(self.model, self.kind, self.groups),
            on_genes=self._gene_writer(item, read_bases, writer.cds, writer.proteins),
            id_stem=item.id_stem,
            gene_filter=self.gene_filter,
        )

        piece_spans: dict[tuple[int, int], list[tuple[int, int]]] = {}

        def track_sink(g: int, a: int, values: np.ndarray) -> None:
            # ``a``: record coordinates (the stretch's offset included); the runs of
            # unknown bases that cut features are left out, as on the whole-record path
            key = (a, int(values.shape[0]))
            if key not in piece_spans:  # the same piece comes once per track group
                piece_spans.clear()
                b = a - start0 + key[1]
                piece_spans[key] = track_spans(read_symbols, n, a - start0, b, self.split_unknown)
            for s0, e0 in piece_spans[key]:
                piece = values[s0 - (a - start0) : e0 - (a - start0)]
                writer.track_piece(g, item.id, start0 + s0, piece)
                for i, (cg, m) in enumerate(self.calibrated):
                    if cg == g:
                        cal = m.apply(piece).astype(np.float32)
                        writer.track_piece(len(self.groups) + i, item.id, start0 + s0, cal)
            if g == 0:
                self.progress.advance(int(values.shape[0]), item.id)
                _stop_check()  # a stop signal swallowed on the way still ends a long record

        try:
            n_feat, loglik, unknown = self.kind.write_stream(
                rec, writer.gff_writer, writer.tsv, track_sink
            )
        finally:
            item.close()
        writer.end_track_record(item.id, item.length)
        writer.note_region(item.id, start0, item.end0)
        out = RecordOutput(item.id, item.length, start0, item.end0, unknown, loglik, n_feat)
        out.counts = rec.counts
        return out

    # ------------------------------------------------------------ the loop
    def run(
        self,
        items: Iterator[Item],
        writer: OutputWriter,
        on_record: Callable[[Item, RecordOutput], None],
    ) -> None:
        """Every item through the engine, outputs written in input order; ``on_record``
        is told each item and its figures as it is written (nothing is kept here)."""
        if self.jobs <= 1:
            for item in items:
                _stop_check()
                if item.long:
                    on_record(item, self.long_record(item, writer))
                else:
                    on_record(item, writer.put(self.short_record(item)))
            return
        pool = ThreadPoolExecutor(max_workers=self.jobs, thread_name_prefix="seqstate-record")
        pending: deque[tuple[Item, Future[RecordOutput]]] = deque()

        def write_first() -> None:
            item, fut = pending.popleft()
            on_record(item, writer.put(_result(fut, pending)))

        try:
            for item in items:
                _stop_check()
                if item.long:
                    while pending:
                        write_first()
                    on_record(item, self.long_record(item, writer))
                    continue
                pending.append((item, pool.submit(self.short_record, item)))
                while len(pending) > self.jobs:
                    write_first()
            while pending:
                write_first()
        finally:
            for item, fut in pending:
                fut.cancel()
                item.close()
            pool.shutdown(wait=False, cancel_futures=True)


def _stop_check() -> None:
    if stop_requested():
        raise KeyboardInterrupt


def _result(
    fut: Future[RecordOutput], others: deque[tuple[Item, Future[RecordOutput]]]
) -> RecordOutput:
    """The result of ``fut``, waiting in short steps so a stop signal is seen at once; a
    failure of any record still running stops the run now, not when its turn comes."""
    while True:
        try:
            return fut.result(timeout=0.25)
        except FutureTimeout:
            _stop_check()
            for _, other in others:
                if other.done() and not other.cancelled():
                    failure = other.exception()
                    if failure is not None:
                        raise failure from None


class OutputWriter:
    """The outputs of one run, written in input order (GFF3 header and bigWig at the end)."""

    def __init__(
        self,
        gff_target: TextIO,
        scratch: Path | None,
        tsv: TextIO,
        bedgraphs: list[tracks.BedGraphTrack],
        bedgraph_handles: list[TextIO],
        bigwig_paths: list[Path],
        precision: int,
        gff_comments: str = "",
    ) -> None:
        """``gff_comments``: ``#`` lines written after the GFF3 header, before the first
        feature (:func:`seqstate.io.gff3.comment_lines`)."""
        self._gff_target = gff_target
        if scratch is not None:
            self._gff: DeferredGFF3 | None = DeferredGFF3(gff_target, scratch / "features.gff3")
            self.gff_writer = self._gff.writer
            self._gff_body: io.StringIO | None = None
        else:  # standard output: the text is kept in memory and written at the end
            self._gff = None
            self._gff_body = io.StringIO()
            self.gff_writer = GFF3Writer(self._gff_body, body_only=True)
        if gff_comments:  # the body's first lines: the header goes before them
            if self._gff is not None:
                self._gff.write_text(gff_comments)
            elif self._gff_body is not None:
                self._gff_body.write(gff_comments)
        self.tsv = tsv
        self.bedgraphs = bedgraphs
        self._bedgraph_handles = bedgraph_handles
        self.bigwigs = [
            DeferredBigWig(p, _scratch_file(scratch, f"track{i}.runs"), precision)
            for i, p in enumerate(bigwig_paths)
        ]
        #: ``##sequence-region`` entries kept in memory (standard output only; an output
        #: folder's go to the GFF3's scratch file as they come)
        self.regions: list[tuple[str, int, int]] = []
        self.cds: TextIO | None = None
        self.proteins: TextIO | None = None

    def put(self, out: RecordOutput) -> RecordOutput:
        """Write one record's outputs (from the whole-record path)."""
        if out.gff:
            if self._gff is not None:
                self._gff.write_text(out.gff)
            elif self._gff_body is not None:
                self._gff_body.write(out.gff)
        if out.tsv:
            self.tsv.write(out.tsv)
        if out.cds and self.cds is not None:
            self.cds.write(out.cds)
        if out.proteins and self.proteins is not None:
            self.proteins.write(out.proteins)
        for g, text in enumerate(out.bedgraph):
            self._bedgraph_handles[g].write(text)
        for g, runs in enumerate(out.bigwig):
            self.bigwigs[g].add_runs(runs)
            self.bigwigs[g].end_record(out.id, out.length)
        self.note_region(out.id, out.start0, out.end0)
        hold_point("record-written")  # test-only, see seqstate.io.atomic.hold_point
        # the report keeps the figures only: text written is not held for the whole run
        return replace(out, gff="", tsv="", bedgraph=[], bigwig=[], cds="", proteins="")

    def track_piece(self, g: int, seqid: str, offset0: int, values: np.ndarray) -> None:
        """Consecutive values of a long record's track group ``g`` (record coordinates)."""
        if self.bedgraphs:
            self.bedgraphs[g].add(seqid, values, offset0)
        if self.bigwigs:
            self.bigwigs[g].add(seqid, values, offset0)

    def end_track_record(self, seqid: str, length: int) -> None:
        for track in self.bedgraphs:
            end_record = getattr(track, "end_record", None)
            if end_record is not None:
                end_record(seqid)
        for bw in self.bigwigs:
            bw.end_record(seqid, length)

    def note_region(self, seqid: str, start0: int, end0: int) -> None:
        """The ``##sequence-region`` of one stretch (0-based half-open in)."""
        if self._gff is not None:
            self._gff.add_region(seqid, start0 + 1, end0)
        else:
            self.regions.append((seqid, start0 + 1, end0))

    def finish(self) -> str | None:
        """Write the GFF3 header and lines, and the bigWig files; with standard output,
        return the GFF3 text instead."""
        for bw in self.bigwigs:
            bw.finish()
        if self._gff is not None:
            self._gff.finish()
            return None
        assert self._gff_body is not None
        return header_text(self.regions) + self._gff_body.getvalue()

    def abandon(self) -> None:
        if self._gff is not None:
            self._gff.abandon()
        for bw in self.bigwigs:
            bw.abandon()


def _scratch_file(scratch: Path | None, name: str) -> Path:
    if scratch is None:
        raise UsageError("bigWig tracks need an output folder")
    return scratch / name


def symbol_checker(model: Model, path: str) -> Callable[[str, bytes, int], None] | None:
    """For a model whose alphabet is not DNA: a check that every character is one of its
    symbols (either case), naming the record and the 1-based position."""
    if alphabet_check_of(model) is not None:
        return None
    allowed = set(model.alphabet) | set(model.alphabet.lower()) | set(model.alphabet.upper())
    ok = np.zeros(256, dtype=np.bool_)
    for ch in allowed:
        ok[ord(ch)] = True

    def check(record: str, seq: bytes, offset0: int) -> None:
        raw = np.frombuffer(seq, dtype=np.uint8)
        bad = np.flatnonzero(~ok[raw])
        if bad.size:
            i = int(bad[0])
            raise SequenceFormatError(
                f"position {offset0 + i + 1} has character {chr(raw[i])!r}, expected one of the "
                f"model's symbols {model.alphabet!r}",
                path=path,
                where=f"record '{record}'",
            )

    return check
