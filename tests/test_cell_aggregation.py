"""Exact cell aggregation of counts and proportions (the reduced path for bernoulli, binomial, poisson).

Rows with identical predictors and groups share their linear predictor, so a
sum of bernoulli/binomial rows is binomial in the summed trials and a sum of
Poisson rows is Poisson with the summed exposure (closed forms of sums of
independent binomials with one p and Poissons with one rate). The log density
of the cell model must therefore differ from the per-row model's by a constant
that the closed form gives: the binomial coefficients, or the exposure and
factorial terms. Data: cbpp (Lesnoff et al. 2004; tests/data/SOURCES.md),
expanded to one 0/1 row per animal for the bernoulli case.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import special

import hierwork
from hierwork.model import paths
from hierwork.model.cells import row_cells
from hierwork.model.rowwise import build_model

DATA = Path(__file__).parent / "data"


def _plan(folder, data, outcome, predictors):
    data.to_csv(folder / "d.csv", index=False)
    (folder / "spec.yaml").write_text(f"""format: hierwork/1
name: cells
data: d.csv
outcome: {outcome}
predictors: {predictors}
groups: {{herd: {{column: herd}}}}
""", encoding="utf-8")
    return hierwork.check(folder / "spec.yaml").plan


def _logp_at(model, points):
    fn = model.compile_fn(model.logp(), inputs=model.value_vars, point_fn=False, mode="FAST_COMPILE")  # no C build
    return np.array([fn(*[p[v.name] for v in model.value_vars]) for p in points])


def _points(model, k=3, seed=5):
    rng = np.random.default_rng(seed)
    start = model.initial_point()
    return [{name: value + rng.normal(0, 0.3, np.shape(value)) for name, value in start.items()} for _ in range(k)]


def _bernoulli_rows():
    cbpp = pd.read_csv(DATA / "cbpp.csv")
    rows = [(h, p, int(i < c)) for h, p, c, n in cbpp[["herd", "period", "incidence", "size"]].itertuples(index=False)
            for i in range(n)]
    return pd.DataFrame(rows, columns=["herd", "period", "sick"])


def test_bernoulli_cells_equal_the_per_row_model_up_to_the_binomial_coefficients(tmp_path):
    plan = _plan(tmp_path, _bernoulli_rows(), "{column: sick, family: bernoulli}", "[{column: period, type: categorical}]")
    assert paths.best_path(plan)[0] == "reduced"
    cells = row_cells(plan.X, [f.index for f in plan.factors])
    assert cells.n_cells == 56 < plan.n  # one cell per herd and period, as in the binomial table
    per_row, per_cell = build_model(plan), build_model(plan, reduced=True)
    points = _points(per_row)
    diff = _logp_at(per_cell, points) - _logp_at(per_row, points)
    y = np.bincount(cells.cell, plan.y)
    n = np.bincount(cells.cell)
    log_choose = special.gammaln(n + 1) - special.gammaln(y + 1) - special.gammaln(n - y + 1)
    np.testing.assert_allclose(diff, log_choose.sum(), rtol=1e-9)


def test_poisson_cells_with_exposure_equal_the_per_row_model_up_to_a_constant(tmp_path):
    cbpp = pd.read_csv(DATA / "cbpp.csv")
    plan = _plan(tmp_path, cbpp, "{column: incidence, family: poisson, exposure: size}", "[]")
    assert paths.best_path(plan)[0] == "reduced"
    cells = row_cells(plan.X, [f.index for f in plan.factors])
    assert cells.n_cells == 15  # one cell per herd
    per_row, per_cell = build_model(plan), build_model(plan, reduced=True)
    points = _points(per_row)
    diff = _logp_at(per_cell, points) - _logp_at(per_row, points)
    y, e = plan.y, plan.exposure
    Y, E = np.bincount(cells.cell, y), np.bincount(cells.cell, e)
    expected = (Y * np.log(E) - special.gammaln(Y + 1)).sum() - (y * np.log(e) - special.gammaln(y + 1)).sum()
    np.testing.assert_allclose(diff, expected, rtol=1e-9)


def test_no_exact_cells_for_a_family_with_its_own_parameter(tmp_path):
    cbpp = pd.read_csv(DATA / "cbpp.csv")
    plan = _plan(tmp_path, cbpp, "{column: incidence, family: negative_binomial, exposure: size}", "[]")
    path, reason = paths.best_path(plan)
    assert path == "plain" and "no exact cell form" in reason


@pytest.mark.parametrize("codes", [[np.array([0, 1, 0, 1, 0])], [np.array([0, 0, 0, 0, 0]), np.array([1, 1, 2, 2, 1])]])
def test_row_cells_group_identical_rows(codes):
    X = np.array([[1, 0.5], [1, 0.5], [1, 0.5], [1, 0.5], [1, 0.25]])
    cells = row_cells(X, codes)
    key = [tuple(X[i]) + tuple(c[i] for c in codes) for i in range(5)]
    for i in range(5):
        for j in range(5):
            assert (cells.cell[i] == cells.cell[j]) == (key[i] == key[j])
    assert all(cells.cell[cells.first] == np.arange(cells.n_cells))
