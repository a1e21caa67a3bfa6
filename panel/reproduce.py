"""Deprecated location of :mod:`panel.vintages.reproduce` (moved in 0.2; removed in the next release)."""

from panel._moved import forward

forward(__name__, "panel.vintages.reproduce")
