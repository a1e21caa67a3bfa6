"""The premium-panel model: specification, parameters, EM estimation and results."""
