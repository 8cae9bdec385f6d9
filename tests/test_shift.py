"""The shifted population coefficients of crossed designs are an exact change of variables.

With crossed factors the per-row model samples ``b'_t = b_t + sum_f mean_j u_{f,j,t}``
(model/paths.py::shifted_columns). The map ``(b', u) -> (b, u)`` is a shear:
linear, unit Jacobian, so the model's log density at a point must equal the
unshifted model's at the point's image (closed form below, written out from the
definition, not from the model's code). A centred factor's offsets are then
sampled as orthonormal (Helmert) contrasts and a non-centred mean,
``u = Q' [C; sd w]`` with ``Q`` orthogonal: the density gains ``log sd``
(the Jacobian of that map). Data: machines (Milliken and Johnson
1992), cbpp (Lesnoff et al. 2004) and oats (Yates 1935), tests/data/SOURCES.md.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import hierwork
from hierwork.model import paths
from hierwork.model.rowwise import build_model

DATA = Path(__file__).parent / "data"


def _plan(folder, data: str, outcome: str, predictors: str, groups: str):
    (folder / "d.csv").write_text((DATA / data).read_text())
    (folder / "spec.yaml").write_text(f"""format: hierwork/1
name: shift
data: d.csv
outcome: {outcome}
predictors: {predictors}
groups: {groups}
""", encoding="utf-8")
    return hierwork.check(folder / "spec.yaml").plan


def _function(model, names=None):
    """Log density (``names`` None) or the named variables, as a function of a point (no C build)."""
    out = model.logp() if names is None else model.replace_rvs_by_values([model[n] for n in names])
    fn = model.compile_fn(out, inputs=model.value_vars, point_fn=False, mode="FAST_COMPILE",
                          on_unused_input="ignore")
    if names is None:
        return lambda point: float(fn(*[point[v.name] for v in model.value_vars]))
    return lambda point: dict(zip(names, fn(*[point[v.name] for v in model.value_vars])))


def _unshifted_image(plan, effects_of, point):
    """The unshifted model's point with the same ``b`` and effects: ``b = b' - sum_f mean_j u_f``."""
    effects = effects_of(point)
    offset = np.zeros(plan.X.shape[1])
    for f in plan.factors:
        offset[list(f.varying_cols)] += effects[f"{f.name}__effect"].mean(axis=0)
    m = plan.X[:, 1:].mean(axis=0)
    slopes_shifted = np.asarray(point.get("b_shifted_slope", np.zeros(0)))
    slopes = slopes_shifted - offset[1:]
    intercept = point["b_shifted_intercept"] - slopes_shifted @ m - offset[0]  # b'_0 - o_0, b'_0 at x = 0
    image = {k: v for k, v in point.items() if not k.startswith("b_shifted") and "__contrast" not in k
             and "__mean_z" not in k}
    image["b_centred_intercept"] = intercept + slopes @ m
    if len(slopes):
        image["b_slope"] = slopes
    log_jacobian = 0.0
    for f in plan.factors:  # a centred factor: contrasts and a non-centred mean instead of the offsets
        if f"{f.name}__contrast" in point:
            assert f.varying == ("intercept",)  # offsets at centred x = in data units
            image[f"{f.name}__u"] = effects[f"{f.name}__effect"]
            log_jacobian += float(point[f"{f.name}__sd_log__"][0])  # u = Q'[C; sd w], Q orthogonal
    return image, np.concatenate([[intercept], slopes]), log_jacobian


CASES = {
    "machines normal, reduced": ("machines.csv", "{column: score, family: normal}", "[]",
                                 "{worker: {column: worker}, machine: {column: machine}}", True),
    "machines normal, per row": ("machines.csv", "{column: score, family: normal}", "[]",
                                 "{worker: {column: worker}, machine: {column: machine}}", False),
    "cbpp binomial": ("cbpp.csv", "{column: incidence, family: binomial, trials: size}", "[]",
                      "{herd: {column: herd}, period: {column: period}}", False),
    "oats varying slopes, one centred": (
        "oats.csv", "{column: yield, family: normal}", "[nitrogen_cwt]",
        "{block: {column: block, parameterisation: centred}, "
        "variety: {column: variety, varying: [intercept, nitrogen_cwt]}}", False),
}


@pytest.mark.parametrize("case", list(CASES))
def test_shifted_model_has_the_unshifted_log_density_at_the_sheared_point(tmp_path, case):
    data, outcome, predictors, groups, reduced = CASES[case]
    plan = _plan(tmp_path, data, outcome, predictors, groups)
    cols = paths.shifted_columns(plan)
    assert cols == tuple(sorted({c for f in plan.factors for c in f.varying_cols}))
    shifted, plain = build_model(plan, reduced=reduced), build_model(plan, reduced=reduced, shift=False)
    assert "b_shifted_intercept" in shifted.named_vars and "b_shifted_intercept" not in plain.named_vars
    effects_of = _function(shifted, [f"{f.name}__effect" for f in plan.factors])
    b_shifted, b_plain = _function(shifted, ["b"]), _function(plain, ["b"])
    logp_shifted, logp_plain = _function(shifted), _function(plain)
    rng = np.random.default_rng(3)
    start = shifted.initial_point()
    for _ in range(3):
        point = {k: v + rng.normal(0, 0.5, np.shape(v)) for k, v in start.items()}
        image, b, log_jacobian = _unshifted_image(plan, effects_of, point)
        np.testing.assert_allclose(b_shifted(point)["b"], b, rtol=1e-10, atol=1e-10)
        np.testing.assert_allclose(b_plain(image)["b"], b, rtol=1e-10, atol=1e-10)
        assert logp_shifted(point) == pytest.approx(logp_plain(image) + log_jacobian, rel=1e-10, abs=1e-8)
        # the check can fail: the same numbers taken unsheared give another density
        naive = {**image, "b_centred_intercept": point["b_shifted_intercept"]}
        assert abs(logp_plain(naive) - logp_plain(image)) > 1e-6


def test_semi_collapsed_path_shifts_its_one_sampled_factor(tmp_path):
    """Worker integrated out, machine sampled: machine is crossed with worker, so the intercept is shifted
    and machine's centred offsets are contrasts and a mean, the same density at the sheared point as the
    unshifted model (whose one centred factor is sampled as group coefficients ``b + u``)."""
    from hierwork.model import semi_collapsed

    plan = _plan(tmp_path, "machines.csv", "{column: score, family: normal}", "[]",
                 "{worker: {column: worker}, machine: {column: machine, parameterisation: centred}}")
    problem = semi_collapsed.semi_collapsed_problem(plan)
    assert problem.factor.name == "worker" and [f.name for f in problem.rest.factors] == ["machine"]
    shifted = semi_collapsed.build_semi_collapsed_model(plan, problem)
    plain = semi_collapsed.build_semi_collapsed_model(plan, problem, shift=False)
    assert "machine__contrast" in shifted.named_vars and "machine__coef" in plain.named_vars
    effects_of = _function(shifted, ["machine__effect"])
    logp_shifted, logp_plain = _function(shifted), _function(plain)
    rng = np.random.default_rng(4)
    start = shifted.initial_point()
    for _ in range(3):
        point = {k: v + rng.normal(0, 0.5, np.shape(v)) for k, v in start.items()}
        image, b, log_jacobian = _unshifted_image(problem.rest, effects_of, point)
        image["machine__coef"] = image.pop("machine__u") + b[0]
        assert logp_shifted(point) == pytest.approx(logp_plain(image) + log_jacobian, rel=1e-10, abs=1e-8)


def test_shift_applies_to_crossed_factors_only(tmp_path):
    """Nested (declared, or labels inside the other's groups) and single factors keep their coefficients."""
    crossed = _plan(tmp_path, "oats.csv", "{column: yield, family: normal}", "[nitrogen_cwt]",
                    "{block: {column: block}, variety: {column: variety, varying: [intercept, nitrogen_cwt]}}")
    assert paths.shifted_columns(crossed) == (0, 1)
    assert paths.shift_decision(crossed, "reduced")[0] == "population terms"
    assert paths.shift_decision(crossed, "collapsed") is None
    nested = _plan(tmp_path, "oats.csv", "{column: yield, family: normal}", "[nitrogen_cwt]",
                   "{block: {column: block}, variety: {column: variety, within: block}}")
    assert paths.shifted_columns(nested) == ()
    one = _plan(tmp_path, "oats.csv", "{column: yield, family: normal}", "[]", "{block: {column: block}}")
    assert paths.shifted_columns(one) == ()
    cbpp = pd.read_csv(DATA / "cbpp.csv")
    cbpp["herd_period"] = cbpp["herd"].astype(str) + ":" + cbpp["period"].astype(str)
    cbpp.to_csv(tmp_path / "c.csv", index=False)
    (tmp_path / "c.yaml").write_text("""format: hierwork/1
name: shift
data: c.csv
outcome: {column: incidence, family: binomial, trials: size}
groups: {herd: {column: herd}, cell: {column: herd_period}}
""", encoding="utf-8")
    labels_nested = hierwork.check(tmp_path / "c.yaml")  # herd_period inside herd: not declared, still nested
    assert paths.shifted_columns(labels_nested.plan) == ()
    assert "population terms" not in labels_nested.text()


def test_check_says_the_shift_and_why(tmp_path):
    plan_text = _plan(tmp_path, "machines.csv", "{column: score, family: normal}", "[]",
                      "{worker: {column: worker}, machine: {column: machine}}")
    # semi-collapsed (auto): worker integrated out, machine sampled and crossed with it, so shifted too;
    # the reduced path samples both
    for path in ("auto", "reduced"):
        report = hierwork.check(tmp_path / "spec.yaml", {"sampling.path": path})
        line = [x for x in report.text().splitlines() if "population terms" in x]
        assert len(line) == 1 and "worker and machine are crossed" in line[0] and "(intercept)" in line[0]
    assert report.path == "reduced" and hierwork.check(tmp_path / "spec.yaml").path == "semi_collapsed"
    report = hierwork.check(tmp_path / "spec.yaml")
    line = [x for x in report.text().splitlines() if "population terms" in x]
    assert len(line) == 1 and "worker and machine are crossed" in line[0] and "(intercept)" in line[0]
    assert report.to_dict()["shifted_terms"] == ["intercept"] and plan_text.terms == ("intercept",)
