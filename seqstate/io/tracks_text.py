"""Compiled helpers of the track writers: rounding, merged runs and bedGraph text.

Array in, array out; no files, no labels, no printing.  The kernels use the
engine's compile options (:data:`seqstate.engine._common.JIT`: ``nogil``), so a
record's track is rounded and formatted while other threads run.  Each kernel
has a plain-Python/NumPy reference below it (the former writer code), which the
tests compare it with.

Rounding: ``scaled = rint(float64(x) * 10**precision)`` (round half to even on
the float64 product).  The product may round across a tie (a fraction close to
.5); those few positions are reported so that the caller decides them exactly
from the decimal text of the value (:func:`exact_scaled`).

Coordinates are 0-based half-open throughout (``start0``, ``end0``).
"""

from __future__ import annotations

import numpy as np
from numba import njit

from seqstate.engine._common import JIT

__all__ = [
    "LINE_EXTRA_BYTES",
    "OK",
    "TOO_LARGE",
    "TIE_TOLERANCE",
    "block_breaks",
    "block_breaks_reference",
    "exact_scaled",
    "format_lines",
    "format_lines_reference",
    "format_scaled",
    "scale_block",
    "scale_block_reference",
]

#: Fractions within this distance of .5 (after the product's own rounding error)
#: are decided exactly from the decimal text.
TIE_TOLERANCE = 1e-6
_HALF_LESS_TOLERANCE = 0.5 - TIE_TOLERANCE
_RELATIVE_ERROR = 4e-16
_LIMIT = 2.0**52  # largest |scaled| + 1 the float64 product still holds exactly
#: :func:`scale_block` status: every value was rounded.
OK = -1
#: :func:`scale_block` status: a finite value is too large to round at this precision.
TOO_LARGE = -2
#: Upper bound of the bytes of one bedGraph line beyond the record ID: three tabs and a
#: newline, start0 and end0 (at most 19 digits each) and the value (sign, at most 16
#: digits below 2**52, one more leading zero, the decimal point).
LINE_EXTRA_BYTES = 64

_TAB = 9
_NEWLINE = 10
_MINUS = 45
_POINT = 46
_ZERO = 48


def exact_scaled(value: float, precision: int) -> int:
    """``value * 10**precision`` rounded as Python's ``f"{value:.{precision}f}"`` rounds it
    (half to even on the exact binary value)."""
    text = f"{value:.{precision}f}"
    return int(text.replace(".", ""))


# ---------------------------------------------------------------- rounding


@njit(**JIT)
def scale_block(
    x: np.ndarray, scale: float, scaled: np.ndarray, ties: np.ndarray
) -> tuple[int, int]:
    """Round ``x`` (1-D, float32 or float64) times ``scale`` (``10.0**precision``).

    Writes ``scaled[i] = rint(float64(x[i]) * scale)`` (int64) and the indices of
    values near a tie into ``ties`` (both at least ``len(x)`` long).  Returns
    ``(status, n_ties)``: ``status`` is :data:`OK`, the 0-based index of the first
    non-finite value (reported before any value that is too large), or
    :data:`TOO_LARGE`.  Only ``scaled[:len(x)]`` and ``ties[:n_ties]`` are
    written, and they are meaningful only when ``status`` is :data:`OK`.
    """
    n = x.shape[0]
    n_ties = 0
    too_large = False
    for i in range(n):
        v = np.float64(x[i])
        if not np.isfinite(v):
            return i, n_ties
        y = v * scale
        magnitude = abs(y)
        if not magnitude < _LIMIT:  # also an overflow to inf
            too_large = True
            continue
        r = np.rint(y)
        scaled[i] = np.int64(r)
        if abs(y - r) > magnitude * _RELATIVE_ERROR + _HALF_LESS_TOLERANCE:
            ties[n_ties] = i
            n_ties += 1
    if too_large:
        return TOO_LARGE, n_ties
    return OK, n_ties


def scale_block_reference(block: np.ndarray, precision: int, offset0: int = 0) -> np.ndarray:
    """Plain-NumPy reference of :func:`scale_block` plus the exact tie decision: the
    rounded values (int64) of ``block`` at ``precision`` decimals.

    Raises ``ValueError`` for a non-finite value (naming its 0-based position,
    ``offset0`` + index) or a value too large to round.
    """
    x = block.astype(np.float64, copy=False)
    if not np.all(np.isfinite(x)):
        bad = int(np.flatnonzero(~np.isfinite(x))[0])
        raise ValueError(
            f"value at 0-based position {offset0 + bad} is {x[bad]!r}, not a finite number"
        )
    with np.errstate(over="ignore"):
        y = x * 10.0**precision
    magnitude = np.abs(y)
    if not float(np.max(magnitude)) < _LIMIT:
        raise ValueError("values too large to round at this precision")
    scaled = np.rint(y)
    y -= scaled
    np.abs(y, out=y)
    magnitude *= _RELATIVE_ERROR
    magnitude += _HALF_LESS_TOLERANCE
    for i in np.flatnonzero(y > magnitude).tolist():
        scaled[i] = exact_scaled(float(x[i]), precision)
    return scaled.astype(np.int64)


# ---------------------------------------------------------------- merged runs


@njit(**JIT)
def block_breaks(
    q: np.ndarray,
    n: int,
    previous: int,
    has_previous: bool,
    lo: int,
    starts: np.ndarray,
    values: np.ndarray,
) -> int:
    """Where runs of equal values start in ``q[:n]`` (``n`` >= 1), a block at base ``lo``.

    ``previous`` is the value of the base before the block (ignored unless
    ``has_previous``): a run that goes on from it does not start at ``lo``.
    Writes the start (``lo`` + index, 0-based) and value of each run into
    ``starts`` and ``values`` (at least ``n`` long); returns how many.
    """
    k = 0
    if not has_previous or q[0] != previous:
        starts[0] = lo
        values[0] = q[0]
        k = 1
    for i in range(1, n):
        if q[i] != q[i - 1]:
            starts[k] = lo + i
            values[k] = q[i]
            k += 1
    return k


def block_breaks_reference(
    q: np.ndarray, previous: int | None, lo: int
) -> tuple[np.ndarray, np.ndarray]:
    """Plain-NumPy reference of :func:`block_breaks`: ``(starts0, values)`` of the runs
    starting in ``q`` (``previous`` None for the first block)."""
    inner = np.flatnonzero(q[1:] != q[:-1]) + 1
    if previous is None or int(q[0]) != previous:
        inner = np.concatenate(([0], inner))
    return (inner + lo).astype(np.int64), q[inner].astype(np.int64)


# ---------------------------------------------------------------- bedGraph text


@njit(**JIT)
def _put_digits(out: np.ndarray, pos: int, value: int) -> int:
    """Decimal digits of ``value`` (>= 0) at ``out[pos:]``; returns the position after."""
    digits = 1
    rest = value // 10
    while rest > 0:
        digits += 1
        rest //= 10
    end = pos + digits
    rest = value
    for j in range(end - 1, pos - 1, -1):
        out[j] = _ZERO + rest % 10
        rest //= 10
    return end


@njit(**JIT)
def format_lines(
    name: np.ndarray,
    starts: np.ndarray,
    ends: np.ndarray,
    scaled: np.ndarray,
    precision: int,
    out: np.ndarray,
) -> int:
    """ASCII lines ``NAME<TAB>start0<TAB>end0<TAB>VALUE<LF>`` into ``out`` (uint8).

    ``name`` holds the record ID's bytes (uint8); ``starts``, ``ends`` (0-based
    half-open, >= 0) and ``scaled`` (|scaled| < 2**52) are int64 of one length.
    VALUE is ``scaled / 10**precision`` with exactly ``precision`` decimals, a
    minus sign only when ``scaled`` < 0.  ``out`` must hold ``len(starts) *
    (len(name) + LINE_EXTRA_BYTES)`` bytes; returns the number written.
    """
    p10 = np.int64(1)
    for _ in range(precision):
        p10 *= 10
    n_name = name.shape[0]
    pos = 0
    for k in range(starts.shape[0]):
        for c in range(n_name):
            out[pos + c] = name[c]
        pos += n_name
        out[pos] = _TAB
        pos = _put_digits(out, pos + 1, starts[k])
        out[pos] = _TAB
        pos = _put_digits(out, pos + 1, ends[k])
        out[pos] = _TAB
        pos += 1
        v = scaled[k]
        if v < 0:
            out[pos] = _MINUS
            pos += 1
            v = -v
        if precision == 0:
            pos = _put_digits(out, pos, v)
        else:
            whole = v // p10
            part = v - whole * p10
            pos = _put_digits(out, pos, whole)
            out[pos] = _POINT
            pos += 1
            for j in range(pos + precision - 1, pos - 1, -1):
                out[j] = _ZERO + part % 10
                part //= 10
            pos += precision
        out[pos] = _NEWLINE
        pos += 1
    return pos


def format_scaled(scaled: int, precision: int) -> str:
    """Text of ``scaled / 10**precision`` with exactly ``precision`` decimals, no '-0'."""
    sign = "-" if scaled < 0 else ""
    magnitude = abs(int(scaled))
    if precision == 0:
        return f"{sign}{magnitude}"
    whole, part = divmod(magnitude, 10**precision)
    return f"{sign}{whole}.{part:0{precision}d}"


def format_lines_reference(
    name: str, starts: np.ndarray, ends: np.ndarray, scaled: np.ndarray, precision: int
) -> str:
    """Plain-Python reference of :func:`format_lines` (the text, ``name`` already escaped)."""
    return "".join(
        f"{name}\t{s}\t{e}\t{format_scaled(v, precision)}\n"
        for s, e, v in zip(
            np.asarray(starts).tolist(),
            np.asarray(ends).tolist(),
            np.asarray(scaled).tolist(),
            strict=True,
        )
    )
