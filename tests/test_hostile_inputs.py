"""Hostile inputs: every file a run reads is checked, and every TSV it writes stays a table.

Each bad case asserts the exit status, exactly one ``error:`` line on stderr, no
traceback and no output left behind (README "Exit codes": 1 for input or format
errors, 2 for usage errors).  Every FASTA and model here is synthetic: hand-written
text, seeded random bases, or a copy of a built-in model edited to be hostile.
"""

from __future__ import annotations

import datetime as dt
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import tomllib
from Bio import bgzf
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.io import faidx
from seqstate.io.regions import Region
from seqstate.io.tables import builtin_dir, load_model, render_tables

FIT_DATA = Path(__file__).resolve().parent / "data" / "fit"


@pytest.fixture(autouse=True)
def _fresh_index_memory():
    """Indexes are kept in memory per (path, size, mtime); each case starts afresh."""
    faidx.clear_memory()
    yield
    faidx.clear_memory()


def run(args: list) -> tuple[int, str, list[str]]:
    """Run the CLI in-process: (exit status, stdout, stderr lines), insisting on no crash."""
    result = CliRunner().invoke(main, [str(a) for a in args])
    assert result.exception is None or isinstance(result.exception, SystemExit), repr(
        result.exception
    )
    assert "Traceback" not in result.stderr
    return result.exit_code, result.stdout, result.stderr.splitlines()


def one_error(args: list, status: int, *words: str, absent: tuple[Path, ...] = ()) -> str:
    """The run fails with ``status`` and one ``error:`` line holding ``words``; nothing
    of ``absent`` exists afterwards (a folder may exist only if empty)."""
    code, out, err = run(args)
    assert code == status, err
    assert len(err) == 1 and err[0].startswith("error: "), err
    assert out == ""
    for text in words:
        assert text in err[0], f"{text!r} not in {err[0]!r}"
    for path in absent:
        assert not path.exists() or (path.is_dir() and not any(path.iterdir())), path
    return err[0]


def model_copy(tmp_path: Path, name: str = "cpg-island", folder: str = "m") -> Path:
    dest = tmp_path / folder
    shutil.copytree(builtin_dir() / name, dest)
    return dest


def edit_manifest(model: Path, old: str, new: str) -> None:
    manifest = model / "model.toml"
    text = manifest.read_text(encoding="utf-8")
    assert old in text
    manifest.write_text(text.replace(old, new, 1), encoding="utf-8")


def random_dna(n: int, seed: int) -> str:
    return "".join(np.random.default_rng(seed).choice(list("ACGT"), size=n))


def fasta_text(records: list[tuple[str, str]], width: int = 60) -> str:
    out = []
    for header, seq in records:
        out.append(f">{header}\n")
        out.extend(seq[i : i + width] + "\n" for i in range(0, len(seq), width))
    return "".join(out)


# ---------------------------------------------------------------- model manifests


@pytest.mark.parametrize("value", ["5", '"high"', "[1, 2]", "true"])
def test_defaults_that_is_not_a_table(tmp_path, value):
    model = model_copy(tmp_path, "casino")
    text = (model / "model.toml").read_text(encoding="utf-8")
    (model / "model.toml").write_text(f"defaults = {value}\n" + text, encoding="utf-8")
    line = one_error(["model", "check", model], 1, "model.toml line 1", "[defaults] must be")
    assert "found " in line


DATES = (
    "when = 1979-05-27T07:32:00Z\n"
    "local = 1979-05-27T07:32:00.25\n"
    'moments = [{at = 2020-01-02, note = "a\\tb"}]\n'
    '"odd key" = 3\n'
)


def test_dates_and_times_in_a_manifest_are_carried_through(tmp_path):
    """TOML dates and times (TOML 1.0, section "Offset Date-Time" ... "Local Time") in
    extra keys and ``[provenance]``: read, written back the same (tomllib reads the
    rendered manifest to equal values), and check / annotate run."""
    model = model_copy(tmp_path)
    edit_manifest(model, "normalize = true\n", "normalize = true\n" + DATES)
    edit_manifest(
        model,
        "[provenance]\n",
        "[provenance]\nday = 2020-01-02\nclock = 07:32:00.5\n"
        'sources = [{name = "s", at = 2020-01-02T03:04:05+05:30}]\n',
    )
    loaded = load_model(model)
    rendered = tomllib.loads(render_tables(loaded)[0][1])
    assert rendered["provenance"]["day"] == dt.date(2020, 1, 2)
    assert rendered["provenance"]["clock"] == dt.time(7, 32, 0, 500000)
    tz = dt.timezone(dt.timedelta(hours=5, minutes=30))
    assert rendered["provenance"]["sources"] == [
        {"name": "s", "at": dt.datetime(2020, 1, 2, 3, 4, 5, tzinfo=tz)}
    ]
    assert rendered["when"] == dt.datetime(1979, 5, 27, 7, 32, tzinfo=dt.timezone.utc)
    assert rendered["moments"] == [{"at": dt.date(2020, 1, 2), "note": "a\tb"}]
    assert rendered["odd key"] == 3
    code, out, err = run(["model", "check", model])
    assert code == 0 and "day: 2020-01-02" in out, err
    fa = tmp_path / "x.fa"
    fa.write_text(fasta_text([("r", random_dna(300, 1))]))
    code, _, err = run(["annotate", fa, "-m", model, "-o", tmp_path / "out", "-q"])
    assert code == 0, err
    assert (tmp_path / "out" / "x.gff3").is_file()


def test_fit_writes_a_model_whose_start_model_holds_dates(tmp_path):
    start = tmp_path / "two"
    shutil.copytree(FIT_DATA / "two-labels", start)
    text = (start / "model.toml").read_text(encoding="utf-8")
    (start / "model.toml").write_text(
        text.replace("order = 0\n", "order = 0\nmade = 2021-03-04\n", 1)
        + "\n[provenance]\nat = 2021-03-04T05:06:07Z\n",
        encoding="utf-8",
    )
    out = tmp_path / "fitted"
    args = ["fit", "-m", start, "--fasta", FIT_DATA / "two.fa", "--labels"]
    code, _, err = run([*args, FIT_DATA / "good.gff3", "-o", out, "-q"])
    assert code == 0, err
    assert load_model(out).extra["made"] == dt.date(2021, 3, 4)


@pytest.mark.parametrize("n_states", [40_000, 300_000])
def test_model_past_the_memory_budget_is_refused_from_the_manifest(tmp_path, n_states):
    """40,000 states would need 11.9 GiB of transitions (40,000^2 x 8 bytes), 300,000 states
    671 GiB: refused before any table is read (the tables here do not even exist)."""
    model = tmp_path / "big"
    model.mkdir()
    states = "".join(f'[[states]]\nname = "s{i}"\n' for i in range(n_states))
    (model / "model.toml").write_text(f'name = "big"\n{states}', encoding="utf-8")
    line = one_error(["model", "check", model], 1, f"declares {n_states:,} [[states]]")
    assert "at most 4,096 states" in line


def test_inline_states_past_the_budget_are_refused(tmp_path):
    model = tmp_path / "inline"
    model.mkdir()
    states = ", ".join(f'{{name = "s{i}"}}' for i in range(5000))
    (model / "model.toml").write_text(f'name = "x"\nstates = [{states}]\n', encoding="utf-8")
    one_error(["model", "check", model], 1, "5,000 states squared", "191 MiB")


def test_model_size_budget_counts_every_array():
    from seqstate.model import MAX_MODEL_CELLS, model_size_problem

    assert model_size_problem(4096, 1, 0) is None  # 4,096^2 = 2^24, the transition limit
    assert "4,097 states squared" in model_size_problem(4097, 4, 0)
    # 4,096 states of order 5 on 4 symbols: 2^24 transitions + 2^24 emissions + back-off
    # rows: past the total of 2^25
    total = model_size_problem(2**12, 4, 5)
    assert total is not None and f"{MAX_MODEL_CELLS:,}" in total
    # the built-in gene model (578 states, order 3) fits
    assert model_size_problem(578, 4, 3) is None


def test_manifest_symlink_out_of_the_folder_is_refused(tmp_path):
    src = model_copy(tmp_path, "casino", "src")
    model = tmp_path / "m"
    model.mkdir()
    for table in src.glob("*.tsv"):
        shutil.copy(table, model / table.name)
    (model / "model.toml").symlink_to(src / "model.toml")
    for spec in (model, model / "model.toml"):
        one_error(["model", "check", spec], 1, "symbolic link that leads outside the model folder")


def test_manifest_symlink_inside_the_folder_is_read(tmp_path):
    model = model_copy(tmp_path, "casino")
    (model / "model.toml").rename(model / "real.toml")
    (model / "model.toml").symlink_to("real.toml")
    code, _, err = run(["model", "check", model])
    assert code == 0, err


@pytest.mark.parametrize("table", ["transitions.tsv", "emissions.tsv", "end.tsv"])
def test_fifo_as_a_table_is_refused_without_blocking(tmp_path, table):
    """A named pipe nobody writes to would block a read forever: the run must end with one
    error line well inside the timeout (a separate process, so a hang fails the test)."""
    model = model_copy(tmp_path, "casino")
    fifo = model / table
    fifo.unlink(missing_ok=True)
    os.mkfifo(fifo)
    proc = subprocess.run(
        [sys.executable, "-m", "seqstate", "model", "check", str(model)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 1, proc.stderr
    lines = proc.stderr.splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), lines
    assert f"{table}: is a FIFO (named pipe)" in lines[0]


def test_fifo_named_by_tables_is_refused_without_blocking(tmp_path):
    model = model_copy(tmp_path, "casino")
    os.mkfifo(model / "pipe.tsv")
    edit_manifest(model, "[tables]\n", '[tables]\nend = "pipe.tsv"\n')
    proc = subprocess.run(
        [sys.executable, "-m", "seqstate", "model", "check", str(model)],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 1 and "pipe.tsv: is a FIFO" in proc.stderr, proc.stderr


@pytest.mark.parametrize("cell", ["1_0", "0_.5", "0x1", "½", "1e", "--1"])
def test_number_cells_are_read_strictly(tmp_path, cell):
    """Python's float() takes '1_0' as 10 (PEP 515 underscores); a table cell may not."""
    model = model_copy(tmp_path, "casino")
    start = model / "start.tsv"
    lines = start.read_text(encoding="utf-8").splitlines()
    name = lines[1].split("\t")[0]
    lines[1] = f"{name}\t{cell}"
    start.write_text("\n".join(lines) + "\n", encoding="utf-8")
    one_error(["model", "check", model], 1, "start.tsv line 2", f"'{cell}' is not a number")


def test_strict_number_cells_keep_every_usual_spelling(tmp_path):
    from seqstate.io.tsv_tables import _NUMBER

    for text in ("0", "1", "0.5", ".5", "5.", "1e-5", "1E+05", "+0.25", "3.0e2"):
        assert _NUMBER.fullmatch(text), text  # decimal spellings (common practice)
        float(text)
    for text in ("1_0", "0x10", "1e", "e5", ".", "1.2.3", "١"):
        assert not _NUMBER.fullmatch(text), text


# ---------------------------------------------------------------- FASTA and its indexes


def test_nul_in_a_fasta_header_is_refused(tmp_path):
    fa = tmp_path / "nul.fa"
    fa.write_bytes(b">a\nACGTACGT\n>b\x00x desc\nACGT\n")
    out = tmp_path / "out"
    one_error(["annotate", fa, "-o", out], 1, "nul.fa line 3", "NUL byte (0x00) at column 3")
    one_error(["index", fa], 1, "nul.fa line 3", "NUL byte", absent=(faidx.fai_path(fa),))


def test_header_over_a_mebibyte_indexes_and_reads_by_region(tmp_path):
    """A header of 1 MiB + 5,000 bytes and one of 3 MiB: index writes a .fai that --region
    then reads (the header is found however long)."""
    seq = random_dna(3000, 7)
    fa = tmp_path / "long.fa"
    fa.write_text(
        fasta_text(
            [
                ("a " + "x" * (2**20 + 5000), seq),
                ("b " + "z" * (3 * 2**20), seq[::-1]),
                ("c", seq),
            ]
        )
    )
    code, _, err = run(["index", fa])
    assert code == 0, err
    for rid, expected in (("a", seq), ("b", seq[::-1])):
        record = faidx.region_record(fa, Region(rid, 10, 500))
        assert record is not None and record.seq.decode() == expected[10:500]
        assert len(record.description) > 2**20
        out = tmp_path / f"out_{rid}"
        code, _, err = run(["annotate", fa, "--region", f"{rid}:11-500", "-o", out, "-q"])
        assert code == 0, err


def test_fai_shortened_at_a_line_boundary_is_caught(tmp_path):
    """A .fai cut after its first record, its mtime kept newer than the FASTA: the bytes
    after the last record it lists are a header and bases, so the index is refused."""
    fa = tmp_path / "x.fa"
    fa.write_text(fasta_text([("a", random_dna(500, 1)), ("b", random_dna(400, 2))]))
    code, _, err = run(["index", fa])
    assert code == 0, err
    fai = faidx.fai_path(fa)
    fai.write_text(fai.read_text().splitlines(keepends=True)[0])
    st = os.stat(fa)
    os.utime(fai, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))
    out = tmp_path / "out"
    line = one_error(
        ["annotate", fa, "--region", "a:1-100", "-o", out], 1, "x.fa.fai", absent=(out,)
    )
    assert "goes on after record 'a'" in line and "seqstate index --force" in line
    code, _, err = run(["index", "--force", fa])
    assert code == 0, err
    code, _, err = run(["annotate", fa, "--region", "b:1-100", "-o", out, "-q"])
    assert code == 0, err


def test_fai_of_a_file_ending_in_blank_lines_is_still_good(tmp_path):
    fa = tmp_path / "x.fa"
    fa.write_text(fasta_text([("a", random_dna(500, 3))]) + "\n\n\r\n")
    code, _, err = run(["index", fa])
    assert code == 0, err
    code, _, err = run(["annotate", fa, "--region", "a:1-100", "-o", tmp_path / "o", "-q"])
    assert code == 0, err


def _bgzip_fasta(tmp_path: Path) -> tuple[Path, list[tuple[int, int]]]:
    """Three records of 200,000 seeded bases, bgzip-compressed, indexed (.fai and .gzi)."""
    fa = tmp_path / "g.fa.gz"
    with bgzf.BgzfWriter(str(fa), "wb") as writer:
        writer.write(fasta_text([(f"r{i}", random_dna(200_000, 10 + i)) for i in range(3)]))
    code, _, err = run(["index", fa])
    assert code == 0, err
    data = faidx.gzi_path(fa).read_bytes()
    return fa, faidx.parse_gzi(data, "gzi")


def _keep_index_newer(fa: Path) -> None:
    st = os.stat(fa)
    for index in (faidx.fai_path(fa), faidx.gzi_path(fa)):
        os.utime(index, ns=(st.st_atime_ns, st.st_mtime_ns + 10**9))


def _commands(fa: Path, tmp_path: Path) -> list[tuple[list, Path]]:
    """annotate --region, score and plot on record r0: (arguments, output)."""
    bed = tmp_path / "r.bed"
    bed.write_text("r0\t10\t900\tx\n")
    return [
        (["annotate", fa, "--region", "r0:1-1000", "-o", tmp_path / "o1"], tmp_path / "o1"),
        (["score", fa, "--regions", bed, "-o", tmp_path / "s.tsv"], tmp_path / "s.tsv"),
        (["plot", fa, "--region", "r0:1-1000", "-o", tmp_path / "p.svg"], tmp_path / "p.svg"),
    ]


def test_gzi_offsets_past_the_file_are_an_error_line(tmp_path):
    fa, pairs = _bgzip_fasta(tmp_path)
    moved = [(c + 10**9, u) for c, u in pairs]
    faidx.gzi_path(fa).write_bytes(faidx.format_gzi(moved))
    _keep_index_newer(fa)
    for args, out in _commands(fa, tmp_path):
        faidx.clear_memory()
        one_error(args, 1, "g.fa.gz.gzi", "past the end of", absent=(out,))


def _corrupt_first_block(fa: Path) -> str:
    """Change one byte of r0's first block so that it decompresses to the wrong size or
    CRC (BGZF blocks carry both; SAM/BAM format specification, section 4.1); returns the
    stream reader's error line for the same file."""
    original = fa.read_bytes()
    for pos in range(100, 20_000, 37):
        data = bytearray(original)
        data[pos] ^= 0x55
        fa.write_bytes(bytes(data))
        code, _, err = run(["annotate", fa, "-o", fa.parent / "stream", "--force"])
        faidx.clear_memory()
        if code == 1 and "cannot be read (corrupt or truncated file?)" in err[0]:
            return err[0]
    raise AssertionError("no single-byte change made the first block unreadable")


def test_corrupt_block_under_a_valid_index_is_an_error_line(tmp_path):
    fa, _ = _bgzip_fasta(tmp_path)
    stream_line = _corrupt_first_block(fa)
    _keep_index_newer(fa)
    assert stream_line.startswith(f"error: {fa}: cannot be read (corrupt or truncated file?)")
    for args, out in _commands(fa, tmp_path):
        faidx.clear_memory()
        one_error(args, 1, f"{fa}: cannot be read (corrupt or truncated file?)", absent=(out,))


# ---------------------------------------------------------------- the command line


@pytest.mark.parametrize(
    "args",
    [
        ["annotate", "x.fa", "--debug"],
        ["model", "check", "cpg-island", "--debug"],
        ["index", "--debug", "x.fa"],
        ["annotate", "--debug", "--bogus"],
    ],
)
def test_debug_after_the_command_is_a_usage_error(tmp_path, args):
    """--debug belongs before the command name; after it, it is an unknown option of the
    command (exit 2, one line), and it never turns the usage error into a traceback."""
    line = one_error(args, 2, "--debug")
    assert "goes before the command name" in line


def test_debug_before_the_command_still_shows_the_traceback(tmp_path):
    result = CliRunner().invoke(main, ["--debug", "annotate", str(tmp_path / "x.fa"), "--bogus"])
    assert result.exception is not None and not isinstance(result.exception, SystemExit)


# ---------------------------------------------------------------- TSV outputs

HOSTILE = ["a\tb", "a\nb", "a\rb", "a\\b", "a\\tb", "\x00\x1f\x7f\x85", "x\u2028y\u2029", "%0A", ""]


@pytest.mark.parametrize("text", HOSTILE)
def test_tsv_cell_is_one_cell_and_reads_back(text):
    from seqstate.io.tsvtext import tsv_cell, tsv_row, unescape_cell

    cell = tsv_cell(text)
    assert "\t" not in cell and len(cell.splitlines()) <= 1  # splitlines: every line break
    assert unescape_cell(cell) == text
    row = tsv_row([text, text, 3])
    assert row.endswith("\n") and len(row.splitlines()) == 1 and row.count("\t") == 2


def test_tsv_cell_keeps_ordinary_text():
    from seqstate.io.tsvtext import tsv_cell

    for text in ("chr1", "ctg_12.3", "gène", "a b", "g%2Cx", "/data/x y.gff3"):
        assert tsv_cell(text) == text


def _table(path: Path) -> list[list[str]]:
    """The rows of a TSV, each row's number of cells checked against the header's."""
    lines = path.read_text(encoding="utf-8").split("\n")
    assert lines[-1] == ""
    rows = [line.split("\t") for line in lines[:-1]]
    assert all(len(r) == len(rows[0]) for r in rows), rows
    return rows


def test_compare_writes_hostile_ids_and_paths_as_one_cell(tmp_path):
    """Gene IDs whose GFF3 text decodes to a newline, a tab, a CR or a backslash
    (``%0A``, ``%09``, ``%0D``, ``%5C``; GFF3 1.26 column 9 escaping), and a predicted
    file whose name holds a tab and a newline: the report and the gene list keep their
    rows, and each cell reads back to the ID."""
    from test_compare import GENE_PRED, GENE_REF

    from seqstate.io.tsvtext import unescape_cell

    pred = tmp_path / "pred\tx\ny.gff3"
    ref = tmp_path / "ref.gff3"
    pred.write_text(GENE_PRED.replace("P4", "P%0A4%09x"))
    ref.write_text(GENE_REF.replace("=C", "=C%5C%0D"))
    report, listing = tmp_path / "r.tsv", tmp_path / "genes.tsv"
    code, _, err = run(["compare", pred, ref, "-o", report, "--gene-list", listing])
    assert code == 0, err
    genes = _table(listing)
    assert len(genes) == 4  # header and the three genes that are not right
    ids = {unescape_cell(r[3]) for r in genes[1:]}
    assert ids == {"C\\\r", "P3", "P\n4\tx"}
    metrics = _table(report)
    assert metrics[0] == ["metric", "value"]
    values = {r[0]: unescape_cell(r[1]) for r in metrics[1:]}
    assert str(pred) in values.values()


def test_annotate_and_score_tables_keep_their_rows(tmp_path):
    """A record ID with a backslash (FASTA IDs hold no white space) and a region name
    with a tab, a newline and a backslash (a GFF3 Name decoded from %09 / %0A)."""
    from seqstate.io.tsvtext import unescape_cell

    seq = "AT" * 150 + "CG" * 200 + "TA" * 150
    fa = tmp_path / "x.fa"
    fa.write_text(fasta_text([("r\\1", seq)]))
    out = tmp_path / "out"
    code, _, err = run(["annotate", fa, "-o", out, "-q", "--min-length", "50"])
    assert code == 0, err
    rows = _table(out / "x.features.tsv")
    assert len(rows) >= 2 and {unescape_cell(r[0]) for r in rows[1:]} == {"r\\1"}
    regions = tmp_path / "r.gff3"
    regions.write_text(
        "##gff-version 3\n"
        "r\\1\tt\tregion\t301\t700\t.\t.\t.\tID=a;Name=x%09y%0Az\\w\n"
        "r\\1\tt\tregion\t1\t200\t.\t.\t.\tID=b\n"
    )
    scores = tmp_path / "s.tsv"
    code, _, err = run(["score", fa, "--regions", regions, "-o", scores, "-q"])
    assert code == 0, err
    rows = _table(scores)
    assert len(rows) == 3
    assert unescape_cell(rows[1][0]) == "r\\1" and "\n" not in rows[1][3]


# ---------------------------------------------------------------- a gzip FASTA cut short
def test_truncated_gzip_fasta_with_report_and_truth_is_an_error_line_not_an_interrupt(tmp_path):
    # the truth check lists the FASTA's records first; a gzip stream that ends early
    # (EOFError, which click would turn into "Abort") is a read error naming the file
    import gzip

    body = b"".join(b">r%d\n" % i + b"ACGTACGCGCGTTA" * 400 + b"\n" for i in range(4))
    packed = gzip.compress(body, mtime=0)
    fasta = tmp_path / "x.fa.gz"
    fasta.write_bytes(packed[: len(packed) * 2 // 3])
    truth = tmp_path / "t.gff3"
    truth.write_text("##gff-version 3\nr0\tt\tCpG_island\t10\t200\t.\t.\t.\tID=a\n")
    out = tmp_path / "o"
    line = one_error(
        ["annotate", fasta, "-o", out, "--report", "r.html", "--truth", truth],
        1,
        "x.fa.gz",
        "truncated",
        absent=(out,),
    )
    assert "interrupted" not in line


def test_an_eof_error_from_a_command_is_an_error_line_not_an_interrupt(monkeypatch):
    import seqstate.commands.annotate

    def body(opts, **kwargs):
        raise EOFError("Compressed file ended before the end-of-stream marker was reached")

    monkeypatch.setattr(seqstate.commands.annotate, "annotate", body)
    code, out, err = run(["annotate", "in.fa", "-o", "out"])
    assert code == 1
    assert err == [
        "error: input cannot be read (truncated file?): Compressed file ended before the "
        "end-of-stream marker was reached"
    ]
