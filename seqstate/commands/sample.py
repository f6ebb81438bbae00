"""``seqstate sample``: draw synthetic records and their true labelled features."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from seqstate.commands.inputs import read_set
from seqstate.engine import api
from seqstate.engine.sampling import _CHUNK, _sample_chunk, chain_mask
from seqstate.errors import UsageError
from seqstate.io.atomic import OutputSet, check_outputs
from seqstate.io.fasta_stream import FastaStreamWriter
from seqstate.io.gff3 import GFF3Writer
from seqstate.io.tables import load_model
from seqstate.kinds import Group, Kind, group_index, kind_of, track_groups
from seqstate.model import Model

#: Largest sample run: records x length, in bases.  Records are drawn and written a
#: chunk of :data:`CHUNK_BASES` at a time, so memory does not grow with the length
#: (about 40 MB of work arrays); the limit bounds the run's time and disk.
MAX_SAMPLE_BASES = 250_000_000
#: Bases drawn (state path, symbols, FASTA text) per step of a record.
CHUNK_BASES = _CHUNK
#: Most records one sample run draws.
MAX_SAMPLE_RECORDS = 1_000_000


@dataclass
class SampleOptions:
    """Everything ``seqstate sample`` was asked to do."""

    model: str
    length: int
    records: int = 1
    seed: int = 0
    out_fasta: str = "sample.fa"
    truth_gff3: str | None = None
    prefix: str = "sim"
    width: int = 60
    force: bool = False


def check_prefix(prefix: str) -> str:
    """A record ID prefix: no whitespace or control characters (FASTA IDs end at a space)."""
    bad = [ch for ch in prefix if ch.isspace() or ord(ch) < 0x20 or ord(ch) == 0x7F]
    if bad:
        raise UsageError(
            f"--prefix {prefix!r} holds {bad[0]!r}: record IDs cannot contain whitespace or "
            "control characters"
        )
    return prefix


@dataclass
class SampleReport:
    """What a sample run drew and wrote."""

    records: int
    length: int
    #: true features written to the truth GFF3 (0 without one)
    features: int
    out_fasta: str
    truth_gff3: str | None

    def summary(self) -> str:
        """The summary line (after ``seqstate: ``)."""
        truth = f", {self.features} true feature(s) -> {self.truth_gff3}" if self.truth_gff3 else ""
        return f"{self.records} record(s) of {self.length} bases -> {self.out_fasta}{truth}"


def sample(opts: SampleOptions) -> SampleReport:
    """Draw records and their true paths; write FASTA and the truth as GFF3.

    Both files are checked by :func:`seqstate.io.atomic.check_outputs` before
    anything is drawn and committed together.  The truth is written by the
    model's kind (segments, or gene hierarchies).
    """
    if opts.length < 1:
        raise UsageError(f"--length {opts.length} must be at least 1")
    if opts.records < 1:
        raise UsageError(f"--records {opts.records} must be at least 1")
    if opts.seed < 0:
        raise UsageError(f"--seed {opts.seed} must be 0 or more")
    check_prefix(opts.prefix)
    if not opts.out_fasta:
        raise UsageError("-o/--out is empty: expected a FASTA file name")
    if opts.truth_gff3 is not None and not opts.truth_gff3:
        raise UsageError("--truth is empty: expected a GFF3 file name")
    if "-" in (opts.out_fasta, opts.truth_gff3):
        raise UsageError("sample writes files: '-' (standard output) is not accepted")
    if opts.records > MAX_SAMPLE_RECORDS:
        raise UsageError(
            f"--records {opts.records:,} is more than the limit of {MAX_SAMPLE_RECORDS:,} records"
        )
    if opts.length * opts.records > MAX_SAMPLE_BASES:
        raise UsageError(
            f"--records {opts.records:,} x --length {opts.length:,} = "
            f"{opts.length * opts.records:,} bases is more than the limit of "
            f"{MAX_SAMPLE_BASES:,} bases per sample run; draw fewer or shorter records"
        )
    reads = read_set(model=opts.model)
    check_outputs([opts.out_fasta, opts.truth_gff3], reads, force=opts.force)
    model = load_model(opts.model)
    draw = Sampler(api.prepare(model))
    groups = track_groups(model)
    kind = kind_of(model)
    rng = np.random.default_rng(opts.seed)
    alphabet = np.frombuffer(model.alphabet.encode("ascii"), dtype=np.uint8)
    masker = _Masker(model, opts.seed)
    ids = [f"{opts.prefix}{r + 1}" for r in range(opts.records)]
    desc = f"synthetic, sampled from model {model.name} seed {opts.seed}"
    n_features = 0
    with OutputSet(force=opts.force, inputs=reads) as outs:
        fasta = FastaStreamWriter(outs.open_text(opts.out_fasta), width=opts.width)
        gff = None
        if opts.truth_gff3:
            gff = GFF3Writer(outs.open_text(opts.truth_gff3))
            gff.header([(rid, 1, opts.length) for rid in ids])
        for rid in ids:
            fasta.start(rid, desc)
            masker.start()
            truth = None if gff is None else TruthPieces(kind, model, groups, gff, rid)
            for path, sym in draw.chunks(opts.length, rng):
                fasta.write(masker.letters(alphabet[sym], path))
                if truth is not None:
                    truth.add(path)
            fasta.end()
            if truth is not None:
                n_features += truth.finish()
    return SampleReport(opts.records, opts.length, n_features, opts.out_fasta, opts.truth_gff3)


class _Masker:
    """Soft-masking of sampled bases by the model's mask table (P(masked | state)).

    A model without a mask table writes its letters as they are.  With one, each base
    is written in lower case with its state's probability (for a mask chain, the
    column of what the base before was: none at the record start, masked, unmasked),
    from a generator of its own (seeded by the run's seed and a constant), so the bases
    and states drawn are those of a run without the mask table, case apart.
    """

    def __init__(self, model: Model, seed: int) -> None:
        self.mask = model.mask
        self.rng = np.random.default_rng([seed, 0x6D61736B]) if self.mask is not None else None
        self.prev = 0  # mask chain: what the base before was (0 none, 1 masked, 2 unmasked)

    def start(self) -> None:
        """A new record: no base before the first."""
        self.prev = 0

    def letters(self, letters: np.ndarray, path: np.ndarray) -> bytes:
        """The bytes of one chunk: ``letters`` (upper case) with its masked bases lowered."""
        if self.mask is None or self.rng is None:
            return letters.tobytes()
        u = self.rng.random(path.shape[0])
        if self.mask.ndim == 1:
            masked = u < self.mask[path]
        else:
            masked = np.empty(path.shape[0], dtype=np.bool_)
            self.prev = chain_mask(u, path, self.mask, self.prev, masked)
        out = letters.copy()
        out[masked] = np.frombuffer(bytes(out[masked]).lower(), dtype=np.uint8)
        return out.tobytes()


class Sampler:
    """The draws of :func:`seqstate.engine.sampling.sample_record`, a chunk at a time.

    The same cumulative tables and the same uniforms (two per base, drawn per chunk of
    :data:`CHUNK_BASES`), so a seed gives the bytes ``sample_record`` gives, in pieces of
    bounded memory; the tables are built once per run, not once per record.
    """

    def __init__(self, tables: api.EngineTables) -> None:
        m, a = tables.n_states, tables.n_symbols
        self.tables = tables
        start = tables.start / tables.start.sum()
        trans = tables.transitions / tables.transitions.sum(axis=1, keepdims=True)
        self.start_cdf = np.cumsum(start)
        self.trans_cdf = np.cumsum(trans, axis=1)
        n_codes = tables.E.shape[0]
        self.emit_cdf = np.zeros((n_codes, m))
        for j in range(tables.order + 1):
            lo, hi = tables.offsets[j], tables.offsets[j + 1]
            block = tables.E[lo:hi].reshape(-1, a, m)
            cdf = np.cumsum(block, axis=1) / block.sum(axis=1, keepdims=True)
            self.emit_cdf[lo:hi] = cdf.reshape(-1, m)

    def chunks(
        self, length: int, rng: np.random.Generator
    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
        """One record of ``length`` bases: (state path int32, symbol indices int8) per chunk."""
        t = self.tables
        state, ctx = 0, 0
        for lo in range(0, length, CHUNK_BASES):
            hi = min(length, lo + CHUNK_BASES)
            path = np.empty(hi - lo, dtype=np.int32)
            sym = np.empty(hi - lo, dtype=np.int8)
            u = rng.random(2 * (hi - lo))
            state, ctx = _sample_chunk(
                u,
                lo,
                state,
                ctx,
                self.start_cdf,
                self.trans_cdf,
                self.emit_cdf,
                t.offsets,
                t.order,
                t.n_symbols,
                path,
                sym,
            )
            yield path, sym


class TruthPieces:
    """The truth of one record from its path in chunks, written piece by piece.

    The path is cut between two positions in states of :meth:`Kind.truth_cuts` (no
    feature crosses such a cut); each piece's truth is written as soon as the piece is
    whole, numbered on from the pieces before.  Memory: the path since the last cut.
    """

    def __init__(
        self, kind: Kind, model: Model, groups: list[Group], gff: GFF3Writer, seqid: str
    ) -> None:
        self.kind, self.model, self.groups, self.gff, self.seqid = kind, model, groups, gff, seqid
        self.state_group = group_index(model, groups)
        self.cut = kind.truth_cuts(model)
        self.numbers: list[int] = []
        self.pending: list[np.ndarray] = []
        self.start0 = 0  # record position of the first pending base
        self.written = 0

    def add(self, path: np.ndarray) -> None:
        """The next chunk of the path."""
        c = self.cut[path]
        ok = np.flatnonzero(c[1:] & c[:-1]) + 1  # cut before chunk position j
        if self.pending and c[0] and self.cut[self.pending[-1][-1]]:
            ok = np.concatenate([[0], ok])
        if ok.shape[0] == 0:
            self.pending.append(path)
            return
        j = int(ok[-1])
        self.pending.append(path[:j])
        self._write()
        self.pending = [path[j:]]

    def _write(self) -> None:
        piece = np.concatenate(self.pending) if len(self.pending) > 1 else self.pending[0]
        if piece.shape[0]:
            truth = self.kind.truth_of(piece, self.model, self.state_group)
            self.written += self.kind.write_truth(
                self.gff, self.model, self.groups, truth, self.seqid, self.start0, self.numbers
            )
        self.start0 += piece.shape[0]

    def finish(self) -> int:
        """Write the last piece; the features written for the record."""
        self._write()
        self.pending = []
        return self.written
