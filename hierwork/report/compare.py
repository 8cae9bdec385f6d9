"""What changed between two runs: spec, estimates, diagnostics.

``hierwork compare RUN_A RUN_B`` lists the spec keys that differ (with the
values each run actually used, from ``plan.json`` and the key table, where a
spec left a key out), every population and variance parameter side by side
(both runs' means and intervals, and the change in posterior SDs, largest
first, with a figure), the group estimates that moved, groups present in only
one run, and each gate check side by side. The change in posterior SDs is
``(mean_B - mean_A) / max(sd_A, sd_B)``, so the comparison is symmetric in A and
B; an estimate counts as *moved* when its size exceeds ``moved`` (default 1).
"""
from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np
import pandas as pd

from hierwork.report.page import data_table, figure_element, page
from hierwork.report.markup import el
from hierwork.report.plotting import GREY, PALETTE, Plot, clip_text, finish, new_figure, styled
from hierwork.formatting import number as fmt
from hierwork.report.verdict import verdict
from hierwork.runfolder import Run

__all__ = ["Comparison", "compare_runs", "spec_differences", "MOVED"]

_GROUP_KEY = ["factor", "group", "term"]
_MISSING = "(absent)"
#: Default size of a change, in posterior SDs, beyond which an estimate counts as moved.
MOVED = 1.0
#: Rows drawn in each compare figure (largest changes first).
MAX_FIGURE_ROWS = 30
#: Group rows listed in the text when none moved (largest changes first).
LARGEST_GROUPS = 10


def _flatten(value, prefix: str = "") -> dict:
    if isinstance(value, dict):
        out = {}
        for key, item in value.items():
            out.update(_flatten(item, f"{prefix}.{key}" if prefix else str(key)))
        return out
    return {prefix: value}


def _show(value) -> str:
    if value is _MISSING:
        return _MISSING
    return json.dumps(value, default=str) if isinstance(value, (list, dict)) else str(value)


def _default(key: str):
    """The key table's default for a dotted spec key (``_MISSING`` when it has none)."""
    from hierwork.declare.keys import REQUIRED, SPEC_KEYS

    table, parts, found = SPEC_KEYS, key.split("."), None
    while parts:
        found = table.get(parts.pop(0)) if isinstance(table, dict) else None
        if found is None:
            return _MISSING
        if found.kind == "section":
            table = found.fields or {}
        elif found.kind == "named" and found.item is not None:
            if not parts:
                break
            parts.pop(0)  # the user's name (a factor, a variant)
            table = (found.item.fields or {}) if found.item.kind == "section" else {}
            found = found.item
        else:
            table = {}
    if found is None or found.default is REQUIRED or parts:
        return _MISSING
    return found.default


def _prior_text(prior: dict | None) -> str:
    if not prior:
        return "(not in this model)"
    params = ", ".join(f"{k}={fmt(v)}" for k, v in (prior.get("params") or {}).items())
    return f"{prior.get('dist')}({params})" + (" (default)" if prior.get("default") else "")


def _effective(key: str, plan: dict | None) -> str:
    """What a run used for a key its spec left out: the plan's choice, else the key table's default."""
    parts = key.split(".")
    if plan and len(parts) == 3 and parts[0] == "groups" and parts[2] == "parameterisation":
        factor = next((f for f in plan.get("factors", []) if f.get("name") == parts[1]), None)
        if factor and factor.get("parameterisation"):
            return f"{factor['parameterisation']} (auto)"
    default = _default(key)
    if default is _MISSING:
        return _MISSING
    return "(not set)" if default is None else f"{_show(default)} (default)"


def spec_differences(a: dict, b: dict, plan_a: dict | None = None, plan_b: dict | None = None) -> list:
    """Dotted spec keys whose values differ: ``(key, value in a, value in b)``.

    A key one spec leaves out shows the value that run used: for priors the
    distribution in its ``plan.json`` (``default`` marked), for a factor's
    parameterisation the plan's choice, else the key table's default.
    """
    flat_a, flat_b = ({k: v for k, v in _flatten(s).items() if not k.startswith("priors.")} for s in (a, b))
    keys = list(flat_a) + [k for k in flat_b if k not in flat_a]
    rows = [(k, _show(flat_a[k]) if k in flat_a else _effective(k, plan_a),
             _show(flat_b[k]) if k in flat_b else _effective(k, plan_b))
            for k in keys if flat_a.get(k, _MISSING) != flat_b.get(k, _MISSING)]
    rows = [r for r in rows if r[1] != r[2]] or rows
    priors_a, priors_b = ((p or {}).get("priors") or {} for p in (plan_a, plan_b))
    if priors_a or priors_b:
        for name in list(priors_a) + [n for n in priors_b if n not in priors_a]:
            pa, pb = priors_a.get(name), priors_b.get(name)
            if (pa or {}).get("dist") != (pb or {}).get("dist") or (pa or {}).get("params") != (pb or {}).get("params"):
                rows.append((f"priors.{name}", _prior_text(pa), _prior_text(pb)))
    else:
        pa, pb = _flatten(a.get("priors") or {}), _flatten(b.get("priors") or {})
        rows += [(f"priors.{k}", _show(pa.get(k, _MISSING)), _show(pb.get(k, _MISSING)))
                 for k in list(pa) + [k for k in pb if k not in pa] if pa.get(k, _MISSING) != pb.get(k, _MISSING)]
    return rows


def _side_by_side(a: pd.DataFrame | None, b: pd.DataFrame | None, key: list, mean: str, sd: str,
                  bounds: tuple = ("lower", "upper")) -> tuple[pd.DataFrame, list, list]:
    """Every row of both tables with both means, SDs and intervals and the change in SDs, largest first;
    and the keys in one run only."""
    if a is None or b is None:
        return pd.DataFrame(), [], []
    columns = key + [c for c in (mean, sd, *bounds) if c in a.columns and c in b.columns]
    both = a[columns].merge(b[columns], on=key, how="outer", suffixes=("_a", "_b"), indicator=True)
    only_a = both.loc[both["_merge"] == "left_only", key].values.tolist()
    only_b = both.loc[both["_merge"] == "right_only", key].values.tolist()
    both = both[both["_merge"] == "both"].drop(columns="_merge")
    change = both[f"{mean}_b"] - both[f"{mean}_a"]
    scale = np.maximum(both[f"{sd}_a"], both[f"{sd}_b"])
    with np.errstate(divide="ignore", invalid="ignore"):
        both = both.assign(change=change, change_in_sd=change / scale)
    order = both["change_in_sd"].abs().sort_values(ascending=False, kind="stable", na_position="last").index
    return both.loc[order].reset_index(drop=True), only_a, only_b


@styled
def change_plot(table: pd.DataFrame, label, moved: float, what: str) -> Plot | None:
    """Dot plot of the change in posterior SDs of the largest changes, with the ``moved`` limits."""
    rows = table.dropna(subset=["change_in_sd"]).head(MAX_FIGURE_ROWS)
    if rows.empty:
        return None
    values = rows["change_in_sd"].to_numpy(dtype=float)
    labels = [clip_text(label(r), 40) for r in rows.itertuples(index=False)]
    fig = new_figure(6.4, 1.0 + 0.24 * len(rows))
    ax = fig.add_subplot()
    y = np.arange(len(rows))[::-1]
    ax.hlines(y, 0, values, color=GREY, linewidth=1)
    beyond = np.abs(values) > moved
    ax.scatter(values[~beyond], y[~beyond], s=22, color=PALETTE["blue"], zorder=3, label=f"within {fmt(moved)} SD")
    ax.scatter(values[beyond], y[beyond], s=34, marker="D", color=PALETTE["orange"], zorder=3,
               label=f"moved: beyond {fmt(moved)} SD")
    for edge in (-moved, moved):
        ax.axvline(edge, color=PALETTE["black"], linestyle=":", linewidth=1)
    ax.axvline(0, color=PALETTE["black"], linewidth=0.8)
    ax.set_yticks(y, labels)
    ax.set_ylim(-0.7, len(rows) - 0.3)
    ax.grid(axis="y", visible=False)
    ax.set_xlabel("change from A to B, in posterior SDs (B mean \u2212 A mean) / larger SD")
    fig.legend(loc="outside lower center", ncols=2, frameon=False)
    shown = f"the {len(rows)} largest of {len(table)}" if len(table) > len(rows) else f"all {len(rows)}"
    alt = (f"Change from run A to run B of {shown} {what}, in posterior SDs; {int(beyond.sum())} beyond "
           f"{fmt(moved)} SD. Largest: {labels[0]} at {fmt(values[0], 3)}.")
    caption = (f"{what.capitalize()}: the change of each posterior mean from A to B divided by the larger of its "
               f"two posterior SDs, largest first ({shown}); the dotted lines mark \u00b1{fmt(moved)} SD, beyond "
               "which an estimate counts as moved.")
    return finish(fig, alt, caption)


@dataclass(frozen=True)
class Comparison:
    """Differences between run A and run B (see :func:`compare_runs`).

    ``parameters`` and ``groups`` hold every row present in both runs, largest
    change in posterior SDs first; ``moved_parameters`` and ``moved_groups``
    those whose change exceeds ``moved`` SDs.
    """

    a: Run
    b: Run
    spec_changes: list
    groups: pd.DataFrame
    parameters: pd.DataFrame
    only_a: list
    only_b: list
    checks: list
    moved: float = MOVED

    @property
    def moved_groups(self) -> pd.DataFrame:
        return _beyond(self.groups, self.moved)

    @property
    def moved_parameters(self) -> pd.DataFrame:
        return _beyond(self.parameters, self.moved)

    @property
    def same_data(self) -> bool | None:
        """Whether both runs read byte-identical data (None if unknown)."""
        da = (self.a.provenance or {}).get("data_sha256")
        db = (self.b.provenance or {}).get("data_sha256")
        return None if not (da and db) else da == db

    def _data_line(self) -> str:
        return {True: "Data: the same file contents in both runs.",
                False: "Data: DIFFERENT file contents (data_sha256 differs); estimates are not "
                       "comparable one to one.",
                None: "Data: cannot tell (data_sha256 missing from provenance.json)."}[self.same_data]

    def _gate_line(self) -> str:
        return (f"Gate: A {verdict(self.a.diagnostics).short}; "
                f"B {verdict(self.b.diagnostics).short}.")

    def _rule(self) -> str:
        return (f"Change / sd is (B mean \u2212 A mean) divided by the larger of the two posterior SDs; an "
                f"estimate counts as moved beyond {fmt(self.moved)} SD.")

    def _tables(self):
        params = self.parameters.rename(columns=_PARAMETER_COLUMNS)[
            [c for c in _PARAMETER_COLUMNS.values() if c in self.parameters.rename(columns=_PARAMETER_COLUMNS)]]
        groups = self.moved_groups
        shown_groups = groups if len(groups) else self.groups.head(LARGEST_GROUPS)
        shown_groups = shown_groups.rename(columns=_GROUP_COLUMNS)[
            [c for c in _GROUP_COLUMNS.values() if c in shown_groups.rename(columns=_GROUP_COLUMNS)]]
        spec = pd.DataFrame(self.spec_changes, columns=["key", "A", "B"])
        checks = pd.DataFrame(self.checks, columns=["check", "A", "B", "A result", "B result"])
        return spec, shown_groups, params, checks

    def _group_title(self) -> str:
        moved = len(self.moved_groups)
        if moved or self.groups.empty:
            return f"Group estimates that moved beyond {fmt(self.moved)} SD ({moved} of {len(self.groups)})"
        return (f"Group estimates: none moved beyond {fmt(self.moved)} SD; the {min(LARGEST_GROUPS, len(self.groups))} "
                f"largest changes of {len(self.groups)}")

    def _parameter_title(self) -> str:
        return (f"Every population and variance parameter, largest change first ({len(self.parameters)}; "
                f"{len(self.moved_parameters)} moved beyond {fmt(self.moved)} SD)")

    def text(self) -> str:
        """The comparison as plain text for a terminal."""
        spec, groups, params, checks = self._tables()
        lines = [f"A: {self.a.path} ({self.a.name})", f"B: {self.b.path} ({self.b.name})",
                 self._data_line(), self._gate_line(), self._rule(), ""]
        for title, frame in ((f"Spec differences ({len(spec)})", spec), (self._parameter_title(), params),
                             (self._group_title(), groups), ("Diagnostics", checks)):
            lines += [title + ":"] + (_text_table(frame) if len(frame) else ["  none"]) + [""]
        for label, keys in (("only in A", self.only_a), ("only in B", self.only_b)):
            if keys:
                lines.append(f"Groups {label} ({len(keys)}): "
                             + ", ".join("/".join(_plain(k) for k in key) for key in keys[:50])
                             + (" ..." if len(keys) > 50 else ""))
        return "\n".join(lines).rstrip() + "\n"

    def html(self) -> str:
        """The comparison as a self-contained HTML page (figures as data URIs)."""
        spec, groups, params, checks = self._tables()
        figures = {
            "parameters": change_plot(self.parameters, lambda r: r.parameter, self.moved,
                                      "population and variance parameters"),
            "groups": change_plot(self.groups, lambda r: f"{r.factor}={r.group} {r.term}", self.moved,
                                  "group estimates")}
        sections = []
        for key, title, frame, sortable in (
                ("spec", "Spec differences", spec, False),
                ("parameters", self._parameter_title(), params, True),
                ("groups", self._group_title(), groups, True),
                ("diagnostics", "Diagnostics", checks, False)):
            body = (data_table(frame, {c: c for c in frame.columns}, title, sortable)
                    if len(frame) else el("p", "None.", class_="note"))
            plot = figures.get(key)
            sections.append(el("section", el("h2", title if key != "spec" else f"{title} ({len(frame)})"),
                               figure_element(plot, "", f"compare-{key}") if plot is not None else "",
                               body, id=key))
        for label, keys in (("only in A", self.only_a), ("only in B", self.only_b)):
            if keys:
                sections.append(el("p", f"Groups {label}: ",
                                   ", ".join("/".join(map(str, k)) for k in keys)))
        body = el("main",
                  el("header", el("h1", f"Compare {self.a.path.name} and {self.b.path.name}"),
                     el("p", f"A: {self.a.title} \u2014 {self.a.path} (run {self.a.name})"),
                     el("p", f"B: {self.b.title} \u2014 {self.b.path} (run {self.b.name})")),
                  el("section", el("p", self._data_line()), el("p", self._gate_line()),
                     class_="facts"),
                  sections,
                  el("p", self._rule(), class_="note"))
        return page(f"Compare {self.a.path.name} and {self.b.path.name}", body)


_PARAMETER_COLUMNS = {"parameter": "parameter", "mean_a": "A mean", "lower_a": "A lower", "upper_a": "A upper",
                      "mean_b": "B mean", "lower_b": "B lower", "upper_b": "B upper", "change": "change",
                      "change_in_sd": "change / sd"}
_GROUP_COLUMNS = {"factor": "factor", "group": "group", "term": "term", "partial_mean_a": "A mean",
                  "partial_sd_a": "A sd", "partial_mean_b": "B mean", "partial_sd_b": "B sd", "change": "change",
                  "change_in_sd": "change / sd"}


def _beyond(table: pd.DataFrame, moved: float) -> pd.DataFrame:
    if table.empty:
        return table
    return table[table["change_in_sd"].abs() > moved].reset_index(drop=True)


def _plain(value) -> str:
    """Text for a terminal: one line, control characters replaced."""
    return "".join(ch if ch.isprintable() else "?" for ch in " ".join(str(value).split()))


def _text_table(frame: pd.DataFrame) -> list[str]:
    cells = [[_plain(c) for c in frame.columns]]
    cells += [[fmt(v) if pd.api.types.is_number(v) and not isinstance(v, bool) else _plain(v)
               for v in row] for row in frame.itertuples(index=False)]
    widths = [max(len(r[i]) for r in cells) for i in range(len(cells[0]))]
    return ["  " + "  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip() for row in cells]


def _checks(a: Run, b: Run) -> list[tuple]:
    va, vb = verdict(a.diagnostics), verdict(b.diagnostics)
    by_a, by_b = {c.name: c for c in va.checks}, {c.name: c for c in vb.checks}
    rows = []
    for name in list(by_a) + [n for n in by_b if n not in by_a]:
        ca, cb = by_a.get(name), by_b.get(name)
        label = (ca or cb).label
        rows.append((label, ca.value_text if ca else "-", cb.value_text if cb else "-",
                     ("pass" if ca.passed else "FAIL") if ca else "-",
                     ("pass" if cb.passed else "FAIL") if cb else "-"))
    return rows


def compare_runs(a, b, moved: float = MOVED) -> Comparison:
    """Compare run folders ``a`` and ``b`` (paths or objects with ``.path``).

    Parameters
    ----------
    a, b : path or object with ``.path``
        The reference run and the run compared with it.
    moved : float
        Size of a change, in posterior SDs, beyond which an estimate counts as moved.

    Raises
    ------
    hierwork.RunFolderError
        If either is not a readable run folder.
    """
    ra, rb = Run.open(a), Run.open(b)
    groups, only_a, only_b = _side_by_side(ra.group_estimates, rb.group_estimates, _GROUP_KEY,
                                           "partial_mean", "partial_sd", ())
    parameters, _, _ = _side_by_side(ra.summary, rb.summary, ["parameter"], "mean", "sd")
    return Comparison(ra, rb, spec_differences(ra.spec, rb.spec, ra.plan, rb.plan), groups, parameters,
                      only_a, only_b, _checks(ra, rb), float(moved))
