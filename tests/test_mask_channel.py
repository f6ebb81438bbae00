"""The soft-mask channel (``--masked evidence``): the mask as an observed symbol.

Oracle: with a mask table P(masked | state), a hidden Markov model over (base, mask)
pairs whose emission factor is P(base | context, state) * P(mask | state) -- the
product alphabet, the mask independent of the base given the state, an unknown base
carrying no mask evidence (factor 1).  A mask chain conditions P(mask | state) on the
previous position too (none or unknown, masked, unmasked), read from the letters.
Likelihoods, posteriors and the best path are then sums and maxima over every state
path (exhaustive enumeration, ``seqstate.engine.reference.brute_force``; common
practice), built here from the model's own tables and the record's letters, never from
the engine's code table.
The chain-sparse family needs 32 states or more, too many to enumerate: it is checked
against the plain-NumPy scaled forward-backward and Viterbi of
:mod:`seqstate.engine.reference` (Rabiner 1989, section V.A) on the same lattice.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from helpers import kernel_family, sample_record

from seqstate.cli import main
from seqstate.engine import api, reference, stream
from seqstate.io.tables import load_model, save_model
from seqstate.model import State, make_model

TOL = 1e-10


def _with_mask(model, rng, chain=False):
    """``model`` with a random mask table (values away from 0 and 1; ``chain``: a mask
    chain, shape (M, 3)) and explicit back-off rows (so that the oracle reads them as the
    engine does)."""
    rows = api.backoff_rows(model)
    shape = (model.n_states, 3) if chain else (model.n_states,)
    return make_model(
        name=model.name,
        alphabet=model.alphabet,
        states=model.states,
        start=model.start,
        transitions=model.transitions,
        emissions=model.emissions,
        end=model.end,
        order=model.order,
        lower_emissions={j: v.copy() for j, v in rows.items()},
        mask=rng.uniform(0.05, 0.95, size=shape),
    )


def _pm(model, seq: str, i: int) -> np.ndarray:
    """P(masked | state) at position i: the table, or the chain's column for what the
    position before holds (columns: none or unknown, masked, unmasked)."""
    if model.mask.ndim == 1:
        return model.mask
    before = seq[i - 1] if i > 0 else "N"
    if before.upper() not in model.alphabet:
        return model.mask[:, 0]
    return model.mask[:, 1] if before.islower() else model.mask[:, 2]


def _lattice(model, seq: str) -> np.ndarray:
    """lattice[i, s]: P(base_i | its clean context, s) * P(mask_i | s); 1 for unknown."""
    a, k = len(model.alphabet), model.order
    lower = model.lower_emissions
    out = np.ones((len(seq), model.n_states))
    run: list[int] = []
    for i, ch in enumerate(seq):
        x = model.alphabet.find(ch.upper())
        if x < 0:
            run = []
            continue
        ctx_syms = run[-k:] if k else []
        j = len(ctx_syms)
        ctx = 0
        for q in ctx_syms:
            ctx = ctx * a + q
        rows = model.emissions if j == k else lower[j]
        p = _pm(model, seq, i)
        out[i] = rows[:, ctx, x] * (p if ch.islower() else 1.0 - p)
        run.append(x)
    return out


def _record(rng, n: int) -> str:
    letters = rng.choice(list("ACGTacgtN"), size=n, p=[0.15] * 4 + [0.08] * 4 + [0.08])
    return "".join(letters)


def _end(model):
    return np.ones(model.n_states) if model.end is None else model.end


# (n_states, length, order, with_end, seed, family)
CASES = [
    (2, 8, 0, False, 31, "generic"),
    (3, 7, 1, True, 32, "generic"),
    (3, 6, 2, False, 33, "generic"),
    (2, 8, 1, True, 34, "small"),
    (3, 7, 0, False, 35, "small"),
    (3, 6, 2, True, 36, "small"),
]


@pytest.mark.parametrize("chain", [False, True], ids=["table", "chain"])
@pytest.mark.parametrize("m,n,k,with_end,seed,family", CASES)
def test_engine_equals_enumeration(random_model, m, n, k, with_end, seed, family, chain):
    rng = np.random.default_rng(seed)
    narrow = 2 if family == "small" and m > 2 else None
    base = random_model(
        rng, n_states=m, order=k, with_end=with_end, p_forbid=0.2, max_emitters=narrow
    )
    model = _with_mask(base, rng, chain)
    tables = api.prepare(model, mask=True, kernels=family)
    assert kernel_family(tables) == family
    for _ in range(200):
        seq = _record(rng, n)
        lattice = _lattice(model, seq)
        bf = reference.brute_force(model.start, model.transitions, _end(model), lattice)
        both = any(ch.islower() for ch in seq) and any(ch.isupper() for ch in seq)
        if bf["total"] > 0 and both:
            break
    else:
        raise AssertionError("no possible record with both cases drawn")
    codes = api.encode(tables, seq)
    assert np.allclose(tables.E[codes.astype(np.int64)], lattice, rtol=1e-13, atol=0)
    assert api.loglik(tables, codes) == pytest.approx(bf["loglik"], abs=TOL)
    post = api.posterior(tables, codes, dtype=np.float64)
    assert np.allclose(post.values, bf["posterior"], atol=TOL)
    path, lp = api.viterbi(tables, codes)
    assert path.tolist() == bf["best_path"].tolist()
    assert lp == pytest.approx(bf["best_logp"], abs=TOL)


@pytest.mark.parametrize("chain", [False, True], ids=["table", "chain"])
def test_sparse_family_equals_reference(random_model, chain):
    rng = np.random.default_rng(41)
    base = random_model(rng, n_states=40, order=2, with_end=True, layout="chains")
    model = _with_mask(base, rng, chain)
    tables = api.prepare(model, mask=True, kernels="sparse")
    assert kernel_family(tables) == "sparse"
    plain = api.prepare(model)
    seq = sample_record(rng, 400, p_unknown=0.03, model=model, tables=plain, n_run=4)
    text = str(seq)
    # soft-mask stretches of the drawn record (the record stays possible)
    chars = list(text)
    for a in (30, 150, 310):
        chars[a : a + 40] = [c.lower() for c in chars[a : a + 40]]
    text = "".join(chars)
    lattice = _lattice(model, text)
    ll, post_ref = reference.forward_backward(model.start, model.transitions, _end(model), lattice)
    path_ref, lp_ref = reference.viterbi(model.start, model.transitions, _end(model), lattice)
    codes = api.encode(tables, text)
    assert api.loglik(tables, codes) == pytest.approx(ll, abs=1e-8)
    post = api.posterior(tables, codes, dtype=np.float64)
    assert np.allclose(post.values, post_ref, atol=1e-9)
    path, lp = api.viterbi(tables, codes)
    assert path.tolist() == path_ref.tolist()
    assert lp == pytest.approx(lp_ref, abs=1e-8)


@pytest.mark.parametrize("chain", [False, True], ids=["table", "chain"])
@pytest.mark.parametrize("family", ["generic", "small", "sparse"])
def test_even_mask_changes_nothing_but_the_likelihood(random_model, family, chain):
    """P(masked | state) = 0.5 in every state: the mask says nothing about the state, so
    posteriors and the best path equal those without the mask; the log-likelihood is
    lower by ln 2 per known base."""
    rng = np.random.default_rng(51)
    if family == "sparse":
        base = random_model(rng, n_states=40, order=1, with_end=True, layout="chains")
    else:
        base = random_model(rng, n_states=3, order=1, max_emitters=2)
    model = make_model(
        name=base.name,
        alphabet=base.alphabet,
        states=base.states,
        start=base.start,
        transitions=base.transitions,
        emissions=base.emissions,
        end=base.end,
        order=base.order,
        mask=np.full((base.n_states, 3) if chain else base.n_states, 0.5),
    )
    plain = api.prepare(model, kernels=family)
    masked = api.prepare(model, mask=True, kernels=family)
    seq = sample_record(rng, 3000, p_unknown=0.02, model=model, tables=plain, n_run=4)
    text = str(seq)
    text = "".join(c.lower() if (i // 97) % 3 == 0 else c for i, c in enumerate(text))
    c0, c1 = api.encode(plain, text), api.encode(masked, text)
    assert int(c1.max()) >= masked.mask_codes  # masked codes are really used
    known = sum(1 for c in text if c.upper() in "ACGT")
    p0 = api.posterior(plain, c0, dtype=np.float64)
    p1 = api.posterior(masked, c1, dtype=np.float64)
    assert p1.loglik == pytest.approx(p0.loglik + known * np.log(0.5), abs=1e-7)
    assert np.allclose(p0.values, p1.values, atol=1e-12)
    assert api.viterbi(plain, c0)[0].tolist() == api.viterbi(masked, c1)[0].tolist()


@pytest.mark.parametrize("order,chain", [(2, False), (2, True), (0, True)])
def test_streaming_in_chunks_equals_the_whole_record(random_model, order, chain):
    """Codes read window by window (with the context before each window, at least one
    base, as the long-record path of annotate reads them) equal the whole record's, and
    the streamed checkpoints equal the whole-record posterior's."""
    rng = np.random.default_rng(61)
    base = random_model(rng, n_states=40, order=order, with_end=True, layout="chains")
    model = _with_mask(base, rng, chain)
    tables = api.prepare(model, mask=True)
    plain = api.prepare(model)
    seq = sample_record(rng, 5000, p_unknown=0.01, model=model, tables=plain, n_run=4)
    text = str(seq)
    text = "".join(c.lower() if (i // 211) % 2 else c for i, c in enumerate(text))
    whole = api.encode(tables, text)
    k = max(tables.order, 1)
    for step in (7, 1000, 4096):
        pieces = []
        for a in range(0, len(text), step):
            lo = max(0, a - k)
            sym = api.symbols_of(tables, text[lo : a + step])
            pieces.append(api.encode_symbols(tables, sym)[a - lo :])
        assert np.array_equal(np.concatenate(pieces), whole)
    post = api.posterior(tables, whole, block=64)
    ck = stream.checkpoints(tables, len(text), lambda a, b: whole[a:b], block=64, chunk=300)
    assert ck.loglik == post.loglik
    assert np.array_equal(ck.alpha_ck, post.alpha_ck)
    assert np.array_equal(ck.beta_ck, post.beta_ck)


def test_unknown_bases_ignore_the_mask():
    """An N (or an ambiguity code) in lower case is the unknown code, factor 1."""
    model = _two_state(mask=[0.9, 0.1])
    tables = api.prepare(model, mask=True)
    codes = api.encode(tables, "AnNrcC")
    assert codes[1] == codes[2] == codes[3] == tables.unknown_code
    assert codes[4] >= tables.mask_codes > codes[5]
    assert np.all(tables.E[tables.unknown_code] == 1.0)


def _two_state(mask=None, name="twostate"):
    return make_model(
        name=name,
        alphabet="ACGT",
        states=[State("gene", "CDS", "+"), State("rep", "repeat_region", None)],
        start=[0.5, 0.5],
        transitions=[[0.99, 0.01], [0.01, 0.99]],
        emissions=[[0.2, 0.3, 0.3, 0.2], [0.3, 0.2, 0.2, 0.3]],
        mask=mask,
    )


def test_mask_table_round_trip(tmp_path):
    model = _two_state(mask=[0.125, 0.875])
    manifest = save_model(model, tmp_path / "m")
    assert (tmp_path / "m" / "mask.tsv").read_text() == "state\tmask\ngene\t0.125\nrep\t0.875\n"
    assert 'mask = "mask.tsv"' in manifest.read_text()
    back = load_model(tmp_path / "m")
    assert back.equals(model)
    assert not back.equals(_two_state())
    chain = _two_state(mask=[[0.5, 0.25, 0.125], [0.75, 0.875, 0.0625]])
    save_model(chain, tmp_path / "c")
    assert (tmp_path / "c" / "mask.tsv").read_text() == (
        "state\tmask\tafter_masked\tafter_unmasked\n"
        "gene\t0.5\t0.25\t0.125\nrep\t0.75\t0.875\t0.0625\n"
    )
    back = load_model(tmp_path / "c")
    assert back.equals(chain) and not back.equals(model)
    plain = save_model(_two_state(), tmp_path / "p")
    assert not (tmp_path / "p" / "mask.tsv").exists()
    assert load_model(plain).mask is None


@pytest.mark.parametrize(
    "text,expected",
    [
        ("state\tmask\ngene\t0.1\nrep\t1.5\n", "P(masked) 1.5 is above 1"),
        ("state\tmask\ngene\t0.1\n", "no row for state 'rep'"),
        ("state\tmask\ngene\t0.1\nrep\t-0.2\n", "is negative"),
        ("state\tP\ngene\t0.1\nrep\t0.2\n", "expected 'state<TAB>mask'"),
        ("state\tmask\ngene\t0.1\t0.2\nrep\t0.2\n", "found 3 columns, expected 2"),
        (
            "state\tmask\tafter_masked\tafter_unmasked\ngene\t0.1\t2\t0.3\nrep\t0\t0\t0\n",
            "P(masked) 2 is above 1",
        ),
    ],
)
def test_bad_mask_table_is_one_error_line(tmp_path, text, expected):
    save_model(_two_state(mask=[0.5, 0.5]), tmp_path / "m")
    (tmp_path / "m" / "mask.tsv").write_text(text)
    res = CliRunner().invoke(main, ["model", "check", str(tmp_path / "m")])
    assert res.exit_code != 0
    lines = [ln for ln in res.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("error:"), res.output
    assert "mask.tsv" in lines[0] and expected in lines[0]
    assert "Traceback" not in res.output


def test_model_check_shows_the_mask(tmp_path):
    save_model(_two_state(mask=[0.125, 0.875]), tmp_path / "m")
    res = CliRunner().invoke(main, ["model", "check", str(tmp_path / "m")])
    assert res.exit_code == 0, res.output
    assert "mask      P(base soft-masked | state)" in res.output
    row = next(ln for ln in res.output.splitlines() if ln.startswith("rep "))
    assert "0.875" in row


# ---------------------------------------------------------------- fit
TWO = Path(__file__).resolve().parent / "data" / "fit" / "two-labels"
#: r1: alpha at 4-14, beta at 30-40 (0-based half-open), background elsewhere.  Lower
#: case: 4 of alpha's 10 bases (8-12), all of beta's (30-40), 5 background bases (50-55)
#: and an unknown 'n' at 55 (no mask evidence: not counted).
R1 = "ACGTACGTacgtACGTACGTACGTACGTACgtacgtacgtACGTACGTACacgtanCGTA"


def _fit_inputs(tmp_path):
    assert len(R1) == 60
    fasta = tmp_path / "r.fa"
    fasta.write_text(">r1\n" + R1 + "\n")
    bed = tmp_path / "r.bed"
    bed.write_text("r1\t4\t14\talpha\nr1\t30\t40\tbeta\n")
    return fasta, bed


def _cli(args):
    return CliRunner().invoke(main, [str(a) for a in args])


def test_fit_counts_the_mask_per_label(tmp_path):
    fasta, bed = _fit_inputs(tmp_path)
    out = tmp_path / "m"
    res = _cli(["fit", "-m", TWO, fasta, "--labels", bed, "--masked", "evidence", "-o", out])
    assert res.exit_code == 0, res.output
    model = load_model(out)
    # a mask chain, pseudocount 1 on both sides: (masked + 1) / (known + 2) per state and
    # column (no known base before, after a masked one, after an unmasked one), counted
    # here letter by letter
    label = ["bg"] * 60
    label[4:14] = ["a"] * 10
    label[30:40] = ["b"] * 10
    tally = {(s, j): [0, 0] for s in ("a", "b", "bg") for j in range(3)}
    for i, ch in enumerate(R1):
        if ch.upper() not in "ACGT":
            continue
        before = R1[i - 1] if i else "N"
        j = 0 if before.upper() not in "ACGT" else 1 if before.islower() else 2
        tally[label[i], j][ch.islower()] += 1
    assert tally["a", 2] == [5, 1] and tally["a", 1] == [1, 3]  # the hand count of alpha
    assert model.mask is not None and model.mask.shape == (3, 3)
    for s, name in enumerate(model.state_names):
        for j in range(3):
            n0, n1 = tally[name, j]
            want = (n1 + 1) / (n0 + n1 + 2)
            assert model.mask[s, j] == pytest.approx(want, rel=1e-12), (name, j)
    prov = model.provenance
    assert prov["masked"] == "evidence"
    assert "counted from the labelled bases" in prov["mask_table"]
    # the mask does not change the emission counts: the same tables as --masked base
    plain = tmp_path / "p"
    assert _cli(["fit", "-m", TWO, fasta, "--labels", bed, "-o", plain]).exit_code == 0
    base = load_model(plain)
    assert base.mask is None
    assert np.array_equal(base.emissions, model.emissions)
    assert np.array_equal(base.transitions, model.transitions)


def test_fit_pools_states_of_one_label():
    model = make_model(
        name="pools",
        alphabet="ACGT",
        states=[
            State("c1", "CDS", "+"),
            State("c2", "CDS", "-"),
            State("up1+", None, "+"),
            State("up2-", None, "-"),
            State("repeat"),
        ],
        start=[0.2] * 5,
        transitions=np.full((5, 5), 0.2),
        emissions=np.full((5, 4), 0.25),
    )
    from seqstate.commands.fit.estimation import estimate_mask, mask_pools

    pool, names = mask_pools(model)
    assert names == ["CDS", "up (unlabelled)", "repeat (unlabelled)"]
    assert pool.tolist() == [0, 0, 1, 1, 2]
    counts = np.array([[9.0, 1.0], [0.0, 0.0], [3.0, 3.0], [1.0, 1.0], [0.0, 8.0]])
    mask, kept = estimate_mask(model, counts, pseudocount=0.0)
    assert mask.tolist() == [0.1, 0.1, 0.5, 0.5, 1.0]
    assert kept == []


def test_fit_em_reestimates_the_mask(tmp_path):
    fasta, bed = _fit_inputs(tmp_path)
    out = tmp_path / "m"
    args = ["fit", "-m", TWO, fasta, "--labels", bed, "--masked", "evidence", "--em"]
    res = _cli([*args, "--max-iter", "3", "-o", out])
    assert res.exit_code == 0, res.output
    model = load_model(out)
    assert model.mask is not None
    assert "re-estimated by Baum-Welch" in model.provenance["mask_table"]
    # the written model reproduces the reported log-likelihood under mask evidence
    tables = api.prepare(model, mask=True)
    ll = api.loglik(tables, api.encode(tables, R1))
    assert ll == pytest.approx(model.provenance["loglik_nat"], abs=1e-9)


# ---------------------------------------------------------------- annotate
def _annotate(model, fasta, out, *extra):
    return _cli(["annotate", fasta, "-m", model, "-o", out, "--tracks", "none", *extra])


def test_annotate_evidence_without_a_mask_table_is_a_usage_error(tmp_path):
    fasta, _ = _fit_inputs(tmp_path)
    out = tmp_path / "out"
    res = _annotate(TWO, fasta, out, "--masked", "evidence")
    assert res.exit_code == 2, res.output
    lines = [ln for ln in res.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: "), res.output
    assert "has no mask table" in lines[0] and "--masked evidence" in lines[0]
    assert "seqstate fit" in lines[0]
    assert not out.exists()


def test_annotate_evidence_runs_and_is_deterministic(tmp_path):
    fasta, bed = _fit_inputs(tmp_path)
    model = tmp_path / "m"
    res = _cli(["fit", "-m", TWO, fasta, "--labels", bed, "--masked", "evidence", "-o", model])
    assert res.exit_code == 0, res.output
    outs = []
    for k in range(2):
        out = tmp_path / f"out{k}"
        res = _annotate(model, fasta, out, "--masked", "evidence")
        assert res.exit_code == 0, res.output
        outs.append({p.name: p.read_bytes() for p in sorted(out.iterdir())})
    assert sorted(outs[0]) == ["r.features.tsv", "r.gff3", "r.records.tsv", "r.run.json"]
    for name in ("r.features.tsv", "r.gff3"):
        assert outs[0][name] == outs[1][name], name
    report = json.loads(outs[0]["r.run.json"])
    assert report["options"]["masked"] == "evidence"
    base = tmp_path / "base"
    assert _annotate(model, fasta, base, "--masked", "base").exit_code == 0
    base_report = json.loads((base / "r.run.json").read_text())
    # the record's log-likelihood under mask evidence, from the engine directly
    fitted = load_model(model)
    tables = api.prepare(fitted, mask=True)
    want = api.loglik(tables, api.encode(tables, R1))
    ll = report["records"][0]["loglik_nat"]
    assert ll == pytest.approx(want, abs=1e-9)
    assert base_report["records"][0]["loglik_nat"] != pytest.approx(ll, abs=1e-3)


@pytest.mark.parametrize("command", ["score", "plot"])
def test_other_commands_refuse_evidence_without_a_mask_table(tmp_path, command):
    fasta, bed = _fit_inputs(tmp_path)
    if command == "score":
        args = ["score", fasta, "-m", TWO, "--regions", bed, "--label", "alpha"]
    else:
        args = ["plot", fasta, "-m", TWO, "--region", "r1:1-60", "-o", tmp_path / "p.svg"]
    res = _cli([*args, "--masked", "evidence"])
    assert res.exit_code == 2, res.output
    lines = [ln for ln in res.output.splitlines() if ln.strip()]
    assert len(lines) == 1 and "has no mask table" in lines[0], res.output


# ---------------------------------------------------------------- sample
@pytest.mark.parametrize(
    "mask", [[1.0, 0.0], [[1.0, 1.0, 1.0], [0.0, 0.0, 0.0]]], ids=["table", "chain"]
)
def test_sample_soft_masks_by_the_mask_table(tmp_path, mask):
    """P(masked) 1 in one state and 0 in the other: the lowercase bases are exactly the
    true features of the first; the bases themselves are those drawn without a mask."""
    masked = save_model(_two_state(mask=mask, name="m"), tmp_path / "m").parent
    plain = save_model(_two_state(name="m"), tmp_path / "p").parent
    runs = {}
    for name, folder in (("m", masked), ("p", plain)):
        fa, gff = tmp_path / f"{name}.fa", tmp_path / f"{name}.gff3"
        args = ["sample", folder, "--length", 5000, "--seed", 7, "-o", fa, "--truth", gff]
        res = _cli(args)
        assert res.exit_code == 0, res.output
        seq = "".join(ln for ln in fa.read_text().splitlines() if not ln.startswith(">"))
        runs[name] = (seq, gff.read_text())
    seq, gff = runs["m"]
    assert seq.upper() == runs["p"][0] and gff == runs["p"][1]
    want = np.zeros(len(seq), dtype=bool)
    for line in gff.splitlines():
        cols = line.split("\t")
        if len(cols) == 9 and cols[2] == "CDS":
            want[int(cols[3]) - 1 : int(cols[4])] = True  # GFF3: 1-based closed
    assert want.any() and not want.all()
    assert np.array_equal(np.array([c.islower() for c in seq]), want)


@pytest.mark.parametrize("masked", ["base", "unknown"])
def test_base_and_unknown_ignore_a_mask_table(tmp_path, masked):
    fasta, bed = _fit_inputs(tmp_path)
    with_mask = tmp_path / "m"
    args = ["fit", "-m", TWO, fasta, "--labels", bed, "--masked", "evidence", "-o", with_mask]
    assert _cli(args).exit_code == 0
    fitted = load_model(with_mask)
    assert fitted.mask is not None
    fitted.mask = None
    without = save_model(fitted, tmp_path / "w").parent
    gffs = []
    for folder in (with_mask, without):
        out = tmp_path / f"out-{folder.name}"
        res = _annotate(folder, fasta, out, "--masked", masked)
        assert res.exit_code == 0, res.output
        gffs.append((out / "r.features.tsv").read_bytes())
    assert gffs[0] == gffs[1]


def test_sample_follows_the_mask_chain(tmp_path):
    """A chain that never unmasks after a masked base and never masks after an unmasked
    one, started masked: every base of every record is lower case; started unmasked:
    none is."""
    for first, want in ((1.0, True), (0.0, False)):
        chain = [[first, 1.0, 0.0], [first, 1.0, 0.0]]
        folder = save_model(_two_state(mask=chain, name="c"), tmp_path / f"c{first}").parent
        fa = tmp_path / f"c{first}.fa"
        args = ["sample", folder, "--length", 3000, "--records", 2, "--seed", 3, "-o", fa]
        assert _cli(args).exit_code == 0
        seq = "".join(ln for ln in fa.read_text().splitlines() if not ln.startswith(">"))
        assert len(seq) == 6000 and all(c.islower() == want for c in seq)
