"""``seqstate model list`` and ``seqstate model check``: the built-in models, a model's summary."""

from __future__ import annotations

import numpy as np

from seqstate.io.tables import list_builtin, load_model, model_sha256, resolve_model_path
from seqstate.model import Model, default_thresholds


def list_lines() -> list[str]:
    """One line per built-in model: name, states, order, labels and description."""
    lines = []
    for name in list_builtin():
        m = load_model(name)
        labels = ", ".join(m.labels) or "no labels"
        about = m.description if len(m.description) <= 70 else m.description[:69] + "…"
        lines.append(f"{name}\t{m.n_states} states, order {m.order}, {labels}: {about}")
    return lines


def check(spec: str) -> str:
    """Load and validate the model ``spec`` (a built-in NAME or a PATH); its summary."""
    path = resolve_model_path(spec)
    m = load_model(spec)
    return summary(m, str(path), model_sha256(m))


def gene_layout_text(m: Model) -> str | None:
    """The signal sizes of a gene-segment layout, from its state names (None for a model
    of another kind): ``start flank 12, stop flank 6, donor GT+8, acceptor 28+AG, ...``
    (flank and window sizes in bases)."""
    from seqstate.kinds import GENES
    from seqstate.kinds.gene_layout import shape_of

    if not GENES.claims(m) or "i0_d1+" not in m.state_names:
        return None
    shape = shape_of(m.state_names)
    if shape.body_stages == (1,):
        body = "one self-looping state"
    else:
        body = "branches of " + " or ".join(str(r) for r in shape.body_stages) + " states"
    return (
        f"start flank {shape.up_flank}, stop flank {shape.down_flank}, donor "
        f"GT+{shape.donor_flank}, acceptor {shape.acceptor_flank}+AG, intron body {body}, "
        f"repeat state {'yes' if shape.repeat else 'no'}"
    )


def summary(m: Model, path: str, sha: str) -> str:
    """Readable summary of a model: states, labels, strands, transitions, stay lengths."""
    lines = [f"model     {m.name}", f"manifest  {path}"]
    if m.description:
        lines.append(f"about     {m.description}")
    lines.append(f"alphabet  {m.alphabet} ({len(m.alphabet)} symbols)")
    lines.append(f"order     {m.order} (emission depends on the previous {m.order} symbols)")
    lines.append(f"states    {m.n_states}, allowed moves {len(m.allowed_transitions())}")
    layout = gene_layout_text(m)
    if layout is not None:
        lines.append(f"layout    {layout}")
    lines.append(f"decode    {m.decode} (default)")
    thresholds = default_thresholds(m)
    lines.append(
        f"features  min_posterior {thresholds['min_posterior']:g}, min_length "
        f"{thresholds['min_length']} bases (defaults of annotate and plot)"
    )
    if m.end is None:
        lines.append("end       none given: any state may end a record")
    else:
        lines.append("end       P(record ends | state) given per state")
    if m.mask is not None:
        lines.append(
            "mask      P(base soft-masked | state) given per state (used by --masked evidence)"
            + ("" if m.mask.ndim == 1 else "; a chain: also after a masked and an unmasked base")
        )
    if m.recalibration is not None:
        lines.extend(recalibration_lines(m))
    lines.append(f"sha256    {sha}")
    lines.append("")
    stay = m.expected_stay()
    names = m.state_names
    w = max(5, max(len(n) for n in names))
    labels = [s.label or "-" for s in m.states]
    lw = max(5, max(len(x) for x in labels))
    lines.append(
        f"{'state':<{w}}  {'label':<{lw}}  strand  {'start':>10}  {'end':>10}  "
        + ("" if m.mask is None else f"{'masked':>10}  ")
        + "expected stay (bases)"
    )
    for i, s in enumerate(m.states):
        end = "-" if m.end is None else f"{m.end[i]:.4g}"
        st = "inf" if stay[i] == float("inf") else f"{stay[i]:.4g}"
        pm = "" if m.mask is None else f"{float(np.ravel(m.mask[i])[0]):>10.4g}  "
        lines.append(
            f"{s.name:<{w}}  {labels[i]:<{lw}}  {s.strand or '.':<6}  "
            f"{m.start[i]:>10.4g}  {end:>10}  {pm}{st}"
        )
    allowed = m.allowed_transitions()
    lines.append("")
    lines.append(f"allowed transitions: {len(allowed)} of {m.n_states**2}")
    for i, n in enumerate(names):
        succ = [
            f"{names[j]} {m.transitions[i, j]:.6g}"
            for j in range(m.n_states)
            if m.transitions[i, j] > 0
        ]
        lines.append(f"  {n:<{w}} -> " + (", ".join(succ) if succ else "(none)"))
    if m.provenance:
        lines.append("")
        lines.append("provenance")
        for key, value in m.provenance.items():
            lines.append(f"  {key}: {value}")
    return "\n".join(lines)


#: Forecasts at which ``model check`` shows each map.
SHOWN_AT = (0.05, 0.25, 0.5, 0.75, 0.9, 0.99)


def recalibration_lines(m: Model) -> list[str]:
    """The ``recalibration`` lines of a model summary: where the table was fitted, and
    per map its kind and its values at :data:`SHOWN_AT`."""
    from seqstate.io.manifest import TABLE_FILES

    recal = m.recalibration
    assert recal is not None
    meta = m.extra.get("recalibration", {})
    meta = meta if isinstance(meta, dict) else {}
    stretches = meta.get("stretches", [])
    where = ", ".join(str(s) for s in stretches) if isinstance(stretches, list) else "?"
    lines = [
        f"recalib.  {TABLE_FILES['recalibration']}: {len(recal.maps)} maps, fitted on {where} "
        f"against {meta.get('truth', '?')} (sha256 {meta.get('truth_sha256', '-')}); "
        "annotate writes calibrated_ scores beside the raw ones"
    ]
    w = max(len(f"{g} {s}") for g, s in recal.maps)
    at = " ".join(f"{p:g}" for p in SHOWN_AT)
    lines.append(f"          {'map':<{w}}  {'kind':<20}  values at {at}")
    for (group, score), mp in recal.maps.items():
        kind = (
            f"temperature {mp.temperature:.4g}"
            if mp.kind == "temperature"
            else f"isotonic, {len(mp.knots_x)} knots"
        )
        vals = " ".join(f"{mp.value(p):.3f}" for p in SHOWN_AT)
        lines.append(f"          {group + ' ' + score:<{w}}  {kind:<20}  {vals}")
    for note in recal.notes:
        lines.append(f"          # {note}")
    return lines
