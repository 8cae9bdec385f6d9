"""Exact refresh of the sampled group effects after NUTS, for every outcome family.

NUTS moves the coefficients, the SDs and thousands of group effects together;
with many groups the effects' tails (folded R-hat) are its weak point, and the
gate's 1.01 on each of a thousand effects is then failed by chance at 2 x 1,000
draws. Given everything else, though, the groups of one factor are independent
(each row belongs to one group of it), so each group's effects can be drawn
afresh from their conditional, one small problem per group and draw.

For a normal outcome that conditional is normal and is drawn exactly
(:mod:`hierwork.model.semi_collapsed`). For any other family,
:func:`refresh_effects` takes Metropolis-Hastings steps with an independence
proposal: the normal approximation of the group's conditional at its mode,
found by Newton's method from 0 (not from the current value, so the proposal
depends only on what is conditioned on and the step is an exact
Metropolis-Hastings step). Each step leaves the joint posterior unchanged, so
every stored draw is still an exact posterior draw; where the approximation
is good (a group of many rows, or few rows and a tight prior) nearly every
proposal is accepted and the refreshed effects mix as the coefficients and
SDs do. A rejected proposal keeps NUTS's value.

The variables of the factors' sampled parameterisation (``F__coef``,
``F__z``, ``b_shifted_*``...) no longer match the refreshed effects: they move
to the InferenceData group :data:`AS_SAMPLED` and are not gated.

The conditional of group ``j``'s effects ``u_j`` (q terms, data units):
``log p(u_j | rest) = sum_r n_r log p(y_r | eta_r) - u_j' S^-1 u_j / 2 + const``,
``eta_r = eta_rest_r + x_r' u_j`` over the group's rows ``r`` (cells of rows
with identical predictors and groups, ``n_r`` rows each). Its gradient and
curvature in ``eta`` come from central differences of the family's own log
density, so every family is covered by its formula.
"""
from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import xarray as xr
from scipy import sparse

from hierwork.inference import seeds
from hierwork.plan.plan import ModelPlan

#: Gibbs sweeps over the factors (one factor needs one: its conditional does not change).
REFRESH_SWEEPS = 2
#: Most Newton iterations from 0 towards each group's conditional mode, and when they stop earlier
#: (every step below this share of its limit, :data:`NEWTON_REACH`).
NEWTON_STEPS, NEWTON_TOLERANCE = 12, 1e-5
#: Metropolis-Hastings steps per group and sweep.
MH_STEPS = 2
#: Draws x likelihood terms beyond which the refresh is skipped (about a minute of work).
REFRESH_BUDGET = 100_000_000
#: Largest change of a group's linear predictor per Newton step, in outcome spreads on the link scale.
NEWTON_REACH = 2.0
#: Draws x likelihood terms handled at once.
CHUNK_TERMS = 500_000
#: Posterior variables of a factor's sampled parameterisation (``F__contrast``...), set aside by the refresh.
SAMPLED_FORMS = ("contrast", "mean_z", "z", "u", "coef", "partial")
#: Population coefficients sampled shifted by the mean group effects, set aside by the refresh.
SHIFTED = ("b_shifted_intercept", "b_shifted_slope")
#: The InferenceData group that keeps what the refresh sets aside (NUTS's own draws of it).
AS_SAMPLED = "sampled_forms"


def set_aside_sampled_forms(idata, factors) -> None:
    """Move the refreshed factors' sampled forms and ``b_shifted_*`` to :data:`AS_SAMPLED`, in place."""
    post = idata.posterior
    aside = [name for name in post.data_vars
             if name.startswith(SHIFTED) or any(name == f"{g.name}__{form}" for g in factors for form in SAMPLED_FORMS)]
    if aside:
        idata.add_groups({AS_SAMPLED: post[aside]})
        idata.posterior = post.drop_vars(aside)


def refresh_effects(idata, plan: ModelPlan, seed):
    """Refresh every factor's ``F__effect`` by exact Metropolis-within-Gibbs steps, in place.

    Parameters
    ----------
    idata : arviz.InferenceData
        Posterior of :func:`hierwork.model.rowwise.build_model` (a family
        without the exact normal draws of the collapsed paths).
    plan : ModelPlan
    seed : int
        The run's seed; the steps use their own stream derived from it.

    Returns
    -------
    arviz.InferenceData
        The same object. The attribute ``refresh`` of each ``F__effect`` says
        what share of the proposals was accepted (or why nothing was refreshed).
    """
    from hierwork.results.draws import draws_of

    if not plan.factors:
        return idata
    post = idata.posterior
    draws = draws_of(post, plan.factors, plan.family.parameters(plan.outcome))
    terms = _Terms(plan)
    if draws.n * terms.rows.n > REFRESH_BUDGET:
        for f in plan.factors:
            post[f"{f.name}__effect"].attrs["refresh"] = (
                f"none: {draws.n} draws x {terms.rows.n} likelihood terms is over the budget of "
                f"{REFRESH_BUDGET:,}; the effects are NUTS's own draws")
        return idata
    precisions = {f.name: _prior_precision(post, f) for f in plan.factors}
    step = max(1, CHUNK_TERMS // terms.rows.n)
    starts = range(0, draws.n, step)
    streams = np.random.SeedSequence([int(seed), seeds.STREAMS["effect_refresh"]]).spawn(len(starts))
    sweeps = REFRESH_SWEEPS if len(plan.factors) > 1 else 1

    def one(k):
        index = np.arange(starts[k], min(starts[k] + step, draws.n))
        chunk = draws.subset(index)
        return index, _refresh_chunk(chunk, {name: p[index] for name, p in precisions.items()}, terms,
                                     sweeps, np.random.default_rng(streams[k]))

    effects = {f.name: draws.effects[f.name].copy() for f in plan.factors}
    accepted = dict.fromkeys(effects, 0.0)
    # Draws are independent and NumPy's element-wise work releases the GIL: threads share the cores.
    with ThreadPoolExecutor(max_workers=os.cpu_count() or 1) as pool:
        for index, (chunk, rates) in pool.map(one, range(len(starts))):
            for name in effects:
                effects[name][index] = chunk[name]
                accepted[name] += rates[name] * len(index) / draws.n
    shape = (post.sizes["chain"], post.sizes["draw"])
    for f in plan.factors:
        old = post[f"{f.name}__effect"]
        post[f"{f.name}__effect"] = xr.DataArray(
            effects[f.name].reshape(shape + old.shape[2:]), coords=old.coords, dims=old.dims,
            attrs={"refresh": f"{sweeps * MH_STEPS} Metropolis-Hastings steps per draw, "
                              f"{accepted[f.name]:.1%} of proposals accepted"})
    set_aside_sampled_forms(idata, plan.factors)
    return idata


def _prior_precision(post, f) -> np.ndarray:
    """``S^-1`` (D, q, q) of a factor's effects for every draw, ``S = L L'`` (:func:`chol_draws`)."""
    from hierwork.model.collapsed import chol_draws

    chol = chol_draws(lambda name: post[name].values.reshape((-1,) + post[name].shape[2:]), f)
    return np.linalg.inv(chol @ np.swapaxes(chol, -1, -2))


class _Terms:
    """The likelihood terms the refresh evaluates and each factor's grouping of them.

    Exact cells when the family has them (bernoulli rows -> binomial cells...),
    else the distinct rows, each counted as often as it occurs.
    """

    def __init__(self, plan: ModelPlan):
        from hierwork.model.cells import row_cells
        from hierwork.results.draws import Rows, distinct_rows, rows_of

        rows = rows_of(plan)
        cells = row_cells(plan.X, [f.index for f in plan.factors])
        aggregated = plan.family.aggregate(plan.outcome, cells.cell, cells.n_cells)
        if aggregated is not None:
            self.family, outcome = aggregated
            first = rows.subset(cells.first)
            self.rows, self.counts = Rows(first.X, first.groups, outcome), np.ones(cells.n_cells)
        else:
            distinct = distinct_rows(rows)
            self.family, self.rows, self.counts = plan.family, distinct.rows, distinct.counts.astype(float)
        # Differences and Newton steps on the scale of the outcome's spread on the link scale
        spread = plan.family.link_centre_spread(plan.outcome)[1]
        self.h = 1e-3 * spread
        self.groups = [_Group(self.rows.X[:, cols], index, f.n_groups, NEWTON_REACH * spread)
                       for f, (_, index, cols, _) in zip(plan.factors, self.rows.groups)]
        self.names = [f.name for f in plan.factors]

    def loglik_of(self, params):
        """``eta (D, terms) -> log density (D, terms)`` at the family parameters ``params``."""
        y, outcome = self.rows.outcome.y, self.rows.outcome

        def loglik(eta):
            return self.counts * self.family.log_density(y, eta, outcome, params)

        return loglik


def _refresh_chunk(draws, precisions: dict, terms: _Terms, sweeps: int, rng):
    """Sweeps over the factors for a chunk of draws; returns the new effects and acceptance rates."""
    from hierwork.results.draws import linear_predictor

    loglik = terms.loglik_of(draws.family_params(terms.rows))
    eta = linear_predictor(draws, terms.rows)
    accepted = dict.fromkeys(terms.names, 0.0)
    for _ in range(sweeps):
        for name, group in zip(terms.names, terms.groups):
            u, prior = draws.effects[name], precisions[name]
            rest = eta - group.term(u)
            mode, precision = group.laplace(rest, prior, loglik, terms.h)
            u, rate = group.metropolis(u, mode, precision, rest, prior, loglik, rng)
            draws.effects[name] = u
            accepted[name] += rate / sweeps
            eta = rest + group.term(u)
    return draws.effects, accepted


class _Group:
    """One factor's groups: their rows' design and the conditional of their effects.

    ``prior`` arguments are the effects' prior precisions ``S^-1`` (D, q, q).
    """

    def __init__(self, x, index, n_groups, reach):
        self.x, self.index = x, index  # (rows, q), (rows,)
        self.sums = sparse.csr_matrix((np.ones(len(index)), (index, np.arange(len(index)))),
                                      shape=(n_groups, len(index)))
        # A Newton step moves term k by at most reach / max |x_k| over the group's rows
        widest = np.zeros((n_groups, x.shape[1]))
        np.maximum.at(widest, index, np.abs(x))
        self.step_limit = reach / np.where(widest > 0, widest, 1.0)

    def term(self, u):
        """``x_r' u_{j(r)}`` (D, rows): the factor's contribution to the linear predictor."""
        return np.einsum("drq,rq->dr", u[:, self.index, :], self.x)

    def group_sums(self, values):
        """Sums over each group's rows: (D, rows) -> (D, J)."""
        return (self.sums @ values.T).T

    def log_target(self, u, rest, prior, loglik):
        """Conditional log density of each group's effects (D, J), up to a constant."""
        return self.group_sums(loglik(rest + self.term(u))) - 0.5 * np.einsum("djk,dkl,djl->dj", u, prior, u)

    def gradient_and_precision(self, u, rest, prior, loglik, h):
        """Gradient (D, J, q) of the conditional log density at ``u`` and a precision (D, J, q, q).

        The likelihood's curvature in ``eta`` is floored at 0 term by term, so the
        precision is positive definite for any family (it shapes a proposal only).
        """
        eta = rest + self.term(u)
        low, mid, high = loglik(eta - h), loglik(eta), loglik(eta + h)
        slope = (high - low) / (2 * h)
        bend = np.maximum(-(high - 2 * mid + low) / h ** 2, 0.0)
        q = self.x.shape[1]
        grad = np.stack([self.group_sums(slope * self.x[:, k]) for k in range(q)], axis=-1)
        grad -= np.einsum("dkl,djl->djk", prior, u)
        prec = np.empty(grad.shape + (q,))
        for k in range(q):
            for m in range(k, q):
                prec[..., k, m] = prec[..., m, k] = self.group_sums(bend * self.x[:, k] * self.x[:, m])
        return grad, prec + prior[:, None, :, :]

    def laplace(self, rest, prior, loglik, h):
        """Mode and precision of each group's normal approximation: Newton's method from 0.

        The start does not depend on the current effects, so the proposal is a
        function of what is conditioned on only (an exact independence sampler).
        Steps are limited (:data:`NEWTON_REACH`): from far away, a log link's
        curvature would otherwise send them much too far.
        """
        u = np.zeros((rest.shape[0], self.sums.shape[0], self.x.shape[1]))
        moving = np.ones(u.shape[:2], bool)  # a group stops for good at its own small step: its own data decide
        for _ in range(NEWTON_STEPS):
            grad, prec = self.gradient_and_precision(u, rest, prior, loglik, h)
            step = np.clip(np.linalg.solve(prec, grad[..., None])[..., 0], -self.step_limit, self.step_limit)
            u = u + step * moving[..., None]
            moving &= np.max(np.abs(step) / self.step_limit, axis=-1) >= NEWTON_TOLERANCE
            if not moving.any():
                break
        return u, self.gradient_and_precision(u, rest, prior, loglik, h)[1]

    def metropolis(self, u, mode, precision, rest, prior, loglik, rng):
        """:data:`MH_STEPS` independence Metropolis-Hastings steps from ``u``; returns (u, acceptance rate)."""
        chol = np.linalg.cholesky(precision)  # precision = C C'; a proposal is mode + C'^-1 z

        def distance(v):  # (v - mode)' precision (v - mode)
            return np.sum(np.einsum("djkl,djk->djl", chol, v - mode) ** 2, axis=-1)

        current, current_q = self.log_target(u, rest, prior, loglik), -0.5 * distance(u)
        rate = 0.0
        for _ in range(MH_STEPS):
            z = rng.standard_normal(u.shape)
            proposal = mode + np.linalg.solve(np.swapaxes(chol, -1, -2), z[..., None])[..., 0]
            target, proposal_q = self.log_target(proposal, rest, prior, loglik), -0.5 * np.sum(z ** 2, axis=-1)
            with np.errstate(invalid="ignore"):
                accept = np.log(rng.random(current.shape)) < target - current + current_q - proposal_q
            u = np.where(accept[..., None], proposal, u)
            current, current_q = np.where(accept, target, current), np.where(accept, proposal_q, current_q)
            rate += accept.mean() / MH_STEPS
        return u, rate
