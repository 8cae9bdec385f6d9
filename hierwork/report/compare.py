"""What changed between two runs: spec, estimates, diagnostics.

``hierwork compare RUN_A RUN_B`` lists the spec keys that differ, the group
estimates and population parameters whose posterior mean moved by more than
their posterior SD, groups present in only one run, and each gate check side
by side. An estimate counts as moved when ``|mean_B - mean_A|`` exceeds the
larger of its two posterior SDs, so the comparison is symmetric in A and B.
"""
from __future__ import annotations

import json
from dataclasses import dataclass

import numpy as np
import pandas as pd

from hierwork.report.page import data_table, page
from hierwork.report.markup import el
from hierwork.formatting import number as fmt
from hierwork.report.verdict import verdict
from hierwork.runfolder import Run

__all__ = ["Comparison", "compare_runs", "spec_differences"]

_GROUP_KEY = ["factor", "group", "term"]
_MISSING = "(absent)"


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


def spec_differences(a: dict, b: dict) -> list[tuple[str, str, str]]:
    """Dotted spec keys whose values differ: ``(key, value in a, value in b)``."""
    flat_a, flat_b = _flatten(a), _flatten(b)
    keys = list(flat_a) + [k for k in flat_b if k not in flat_a]
    return [(k, _show(flat_a.get(k, _MISSING)), _show(flat_b.get(k, _MISSING)))
            for k in keys if flat_a.get(k, _MISSING) != flat_b.get(k, _MISSING)]


def _moves(a: pd.DataFrame | None, b: pd.DataFrame | None, key: list,
           mean: str, sd: str) -> tuple[pd.DataFrame, list, list]:
    """Rows that moved by more than their posterior SD, and keys in one run only."""
    if a is None or b is None:
        return pd.DataFrame(), [], []
    both = a[key + [mean, sd]].merge(b[key + [mean, sd]], on=key, how="outer",
                                     suffixes=("_a", "_b"), indicator=True)
    only_a = both.loc[both["_merge"] == "left_only", key].values.tolist()
    only_b = both.loc[both["_merge"] == "right_only", key].values.tolist()
    both = both[both["_merge"] == "both"].drop(columns="_merge")
    change = both[f"{mean}_b"] - both[f"{mean}_a"]
    scale = np.maximum(both[f"{sd}_a"], both[f"{sd}_b"])
    with np.errstate(divide="ignore", invalid="ignore"):
        moved = both.assign(change=change, change_in_sd=change / scale)
    moved = moved[moved["change"].abs() > scale]
    order = moved["change_in_sd"].abs().sort_values(ascending=False, kind="stable").index
    return moved.loc[order].reset_index(drop=True), only_a, only_b


@dataclass(frozen=True)
class Comparison:
    """Differences between run A and run B (see :func:`compare_runs`)."""

    a: Run
    b: Run
    spec_changes: list
    moved_groups: pd.DataFrame
    moved_parameters: pd.DataFrame
    only_a: list
    only_b: list
    checks: list

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

    def _tables(self):
        groups = self.moved_groups.rename(columns={
            "partial_mean_a": "A mean", "partial_mean_b": "B mean", "partial_sd_a": "A sd",
            "partial_sd_b": "B sd", "change_in_sd": "change / sd"})
        params = self.moved_parameters.rename(columns={
            "mean_a": "A mean", "mean_b": "B mean", "sd_a": "A sd", "sd_b": "B sd",
            "change_in_sd": "change / sd"})
        spec = pd.DataFrame(self.spec_changes, columns=["key", "A", "B"])
        checks = pd.DataFrame(self.checks, columns=["check", "A", "B", "A result", "B result"])
        return spec, groups, params, checks

    def text(self) -> str:
        """The comparison as plain text for a terminal."""
        spec, groups, params, checks = self._tables()
        lines = [f"A: {self.a.path} ({self.a.name})", f"B: {self.b.path} ({self.b.name})",
                 self._data_line(), self._gate_line(), ""]
        for title, frame in (
                (f"Spec differences ({len(spec)})", spec),
                (f"Group estimates that moved by more than their posterior SD ({len(groups)})",
                 groups),
                (f"Population and variance parameters that moved by more than their posterior "
                 f"SD ({len(params)})", params),
                ("Diagnostics", checks)):
            lines += [title + ":"] + (_text_table(frame) if len(frame) else ["  none"]) + [""]
        for label, keys in (("only in A", self.only_a), ("only in B", self.only_b)):
            if keys:
                lines.append(f"Groups {label} ({len(keys)}): "
                             + ", ".join("/".join(_plain(k) for k in key) for key in keys[:50])
                             + (" ..." if len(keys) > 50 else ""))
        return "\n".join(lines).rstrip() + "\n"

    def html(self) -> str:
        """The comparison as a self-contained HTML page."""
        spec, groups, params, checks = self._tables()
        sections = []
        for key, title, frame, sortable in (
                ("spec", "Spec differences", spec, False),
                ("groups", "Group estimates that moved by more than their posterior SD", groups,
                 True),
                ("parameters", "Population and variance parameters that moved by more than "
                 "their posterior SD", params, True),
                ("diagnostics", "Diagnostics", checks, False)):
            body = (data_table(frame, {c: c for c in frame.columns}, title, sortable)
                    if len(frame) else el("p", "None.", class_="note"))
            sections.append(el("section", el("h2", f"{title} ({len(frame)})"), body, id=key))
        for label, keys in (("only in A", self.only_a), ("only in B", self.only_b)):
            if keys:
                sections.append(el("p", f"Groups {label}: ",
                                   ", ".join("/".join(map(str, k)) for k in keys)))
        body = el("main",
                  el("header", el("h1", f"Compare {self.a.path.name} and {self.b.path.name}"),
                     el("p", f"A: {self.a.path} (run {self.a.name})"),
                     el("p", f"B: {self.b.path} (run {self.b.name})")),
                  el("section", el("p", self._data_line()), el("p", self._gate_line()),
                     class_="facts"),
                  sections,
                  el("p", "An estimate counts as moved when its change in posterior mean exceeds "
                          "the larger of its posterior SDs in the two runs.", class_="note"))
        return page(f"Compare {self.a.path.name} and {self.b.path.name}", body)


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


def compare_runs(a, b) -> Comparison:
    """Compare run folders ``a`` and ``b`` (paths or objects with ``.path``).

    Raises
    ------
    hierwork.RunFolderError
        If either is not a readable run folder.
    """
    ra, rb = Run.open(a), Run.open(b)
    moved_groups, only_a, only_b = _moves(ra.group_estimates, rb.group_estimates, _GROUP_KEY,
                                          "partial_mean", "partial_sd")
    moved_parameters, _, _ = _moves(ra.summary, rb.summary, ["parameter"], "mean", "sd")
    return Comparison(ra, rb, spec_differences(ra.spec, rb.spec), moved_groups, moved_parameters,
                      only_a, only_b, _checks(ra, rb))
