"""Per-group partial non-centring: the rule's weights and the exactness of the transform.

The partial form samples ``p_jt ~ N(w_jt m_jt, sd_t^(2 w_jt))`` and sets the
offsets ``u_j = L (sd^(-w_j) * (p_j - w_j m_j))`` (model/rowwise.py::_partial;
Gorinova, Moore and Hoffman 2020, with one weight per group). It is a change of
variables, so the model's log density at a point must equal the centred
model's at the same group effects plus ``log |det du/dp|``
``= sum_j (log det L - sum_t w_jt log sd_t)`` (closed form written out here,
not from the model's code); against the non-centred model (``z_j = sd^(-w_j)
(p_j - w_j m_j)``) the difference is ``-sum_jt w_jt log sd_t``. Data: dyestuff
(Davies 1947), oats (Yates 1935), machines (Milliken and Johnson 1992), cbpp
(Lesnoff et al. 2004): tests/data/SOURCES.md.
"""
from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

import hierwork
from hierwork.model.rowwise import build_model
from hierwork.plan import parameterisation as rule

DATA = Path(__file__).parent / "data"


# ---------------------------------------------------------------- the rule (pure NumPy)

def test_weights_with_many_groups_are_the_normal_normal_optimum():
    # Papaspiliopoulos, Roberts and Skold (2007): for y_j ~ N(theta_j, v_j), theta_j ~ N(mu, tau^2),
    # theta_j - (1 - w_j) mu is a posteriori independent of mu when w_j = tau^2 / (tau^2 + v_j).
    # With many groups the interval of tau^2 is narrow and the rule's weight tends to that value.
    kappa = np.array([0.1, 1.0, 9.0] * 3000)
    w = rule.judge([("intercept", 2.0, kappa)]).weights[:3, 0]
    np.testing.assert_allclose(w, kappa[:3] / (1 + kappa[:3]), atol=0.01)


def test_few_groups_reach_tau_zero_and_are_never_centred():
    # chi2 with J - 1 degrees of freedom (one-way ANOVA): with 3 groups the 90% interval of tau^2
    # reaches 0 unless each group's data are very informative; the centred form's scale then
    # has no lower bound (the funnel's neck).
    low, high, _ = rule.tau2_interval(1.0, np.full(3, 1.5))
    assert low == 0.0 and high > 1.0
    assert rule.choose("auto", [("intercept", 1.0, np.full(3, 1.5))])[0] == "non_centred"
    assert rule.choose("auto", [("intercept", 1.0, np.full(300, 1.5))])[0] == "centred"
    assert rule.choose("auto", [("intercept", 1.0, np.full(3, 200.0))])[0] == "centred"


@pytest.mark.parametrize("kappa, form", [(1.2, "centred"), (0.8, "non_centred")])
def test_the_many_groups_threshold_is_kappa_one(kappa, form):
    # centred iff kappa_j >= 1 at the middle of the interval of tau^2 (derived in judge's docstring;
    # the Gibbs rates 1/(1 + kappa) centred and kappa/(1 + kappa) non-centred of Papaspiliopoulos,
    # Roberts and Skold 2007 give the same threshold)
    assert rule.choose("auto", [("intercept", 0.3, np.full(2000, kappa))])[0] == form


@pytest.mark.parametrize("kappa, form", [
    (np.full(150, 0.05), "non_centred"),                                  # data-poor groups
    (np.full(12, 40.0), "centred"),                                       # data-rich groups
    (np.full(6, 3.2), "centred"),                                         # crossed binomial's 6 machines
    (np.concatenate([np.full(5, 200.0), np.full(100, 0.05)]), "partial"),  # groups disagree
])
def test_decision_on_constructed_components(kappa, form):
    chosen, reason, weights = rule.choose("auto", [("intercept", 0.3, kappa)])
    assert chosen == form, reason
    assert (weights is not None) == (form == "partial")
    if form == "partial":
        assert weights[:5].min() > 0.9 and weights[5:].max() < 0.1
        assert "groups disagree" in reason and "weights" in reason


def test_explicit_forms_are_kept():
    kappa = np.full(10, 5.0)
    assert rule.choose("non_centred", [("intercept", 0.3, kappa)])[:2] == ("non_centred", "set in the spec")
    form, reason, weights = rule.choose("partial", [("intercept", 0.3, kappa)])
    assert form == "partial" and weights.shape == (10, 1) and "weights" in reason


# ---------------------------------------------------------------- exactness of the transform

def _plan(folder, data, outcome, predictors, groups):
    (folder / "d.csv").write_text((DATA / data).read_text())
    (folder / "spec.yaml").write_text(f"format: hierwork/1\nname: partial\ndata: d.csv\noutcome: {outcome}\n"
                                      f"predictors: {predictors}\ngroups: {groups}\n", encoding="utf-8")
    return hierwork.check(folder / "spec.yaml").plan


def _function(model, names=None):
    out = model.logp() if names is None else model.replace_rvs_by_values([model[n] for n in names])
    fn = model.compile_fn(out, inputs=model.value_vars, point_fn=False, mode="FAST_COMPILE",
                          on_unused_input="ignore")
    if names is None:
        return lambda point: float(fn(*[point[v.name] for v in model.value_vars]))
    return lambda point: dict(zip(names, fn(*[point[v.name] for v in model.value_vars])))


def _with_forms(plan, form, weights=None):
    return replace(plan, factors=tuple(replace(f, parameterisation=form, weights=weights(f) if weights else None)
                                       for f in plan.factors))


CASES = {  # data, outcome, predictors, groups, reduced
    "dyestuff one factor, per row": ("dyestuff.csv", "{column: yield_g, family: normal}", "[]",
                                     "{batch: {column: batch}}", False),
    "oats varying slopes, one factor": ("oats.csv", "{column: yield, family: normal}", "[nitrogen_cwt]",
                                        "{variety: {column: variety, varying: [intercept, nitrogen_cwt]}}", False),
    "oats nested, reduced": ("oats.csv", "{column: yield, family: normal}", "[nitrogen_cwt]",
                             "{block: {column: block}, plot: {column: variety, within: block}}", True),
    "machines crossed (shifted), reduced": ("machines.csv", "{column: score, family: normal}", "[]",
                                            "{worker: {column: worker}, machine: {column: machine}}", True),
    "cbpp binomial crossed (shifted)": ("cbpp.csv", "{column: incidence, family: binomial, trials: size}", "[]",
                                        "{herd: {column: herd}, period: {column: period}}", False),
}


@pytest.mark.parametrize("case", list(CASES))
def test_partial_model_has_the_log_density_of_the_other_forms_plus_the_jacobian(tmp_path, case):
    data, outcome, predictors, groups, reduced = CASES[case]
    base = _plan(tmp_path, data, outcome, predictors, groups)
    rng = np.random.default_rng(5)
    partial = _with_forms(base, "partial", lambda f: rng.uniform(0, 1, (f.n_groups, len(f.varying))))
    one = len(base.factors) == 1
    # the reference: centred (offsets or coefficients sampled directly) unless the shift makes a centred
    # factor contrasts; then non-centred
    shifted = "b_shifted_intercept" in build_model(partial, reduced=reduced).named_vars
    ref_form = "non_centred" if shifted else "centred"
    model, ref = build_model(partial, reduced=reduced), build_model(_with_forms(base, ref_form), reduced=reduced)
    names = [f"{f.name}__effect" for f in base.factors] + ["b"]
    values, ref_values = _function(model, names), _function(ref, names)
    logp, ref_logp = _function(model), _function(ref)
    means = base.X[:, 1:].mean(axis=0)
    start = model.initial_point()
    for _ in range(3):
        point = {k: v + rng.normal(0, 0.3, np.shape(v)) for k, v in start.items()}
        got = values(point)
        image = {k: v for k, v in point.items() if "__partial" not in k}
        log_jacobian = 0.0
        for f in partial.factors:
            A = np.eye(len(f.varying))
            A[0, 1:] = [means[c - 1] for c in f.varying_cols[1:]]
            u = got[f"{f.name}__effect"] @ A.T  # offsets at the centred predictors
            sd = np.exp(point[f"{f.name}__sd_log__"]) if f"{f.name}__sd_log__" in point else None
            if sd is None:  # several terms: the SDs are the Cholesky factor's diagonal
                chol = _chol(model, point, f)
                sd = np.sqrt(np.sum(chol ** 2, axis=1))
            else:
                chol = np.diag(sd)
            if ref_form == "non_centred":
                image[f"{f.name}__z"] = np.linalg.solve(A @ chol, u.T).T  # z at the centred predictors
                log_jacobian -= float(np.sum(f.weights * np.log(sd)))
            else:
                if one:
                    mean = got["b"][list(f.varying_cols)] @ A.T
                    image[f"{f.name}__coef"] = mean + u
                else:
                    image[f"{f.name}__u"] = u
                log_jacobian += float(f.n_groups * np.sum(np.log(np.diag(chol))) - np.sum(f.weights * np.log(sd)))
        back = ref_values(image)
        for name in names:
            np.testing.assert_allclose(back[name], got[name], rtol=1e-9, atol=1e-9)
        assert logp(point) == pytest.approx(ref_logp(image) + log_jacobian, rel=1e-10, abs=1e-8)
        # the check can fail: the sampled values read as centred ones give another density
        if ref_form == "centred" and not one:
            wrong = {**image, **{f"{f.name}__u": point[f"{f.name}__partial"] for f in partial.factors}}
            assert abs(ref_logp(wrong) + log_jacobian - logp(point)) > 1e-6


def _chol(model, point, f):
    """The factor's Cholesky factor (data units) at a point, from the model's own packed variable."""
    import pymc as pm  # noqa: F401

    fn = model.compile_fn(model.replace_rvs_by_values([model[f"{f.name}__sd"], model[f"{f.name}__corr"]]),
                          inputs=model.value_vars, point_fn=False, mode="FAST_COMPILE", on_unused_input="ignore")
    sd, corr = fn(*[point[v.name] for v in model.value_vars])
    return np.diag(sd) @ np.linalg.cholesky(corr)


def test_check_and_plan_say_partial_and_its_weights(tmp_path):
    _plan(tmp_path, "dyestuff.csv", "{column: yield_g, family: normal}", "[]",
          "{batch: {column: batch, parameterisation: partial}}")
    report = hierwork.check(tmp_path / "spec.yaml")
    line = next(x for x in report.text().splitlines() if "batch effects" in x)
    assert "partial" in line and "weights" in line and "median" in line
    from hierwork.plan.describe import plan_as_dict

    stored = plan_as_dict(report.plan)["factors"][0]
    assert stored["parameterisation"] == "partial"
    weights = np.array(stored["partial_weights"]["weights"])
    assert weights.shape == (6, 1) and np.all((weights >= 0) & (weights <= 1))
    assert stored["partial_weights"]["groups"] == list(report.plan.factors[0].levels)
