"""Deprecated location of :mod:`panel.vintages.pools` (moved in 0.2; removed in the next release)."""

from panel._moved import forward

forward(__name__, "panel.vintages.pools")
