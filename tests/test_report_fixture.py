"""A small run folder built with PyMC directly, following docs/contracts.md.

The report, compare and browser tests render this folder. It is a real fit
(two short chains of a varying-intercept normal model) whose files follow the
run-folder contract, so the report is tested on genuine posterior draws and
genuine diagnostics rather than on hand-written numbers. One group label is
``<script>alert(1)</script>`` and others carry ``&`` and ``$`` so that every
rendering path is exercised on hostile text.

``build_run`` is cached per process: the test modules share one sampled model.
"""
from __future__ import annotations

import functools
import hashlib
import json
import shutil
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

HOSTILE = "<script>alert(1)</script>"
FARMS = (HOSTILE, "Hill & Dale", "$5 acre", "north_01", "north_02", "east_01",
         "east_02", "south_01", "south_02", "west_01", "west_02", "west_03")
SIZES = (2, 3, 4, 5, 6, 8, 10, 12, 16, 20, 30, 40)
INTERVAL = 0.94

SPEC_TEXT = """format: hierwork/1
name: plot-yield
title: Plot yield across farms <b>bold?</b>
data: {data}
outcome:
  column: yield_t_ha
  family: normal
predictors:
  - nitrogen_kg
groups:
  farm:
    column: farm_id
    parameterisation: non_centred
sampling:
  chains: 2
  warmup: 300
  draws: 300
  target_accept: 0.9
  seed: 20261202
gate:
  r_hat_max: {r_hat_max}
  ess_bulk_min: {ess_bulk_min}
  ess_tail_min: 100
  divergences_max: 0
  bfmi_min: 0.3
estimates:
  interval: 0.94
"""


def _data(seed=11):
    rng = np.random.default_rng(seed)
    farm_idx = np.repeat(np.arange(len(FARMS)), SIZES)
    effect = rng.normal(0.0, 0.6, len(FARMS))
    nitrogen = rng.choice([0.0, 60.0, 120.0, 180.0], farm_idx.size)
    y = 4.0 + effect[farm_idx] + 0.01 * nitrogen + rng.normal(0.0, 0.8, farm_idx.size)
    return pd.DataFrame({"farm_id": np.array(FARMS)[farm_idx], "nitrogen_kg": nitrogen,
                         "yield_t_ha": y.round(3)})


def _sample(data):
    import pymc as pm

    codes = pd.Categorical(data["farm_id"], categories=FARMS).codes
    coords = {"term": ["intercept", "nitrogen_kg"], "farm": list(FARMS),
              "farm__term": ["intercept"], "obs": np.arange(len(data))}
    with pm.Model(coords=coords):
        b = pm.Normal("b", 0.0, 10.0, dims="term")
        sd = pm.HalfNormal("farm__sd", 1.0, dims="farm__term")
        z = pm.Normal("farm__z", 0.0, 1.0, dims=("farm", "farm__term"))
        effect = pm.Deterministic("farm__effect", z * sd, dims=("farm", "farm__term"))
        residual_sd = pm.HalfNormal("residual_sd", 1.0)
        mu = b[0] + b[1] * data["nitrogen_kg"].to_numpy() + effect[codes, 0]
        pm.Normal("yield_t_ha", mu, residual_sd, observed=data["yield_t_ha"].to_numpy(),
                  dims="obs")
        idata = pm.sample(draws=300, tune=300, chains=2, cores=1, random_seed=20261202,
                          target_accept=0.9, progressbar=False,
                          idata_kwargs={"log_likelihood": True})
        pm.sample_posterior_predictive(idata, extend_inferencedata=True, progressbar=False,
                                       random_seed=1)
    return idata


def _diagnostics(idata, r_hat_max, ess_bulk_min):
    """Gate checks computed with ArviZ, laid out as contracts.md describes."""
    import arviz as az

    names = ["b", "farm__sd", "farm__effect", "residual_sd"]

    def worst(ds, pick):
        flat = {f"{v}[{','.join(map(str, idx))}]" if ds[v].ndim else v: float(ds[v].values[idx])
                for v in names for idx in np.ndindex(ds[v].shape)}
        key = pick(flat, key=flat.get)
        return key, flat[key]

    rhat_par, rhat = worst(az.rhat(idata, var_names=names), max)
    bulk_par, bulk = worst(az.ess(idata, var_names=names, method="bulk"), min)
    tail_par, tail = worst(az.ess(idata, var_names=names, method="tail"), min)
    divergent = int(idata.sample_stats["diverging"].sum())
    bfmi = float(np.min(az.bfmi(idata)))
    checks = [
        {"name": "r_hat", "threshold": r_hat_max, "value": rhat, "worst_parameter": rhat_par,
         "passed": rhat <= r_hat_max, "comparison": "<="},
        {"name": "ess_bulk", "threshold": ess_bulk_min, "value": bulk,
         "worst_parameter": bulk_par, "passed": bulk >= ess_bulk_min, "comparison": ">="},
        {"name": "ess_tail", "threshold": 100, "value": tail, "worst_parameter": tail_par,
         "passed": tail >= 100, "comparison": ">="},
        {"name": "divergences", "threshold": 0, "value": divergent, "worst_parameter": None,
         "passed": divergent <= 0, "comparison": "<="},
        {"name": "bfmi", "threshold": 0.3, "value": bfmi, "worst_parameter": None,
         "passed": bfmi >= 0.3, "comparison": ">="},
    ]
    passed = all(c["passed"] for c in checks)
    advice = [] if passed else ["Run longer chains: raise sampling.draws to 2000."]
    return {"format": "hierwork-diagnostics/1", "passed": passed, "chains": 2,
            "draws_per_chain": 300, "checks": checks, "advice": advice}


def _group_estimates(idata, data):
    """No/complete/partial pooling per farm (columns of docs/contracts.md)."""
    post = idata.posterior
    own = post["b"].sel(term="intercept") + post["farm__effect"].sel(farm__term="intercept")
    flat = own.stack(s=("chain", "draw")).transpose("farm", "s").values
    lo, hi = np.quantile(flat, [(1 - INTERVAL) / 2, (1 + INTERVAL) / 2], axis=1)
    slope = float(post["b"].sel(term="nitrogen_kg").mean())
    adjusted = data["yield_t_ha"] - slope * data["nitrogen_kg"]
    sizes = data.groupby("farm_id").size()
    table = pd.DataFrame({
        "factor": "farm", "group": list(FARMS), "term": "intercept",
        "n": [int(sizes[f]) for f in FARMS],
        "no_pooling": [float(adjusted[data["farm_id"] == f].mean()) for f in FARMS],
        "complete_pooling": float(adjusted.mean()),
        "partial_mean": flat.mean(axis=1), "partial_sd": flat.std(axis=1, ddof=1),
        "lower": lo, "upper": hi})
    table["shrinkage"] = ((table["no_pooling"] - table["partial_mean"])
                          / (table["no_pooling"] - table["complete_pooling"]))
    return table


def _pooling(idata):
    """Pooling factor, Gelman and Pardoe (2006), Technometrics 48:241-251, eq. 8:
    lambda = 1 - var_k(E[e_k]) / E[var_k(e_k)]."""
    effects = idata.posterior["farm__effect"].sel(farm__term="intercept").stack(s=("chain", "draw"))
    value = 1 - float(effects.mean("s").var("farm", ddof=1) / effects.var("farm", ddof=1).mean("s"))
    return pd.DataFrame({"factor": ["farm"], "term": ["intercept"], "n_groups": [len(FARMS)],
                         "pooling_factor": [value]})


def _summary(idata):
    """Population and variance parameters, named as in the spec's priors keys."""
    import arviz as az

    post = idata.posterior
    draws = {"intercept": post["b"].sel(term="intercept"),
             "nitrogen_kg": post["b"].sel(term="nitrogen_kg"),
             "residual_sd": post["residual_sd"],
             "farm.sd": post["farm__sd"].sel(farm__term="intercept")}
    rows = []
    for name, array in draws.items():
        values = array.transpose("chain", "draw").values
        rows.append({"parameter": name, "mean": values.mean(), "sd": values.std(ddof=1),
                     "lower": np.quantile(values, (1 - INTERVAL) / 2),
                     "upper": np.quantile(values, (1 + INTERVAL) / 2),
                     "ess_bulk": float(az.ess(values, method="bulk")),
                     "ess_tail": float(az.ess(values, method="tail")),
                     "r_hat": float(az.rhat(values))})
    return pd.DataFrame(rows)


@functools.lru_cache(maxsize=None)
def _sampled():
    data = _data()
    return data, _sample(data)


def build_run(root: Path, *, failing: bool = False, shift: float = 0.0,
              with_ppc: bool = True) -> Path:
    """Write a complete run folder under ``root`` and return its path.

    ``failing`` tightens the gate so that a genuine check fails (the bulk ESS
    minimum); ``shift`` adds a constant to the group estimates, so that a
    compare test knows exactly which estimates moved and by how much.
    """
    data, idata = _sampled()
    run = root / ("run-failing" if failing else f"run-{shift:g}")
    if run.exists():
        return run
    run.mkdir(parents=True)
    data_path = run.parent / "plots.csv"
    data.to_csv(data_path, index=False)
    r_hat_max, ess_bulk_min = (1.01, 100000) if failing else (1.05, 100)
    spec = SPEC_TEXT.format(data=data_path, r_hat_max=r_hat_max, ess_bulk_min=ess_bulk_min)
    (run / "spec.yaml").write_text(spec)
    if not with_ppc:
        idata = idata.copy()
        del idata.posterior_predictive
    idata.to_netcdf(run / "posterior.nc")
    (run / "diagnostics.json").write_text(
        json.dumps(_diagnostics(idata, r_hat_max, ess_bulk_min), indent=1))
    estimates = _group_estimates(idata, data)
    estimates[["no_pooling", "partial_mean", "lower", "upper"]] += shift
    estimates.to_csv(run / "group_estimates.csv", index=False)
    _summary(idata).to_csv(run / "summary.csv", index=False)
    _pooling(idata).to_csv(run / "pooling.csv", index=False)
    digest = hashlib.sha256(data_path.read_bytes()).hexdigest()
    (run / "provenance.json").write_text(json.dumps({
        "format": "hierwork-run/1",
        "spec_sha256": hashlib.sha256(spec.encode()).hexdigest(),
        "data_sha256": digest, "data_path": str(data_path),
        "packages": {"pymc": "5.28.5", "arviz": "0.23.4", "hierwork": "0.1.0"},
        "seed": 20261202, "started": "2026-12-02T10:00:00+00:00",
        "finished": "2026-12-02T10:00:41+00:00",
        "command": f"hierwork fit 'specs/plot yield.yaml' --out {run}",
        "reproduce": f"hierwork fit {run / 'spec.yaml'} --out NEW_FOLDER",
        "engine": "pymc", "passed": not failing,
    }, indent=1))
    (run / "plan.json").write_text(json.dumps({"family": "normal", "link": "identity"}))
    return run


@pytest.fixture(scope="session")
def run_root(tmp_path_factory):
    return tmp_path_factory.mktemp("runs")


def copy_run(run: Path, dest: Path) -> Path:
    """A private copy of ``run`` that a test may modify."""
    shutil.copytree(run, dest)
    return dest


def test_synthetic_run_follows_the_contract(run_root):
    # Source: docs/contracts.md, "Run folder" table and column lists.
    run = build_run(run_root)
    for name in ("posterior.nc", "diagnostics.json", "group_estimates.csv", "summary.csv",
                 "spec.yaml", "provenance.json"):
        assert (run / name).is_file(), name
    table = pd.read_csv(run / "group_estimates.csv", keep_default_na=False)
    assert list(table.columns[:10]) == ["factor", "group", "term", "n", "no_pooling",
                                        "complete_pooling", "partial_mean", "partial_sd",
                                        "lower", "upper"]
    assert HOSTILE in set(table["group"])
    assert json.loads((run / "diagnostics.json").read_text())["passed"] is True


def test_failing_synthetic_run_fails_the_bulk_ess_check(run_root):
    diagnostics = json.loads((build_run(run_root, failing=True) / "diagnostics.json").read_text())
    failed = [c["name"] for c in diagnostics["checks"] if not c["passed"]]
    assert diagnostics["passed"] is False and "ess_bulk" in failed



class Page(HTMLParser):
    """Elements of an HTML page: ``(tag, attrs, text inside)`` in document order,
    with a check that every non-void element is closed in order."""

    VOID = {"br", "hr", "img", "meta", "link", "col", "input", "wbr"}

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.elements, self.open, self.errors = [], [], []
        self.feed(text)
        self.close()
        self.errors += [f"unclosed <{e[0]}>" for e in self.open]

    def handle_starttag(self, tag, attrs):
        element = [tag, dict(attrs), []]
        self.elements.append(element)
        if tag not in self.VOID:
            self.open.append(element)

    def handle_endtag(self, tag):
        if not self.open or self.open[-1][0] != tag:
            self.errors.append(f"unexpected </{tag}>")
            return
        self.open.pop()

    def handle_data(self, data):
        for element in self.open:
            element[2].append(data)

    def find(self, tag, **attrs):
        """Elements with ``tag`` whose attributes include ``attrs``."""
        return [(t, a, " ".join(" ".join(text).split())) for t, a, text in self.elements
                if t == tag and all(a.get(k) == v for k, v in attrs.items())]


def test_synthetic_page_parser_reports_unbalanced_markup():
    assert Page("<main><p>a</p></main>").errors == []
    assert Page("<main><p>a</main>").errors
