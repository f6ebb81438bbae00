"""The manifest of a model folder (``model.toml``): reading, checking and writing it.

The manifest names the model, its alphabet, order and states, and points at the
TSV tables (:mod:`seqstate.io.tsv_tables`), whose paths are relative to the
manifest's folder and must stay inside it.  Problems raise
:class:`~seqstate.errors.ModelFormatError` naming the file and, where the text
shows it, the line.
"""

from __future__ import annotations

import datetime as dt
import math
import re
import sys
from pathlib import Path

from seqstate.errors import ModelFormatError
from seqstate.io import files
from seqstate.io.tsv_tables import (
    read_emissions,
    read_mask,
    read_text,
    read_transitions,
    read_vector,
)
from seqstate.model import (
    MAX_TRANSITION_CELLS,
    STRANDS,
    Model,
    State,
    label_problem,
    model_size_problem,
    normalize_rows,
    thresholds_problem,
    validate,
)

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

__all__ = [
    "FORMAT",
    "KNOWN_KEYS",
    "MANIFEST",
    "MAX_MANIFEST_BYTES",
    "TABLE_FILES",
    "load_manifest",
    "render_manifest",
]

MANIFEST = "model.toml"
FORMAT = "seqstate-model/1"
EMPTY_CONTEXT = "."
TABLE_FILES = {
    "start": "start.tsv",
    "transitions": "transitions.tsv",
    "emissions": "emissions.tsv",
    "end": "end.tsv",
    "mask": "mask.tsv",
    "recalibration": "recalibration.tsv",
}
#: Largest manifest read (16 MiB): a model.toml is a few kilobytes; a bigger file given
#: as a manifest by mistake (a genome, say) is refused before it is read.
MAX_MANIFEST_BYTES = 16 * 2**20
KNOWN_KEYS = {
    "format",
    "name",
    "description",
    "alphabet",
    "order",
    "decode",
    "normalize",
    "background_label",
    "tables",
    "states",
    "provenance",
}


def _decode_error(data: bytes, exc: UnicodeDecodeError, what: str) -> tuple[str, int]:
    """Message and 0-based line of the first byte of ``data`` that is not UTF-8."""
    line0 = data.count(b"\n", 0, exc.start)
    column = exc.start - (data.rfind(b"\n", 0, exc.start) + 1) + 1
    return (
        f"is not UTF-8 text: byte 0x{data[exc.start]:02X} at column {column} cannot be "
        f"decoded; expected a UTF-8 {what}",
        line0,
    )


def _key_line(lines: list[str], header: str | None, index: int, key: str | None) -> int | None:
    """0-based line of ``key = ...`` in the ``index``-th ``header`` section (None: top level).

    ``header`` is ``[[states]]`` or ``[tables]``; ``key`` None gives the header line.
    Falls back to the section header, then to None, when the text does not show it.
    """
    if header is None:
        start, stop = 0, len(lines)
        for i, ln in enumerate(lines):
            if ln.strip().startswith("["):
                stop = i
                break
    else:
        heads = [i for i, ln in enumerate(lines) if ln.strip().startswith(header)]
        if index >= len(heads):
            return None
        start = heads[index]
        stop = next(
            (i for i in range(start + 1, len(lines)) if lines[i].strip().startswith("[")),
            len(lines),
        )
        if key is None:
            return start
    pattern = re.compile(rf"\s*[\"']?{re.escape(key or '')}[\"']?\s*=")
    for i in range(start, stop):
        if pattern.match(lines[i]):
            return i
    return start if header is not None else None


def _kind(value) -> str:
    """A TOML value's kind in words, for messages."""
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, (int, float)):
        return "a number"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, str):
        return "a string"
    return f"a {type(value).__name__} value"


#: A ``[[states]]`` header line, counted before the TOML is parsed (see :func:`load_manifest`).
_STATES_HEADER = re.compile(rb"^[ \t]*\[\[[ \t]*states[ \t]*\]\]", re.MULTILINE)


def _confined_manifest(manifest: Path) -> None:
    """Refuse a manifest that is a symbolic link leading out of its own folder.

    The tables are confined to the manifest's folder (:func:`_inside`); the manifest
    itself is too, so a model folder never makes seqstate read a file elsewhere.
    """
    if not manifest.is_symlink():
        return
    try:
        resolved = manifest.resolve(strict=True)
        root = manifest.parent.resolve()
    except (OSError, RuntimeError) as exc:
        raise ModelFormatError(
            f"is a symbolic link that cannot be resolved ({exc}); expected the model's "
            "TOML manifest inside its folder",
            path=manifest,
        ) from None
    if not resolved.is_relative_to(root):
        raise ModelFormatError(
            "is a symbolic link that leads outside the model folder; the manifest and its "
            "tables must stay inside the folder",
            path=manifest,
        )


def load_manifest(manifest: Path) -> Model:
    """Read, check and validate the model of ``manifest`` (a ``model.toml``).

    Before the TOML is parsed, the file is refused when it is a symbolic link out of
    its folder, not a regular file, bigger than :data:`MAX_MANIFEST_BYTES`, or declares
    more ``[[states]]`` than the transition budget allows (:data:`MAX_TRANSITION_CELLS`);
    after parsing, the model's shape is checked against the memory budget
    (:func:`~seqstate.model.model_size_problem`) before any table is read.
    """
    _confined_manifest(manifest)
    try:
        size = manifest.stat().st_size
    except OSError:
        size = 0  # read_text names the problem
    if size > MAX_MANIFEST_BYTES:
        raise ModelFormatError(
            f"is {size:,} bytes, more than a manifest may be ({MAX_MANIFEST_BYTES:,}); "
            "expected a TOML manifest (model.toml)",
            path=manifest,
        )
    data = read_text(manifest, ModelFormatError, "TOML manifest")
    declared = len(_STATES_HEADER.findall(data))
    if declared * declared > MAX_TRANSITION_CELLS:
        problem = model_size_problem(declared, 1, 0)
        raise ModelFormatError(f"declares {declared:,} [[states]]: {problem}", path=manifest)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        msg, bad_line0 = _decode_error(data, exc, "TOML manifest")
        raise ModelFormatError(msg, path=manifest, line0=bad_line0) from None
    lone_cr = re.search(r"\r(?!\n)", text)
    if lone_cr is not None:
        raise ModelFormatError(
            files.CR_ONLY, path=manifest, line0=text.count("\n", 0, lone_cr.start())
        )
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ModelFormatError(f"not valid TOML: {exc}", path=manifest) from None
    lines = text.splitlines()

    def need(key: str, kind: type | tuple[type, ...]):
        if key not in doc:
            raise ModelFormatError(f"missing required key '{key}'", path=manifest)
        value = doc[key]
        if not isinstance(value, kind) or isinstance(value, bool) and kind is int:
            raise ModelFormatError(
                f"key '{key}' has the wrong type ({type(value).__name__})",
                path=manifest,
                line0=_key_line(lines, None, 0, key),
            )
        return value

    fmt = doc.get("format", FORMAT)
    if fmt != FORMAT:
        raise ModelFormatError(
            f"format '{fmt}' is not supported, expected '{FORMAT}'", path=manifest
        )
    name = need("name", str)
    alphabet = doc.get("alphabet", "ACGT")
    if not isinstance(alphabet, str):
        raise ModelFormatError("key 'alphabet' must be a string of symbols", path=manifest)
    order = doc.get("order", 0)
    if not isinstance(order, int) or isinstance(order, bool):
        raise ModelFormatError("key 'order' must be a whole number", path=manifest)
    decode = doc.get("decode", "posterior")
    normalize = doc.get("normalize", False)
    if not isinstance(normalize, bool):
        raise ModelFormatError("key 'normalize' must be true or false", path=manifest)
    background = doc.get("background_label", "")
    if not isinstance(background, str):
        raise ModelFormatError(
            f"key 'background_label' is {_kind(background)}, expected a string",
            path=manifest,
            line0=_key_line(lines, None, 0, "background_label"),
        )
    states_doc = need("states", list)
    states: list[State] = []
    for i, sd in enumerate(states_doc):
        entry = f"[[states]] entry {i + 1}"
        if not isinstance(sd, dict) or "name" not in sd:
            raise ModelFormatError(
                f"{entry} has no name", path=manifest, line0=_key_line(lines, "[[states]]", i, None)
            )
        for key, default in (("name", None), ("label", ""), ("strand", ".")):
            value = sd.get(key, default)
            if not isinstance(value, str):
                hint = {
                    "name": "a state name in quotes",
                    "label": 'a label in quotes such as "CpG_island", or "" for none',
                    "strand": '"+", "-" or "."',
                }[key]
                shown = _toml_value_safe(value)
                raise ModelFormatError(
                    f"{entry}: {key} is {_kind(value)} ({shown}), expected {hint}",
                    path=manifest,
                    line0=_key_line(lines, "[[states]]", i, key),
                )
        label = sd.get("label", "")
        if label:
            problem = label_problem(label)
            if problem:
                raise ModelFormatError(
                    f"{entry}: {problem}",
                    path=manifest,
                    line0=_key_line(lines, "[[states]]", i, "label"),
                )
        strand = sd.get("strand", ".")
        if strand not in ("", ".", *STRANDS):
            raise ModelFormatError(
                f"{entry}: strand {strand!r} is not '+', '-' or '.'",
                path=manifest,
                line0=_key_line(lines, "[[states]]", i, "strand"),
            )
        strand = None if strand in (".", "") else strand
        states.append(State(sd["name"], label or None, strand))
    tables = doc.get("tables", {})
    if not isinstance(tables, dict):
        raise ModelFormatError("[tables] must be a table", path=manifest)
    for key, rel in tables.items():
        line0 = _key_line(lines, "[tables]", 0, key)
        if key not in TABLE_FILES:
            raise ModelFormatError(
                f"[tables] has unknown key {key!r}; known: {', '.join(TABLE_FILES)}",
                path=manifest,
                line0=line0,
            )
        if not isinstance(rel, str) or not rel.strip():
            raise ModelFormatError(
                f"[tables] {key} is {_kind(rel)} ({_toml_value_safe(rel)}), expected a file "
                "name in quotes, relative to the model folder",
                path=manifest,
                line0=line0,
            )
    defaults = doc.get("defaults", {})
    problem = thresholds_problem(defaults)
    if problem:
        if isinstance(defaults, dict):
            bad_key = next(
                (
                    k
                    for k in defaults
                    if problem.startswith(f"[defaults] {k} ") or f"'{k}'" in problem
                ),
                None,
            )
            line0 = _key_line(lines, "[defaults]", 0, bad_key)
        else:
            line0 = _key_line(lines, None, 0, "defaults")
            problem = f"{problem}; found {_kind(defaults)} ({_toml_value_safe(defaults)})"
        raise ModelFormatError(problem, path=manifest, line0=line0)
    base = manifest.parent
    names = [s.name for s in states]
    # names are checked before tables so that a table error can trust them
    seen: set[str] = set()
    for i, n in enumerate(names):
        if n in seen:
            raise ModelFormatError(
                f"[[states]] entry {i + 1}: duplicate state name '{n}'",
                path=manifest,
                line0=_key_line(lines, "[[states]]", i, None),
            )
        seen.add(n)
    if order < 0 or order > 8:
        raise ModelFormatError(f"emission order {order} is outside 0..8", path=manifest)
    if len(set(alphabet)) != len(alphabet) or not alphabet:
        raise ModelFormatError(f"alphabet {alphabet!r} must list distinct symbols", path=manifest)
    # refuse a bomb before any table is read or allocated
    too_big = model_size_problem(len(states), len(alphabet), order)
    if too_big:
        raise ModelFormatError(too_big, path=manifest, line0=_key_line(lines, None, 0, "order"))

    def table_path(key: str, required: bool) -> Path | None:
        rel = tables.get(key)
        if rel is None:
            default = base / TABLE_FILES[key]
            if not required and not default.exists() and not default.is_symlink():
                return None
            return _inside(base, default, TABLE_FILES[key], key, manifest, None)
        return _inside(base, base / rel, rel, key, manifest, _key_line(lines, "[tables]", 0, key))

    def required_path(key: str) -> Path:
        path = table_path(key, True)
        assert path is not None  # a required table always has a path
        return path

    strict = not normalize
    start = read_vector(required_path("start"), names, "start", strict)
    end_path = table_path("end", False)
    end = read_vector(end_path, names, "end", False) if end_path is not None else None
    trans_path = required_path("transitions")
    transitions = read_transitions(trans_path, names, end, strict)
    emis_path = required_path("emissions")
    emissions, lower = read_emissions(emis_path, names, alphabet, order, strict)
    mask_path = table_path("mask", False)
    mask = read_mask(mask_path, names) if mask_path is not None else None
    recalibration = None
    if "recalibration" in tables:  # read only when the manifest names it
        from seqstate.io.recal_table import group_names, read_recalibration

        gene_model = (
            isinstance(doc.get("annotate"), dict)
            and doc["annotate"].get("features") == "gene_structure"
        )
        recalibration = read_recalibration(
            required_path("recalibration"), group_names(tuple(states), gene_model)
        )
    provenance = doc.get("provenance", {})
    if not isinstance(provenance, dict):
        raise ModelFormatError("[provenance] must be a table of key = value lines", path=manifest)
    extra = {k: v for k, v in doc.items() if k not in KNOWN_KEYS}
    model = Model(
        name=name,
        description=str(doc.get("description", "")),
        alphabet=alphabet,
        order=order,
        states=tuple(states),
        start=start,
        transitions=transitions,
        emissions=emissions,
        end=end,
        decode=decode,
        lower_emissions=lower,
        background_label=background or None,
        provenance=provenance,
        extra=extra,
        mask=mask,
        recalibration=recalibration,
    )
    if normalize:
        try:
            normalize_rows(model)
        except ModelFormatError as exc:
            raise ModelFormatError(exc.message, path=manifest) from None
    # row sums were checked per line while reading; validate adds shapes and reachability
    validate(model, path=str(manifest))
    return model


def _inside(
    base: Path, target: Path, shown: str, key: str, manifest: Path, line0: int | None
) -> Path:
    """``target`` if it lies inside the model folder ``base`` (symbolic links followed).

    Table paths are relative to the manifest's folder and must stay in it: an
    absolute path, a ``..`` that climbs out, or a symbolic link that leads out is a
    :class:`~seqstate.errors.ModelFormatError` (nothing outside the folder is read).
    """
    rule = "table paths must be relative to the model folder and stay inside it"
    if Path(shown).is_absolute():
        raise ModelFormatError(
            f"[tables] {key} = {shown!r} is an absolute path; {rule}", path=manifest, line0=line0
        )
    try:
        root = base.resolve()
        resolved = target.resolve()
    except (OSError, RuntimeError) as exc:
        raise ModelFormatError(
            f"[tables] {key} = {shown!r} cannot be resolved ({exc}); {rule}",
            path=manifest,
            line0=line0,
        ) from None
    if not resolved.is_relative_to(root):
        how = "through a symbolic link" if target.is_symlink() or ".." not in shown else "by '..'"
        raise ModelFormatError(
            f"[tables] {key} = {shown!r} leads outside the model folder ({how}); {rule}",
            path=manifest,
            line0=line0,
        )
    return target


def _toml_value_safe(value) -> str:
    """A short TOML-like rendering of a manifest value for a message."""
    try:
        text = _toml_value(value)
    except TypeError:
        text = type(value).__name__
    return text if len(text) <= 40 else text[:37] + "..."


def render_manifest(model: Model) -> str:
    lines = [
        "# seqstate model manifest: tables are TSV files beside this one",
        f"format = {_toml_value(FORMAT)}",
        f"name = {_toml_value(model.name)}",
        f"description = {_toml_value(model.description)}",
        f"alphabet = {_toml_value(model.alphabet)}",
        f"order = {model.order}",
        f"decode = {_toml_value(model.decode)}",
        "normalize = false",
    ]
    if model.background_label is not None:
        lines.append(f"background_label = {_toml_value(model.background_label)}")
    for key in sorted(model.extra):
        value = model.extra[key]
        if not isinstance(value, dict):
            lines.append(f"{_toml_key(key)} = {_toml_value(value)}")
    lines.append("")
    lines.append("[tables]")
    lines.append(f"start = {_toml_value(TABLE_FILES['start'])}")
    lines.append(f"transitions = {_toml_value(TABLE_FILES['transitions'])}")
    lines.append(f"emissions = {_toml_value(TABLE_FILES['emissions'])}")
    if model.end is not None:
        lines.append(f"end = {_toml_value(TABLE_FILES['end'])}")
    if model.mask is not None:
        lines.append(f"mask = {_toml_value(TABLE_FILES['mask'])}")
    if model.recalibration is not None:
        lines.append(f"recalibration = {_toml_value(TABLE_FILES['recalibration'])}")
    for s in model.states:
        lines.append("")
        lines.append("[[states]]")
        lines.append(f"name = {_toml_value(s.name)}")
        lines.append(f"label = {_toml_value(s.label or '')}")
        lines.append(f"strand = {_toml_value(s.strand or '.')}")
    for key in sorted(model.extra):
        if isinstance(model.extra[key], dict):
            lines.extend(_toml_table(_toml_key(key), model.extra[key]))
    if model.provenance:
        lines.extend(_toml_table("provenance", model.provenance))
    return "\n".join(lines) + "\n"


def _toml_table(name: str, table: dict) -> list[str]:
    out = ["", f"[{name}]"]
    subs = []
    for key, value in table.items():
        if isinstance(value, dict):
            subs.append((key, value))
        else:
            out.append(f"{_toml_key(key)} = {_toml_value(value)}")
    for key, value in subs:
        out.extend(_toml_table(f"{name}.{_toml_key(key)}", value))
    return out


def _toml_key(key: str) -> str:
    if key and all(c.isalnum() or c in "-_" for c in key):
        return key
    return _toml_value(key)


def _toml_value(value) -> str:
    """``value`` as TOML text: every kind tomllib reads (dates and times included, a table
    inside a list as an inline table), so a manifest read is always written back."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        out = ['"']
        for ch in value:
            if ch == '"':
                out.append('\\"')
            elif ch == "\\":
                out.append("\\\\")
            elif ch == "\n":
                out.append("\\n")
            elif ch == "\t":
                out.append("\\t")
            elif ord(ch) < 32 or ord(ch) == 127:
                out.append(f"\\u{ord(ch):04X}")
            else:
                out.append(ch)
        out.append('"')
        return "".join(out)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        cells = ", ".join(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in value.items())
        return "{" + cells + "}" if cells else "{}"
    if isinstance(value, (dt.datetime, dt.date, dt.time)):
        # RFC 3339 text, as TOML writes offset/local date-times, local dates and times
        return value.isoformat()
    raise TypeError(f"cannot write {type(value).__name__} to TOML")
