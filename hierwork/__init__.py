"""hierwork: declare, check, fit, gate and report Bayesian multilevel models."""
__version__ = "0.1.0"
