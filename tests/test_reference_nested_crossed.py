"""External checks of nested and crossed factors against statsmodels MixedLM (REML).

* oats (Yates 1935): split-plot trial, main plots (varieties) nested in
  blocks; nitrogen on sub-plots. In this balanced design the generalised
  least squares estimates of variety and nitrogen effects equal the ordinary
  contrasts whatever the variance components (Yates 1935; e.g. Searle, Casella
  and McCulloch 1992, *Variance Components*, §4.8), so with flat-enough priors
  the posterior means must equal MixedLM's fixed effects within Monte Carlo
  error. The variance components: REML values inside the posterior central
  50% intervals, as for dyestuff and rail (6 blocks, 18 main plots).
* machines (Milliken and Johnson 1992, p. 285): workers crossed with machines,
  3 repeats per cell; worker, machine and worker-by-machine cell as crossed
  varying intercepts. REML SDs inside the posterior central 50% intervals.

The main-plot labels repeat across blocks ('Victory' in every block): nested
handling must make 18 distinct main plots, not 3.
"""
from __future__ import annotations

from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

import hierwork
import predictive_kit as kit

pytestmark = pytest.mark.slow  # every test here fits a model (MCMC)

DATA = Path(__file__).parent / "data"


def _fit(folder: Path, name: str, spec_text: str):
    spec = folder / f"{name}.yaml"
    spec.write_text(spec_text, encoding="utf-8")
    return hierwork.fit(spec, out=folder / f"run_{name}", progress=False)


def _sd_draws(run, factor):
    post = run.posterior.posterior
    if factor == "residual":
        return post["residual_sd"].values.ravel()
    return post[f"{factor}__sd"].sel({f"{factor}__term": "intercept"}).values.ravel()


def _assert_inside_central_half(run, reml_sds: dict):
    for factor, reml in reml_sds.items():
        low, high = np.quantile(_sd_draws(run, factor), [0.25, 0.75])
        assert low <= reml <= high, (factor, low, reml, high)


# --------------------------------------------------------------------------- oats: nested

@pytest.fixture(scope="session")
def oats(tmp_path_factory):
    folder = tmp_path_factory.mktemp("oats")
    data = pd.read_csv(DATA / "oats.csv")
    data["main_plot"] = data["variety"]          # the main plot is the variety strip within a block
    data.to_csv(folder / "oats.csv", index=False)
    # Wide priors on the population terms: their pull on the posterior means
    # is below 0.001 (posterior SDs < 10 against prior SDs of 1000).
    run = _fit(folder, "oats", """format: hierwork/1
name: oats
data: oats.csv
outcome: {column: yield, family: normal}
predictors:
  - {column: variety, reference: Golden.rain}
  - nitrogen_cwt
groups:
  block: {column: block}
  main_plot: {column: main_plot, within: block}
priors:
  intercept: {normal: {mu: 0, sigma: 1000}}
  variety: {normal: {mu: 0, sigma: 1000}}
  nitrogen_cwt: {normal: {mu: 0, sigma: 1000}}
sampling: {chains: 2, warmup: 500, draws: 1000, seed: 35}
""")
    reml = smf.mixedlm("Q('yield') ~ C(variety, Treatment('Golden.rain')) + nitrogen_cwt", data,
                       groups=data["block"], re_formula="1",
                       vc_formula={"main_plot": "0 + C(variety)"}).fit(reml=True)
    assert reml.converged
    return run, reml, data


def test_oats_passes_gate(oats):
    run, _, _ = oats
    assert run.passed, run.diagnostics


def test_oats_main_plots_are_distinct_within_blocks(oats):
    run, _, data = oats
    table = run.group_estimates
    plots = table[table["factor"] == "main_plot"]
    assert len(plots) == data.groupby(["block", "variety"]).ngroups == 18
    assert (plots["rows"] == 4).all()


def test_oats_population_terms_equal_mixedlm(oats):
    run, reml, _ = oats
    b = run.posterior.posterior["b"]
    mcse = az.mcse(run.posterior.posterior[["b"]], method="mean")["b"]
    expected = {
        "intercept": reml.fe_params["Intercept"],
        "variety=Marvellous": reml.fe_params["C(variety, Treatment('Golden.rain'))[T.Marvellous]"],
        "variety=Victory": reml.fe_params["C(variety, Treatment('Golden.rain'))[T.Victory]"],
        "nitrogen_cwt": reml.fe_params["nitrogen_cwt"],
    }
    for term, value in expected.items():
        got = float(b.sel(term=term).mean())
        assert abs(got - value) <= 4 * float(mcse.sel(term=term)) + 1e-3, (term, got, value)


def test_oats_variance_components_against_reml(oats):
    run, reml, _ = oats
    _assert_inside_central_half(run, {
        "block": float(np.sqrt(reml.cov_re.iloc[0, 0])),
        "main_plot": float(np.sqrt(reml.vcomp[0])),
        "residual": float(np.sqrt(reml.scale)),
    })


# --------------------------------------------------------------------------- machines: crossed

@pytest.fixture(scope="session")
def machines(tmp_path_factory):
    folder = tmp_path_factory.mktemp("machines")
    spec, data = kit.write_machines(folder, "machines",
                                    "sampling: {chains: 2, warmup: 1000, draws: 1000, seed: 92, target_accept: 0.99}")
    run = hierwork.fit(spec, out=folder / "run_machines", progress=False)
    # Three machines and six workers leave their SDs' posteriors heavy-tailed;
    # target_accept 0.99 is what the gate's advice asks for on divergences.
    # Crossed factors in MixedLM: one group holding all rows, a variance
    # component per factor.
    data["everyone"] = 1
    reml = smf.mixedlm("score ~ 1", data, groups=data["everyone"], re_formula="0",
                       vc_formula={"worker": "0 + C(worker)", "machine": "0 + C(machine)",
                                   "cell": "0 + C(cell)"}).fit(reml=True)
    assert reml.converged
    return run, reml


@pytest.mark.xfail(strict=False, reason=(
    "known open (issue 16): at 2 chains x 1,000 draws this fit is borderline on every form and path tried "
    "(seed 92; before 2026-12-03's per-column gathers: reduced path tail ESS 366 on worker.sd, worker "
    "non-centred bulk ESS 370; after: reduced path 2 divergences on cell.sd, semi-collapsed path tail ESS "
    "246 on worker.sd); the gate's advice, more draws, is what a user gets"))
def test_machines_passes_gate(machines):
    run, _ = machines
    assert run.passed, run.diagnostics


def test_machines_variance_components_against_reml(machines):
    run, reml = machines
    sds = dict(zip(reml.model.exog_vc.names, np.sqrt(reml.vcomp)))
    _assert_inside_central_half(run, {**sds, "residual": float(np.sqrt(reml.scale))})
