"""Model directories: a TOML manifest that points at TSV tables.

Layout (our own)::

    mymodel/
      model.toml        manifest: name, description, alphabet, order, states, tables
      start.tsv         state <TAB> start
      end.tsv           state <TAB> end          (optional)
      transitions.tsv   from <TAB> to-state ...  (rows = from, columns = to; empty = 0 = forbidden)
      emissions.tsv     state <TAB> context <TAB> one column per symbol

A model may also be given as the path of its manifest file; table paths are
relative to the manifest's folder.  Lines starting with ``#`` and blank lines
are ignored in tables.  The emission context is the preceding symbols, oldest
first; ``.`` stands for the empty context of order 0.  Rows for shorter contexts
than the model's order are optional back-off rows.

Everything is validated before any sequence is read; problems raise
:class:`~seqstate.errors.TableFormatError` naming the file and line.
"""

from __future__ import annotations

import math
import os
import re
import sys
from pathlib import Path

import numpy as np

from seqstate.errors import ModelFormatError, TableFormatError, UsageError
from seqstate.io import files
from seqstate.model import (
    STRANDS,
    SUM_TOLERANCE,
    Model,
    State,
    emission_size_problem,
    label_problem,
    normalize_rows,
    sha256_of_text,
    thresholds_problem,
    validate,
)

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

MANIFEST = "model.toml"
FORMAT = "seqstate-model/1"
EMPTY_CONTEXT = "."
TABLE_FILES = {
    "start": "start.tsv",
    "transitions": "transitions.tsv",
    "emissions": "emissions.tsv",
    "end": "end.tsv",
}
#: Largest manifest read (16 MiB): a model.toml is a few kilobytes; a bigger file given
#: as a manifest by mistake (a genome, say) is refused before it is read.
MAX_MANIFEST_BYTES = 16 * 2**20
_KNOWN_KEYS = {
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


# ---------------------------------------------------------------- built-ins
def builtin_dir() -> Path:
    """Folder of the built-in models (package data, or ``models/`` in a checkout)."""
    here = Path(__file__).resolve().parent.parent
    for cand in (here / "models", here.parent / "models"):
        if cand.is_dir():
            return cand
    return here / "models"


def list_builtin() -> list[str]:
    """Names of the built-in models, sorted."""
    base = builtin_dir()
    if not base.is_dir():
        return []
    return sorted(p.name for p in base.iterdir() if (p / MANIFEST).is_file())


def resolve_model_path(spec: str | os.PathLike) -> Path:
    """A model given as a built-in NAME or a PATH (folder or manifest) -> manifest path."""
    p = Path(spec)
    if p.is_dir():
        if (p / MANIFEST).is_file():
            return p / MANIFEST
        raise UsageError(f"model folder '{p}' has no {MANIFEST}")
    if p.is_file():
        return p
    name = str(spec)
    if name in list_builtin():
        return builtin_dir() / name / MANIFEST
    known = ", ".join(list_builtin()) or "none"
    raise UsageError(
        f"unknown model '{name}': not a file or folder, nor a built-in model (built-in: {known})"
    )


def load_model(spec: str | os.PathLike) -> Model:
    """Load and fully validate a model from a built-in name, a folder or a manifest."""
    manifest = resolve_model_path(spec)
    return _load_manifest(manifest)


# ---------------------------------------------------------------- reading
def _read_text(path: Path, error_cls: type[ModelFormatError], what: str) -> bytes:
    """The bytes of a manifest or table, after the checks every model file gets."""
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise error_cls(f"{what} file not found", path=path) from None
    except IsADirectoryError:
        raise error_cls(f"is a directory, expected a {what} file", path=path) from None
    except OSError as exc:
        raise error_cls(f"cannot be read: {exc.strerror or exc}", path=path) from None
    kind = files.sniff(data[: files.SNIFF_BYTES])
    if kind in ("UTF-16", "UTF-32"):
        raise error_cls(files.unsupported_message(kind), path=path)
    if kind is not None:
        found = f"compressed with {kind}" if kind != "zip" else "is a zip archive"
        raise error_cls(
            f"{found}; a model's manifest and tables are read as plain text only", path=path
        )
    if data.startswith(files.UTF8_BOM):
        data = data[len(files.UTF8_BOM) :]
    return data


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


def _load_manifest(manifest: Path) -> Model:
    try:
        size = manifest.stat().st_size
    except OSError:
        size = 0  # _read_text names the problem
    if size > MAX_MANIFEST_BYTES:
        raise ModelFormatError(
            f"is {size:,} bytes, more than a manifest may be ({MAX_MANIFEST_BYTES:,}); "
            "expected a TOML manifest (model.toml)",
            path=manifest,
        )
    data = _read_text(manifest, ModelFormatError, "TOML manifest")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        msg, line0 = _decode_error(data, exc, "TOML manifest")
        raise ModelFormatError(msg, path=manifest, line0=line0) from None
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
        key = next(
            (k for k in defaults if problem.startswith(f"[defaults] {k} ") or f"'{k}'" in problem),
            None,
        )
        line0 = _key_line(lines, "[defaults]", 0, key) if isinstance(defaults, dict) else None
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
    size = emission_size_problem(len(states), len(alphabet), order)
    if size:
        raise ModelFormatError(size, path=manifest, line0=_key_line(lines, None, 0, "order"))

    def table_path(key: str, required: bool) -> Path | None:
        rel = tables.get(key)
        if rel is None:
            default = base / TABLE_FILES[key]
            if not required and not default.is_file() and not default.is_symlink():
                return None
            return _inside(base, default, TABLE_FILES[key], key, manifest, None)
        return _inside(base, base / rel, rel, key, manifest, _key_line(lines, "[tables]", 0, key))

    strict = not normalize
    start = _read_vector(table_path("start", True), names, "start", strict)
    end_path = table_path("end", False)
    end = _read_vector(end_path, names, "end", False) if end_path is not None else None
    trans_path = table_path("transitions", True)
    transitions = _read_transitions(trans_path, names, end, strict)
    emis_path = table_path("emissions", True)
    emissions, lower = _read_emissions(emis_path, names, alphabet, order, strict)
    provenance = doc.get("provenance", {})
    if not isinstance(provenance, dict):
        raise ModelFormatError("[provenance] must be a table of key = value lines", path=manifest)
    extra = {k: v for k, v in doc.items() if k not in _KNOWN_KEYS}
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


def _lines(path: Path):
    """Yield (line0, fields) for non-blank, non-comment lines of a TSV file.

    LF, CRLF and CR line ends are all read; a UTF-8 byte-order mark is dropped.
    """
    data = _read_text(path, TableFormatError, "TSV table")
    for line0, raw in enumerate(data.splitlines()):
        try:
            line = raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            start = exc.start
            raise TableFormatError(
                f"is not UTF-8 text: byte 0x{raw[start]:02X} at column {start + 1} cannot be "
                "decoded; expected a UTF-8 TSV table",
                path=path,
                line0=line0,
            ) from None
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        yield line0, line.split("\t")


_WORD = re.compile(r"[A-Za-z0-9_.+-]{1,30}")


def _shown_cells(fields: list[str], limit: int = 4) -> str:
    """Header cells for a message: word-like cells as written, anything else described.

    A file that is not a table (say, a system file named by mistake) is never echoed.
    """
    out = []
    for cell in fields[:limit]:
        cell = cell.strip()
        word = _WORD.fullmatch(cell) or (len(cell) <= 2 and cell.isascii() and cell.isprintable())
        out.append(repr(cell) if word else f"<{len(cell)} other characters>")
    if len(fields) > limit:
        out.append(f"... ({len(fields)} cells)")
    return ", ".join(out) or "nothing"


def _total(values) -> float:
    """Exact sum of non-negative values; inf when it overflows the float range."""
    try:
        return math.fsum(values)
    except OverflowError:
        return math.inf


def _check_total(total: float, what: str, path: Path, line0: int | None) -> None:
    if not math.isfinite(total):
        raise TableFormatError(
            f"{what} sums to more than {sys.float_info.max:.4g}, the largest number "
            "(overflow); scale the counts down",
            path=path,
            line0=line0,
        )


def _number(cell: str, path: Path, line0: int, what: str) -> float:
    text = cell.strip()
    if text == "":
        return 0.0
    try:
        value = float(text)
    except ValueError:
        raise TableFormatError(
            f"{what}: '{text[:30]}' is not a number", path=path, line0=line0
        ) from None
    if not math.isfinite(value):
        raise TableFormatError(f"{what}: '{text}' is not a finite number", path=path, line0=line0)
    if value < 0:
        raise TableFormatError(f"{what}: {text} is negative", path=path, line0=line0)
    return value


def _state_index(name: str, index: dict[str, int], path: Path, line0: int) -> int:
    if name not in index:
        raise TableFormatError(
            f"unknown state '{name}' (states: {', '.join(index)})", path=path, line0=line0
        )
    return index[name]


def _check_sum(total: float, what: str, path: Path, line0: int) -> None:
    if abs(total - 1.0) > SUM_TOLERANCE:
        raise TableFormatError(
            f"{what} sums to {total:.9g}, expected 1 (tolerance {SUM_TOLERANCE:g})",
            path=path,
            line0=line0,
        )


def _read_vector(path: Path, names: list[str], column: str, strict: bool) -> np.ndarray:
    index = {n: i for i, n in enumerate(names)}
    values = np.zeros(len(names))
    given = np.zeros(len(names), dtype=bool)
    header_seen = False
    last_line0 = None
    for line0, fields in _lines(path):
        last_line0 = line0
        if not header_seen:
            header_seen = True
            if [f.strip() for f in fields] != ["state", column]:
                raise TableFormatError(
                    f"header is {_shown_cells(fields)}, expected 'state<TAB>{column}'",
                    path=path,
                    line0=line0,
                )
            continue
        if len(fields) != 2:
            raise TableFormatError(
                f"found {len(fields)} columns, expected 2", path=path, line0=line0
            )
        s = _state_index(fields[0].strip(), index, path, line0)
        if given[s]:
            raise TableFormatError(f"duplicate row for state '{names[s]}'", path=path, line0=line0)
        given[s] = True
        values[s] = _number(fields[1], path, line0, f"state '{names[s]}'")
    if not header_seen:
        raise TableFormatError("table is empty", path=path)
    total = _total(values)
    _check_total(total, f"{column} values (all rows)", path, last_line0)
    if column == "start" and not strict and total <= 0:
        raise TableFormatError(
            "start probabilities sum to 0 and cannot be normalised", path=path, line0=last_line0
        )
    if column == "start" and strict:
        _check_sum(total, "start probabilities (all rows)", path, last_line0)
    return values


def _read_transitions(
    path: Path, names: list[str], end: np.ndarray | None, strict: bool
) -> np.ndarray:
    index = {n: i for i, n in enumerate(names)}
    m = len(names)
    table = np.zeros((m, m))
    given = np.zeros(m, dtype=bool)
    columns: list[int] | None = None
    for line0, fields in _lines(path):
        if columns is None:
            if fields[0].strip() != "from":
                raise TableFormatError(
                    f"first header cell is {_shown_cells(fields, 1)}, expected 'from' followed "
                    "by the to-state names",
                    path=path,
                    line0=line0,
                )
            columns = []
            for name in fields[1:]:
                c = _state_index(name.strip(), index, path, line0)
                if c in columns:
                    raise TableFormatError(
                        f"duplicate column for state '{name.strip()}'", path=path, line0=line0
                    )
                columns.append(c)
            continue
        if len(fields) > len(columns) + 1:
            raise TableFormatError(
                f"found {len(fields)} columns, expected at most {len(columns) + 1}",
                path=path,
                line0=line0,
            )
        s = _state_index(fields[0].strip(), index, path, line0)
        if given[s]:
            raise TableFormatError(f"duplicate row for state '{names[s]}'", path=path, line0=line0)
        given[s] = True
        for c, cell in zip(columns, fields[1:]):
            table[s, c] = _number(cell, path, line0, f"row '{names[s]}' column '{names[c]}'")
        total = _total([*table[s], end[s] if end is not None else 0.0])
        what = f"row '{names[s]}'" + (" (transitions plus end)" if end is not None else "")
        _check_total(total, what, path, line0)
        if strict:
            _check_sum(float(total), what, path, line0)
        elif total <= 0:
            raise TableFormatError(
                f"{what} sums to 0 and cannot be normalised", path=path, line0=line0
            )
    if columns is None:
        raise TableFormatError("table is empty", path=path)
    missing = [names[i] for i in range(m) if not given[i]]
    if missing and (end is None or any(end[index[n]] < 1.0 for n in missing)):
        raise TableFormatError(f"no row for state '{missing[0]}'", path=path)
    return table


def _read_emissions(
    path: Path, names: list[str], alphabet: str, order: int, strict: bool
) -> tuple[np.ndarray, dict[int, np.ndarray]]:
    index = {n: i for i, n in enumerate(names)}
    m, a = len(names), len(alphabet)
    sym = {c: i for i, c in enumerate(alphabet)}
    full = np.full((m, a**order, a), np.nan)
    lower = {j: np.full((m, a**j, a), np.nan) for j in range(order)}
    given = {j: np.zeros((m, a**j), dtype=bool) for j in range(order + 1)}
    context_index: dict[str, int] = {}
    columns: list[int] | None = None
    for line0, fields in _lines(path):
        if columns is None:
            head = [f.strip() for f in fields]
            if head[:2] != ["state", "context"]:
                raise TableFormatError(
                    f"header starts {_shown_cells(head, 2)}, expected 'state<TAB>context' then "
                    "one column per symbol",
                    path=path,
                    line0=line0,
                )
            if sorted(head[2:]) != sorted(alphabet) or len(head[2:]) != a:
                raise TableFormatError(
                    f"symbol columns {_shown_cells(head[2:], a + 1)} do not match the alphabet "
                    f"{alphabet!r}",
                    path=path,
                    line0=line0,
                )
            columns = [sym[c] for c in head[2:]]
            continue
        if len(fields) != a + 2:
            raise TableFormatError(
                f"found {len(fields)} columns, expected {a + 2}", path=path, line0=line0
            )
        s = _state_index(fields[0].strip(), index, path, line0)
        ctx = fields[1].strip()
        if ctx == EMPTY_CONTEXT:
            ctx = ""
        if len(ctx) > order:
            raise TableFormatError(
                f"context '{ctx}' is longer than the model's order {order}", path=path, line0=line0
            )
        c = context_index.get(ctx)
        if c is None:
            c = 0
            for ch in ctx:
                if ch not in sym:
                    raise TableFormatError(
                        f"context '{ctx}' has symbol {ch!r} not in the alphabet",
                        path=path,
                        line0=line0,
                    )
                c = c * a + sym[ch]
            context_index[ctx] = c
        target = full if len(ctx) == order else lower[len(ctx)]
        seen_rows = given[len(ctx)]
        if seen_rows[s, c]:
            raise TableFormatError(
                f"duplicate row for state '{names[s]}' context '{ctx or EMPTY_CONTEXT}'",
                path=path,
                line0=line0,
            )
        seen_rows[s, c] = True
        row = [0.0] * a
        for col, cell in zip(columns, fields[2:]):
            row[col] = _number(
                cell, path, line0, f"state '{names[s]}' context '{ctx or EMPTY_CONTEXT}'"
            )
        total = _total(row)
        _check_total(
            total, f"row for state '{names[s]}' context '{ctx or EMPTY_CONTEXT}'", path, line0
        )
        if strict:
            if abs(total - 1.0) > SUM_TOLERANCE:
                what = f"row for state '{names[s]}' context '{ctx or EMPTY_CONTEXT}'"
                _check_sum(total, what, path, line0)
        elif total <= 0:
            what = f"row for state '{names[s]}' context '{ctx or EMPTY_CONTEXT}'"
            raise TableFormatError(
                f"{what} sums to 0 and cannot be normalised", path=path, line0=line0
            )
        target[s, c] = row
    if columns is None:
        raise TableFormatError("table is empty", path=path)
    missing = np.argwhere(~given[order])
    if missing.size:
        s, c = (int(v) for v in missing[0])
        ctx = _context_string(alphabet, order, c) or EMPTY_CONTEXT
        raise TableFormatError(f"missing context '{ctx}' for state '{names[s]}'", path=path)
    lower = {j: arr for j, arr in lower.items() if not np.all(np.isnan(arr))}
    return full, lower


def _context_string(alphabet: str, order: int, index: int) -> str:
    a = len(alphabet)
    chars = []
    for _ in range(order):
        chars.append(alphabet[index % a])
        index //= a
    return "".join(reversed(chars))


# ---------------------------------------------------------------- writing
def _fmt(x: float) -> str:
    """Shortest text that reads back as the same float64 (empty for 0 in sparse tables)."""
    return repr(float(x))


def render_tables(model: Model) -> list[tuple[str, str]]:
    """The canonical text of every file of ``model``: [(file name, text)], manifest first."""
    names = model.state_names
    out: list[tuple[str, str]] = [(MANIFEST, _render_manifest(model))]
    out.append(
        (
            TABLE_FILES["start"],
            "state\tstart\n" + "".join(f"{n}\t{_fmt(v)}\n" for n, v in zip(names, model.start)),
        )
    )
    if model.end is not None:
        out.append(
            (
                TABLE_FILES["end"],
                "state\tend\n" + "".join(f"{n}\t{_fmt(v)}\n" for n, v in zip(names, model.end)),
            )
        )
    lines = ["from\t" + "\t".join(names) + "\n"]
    for i, n in enumerate(names):
        cells = ["" if v == 0 else _fmt(v) for v in model.transitions[i]]
        lines.append(n + "\t" + "\t".join(cells) + "\n")
    out.append((TABLE_FILES["transitions"], "".join(lines)))
    a = len(model.alphabet)
    lines = ["state\tcontext\t" + "\t".join(model.alphabet) + "\n"]
    for i, n in enumerate(names):
        for j in sorted(model.lower_emissions):
            arr = model.lower_emissions[j]
            for c in range(a**j):
                if np.all(np.isnan(arr[i, c])):
                    continue
                ctx = model.context_string(j, c) or EMPTY_CONTEXT
                lines.append(f"{n}\t{ctx}\t" + "\t".join(_fmt(v) for v in arr[i, c]) + "\n")
        for c in range(a**model.order):
            ctx = model.context_string(model.order, c) or EMPTY_CONTEXT
            lines.append(f"{n}\t{ctx}\t" + "\t".join(_fmt(v) for v in model.emissions[i, c]) + "\n")
    out.append((TABLE_FILES["emissions"], "".join(lines)))
    return out


def model_sha256(model: Model) -> str:
    """SHA-256 of the model's canonical tables (independent of how its files were laid out)."""
    return sha256_of_text(render_tables(model))


def save_model(model: Model, folder: str | os.PathLike) -> Path:
    """Write ``model`` as a model folder (created if absent); returns the manifest path."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    for name, text in render_tables(model):
        tmp = folder / f".{name}.tmp-{os.getpid()}"
        tmp.write_text(text, encoding="utf-8", newline="\n")
        os.replace(tmp, folder / name)
    return folder / MANIFEST


def _render_manifest(model: Model) -> str:
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
            lines.append(f"{key} = {_toml_value(value)}")
    lines.append("")
    lines.append("[tables]")
    lines.append(f"start = {_toml_value(TABLE_FILES['start'])}")
    lines.append(f"transitions = {_toml_value(TABLE_FILES['transitions'])}")
    lines.append(f"emissions = {_toml_value(TABLE_FILES['emissions'])}")
    if model.end is not None:
        lines.append(f"end = {_toml_value(TABLE_FILES['end'])}")
    for s in model.states:
        lines.append("")
        lines.append("[[states]]")
        lines.append(f"name = {_toml_value(s.name)}")
        lines.append(f"label = {_toml_value(s.label or '')}")
        lines.append(f"strand = {_toml_value(s.strand or '.')}")
    for key in sorted(model.extra):
        if isinstance(model.extra[key], dict):
            lines.extend(_toml_table(key, model.extra[key]))
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
    raise TypeError(f"cannot write {type(value).__name__} to TOML")
