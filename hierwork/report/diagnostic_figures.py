"""Figures of the sampler and of the fit to the data: traces and ranks, energy, divergences, predictive check.

Each function returns a :class:`~hierwork.report.plotting.Plot` or ``None``
when the run lacks what it needs. Figures only draw arrays read from the run
folder; the one summary a figure shows beyond raw draws (histogram counts,
quantile bands of replicated counts) is part of drawing it.
"""
from __future__ import annotations

import textwrap

import numpy as np
from matplotlib.ticker import FuncFormatter

from hierwork.formatting import number as fmt
from hierwork.names import element_names, find, parameter_name, readable
from hierwork.report.plotting import GREY, PALETTE, Plot, clip_text, finish, new_figure, styled

__all__ = ["trace_rank_plot", "worst_parameters", "energy_plot", "divergence_plot", "ppc_plot", "hyperparameters",
           "MAX_TRACE_PARAMETERS"]

_CHAIN_COLOURS = [PALETTE[k] for k in ("blue", "orange", "green", "purple", "sky",
                                       "vermillion", "black")]
#: Hyperparameters drawn in the trace and rank figure.
MAX_TRACE_PARAMETERS = 10


def hyperparameters(posterior) -> list[tuple[str, str, dict]]:
    """The population and variance parameters as ``(name, variable, selection)``.

    Population coefficients ``b``, every ``F__sd``, group-level predictor
    coefficients ``F__gamma`` and any other parameter without dimensions
    (docs/contracts.md, names inside posterior.nc), named as readers see them
    (:mod:`hierwork.names`).
    """
    chosen = []
    for name, array in posterior.data_vars.items():
        dims = [d for d in array.dims if d not in ("chain", "draw")]
        if name == "b" or name.endswith(("__sd", "__gamma")) or (not dims and name not in ("b_centred_intercept", "b_intercept")):
            chosen += [(label, name, selection) for label, selection in element_names(posterior, name)]
    return chosen


def worst_parameters(posterior, failed) -> list[tuple[str, str, dict]]:
    """``(name, variable, selection)`` of the worst parameter of each failed check, once each, when in the posterior."""
    out, seen = [], set()
    for check in failed:
        if not check.parameter or check.parameter in seen:
            continue
        found = find(posterior, check.parameter)
        if found is not None:
            seen.add(check.parameter)
            out.append((readable(check.parameter), *found))
    return out


@styled
def trace_rank_plot(idata, stamp: str | None = None, chosen: list | None = None, why: str = "") -> Plot | None:
    """Traces and rank histograms per chain of ``chosen`` parameters (default: the hyperparameters).

    ``chosen`` holds ``(name, variable, selection)`` triples; ``why`` opens the
    caption (for instance, which checks those parameters failed). Rank plots
    (Vehtari et al. 2021, Bayesian Analysis 16(2), section 4.1): ranks of all
    draws pooled over chains, one histogram per chain; chains that explore the
    same distribution give flat, overlapping histograms.
    """
    from scipy.stats import rankdata

    post = idata.posterior
    params = hyperparameters(post) if chosen is None else chosen
    if not params:
        return None
    shown = params[:MAX_TRACE_PARAMETERS]
    fig = new_figure(7.0, 0.3 + 1.05 * len(shown))
    axes = fig.subplots(len(shown), 2, squeeze=False, width_ratios=[2.2, 1], sharex="col")
    n_chains, n_draws = post.sizes["chain"], post.sizes["draw"]
    bins = np.linspace(0, n_chains * n_draws, min(20, n_draws // 5 or 1) + 1)
    for (label, name, sel), (trace_ax, rank_ax) in zip(shown, axes):
        values = post[name].sel(sel).transpose("chain", "draw").values
        ranks = rankdata(values, axis=None).reshape(values.shape)
        for c in range(n_chains):
            colour = _CHAIN_COLOURS[c % len(_CHAIN_COLOURS)]
            trace_ax.plot(values[c], color=colour, linewidth=0.5, alpha=0.8, rasterized=True)
            rank_ax.stairs(np.histogram(ranks[c], bins)[0], bins, color=colour, linewidth=1.1,
                           baseline=None)
        rank_ax.axhline(n_draws / (len(bins) - 1), color=GREY, linestyle=":", linewidth=1)
        rank_ax.set_ylim(bottom=0)
        trace_ax.set_ylabel("\n".join(textwrap.wrap(clip_text(label, 66), 22)), rotation=0, ha="right", va="center")
        rank_ax.set_yticks([])
    axes[0, 0].set_title("trace (one colour per chain)", loc="left")
    axes[0, 1].set_title("rank histogram per chain", loc="left")
    axes[-1, 0].set_xlabel("draw")
    axes[-1, 1].set_xlabel("rank among all draws")
    note = (f" Showing {len(shown)} of {len(params)} parameters; the rest are in summary.csv."
            if len(params) > len(shown) else "")
    what = "population and variance parameters" if chosen is None else "parameters"
    alt = (f"Trace and rank plots of {len(shown)} {what} over "
           f"{n_chains} chains of {n_draws} draws: " + ", ".join(p[0] for p in shown) + ".")
    caption = ((why + " " if why else "") + "Left: each chain's draws in order; chains should overlap like noise "
               "around one level. Right: ranks of the draws among all chains, one histogram per "
               "chain, the dotted line the count expected if all chains agree; roughly "
               "flat, overlapping histograms mean they do (Vehtari et al. 2021)." + note)
    return finish(fig, alt, caption, stamp)


@styled
def energy_plot(idata, bfmi: float | None, stamp: str | None = None) -> Plot | None:
    """Marginal energy against energy transitions (Betancourt 2016, arXiv:1604.00695).

    When the transition distribution is much narrower than the marginal one,
    the sampler moves slowly through the energy levels and E-BFMI is low.
    """
    stats = getattr(idata, "sample_stats", None)
    if stats is None or "energy" not in stats:
        return None
    energy = stats["energy"].transpose("chain", "draw").values
    marginal = (energy - energy.mean(axis=1, keepdims=True)).ravel()
    transition = np.diff(energy, axis=1).ravel()
    bins = np.histogram_bin_edges(np.r_[marginal, transition], bins=40)
    fig = new_figure(5.6, 2.6)
    ax = fig.add_subplot()
    ax.hist(marginal, bins, density=True, color=PALETTE["sky"], alpha=0.6,
            label="marginal energy (centred)")
    ax.hist(transition, bins, density=True, histtype="step", color=PALETTE["black"],
            linewidth=1.4, linestyle="-", label="energy transition")
    ax.set_xlabel("energy")
    ax.set_yticks([])
    ax.legend(frameon=False, loc="upper right")
    value = "" if bfmi is None else f" The lowest E-BFMI over chains is {fmt(bfmi, 3)}."
    alt = ("Histograms of the centred marginal energy and of the energy transitions between "
           "successive draws." + value)
    caption = ("Energy: the outline (transitions) should be about as wide as the shaded "
               "histogram (marginal energy). A much narrower outline means low E-BFMI and "
               "poor exploration of the tails (Betancourt 2016)." + value)
    return finish(fig, alt, caption, stamp)


@styled
def divergence_plot(idata, estimates, stamp: str | None = None) -> Plot | None:
    """Divergent transitions located in parameter space, per grouping factor.

    For each factor ``F`` (at most three): log ``F__sd`` of its first varying
    term against the population intercept, and against the effect of the
    smallest group, where a funnel would show (Betancourt and Girolami 2015,
    arXiv:1312.0906). Divergent draws are marked with crosses.
    """
    post = idata.posterior
    stats = getattr(idata, "sample_stats", None)
    factors = [v[: -len("__sd")] for v in post.data_vars if v.endswith("__sd")][:3]
    if not factors or "b" not in post or stats is None or "diverging" not in stats:
        return None
    divergent = stats["diverging"].values.astype(bool).ravel()
    b = post["b"]
    first_term = "intercept" if "intercept" in b["term"].values else b["term"].values[0]
    x_b = b.sel(term=first_term).values.ravel()
    fig = new_figure(6.6, 0.4 + 2.4 * len(factors))
    axes = fig.subplots(len(factors), 2, squeeze=False)
    for factor, (ax_b, ax_e) in zip(factors, axes):
        sd = post[f"{factor}__sd"]
        sd_term = sd[f"{factor}__term"].values[0]
        y = np.log(sd.sel({f"{factor}__term": sd_term}).values.ravel())
        y_label = clip_text("log " + parameter_name(f"{factor}__sd", {"t": sd_term}, list(sd[f"{factor}__term"].values)), 40)
        _scatter_divergent(ax_b, x_b, y, divergent)
        ax_b.set_xlabel(clip_text(parameter_name("b", {"term": first_term}), 40))
        ax_b.set_ylabel(y_label)
        effect = post.get(f"{factor}__effect")
        group = _smallest_group(estimates, factor, effect)
        if group is None:
            ax_e.set_axis_off()
            continue
        x_e = effect.sel({factor: group, f"{factor}__term": sd_term}).values.ravel()
        _scatter_divergent(ax_e, x_e, y, divergent)
        ax_e.set_xlabel(clip_text(parameter_name(f"{factor}__effect", {"g": group, "t": sd_term})
                                  + " (smallest group)", 50))
    axes[0, 0].legend(frameon=False, loc="best")
    count = int(divergent.sum())
    found = (f"{count} of {divergent.size} draws ended in a divergent transition (crosses)."
             if count else f"None of the {divergent.size} draws diverged.")
    alt = ("Scatter plots of the log group standard deviation against the population "
           "intercept and against the smallest group's effect, for " + ", ".join(factors)
           + ". " + found)
    caption = (found + " Divergences that cluster at small group SDs (bottom of each panel, "
               "the neck of a funnel) suggest a non-centred parameterisation or a higher "
               "target_accept.")
    return finish(fig, alt, caption, stamp)


def _scatter_divergent(ax, x, y, divergent) -> None:
    ax.scatter(x[~divergent], y[~divergent], s=3, color=GREY, alpha=0.35, edgecolors="none",
               rasterized=True, label="draw")
    if divergent.any():
        ax.scatter(x[divergent], y[divergent], s=22, marker="x", color=PALETTE["vermillion"],
                   linewidths=1.2, label="divergent draw")


def _smallest_group(estimates, factor, effect):
    if effect is None or estimates is None:
        return None
    rows = estimates[(estimates["factor"] == factor)]
    labels = set(map(str, effect[factor].values))
    rows = rows[rows["group"].isin(labels)]
    size = next((c for c in ("rows", "n") if c in rows.columns), None)  # "n" in runs of older versions
    if rows.empty or size is None:
        return None
    return rows.sort_values(size, kind="stable")["group"].iloc[0]


# --- posterior predictive --------------------------------------------------------

@styled
def ppc_plot(idata, stamp: str | None = None, max_draws: int = 40, outcome: str = "outcome",
             trials: str = "trials") -> Plot | None:
    """Observed outcome against outcomes replicated from the posterior; the axis is labelled ``outcome``
    (binomial: as a share of the ``trials`` column).

    Binomial outcomes (``constant_data["trials"]``) are compared as
    proportions of their trials, so that groups of very different size are on
    one scale. Continuous outcomes and proportions: density histograms of
    ``max_draws`` replicated data sets over the observed one. Counts (integer
    outcomes with at most 30 distinct values): observed frequency of each value
    against the 5% to 95% range of its replicated frequency.
    """
    observed_group = getattr(idata, "observed_data", None)
    predictive = getattr(idata, "posterior_predictive", None)
    if observed_group is None or predictive is None:
        return None
    names = [v for v in observed_group.data_vars if v in predictive.data_vars]
    if not names:
        return None
    name = names[0]
    observed = observed_group[name].values.ravel()
    replicated = predictive[name].stack(s=("chain", "draw")).transpose("s", ...).values
    replicated = replicated.reshape(replicated.shape[0], -1)
    pick = np.linspace(0, replicated.shape[0] - 1, min(max_draws, replicated.shape[0]))
    replicated = replicated[pick.round().astype(int)]
    constant = getattr(idata, "constant_data", None)
    per_row = None
    if constant is not None and "trials" in constant and constant["trials"].size == observed.size:
        per_row = constant["trials"].values.astype(float)
        observed, replicated = observed / per_row, replicated / per_row
        label = f"{outcome} as a share of {trials}"
    else:
        label = outcome
    fig = new_figure(5.6, 2.8)
    ax = fig.add_subplot()
    values = np.unique(observed)
    if per_row is None and np.all(observed == np.round(observed)) and len(values) <= 30:
        support = np.arange(min(values.min(), replicated.min()), max(values.max(), 0) + 1)
        support = support[support <= values.max() + 3]
        freq = np.array([[np.mean(r == v) for v in support] for r in replicated])
        low, high = np.quantile(freq, [0.05, 0.95], axis=0)
        ax.bar(support, [np.mean(observed == v) for v in support], color=PALETTE["sky"],
               label="observed")
        ax.errorbar(support, (low + high) / 2, yerr=(high - low) / 2, fmt="none",
                    ecolor=PALETTE["black"], capsize=3, label="replicated, 5%\u201395%")
        ax.set_ylabel("share of rows")
        kind = f"share of rows at each value of {outcome}"
        how = ("bars are the observed share of rows at each value, whiskers the 5% to 95% range of that share "
               f"over {len(replicated)} data sets replicated from the posterior")
    else:
        bins = np.histogram_bin_edges(np.r_[observed, replicated.ravel()], bins=40)
        for r in replicated:
            ax.stairs(np.histogram(r, bins, density=True)[0], bins, color=PALETTE["sky"],
                      alpha=0.35, linewidth=0.7, baseline=None)
        ax.stairs(np.histogram(observed, bins, density=True)[0], bins, color=PALETTE["black"],
                  linewidth=1.8, label="observed")
        ax.plot([], [], color=PALETTE["sky"], label=f"{len(replicated)} replicated data sets")
        ax.set_yticks([])
        kind = f"distribution of {label}"
        how = (f"the black outline is the observed distribution of {label}, the light lines "
               f"{len(replicated)} data sets replicated from the posterior")
        if per_row is not None:
            ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{100 * v:.3g}%"))
    ax.set_xlabel(clip_text(label, 60))
    ax.legend(frameon=False, loc="upper right")
    alt = (f"Posterior predictive check of {outcome}: the {kind} in the {observed.size} observed "
           f"rows drawn over {len(replicated)} data sets replicated from the posterior.")
    caption = (f"Posterior predictive check of {outcome}: {how}. If the model describes the data, the observed "
               "values look like one more replicated data set.")
    return finish(fig, alt, caption, stamp)
