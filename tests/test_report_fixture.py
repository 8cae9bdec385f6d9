"""A small real run folder, written by ``hierwork fit``, for the report, compare and browser tests.

Two short chains of a varying-intercept normal model of invented plot yields,
so the report is tested on a genuine run folder: every gate check, every file,
genuine posterior draws. One group label is ``<script>alert(1)</script>`` and
others carry ``&`` and ``$`` so that every rendering path is exercised on
hostile text. ``build_run`` writes each variant once per session.
"""
from __future__ import annotations

import json
import shutil
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

pytestmark = pytest.mark.slow  # the tests here fit models (MCMC) or render fitted run folders

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


def build_run(root: Path, *, failing: bool = False, shift: float = 0.0,
              with_ppc: bool = True, farm_sd_prior: float | None = None) -> Path:
    """A real run folder written by ``hierwork.fit`` under ``root``; its path.

    ``failing`` tightens the gate so that a genuine check fails (the bulk ESS
    minimum); ``shift`` adds a constant to the group estimates afterwards, so
    that a compare test knows exactly which estimates moved and by how much;
    ``with_ppc`` False removes the posterior predictive draws from posterior.nc;
    ``farm_sd_prior`` sets the prior of ``farm.sd`` to a half-normal of that scale
    (everything else as in the default run).
    """
    import hierwork

    run = root / ("run-failing" if failing else f"run-{shift:g}") / ("" if with_ppc else "no-ppc")
    if farm_sd_prior is not None:
        run = root / f"run-prior-{farm_sd_prior:g}"
    if (run / "provenance.json").is_file():
        return run
    data_path = root / "plots.csv"
    if not data_path.is_file():
        _data().to_csv(data_path, index=False)
    spec_path = root / ("plot yield.yaml" if farm_sd_prior is None else f"prior {farm_sd_prior:g}.yaml")
    text = SPEC_TEXT.format(data=data_path, r_hat_max=1.05, ess_bulk_min=100)
    if farm_sd_prior is not None:
        text += f"priors:\n  farm.sd: {{half_normal: {{sigma: {farm_sd_prior:g}}}}}\n"
    spec_path.write_text(text)
    overrides = {"gate.r_hat_max": 1.0, "gate.ess_bulk_min": 100000} if failing else None
    hierwork.fit(spec_path, out=run, force=True, overrides=overrides, progress=False)
    if shift:
        table = pd.read_csv(run / "group_estimates.csv", keep_default_na=False, na_values=[""],
                            dtype={"group": str})
        table[["no_pooling", "partial_mean", "lower", "upper"]] += shift
        table.to_csv(run / "group_estimates.csv", index=False)
    if not with_ppc:
        import arviz as az

        idata = az.from_netcdf(run / "posterior.nc")
        idata.load()
        del idata.posterior_predictive
        (run / "posterior.nc").unlink()
        idata.to_netcdf(run / "posterior.nc")
    return run


@pytest.fixture(scope="session")
def run_root(tmp_path_factory):
    return tmp_path_factory.mktemp("runs")


def copy_run(run: Path, dest: Path) -> Path:
    """A private copy of ``run`` that a test may modify."""
    shutil.copytree(run, dest)
    return dest


def test_fixture_run_follows_the_contract(run_root):
    # Source: docs/contracts.md, "Run folder" table and column lists.
    run = build_run(run_root)
    for name in ("posterior.nc", "diagnostics.json", "group_estimates.csv", "summary.csv",
                 "spec.yaml", "provenance.json"):
        assert (run / name).is_file(), name
    table = pd.read_csv(run / "group_estimates.csv", keep_default_na=False)
    for column in ("factor", "group", "term", "no_pooling", "complete_pooling", "partial_mean",
                   "partial_sd", "lower", "upper"):
        assert column in table.columns, column
    assert HOSTILE in set(table["group"])
    assert json.loads((run / "diagnostics.json").read_text())["passed"] is True


def test_failing_fixture_run_fails_the_bulk_ess_check(run_root):
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


def test_page_parser_reports_unbalanced_markup():
    assert Page("<main><p>a</p></main>").errors == []
    assert Page("<main><p>a</main>").errors
