"""The ordinal family's data handling and closed forms (no sampling; the contract suite is in test_families.py).

Closed forms: the cumulative logit, ``P(y > k) = expit(eta - c_k)`` (McCullagh 1980, J. Royal Statistical
Society B 42, 109-142), written out with scipy.special.expit.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import yaml
from scipy.special import expit

import hierwork
from hierwork.errors import HierworkError, SpecError
from hierwork.plan.families import get_family
from hierwork.plan.families.base import OutcomeRows

ORDINAL = get_family("ordinal")


def _spec(tmp_path, ratings, outcome_extra=None, family="ordinal"):
    frame = pd.DataFrame({"depot": np.repeat(["north", "south", "east"], len(ratings) // 3 + 1)[: len(ratings)],
                          "rating": ratings})
    frame.to_csv(tmp_path / "d.csv", index=False)
    spec = {"format": "hierwork/1", "name": "ratings", "data": "d.csv",
            "outcome": {"column": "rating", "family": family, **(outcome_extra or {})},
            "groups": {"depot": {"column": "depot"}}}
    (tmp_path / "spec.yaml").write_text(yaml.safe_dump(spec))
    return tmp_path / "spec.yaml"


def test_labels_become_positions_in_the_order_of_levels(tmp_path):
    ratings = ["high", "low", "mid", "mid", "high", "low", "high", "mid", "low"]
    plan = hierwork.check(_spec(tmp_path, ratings, {"levels": ["low", "mid", "high"]})).plan
    assert plan.outcome.levels == ("low", "mid", "high")
    np.testing.assert_array_equal(plan.outcome.y, [3, 1, 2, 2, 3, 1, 3, 2, 1])
    assert ORDINAL.vector_parameters(plan.outcome) == {"cutpoints": ("cutpoint", ("mid|high",))}
    assert "cutpoints.gap[mid|high]" in plan.priors


def test_whole_number_scores_take_every_level_between_the_extremes(tmp_path):
    # No row scores 3: it is still a level (between 2 and 4), so four levels and two free cut-points.
    plan = hierwork.check(_spec(tmp_path, [1, 2, 4, 4, 2, 1, 1, 2, 4])).plan
    assert plan.outcome.levels == ("1", "2", "3", "4")
    assert ORDINAL.vector_parameters(plan.outcome)["cutpoints"][1] == ("2|3", "3|4")
    # The default prior centres each gap on the observed shares with half a row added to each level:
    # cumulative shares (3.5, 7, 7.5) / 11, so the first gap is logit(7/11) - logit(3.5/11).
    gap = plan.priors["cutpoints.gap[2|3]"]
    assert gap.dist == "lognormal"
    logit = lambda p: np.log(p / (1 - p))  # noqa: E731
    np.testing.assert_allclose(np.exp(gap.params["mu"]), logit(7 / 11) - logit(3.5 / 11), rtol=1e-12)


def test_two_levels_have_no_free_cut_point(tmp_path):
    plan = hierwork.check(_spec(tmp_path, ["no", "yes", "yes", "no", "no", "yes"], {"levels": ["no", "yes"]})).plan
    assert ORDINAL.parameters(plan.outcome) == ()
    assert not [p for p in plan.priors if p.startswith("cutpoints")]


@pytest.mark.parametrize("extra, family, message", [
    ({"levels": ["low"]}, "ordinal", "two or more different levels"),
    ({"levels": ["low", "low"]}, "ordinal", "two or more different levels"),
    ({"levels": ["low", "high"]}, "poisson", "'levels' does not apply to family 'poisson'"),
])
def test_levels_are_checked(tmp_path, extra, family, message):
    with pytest.raises(SpecError, match=message):
        hierwork.check(_spec(tmp_path, [1, 2, 1, 2, 1, 2], extra, family))


def test_one_observed_score_without_levels_is_refused(tmp_path):
    with pytest.raises(HierworkError, match="holds only the score 3"):
        hierwork.check(_spec(tmp_path, [3, 3, 3, 3, 3, 3]))


def test_probabilities_and_expected_score_closed_form():
    eta, params = np.array([0.3, -1.1]), {"cutpoints": np.array([1.2, 2.0])}
    p = ORDINAL.level_probabilities(eta, params)
    e = eta[:, None]
    expected = np.column_stack([1 - expit(e[:, 0]), expit(e[:, 0]) - expit(e[:, 0] - 1.2),
                                expit(e[:, 0] - 1.2) - expit(e[:, 0] - 2.0), expit(e[:, 0] - 2.0)])
    np.testing.assert_allclose(p, expected, rtol=1e-12)
    np.testing.assert_allclose(ORDINAL.mean(eta, params), expected @ [1, 2, 3, 4], rtol=1e-12)
    rows = OutcomeRows(np.array([2.0, 4.0]), levels=("1", "2", "3", "4"))
    np.testing.assert_allclose(ORDINAL.log_density(rows.y, eta, rows, params),
                               np.log([expected[0, 1], expected[1, 3]]), rtol=1e-12)


def test_baselines_are_statsmodels_ordered_model_fits(tmp_path):
    # Complete pooling: one cumulative logit for all rows; no pooling: one intercept per group. Both are
    # statsmodels' OrderedModel (distr='logit') maximum-likelihood fits, whose thresholds t_k give ours as
    # intercept -t_1 (our first cut-point is 0) plus the group's coefficient.
    from statsmodels.miscmodels.ordinal_model import OrderedModel

    from hierwork.results.baselines import baselines

    rng = np.random.default_rng(7)
    depot = np.repeat(["north", "south", "east"], [40, 60, 80])
    eta = np.select([depot == "south", depot == "east"], [0.5, -0.4], 0.0) + 0.3
    ratings = 1 + (rng.random(depot.size)[:, None] < expit(eta[:, None] - [0.0, 1.1, 2.3])).sum(axis=1)
    spec = _spec(tmp_path, list(ratings), {"levels": [1, 2, 3, 4]})
    frame = pd.read_csv(tmp_path / "d.csv").assign(depot=depot)
    frame.to_csv(tmp_path / "d.csv", index=False)
    table = baselines(hierwork.check(spec).plan).set_index("group")

    pooled = OrderedModel(frame["rating"], np.zeros((len(frame), 0)), distr="logit").fit(method="newton", disp=0)
    np.testing.assert_allclose(table["complete_pooling"], -pooled.params.iloc[0], atol=1e-5)
    dummies = pd.get_dummies(frame["depot"], dtype=float)[["north", "south"]]   # 'east' the reference
    separate = OrderedModel(frame["rating"], dummies, distr="logit").fit(method="newton", disp=0)
    east = -separate.params.iloc[2]
    np.testing.assert_allclose(table.loc[["east", "north", "south"], "no_pooling"],
                               [east, east + separate.params["north"], east + separate.params["south"]], atol=1e-4)
