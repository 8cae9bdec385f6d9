"""The joint variance components behind ``parameterisation: auto`` against closed forms and REML.

Sources beside each check: the balanced one-way REML estimates of dyestuff and
rail (closed forms from the ANOVA mean squares, tests/data/SOURCES.md), the
prediction error variance of a balanced one-way design (closed form from
Henderson's mixed-model equations; Searle, Casella and McCulloch 1992,
*Variance Components*, §7.4), and statsmodels ``MixedLM`` (REML) for crossed
(machines) and nested (oats) designs.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

import predictive_kit as kit
from hierwork.plan.parameterisation import Block, choose, variance_components

DATA = Path(__file__).parent / "data"


def _blocks(data, columns):
    out = []
    for column in columns:
        codes, levels = pd.factorize(data[column])
        out.append(Block(column, "intercept", codes.astype(np.int64), len(levels)))
    return out


def _one_way(file, group, outcome):
    data = pd.read_csv(DATA / file)
    return data, variance_components(data[outcome].to_numpy(float), None, np.ones((len(data), 1)),
                                     _blocks(data, [group]))


@pytest.mark.parametrize("file, group, outcome, tau, sigma", [
    ("dyestuff.csv", "batch", "yield_g", 42.00, 49.51),    # SOURCES.md: REML between-batch and residual SDs
    ("rail.csv", "rail", "travel_ns", 24.80, 4.02),        # SOURCES.md: REML between-rail and residual SDs
])
def test_one_way_reml_equals_the_anova_estimates(file, group, outcome, tau, sigma):
    _, c = _one_way(file, group, outcome)
    assert np.sqrt(c.tau2[0]) == pytest.approx(tau, abs=0.006)
    assert np.sqrt(c.sigma2) == pytest.approx(sigma, abs=0.006)
    assert c.exact


def test_one_way_kappa_from_the_prediction_error_variance():
    # Balanced one-way, J groups of n, alpha = sigma^2 / tau^2, intercept estimated:
    # PEV_j = sigma^2 (1 + n / (J alpha)) / (n + alpha)  (closed form of the MME inverse).
    data, c = _one_way("dyestuff.csv", "batch", "yield_g")
    J, n = 6, 5
    alpha = c.sigma2 / c.tau2[0]
    pev = c.sigma2 * (1 + n / (J * alpha)) / (n + alpha)
    np.testing.assert_allclose(c.kappa[0], c.tau2[0] / pev - 1, rtol=1e-6)


def test_no_between_group_variation_gives_zero_and_non_centred():
    # Group means made exactly equal: between mean square 0 < within, so the
    # non-negative REML estimate is 0 (Searle, Casella and McCulloch 1992, §3.7).
    data = pd.read_csv(DATA / "dyestuff.csv")
    y = data["yield_g"] - data.groupby("batch")["yield_g"].transform("mean") + 1500.0
    c = variance_components(y.to_numpy(float), None, np.ones((len(data), 1)), _blocks(data, ["batch"]))
    assert c.tau2[0] == 0.0
    form, reason, _ = choose("auto", c.of("batch"))
    assert form == "non_centred" and "no between-group variation" in reason


def test_crossed_components_equal_mixedlm_reml():
    # machines: worker x machine crossed, plus the worker-by-machine cell.
    data = pd.read_csv(DATA / "machines.csv")
    data["cell"] = data["worker"].astype(str) + ":" + data["machine"]
    data["everyone"] = 1
    reml = smf.mixedlm("score ~ 1", data, groups=data["everyone"], re_formula="0",
                       vc_formula={f: f"0 + C({f})" for f in ("worker", "machine", "cell")}).fit(reml=True)
    expected = dict(zip(reml.model.exog_vc.names, reml.vcomp))
    c = variance_components(data["score"].to_numpy(float), None, np.ones((len(data), 1)),
                            _blocks(data, ["worker", "machine", "cell"]))
    for block, tau2 in zip(c.blocks, c.tau2):
        assert tau2 == pytest.approx(expected[block.factor], rel=2e-3), block.factor
    assert c.sigma2 == pytest.approx(reml.scale, rel=2e-3)


def test_nested_components_with_fixed_effects_equal_mixedlm_reml():
    # oats: main plots (variety strips) nested in blocks; variety and nitrogen fixed.
    data = pd.read_csv(DATA / "oats.csv")
    data["main_plot"] = data["block"] + "/" + data["variety"]
    reml = smf.mixedlm("Q('yield') ~ C(variety) + nitrogen_cwt", data, groups=data["block"], re_formula="1",
                       vc_formula={"main_plot": "0 + C(variety)"}).fit(reml=True)
    X = np.column_stack([np.ones(len(data)), pd.get_dummies(data["variety"], drop_first=True).to_numpy(float),
                         data["nitrogen_cwt"].to_numpy(float)])
    c = variance_components(data["yield"].to_numpy(float), None, X, _blocks(data, ["block", "main_plot"]))
    assert c.tau2[0] == pytest.approx(float(reml.cov_re.iloc[0, 0]), rel=2e-3)
    assert c.tau2[1] == pytest.approx(float(reml.vcomp[0]), rel=2e-3)
    assert c.sigma2 == pytest.approx(reml.scale, rel=2e-3)


def test_sparse_approximation_agrees_with_the_exact_inverse_on_one_factor(monkeypatch):
    # One factor: the mixed-model equations' effect block is diagonal, so the
    # diagonal-block variances differ from the exact ones only by the intercept's uncertainty.
    from hierwork.plan import parameterisation

    data = pd.read_csv(DATA / "dyestuff.csv")
    args = (data["yield_g"].to_numpy(float), None, np.ones((len(data), 1)), _blocks(data, ["batch"]))
    exact = variance_components(*args)
    monkeypatch.setattr(parameterisation, "DENSE_MAX", 0)
    approx = variance_components(*args)
    assert not approx.exact
    assert approx.tau2[0] > 0
    assert np.all(approx.kappa[0] >= exact.kappa[0])  # conditional on the intercept: more informative


@pytest.mark.parametrize("dense_max", [24, 0])  # 24: the largest factor eliminated, the rest dense; 0: sparse LU
def test_sparse_solves_equal_numpys_dense_solution(monkeypatch, dense_max):
    # machines (crossed worker x machine, and their cells): the mixed-model equations at arbitrary
    # variance ratios, solved without forming them densely, against numpy.linalg.solve of the dense system.
    from scipy import sparse

    from hierwork.plan import parameterisation

    data = pd.read_csv(DATA / "machines.csv")
    data["cell"] = data["worker"].astype(str) + ":" + data["machine"]
    blocks = _blocks(data, ["worker", "machine", "cell"])
    n, y = len(data), data["score"].to_numpy(float)
    Z = sparse.hstack([sparse.csc_matrix((np.ones(n), (np.arange(n), b.index)), shape=(n, b.n_groups))
                       for b in blocks], format="csc")
    X = np.ones((n, 1))
    A, B, D = X.T @ X, np.asarray(Z.T @ X).T, (Z.T @ Z).tocsc()
    rhs = np.concatenate([X.T @ y, Z.T @ y])
    ginv = np.random.default_rng(5).uniform(0.1, 3.0, Z.shape[1])
    expected = np.linalg.solve(np.block([[A, B], [B.T, D.toarray() + np.diag(ginv)]]), rhs)
    monkeypatch.setattr(parameterisation, "DENSE_MAX", dense_max)
    cell = slice(6 + 3, 6 + 3 + 18)  # the block with most groups
    solution, _ = parameterisation._solve(A, B, D, rhs, ginv, False, cell)
    assert solution == pytest.approx(expected, rel=1e-9, abs=1e-9)


def test_check_judges_crossed_factors_from_the_joint_components(tmp_path):
    # machines: jointly, the worker and machine effects are judged net of the cell effects.
    # Only 3 machines: the 90% interval of their tau^2 reaches 0, where a centred form has no
    # lower bound on its scale, so non-centred; 6 workers and 18 cells have tau^2/v_j >= 1 at the
    # middle of theirs, so centred (plan/parameterisation.py::judge).
    import hierwork

    spec, _ = kit.write_machines(tmp_path)
    report = hierwork.check(spec)
    forms = {f.name: f.parameterisation for f in report.plan.factors}
    assert forms == {"worker": "centred", "machine": "non_centred", "cell": "centred"}
    assert "jointly" in report.text()
