"""Bayesian estimation of the premium panel by Gibbs sampling (DESIGN §3a).

``sample(data, ...) -> BayesResult``; priors in the trade's units (:class:`Priors`).
"""

from panel.bayes.priors import PriorError, Priors
from panel.bayes.result import BayesResult
from panel.bayes.run import sample

__all__ = ["BayesResult", "PriorError", "Priors", "sample"]
