"""Where the SQL files live: top-level ``migrations/`` and ``queries/``.

One source of truth, two places to find it:

1. ``<repo>/migrations`` and ``<repo>/queries`` when the package runs from a source checkout
   (``pip install -e .``, or tests) — recognised by the riskprem ``pyproject.toml`` beside them;
2. ``<prefix>/share/riskprem/{migrations,queries}`` for a regular install, where the wheel puts them
   through ``[tool.setuptools.data-files]`` in ``pyproject.toml``.  ``<prefix>`` is tried as
   ``sys.prefix``, the install scheme's data path, the user base, and the prefix the package itself
   sits under (``pip install --prefix``).
"""

from __future__ import annotations

import site
import sys
import sysconfig
from functools import cache
from pathlib import Path

from panel.store.errors import StoreError


@cache
def source_root() -> Path | None:
    """The riskprem source checkout this package runs from, or None for an installed package."""
    root = Path(__file__).resolve().parents[2]
    pyproject = root / "pyproject.toml"
    try:
        if 'name = "riskprem"' in pyproject.read_text(encoding="utf-8"):
            return root
    except OSError:
        pass
    return None


def _candidates(kind: str) -> list[Path]:
    found = []
    root = source_root()
    if root is not None:
        found.append(root / kind)
    prefixes = [sys.prefix, sysconfig.get_path("data"), getattr(site, "USER_BASE", None)]
    # the prefix this copy of the package was installed into: <prefix>/lib/pythonX.Y/site-packages/panel
    prefixes += [str(p) for p in Path(__file__).resolve().parents[3:6]]
    for prefix in dict.fromkeys(p for p in prefixes if p):
        found.append(Path(prefix) / "share" / "riskprem" / kind)
    return found


@cache
def resource_dir(kind: str) -> Path:
    """The folder holding the ``kind`` (``"migrations"`` or ``"queries"``) SQL files."""
    candidates = _candidates(kind)
    for folder in candidates:
        if folder.is_dir() and any(folder.glob("*.sql")):
            return folder
    looked = ", ".join(str(c) for c in candidates)
    raise StoreError(f"cannot find riskprem's {kind}/ SQL files (looked in {looked}); reinstall riskprem")
