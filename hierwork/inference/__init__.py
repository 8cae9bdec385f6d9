"""INFERENCE: sampling and the convergence gate.

``sampling`` (one function over PyMC's NUTS and nutpie; seed streams),
``convergence`` (R-hat and ESS for all parameters at once), ``checks`` (the
gate's table) and ``gate`` (evaluating it on a fit).
"""
