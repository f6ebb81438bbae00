"""The overwrite rule every command applies to its outputs, and write failures.

The rule (:func:`check_outputs`), the same for every command:

- an output that already exists is replaced only with ``force`` (``--force``);
- an output that is also an input (the same file, by :func:`os.path.samefile`
  or by resolved path), or two outputs of one run that are the same path, is
  always refused, ``force`` or not;
- an output name that is empty or names a folder is refused.

:func:`write_failure` turns an OSError that means "cannot be written" (full disk,
quota, read-only file system, ...) into the one-line user error.  The all-or-nothing
writes that apply the rule are in :mod:`seqstate.io.atomic`.
"""

from __future__ import annotations

import errno
import os
from collections.abc import Iterable
from pathlib import Path
from typing import TypeGuard

from seqstate.errors import UsageError

__all__ = ["WRITE_ERRNOS", "check_outputs", "same_file", "write_failure"]

#: errno values that mean "the output cannot be written" (full disk, quota, size limit,
#: read-only file system, device error).
WRITE_ERRNOS = frozenset(
    e
    for e in (
        errno.ENOSPC,
        errno.EFBIG,
        getattr(errno, "EDQUOT", None),
        errno.EROFS,
        errno.EIO,
    )
    if e is not None
)


def _key(path: Path) -> str:
    return os.path.normcase(os.path.realpath(path))


def same_file(a: str | os.PathLike, b: str | os.PathLike) -> bool:
    """True if ``a`` and ``b`` are one file: :func:`os.path.samefile` when both exist,
    else the same path once symbolic links and ``..`` are resolved."""
    pa, pb = Path(a), Path(b)
    try:
        if pa.exists() and pb.exists():
            return os.path.samefile(pa, pb)
    except OSError:
        pass
    return _key(pa) == _key(pb)


def _usable(path: str | os.PathLike | None) -> TypeGuard[str | os.PathLike[str]]:
    return path is not None and str(path) != "-"


def check_outputs(
    outputs: Iterable[str | os.PathLike | None],
    inputs: Iterable[str | os.PathLike | None] = (),
    *,
    force: bool = False,
) -> None:
    """Apply the overwrite rule to one run's output files; raise UsageError (exit 2).

    ``outputs`` and ``inputs`` are file paths; ``None`` and ``"-"`` (standard
    input/output) are skipped.  See the module docstring for the rule.
    """
    outs = [Path(p) for p in outputs if _usable(p)]
    ins = [Path(p) for p in inputs if _usable(p)]
    for out in outs:
        if not str(out) or out.name in ("", ".", ".."):
            raise UsageError(f"output file '{out}' is not a file name")
    for i, out in enumerate(outs):
        for other in outs[:i]:
            if same_file(out, other):
                raise UsageError(
                    f"outputs '{other}' and '{out}' are the same file: give each output its "
                    "own name"
                )
        for inp in ins:
            if same_file(out, inp):
                raise UsageError(
                    f"output '{out}' is the input '{inp}': refusing to overwrite an input "
                    "(even with --force); choose another output name"
                )
        if out.is_dir():
            raise UsageError(f"output file '{out}' is a directory, expected a file name")
        if (out.exists() or out.is_symlink()) and not force:
            raise UsageError(f"output '{out}' already exists: use --force to replace it")


def write_failure(exc: OSError, what: str) -> UsageError | None:
    """The one-line error for an OSError that means ``what`` cannot be written, else None."""
    if exc.errno not in WRITE_ERRNOS:
        return None
    reason = exc.strerror or os.strerror(exc.errno or 0)  # errno is one of WRITE_ERRNOS
    return UsageError(f"{what} cannot be written: {reason}")
