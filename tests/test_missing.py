"""``missing: drop``: rows with a gap in a used column are removed, counted and recorded.

Reference: the same file with those rows removed by hand. The model is a function
of the plan alone, so identical plan arrays (design, outcome, group indices and
labels, data-scaled priors) mean an identical fit for the same seed; the slow test
fits once and checks that the run folder and the report record the removal.
Data: oats split-plot yields (Yates 1935; tests/data/SOURCES.md).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import hierwork
from conftest import DATA, write_spec

SPEC = """
format: hierwork/1
name: oats
data: {data}
missing: {missing}
outcome: {{column: yield}}
predictors: [nitrogen_cwt, variety]
groups:
  block: {{}}
sampling: {{chains: 2, warmup: 200, draws: 200, seed: 5}}
"""
#: (row position, column) of the gaps punched into the file.
GAPS = [(3, "yield"), (10, "nitrogen_cwt"), (10, "yield"), (40, "variety"), (41, "block")]


@pytest.fixture(scope="module")
def pair(tmp_path_factory):
    """Specs of the gappy file with ``missing: drop`` and of the file with those rows removed by hand."""
    folder = tmp_path_factory.mktemp("missing")
    table = pd.read_csv(DATA / "oats.csv")
    gappy = table.astype(object).copy()
    for row, column in GAPS:
        gappy.loc[row, column] = None
    gappy.to_csv(folder / "gappy.csv", index=False)
    table.drop(index=sorted({r for r, _ in GAPS})).to_csv(folder / "by_hand.csv", index=False)
    return (write_spec(folder, SPEC.format(data="gappy.csv", missing="drop"), "drop.yaml"),
            write_spec(folder, SPEC.format(data="by_hand.csv", missing="error"), "hand.yaml"))


def test_drop_gives_the_plan_of_the_rows_removed_by_hand(pair):
    dropped, by_hand = (hierwork.check(p).plan for p in pair)
    assert dropped.n == by_hand.n == 72 - 4
    np.testing.assert_array_equal(dropped.X, by_hand.X)
    np.testing.assert_array_equal(dropped.y, by_hand.y)
    np.testing.assert_array_equal(dropped.factors[0].index, by_hand.factors[0].index)
    assert dropped.factors[0].levels == by_hand.factors[0].levels
    assert {k: p.to_dict() for k, p in dropped.priors.items()} == {k: p.to_dict() for k, p in by_hand.priors.items()}
    assert dropped.missing == {"policy": "drop", "rows_read": 72, "rows_removed": 4,
                               "by_column": {"yield": 2, "nitrogen_cwt": 1, "variety": 1, "block": 1}}


def test_check_and_plan_json_report_the_rows_removed(pair):
    report = hierwork.check(pair[0])
    assert "4 of 72 rows removed for missing values" in report.text()
    assert "yield 2, nitrogen_cwt 1, variety 1, block 1" in report.text()
    assert report.to_dict()["missing"]["rows_removed"] == 4
    assert "rows removed" not in hierwork.check(pair[1]).text()


def test_error_is_still_the_default(pair, tmp_path):
    from hierwork.errors import DataError

    spec = write_spec(tmp_path, SPEC.format(data=pair[0].parent / "gappy.csv", missing="error"))
    with pytest.raises(DataError, match="column 'yield' has missing values in 2 rows"):
        hierwork.check(spec)


def test_drop_refuses_a_file_with_no_complete_row(tmp_path):
    from hierwork.errors import DataError

    pd.DataFrame({"block": ["a", "b", None], "yield": [None, None, 3.0], "nitrogen_cwt": [0.1, 0.2, 0.3],
                  "variety": ["x", "y", "x"]}).to_csv(tmp_path / "empty.csv", index=False)
    spec = write_spec(tmp_path, SPEC.format(data="empty.csv", missing="drop"))
    with pytest.raises(DataError, match="every row has a missing value"):
        hierwork.check(spec)


@pytest.mark.slow
def test_a_fit_with_drop_records_the_rows_removed(pair, tmp_path):
    run = hierwork.fit(pair[0], out=tmp_path / "run", overrides={"sampling.warmup": 100, "sampling.draws": 100})
    assert run.plan["missing"]["rows_removed"] == 4
    assert run.posterior.observed_data.sizes[next(iter(run.posterior.observed_data.sizes))] == 68
    assert "4 of 72 rows removed for missing values" in (run.path / "report.html").read_text()
    assert "4 of 72 rows removed for missing values" in (run.path / "summary.md").read_text()
