"""Old module locations kept importable for one release (they moved in 0.2: the vintage workflow to
:mod:`panel.vintages`, benchmarks to :mod:`panel.bench`).  Importing one warns once and hands out
the new module's names."""

from __future__ import annotations

import sys
import warnings
from importlib import import_module


def forward(old: str, new: str) -> None:
    """Make module ``old`` expose every public name of ``new``, with a DeprecationWarning."""
    warnings.warn(f"{old} moved to {new}; import it from there ({old} goes away in the next release)",
                  DeprecationWarning, stacklevel=3)
    target = import_module(new)
    names = getattr(target, "__all__", None) or [n for n in vars(target) if not n.startswith("__")]
    sys.modules[old].__dict__.update({n: getattr(target, n) for n in names})
