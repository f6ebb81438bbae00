"""No output replaces a file the run reads, ``--force`` or not: one read set per command.

Every command builds one list of every file it reads
(:func:`seqstate.commands.inputs.read_set`: the FASTA and its ``.fai``/``.gzi``, the model's
manifest and every table its ``[tables]`` names, regions, truth, reference, labels, records
file, run reports and group files) and the overwrite rule refuses an output that is one of
them (README "Outputs are safe").  Each case reproduces a data-loss event of the hostile-input
battery: exit 2, one ``error:`` line naming the input, the input byte-identical afterwards and
nothing else left (no output, no staging or temporary file).  Inputs are synthetic: the small
golden FASTA and truth (our own sampler), the fit test data, copies of built-in models.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner
from golden_util import GOLDEN_FASTA, GOLDEN_TRUTH

from seqstate.cli import main
from seqstate.commands.inputs import fasta_inputs, model_inputs, read_set, records_inputs
from seqstate.commands.records import records_selection
from seqstate.io import faidx
from seqstate.io.tables import TABLE_FILES, builtin_dir

FIT_DATA = Path(__file__).resolve().parent / "data" / "fit"
COMPARE = Path(__file__).resolve().parent / "data" / "compare"


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


def ok(args: list) -> None:
    code, _out, err = run([*args, "-q"])
    assert code == 0, err


def tree(root: Path) -> dict[str, bytes | None]:
    """Every entry under ``root`` (hidden staging and temporary files too): file bytes,
    None for a folder, the target for a symbolic link."""
    found: dict[str, bytes | None] = {}
    for dirpath, dirnames, filenames in os.walk(root):
        for name in dirnames + filenames:
            path = Path(dirpath) / name
            key = str(path.relative_to(root))
            if path.is_symlink():
                found[key] = os.readlink(path).encode()
            elif path.is_dir():
                found[key] = None
            else:
                found[key] = path.read_bytes()
    return found


def refused(args: list, root: Path, output: Path, input_: Path) -> str:
    """``args`` fails with exit 2 and one ``error:`` line saying that ``output`` is the input
    ``input_``; every file under ``root`` (the input among them) is as it was and nothing
    was added.  Returns the line."""
    before = tree(root)
    assert input_.is_file() and str(input_.relative_to(root)) in before
    code, out, err = run(args)
    assert code == 2, err
    assert len(err) == 1 and err[0].startswith("error: "), err
    assert out == ""
    assert f"output '{output}' is the input '{input_}'" in err[0], err[0]
    assert "even with --force" in err[0]
    assert tree(root) == before
    return err[0]


def model_copy(root: Path, name: str = "cpg-island", folder: str = "m") -> Path:
    dest = root / folder
    shutil.copytree(builtin_dir() / name, dest)
    return dest


def rename_table(model: Path, key: str, new: str) -> Path:
    """Move ``model``'s table ``key`` to the file ``new`` and name it so in ``[tables]``."""
    old = TABLE_FILES[key]
    (model / old).rename(model / new)
    manifest = model / "model.toml"
    text = manifest.read_text(encoding="utf-8")
    line = f'{key} = "{old}"'
    assert line in text
    manifest.write_text(text.replace(line, f'{key} = "{new}"', 1), encoding="utf-8")
    assert run(["model", "check", model])[0] == 0  # a valid model, its table elsewhere
    return model / new


def fasta_in(folder: Path, name: str = "x.fa", *, indexed: bool = False) -> Path:
    folder.mkdir(exist_ok=True)
    fasta = folder / name
    fasta.write_bytes(GOLDEN_FASTA.read_bytes())
    if indexed:
        ok(["index", fasta])
        assert faidx.fai_path(fasta).is_file()
    return fasta


def bed_in(folder: Path, name: str = "r.bed") -> Path:
    regions = folder / name
    regions.write_text("chr1\t10\t200\n", encoding="utf-8")
    return regions


# ---------------------------------------------------------------- annotate
@pytest.mark.parametrize("table", ["transitions.tsv", "model.toml", "start.tsv"])
def test_annotate_report_onto_a_table_of_its_model(tmp_path, table):
    # annotate x.fa -m m -o m --report transitions.tsv --force (m a copied model folder)
    model = model_copy(tmp_path)
    fasta = fasta_in(tmp_path / "in")
    args = ["annotate", fasta, "-m", model, "-o", model, "--report", table, "--force"]
    refused(args, tmp_path, model / table, model / table)


@pytest.mark.parametrize("option,table", [("--cds", "emissions.tsv"), ("--proteins", "start.tsv")])
def test_annotate_cds_or_proteins_onto_a_table_of_its_gene_model(tmp_path, option, table):
    # annotate x.fa -m m -o m --cds emissions.tsv --force (m a copied gene model)
    model = model_copy(tmp_path, "gene-segment")
    fasta = fasta_in(tmp_path / "in")
    args = ["annotate", fasta, "-m", model, "-o", model, option, table, "--force"]
    refused(args, tmp_path, model / table, model / table)


def test_annotate_report_onto_a_table_the_manifest_renames(tmp_path):
    # a model whose [tables] says transitions = "trans2.tsv" was not protected at all
    model = model_copy(tmp_path)
    table = rename_table(model, "transitions", "trans2.tsv")
    fasta = fasta_in(tmp_path / "in")
    args = ["annotate", fasta, "-m", model, "-o", model, "--report", "trans2.tsv", "--force"]
    refused(args, tmp_path, table, table)


def test_annotate_prediction_onto_its_truth(tmp_path):
    # annotate x.fa -o d --stem t --report r.html --truth d/t.gff3 --force
    out = tmp_path / "d"
    out.mkdir()
    truth = out / "t.gff3"
    truth.write_bytes(GOLDEN_TRUTH.read_bytes())
    fasta = fasta_in(tmp_path / "in")
    args = ["annotate", fasta, "-o", out, "--stem", "t", "--report", "r.html"]
    refused([*args, "--truth", truth, "--force"], tmp_path, truth, truth)


def test_annotate_report_onto_its_records_file(tmp_path):
    # annotate x.fa -o d --records-file d/ids.txt --report ids.txt --force
    out = tmp_path / "d"
    out.mkdir()
    ids = out / "ids.txt"
    ids.write_text("chr1\n", encoding="utf-8")
    fasta = fasta_in(tmp_path / "in")
    args = ["annotate", fasta, "-o", out, "--records-file", ids, "--report", "ids.txt", "--force"]
    refused(args, tmp_path, ids, ids)


def test_annotate_report_onto_the_fasta_index(tmp_path):
    # the FASTA's .fai (read for its record lengths) in the output folder
    fasta = fasta_in(tmp_path / "d", indexed=True)
    fai = faidx.fai_path(fasta)
    args = ["annotate", fasta, "-o", fasta.parent, "--report", fai.name, "--force"]
    refused(args, tmp_path, fai, fai)


# ---------------------------------------------------------------- score
def test_score_table_onto_a_table_the_manifest_renames(tmp_path):
    # score x.fa --regions r.bed -m m -o m/trans2.tsv --force
    model = model_copy(tmp_path)
    table = rename_table(model, "transitions", "trans2.tsv")
    fasta = fasta_in(tmp_path / "in")
    regions = bed_in(tmp_path / "in")
    args = ["score", fasta, "--regions", regions, "-m", model, "-o", table, "--force"]
    refused(args, tmp_path, table, table)


def test_score_gff_onto_the_optional_end_table_the_manifest_names(tmp_path):
    # the optional end table, under a name of the manifest's own
    model = model_copy(tmp_path)
    end = model / "stop.tsv"
    end.write_text("state\tend\nisland\t0.001\nbackground\t0.001\n", encoding="utf-8")
    manifest = model / "model.toml"
    text = manifest.read_text(encoding="utf-8")
    manifest.write_text(
        text.replace(
            'emissions = "emissions.tsv"', 'emissions = "emissions.tsv"\nend = "stop.tsv"'
        ),
        encoding="utf-8",
    )
    assert run(["model", "check", model])[0] == 0
    fasta = fasta_in(tmp_path / "in")
    regions = bed_in(tmp_path / "in")
    table = tmp_path / "in" / "scores.tsv"
    args = ["score", fasta, "--regions", regions, "-m", model, "-o", table, "--gff", end]
    refused([*args, "--force"], tmp_path, end, end)


def test_score_table_onto_the_fasta_index(tmp_path):
    fasta = fasta_in(tmp_path / "d", indexed=True)
    fai = faidx.fai_path(fasta)
    regions = bed_in(tmp_path / "d")
    refused(["score", fasta, "--regions", regions, "-o", fai, "--force"], tmp_path, fai, fai)


# ---------------------------------------------------------------- sample
@pytest.mark.parametrize("which", ["-o", "--truth"])
def test_sample_onto_a_table_the_manifest_renames(tmp_path, which):
    # sample m -o m/trans2.tsv --force; sample m -o x.fa --truth m/trans2.tsv --force
    model = model_copy(tmp_path)
    table = rename_table(model, "transitions", "trans2.tsv")
    args = ["sample", model, "--length", "50", "--seed", "3", "--force"]
    if which == "-o":
        args += ["-o", table]
    else:
        args += ["-o", tmp_path / "x.fa", "--truth", table]
    refused(args, tmp_path, table, table)


# ---------------------------------------------------------------- calibrate
def test_calibrate_report_onto_a_table_the_manifest_renames(tmp_path):
    # calibrate m -o m/trans2.tsv --force
    model = model_copy(tmp_path)
    table = rename_table(model, "transitions", "trans2.tsv")
    args = ["calibrate", model, "--length", "200", "--records", "1", "-o", table, "--force"]
    refused(args, tmp_path, table, table)


def test_calibrate_report_onto_its_records_file(tmp_path):
    fasta = fasta_in(tmp_path / "d")
    ids = tmp_path / "d" / "ids.tsv"
    ids.write_text("chr1\n", encoding="utf-8")
    args = ["calibrate", "cpg-island", "--fasta", fasta, "--truth", GOLDEN_TRUTH]
    refused([*args, "--records-file", ids, "-o", ids, "--force"], tmp_path, ids, ids)


# ---------------------------------------------------------------- plot
def test_plot_figure_onto_a_table_the_manifest_renames(tmp_path):
    pytest.importorskip("matplotlib")  # the plot extra
    model = model_copy(tmp_path)
    table = rename_table(model, "emissions", "emissions.svg")
    fasta = fasta_in(tmp_path / "in")
    args = ["plot", fasta, "--region", "chr1:1-500", "-m", model, "-o", table, "--force"]
    refused(args, tmp_path, table, table)


# ---------------------------------------------------------------- fit
def fit_inputs(root: Path) -> tuple[Path, Path]:
    folder = root / "in"
    folder.mkdir(exist_ok=True)
    fasta = folder / "two.fa"
    fasta.write_bytes((FIT_DATA / "two.fa").read_bytes())
    return fasta, FIT_DATA / "two-labels"


def test_fit_model_onto_its_labels(tmp_path):
    fasta, start = fit_inputs(tmp_path)
    out = tmp_path / "o"
    out.mkdir()
    labels = out / "start.tsv"  # known features kept under a table's name
    labels.write_bytes((FIT_DATA / "good.gff3").read_bytes())
    args = ["fit", fasta, "-m", start, "--labels", labels, "-o", out, "--force"]
    refused(args, tmp_path, labels, labels)


def test_fit_model_onto_its_records_file(tmp_path):
    fasta, start = fit_inputs(tmp_path)
    out = tmp_path / "o"
    out.mkdir()
    ids = out / "emissions.tsv"
    ids.write_text("r1\n", encoding="utf-8")
    args = ["fit", fasta, "-m", start, "--em", "--records-file", ids, "-o", out, "--force"]
    refused(args, tmp_path, ids, ids)


def test_fit_em_model_onto_its_fasta(tmp_path):
    out = tmp_path / "o"
    out.mkdir()
    fasta = out / "transitions.tsv"  # a FASTA under a table's name
    fasta.write_bytes((FIT_DATA / "two.fa").read_bytes())
    args = ["fit", fasta, "-m", FIT_DATA / "two-labels", "--em", "-o", out, "--force"]
    refused(args, tmp_path, fasta, fasta)


# ---------------------------------------------------------------- compare, merge, index
def test_compare_gene_list_onto_its_reference(tmp_path):
    pred = tmp_path / "pred.gff3"
    ref = tmp_path / "ref.gff3"
    pred.write_bytes((COMPARE / "cds_pred.gff3").read_bytes())
    ref.write_bytes((COMPARE / "cds_ref.gff3").read_bytes())
    refused(["compare", pred, ref, "--gene-list", ref, "--force"], tmp_path, ref, ref)


def test_merge_output_onto_its_fasta(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    fasta = out / "all.gff3"  # a FASTA with an odd name, in the output folder
    ok(["sample", "cpg-island", "--length", "3000", "--records", "2", "--seed", "5", "-o", fasta])
    for i, rid in enumerate(["sim1", "sim2"]):
        ok(["annotate", fasta, "-o", tmp_path / f"g{i}", "--stem", "all", "--records", rid])
    reports = [tmp_path / f"g{i}" / "all.run.json" for i in range(2)]
    args = ["merge", *reports, "--fasta", fasta, "-o", out, "--stem", "all", "--force"]
    refused(args, tmp_path, fasta, fasta)


def test_index_onto_its_fasta_through_a_link(tmp_path):
    fasta = fasta_in(tmp_path / "d")
    fai = faidx.fai_path(fasta)
    fai.symlink_to(fasta.name)  # the index name leads to the FASTA itself
    refused(["index", fasta, "--force"], tmp_path, fai, fasta)


# ---------------------------------------------------------------- the read set itself
def test_model_inputs_are_the_manifest_and_every_table_it_names(tmp_path):
    model = tmp_path / "m"
    model.mkdir()
    (model / "model.toml").write_text(
        '[tables]\nstart = "s.tsv"\ntransitions = "sub/t.tsv"\nend = "e.tsv"\nmask = "k.tsv"\n',
        encoding="utf-8",
    )
    found = model_inputs(model)
    assert found[0] == model / "model.toml"
    # emissions is not named: its default name is read
    expected = ["s.tsv", "sub/t.tsv", "emissions.tsv", "e.tsv", "k.tsv"]
    assert sorted(map(str, found[1:])) == sorted(str(model / n) for n in expected)


@pytest.mark.parametrize(
    "text", [b"[tables\nstart = 'x'", b"\xff\xfe", b"tables = 5\n", b"[[states]]\n" * 5000]
)
def test_model_inputs_fall_back_to_the_default_names(tmp_path, text):
    # a manifest that cannot be parsed (the loader reports it): every default table name
    model = tmp_path / "m"
    model.mkdir()
    (model / "model.toml").write_bytes(text)
    found = model_inputs(model)
    assert found == [
        model / "model.toml",
        *(model / n for n in dict.fromkeys(TABLE_FILES.values())),
    ]


def test_model_inputs_of_a_built_in_model_are_its_package_files():
    found = model_inputs("cpg-island")
    folder = builtin_dir() / "cpg-island"
    assert found[0] == folder / "model.toml"
    for name in ("start.tsv", "transitions.tsv", "emissions.tsv"):
        assert folder / name in found and (folder / name).is_file()


def test_fasta_inputs_are_the_file_and_its_index_files():
    assert fasta_inputs("d/x.fa.gz") == [
        Path("d/x.fa.gz"),
        Path("d/x.fa.gz.fai"),
        Path("d/x.fa.gz.gzi"),
    ]
    assert fasta_inputs("-") == [] and fasta_inputs(None) == []


def test_read_set_holds_every_kind_once(tmp_path):
    ids = tmp_path / "ids.txt"
    ids.write_text("a\nb\n", encoding="utf-8")
    selection = records_selection(None, str(ids))
    assert selection == ["a", "b"] and records_inputs(selection) == [ids]
    assert records_inputs(records_selection("a,b", None)) == []
    found = read_set(
        fasta=tmp_path / "x.fa",
        model="cpg-island",
        files=[tmp_path / "t.gff3", None, "-", tmp_path / "x.fa"],
        records=selection,
    )
    assert found[:3] == fasta_inputs(tmp_path / "x.fa")
    assert found[3:] == [*model_inputs("cpg-island"), tmp_path / "t.gff3", ids]
