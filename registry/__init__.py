"""priorledger: a registry of published evidence that builds traceable, discounted priors."""

__version__ = "0.1.0"
