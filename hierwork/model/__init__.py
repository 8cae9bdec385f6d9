"""MODEL: the PyMC model of a plan, on one of three exact paths.

``blocks`` (priors, population coefficients, group-effect scales: shared by
every path), ``rowwise`` (per-row likelihood, or per-cell statistics on the
reduced path), ``cells`` (sufficient statistics of a normal linear model),
``marginal`` (the collapsed and reduced normal algebra), ``collapsed`` (group
effects integrated out and drawn back exactly), ``semi_collapsed`` (one crossed
factor integrated out), ``refresh`` (sampled effects redrawn after NUTS) and
``paths`` (which path and engine a plan takes, and why).
"""
