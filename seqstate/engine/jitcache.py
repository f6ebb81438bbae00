"""Where the compiled kernels are cached on disk, decided once, before any kernel is defined.

numba keeps compiled kernels (``cache=True``) in the first folder it can write:
``NUMBA_CACHE_DIR`` when set, the ``__pycache__`` folder beside the module, then
a per-user cache folder.  When none can be written (a read-only installation
run by a user whose home folder is not writable, say) numba raises at import.
Instead, :func:`configure` (run when this module is imported) checks whether
numba can cache, and otherwise

1. points ``NUMBA_CACHE_DIR`` at a folder it can write under the system's
   temporary folder (``seqstate-numba-cache-<user id>``), or, failing that,
2. switches the on-disk cache off (:data:`CACHE` is False; every run then
   compiles the kernels anew, which costs tens of seconds at start-up),

and writes ONE line starting ``warning:`` on stderr saying which.  This is the
only output of the engine; it happens at import, before any command runs.

The decision itself is :func:`plan_cache`, a pure function of a probe, so that
it can be tested without a read-only file system.
"""

from __future__ import annotations

import os
import sys
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numba
from numba import njit


@dataclass(frozen=True)
class CachePlan:
    """``cache_dir``: a folder to set as NUMBA_CACHE_DIR (None: leave numba's choice);
    ``enabled``: whether kernels are cached on disk; ``warning``: the line to print."""

    cache_dir: str | None
    enabled: bool
    warning: str | None


def plan_cache(works: Callable[[str | None], bool], fallbacks: Sequence[str]) -> CachePlan:
    """Decide where numba caches: ``works(None)`` tells whether numba's own choice can be
    written, ``works(folder)`` whether ``folder`` as NUMBA_CACHE_DIR can; ``fallbacks`` are
    tried in order."""
    if works(None):
        return CachePlan(None, True, None)
    for folder in fallbacks:
        if works(folder):
            return CachePlan(
                folder,
                True,
                "warning: no numba cache folder can be written (NUMBA_CACHE_DIR, the package's "
                f"__pycache__, the user cache); compiled kernels are cached in {folder}",
            )
    return CachePlan(
        None,
        False,
        "warning: no numba cache folder can be written; the kernels are compiled again "
        "on every run (slower start)",
    )


def fallback_folders() -> list[str]:
    """Folders tried when numba's own choices cannot be written."""
    uid = os.getuid() if hasattr(os, "getuid") else os.getpid()
    return [os.path.join(tempfile.gettempdir(), f"seqstate-numba-cache-{uid}")]


def _probe() -> int:  # pragma: no cover - never called, only decorated
    return 0


def _set_cache_dir(folder: str) -> None:
    os.environ["NUMBA_CACHE_DIR"] = folder
    numba.config.CACHE_DIR = folder  # type: ignore[attr-defined]


def _numba_can_cache(folder: str | None) -> bool:
    """True when numba finds a cache folder it can write for this package's modules
    (with ``folder`` as NUMBA_CACHE_DIR, when given).  Decorating a function with
    ``cache=True`` makes numba look for its folder and raise when there is none;
    nothing is compiled."""
    if folder is not None:
        try:
            os.makedirs(folder, mode=0o700, exist_ok=True)
        except OSError:
            return False
        _set_cache_dir(folder)
    try:
        njit(cache=True)(_probe)
    except (RuntimeError, OSError):
        return False
    return True


def configure(
    works: Callable[[str | None], bool] = _numba_can_cache,
    fallbacks: Sequence[str] | None = None,
) -> CachePlan:
    """Apply :func:`plan_cache` to this process (see module docstring); returns the plan."""
    old = os.environ.get("NUMBA_CACHE_DIR")
    plan = plan_cache(works, fallback_folders() if fallbacks is None else fallbacks)
    if plan.cache_dir is not None:
        _set_cache_dir(plan.cache_dir)
    elif old is not None:
        _set_cache_dir(old)
    else:  # a fallback that was tried and failed leaves no trace
        os.environ.pop("NUMBA_CACHE_DIR", None)
        numba.config.CACHE_DIR = ""  # type: ignore[attr-defined]
    if plan.warning:
        print(plan.warning, file=sys.stderr)
    return plan


#: The plan of this process.
PLAN = configure()
#: Whether kernels are cached on disk (the ``cache`` option of every kernel).
CACHE = PLAN.enabled


def kernels_cached(modules: Sequence[str] = ("kernels",)) -> bool:
    """Whether compiled kernels of the engine modules or family packages ``modules``
    (``"kernels"``, ``"small"``, ``"sparse"``, ...) are found in the on-disk cache, i.e.
    whether a run starts without compiling them.  A guess from the cache's index files
    (``MODULE.FUNCTION-LINE.pyXY.nbi``, in a folder of the package's name for a family),
    for the message a command shows before the first, slow compile; never raises."""
    if not CACHE:
        return False
    here = os.path.dirname(os.path.abspath(__file__))
    folders = [here]  # the engine's __pycache__ folders, its family packages' too
    custom = os.environ.get("NUMBA_CACHE_DIR")
    if custom:
        folders.append(custom)
    tag = f".py{sys.version_info.major}{sys.version_info.minor}.nbi"
    for module in modules:
        found = False
        for folder in folders:
            try:
                for root, _dirs, names in os.walk(folder):
                    in_package = module in root.split(os.sep)
                    if any(
                        (in_package or n.startswith(module + ".")) and n.endswith(tag)
                        for n in names
                    ):
                        found = True
                        break
            except OSError:
                continue
            if found:
                break
        if not found:
            return False
    return True
