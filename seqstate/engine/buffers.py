"""The engine's one allocation helper for work buffers (arrays filled before use).

Every array the engine allocates without initialising it comes from
:func:`work_buffer`.  Normally that is ``np.empty`` (no cost).  In *poisoned*
mode every such buffer is filled with a value no computation should ever see
-- NaN for floating-point dtypes, :data:`INT_POISON` (or the dtype's most
negative value when that does not fit) for signed integers, the largest value
for unsigned integers -- so that a read before a write shows up in the results
instead of passing silently with whatever the memory held.

Poisoned mode is on when the environment variable ``SEQSTATE_POISON_BUFFERS``
is set to anything but ``""``, ``0``, ``false``, ``no`` or ``off`` when this
module is imported; :func:`set_poisoned` and :func:`poisoning` switch it in
process.  The compiled kernels never allocate work buffers themselves: they get
them from Python, so the mode is never frozen into a cached compilation.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator

import numpy as np

#: Environment variable that turns poisoned buffers on at import.
ENV_VAR = "SEQSTATE_POISON_BUFFERS"
#: Fill value of signed-integer work buffers in poisoned mode (when the dtype holds it).
INT_POISON = -7777777


def _env_flag(value: str | None) -> bool:
    return (value or "").strip().lower() not in ("", "0", "false", "no", "off")


_poisoned = _env_flag(os.environ.get(ENV_VAR))


def poisoned() -> bool:
    """True when work buffers are filled with poison values (see module docstring)."""
    return _poisoned


def set_poisoned(flag: bool) -> bool:
    """Switch poisoned buffers on or off in this process; returns the previous setting."""
    global _poisoned
    old = _poisoned
    _poisoned = bool(flag)
    return old


@contextlib.contextmanager
def poisoning(flag: bool = True) -> Iterator[None]:
    """Within the block, work buffers are poisoned (``flag`` true) or plain ``np.empty``."""
    old = set_poisoned(flag)
    try:
        yield
    finally:
        set_poisoned(old)


def poison_value(dtype) -> float | int | bool:
    """The fill value of a poisoned work buffer of ``dtype``."""
    dt = np.dtype(dtype)
    if dt.kind in "fc":
        return np.nan
    if dt.kind == "i":
        return max(INT_POISON, int(np.iinfo(dt).min))
    if dt.kind == "u":
        return int(np.iinfo(dt).max)
    if dt.kind == "b":
        return True
    raise TypeError(f"no poison value for dtype {dt}")


def work_buffer(shape: int | tuple[int, ...], dtype=np.float64) -> np.ndarray:
    """A C-contiguous array of ``shape`` whose every entry the caller writes before reading.

    ``np.empty`` normally; filled with :func:`poison_value` in poisoned mode.
    """
    if _poisoned:
        return np.full(shape, poison_value(dtype), dtype=dtype)
    return np.empty(shape, dtype=dtype)
