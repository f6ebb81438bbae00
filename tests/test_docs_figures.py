"""The structural figures the READMEs publish (state and move counts, signal widths) match the
models: parsed from README.md and models/README.md, compared with `seqstate model check` and
with the same figures derived here from the tables themselves (walking the allowed moves and
the emission zeros, not the state names), so a changed layout cannot leave the text behind."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from seqstate.cli import main
from seqstate.io.tables import list_builtin, load_model
from seqstate.kinds.gene_layout import DEFAULT_SHAPE, build_layout
from seqstate.model import Model

REPO = Path(__file__).resolve().parent.parent
README = (REPO / "README.md").read_text(encoding="utf-8")
MODELS_README = (REPO / "models" / "README.md").read_text(encoding="utf-8")


def flat(text: str) -> str:
    """Markdown text with its line breaks folded (a figure may wrap)."""
    return re.sub(r"\s+", " ", text)


def between(text: str, first: str, last: str) -> str:
    """The text from ``first`` up to (without) ``last``; both must be there."""
    text = flat(text)
    assert first in text, f"the documents lost the passage starting {first!r}"
    i = text.index(first)
    j = text.index(last, i)
    return text[i:j]


def one(pattern: str, text: str) -> int:
    """The one integer ``pattern`` captures in ``text`` (it must occur once)."""
    found = re.findall(pattern, text)
    assert len(found) == 1, (pattern, found, text)
    return int(found[0])


# ---------------------------------------------------------------- figures from the tables
def _successors(m: Model, i: int) -> list[int]:
    return [int(j) for j in np.flatnonzero(m.transitions[i] > 0)]


def _only_base(m: Model, i: int) -> str | None:
    """The one base state ``i`` can emit in every context (None if it can emit several)."""
    can = np.any(m.emissions[i] > 0, axis=0)
    return m.alphabet[int(np.flatnonzero(can)[0])] if can.sum() == 1 else None


def structure(m: Model) -> dict[str, object]:
    """States, allowed moves and the plus-strand signal widths of a gene layout, derived from
    its moves and emission zeros: the start flank is the run of unlabelled plus-strand states
    from ``intergenic`` to the first coding state; the stop flank the unlabelled run back from
    ``intergenic`` to the last coding state; a donor window is the chain from an intron state
    entered from a coding state up to the self-looping body (less the two bases, which must be
    G then T); an acceptor window the chain from the body's exit to a coding state (less A, G)."""
    names = m.state_names
    label = [s.label for s in m.states]
    strand = [s.strand for s in m.states]
    inter = names.index("intergenic")
    plus = [i for i in range(m.n_states) if strand[i] == "+"]

    (first,) = [j for j in _successors(m, inter) if strand[j] == "+"]
    up = 0
    while label[first] is None:
        up += 1
        (first,) = _successors(m, first)
    last = [i for i in plus if inter in _successors(m, i)]
    down = 0
    while last and label[last[0]] is None:
        down += 1
        last = [i for i in plus if last[0] in _successors(m, i)]

    donors, acceptors = set(), set()
    entries = [
        i
        for i in plus
        if label[i] == "intron" and any(label[p] == "CDS" and i in _successors(m, p) for p in plus)
    ]
    for entry in entries:
        chain = [entry]
        while chain[-1] not in _successors(m, chain[-1]):  # up to the self-looping body
            (nxt,) = _successors(m, chain[-1])
            chain.append(nxt)
        body = chain.pop()
        assert [_only_base(m, i) for i in chain[:2]] == ["G", "T"], names[entry]
        donors.add(len(chain) - 2)
        (state,) = [j for j in _successors(m, body) if j != body]
        chain = [state]
        while label[chain[-1]] == "intron":
            nxt = _successors(m, chain[-1])
            assert len(nxt) == 1 or all(label[j] == "CDS" for j in nxt), names[chain[-1]]
            chain.append(nxt[0])  # the last acceptor state may enter several coding states
        chain.pop()
        assert [_only_base(m, i) for i in chain[-2:]] == ["A", "G"], names[entry]
        acceptors.add(len(chain) - 2)
    assert len(entries) == 6 and len(donors) == 1 and len(acceptors) == 1, (donors, acceptors)
    return {
        "states": m.n_states,
        "moves": int(np.count_nonzero(m.transitions)),
        "up": up,
        "down": down,
        "donor": donors.pop(),
        "acceptor": acceptors.pop(),
        "repeat": "repeat" in names,
    }


@pytest.fixture(scope="module")
def shipped() -> dict[str, object]:
    fitted = structure(load_model("gene-segment"))
    # the fitted model keeps its start model's layout: same moves, same emission zeros
    assert structure(load_model("gene-segment-layout")) == fitted
    return fitted


@pytest.fixture(scope="module")
def first_layout() -> dict[str, object]:
    return structure(build_layout(3, shape=DEFAULT_SHAPE))


def model_check(name: str) -> dict[str, object]:
    """The figures `seqstate model check NAME` prints on its states and layout lines."""
    res = CliRunner().invoke(main, ["model", "check", name])
    assert res.exit_code == 0, res.output
    text = res.output
    states, moves = re.search(r"^states +(\d+), allowed moves (\d+)$", text, re.M).groups()
    layout = re.search(
        r"^layout +start flank (\d+), stop flank (\d+), donor GT\+(\d+), acceptor (\d+)\+AG, "
        r"intron body one self-looping state, repeat state (yes|no)$",
        text,
        re.M,
    )
    assert layout is not None, text
    up, down, donor, acceptor, repeat = layout.groups()
    return {
        "states": int(states),
        "moves": int(moves),
        "up": int(up),
        "down": int(down),
        "donor": int(donor),
        "acceptor": int(acceptor),
        "repeat": repeat == "yes",
    }


# ---------------------------------------------------------------- the tests
@pytest.mark.parametrize("name", ["gene-segment", "gene-segment-layout"])
def test_model_check_prints_the_figures_of_the_tables(name, shipped):
    assert model_check(name) == shipped


def figures(text: str, up: str, down: str) -> dict[str, object]:
    """The figures one passage gives: ``up`` and ``down`` capture the flank widths (a
    passage that says "no stop flank" has none)."""
    return {
        "states": one(r"(\d+) states, \d+ allowed moves", text),
        "moves": one(r"\d+ states, (\d+) allowed moves", text),
        "up": one(up, text),
        "down": 0 if "no stop flank" in text else one(down, text),
        "donor": one(r"GT\+(\d+)", text),
        "acceptor": one(r"(\d+)\+AG", text),
        "repeat": "a `repeat` state" in text,
    }


def test_readme_gene_paragraph_describes_the_shipped_model(shipped):
    text = between(README, "The layout (ours) tracks codon position", "`gene-segment-layout` is")
    doc = figures(
        text, r"(\d+)-base flank before the start codon", r"(\d+)-base flank after the stop codon"
    )
    assert doc == shipped


def test_readme_names_the_first_layout_apart(first_layout):
    text = between(README, "The smaller first layout", "no built-in model uses it")
    assert "no `repeat`" in text
    assert figures(text, r"(\d+)-base start flank", r"(\d+)-base stop flank") == first_layout


def test_models_readme_structure_paragraph(shipped, first_layout):
    text = between(MODELS_README, "Structure of `gene-segment`", "## Rebuilding")
    ours, first = text.split("The first layout")
    up, down = r"start flank of (\d+) bases", r"stop flank of (\d+)"
    assert figures(ours, up, down) == shipped
    assert figures(first, up, down) == first_layout


def test_models_readme_gene_rows(shipped):
    for name in ("gene-segment-layout", "gene-segment"):
        row = next(ln for ln in MODELS_README.splitlines() if ln.startswith(f"| `{name}` |"))
        assert int(row.split("|")[2]) == shipped["states"], row
    row = next(ln for ln in MODELS_README.splitlines() if ln.startswith("| `gene-segment-layout`"))
    assert one(r"a start flank of (\d+) bases", row) == shipped["up"]
    assert one(r"a stop flank of (\d+)", row) == shipped["down"]
    assert one(r"GT \+ (\d+)", row) == shipped["donor"]
    assert one(r"(\d+) \+ AG", row) == shipped["acceptor"]


def test_models_readme_table_counts_states_and_order_of_every_builtin():
    table = MODELS_README.split("Structure of `gene-segment`")[0]  # the first table only
    rows = {
        ln.split("|")[1].strip().strip("`"): ln.split("|")
        for ln in table.splitlines()
        if ln.startswith("| `")
    }
    assert sorted(rows) == sorted(list_builtin())
    for name, cells in rows.items():
        m = load_model(name)
        assert int(cells[2].split()[0]) == m.n_states, name
        assert int(cells[3]) == m.order, name


# ---------------------------------------------------------------- the workflow's documents
def test_files_the_workflow_config_names_exist():
    text = (REPO / "workflow" / "config.yaml").read_text(encoding="utf-8")
    named = set(re.findall(r"\bworkflow/[\w./-]+\w", text))
    assert "workflow/README.md" in named
    for path in sorted(named):
        assert (REPO / path).exists(), path


def test_workflow_readme_documents_every_config_key():
    import yaml  # snakemake's own dependency (the workflow reads its config as YAML)

    config = yaml.safe_load((REPO / "workflow" / "config.yaml").read_text(encoding="utf-8"))
    doc = (REPO / "workflow" / "README.md").read_text(encoding="utf-8")
    for key, value in config.items():
        assert f"`{key}" in doc, key
        if isinstance(value, dict) and key != "resources":
            for sub in value:
                assert re.search(rf"`{key}\.{sub}`|`\.{sub}`", doc), f"{key}.{sub}"


# ---------------------------------------------------------------- fitted figures of the rows
def _row(name: str) -> str:
    return next(ln for ln in MODELS_README.splitlines() if ln.startswith(f"| `{name}` |"))


def test_readme_gene_paragraph_order_is_the_model_order():
    text = between(README, "The layout (ours) tracks codon position", "`gene-segment-layout` is")
    assert one(r"order-(\d+) emissions", text) == load_model("gene-segment").order


def test_models_readme_genes_used_are_the_provenance_of_each_fitted_model():
    # every row that says "N genes used" states its model's [provenance.labelling] genes_used
    rows = [ln for ln in MODELS_README.splitlines() if ln.startswith("| `") and "genes used" in ln]
    assert any(r.startswith("| `gene-segment` |") for r in rows)
    for row in rows:
        name = row.split("|")[1].strip().strip("`")
        used = one(r"(\d+) genes used", row.replace(",", ""))
        assert used == load_model(name).provenance["labelling"]["genes_used"], name


def test_models_readme_gene_segment_skips_and_intron_body():
    model = load_model("gene-segment")
    labelling = model.provenance["labelling"]
    row = flat(_row("gene-segment"))
    skipped = re.search(r"genes used; skipped: (.*?) \(the manifest", row)
    assert skipped is not None, row
    stated = sorted(int(n) for n in re.findall(r"(\d+) (?:whose|with)", skipped.group(1)))
    assert stated == sorted(labelling["genes_skipped"].values()), (stated, labelling)
    # "share one probability of staying (..., expected body 767 bases)": 1 / (1 - stay)
    names = model.state_names
    for strand in "+-":
        stays = {
            float(model.transitions[i, i])
            for i, n in enumerate(names)
            if n.endswith(f"_body{strand}")
        }
        assert len(stays) == 1, stays  # the six copies are tied
    (stay,) = stays
    assert one(r"expected body (\d+) bases", row) == round(1 / (1 - stay))
    assert "`states_without_counts` in the provenance is empty" in row
    assert model.provenance["states_without_counts"] == []


# ---------------------------------------------------------------- score --flank on the demo
def test_flank_500_gives_the_whole_record_values_to_about_1e9():
    # README.md ("--flank N and what it changes"): for cpg-island on the demo, --flank 500
    # or more gives the whole-record values "to about 1e-9" (our own claim, measured: the
    # float32 posteriors are identical and segment probabilities agree to 3e-10); the
    # regions are the demo's planted islands (examples/cex_draft1.truth.gff3)
    from seqstate.commands.inputs import read_records
    from seqstate.commands.score import read_regions, score_regions

    text = between(README, "**`--flank N` and what it changes.**", "### plot options")
    assert "`--flank 500` or more gives the whole-record values to about 1e-9" in text
    model = load_model("cpg-island")
    records = read_records(str(REPO / "examples" / "cex_draft1.fa.gz"), model)
    regions = read_regions(str(REPO / "examples" / "cex_draft1.truth.gff3")).regions
    whole = score_regions(model, records, regions, "CpG_island")
    flanked = score_regions(model, records, regions, "CpG_island", flank=500)
    assert len(whole) == len(flanked) == 11
    keys = ("mean_posterior", "min_posterior", "max_posterior", "segment_probability")
    worst = max(abs(w[k] - f[k]) for w, f in zip(whole, flanked) for k in keys)
    assert worst <= 1e-9, worst
    for w, f in zip(whole, flanked):
        assert abs(w["log_odds_nat"] - f["log_odds_nat"]) <= 1e-9 * max(1.0, abs(w["log_odds_nat"]))
