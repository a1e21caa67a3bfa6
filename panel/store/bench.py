"""Deprecated location of :mod:`panel.bench.store` (moved in 0.2; removed in the next release)."""

from panel._moved import forward

forward(__name__, "panel.bench.store")

if __name__ == "__main__":
    raise SystemExit(main())  # noqa: F821 (forwarded)
