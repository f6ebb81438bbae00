"""``seqstate sample``: draw synthetic records and their true labelled features."""

from __future__ import annotations

import io
from dataclasses import dataclass

import numpy as np

from seqstate.commands.inputs import model_inputs
from seqstate.engine import api
from seqstate.engine.sampling import sample_record
from seqstate.errors import UsageError
from seqstate.io.atomic import OutputSet, check_outputs
from seqstate.io.fasta import Record, write_fasta
from seqstate.io.gff3 import GFF3Writer
from seqstate.io.tables import load_model
from seqstate.kinds import group_index, kind_of, track_groups

#: Largest sample run: records x length, in bases (each base costs about 6 bytes of
#: memory while it is drawn: the state path, the symbol and the FASTA text).
MAX_SAMPLE_BASES = 250_000_000
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
            f"{MAX_SAMPLE_BASES:,} bases per sample run (about "
            f"{MAX_SAMPLE_BASES * 6 / 2**30:.1f} GiB of memory); draw fewer or shorter records"
        )
    check_outputs([opts.out_fasta, opts.truth_gff3], model_inputs(opts.model), force=opts.force)
    model = load_model(opts.model)
    tables = api.prepare(model)
    groups = track_groups(model)
    state_group = group_index(model, groups)
    kind = kind_of(model)
    rng = np.random.default_rng(opts.seed)
    alphabet = np.frombuffer(model.alphabet.encode("ascii"), dtype=np.uint8)
    records, truths = [], []
    for r in range(opts.records):
        rid = f"{opts.prefix}{r + 1}"
        path, sym = sample_record(tables, opts.length, rng)
        records.append(
            Record(
                rid,
                f"synthetic, sampled from model {model.name} seed {opts.seed}",
                alphabet[sym].tobytes(),
            )
        )
        truths.append((rid, kind.truth_of(path, model, state_group)))
    n_features = 0
    truth_text = io.StringIO()  # written with the FASTA below, as one output set
    if opts.truth_gff3:
        gff = GFF3Writer(truth_text)
        gff.header([(rec.id, 1, len(rec.seq)) for rec in records])
        for rid, truth in truths:
            n_features += kind.write_truth(gff, model, groups, truth, rid)
    with OutputSet(force=opts.force, inputs=model_inputs(opts.model)) as outs:
        write_fasta(outs.open_text(opts.out_fasta), records, width=opts.width)
        if opts.truth_gff3:
            outs.open_text(opts.truth_gff3).write(truth_text.getvalue())
    return SampleReport(opts.records, opts.length, n_features, opts.out_fasta, opts.truth_gff3)
