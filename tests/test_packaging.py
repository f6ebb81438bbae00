"""The installed package holds every subpackage of the source tree.

CI installs with ``pip install .`` (not editable), and setuptools installs only the
packages listed in pyproject.toml; a subpackage missing from that list would import in the
checkout but not for a user.
"""

from __future__ import annotations

import sys
from pathlib import Path

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

REPO = Path(__file__).resolve().parent.parent


def test_every_subpackage_is_listed_for_installation():
    config = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))
    listed = set(config["tool"]["setuptools"]["packages"])
    found = {
        ".".join(init.parent.relative_to(REPO).parts)
        for init in (REPO / "seqstate").rglob("__init__.py")
        if "__pycache__" not in init.parts
    }
    assert found <= listed, f"not listed in pyproject.toml: {sorted(found - listed)}"
    assert "seqstate.models" in listed  # the built-in models (package-dir models/)
