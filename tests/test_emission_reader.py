"""The bulk reader of emission tables (``_emissions_fast``) against the line-by-line one.

The fast path must give exactly the arrays of the line-by-line reader on every table it
accepts, and hand anything unusual (spaces, empty cells, words, duplicates, missing
contexts, bad sums) to the line-by-line reader, whose messages the other table tests check.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from seqstate.errors import TableFormatError
from seqstate.io import tsv_tables
from seqstate.io.tables import list_builtin, load_model, save_model
from seqstate.io.tsv_tables import read_text

REPO = Path(__file__).resolve().parent.parent


def _same(x, y) -> bool:
    full_x, lower_x = x
    full_y, lower_y = y
    return (
        np.array_equal(full_x, full_y, equal_nan=True)
        and lower_x.keys() == lower_y.keys()
        and all(np.array_equal(lower_x[j], lower_y[j], equal_nan=True) for j in lower_x)
    )


def _both(path: Path, names, alphabet, order, strict):
    data = read_text(path, TableFormatError, "TSV table")
    fast = tsv_tables._emissions_fast(data, names, alphabet, order, strict)
    try:
        slow = tsv_tables._emissions_by_line(path, data, names, alphabet, order, strict)
    except TableFormatError:
        slow = None
    return fast, slow


@pytest.mark.parametrize("name", list_builtin())
def test_builtin_tables_read_the_same_both_ways(name):
    model = load_model(name)
    path = REPO / "models" / name / "emissions.tsv"
    for strict in (False, True):
        fast, slow = _both(path, list(model.state_names), model.alphabet, model.order, strict)
        if slow is None:
            assert fast is None  # a strict reading the table fails: left to the slow reader
        else:
            assert fast is not None and _same(fast, slow)


def _random_table(tmp_path: Path, order: int, seed: int) -> tuple[Path, list[str], str]:
    """A model's emission table as save_model writes it, with back-off rows."""
    from seqstate.model import Model, State

    rng = np.random.default_rng(seed)
    names = ["s0", "s1", "s2"]
    a = 4
    emis = rng.random((3, a**order, a)) + 1e-3
    emis /= emis.sum(axis=2, keepdims=True)
    lower = {j: rng.dirichlet(np.ones(a), size=(3, a**j)) for j in range(order)}
    model = Model(
        name="t",
        description="a random table",
        alphabet="ACGT",
        order=order,
        states=tuple(State(n, None, None) for n in names),
        start=np.full(3, 1 / 3),
        transitions=np.full((3, 3), 1 / 3),
        emissions=emis,
        lower_emissions=lower,
    )
    save_model(model, tmp_path / "m")
    return tmp_path / "m" / "emissions.tsv", names, "ACGT"


@pytest.mark.parametrize("order,seed", [(0, 1), (1, 2), (2, 3), (3, 4)])
def test_random_tables_read_the_same_both_ways(tmp_path, order, seed):
    path, names, alphabet = _random_table(tmp_path, order, seed)
    for strict in (False, True):
        fast, slow = _both(path, names, alphabet, order, strict)
        assert fast is not None and slow is not None and _same(fast, slow)


@pytest.mark.parametrize(
    "damage",
    [
        lambda t: t.replace("\t0.", "\t 0.", 1),  # a space in a cell
        lambda t: t.replace("\t0.", "\t\t0.", 1),  # a row with one cell too many
        lambda t: t.replace("\t0.", "\t1_0.", 1),  # an underscore (float() would take it)
        lambda t: t.replace("\t0.", "\tinf0.", 1),  # a word
        lambda t: t + t.splitlines()[-1] + "\n",  # a duplicate row
        lambda t: "\n".join(t.splitlines()[:-1]) + "\n",  # a missing context
        lambda t: t.replace("s1\t", "sX\t", 1),  # an unknown state
        lambda t: t.replace("\t0.", "\t-0.", 1),  # a negative cell
        lambda t: t.replace("\n", "\u2028", 1),  # a line end bytes do not split on
    ],
)
def test_unusual_tables_go_to_the_line_reader(tmp_path, damage):
    path, names, alphabet = _random_table(tmp_path, 1, 7)
    path.write_text(damage(path.read_text()), encoding="utf-8")
    data = read_text(path, TableFormatError, "TSV table")
    assert tsv_tables._emissions_fast(data, names, alphabet, 1, False) is None


def test_empty_cell_reads_as_zero_through_the_line_reader(tmp_path):
    path, names, alphabet = _random_table(tmp_path, 0, 9)
    lines = path.read_text().splitlines()
    head, *rows = lines
    fields = rows[0].split("\t")
    fields[2] = ""
    path.write_text("\n".join([head, "\t".join(fields), *rows[1:]]) + "\n", encoding="utf-8")
    data = read_text(path, TableFormatError, "TSV table")
    assert tsv_tables._emissions_fast(data, names, alphabet, 0, False) is None
    full, _ = tsv_tables.read_emissions(path, names, alphabet, 0, False)
    assert full[names.index(fields[0]), 0, 0] == 0.0
