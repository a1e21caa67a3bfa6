"""riskprem: pooled risk-premium estimation with a versioned store of vintages.

The import package is ``panel``; the distribution and console script are ``riskprem``.

Python API::

    from panel import Panel, ModelSpec, fit
    result = fit(Panel.from_frame(returns), ModelSpec(premium_factors=1))
    result.estimates            # per asset and date: filtered / smoothed premia, predictive returns
    result.cross_section("2024-06-30").table()

Names are imported on first use, so ``import panel.store`` does not load the estimator.
"""

from importlib import import_module

__version__ = "0.1.0"

_EXPORTS = {
    "Panel": "panel.data",
    "fit": "panel.model.fit", "evaluate": "panel.model.fit",
    "Params": "panel.model.params",
    "PanelFit": "panel.model.result", "CrossSection": "panel.model.result",
    "ModelSpec": "panel.model.spec", "Prior": "panel.model.spec", "InitialPremium": "panel.model.spec",
    "VolScale": "panel.model.spec", "SpecError": "panel.model.spec",
    "Priors": "panel.bayes.priors",
}

__all__ = sorted(_EXPORTS) + ["__version__"]


def __getattr__(name):
    if name in _EXPORTS:
        value = getattr(import_module(_EXPORTS[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'panel' has no attribute {name!r}")


def __dir__():
    return __all__
