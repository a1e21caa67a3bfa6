"""riskprem: pooled risk-premium estimation with a versioned store of vintages.

The import package is ``panel``; the distribution and console script are ``riskprem``.
"""

__version__ = "0.1.0"
