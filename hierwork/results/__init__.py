"""RESULTS: what the posterior says, in the tables and files users read.

``baselines`` (complete and no pooling), ``draws`` (posterior draws and rows,
the linear predictor), ``estimates`` (group and population tables),
``predictive`` (posterior predictive and calibration), ``prior_predictive``,
``loo`` (PSIS-LOO across the pooling spectrum) and ``predict`` (new rows).
"""
