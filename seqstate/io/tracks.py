"""Per-base tracks (posteriors) as bedGraph text or bigWig.

Both writers take, for each record in input order, ``(seqid, values)`` where
``values`` is a 1-D float array with one value per base of the whole record
(``values[i]`` is base ``i``, 0-based).  Values are rounded to ``precision``
decimals and adjacent bases whose rounded values are equal are merged into one
line or entry, written 0-based half-open (``start0``, ``end0``) as bedGraph and
bigWig both use.

Rounding is exact: a value is shown as Python's ``f"{v:.{precision}f}"`` shows
it (round half to even on the exact binary value), except that a value that
rounds to zero is never written with a minus sign.
"""

from __future__ import annotations

from collections.abc import Iterable
from pathlib import Path
from typing import TextIO

import numpy as np

from seqstate.errors import OptionalDependencyError

__all__ = ["format_scaled", "runs_of_rounded", "write_bedgraph", "write_bigwig"]

_MAX_PRECISION = 9
_BLOCK = 1 << 22  # bases scaled at once, to bound memory on long records
_LINES = 1 << 16  # bedGraph lines formatted per write
_ENTRIES = 1 << 20  # bigWig entries per addEntries call
_TIE_TOLERANCE = 1e-6


def _check_precision(precision: int) -> None:
    if not isinstance(precision, (int, np.integer)) or not 0 <= precision <= _MAX_PRECISION:
        raise ValueError(f"precision must be a whole number 0..{_MAX_PRECISION}, not {precision!r}")


def _exact_scaled(value: float, precision: int) -> int:
    text = f"{value:.{precision}f}"
    return int(text.replace(".", ""))


def _scale_block(block: np.ndarray, precision: int) -> np.ndarray:
    x = block.astype(np.float64, copy=False)
    if not np.all(np.isfinite(x)):
        bad = int(np.flatnonzero(~np.isfinite(x))[0])
        raise ValueError(f"value at offset {bad} of the block is {x[bad]!r}, not a finite number")
    scale = 10.0**precision
    y = x * scale
    if y.size and float(np.max(np.abs(y))) >= 2.0**52:
        raise ValueError("values too large to round at this precision")
    scaled = np.rint(y)
    # Near a tie (fraction close to .5) the product x * scale may have rounded
    # across the tie; decide those few exactly from the decimal expansion.
    frac = np.abs(y - np.floor(y) - 0.5)
    for i in np.flatnonzero(frac < _TIE_TOLERANCE).tolist():
        scaled[i] = _exact_scaled(float(x[i]), precision)
    return scaled.astype(np.int64)


def runs_of_rounded(
    values: np.ndarray, precision: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Maximal runs of equal rounded values: ``(starts0, ends0, scaled_ints)``.

    ``values`` is 1-D.  Run ``k`` covers bases ``starts0[k] .. ends0[k]-1``
    (0-based half-open) whose values all round to ``scaled_ints[k] /
    10**precision``.  Adjacent runs always differ.  All three arrays are int64.
    Raises ``ValueError`` for a non-finite value or a bad precision.
    """
    _check_precision(precision)
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise ValueError(f"values must be 1-D, not of shape {arr.shape}")
    n = arr.shape[0]
    empty = np.zeros(0, dtype=np.int64)
    if n == 0:
        return empty, empty.copy(), empty.copy()
    breaks: list[np.ndarray] = []
    run_values: list[np.ndarray] = []
    previous: int | None = None
    for lo in range(0, n, _BLOCK):
        q = _scale_block(arr[lo : lo + _BLOCK], precision)
        inner = np.flatnonzero(q[1:] != q[:-1]) + 1
        if previous is None or int(q[0]) != previous:
            inner = np.concatenate(([0], inner))
        breaks.append(inner + lo)
        run_values.append(q[inner])
        previous = int(q[-1])
    starts = np.concatenate(breaks).astype(np.int64)
    ends = np.empty_like(starts)
    ends[:-1] = starts[1:]
    ends[-1] = n
    return starts, ends, np.concatenate(run_values).astype(np.int64)


def format_scaled(scaled: int, precision: int) -> str:
    """Text of ``scaled / 10**precision`` with exactly ``precision`` decimals, no '-0'."""
    sign = "-" if scaled < 0 else ""
    magnitude = abs(int(scaled))
    if precision == 0:
        return f"{sign}{magnitude}"
    whole, part = divmod(magnitude, 10**precision)
    return f"{sign}{whole}.{part:0{precision}d}"


def _track_text(value: str) -> str:
    """A value safe inside double quotes on a track line: no quotes, no control chars."""
    cleaned = "".join(" " if ord(ch) < 0x20 or ch == "\x7f" else ch for ch in value)
    return cleaned.replace('"', "'")


def write_bedgraph(
    handle: TextIO,
    track_name: str,
    description: str,
    chunks: Iterable[tuple[str, np.ndarray]],
    precision: int = 4,
) -> None:
    """Write a bedGraph: a ``track type=bedGraph`` line, then merged runs.

    Each data line is ``seqid<TAB>start0<TAB>end0<TAB>value`` (0-based
    half-open), records in the order of ``chunks``, runs in position order.
    Double quotes in the name or description become single quotes and control
    characters become spaces, so the track line stays well-formed.
    """
    _check_precision(precision)
    handle.write(
        f'track type=bedGraph name="{_track_text(track_name)}" '
        f'description="{_track_text(description)}"\n'
    )
    for seqid, values in chunks:
        starts, ends, scaled = runs_of_rounded(values, precision)
        texts: dict[int, str] = {}
        for lo in range(0, starts.shape[0], _LINES):
            block_scaled = scaled[lo : lo + _LINES].tolist()
            for v in set(block_scaled) - texts.keys():
                texts[v] = format_scaled(v, precision)
            handle.write(
                "".join(
                    f"{seqid}\t{s}\t{e}\t{texts[v]}\n"
                    for s, e, v in zip(
                        starts[lo : lo + _LINES].tolist(),
                        ends[lo : lo + _LINES].tolist(),
                        block_scaled,
                    )
                )
            )


def write_bigwig(
    path: str | Path,
    track_chunks: Iterable[tuple[str, np.ndarray]],
    chrom_sizes: list[tuple[str, int]],
    precision: int = 4,
) -> None:
    """Write a bigWig with the same merged runs as :func:`write_bedgraph`.

    ``chrom_sizes`` lists ``(seqid, length)`` for the header; ``track_chunks``
    must come in that order (records may be left out) and each values array
    must have the record's length.  bigWig stores 32-bit floats, so a value is
    read back within float32 precision of its rounded value.  Needs the
    optional pyBigWig package; raises
    :class:`~seqstate.errors.OptionalDependencyError` when it is missing.
    """
    _check_precision(precision)
    try:
        import pyBigWig
    except ImportError:
        raise OptionalDependencyError(
            "bigWig output needs the optional extra: pip install 'seqstate[bigwig]'"
        ) from None
    order = {seqid: (i, length) for i, (seqid, length) in enumerate(chrom_sizes)}
    scale = 10.0**precision
    bw = pyBigWig.open(str(path), "w")
    if bw is None:
        raise OSError(f"pyBigWig could not open {str(path)!r} for writing")
    try:
        bw.addHeader([(seqid, int(length)) for seqid, length in chrom_sizes])
        last = -1
        for seqid, values in track_chunks:
            if seqid not in order:
                raise ValueError(f"record {seqid!r} is not in chrom_sizes")
            index, length = order[seqid]
            if index <= last:
                raise ValueError(f"record {seqid!r} comes out of chrom_sizes order")
            last = index
            if np.shape(values) != (length,):
                raise ValueError(
                    f"record {seqid!r}: {np.shape(values)} values for a length of {length}"
                )
            starts, ends, scaled = runs_of_rounded(values, precision)
            for lo in range(0, starts.shape[0], _ENTRIES):
                hi = lo + _ENTRIES
                block_starts = starts[lo:hi]
                bw.addEntries(
                    [seqid] * block_starts.shape[0],
                    block_starts,
                    ends=ends[lo:hi],
                    values=scaled[lo:hi] / scale,
                )
    finally:
        bw.close()
