"""Ordered categories (ratings, grades, scores) as a cumulative logit with ordered cut-points.

An outcome with levels ``1..K`` (positions in ``outcome.levels``) is above
level ``k`` with probability ``P(y > k) = expit(eta - c_k)``, for cut-points
``c_1 < c_2 < ... < c_{K-1}`` shared by every row (McCullagh 1980, J. Royal
Statistical Society B 42, 109-142). The linear predictor keeps its intercept,
so one cut-point must be fixed: ``c_1 = 0``. The intercept is then the log-odds
of a level above the first, at the reference values; the free cut-points
``c_2..c_{K-1}`` are the vector parameter ``cutpoints`` (dim ``cutpoint``,
labelled ``lower|upper`` by the two levels they separate), built as cumulative
sums of positive gaps so that they are ordered and above ``c_1`` by
construction (and the prior predictive draws them in order). Two levels leave
no free cut-point: the model is then a logistic regression of "above the first
level".

The outcome's scale is the expected score, the level's position 1..K averaged
over the level probabilities: ``1 + sum_k expit(eta - c_k)``.
"""
from __future__ import annotations

import numpy as np
from scipy import optimize, special

from hierwork.plan.families.base import LINK_SPREAD, Family, OutcomeRows, element_names

#: Spread of the log gap between consecutive cut-points (default prior): with 99% prior probability a
#: gap is within a factor exp(2.576 x 1) = 13 of the one the observed shares give.
GAP_LOG_SD = 1.0
#: Smallest gap of the baseline fits' starting values.
_MIN_GAP = 1e-3


class Ordinal(Family):
    name = "ordinal"
    link = "logit"
    link_scale = "log-odds of a level above the first"
    outcome_scale = "expected score"
    discrete = True
    ordered = True
    summary = ("ordered levels (ratings, scores 1-5): cumulative logit with ordered cut-points; "
               "outcome.levels gives the order")
    example_params = {"cutpoints": (1.0, 2.2)}

    def example_rows(self, rng, n):
        return OutcomeRows(None, levels=("1", "2", "3", "4"))

    # ------------------------------------------------------------------ declaration and data

    def parameters(self, rows):
        return ("cutpoints",) if rows.levels is None or len(rows.levels) > 2 else ()

    def vector_parameters(self, rows):
        if rows.levels is None or len(rows.levels) <= 2:
            return {}
        lv = rows.levels
        return {"cutpoints": ("cutpoint", tuple(f"{lv[k - 1]}|{lv[k]}" for k in range(2, len(lv))))}

    def prior_names(self, name, rows):
        return element_names("cutpoints.gap", self.vector_parameters(rows)["cutpoints"][1])

    def prior_variable(self, name):
        return f"{name}__gap"

    def own_variable(self, name, priors, dims):
        """Positive gaps (``cutpoints__gap``), their cumulative sums the cut-points above ``c_1 = 0``."""
        import pymc as pm
        import pytensor.tensor as pt

        from hierwork.model.blocks import prior_rv

        gaps = prior_rv(self.prior_variable(name), priors, dims=dims)
        return pm.Deterministic(name, pt.cumsum(gaps), dims=dims)

    def check_data(self, rows, fail):
        k = len(rows.levels)
        bad = ~np.isin(rows.y, np.arange(1, k + 1))
        if bad.any():
            fail(bad, "outcome", f"must be one of the {k} levels", "list the levels under outcome.levels")

    # ------------------------------------------------------------------ priors

    def observed_cuts(self, rows):
        """``c_1..c_{K-1}`` with ``c_1 = 0`` from the observed cumulative shares (half a row added to each
        level, so that empty levels keep the cut-points apart), and the logit of the share above level 1."""
        k = len(rows.levels)
        counts = np.bincount(rows.y.astype(int), minlength=k + 1)[1:] + 0.5
        logits = special.logit(np.cumsum(counts)[:-1] / counts.sum())
        return logits - logits[0], float(-logits[0])

    def link_centre_spread(self, rows):
        return self.observed_cuts(rows)[1], LINK_SPREAD

    def extra_priors(self, rows, spread):
        """Gaps between consecutive cut-points: ``lognormal`` with median the observed gap (module docstring
        of ``priors``)."""
        from hierwork.formatting import number
        from hierwork.plan.priors import Prior

        if not self.vector_parameters(rows):
            return {}
        gaps = np.diff(self.observed_cuts(rows)[0])
        names = self.prior_names("cutpoints", rows)
        return {name: Prior("lognormal", {"mu": float(np.log(g)), "sigma": GAP_LOG_SD}, True, "positive",
                            f"median {number(g)}, the gap between the logits of the observed cumulative shares "
                            f"up to the levels on either side; sigma {GAP_LOG_SD:g}: within a factor of 13 of it "
                            "with 99% prior probability")
                for name, g in zip(names, gaps)}

    def working_response(self, rows):
        """One Fisher-scoring step from the pooled shares: ``eta0 + score / I`` with variance ``1 / I``."""
        cuts, eta0 = self.observed_cuts(rows)
        params = {"cutpoints": cuts[1:]}
        info = float(self.information(np.float64(eta0), rows, params))
        return eta0 + _score(rows.y, eta0, _full(params)) / info, np.full(rows.n, 1.0 / info)

    # ------------------------------------------------------------------ maximum likelihood (baselines)

    def glm_start(self, rows):
        return np.full(rows.n, self.observed_cuts(rows)[1])

    def glm_working(self, rows, eta, state):
        """Fisher scoring at the current cut-points (``state['cutpoints']``)."""
        if "cutpoints" not in state:
            state["cutpoints"] = self.observed_cuts(rows)[0][1:]
        params = {"cutpoints": state["cutpoints"]}
        w = np.maximum(self.information(eta, rows, params), 1e-12)
        return eta + _score(rows.y, eta, _full(params)) / w, w

    def glm_update(self, rows, eta, state):
        """Maximum-likelihood cut-points given the linear predictor (search over the log gaps)."""
        if len(rows.levels) <= 2:
            return state
        start = np.log(np.maximum(np.diff(np.r_[0.0, state["cutpoints"]]), _MIN_GAP))

        def nll(log_gaps):
            return -np.sum(self.log_density(rows.y, eta, rows, {"cutpoints": np.cumsum(np.exp(log_gaps))}))

        found = optimize.minimize(nll, start, method="BFGS", options={"gtol": 1e-10})
        state["cutpoints"] = np.cumsum(np.exp(found.x))
        return state

    # ------------------------------------------------------------------ model and predictions

    def likelihood(self, eta, y, rows, params):
        """PyMC's ordered logistic (levels 0..K-1) shifted to positions 1..K, so that prior and posterior
        predictive draws are on the data's positions."""
        import pymc as pm
        import pytensor.tensor as pt

        cuts = pt.zeros(1) if "cutpoints" not in params else pt.concatenate([pt.zeros(1), params["cutpoints"]])
        pm.CustomDist("y", eta, cuts, dist=_positions, observed=y)

    def mean(self, eta, params):
        """Expected score: ``1 + sum_k P(y > k)``."""
        return 1.0 + special.expit(np.asarray(eta)[..., None] - _full(params)).sum(axis=-1)

    def level_columns(self, rows):
        """``p_level=LABEL``: the probability of each level at the group's reference values (posterior mean)."""
        return [f"p_level={label}" for label in rows.levels]

    def level_probabilities(self, eta, params):
        """``P(y = k)`` for k = 1..K on a last axis, with ``P(y > k) = expit(eta - c_k)``."""
        above = special.expit(np.asarray(eta)[..., None] - _full(params))
        ones = np.ones(above.shape[:-1] + (1,))
        return np.concatenate([ones, above], axis=-1) - np.concatenate([above, 0 * ones], axis=-1)

    def information(self, eta, rows, params):
        """``sum_k (f(u_k) - f(l_k))^2 / P(y = k)``, ``f`` the logistic density at the level's bounds."""
        lower, upper = _bounds(np.asarray(eta, dtype=float), _full(params))
        p = np.maximum(special.expit(upper) - special.expit(lower), 1e-300)
        slope = _density(upper) - _density(lower)
        return (slope ** 2 / p).sum(axis=-1)

    def log_density(self, y, eta, rows, params):
        """``log(F(u) - F(l)) = log F(u) + log F(-l) + log(1 - e^(l - u))``, ``u = c_y - eta``,
        ``l = c_(y-1) - eta``, ``F`` the logistic function (accurate in both tails)."""
        lower, upper = _at_level(y, eta, _full(params))
        return special.log_expit(upper) + special.log_expit(-lower) + np.log1p(-np.exp(lower - upper))

    def simulate(self, rng, eta, rows, params):
        above = special.expit(np.asarray(eta)[..., None] - _full(params))
        u = rng.random(above.shape[:-1])
        return 1.0 + (u[..., None] < above).sum(axis=-1)

    def reference(self, eta, rows, params):
        return Levels(self.level_probabilities(eta, params))


class Levels:
    """A distribution over levels 1..K per row from its probabilities ``p`` (last axis), like a frozen
    scipy.stats distribution (scipy's rv_discrete does not broadcast over rows)."""

    def __init__(self, p):
        self.p = np.asarray(p)
        self.k = np.arange(1, self.p.shape[-1] + 1)

    def logpmf(self, y):
        y = np.asarray(y).astype(int)
        picked = np.take_along_axis(np.broadcast_to(self.p, np.broadcast_shapes(self.p.shape[:-1], y.shape)
                                                    + self.p.shape[-1:]), y[..., None] - 1, axis=-1)[..., 0]
        return np.log(picked)

    def mean(self):
        return (self.p * self.k).sum(axis=-1)

    def var(self):
        return (self.p * self.k ** 2).sum(axis=-1) - self.mean() ** 2


def _positions(eta, cuts, size):
    import pymc as pm

    return pm.OrderedLogistic.dist(eta=eta, cutpoints=cuts, size=size) + 1


def _full(params) -> np.ndarray:
    """All cut-points ``c_1 = 0, c_2, ...`` on a last axis (just ``c_1`` for two levels)."""
    if "cutpoints" not in params:
        return np.zeros(1)
    cuts = np.asarray(params["cutpoints"], dtype=float)
    return np.concatenate([np.zeros(cuts.shape[:-1] + (1,)), cuts], axis=-1)


def _bounds(eta, cuts):
    """Every level's ``l = c_(k-1) - eta`` and ``u = c_k - eta`` on a last axis (``c_0 = -inf``, ``c_K = inf``)."""
    pad = np.full(cuts.shape[:-1] + (1,), np.inf)
    edges = np.concatenate([-pad, cuts, pad], axis=-1) - eta[..., None]
    return edges[..., :-1], edges[..., 1:]


def _at_level(y, eta, cuts):
    """``l`` and ``u`` of the observed level ``y`` of each element."""
    lower, upper = _bounds(np.asarray(eta, dtype=float), cuts)
    shape = np.broadcast_shapes(lower.shape[:-1], np.shape(y))
    idx = np.broadcast_to(np.asarray(y).astype(int), shape)[..., None] - 1
    pick = lambda a: np.take_along_axis(np.broadcast_to(a, shape + a.shape[-1:]), idx, axis=-1)[..., 0]  # noqa: E731
    return pick(lower), pick(upper)


def _density(x):
    """The logistic density ``F(x)(1 - F(x))`` (0 at infinite bounds)."""
    return special.expit(x) * special.expit(-x)


def _score(y, eta, cuts):
    """``d log P(y) / d eta = -(f(u) - f(l)) / P(y)`` at the observed levels."""
    lower, upper = _at_level(y, eta, cuts)
    p = np.maximum(special.expit(upper) - special.expit(lower), 1e-300)
    return -(_density(upper) - _density(lower)) / p
