"""Reader-facing parameter names (hierwork/names.py; README "Parameter names").

The unit checks follow the mapping table of the README; the packing order of
the Cholesky factor is PyMC's (``LKJCholeskyCov`` packs the lower triangle row
by row, as ``numpy.tril_indices`` lists it). The statistical-tier test fits
small invented data sets of every family and every exact path and asserts
that no internal PyMC name reaches a reader: report.html (text and every
embedded figure), summary.md, the batch index and the CLI output of ``fit``.
"""
from __future__ import annotations

import base64
import json
import re

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from hierwork import names

#: What an internal name looks like: a PyMC variable with ``__``, or the sampler's own intercept and slopes.
INTERNAL = re.compile(r"[A-Za-z0-9]__[A-Za-z]|b_centred|b_shifted|b_slope|b_intercept")


def test_every_kind_of_variable_has_its_spec_name():
    terms = ["intercept", "hours"]
    assert names.parameter_name("b", {"term": "tillage=none"}) == "tillage=none"
    assert names.parameter_name("b_slope", {"slope": "hours"}) == "hours"
    assert names.parameter_name("b_intercept", {}) == "intercept"
    assert names.parameter_name("residual_sd", {}) == "residual_sd"
    assert names.parameter_name("boat__sd", {"t": "intercept"}, terms) == "boat.sd"
    assert names.parameter_name("boat__sd", {"t": "hours"}, terms) == "boat.hours.sd"
    assert names.parameter_name("boat__corr", {"a": "intercept", "b": "hours"}) == "boat.corr[intercept,hours]"
    assert names.parameter_name("ward__gamma", {"p": "icu"}) == "ward.icu"
    assert names.parameter_name("ward__effect", {"g": "W01", "t": "intercept"}) == "ward=W01 intercept"
    assert names.parameter_name("ward__z", {"g": "W01", "t": "intercept"}) == "ward=W01 intercept (standardised offset)"
    assert names.parameter_name("ward__coef", {"g": "W01", "t": "icu"}) == "ward=W01 icu (coefficient as sampled)"
    assert names.parameter_name("ward__u", {"g": "W01", "t": "intercept"}) == "ward=W01 intercept (offset as sampled)"
    assert not INTERNAL.search(names.parameter_name("ward__something_new", {"x": 1}))


def test_cholesky_elements_are_named_by_their_row_and_column():
    # numpy.tril_indices gives the row-by-row packing of a lower triangle (PyMC's LKJCholeskyCov order).
    terms = ["intercept", "hours", "depth"]
    rows, columns = np.tril_indices(3)
    for k, (i, j) in enumerate(zip(rows, columns)):
        assert names.parameter_name("boat__chol", {"k": k}, terms) == f"boat.cholesky[{terms[i]},{terms[j]}]"


def test_legacy_labels_are_translated_and_reader_names_kept():
    # diagnostics.json of runs written before the names module stored var[coord, ...] labels.
    assert names.readable("ward__u[H1/W13, intercept]") == "ward=H1/W13 intercept (offset as sampled)"
    assert names.readable("hospital__sd[intercept]") == "hospital.sd"
    assert names.readable("b_centred_intercept") == "intercept (as sampled, predictors centred)"
    assert names.readable("b[nitrogen_kg]") == "nitrogen_kg"
    for kept in ("ward.sd", "chain 1", "ward=W01 intercept", "boat.corr[intercept,hours]", None):
        assert names.readable(kept) == kept


def test_find_locates_a_name_in_the_posterior():
    draws = np.zeros((2, 3, 2, 1))
    posterior = xr.Dataset(
        {"ward__z": (("chain", "draw", "ward", "ward__term"), draws),
         "ward__sd": (("chain", "draw", "ward__term"), np.ones((2, 3, 1))),
         "b": (("chain", "draw", "term"), np.zeros((2, 3, 1)))},
        coords={"ward": ["W01", "W02"], "ward__term": ["intercept"], "term": ["intercept"]})
    variable, selection = names.find(posterior, "ward=W02 intercept (standardised offset)")
    assert variable == "ward__z" and {k: str(v) for k, v in selection.items()} == {"ward": "W02",
                                                                                  "ward__term": "intercept"}
    assert names.find(posterior, "ward__sd[intercept]")[0] == "ward__sd"
    assert names.find(posterior, "intercept")[0] == "b"
    assert names.find(posterior, "ward=W09 intercept") is None


# --- every family and path, fitted ---------------------------------------------------------------

def _data(rng, family: str) -> pd.DataFrame:
    depot = np.repeat([f"D{j}" for j in range(8)], 6)
    region = np.array([f"R{int(d[1]) % 3}" for d in depot])
    shift = np.tile(["early", "late"], depot.size // 2)
    x = rng.uniform(0, 10, depot.size).round(2)
    effect = rng.normal(0, 0.4, 8)[np.repeat(np.arange(8), 6)]
    capacity = rng.uniform(1, 3, 8).round(2)[np.repeat(np.arange(8), 6)]  # constant within a depot
    frame = pd.DataFrame({"depot": depot, "region": region, "shift": shift, "load": x, "capacity": capacity,
                          "size": rng.integers(10, 40, depot.size), "hours": rng.uniform(5, 20, depot.size).round(1)})
    eta = effect + 0.05 * x
    if family in ("normal", "student_t"):
        frame["y"] = (20 + 3 * eta + rng.normal(0, 1, depot.size)).round(3)
    elif family in ("binomial", "beta_binomial"):
        frame["y"] = rng.binomial(frame["size"], 1 / (1 + np.exp(-(eta - 1))))
    elif family == "ordinal":
        frame["y"] = 1 + np.searchsorted([-0.5, 0.5, 1.5], eta + rng.logistic(0, 1, depot.size))
    elif family in ("gamma", "lognormal"):
        frame["y"] = (np.exp(eta + 2) * rng.gamma(4.0, 0.25, depot.size)).round(3)
    elif family == "bernoulli":
        frame["y"] = rng.binomial(1, 1 / (1 + np.exp(-eta)))
    else:
        frame["y"] = rng.poisson(frame["hours"] * np.exp(eta - 1.5)) * (rng.random(depot.size) > 0.2)
    return frame


_CASES = {
    # name: (family, outcome extras, groups, extra sampling keys). Every family, every exact path
    # (collapsed, semi_collapsed, reduced, plain), every form of group effect (standardised, as sampled, Cholesky,
    # group-level predictor, varying residual spread) and every family parameter once.
    "normal-collapsed": ("normal", "", "depot: {column: depot, within: region, varying: [intercept, load]}\n"
                                       "  region: {column: region}", ""),
    "normal-semi_collapsed": ("normal", "", "depot: {column: depot}\n  shift: {column: shift}", ""),
    "normal-reduced": ("normal", "", "depot: {column: depot}\n  shift: {column: shift}", "  path: reduced\n"),
    "normal-spread": ("normal", "", "depot: {column: depot, spread: varying}", ""),
    "binomial-centred": ("binomial", ", trials: size",
                         "depot: {column: depot, predictors: [capacity], parameterisation: centred}", ""),
    "bernoulli": ("bernoulli", "", "depot: {column: depot}", ""),
    "beta_binomial": ("beta_binomial", ", trials: size", "depot: {column: depot}", ""),
    "student_t": ("student_t", "", "depot: {column: depot, parameterisation: non_centred}", ""),
    "poisson": ("poisson", ", exposure: hours", "depot: {column: depot}", ""),
    "negative_binomial": ("negative_binomial", ", exposure: hours", "depot: {column: depot}", ""),
    "zero_inflated_poisson": ("zero_inflated_poisson", ", exposure: hours", "depot: {column: depot}", ""),
    "gamma": ("gamma", "", "depot: {column: depot}", ""),
    "lognormal": ("lognormal", "", "depot: {column: depot}", ""),
    "ordinal": ("ordinal", "", "depot: {column: depot}", ""),
}


def test_every_family_has_a_case():
    from hierwork.plan.families import REGISTRY

    assert set(REGISTRY) <= {family for family, *_ in _CASES.values()}


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    """Every case fitted through the CLI into one batch folder: ``(batch folder, {case: (run, stdout)})``."""
    import contextlib
    import io

    from hierwork.cli import main

    root = tmp_path_factory.mktemp("names")
    batch = root / "batch"
    rng = np.random.default_rng(13)
    out = {}
    for case, (family, extra, groups, sampling) in _CASES.items():
        data = root / f"{case}.csv"
        _data(rng, family).to_csv(data, index=False)
        spec = root / f"{case}.yaml"
        spec.write_text(f"format: hierwork/1\nname: {case}\ntitle: Depot {case.replace('_', ' ')}\ndata: {data}\n"
                        f"outcome: {{column: y, family: {family}{extra}}}\npredictors: [load]\n"
                        f"groups:\n  {groups}\nsampling:\n  chains: 2\n  warmup: 60\n  draws: 60\n"
                        f"  seed: 5\n{sampling}")
        run = batch / "jobs" / case / "attempt-1"
        stdout = io.StringIO()
        with contextlib.redirect_stdout(stdout):
            code = main(["fit", str(spec), "--out", str(run), "--quiet"])
        assert code in (0, 3), stdout.getvalue()
        out[case] = (run, stdout.getvalue())
    return batch, out


def _visible(html: str) -> str:
    """The page with every embedded SVG figure decoded into its text."""
    figures = [base64.b64decode(u).decode() for u in re.findall(r"data:image/svg\+xml;base64,([A-Za-z0-9+/=]+)", html)]
    return re.sub(r"data:image/svg\+xml;base64,[A-Za-z0-9+/=]+", "", html) + "\n".join(figures)


@pytest.mark.slow
def test_no_internal_name_reaches_a_reader(fitted):
    from hierwork.batch import summary
    from hierwork.batch.queue import Queue

    batch, runs = fitted
    paths = set()
    for case, (run, stdout) in runs.items():
        paths.add(json.loads((run / "provenance.json").read_text())["path"])
        for where, text in (("report.html", _visible((run / "report.html").read_text())),
                            ("summary.md", (run / "summary.md").read_text()), ("fit output", stdout)):
            found = sorted(set(INTERNAL.findall(text)))
            assert not found, f"{case} {where}: {found}"
        diagnostics = json.loads((run / "diagnostics.json").read_text())
        assert not [c["worst_parameter"] for c in diagnostics["checks"]
                    if c["worst_parameter"] and INTERNAL.search(c["worst_parameter"])]
    assert paths == {"collapsed", "semi_collapsed", "reduced", "plain"}
    queue = Queue(batch, create=True)
    for k, case in enumerate(runs):
        diagnostics = json.loads((runs[case][0] / "diagnostics.json").read_text())
        queue.upsert_job(case, k, f"{case}.yaml", {}, "s", "d")
        queue.start_attempt(case, 1, {}, None, 0, f"jobs/{case}/attempt-1")
        queue.finish_attempt(case, 1, "passed" if diagnostics["passed"] else "failed", 0, None, diagnostics)
        queue.finish_job(case, "passed" if diagnostics["passed"] else "failed", None, 1, 0)
    summary.write(batch, queue)
    for index in ("index.html", "index.md"):
        text = (batch / index).read_text()
        assert not INTERNAL.search(text), index
        assert all(f"Depot {case.replace('_', ' ')}" in text for case in runs)
    assert "headline estimate" in (batch / "index.md").read_text()
