"""``python -m panel.bench``: the estimation benchmark (:mod:`panel.bench.fit`)."""

from panel.bench.fit import main

if __name__ == "__main__":
    raise SystemExit(main())
