"""riskprem: pooled risk-premium estimation with a versioned store of vintages.

The import package is ``panel``; the distribution and console script are ``riskprem``.

Python API::

    from panel import Panel, ModelSpec, fit
    result = fit(Panel.from_frame(returns), ModelSpec(premium_factors=1))
    result.estimates            # per asset and date: filtered / smoothed premia, predictive returns
    result.cross_section("2024-06-30").table()
"""

__version__ = "0.1.0"

from panel.data import Panel  # noqa: E402
from panel.model.fit import evaluate, fit  # noqa: E402
from panel.model.params import Params  # noqa: E402
from panel.model.result import CrossSection, PanelFit  # noqa: E402
from panel.model.spec import InitialPremium, ModelSpec, Prior, SpecError, VolScale  # noqa: E402

__all__ = ["Panel", "ModelSpec", "Prior", "InitialPremium", "VolScale", "SpecError", "Params",
           "PanelFit", "CrossSection", "fit", "evaluate", "__version__"]
