"""A seeded campaign of hostile runs of the CLI, in-process through click's test runner.

Each run copies a set of small valid inputs (synthetic FASTA, GFF3, GTF, BED, a record-ID
list, a copy of the built-in ``cpg-island`` model folder and two annotate run folders) into
a fresh folder, damages one of them or the options (a seeded RNG picks how), runs one
command and checks four rules (README "Exit codes" and the overwrite rule of io/atomic.py):

* ``traceback``: the exit status is 0, 1 or 2 (130, interrupted, counts here too: no
  signal is sent), the run raised nothing but SystemExit, and no ``Traceback`` appears
  in its output;
* ``invalid_output``: after exit 0 every file the run wrote parses (GFF3 by seqstate's
  reader, JSON, TSV with one column count, FASTA, bedGraph, .fai, bigWig by pyBigWig);
* ``left_behind``: after a non-zero exit the run left no new file;
* ``input_overwritten``: every input is byte-identical afterwards.

:func:`battery` is every (command, input, damage) combination once; :func:`campaign` draws
runs at random from the same space until a run count or a time limit.  Both are
deterministic for a seed, so a failing case (printed as a :class:`Case`) reproduces.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import shutil
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.io.tables import builtin_dir

ALLOWED_EXIT = (0, 1, 2, 130)
RULES = ("traceback", "invalid_output", "left_behind", "input_overwritten")

# ------------------------------------------------------------------ the valid inputs


def _dna(rng: np.random.Generator, n: int, gc: float) -> str:
    p = [(1 - gc) / 2, gc / 2, gc / 2, (1 - gc) / 2]
    return "".join(rng.choice(list("ACGT"), size=n, p=p))


def make_inputs(root: Path) -> None:
    """Write the valid inputs (synthetic) into ``root/in`` and two annotate groups."""
    rng = np.random.default_rng(7)
    d = root / "in"
    d.mkdir(parents=True)
    r1 = _dna(rng, 1200, 0.4) + _dna(rng, 600, 0.7) + _dna(rng, 1200, 0.4)
    recs = {"r1": r1, "r2": _dna(rng, 900, 0.5), "r3": _dna(rng, 60, 0.5)}
    with open(d / "x.fa", "w") as fh:
        for rid, seq in recs.items():
            fh.write(f">{rid} synthetic record\n")
            fh.writelines(seq[i : i + 60] + "\n" for i in range(0, len(seq), 60))
    (d / "x.gff3").write_text(
        "##gff-version 3\n##sequence-region r1 1 3000\n##sequence-region r2 1 900\n"
        "r1\tsyn\tCpG_island\t1201\t1800\t.\t.\t.\tID=i1\n"
        "r2\tsyn\tCpG_island\t101\t400\t.\t+\t.\tID=i2;Note=a%3Bb\n"
    )
    (d / "p.gff3").write_text(
        "##gff-version 3\n##sequence-region r1 1 3000\n"
        "r1\tsyn\tCpG_island\t1151\t1790\t.\t.\t.\tID=p1\n"
        "r1\tsyn\tCpG_island\t2001\t2300\t.\t.\t.\tID=p2\n"
    )
    (d / "x.gtf").write_text(
        'r1\tsyn\tgene\t101\t700\t.\t+\t.\tgene_id "g1";\n'
        'r1\tsyn\ttranscript\t101\t700\t.\t+\t.\tgene_id "g1"; transcript_id "t1";\n'
        'r1\tsyn\tCDS\t101\t300\t.\t+\t0\tgene_id "g1"; transcript_id "t1";\n'
        'r1\tsyn\tCDS\t501\t700\t.\t+\t1\tgene_id "g1"; transcript_id "t1";\n'
    )
    (d / "r.bed").write_text("r1\t1100\t1900\treg1\t0\t+\nr2\t0\t500\treg2\t0\t.\n")
    (d / "ids.txt").write_text("r1\nr3\n")
    shutil.copytree(builtin_dir() / "cpg-island", d / "m")
    for name, ids in (("g1", "r1"), ("g2", "r2,r3")):
        res = CliRunner().invoke(
            main, ["annotate", str(d / "x.fa"), "-o", str(d / name), "--records", ids, "-q"]
        )
        assert res.exit_code == 0, res.output


# ------------------------------------------------------------------ commands


#: Per command: its arguments from (input folder, output folder).  ``{in}`` / ``{out}``.
COMMANDS: dict[str, list[str]] = {
    "annotate": ["annotate", "{in}/x.fa", "-m", "{in}/m", "-o", "{out}/a", "-q"],
    "annotate_viterbi": [
        "annotate", "{in}/x.fa", "-m", "{in}/m", "-o", "{out}/a", "--decode", "viterbi",
        "--tracks", "both", "--records-file", "{in}/ids.txt", "-q",
    ],
    "annotate_report": [
        "annotate", "{in}/x.fa", "-o", "{out}/a", "--report", "r.html", "--truth",
        "{in}/x.gff3", "-q",
    ],
    "annotate_region": ["annotate", "{in}/x.fa", "-o", "{out}/a", "--region", "r1:1001-2500", "-q"],
    "score_bed": ["score", "{in}/x.fa", "--regions", "{in}/r.bed", "-m", "{in}/m",
                  "-o", "{out}/s.tsv", "--gff", "{out}/s.gff3", "-q"],
    "score_gff3": ["score", "{in}/x.fa", "--regions", "{in}/x.gff3", "-o", "{out}/s.tsv", "-q"],
    "compare_tsv": ["compare", "{in}/p.gff3", "{in}/x.gff3", "-o", "{out}/c.tsv", "-q"],
    "compare_json": ["compare", "{in}/p.gff3", "{in}/x.gff3", "-o", "{out}/c.json",
                     "--gene-list", "{out}/genes.tsv", "-q"],
    "compare_gtf": ["compare", "{in}/x.gtf", "{in}/x.gtf", "--type", "CDS",
                    "-o", "{out}/c.tsv", "-q"],
    "sample": ["sample", "{in}/m", "--length", "700", "--records", "2", "--seed", "3",
               "-o", "{out}/s.fa", "--truth", "{out}/t.gff3", "-q"],
    "index": ["index", "{in}/x.fa", "-q"],
    "model_check": ["model", "check", "{in}/m"],
    "merge": ["merge", "{in}/g1", "{in}/g2", "-o", "{out}/mg", "--fasta", "{in}/x.fa", "-q"],
    "calibrate_sampled": ["calibrate", "{in}/m", "--length", "400", "--records", "2",
                          "-o", "{out}/cal.tsv", "-q"],
    "calibrate_truth": ["calibrate", "{in}/m", "--fasta", "{in}/x.fa", "--truth",
                        "{in}/x.gff3", "-o", "{out}/cal.json", "-q"],
    "fit": ["fit", "{in}/x.fa", "-m", "{in}/m", "--labels", "{in}/x.gff3",
            "-o", "{out}/fm", "-q"],
}  # fmt: skip

#: The inputs each command reads (relative to the input folder), the ones a damage hits.
READS: dict[str, list[str]] = {
    "annotate": ["x.fa", "m/model.toml", "m/transitions.tsv", "m/emissions.tsv", "m/start.tsv"],
    "annotate_viterbi": ["x.fa", "ids.txt", "m/model.toml", "m/emissions.tsv"],
    "annotate_report": ["x.fa", "x.gff3"],
    "annotate_region": ["x.fa"],
    "score_bed": ["x.fa", "r.bed", "m/model.toml", "m/transitions.tsv"],
    "score_gff3": ["x.fa", "x.gff3"],
    "compare_tsv": ["p.gff3", "x.gff3"],
    "compare_json": ["p.gff3", "x.gff3"],
    "compare_gtf": ["x.gtf"],
    "sample": ["m/model.toml", "m/start.tsv", "m/transitions.tsv", "m/emissions.tsv"],
    "index": ["x.fa"],
    "model_check": ["m/model.toml", "m/start.tsv", "m/transitions.tsv", "m/emissions.tsv"],
    "merge": [
        "x.fa", "g1/x.run.json", "g2/x.run.json", "g1/x.gff3", "g2/x.features.tsv",
        "g1/x.CpG_island.bedgraph",
    ],
    "calibrate_sampled": ["m/model.toml", "m/emissions.tsv"],
    "calibrate_truth": ["x.fa", "x.gff3", "m/model.toml"],
    "fit": ["x.fa", "x.gff3", "m/model.toml"],
}  # fmt: skip

# ------------------------------------------------------------------ damage

HOSTILE = [
    b"\x00", b"\t", b"\n", b"\r", b"\r\n", b"%0A", b"%09", b"-5", b"0", b"99999999999999999999",
    b"1e309", b"nan", b"inf", b"1_0", b"\xff\xfe", b"\xc3", b"=", b";", b",", b">", b"#", b" ",
    b'"', b"[", b"]", b"{", b"1979-05-27T07:32:00Z", b"\x1b[31m", b"../../secret.txt",
]  # fmt: skip


def _lines(data: bytes) -> list[bytes]:
    return data.splitlines(keepends=True) or [b""]


def _flip(data: bytes, rng: np.random.Generator) -> bytes:
    if not data:
        return b"\x00"
    i = int(rng.integers(len(data)))
    return data[:i] + bytes([int(rng.integers(256))]) + data[i + 1 :]


def _insert(data: bytes, rng: np.random.Generator) -> bytes:
    i = int(rng.integers(len(data) + 1))
    return data[:i] + HOSTILE[int(rng.integers(len(HOSTILE)))] + data[i:]


def _drop_line(data: bytes, rng: np.random.Generator) -> bytes:
    ls = _lines(data)
    del ls[int(rng.integers(len(ls)))]
    return b"".join(ls)


def _dup_line(data: bytes, rng: np.random.Generator) -> bytes:
    ls = _lines(data)
    i = int(rng.integers(len(ls)))
    return b"".join(ls[: i + 1] + ls[i:])


def _swap_lines(data: bytes, rng: np.random.Generator) -> bytes:
    ls = _lines(data)
    i, j = (int(x) for x in rng.integers(len(ls), size=2))
    ls[i], ls[j] = ls[j], ls[i]
    return b"".join(ls)


def _truncate(data: bytes, rng: np.random.Generator) -> bytes:
    return data[: int(rng.integers(len(data) + 1))]


def _empty(data: bytes, rng: np.random.Generator) -> bytes:
    return b""


def _number(data: bytes, rng: np.random.Generator) -> bytes:
    # one number of the text replaced by a hostile one (negative, huge, zero, not finite)
    import re

    spots = [m.span() for m in re.finditer(rb"-?\d+(\.\d+)?(e-?\d+)?", data)]
    if not spots:
        return _insert(data, rng)
    a, b = spots[int(rng.integers(len(spots)))]
    new = [b"-1", b"0", b"2147483648", b"18446744073709551617", b"1e400", b"-0", b"nan",
           b"0.5", b"1_0", b"+3", b"0x10"][int(rng.integers(11))]  # fmt: skip
    return data[:a] + new + data[b:]


def _field(data: bytes, rng: np.random.Generator) -> bytes:
    # one tab- or space-separated field of one line replaced by a hostile token
    ls = _lines(data)
    i = int(rng.integers(len(ls)))
    sep = b"\t" if b"\t" in ls[i] else b" "
    parts = ls[i].rstrip(b"\r\n").split(sep)
    k = int(rng.integers(len(parts)))
    parts[k] = HOSTILE[int(rng.integers(len(HOSTILE)))]
    ls[i] = sep.join(parts) + b"\n"
    return b"".join(ls)


def _gzip(data: bytes, rng: np.random.Generator) -> bytes:
    import gzip

    z = gzip.compress(data, mtime=0)
    return z[: int(rng.integers(len(z) // 2, len(z) + 1))]  # gzip, maybe cut short


def _deep_json(data: bytes, rng: np.random.Generator) -> bytes:
    depth = int(rng.choice([50, 5000, 100_000]))
    return b"[" * depth + b"]" * depth


def _type_swap(data: bytes, rng: np.random.Generator) -> bytes:
    # a JSON value of another type: a list, a string, null, a dict, a negative number
    try:
        doc = json.loads(data)
    except ValueError:
        return _insert(data, rng)
    if not isinstance(doc, dict) or not doc:
        return _insert(data, rng)
    keys = sorted(doc)
    key = keys[int(rng.integers(len(keys)))]
    target = doc
    if (
        isinstance(doc[key], list)
        and doc[key]
        and isinstance(doc[key][0], dict)
        and rng.random() < 0.6
    ):
        target = doc[key][0]
        inner = sorted(target)
        key = inner[int(rng.integers(len(inner)))]
    target[key] = [[], "x", None, {}, -5, 0, 1.5, ["a"], "../../secret.txt"][int(rng.integers(9))]
    return json.dumps(doc).encode()


Damage = Callable[[bytes, np.random.Generator], bytes]
DAMAGES: dict[str, Damage] = {
    "flip": _flip,
    "insert": _insert,
    "drop_line": _drop_line,
    "dup_line": _dup_line,
    "swap_lines": _swap_lines,
    "truncate": _truncate,
    "empty": _empty,
    "number": _number,
    "field": _field,
    "gzip": _gzip,
    "deep_json": _deep_json,
    "type_swap": _type_swap,
}
JSON_ONLY = ("deep_json", "type_swap")

# option damages: the argument list changed; {in} and {out} as in COMMANDS
OPTION_VALUES = ["-1", "0", "", "abc", "1e308", "nan", "9223372036854775808", "r9:1-10",
                 "r1:10-5", "r1:0-3", "-", "{in}/x.fa", "{in}/m/model.toml", "\t",
                 "%0A"]  # fmt: skip


def _opt_value(args: list[str], rng: np.random.Generator) -> list[str]:
    opts = [i for i, a in enumerate(args) if a.startswith("-") and i + 1 < len(args)]
    opts = [i for i in opts if not args[i + 1].startswith("-")]
    if not opts:
        return args
    i = opts[int(rng.integers(len(opts)))]
    return args[: i + 1] + [OPTION_VALUES[int(rng.integers(len(OPTION_VALUES)))]] + args[i + 2 :]


#: outputs aimed at inputs, always with --force: the overwrite rule must refuse them
OVERWRITES: dict[str, list[list[str]]] = {
    "annotate": [
        ["-o", "{in}/m", "--report", "transitions.tsv", "--force"],
        ["-o", "{in}/m", "--report", "model.toml", "--force"],
        ["-o", "{in}", "--stem", "y", "--report", "x.fa", "--force"],
        ["-o", "{in}", "--report", "ids.txt", "--records-file", "{in}/ids.txt", "--force"],
        ["-o", "{in}", "--stem", "x", "--report", "r.html", "--truth", "{in}/x.gff3", "--force"],
    ],
    "score_bed": [["-o", "{in}/r.bed", "--force"], ["--gff", "{in}/r.bed", "--force"],
                  ["-o", "{in}/m/transitions.tsv", "--force"]],
    "compare_tsv": [["-o", "{in}/p.gff3", "--force"], ["-o", "{in}/x.gff3", "--force"]],
    "sample": [["-o", "{in}/m/emissions.tsv", "--force"],
               ["--truth", "{in}/m/transitions.tsv", "--force"]],
    "calibrate_sampled": [["-o", "{in}/m/start.tsv", "--force"]],
    "calibrate_truth": [["-o", "{in}/x.gff3", "--force"]],
    "merge": [["-o", "{in}/g1", "--force"]],
    "fit": [["-o", "{in}/m", "--force"]],
}  # fmt: skip


def _with(args: list[str], extra: list[str]) -> list[str]:
    """``args`` with the options of ``extra`` replacing theirs (or added)."""
    out = list(args)
    i = 0
    while i < len(extra):
        opt = extra[i]
        has_value = i + 1 < len(extra) and not extra[i + 1].startswith("--")
        if opt in out and has_value:
            out[out.index(opt) + 1] = extra[i + 1]
        elif opt not in out:
            out += [opt, extra[i + 1]] if has_value else [opt]
        i += 2 if has_value else 1
    return out


# ------------------------------------------------------------------ one run


@dataclass(frozen=True)
class Case:
    """One run: the command, what was damaged (``target`` a file or ``options``), how,
    and the seed of the damage."""

    command: str
    target: str
    damage: str
    seed: int

    def __str__(self) -> str:
        return f"{self.command} / {self.target} / {self.damage} / seed {self.seed}"


@dataclass
class Outcome:
    case: Case
    exit_code: int
    #: rules broken (see the module text), with a short symptom each
    broken: list[tuple[str, str]] = field(default_factory=list)


def _digests(folder: Path) -> dict[str, str]:
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file() and not p.is_symlink()
    }


def _protected(command: str, args: list[str], d_in: Path) -> set[str]:
    """The files of the input folder the run reads: READS, every file named in the
    arguments, and every file of a folder named there (a model, a group), -o aside."""
    out = set(READS[command])
    for i, a in enumerate(args):
        p = Path(a)
        if not a.startswith(str(d_in)) or (i > 0 and args[i - 1] in ("-o", "--out")):
            continue
        if p.is_file():
            out.add(str(p.relative_to(d_in)))
        elif p.is_dir():
            out |= {str(q.relative_to(d_in)) for q in p.rglob("*") if q.is_file()}
    return out


def _fill(args: list[str], d_in: Path, d_out: Path) -> list[str]:
    return [a.replace("{in}", str(d_in)).replace("{out}", str(d_out)) for a in args]


def run_case(case: Case, base: Path, work: Path) -> Outcome:
    """Copy the inputs under ``base`` to ``work`` (fresh), damage, run, check."""
    if work.exists():
        shutil.rmtree(work)
    d_in, d_out = work / "in", work / "out"
    shutil.copytree(base / "in", d_in, symlinks=True)
    d_out.mkdir()
    rng = np.random.default_rng(case.seed)
    args = list(COMMANDS[case.command])
    if case.target == "options":
        if case.damage == "overwrite":
            choices = OVERWRITES[case.command]
            args = _with(args, choices[case.seed % len(choices)])
        elif case.damage == "value":
            args = _opt_value(args, rng)
        # "none": the valid run itself
    else:
        p = d_in / case.target
        p.write_bytes(DAMAGES[case.damage](p.read_bytes(), rng))
    args = _fill(args, d_in, d_out)
    protected = _protected(case.command, args, d_in)
    before = _digests(d_in)
    cwd = os.getcwd()
    os.chdir(d_out)  # relative names (a damaged option value) land in the run's folder
    try:
        res = CliRunner().invoke(main, args, catch_exceptions=True)
    finally:
        os.chdir(cwd)
    out = Outcome(case, res.exit_code)
    text = (res.stdout or "") + (res.stderr or "")
    if res.exit_code not in ALLOWED_EXIT:
        out.broken.append(("traceback", f"exit {res.exit_code}"))
    elif res.exit_code == 130:  # no signal is ever sent here: an error reported as one
        out.broken.append(("traceback", "exit 130 'interrupted' without a signal"))
    if res.exception is not None and not isinstance(res.exception, SystemExit):
        out.broken.append(("traceback", f"{type(res.exception).__name__}: {res.exception}"[:160]))
    elif "Traceback" in text:
        out.broken.append(("traceback", "'Traceback' in the output"))
    after = _digests(d_in)
    changed = sorted(k for k in before if after.get(k) != before[k])
    lost = [k for k in changed if k in protected]
    if lost:
        out.broken.append(("input_overwritten", ", ".join(lost)[:160]))
    new_in = sorted(set(after) - set(before))
    new_out = sorted(str(p.relative_to(d_out)) for p in d_out.rglob("*") if p.is_file())
    written = [d_in / k for k in new_in] + [d_out / k for k in new_out]
    if res.exit_code != 0 and written:
        names = ", ".join(str(p.relative_to(work)) for p in written)
        out.broken.append(("left_behind", names[:160]))
    if res.exit_code == 0:
        for p in written + [d_in / k for k in changed if (d_in / k).exists()]:
            why = invalid_reason(p)
            if why:
                out.broken.append(("invalid_output", f"{p.relative_to(work)}: {why}"[:160]))
    return out


# ------------------------------------------------------------------ output checks


def invalid_reason(path: Path) -> str | None:
    """Why a file a successful run wrote does not parse, or None."""
    name = path.name
    data = path.read_bytes()
    try:
        if name.endswith(".gff3"):
            from seqstate.io.gff3 import read_gff3, read_sequence_regions

            regions = read_sequence_regions(path)
            for f in read_gff3(path):
                if not 0 <= f.start0 < f.end0:
                    return f"feature {f.start0}-{f.end0}"
                if f.seqid in regions and not (
                    regions[f.seqid][0] <= f.start0 and f.end0 <= regions[f.seqid][1]
                ):
                    return f"feature past its ##sequence-region ({f.seqid})"
        elif name.endswith(".json"):
            json.loads(data)
        elif name.endswith(".tsv"):
            rows = [r for r in data.decode("utf-8").split("\n") if r and not r.startswith("#")]
            widths = {r.count("\t") for r in rows}
            if len(widths) > 1 or "\r" in data.decode():
                return f"rows of {sorted(w + 1 for w in widths)} columns"
        elif name.endswith((".fa", ".fna", ".faa")):
            from seqstate.io.fasta import iter_fasta

            if not list(iter_fasta(path, alphabet_check=None)):
                return "no record"
        elif name.lower().endswith(".bedgraph"):
            for row in data.decode("utf-8").splitlines():
                if row.startswith(("track", "#")):
                    continue
                _, a, b, v = row.split("\t")
                if not (0 <= int(a) < int(b)) or not math.isfinite(float(v)):
                    return f"line {row!r}"
        elif name.endswith(".fai"):
            for row in data.decode("utf-8").splitlines():
                cols = row.split("\t")
                if len(cols) != 5 or any(int(c) < 0 for c in cols[1:]):
                    return f"line {row!r}"
        elif name.endswith(".bw"):
            try:
                import pyBigWig
            except ImportError:
                return None
            bw = pyBigWig.open(str(path))
            if bw is None or not bw.isBigWig():
                return "not a bigWig"
            if any(not 0 < n < 2**31 for n in bw.chroms().values()):
                return f"chromosome lengths {bw.chroms()}"
        elif name.endswith(".toml"):
            from seqstate.io.tables import load_model

            load_model(str(path.parent))
    except Exception as exc:  # any failure to read back is the finding
        return f"{type(exc).__name__}: {exc}"
    return None


# ------------------------------------------------------------------ battery, campaign


def _damages_for(target: str) -> list[str]:
    return [d for d in DAMAGES if target.endswith(".json") or d not in JSON_ONLY]


def battery(seed: int = 1) -> list[Case]:
    """Every (command, input it reads, damage) once, plus option and overwrite cases."""
    cases = []
    for cmd in COMMANDS:
        for target in READS[cmd]:
            for dmg in _damages_for(target):
                cases.append(Case(cmd, target, dmg, seed))
        for k in range(3):
            cases.append(Case(cmd, "options", "value", seed + k))
        for k in range(len(OVERWRITES.get(cmd, []))):
            cases.append(Case(cmd, "options", "overwrite", k))
    return cases


def random_cases(seed: int) -> Iterator[Case]:
    """An endless seeded stream of cases drawn from the battery's space."""
    rng = np.random.default_rng(seed)
    cmds = sorted(COMMANDS)
    while True:
        cmd = cmds[int(rng.integers(len(cmds)))]
        r = rng.random()
        s = int(rng.integers(2**31))
        if r < 0.1 and cmd in OVERWRITES:
            yield Case(cmd, "options", "overwrite", s)
        elif r < 0.2:
            yield Case(cmd, "options", "value", s)
        else:
            target = READS[cmd][int(rng.integers(len(READS[cmd])))]
            dmgs = _damages_for(target)
            yield Case(cmd, target, dmgs[int(rng.integers(len(dmgs)))], s)


@dataclass
class Tally:
    runs: int = 0
    seconds: float = 0.0
    exits: dict[int, int] = field(default_factory=dict)
    counts: dict[str, int] = field(default_factory=lambda: dict.fromkeys(RULES, 0))
    failures: list[tuple[Case, str, str]] = field(default_factory=list)

    def add(self, out: Outcome) -> None:
        self.runs += 1
        self.exits[out.exit_code] = self.exits.get(out.exit_code, 0) + 1
        for rule in {r for r, _ in out.broken}:
            self.counts[rule] += 1
        for rule, symptom in out.broken:
            self.failures.append((out.case, rule, symptom))

    def lines(self) -> list[str]:
        exits = dict(sorted(self.exits.items()))
        out = [f"runs {self.runs} in {self.seconds:.0f} s; exit codes {exits}"]
        out += [f"{rule}: {self.counts[rule]}" for rule in RULES]
        return out


def run_cases(
    cases: Iterator[Case] | list[Case],
    base: Path,
    work: Path,
    *,
    max_runs: int | None = None,
    max_seconds: float | None = None,
    on_outcome: Callable[[Outcome], None] | None = None,
) -> Tally:
    """Run cases until they end, ``max_runs`` runs or ``max_seconds`` seconds."""
    tally = Tally()
    t0 = time.monotonic()
    for case in cases:
        if max_runs is not None and tally.runs >= max_runs:
            break
        if max_seconds is not None and time.monotonic() - t0 > max_seconds:
            break
        out = run_case(case, base, work)
        tally.add(out)
        if on_outcome is not None:
            on_outcome(out)
    tally.seconds = time.monotonic() - t0
    shutil.rmtree(work, ignore_errors=True)
    return tally
