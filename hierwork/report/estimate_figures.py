"""Figures of the group estimates on the outcome's scale: sorted estimates, funnel, pooling.

Each function draws rows of ``group_estimates.csv`` for one factor and term
and returns a :class:`~hierwork.report.plotting.Plot`. Groups are sized and
labelled by the information they carry: trials, else exposure, else rows.
Vermillion and green are kept for the verdict (failed, passed), so estimates
never borrow them; marker shape and line style repeat what colour says.
"""
from __future__ import annotations

import numpy as np

from hierwork.formatting import number as fmt
from hierwork.report.plotting import GREY, PALETTE, Plot, Scale, clip_text, finish, new_figure, styled
from hierwork.results import funnel
from hierwork.report.view import away_from_population, term_what

__all__ = ["ranked_plot", "funnel_plot", "pooling_plot", "volume", "MAX_FOREST_GROUPS", "MAX_SCATTER_GROUPS"]

#: Groups drawn one per labelled row; above this a scatter (or caterpillar) is drawn.
MAX_FOREST_GROUPS = 40
#: Groups drawn in the scatter forms; above this an even subsample is drawn.
MAX_SCATTER_GROUPS = 3000


def volume(rows) -> tuple[str, np.ndarray]:
    """The column that measures a group's information (``trials``, ``exposure`` or ``rows``) and its values."""
    for column in ("trials", "exposure", "rows"):
        if column in rows.columns and rows[column].notna().any():
            return column, rows[column].to_numpy(dtype=float)
    return "rows", np.ones(len(rows))


def _volume_name(column: str, scale: Scale) -> str:
    return scale.exposure if column == "exposure" and scale.exposure else column


def _size_text(column: str, value, scale: Scale) -> str:
    """``181 trials``, ``882.4 hours_run`` (the exposure column's name), ``12 rows``."""
    if column == "exposure":
        return f"{fmt(value)} {scale.exposure}" if scale.exposure else f"exposure {fmt(value)}"
    return f"{fmt(value)} {column}"


def _areas(values) -> np.ndarray:
    values = np.asarray(values, dtype=float)
    return 12 + 140 * np.sqrt(values / np.nanmax(values))


def _thin(rows, note: list):
    if len(rows) <= MAX_SCATTER_GROUPS:
        return rows
    pick = np.linspace(0, len(rows) - 1, MAX_SCATTER_GROUPS).round().astype(int)
    note.append(f"Drawn: {MAX_SCATTER_GROUPS} of {len(rows)} groups, evenly spaced in the order shown; "
                "the table and group_estimates.csv list all.")
    return rows.iloc[pick]


def _axis_range(rows, complete, scale: Scale | None = None, change: bool = False) -> tuple[float, float]:
    """The values a figure must show: every partially pooled interval and complete pooling, plus half
    their span on either side (own-data estimates further out are marked at the edge); a probability
    axis stays within 0 to 1 and a rate's above 0."""
    values = np.r_[rows["outcome_lower"].to_numpy(dtype=float), rows["outcome_upper"].to_numpy(dtype=float),
                   np.asarray(complete, dtype=float)]
    low, high = np.nanmin(values), np.nanmax(values)
    margin = 0.5 * (high - low) if high > low else 1.0
    low, high = low - margin, high + margin
    if scale is not None and scale.kind in ("probability", "rate") and not change:
        low = max(low, 0.0)
        high = min(high, 1.0) if scale.kind == "probability" else high
    return low, high


def _off_axis(own: np.ndarray, limits: tuple[float, float]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Own-data estimates moved to the edge of ``limits`` when beyond it, and masks of those below / above."""
    below, above = own < limits[0], own > limits[1]
    return np.clip(own, *limits), below, above


def _standing(rows, interval: float) -> tuple[np.ndarray, np.ndarray]:
    """Masks of the groups clearly above / below the population value (the report's rule)."""
    above, below = away_from_population(rows, interval)
    return above.to_numpy(), below.to_numpy()


@styled
def ranked_plot(rows, factor: str, term: str, scale: Scale, interval: float, band: dict | None,
                target: dict | None = None, stamp: str | None = None) -> Plot:
    """Groups sorted by their estimate on the outcome's scale, with intervals, population and target lines.

    ``band`` is the population value (``summary.csv``: ``outcome`` for the
    intercept; the population slope's value for a slope row) as ``{"mean",
    "lower", "upper"}``, drawn as a line within its interval; ``target`` is
    ``{"value", "direction"}`` (drawn for the intercept only).
    """
    population = band["mean"] if band else None
    rows = rows.sort_values("outcome_mean", ascending=False, kind="stable").reset_index(drop=True)
    target = target if term == "intercept" else None
    above, below = _standing(rows, interval)
    size_column, sizes = volume(rows)
    note: list = []
    if len(rows) <= MAX_FOREST_GROUPS:
        fig = new_figure(6.6, 1.1 + 0.24 * len(rows))
        ax = fig.add_subplot()
        position, axis = np.arange(len(rows))[::-1], ax.xaxis
        ax.hlines(position, rows["outcome_lower"], rows["outcome_upper"], color=PALETTE["blue"], linewidth=2)
        ax.set_yticks(position, [f"{clip_text(g, 24)}  {_size_text(size_column, s, scale)}"
                                 for g, s in zip(rows["group"], sizes)])
        ax.set_ylim(-0.7, len(rows) - 0.3)
        ax.grid(axis="y", visible=False)
        line, span, points = ax.axvline, ax.axvspan, (rows["outcome_mean"], position)
        ax.set_xlabel(clip_text(scale.axis_label(term), 90))
    else:
        rows = _thin(rows, note)
        above, below = _standing(rows, interval)
        fig = new_figure(6.6, 3.6)
        ax = fig.add_subplot()
        position, axis = np.arange(1, len(rows) + 1), ax.yaxis
        ax.vlines(position, rows["outcome_lower"], rows["outcome_upper"], color=PALETTE["sky"], linewidth=0.8)
        line, span, points = ax.axhline, ax.axhspan, (position, rows["outcome_mean"])
        ax.set_xlabel("groups, highest estimate first")
        ax.set_ylabel(clip_text(scale.axis_label(term), 90))
    if population is not None:
        span(band["lower"], band["upper"], color=GREY, alpha=0.18, linewidth=0,
             label=f"population value, {interval:.0%} interval")
        line(population, color=PALETTE["black"], linestyle="--", linewidth=1.1, label="population value")
    if target is not None:
        line(target["value"], color=PALETTE["black"], linestyle=":", linewidth=1.8,
             label=f"target ({target['direction']} is beyond)")
    x, y = (np.asarray(p, dtype=float) for p in points)
    plain = ~(above | below)
    ax.scatter(x[plain], y[plain], s=22, color=PALETTE["blue"], zorder=3, label="estimate, not clearly different")
    ax.scatter(x[above], y[above], s=34, marker="^", color=PALETTE["purple"], zorder=4,
               label="clearly above the population value")
    ax.scatter(x[below], y[below], s=34, marker="v", color=PALETTE["orange"], zorder=4,
               label="clearly below the population value")
    scale.format_axis(axis)
    what = term_what(term) or "expected outcome"
    fig.suptitle(clip_text(f"{factor}: {what}, sorted", 70), x=0.02, ha="left", weight="bold")
    fig.legend(loc="outside lower center", ncols=2, frameon=False)
    top, bottom = rows.iloc[0], rows.iloc[-1]
    alt = (f"{factor} groups sorted by {what} on the scale of {scale.label}: highest {top['group']} at "
           f"{scale.text(top['outcome_mean'], term != 'intercept')}, lowest {bottom['group']} at "
           f"{scale.text(bottom['outcome_mean'], term != 'intercept')}; {int(above.sum())} groups clearly "
           f"above and {int(below.sum())} clearly below the population value"
           + (f" {scale.text(population, term != 'intercept')}" if population is not None else "") + ".")
    caption = (f"{factor}, {what}: each group's posterior mean and {interval:.0%} interval on the scale of "
               f"{scale.label}, highest first; the dashed line is the population value (a typical group at "
               f"the same values of the predictors) within its shaded {interval:.0%} interval"
               + ("; the dotted line the target" if target else "")
               + f". Triangles mark groups clearly above or below the population value: the {interval:.0%} interval of "
               "the difference, group minus population, excludes zero (a group's own interval can still cover the "
               "dashed line, which is uncertain too). "
               + " ".join(note))
    return finish(fig, alt, caption.strip(), stamp)


@styled
def funnel_plot(rows, factor: str, scale: Scale, per: float, population: float,
                stamp: str | None = None) -> Plot | None:
    """Each group's own estimate against its volume, with the population value and 95% / 99.8% limits.

    For probabilities (volume: trials) and rates (volume: exposure; ``per`` is
    ``estimates.rate_per``). The limits are those of a group's own estimate
    if every group had the population value (:mod:`hierwork.results.funnel`;
    Spiegelhalter 2005). Returns None when the scale has no funnel.
    """
    if not funnel.applies(scale.kind) or population is None or not np.isfinite(population):
        return None
    size_column, sizes = volume(rows)
    own = rows["no_pooling_outcome"].to_numpy(dtype=float)
    if "events" in rows.columns:  # a group at a boundary (no finite own estimate): its raw share or rate
        own = np.where(np.isfinite(own), own, rows["events"].to_numpy(dtype=float) / sizes * per)
    grid = np.geomspace(max(np.nanmin(sizes) * 0.8, 1e-9), np.nanmax(sizes) * 1.1, 200)
    theta = population / per
    fig = new_figure(6.4, 3.8)
    ax = fig.add_subplot()
    outside = {}
    for level, style in zip(funnel.LEVELS, ("--", ":")):
        p = (1 - level) / 2
        low, high = (funnel.limits(scale.kind, theta, grid, q) * per for q in (p, 1 - p))
        ax.plot(grid, low, color=PALETTE["black"], linestyle=style, linewidth=1, label=f"{100 * level:g}% limits")
        ax.plot(grid, high, color=PALETTE["black"], linestyle=style, linewidth=1)
        at_group = [funnel.limits(scale.kind, theta, sizes, q) * per for q in (p, 1 - p)]
        outside[level] = (own < at_group[0]) | (own > at_group[1])
    ax.axhline(population, color=PALETTE["black"], linewidth=1.2, label="population value")
    ax.scatter(sizes, own, s=26, facecolors="white", edgecolors=PALETTE["orange"], linewidths=1.3, zorder=3,
               label="own data only (no pooling)")
    ax.scatter(sizes, rows["outcome_mean"], s=10, color=PALETTE["blue"], zorder=4, label="partial pooling")
    if np.nanmax(sizes) > 30 * np.nanmin(sizes):
        ax.set_xscale("log")
    name = _volume_name(size_column, scale)
    ax.set_xlabel(f"{name} (volume)")
    ax.set_ylabel(clip_text(scale.axis_label("intercept"), 90))
    scale.format_axis(ax.yaxis)
    fig.suptitle(clip_text(f"{factor}: estimate against volume", 70), x=0.02, ha="left", weight="bold")
    fig.legend(loc="outside lower center", ncols=3, frameon=False)
    wide = outside[funnel.LEVELS[1]]
    named = ", ".join(str(g) for g in rows["group"][wide][:8]) + (", ..." if wide.sum() > 8 else "")
    alt = (f"Funnel plot of {len(rows)} {factor} groups: own-data estimate against {name}. "
           f"{int(outside[funnel.LEVELS[0]].sum())} groups lie outside the 95% limits and {int(wide.sum())} "
           f"outside the 99.8% limits" + (f" ({named})" if wide.any() else "") + " around the population value "
           f"{scale.text(population)}.")
    caption = (f"{factor}: hollow circles are each group's estimate from its own data alone, filled points the "
               f"partially pooled estimate, against the group's {name}. The curves are the 95% (dashed) "
               f"and 99.8% (dotted) limits within which a group's own estimate falls by chance if every group "
               f"had the population value (solid line; Spiegelhalter 2005, Statistics in Medicine 24:1185). "
               f"Own estimates beyond the 99.8% limits are unlikely to be chance alone.")
    return finish(fig, alt, caption, stamp)


@styled
def pooling_plot(rows, factor: str, term: str, scale: Scale, interval: float, stamp: str | None = None) -> Plot:
    """No pooling, partial pooling and complete pooling for one factor and term, on the outcome's scale.

    Parameters
    ----------
    rows : pandas.DataFrame
        Rows of ``group_estimates.csv`` for this factor and term.
    factor, term : str
        Names shown in titles and text.
    scale : Scale
        The outcome's scale (axis label, percentages for probabilities).
    interval : float
        Level of the ``outcome_lower``/``outcome_upper`` interval.
    stamp : str, optional
        Text printed across the figure (for runs whose estimates are not for use).
    """
    size_column, _ = volume(rows)
    rows = rows.sort_values([size_column, "outcome_mean"], kind="stable").reset_index(drop=True)
    what = term_what(term) or "expected outcome"
    axis = scale.axis_label(term)
    complete = rows["complete_pooling_outcome"].dropna().unique()
    if len(rows) <= MAX_FOREST_GROUPS:
        fig, note = _forest(rows, axis, interval, complete, scale, term != "intercept"), ""
    else:
        fig, note = _scatter(rows, axis, complete, scale, term != "intercept")
    _, below, above = _off_axis(rows["no_pooling_outcome"].to_numpy(dtype=float),
                                _axis_range(rows, complete, scale, term != "intercept"))
    if (below | above).any():
        note += (f" {int((below | above).sum())} own-data estimates lie beyond the axis (triangles at its edge): "
                 f"too few rows to pin the group down at these values of the predictors.")
    fig.suptitle(clip_text(f"{factor}: {what}", 60), x=0.02, ha="left", weight="bold")
    smallest, largest = rows.iloc[0], rows.iloc[-1]
    change = term != "intercept"

    def moved(r):
        return (f"{r['group']} ({_size_text(size_column, r[size_column], scale)}) moved from "
                f"{scale.text(r['no_pooling_outcome'], change)} on its own data to "
                f"{scale.text(r['outcome_mean'], change)} with partial pooling")

    values = ", ".join(scale.text(v, change) for v in sorted(complete)[:4]) + (", ..." if len(complete) > 4 else "")
    flat = (f"the complete-pooling value is {scale.text(complete[0], change)}" if len(complete) == 1
            else f"the complete-pooling values are {values} (they differ with the group-level predictors)")
    alt = (f"Pooling plot for {factor}, {what}, {len(rows)} groups: {moved(smallest)}; "
           f"{moved(largest)}; {flat}.")
    volume_name = _volume_name(size_column, scale)
    if len(complete) == 1:
        complete_text = f"the dashed line complete pooling (one value for all groups, {scale.text(complete[0], change)})"
    else:
        complete_text = (f"the black ticks complete pooling, which gives {len(complete)} values here ({values}): "
                         "one per combination of the group-level predictors")
    if len(rows) <= MAX_FOREST_GROUPS:
        caption = (f"{factor}, {what}: hollow circles are each group's estimate from its own data alone (no pooling; "
                   f"circle area grows with the group's {volume_name}), filled points and bars the partially pooled "
                   f"posterior mean and {interval:.0%} interval, {complete_text}. Small groups are pulled further "
                   f"towards the population value. {note}")
    else:
        where = (f"the dashed line is complete pooling ({scale.text(complete[0], change)})" if len(complete) == 1
                 else f"complete pooling gives {len(complete)} values ({values}), not drawn")
        caption = (f"{factor}, {what}, {len(rows)} groups: each point is one group, its own-data estimate (no pooling) "
                   f"across and its partially pooled posterior mean up; point area grows with the group's "
                   f"{volume_name}; {where}. {note}")
    return finish(fig, alt, caption.strip(), stamp)


def _forest(rows, axis: str, interval: float, complete, scale: Scale, change: bool):
    size_column, sizes = volume(rows)
    fig = new_figure(6.6, 1.0 + 0.24 * len(rows))
    ax = fig.add_subplot()
    y = np.arange(len(rows))[::-1]
    if len(complete) == 1:
        ax.axvline(complete[0], color=PALETTE["black"], linestyle="--", linewidth=1, label="complete pooling")
    else:
        ax.scatter(rows["complete_pooling_outcome"], y, marker="|", s=80, color=PALETTE["black"],
                   label="complete pooling")
    ax.hlines(y, rows["outcome_lower"], rows["outcome_upper"], color=PALETTE["blue"], linewidth=2,
              label=f"partial pooling, {interval:.0%} interval")
    limits = _axis_range(rows, complete, scale, change)
    own, below, above = _off_axis(rows["no_pooling_outcome"].to_numpy(dtype=float), limits)
    mean = rows["outcome_mean"].to_numpy(dtype=float)
    for yi, start, end in zip(y, own, mean):
        if np.isfinite(start):
            ax.annotate("", xy=(end, yi), xytext=(start, yi),
                        arrowprops={"arrowstyle": "-|>", "color": PALETTE["orange"],
                                    "lw": 0.9, "shrinkA": 3, "shrinkB": 3})
    inside = ~(below | above)
    ax.scatter(own[inside], y[inside], s=_areas(sizes)[inside], facecolors="white", edgecolors=PALETTE["orange"],
               linewidths=1.4, zorder=3, label="own data only (no pooling)")
    for mask, marker in ((below, "<"), (above, ">")):
        if mask.any():
            ax.scatter(own[mask], y[mask], s=40, marker=marker, facecolors="white", edgecolors=PALETTE["orange"],
                       linewidths=1.4, zorder=3, label="own data only, beyond the axis")
    ax.set_xlim(*limits)
    ax.scatter(mean, y, s=22, color=PALETTE["blue"], zorder=4, label="partial pooling mean")
    ax.set_yticks(y, [f"{clip_text(g, 24)}  {_size_text(size_column, s, scale)}" for g, s in zip(rows["group"], sizes)])
    ax.set_ylim(-0.7, len(rows) - 0.3)
    ax.set_xlabel(clip_text(axis, 90))
    scale.format_axis(ax.xaxis)
    ax.grid(axis="y", visible=False)
    fig.legend(loc="outside lower center", ncols=2, frameon=False)
    return fig


def _scatter(rows, axis: str, complete, scale: Scale, change: bool):
    note: list = []
    rows = _thin(rows, note)
    _, sizes = volume(rows)
    fig = new_figure(6.0, 4.4)
    ax = fig.add_subplot()
    own, _, _ = _off_axis(rows["no_pooling_outcome"].to_numpy(dtype=float), _axis_range(rows, complete, scale, change))
    mean = rows["outcome_mean"].to_numpy(dtype=float)
    finite = np.isfinite(own)
    low, high = np.nanmin(np.r_[own, mean]), np.nanmax(np.r_[own, mean])
    ax.plot([low, high], [low, high], color=GREY, linewidth=1, label="no pooling (y = x)")
    if len(complete) == 1:
        ax.axhline(complete[0], color=PALETTE["black"], linestyle="--", linewidth=1, label="complete pooling")
    ax.scatter(own[finite], mean[finite], s=_areas(sizes)[finite] / 3, color=PALETTE["blue"], alpha=0.6,
               edgecolors="none", rasterized=True, label="group (area grows with its information)")
    ax.set_xlabel(clip_text("own data only: " + axis, 90))
    ax.set_ylabel(clip_text("partial pooling: " + axis, 90))
    scale.format_axis(ax.xaxis)
    scale.format_axis(ax.yaxis)
    ax.legend(loc="upper left", frameon=False)
    text = ("The further a point lies from the grey y = x line (no pooling), the more the group was pooled. "
            + " ".join(note))
    return fig, text
