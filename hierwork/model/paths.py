"""Which exact model path a plan takes, how much work one gradient is on it, and which NUTS engine samples it.

* ``collapsed``: normal outcome whose factors form one nesting chain (one
  factor, or plot within farm within region ...): every level's effects are
  integrated out (:mod:`hierwork.model.collapsed`);
* ``semi_collapsed``: normal outcome with crossed factors: the factor with
  the most groups is integrated out exactly given the others' effects, which
  are sampled (:mod:`hierwork.model.semi_collapsed`);
* ``reduced``: normal outcome without factors, or with crossed factors when
  the spec asks for it: the group effects are sampled, the likelihood
  evaluated from per-cell sufficient statistics, exact and O(cells)
  (:func:`hierwork.model.rowwise.reduced_normal_likelihood`). On crossed
  designs it samples more parameters at a higher cost per gradient than
  ``semi_collapsed`` and mixed no better where measured
  (benchmarks/RESULTS.md);
* ``reduced`` also for counts and proportions (bernoulli, binomial, poisson)
  when rows share predictors and group memberships: each such cell is one
  binomial (successes and trials summed) or Poisson (counts and exposures
  summed) term, the same posterior as per row
  (:meth:`~hierwork.plan.families.base.Family.aggregate`);
* ``plain``: every other case, the per-row model.

The engine (:func:`choose_engine`) is the one predicted to sample faster:
compile time plus the expected leapfrog steps times the cost of one step
(the sampler's own work plus :func:`gradient_work` times a measured cost
per unit), with constants measured by ``benchmarks/bench_engine.py``.

The spec's ``sampling.path`` may ask for a slower exact path than the best one
(or ``semi_collapsed`` where it applies), never one that does not apply. Light: NumPy only, so ``check`` reads
the decision without importing PyMC.
"""
from __future__ import annotations

import os
from dataclasses import dataclass, replace

import numpy as np

from hierwork.errors import SpecError

#: Paths from fastest to most general.
ORDER = ("collapsed", "semi_collapsed", "reduced", "plain")


def nesting_chain(plan) -> list | None:
    """The plan's factors finest first if they form one nesting chain, else None."""
    by_parent = {}
    for f in plan.factors:
        by_parent.setdefault(f.parent, []).append(f)
    if not plan.factors or any(len(kids) > 1 for kids in by_parent.values()):
        return None
    chain = [by_parent[None][0]]
    while chain[-1].name in by_parent:
        chain.append(by_parent[chain[-1].name][0])
    return chain[::-1] if len(chain) == len(plan.factors) else None


def best_path(plan) -> tuple[str, str]:
    """The fastest exact path for a plan, and why: ``(path, reason)``."""
    varying = [f.name for f in plan.factors if f.spread == "varying"]
    if varying:
        return "plain", (f"residual SD varies by {', '.join(varying)} (spread: varying): the exact fast paths "
                         "need one residual SD for all rows, so the per-row model is taken")
    if not plan.family.exact_normal:
        cells = count_cells(plan)
        if cells is not None and cells < plan.n:
            return "reduced", (f"{plan.family.name} outcome: {plan.n:,} rows in {cells:,} cells of identical "
                               "predictors and groups, one likelihood term per cell (exact)")
        why = "no two rows share predictors and groups" if cells is not None else "no exact cell form"
        return "plain", f"{plan.family.name} outcome: the group effects have no closed-form marginal; {why}"
    if not plan.factors:
        return "reduced", "no grouping factor: likelihood from sufficient statistics"
    if nesting_chain(plan) is not None:
        what = "one grouping factor" if len(plan.factors) == 1 else "nested factors"
        return "collapsed", (f"normal outcome with {what}: group effects integrated out exactly, "
                             "then drawn from their conditional normal")
    f = integrated_factor(plan)
    return "semi_collapsed", (f"normal outcome with crossed factors: {f.name} (the most groups) integrated out "
                              "exactly given the other factors' effects, which are sampled, then drawn from "
                              "its conditional normal")


def semi_collapsed_applies(plan) -> bool:
    """Whether one factor can be integrated out exactly: a normal outcome, a grouping factor, one residual SD."""
    return bool(plan.family.exact_normal and plan.factors and all(f.spread != "varying" for f in plan.factors))


def integrated_factor(plan):
    """The factor the semi-collapsed path integrates out: the one with most groups x varying terms (first on ties)."""
    return max(plan.factors, key=lambda f: f.n_groups * len(f.varying))


def sampled_plan(plan, path: str):
    """The plan of the factors whose effects NUTS samples on a path (all but the integrated one on ``semi_collapsed``)."""
    if path != "semi_collapsed":
        return plan
    f = integrated_factor(plan)
    return replace(plan, factors=tuple(g for g in plan.factors if g is not f))


def crossed_pair(plan) -> tuple | None:
    """Two factors neither of which has each group inside one group of the other, or None.

    Judged from the data (a factor declared ``within`` another, or whose labels
    happen to sit inside the other's groups, is nested, not crossed).
    """
    for i, f in enumerate(plan.factors):
        for g in plan.factors[i + 1:]:
            if not _nested(f, g) and not _nested(g, f):
                return f.name, g.name
    return None


def _nested(f, g) -> bool:
    """Whether every group of ``f`` lies within one group of ``g``."""
    pairs = np.unique(np.column_stack([f.index, g.index]), axis=0)
    return len(pairs) == f.n_groups


def shifted_columns(plan) -> tuple:
    """Columns of ``X`` whose coefficient the per-row model samples shifted by the mean group effects.

    The rule: when two of the sampled factors are crossed (:func:`crossed_pair`),
    every population term that varies by some factor (the intercept always) is
    sampled as ``b_t + sum_f mean_j u_{f,j,t}``, the quantity the data identify
    (:func:`hierwork.model.rowwise.build_model`); otherwise none (one factor has
    hierarchical centring, nested factors are left as they are).
    """
    if crossed_pair(plan) is None:
        return ()
    return tuple(sorted({c for f in plan.factors for c in f.varying_cols}))


def shift_decision(plan, path: str) -> tuple | None:
    """``(what, choice, reason)`` of the shift for ``check``, or None when it does not apply."""
    # semi_collapsed: the sampled factors are shifted because they are crossed with the integrated one
    if path == "collapsed" or not (cols := shifted_columns(plan)):
        return None
    f, g = crossed_pair(plan)
    terms = ", ".join(plan.terms[c] for c in cols)
    plan = sampled_plan(plan, path)
    return ("population terms", f"sampled shifted by the mean group effects ({terms})",
            f"{f} and {g} are crossed: the data identify each coefficient plus its factors' mean effects, "
            "not each, so that sum is sampled and the coefficient derived (exact, unit Jacobian)"
            + ("; a centred factor's offsets as contrasts (centred) plus a non-centred mean"
               if any(f.parameterisation == "centred" for f in plan.factors) else ""))


def resolve_path(spec, plan) -> tuple[str, str]:
    """The spec's ``sampling.path``, or the fastest exact one that applies."""
    best, reason = best_path(plan)
    requested = spec.sampling["path"]
    if requested in ("auto", best):
        return best, reason
    if requested == "semi_collapsed" and semi_collapsed_applies(plan):
        return requested, "set in the spec"
    if ORDER.index(requested) < ORDER.index(best):
        raise SpecError(f"path {requested!r} does not apply to this model: {reason}",
                        where=spec.where("sampling.path"), hint=f"use 'auto' or {best!r}")
    return requested, "set in the spec"


def count_cells(plan) -> int | None:
    """Cells of rows with identical predictors and groups, if the family has an exact cell form, else None."""
    from hierwork.model.cells import row_cells

    if not type(plan.family).__dict__.get("exact_cells", False):
        return None
    return row_cells(plan.X, [f.index for f in plan.factors]).n_cells


def likelihood_size(plan, path: str) -> int:
    """Terms the likelihood sums per gradient: rows, cells of crossed groups or of identical rows, or groups."""
    if path == "plain":
        return plan.n
    if path == "reduced" and not plan.family.exact_normal:
        return count_cells(plan)
    if not plan.factors:
        return 1 if path == "reduced" else plan.n
    if path in ("reduced", "semi_collapsed"):
        return len(np.unique(np.column_stack([f.index for f in plan.factors]), axis=0))
    return max(f.n_groups for f in plan.factors)


def sampled_dimension(plan, path: str) -> int:
    """Parameters NUTS samples on a path: population coefficients and every sampled group effect (SDs aside)."""
    factors = () if path == "collapsed" else sampled_plan(plan, path).factors
    return plan.X.shape[1] + sum(f.n_groups * len(f.varying) for f in factors)


#: Gradient cost per unit of work relative to the reduced path's, where a path's code does the same
#: algebra in fewer passes: the semi-collapsed path's fused per-column loops, 4.1 ms against the
#: reduced path's 55 ms on the same 73,000-row crossed cells (benchmarks/RESULTS.md).
PATH_SPEED = {"semi_collapsed": 4.1 / 55}


def gradient_work(plan, path: str) -> int:
    """Work of one log-density gradient on a path, in element operations up to a constant factor.

    Each likelihood term (:func:`likelihood_size`) costs its coefficients
    (population columns plus every factor's varying terms), or their square
    where the term is a cell of normal sufficient statistics (its quadratic
    form), scaled by :data:`PATH_SPEED`; each sampled parameter costs one more.
    Measured against the gradient's time in ``benchmarks/bench_engine.py``.
    """
    r = plan.X.shape[1] + sum(len(f.varying) for f in plan.factors)
    per_term = r * r if plan.family.exact_normal and path != "plain" else r
    terms = likelihood_size(plan, path) * per_term * PATH_SPEED.get(path, 1.0)
    return int(terms) + sampled_dimension(plan, path)


@dataclass(frozen=True)
class EngineCost:
    """What one NUTS engine costs on this kind of machine (``benchmarks/bench_engine.py``, RESULTS.md).

    ``compile_s``: seconds to compile a model, compile cache warm; ``step_s``:
    the sampler's own seconds per leapfrog step; ``work_s``: seconds per unit
    of :func:`gradient_work` in one gradient.
    """

    compile_s: float
    step_s: float
    work_s: float

    def seconds(self, work: int, steps: float) -> float:
        return self.compile_s + steps * (self.step_s + work * self.work_s)


#: CPU seconds (an idle machine's wall clock for one chain) measured by benchmarks/bench_engine.py on
#: the crossed problem crossed-S (reduced path, 96 parameters, gradient work 18,142), RESULTS.md
#: "Engine choice": compile with warm caches (nutpie's numba compile is not cached between
#: processes, PyTensor's C modules are), the sampler's own cost per leapfrog step (step less
#: gradient), and the gradient per unit of work (0.31 ms C, 0.16 ms numba there).
COMPILE_PYMC, STEP_PYMC, WORK_PYMC = 9.3, 0.21e-3, 17e-9
COMPILE_NUTPIE, STEP_NUTPIE, WORK_NUTPIE = 25.2, 0.03e-3, 8.6e-9
#: Leapfrog steps per iteration at one dimension (:func:`leapfrog_steps`): 15 steps at 96
#: parameters, 24 at 1,116 measured (2 x 2,000 iterations).
STEPS_AT_1 = 4.5
ENGINE_COSTS = {"pymc": EngineCost(compile_s=COMPILE_PYMC, step_s=STEP_PYMC, work_s=WORK_PYMC),
                "nutpie": EngineCost(compile_s=COMPILE_NUTPIE, step_s=STEP_NUTPIE, work_s=WORK_NUTPIE)}


def leapfrog_steps(dimension: int) -> float:
    """Expected leapfrog steps per NUTS iteration in ``dimension`` parameters: ``STEPS_AT_1 * d^(1/4)``.

    The optimal step size of HMC shrinks as ``d^(-1/4)`` (Beskos, Pillai,
    Roberts, Sanz-Serna and Stuart 2013, Bernoulli 19, 1501-1534; quoted from
    memory), so the path length in steps grows as ``d^(1/4)``; the factor is
    fitted to the steps measured in ``benchmarks/bench_engine.py``.
    """
    return STEPS_AT_1 * max(dimension, 1) ** 0.25


def default_cores(chains: int, requested: int | None) -> int:
    """Processes for chains: the request, or one per chain up to the CPU count."""
    if requested:
        return requested
    return max(1, min(chains, os.cpu_count() or 1))


def choose_engine(requested: str, work: int, dimension: int = 1, iterations: int = 2000,
                  rounds: int = 1) -> tuple[str, str]:
    """The NUTS engine predicted to sample fastest, and why: ``(engine, reason)``.

    Parameters
    ----------
    requested : {"auto", "pymc", "nutpie"}
        The spec's ``sampling.engine``; anything but ``auto`` is kept.
    work : int
        :func:`gradient_work` of the model.
    dimension : int
        :func:`sampled_dimension` (sets the expected leapfrog steps).
    iterations : int
        Warm-up plus draws per chain.
    rounds : int
        Chains run one after another per core (chains / cores, rounded up).
    """
    if requested != "auto":
        return requested, "set in the spec or on the command line"
    steps = rounds * iterations * leapfrog_steps(dimension)
    secs = {e: cost.seconds(work, steps) for e, cost in ENGINE_COSTS.items()}
    engine = min(secs, key=secs.get)
    other = "pymc" if engine == "nutpie" else "nutpie"
    return engine, (f"predicted sampling {_secs(secs[engine])} against {_secs(secs[other])} on {other}, "
                    f"compile included ({steps / 1e3:,.0f}k leapfrog steps per core, gradient work {_work(work)})")


def engine_load(plan, path: str, iterations: int | None = None) -> dict:
    """What :func:`choose_engine` weighs for a plan on a path: gradient work, dimension, iterations, rounds.

    ``iterations``: warm-up plus draws per chain (default: the spec's).
    """
    s = plan.spec.sampling
    cores = default_cores(s["chains"], s.get("cores"))
    return {"work": gradient_work(plan, path), "dimension": sampled_dimension(plan, path),
            "iterations": iterations or s["warmup"] + s["draws"], "rounds": -(-s["chains"] // cores)}


def _secs(s: float) -> str:
    return f"{s:.0f} s" if s < 600 else f"{s / 60:.0f} min"


def _work(w: int) -> str:
    return f"{w / 1e6:.1f}M" if w >= 1e6 else f"{w / 1e3:.0f}k" if w >= 1e3 else str(w)
