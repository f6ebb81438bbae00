"""Model folders: round trips, canonical text, digests, and one test per malformed case.

The malformed cases copy the valid corpus model tests/data/models/base into a
temporary folder and break one line.  Every message must name the file and the
row (its 1-based line, or the state/context it is about when the row is absent
or the problem is the manifest's), which is the contract of seqstate.errors.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import numpy as np
import pytest

from seqstate.engine import api
from seqstate.errors import ModelFormatError
from seqstate.io.tables import list_builtin, load_model, model_sha256, render_tables, save_model
from seqstate.model import State, make_model

CORPUS = Path(__file__).resolve().parent / "data" / "models"


# ------------------------------------------------------------------ round trips
def test_builtins_are_listed():
    assert {"cpg-island", "cpg-island-8", "casino"} <= set(list_builtin())


@pytest.mark.parametrize("name", list_builtin())
def test_builtin_load_save_load_is_identical(name, tmp_path):
    first = load_model(name)
    save_model(first, tmp_path / name)
    second = load_model(tmp_path / name)
    assert first.equals(second)
    # a second trip changes nothing either, down to the bytes
    save_model(second, tmp_path / "again")
    for fname, _ in render_tables(second):
        assert (tmp_path / "again" / fname).read_bytes() == (tmp_path / name / fname).read_bytes()


@pytest.mark.parametrize("name", list_builtin())
def test_render_tables_equals_saved_files(name, tmp_path):
    model = load_model(name)
    folder = tmp_path / "out"
    save_model(model, folder)
    rendered = render_tables(model)
    assert rendered[0][0] == "model.toml"
    assert sorted(p.name for p in folder.iterdir()) == sorted(f for f, _ in rendered)
    for fname, text in rendered:
        assert (folder / fname).read_text(encoding="utf-8") == text


@pytest.mark.parametrize("name", list_builtin())
def test_model_sha256_is_stable(name, tmp_path):
    model = load_model(name)
    digest = model_sha256(model)
    assert re.fullmatch(r"[0-9a-f]{64}", digest)
    assert model_sha256(load_model(name)) == digest
    save_model(model, tmp_path / "copy")
    assert model_sha256(load_model(tmp_path / "copy")) == digest
    # any changed probability changes the digest
    changed = load_model(name)
    changed.transitions[0, 0] = np.nextafter(changed.transitions[0, 0], 0.0)
    assert model_sha256(changed) != digest


def test_model_sha256_ignores_layout_of_files(tmp_path):
    # the same tables with reordered columns and rows, comments, blank lines and CRLF
    # line ends must give the same digest as the built-in copy
    src = load_model("cpg-island")
    folder = tmp_path / "shuffled"
    shutil.copytree(Path(__file__).resolve().parent.parent / "models" / "cpg-island", folder)
    (folder / "transitions.tsv").write_text(
        "# reordered\r\nfrom\tbackground\tisland\r\n\r\nbackground\t0.99999\t0.00001\r\n"
        "island\t0.001\t0.999\r\n",
        encoding="utf-8",
        newline="",
    )
    lines = (folder / "emissions.tsv").read_text(encoding="utf-8").splitlines()
    head = [ln for ln in lines if ln.startswith("state\t")][0].split("\t")
    body = [ln.split("\t") for ln in lines if ln and not ln.startswith(("#", "state\t"))]
    order = [0, 1, 5, 4, 3, 2]  # state, context, T, G, C, A
    out = ["\t".join(head[i] for i in order)]
    out += ["\t".join(row[i] for i in order) for row in reversed(body)]
    (folder / "emissions.tsv").write_text("\n\n".join(out) + "\n", encoding="utf-8")
    (folder / "start.tsv").write_text(
        "state\tstart\nbackground\t0.99\nisland\t0.01\n", encoding="utf-8"
    )
    other = load_model(folder)
    assert other.equals(src)
    assert model_sha256(other) == model_sha256(src)


def test_model_sha256_covers_the_manifest_text_too(tmp_path):
    # README (Models): the checksum covers the canonical manifest (name, description,
    # provenance, ...) as well as the tables; comments and table file names do not count
    src = load_model("cpg-island")
    digest = model_sha256(src)
    folder = tmp_path / "renamed"
    shutil.copytree(Path(__file__).resolve().parent.parent / "models" / "cpg-island", folder)
    manifest = folder / "model.toml"
    text = manifest.read_text(encoding="utf-8")
    manifest.write_text("# a comment line\n" + text, encoding="utf-8")
    assert model_sha256(load_model(folder)) == digest
    (folder / "start.tsv").rename(folder / "first.tsv")
    manifest.write_text(text.replace('start = "start.tsv"', 'start = "first.tsv"'), "utf-8")
    assert 'start = "first.tsv"' in manifest.read_text(encoding="utf-8")
    assert model_sha256(load_model(folder)) == digest
    renamed = load_model("cpg-island")
    renamed.name = "cpg-island-copy"
    assert model_sha256(renamed) != digest
    described = load_model("cpg-island")
    described.description += " (edited)"
    assert model_sha256(described) != digest
    # the tables are the same: only the text differs
    assert np.array_equal(described.transitions, src.transitions)
    assert np.array_equal(described.emissions, src.emissions)


@pytest.mark.parametrize("seed", range(8))
def test_random_model_round_trip(random_model, seed, tmp_path):
    rng = np.random.default_rng(300 + seed)
    model = random_model(
        rng,
        n_states=int(rng.integers(1, 6)),
        order=int(rng.integers(0, 3)),
        with_end=bool(seed % 2 == 0),
        p_forbid=0.3,
        p_zero_emission=0.2,
        lower_rows=True,
        name=f"random-{seed}",
    )
    model.description = 'quotes " and \\ backslash,\ttab, new\nline, unicode 5\u2032 end'
    model.provenance = {
        "source": "random",
        "seed": seed,
        "scale": 1e-5,
        "flag": True,
        "nested": {"list": [1, 2.5, "x"], "key with space": "v"},
    }
    model.extra = {"origin": "test", "meta": {"depth": 2}}
    model.decode = "viterbi" if seed % 3 == 0 else "posterior"
    model.background_label = "bg" if seed % 2 else None
    save_model(model, tmp_path / "m")
    back = load_model(tmp_path / "m")
    assert back.equals(model)
    assert model_sha256(back) == model_sha256(model)
    # and the engine reads the same numbers from both (common practice: a file format
    # that round-trips its data exactly)
    t1, t2 = api.prepare(model), api.prepare(back)
    assert np.array_equal(t1.E, t2.E)


def test_equals_sees_a_changed_value(tmp_path):
    model = load_model(CORPUS / "base")
    save_model(model, tmp_path / "m")
    back = load_model(tmp_path / "m")
    assert back.equals(model)
    back.emissions[2, 1, 0] = np.nextafter(back.emissions[2, 1, 0], 1.0)
    assert not back.equals(model)


def test_corpus_models_round_trip(tmp_path):
    for name in ("base", "counts", "dice-order1"):
        model = load_model(CORPUS / name)
        save_model(model, tmp_path / name)
        assert load_model(tmp_path / name).equals(model), name


def test_alphabet_of_die_faces_with_order_one_loads():
    model = load_model(CORPUS / "dice-order1")
    assert model.alphabet == "123456"
    assert model.order == 1
    assert model.emissions.shape == (2, 6, 6)
    assert model.end is None
    assert model.emissions[0, 2, 2] == 0.5  # even state, context '3', face 3
    tables = api.prepare(model)
    codes = api.encode(tables, "1234563N66")
    assert np.isfinite(api.loglik(tables, codes))


# ------------------------------------------------------------------ normalize = true
def test_normalize_accepts_raw_counts():
    model = load_model(CORPUS / "counts")
    # each row divided by its total (common practice); transitions and end together
    np.testing.assert_allclose(model.start, [3 / 4, 1 / 4], rtol=1e-15)
    np.testing.assert_allclose(
        model.transitions, [[90 / 100, 8 / 100], [5 / 50, 45 / 50]], rtol=1e-15
    )
    np.testing.assert_allclose(model.end, [2 / 100, 0.0], rtol=1e-15)
    np.testing.assert_allclose(
        model.emissions[:, 0, :], [[0.1, 0.2, 0.3, 0.4], [7 / 15, 0.0, 7 / 15, 1 / 15]], rtol=1e-15
    )


def test_without_normalize_counts_are_rejected(tmp_path):
    folder = _copy(tmp_path, "counts")
    _edit(folder, "model.toml", "normalize = true", "normalize = false")
    with pytest.raises(ModelFormatError) as info:
        load_model(folder)
    # the first table checked is named, with its row: start.tsv holds counts 3 and 1
    msg = str(info.value)
    assert _names_line(msg, "start.tsv", 3) and "sums to 4" in msg, msg


@pytest.mark.parametrize(
    "fname, old, new, state",
    [
        ("emissions.tsv", "q\t", "q\t.\t0\t\t0\t0", "q"),
        ("transitions.tsv", "q\t", "q\t0\t0", "q"),
    ],
    ids=["emissions", "transitions"],
)
def test_normalize_names_the_row_that_sums_to_zero(tmp_path, fname, old, new, state):
    # a row of zero counts cannot be normalised; like every table error the message
    # must name the table file and the row (errors.py contract)
    folder = _copy(tmp_path, "counts")
    line = _edit(folder, fname, old, new)
    msg = _error(folder)
    assert "sums to 0" in msg, msg
    assert fname in msg, msg
    assert _names_line(msg, fname, line) and f"'{state}'" in msg, msg


def test_provenance_that_is_not_a_table(tmp_path):
    # [provenance] is a TOML table; a plain string there is refused with a message
    # naming model.toml and the key, like every table error (errors.py contract),
    # rather than loading and failing later with a non-seqstate exception
    folder = _copy(tmp_path)
    path = folder / "model.toml"
    text = path.read_text(encoding="utf-8")
    edited = text.replace('[provenance]\nsource = "hand-written test data"\n', "")
    edited = edited.replace("normalize = false\n", 'normalize = false\nprovenance = "free text"\n')
    # both edits took effect: the key is now a string and no [provenance] table is left
    assert "[provenance]" not in edited and 'provenance = "free text"' in edited
    path.write_text(edited, encoding="utf-8")
    with pytest.raises(ModelFormatError) as info:
        load_model(folder)
    assert "model.toml" in str(info.value) and "provenance" in str(info.value), str(info.value)


# ------------------------------------------------------------------ malformed tables
def _copy(tmp_path: Path, name: str = "base") -> Path:
    folder = tmp_path / name
    shutil.copytree(CORPUS / name, folder)
    return folder


def _edit(folder: Path, fname: str, old: str, new: str | None) -> int:
    """Replace the one line that starts with ``old`` (None deletes it); its 1-based number."""
    path = folder / fname
    lines = path.read_text(encoding="utf-8").split("\n")
    hits = [i for i, ln in enumerate(lines) if ln.startswith(old)]
    assert len(hits) == 1, (fname, old, hits)
    if new is None:
        del lines[hits[0]]
    else:
        lines[hits[0]] = new
    path.write_text("\n".join(lines), encoding="utf-8")
    return hits[0] + 1


def _edit_first(folder: Path, fname: str, old: str, new: str) -> int:
    """Replace the first line that starts with ``old``; its 1-based number."""
    path = folder / fname
    lines = path.read_text(encoding="utf-8").split("\n")
    i = next(i for i, ln in enumerate(lines) if ln.startswith(old))
    lines[i] = new
    path.write_text("\n".join(lines), encoding="utf-8")
    return i + 1


def _append(folder: Path, fname: str, text: str) -> int:
    """Append one line; its 1-based number."""
    path = folder / fname
    body = path.read_text(encoding="utf-8")
    if not body.endswith("\n"):
        body += "\n"
    n = body.count("\n") + 1
    path.write_text(body + text + "\n", encoding="utf-8")
    return n


def _error(folder: Path) -> str:
    with pytest.raises(ModelFormatError) as info:
        load_model(folder)
    return str(info.value)


def _names_line(msg: str, fname: str, line: int) -> bool:
    return re.search(rf"{re.escape(fname)} line {line}\b", msg) is not None


def test_base_corpus_model_is_valid():
    model = load_model(CORPUS / "base")
    assert model.state_names == ["bg", "up", "down"]
    assert sorted(model.lower_emissions) == [0]


def test_transitions_row_not_summing_to_one(tmp_path):
    folder = _copy(tmp_path)
    line = _edit(folder, "transitions.tsv", "up\t", "up\t0.05\t0.9\t")
    msg = _error(folder)
    assert _names_line(msg, "transitions.tsv", line), msg
    assert "'up'" in msg and "0.95" in msg, msg


def test_transitions_row_not_summing_to_one_without_end_table(tmp_path):
    folder = _copy(tmp_path, "dice-order1")
    line = _edit(folder, "transitions.tsv", "odd\t", "odd\t0.2\t0.7")
    msg = _error(folder)
    assert _names_line(msg, "transitions.tsv", line), msg
    assert "'odd'" in msg and "0.9" in msg, msg


def test_emission_row_not_summing_to_one(tmp_path):
    folder = _copy(tmp_path)
    line = _edit(folder, "emissions.tsv", "up\tC\t", "up\tC\t0.1\t0.4\t0.4\t0.2")
    msg = _error(folder)
    assert _names_line(msg, "emissions.tsv", line), msg
    assert "'up'" in msg and "'C'" in msg and "1.1" in msg, msg


def test_backoff_emission_row_not_summing_to_one(tmp_path):
    folder = _copy(tmp_path)
    line = _edit(folder, "emissions.tsv", "bg\t.\t", "bg\t.\t0.3\t0.2\t0.2\t0.2")
    msg = _error(folder)
    assert _names_line(msg, "emissions.tsv", line), msg
    assert "0.9" in msg, msg


def test_start_not_summing_to_one(tmp_path):
    folder = _copy(tmp_path)
    _edit(folder, "start.tsv", "up\t", "up\t0.2")
    msg = _error(folder)
    assert "start.tsv" in msg and "1.1" in msg, msg
    # errors.py contract (file, line, row): a table error names a line of the file.
    # No single row is at fault in a bad start total, so any line of start.tsv (its
    # header, or its last row) satisfies the test.
    assert re.search(r"start\.tsv line \d+", msg), msg


@pytest.mark.parametrize(
    "fname, old, new",
    [
        ("transitions.tsv", "down\t", "down\t-0.1\t\t1.08"),
        ("emissions.tsv", "down\tA\t", "down\tA\t0.5\t-0.1\t0.2\t0.4"),
        ("start.tsv", "bg\t", "bg\t-0.8"),
        ("end.tsv", "down\t", "down\t-0.02"),
    ],
)
def test_negative_value(tmp_path, fname, old, new):
    folder = _copy(tmp_path)
    line = _edit(folder, fname, old, new)
    msg = _error(folder)
    assert _names_line(msg, fname, line), msg
    assert "negative" in msg, msg


@pytest.mark.parametrize(
    "fname, old, new, cell",
    [
        ("emissions.tsv", "bg\tA\t", "bg\tA\t0.3\t0.2\tabc\t0.2", "abc"),
        ("transitions.tsv", "bg\t", "bg\t0.97\t0,01\t0.01", "0,01"),
        ("start.tsv", "down\t", "down\tten", "ten"),
        ("end.tsv", "bg\t", "bg\t1/100", "1/100"),
        ("emissions.tsv", "up\tA\t", "up\tA\tnan\t0.4\t0.4\t0.1", "nan"),
    ],
)
def test_non_numeric_value(tmp_path, fname, old, new, cell):
    folder = _copy(tmp_path)
    line = _edit(folder, fname, old, new)
    msg = _error(folder)
    assert _names_line(msg, fname, line), msg
    assert cell in msg, msg


@pytest.mark.parametrize(
    "fname, old, new",
    [
        ("transitions.tsv", "down\t", "dwn\t0.1\t\t0.88"),
        ("transitions.tsv", "from\t", "from\tbg\tup\tdwn"),
        ("emissions.tsv", "down\tT\t", "dwn\tT\t0.4\t0.1\t0.15\t0.35"),
        ("start.tsv", "down\t", "dwn\t0.1"),
        ("end.tsv", "down\t", "dwn\t0.02"),
    ],
)
def test_unknown_state_in_a_table(tmp_path, fname, old, new):
    folder = _copy(tmp_path)
    line = _edit(folder, fname, old, new)
    msg = _error(folder)
    assert _names_line(msg, fname, line), msg
    assert "'dwn'" in msg, msg


def test_duplicate_state_name_in_manifest(tmp_path):
    folder = _copy(tmp_path)
    path = folder / "model.toml"
    text = path.read_text(encoding="utf-8")
    text = text.replace(
        "[provenance]", '[[states]]\nname = "up"\nlabel = "feature"\n\n[provenance]'
    )
    path.write_text(text, encoding="utf-8")
    msg = _error(folder)
    assert "model.toml" in msg and "'up'" in msg, msg
    # the row: the fourth [[states]] entry (1-based) and the line of its header
    lines = text.split("\n")
    header = [i for i, ln in enumerate(lines) if ln == "[[states]]"][3] + 1
    assert re.search(r"\bentry 4\b", msg) and _names_line(msg, "model.toml", header), msg


@pytest.mark.parametrize(
    "fname, text, state",
    [
        ("transitions.tsv", "up\t0.05\t0.95\t", "up"),
        ("emissions.tsv", "down\tC\t0.4\t0.1\t0.1\t0.4", "down"),
        ("emissions.tsv", "bg\t.\t0.25\t0.25\t0.25\t0.25", "bg"),
        ("start.tsv", "bg\t0.8", "bg"),
        ("end.tsv", "down\t0.02", "down"),
    ],
)
def test_duplicate_row_in_a_table(tmp_path, fname, text, state):
    folder = _copy(tmp_path)
    line = _append(folder, fname, text)
    msg = _error(folder)
    assert _names_line(msg, fname, line), msg
    assert "duplicate" in msg and f"'{state}'" in msg, msg


def test_missing_emission_context(tmp_path):
    folder = _copy(tmp_path)
    _edit(folder, "emissions.tsv", "down\tG\t", None)
    msg = _error(folder)
    # the row is absent, so the message names it by state and context
    assert "emissions.tsv" in msg and "'G'" in msg and "'down'" in msg, msg


def test_missing_transitions_row(tmp_path):
    folder = _copy(tmp_path)
    _edit(folder, "transitions.tsv", "up\t", None)
    msg = _error(folder)
    assert "transitions.tsv" in msg and "'up'" in msg, msg


def test_state_unreachable_from_start(tmp_path):
    folder = _copy(tmp_path)
    _edit(folder, "start.tsv", "bg\t", "bg\t0.9")
    _edit(folder, "start.tsv", "down\t", "down\t0")
    _edit(folder, "transitions.tsv", "bg\t", "bg\t0.97\t0.02\t")  # nothing enters down
    msg = _error(folder)
    assert "model.toml" in msg and "'down'" in msg and "reached" in msg, msg


def test_state_from_which_no_end_is_reachable(tmp_path):
    folder = _copy(tmp_path)
    _edit(folder, "transitions.tsv", "up\t", "up\t\t1.0\t")  # up is absorbing; its end is 0
    msg = _error(folder)
    assert "model.toml" in msg and "'up'" in msg and "end" in msg, msg


def test_make_model_rejects_the_same_cases():
    # the array path (make_model) enforces the same rules as the files
    states = [State("a"), State("b")]
    good = dict(
        name="x",
        alphabet="ACGT",
        states=states,
        start=[0.5, 0.5],
        transitions=[[0.9, 0.1], [0.2, 0.8]],
        emissions=[[0.25] * 4, [0.1, 0.2, 0.3, 0.4]],
    )
    make_model(**good)
    bad = [
        dict(transitions=[[0.9, 0.05], [0.2, 0.8]]),
        dict(start=[0.5, 0.6]),
        dict(emissions=[[0.25] * 4, [0.1, 0.2, 0.3, 0.5]]),
        dict(emissions=[[0.25] * 4, [-0.1, 0.4, 0.3, 0.4]]),
        dict(states=[State("a"), State("a")]),
        dict(start=[1.0, 0.0], transitions=[[1.0, 0.0], [0.2, 0.8]]),
        dict(end=[0.0, 0.1], transitions=[[1.0, 0.0], [0.2, 0.7]]),
    ]
    for change in bad:
        with pytest.raises(ModelFormatError):
            make_model(**{**good, **change})


# ------------------------------------------------------------------ manifest values
def _manifest_line(folder: Path, text: str) -> int:
    """1-based line of model.toml that equals ``text``."""
    lines = (folder / "model.toml").read_text(encoding="utf-8").split("\n")
    return lines.index(text) + 1


def _one_line(msg: str) -> None:
    # errors.py contract: one printable line
    assert "\n" not in msg and msg.isprintable(), repr(msg)


@pytest.mark.parametrize(
    "value, found",
    [
        ("5", "label is a number (5)"),
        ('["a", "b"]', 'label is a list (["a", "b"])'),
        ("true", "label is true/false"),
    ],
    ids=["number", "list", "boolean"],
)
def test_label_that_is_not_a_string(tmp_path, value, found):
    folder = _copy(tmp_path)
    # the second [[states]] entry ('up') is the one changed
    line = _edit_first(folder, "model.toml", 'label = "feature"', f"label = {value}")
    msg = _error(folder)
    _one_line(msg)
    assert _names_line(msg, "model.toml", line), msg
    assert "[[states]] entry 2" in msg and found in msg, msg


@pytest.mark.parametrize(
    "label, shown",
    [
        ("CpG/island", "'/'"),
        ("CpG island", "' '"),
        ("a\\tb", "'\\t'"),
        ("a\\nb", "'\\n'"),
        ("x\\u0001y", "'\\x01'"),
        ("a;b", "';'"),
        ("..", "does not start with a letter"),
        ("_x", "does not start with a letter"),
        ("island.plus", "'.'"),
        ("a" * 65, "too long"),
    ],
)
def test_label_that_would_break_a_file_name_or_column(tmp_path, label, shown):
    # labels become GFF3 types, TSV cells and track file names (seqstate.model.LABEL_PATTERN)
    folder = _copy(tmp_path)
    line = _edit_first(folder, "model.toml", 'label = "feature"', f'label = "{label}"')
    msg = _error(folder)
    _one_line(msg)
    assert _names_line(msg, "model.toml", line), msg
    assert shown in msg and "Sequence Ontology-like name" in msg, msg


def test_sequence_ontology_names_are_valid_labels(tmp_path):
    # labels shaped like Sequence Ontology term names: underscores and mixed case, as in
    # five_prime_UTR and TF_binding_site of the GFF3 specification's examples
    # (The-Sequence-Ontology/Specifications, gff3.md), plus a hyphen and a digit
    folder = _copy(tmp_path)
    _edit_first(folder, "model.toml", 'label = "feature"', 'label = "five_prime_cis_splice_site"')
    _edit_first(folder, "model.toml", 'label = "feature"', 'label = "U2-type_intron3"')
    model = load_model(folder)
    assert model.labels == ["five_prime_cis_splice_site", "U2-type_intron3"]


@pytest.mark.parametrize("value", ["5", "[]", '""', "{ file = 'x' }"])
def test_table_path_that_is_not_a_file_name(tmp_path, value):
    folder = _copy(tmp_path)
    line = _edit(folder, "model.toml", "start = ", f"start = {value}")
    msg = _error(folder)
    _one_line(msg)
    assert _names_line(msg, "model.toml", line), msg
    assert "[tables] start is" in msg and "expected a file name" in msg, msg


def test_unknown_table_key(tmp_path):
    folder = _copy(tmp_path)
    line = _edit(folder, "model.toml", "start = ", 'starts = "start.tsv"')
    msg = _error(folder)
    assert _names_line(msg, "model.toml", line) and "'starts'" in msg, msg


def test_table_path_that_is_a_directory(tmp_path):
    folder = _copy(tmp_path)
    (folder / "tables").mkdir()
    _edit(folder, "model.toml", "emissions = ", 'emissions = "tables"')
    msg = _error(folder)
    _one_line(msg)
    assert msg == f"{folder / 'tables'}: is a directory, expected a TSV table file", msg


SECRET = "root:x:0:0:secret-first-line:/root:/bin/sh"


@pytest.mark.parametrize(
    "make_path, found",
    [
        (lambda folder, outside: str(outside), "is an absolute path"),
        (lambda folder, outside: "../outside.tsv", "leads outside the model folder (by '..')"),
        (lambda folder, outside: "sub/../../outside.tsv", "leads outside the model folder"),
    ],
    ids=["absolute", "dotdot", "nested-dotdot"],
)
def test_table_paths_are_confined_to_the_model_folder(tmp_path, make_path, found):
    folder = _copy(tmp_path)
    (folder / "sub").mkdir()
    outside = tmp_path / "outside.tsv"
    outside.write_text(SECRET + "\n", encoding="utf-8")
    line = _edit(folder, "model.toml", "start = ", f'start = "{make_path(folder, outside)}"')
    msg = _error(folder)
    _one_line(msg)
    assert _names_line(msg, "model.toml", line), msg
    assert found in msg and "stay inside it" in msg, msg
    assert "secret" not in msg, msg


def test_etc_passwd_as_a_table_is_refused_unread(tmp_path):
    folder = _copy(tmp_path)
    _edit(folder, "model.toml", "start = ", 'start = "/etc/passwd"')
    msg = _error(folder)
    assert "is an absolute path" in msg and "root:x" not in msg and "/bin/" not in msg, msg


@pytest.mark.parametrize("which", ["named", "default"])
def test_symbolic_link_out_of_the_model_folder_is_refused(tmp_path, which):
    folder = _copy(tmp_path)
    outside = tmp_path / "outside.tsv"
    outside.write_text(SECRET + "\n", encoding="utf-8")
    if which == "named":
        (folder / "link.tsv").symlink_to(outside)
        _edit(folder, "model.toml", "start = ", 'start = "link.tsv"')
    else:
        # no [tables] entry: the default start.tsv is itself the link
        _edit(folder, "model.toml", "start = ", None)
        (folder / "start.tsv").unlink()
        (folder / "start.tsv").symlink_to(outside)
    msg = _error(folder)
    _one_line(msg)
    assert "through a symbolic link" in msg and "secret" not in msg, msg


def test_symbolic_link_inside_the_model_folder_is_read(tmp_path):
    folder = _copy(tmp_path)
    (folder / "start.tsv").rename(folder / "real_start.tsv")
    (folder / "start.tsv").symlink_to(folder / "real_start.tsv")
    assert load_model(folder).equals(load_model(CORPUS / "base"))


def test_a_foreign_first_line_is_not_echoed(tmp_path):
    # a file that is not a table, inside the folder: described, never printed
    folder = _copy(tmp_path)
    (folder / "start.tsv").write_text(SECRET + "\nbg\t1\n", encoding="utf-8")
    msg = _error(folder)
    assert _names_line(msg, "start.tsv", 1), msg
    assert "secret" not in msg and "root:x" not in msg, msg
    assert "expected 'state<TAB>start'" in msg, msg


@pytest.mark.parametrize(
    "fname, old, new",
    [
        ("transitions.tsv", "p\t", "p\t1e308\t1e308"),
        ("start.tsv", "p\t", "p\t1.7e308"),
        ("emissions.tsv", "p\t", "p\t.\t1e308\t1e308\t1\t1"),
    ],
    ids=["transitions", "start", "emissions"],
)
def test_normalize_counts_that_overflow_when_summed(tmp_path, fname, old, new):
    # 1e308 + 1e308 is inf in IEEE 754 double precision (common practice)
    folder = _copy(tmp_path, "counts")
    if fname == "start.tsv":
        _edit(folder, fname, "q\t", "q\t1.7e308")
    line = _edit(folder, fname, old, new)
    msg = _error(folder)
    _one_line(msg)
    assert fname in msg and "overflow" in msg, msg
    if fname != "start.tsv":
        assert _names_line(msg, fname, line), msg
    else:
        assert re.search(r"start\.tsv line \d+", msg), msg


def test_manifest_that_is_not_utf8(tmp_path):
    folder = _copy(tmp_path)
    path = folder / "model.toml"
    lines = path.read_bytes().split(b"\n")
    line = lines.index(b'name = "corpus-base"') + 1
    lines[line - 1] = b'name = "corpus-\xff-base"'
    path.write_bytes(b"\n".join(lines))
    msg = _error(folder)
    _one_line(msg)
    assert _names_line(msg, "model.toml", line), msg
    assert "not UTF-8 text" in msg and "0xFF" in msg and "column 16" in msg, msg


def test_table_that_is_not_utf8_names_the_line(tmp_path):
    folder = _copy(tmp_path)
    path = folder / "start.tsv"
    body = path.read_bytes()
    path.write_bytes(body.replace(b"up\t", b"u\xe9p\t"))
    line = body.split(b"\n").index(next(x for x in body.split(b"\n") if x.startswith(b"up\t")))
    msg = _error(folder)
    assert _names_line(msg, "start.tsv", line + 1) and "0xE9" in msg, msg


def test_byte_order_mark_in_manifest_and_tables_is_accepted(tmp_path):
    # a UTF-8 byte-order mark (The Unicode Standard, section 23.8), as some spreadsheet
    # programs write it, must not change what is read
    folder = _copy(tmp_path)
    for name in ("model.toml", "start.tsv", "transitions.tsv", "emissions.tsv", "end.tsv"):
        path = folder / name
        path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
    assert load_model(folder).equals(load_model(CORPUS / "base"))


def test_manifest_with_cr_only_line_ends(tmp_path):
    folder = _copy(tmp_path)
    path = folder / "model.toml"
    path.write_bytes(path.read_bytes().replace(b"\n", b"\r"))
    msg = _error(folder)
    assert "CR-only line endings" in msg and _names_line(msg, "model.toml", 1), msg


def test_compressed_table_is_named(tmp_path):
    import gzip

    folder = _copy(tmp_path)
    path = folder / "start.tsv"
    path.write_bytes(gzip.compress(path.read_bytes()))
    msg = _error(folder)
    assert msg.startswith(f"{path}: compressed with gzip"), msg


# ------------------------------------------------------------------ bombs
def test_emission_table_over_the_limit_is_refused_before_reading(tmp_path):
    # 2 states x 8 symbols^9 (order 8): the corpus folder has no tables, so an error
    # about their size (not about a missing file) shows nothing was read or allocated
    msg = _error(CORPUS / "bomb-order8")
    _one_line(msg)
    manifest = CORPUS / "bomb-order8" / "model.toml"
    line = manifest.read_text(encoding="utf-8").split("\n").index("order = 8") + 1
    assert _names_line(msg, "model.toml", line), msg
    assert "268,435,456 probabilities" in msg and "2 GiB" in msg, msg
    assert "limit is 16,777,216 (128 MiB)" in msg, msg


def test_order_8_with_20_symbols_is_refused(tmp_path):
    folder = _copy(tmp_path)
    _edit(folder, "model.toml", "alphabet = ", 'alphabet = "ACDEFGHIKLMNPQRSTVWY"')
    _edit(folder, "model.toml", "order = ", "order = 8")
    msg = _error(folder)
    # 3 states x 20^9 = 1.536e12 probabilities, 11.2 TiB as float64
    assert "1,536,000,000,000 probabilities" in msg and "11.2 TiB" in msg, msg


def test_model_check_refuses_the_bomb_at_once():
    from click.testing import CliRunner

    from seqstate.cli import main

    result = CliRunner().invoke(main, ["model", "check", str(CORPUS / "bomb-order8")])
    assert result.exit_code == 1, result.output
    lines = result.output.strip().split("\n")
    assert len(lines) == 1 and lines[0].startswith("error: ") and "limit" in lines[0], lines


def test_make_model_refuses_an_emission_table_over_the_limit():
    from seqstate.model import emission_size_problem

    assert emission_size_problem(64, 4, 8) is None  # 64 x 4^9 = 2^24, the limit itself
    assert "17,039,360 probabilities" in emission_size_problem(65, 4, 8)  # 65 x 4^9
    states = [State(f"s{i}") for i in range(65)]
    with pytest.raises(ModelFormatError, match="limit is 16,777,216"):
        make_model(
            name="big",
            alphabet="ACGT",
            states=states,
            start=np.full(65, 1 / 65),
            transitions=np.full((65, 65), 1 / 65),
            emissions=np.full((65, 1, 4), 0.25),  # the size is refused before shapes
            order=8,
        )


# ------------------------------------------------------------------ [defaults]
def test_builtin_cpg_models_default_to_200_bases():
    from seqstate.model import default_thresholds

    # Gardiner-Garden & Frommer 1987, J. Mol. Biol. 196:261: islands are at least 200 bp
    for name in ("cpg-island", "cpg-island-8"):
        assert default_thresholds(load_model(name)) == {"min_posterior": 0.5, "min_length": 200}
    # a model without [defaults] keeps the built-in values
    assert default_thresholds(load_model(CORPUS / "base")) == {
        "min_posterior": 0.5,
        "min_length": 1,
    }


@pytest.mark.parametrize(
    "entry, found",
    [
        ("min_length = 0", "min_length = 0 must be a whole number of bases, at least 1"),
        ("min_length = 2.5", "min_length = 2.5 must be a whole number"),
        ('min_length = "200"', "min_length = '200' must be"),
        ("min_posterior = 1.5", "min_posterior = 1.5 must be a number from 0 to 1"),
        ("min_posterior = nan", "min_posterior = nan must be"),
        ("min_lenght = 200", "unknown key 'min_lenght'"),
    ],
)
def test_defaults_table_is_validated(tmp_path, entry, found):
    folder = _copy(tmp_path)
    path = folder / "model.toml"
    text = path.read_text(encoding="utf-8")
    path.write_text(text.replace("[tables]", f"[defaults]\n{entry}\n\n[tables]"), encoding="utf-8")
    msg = _error(folder)
    assert found in msg, msg
    assert _names_line(msg, "model.toml", _manifest_line(folder, entry)), msg


def test_defaults_survive_a_round_trip(tmp_path):
    folder = _copy(tmp_path)
    path = folder / "model.toml"
    text = path.read_text(encoding="utf-8")
    path.write_text(
        text.replace("[tables]", "[defaults]\nmin_length = 30\nmin_posterior = 0.8\n\n[tables]"),
        encoding="utf-8",
    )
    model = load_model(folder)
    save_model(model, tmp_path / "again")
    back = load_model(tmp_path / "again")
    assert back.equals(model)
    assert back.extra["defaults"] == {"min_length": 30, "min_posterior": 0.8}


def test_a_huge_file_given_as_manifest_is_refused_unread(tmp_path):
    from seqstate.io.tables import MAX_MANIFEST_BYTES

    big = tmp_path / "genome.toml"
    with open(big, "wb") as fh:  # sparse: no disk space used
        fh.truncate(MAX_MANIFEST_BYTES + 1)
    with pytest.raises(ModelFormatError) as info:
        load_model(big)
    assert "more than a manifest may be" in str(info.value), str(info.value)
