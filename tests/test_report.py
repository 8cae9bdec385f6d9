"""report.html and summary.md rendered from a run folder (docs/contracts.md layout)."""
from __future__ import annotations

import base64
import hashlib
import json
import re

import numpy as np
import pandas as pd
import pytest

from hierwork.errors import RunFolderError
from hierwork.report.publish import render_report, write_report
from hierwork.report import diagnostic_figures, estimate_figures
from hierwork.report.plotting import Scale
from hierwork.report.markdown import md_escape
from hierwork.formatting import number as fmt
from hierwork.report.verdict import CheckLine
from test_report_fixture import HOSTILE, Page, build_run, copy_run, run_root  # noqa: F401

pytestmark = pytest.mark.slow  # the tests here fit models (MCMC) or render fitted run folders


@pytest.fixture(scope="module")
def passing(run_root):
    run = build_run(run_root)
    return run, render_report(run)


@pytest.fixture(scope="module")
def failing(run_root):
    run = build_run(run_root, failing=True)
    return run, render_report(run)


def _text(html: str) -> str:
    """Visible text of a page, whitespace collapsed."""
    return Page(html).find("body")[0][2]


# --- escaping -----------------------------------------------------------------------

def test_hostile_group_label_and_title_show_as_text(passing):
    run, html = passing
    assert "<script>alert(1)" not in html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert "<b>bold?</b>" not in html and "&lt;b&gt;bold?&lt;/b&gt;" in html
    page = Page(html)
    # Exactly one script element: the page's own sorting script.
    scripts = page.find("script")
    assert len(scripts) == 1 and "alert" not in scripts[0][2]
    cells = [text for _, _, text in page.find("td", **{"class": "label"})]
    assert HOSTILE in cells and "Hill & Dale" in cells and "$5 acre" in cells


def test_markup_is_balanced(passing, failing):
    for _, html in (passing, failing):
        assert Page(html).errors == []


def test_markdown_escape_shows_markup_literally():
    # CommonMark 0.31, section 2.4: any ASCII punctuation may be backslash-escaped.
    assert md_escape(HOSTILE) == "&lt;script&gt;alert(1)&lt;/script&gt;"
    assert md_escape("a|b_c*d") == r"a\|b\_c\*d"
    assert md_escape("line\nbreak") == "line break"


def test_summary_md_escapes_group_labels(run_root):
    run = build_run(run_root)
    write_report(run)
    text = (run / "summary.md").read_text()
    assert "<script>" not in text and "&lt;script&gt;alert(1)&lt;/script&gt;" in text
    assert "Hill &amp; Dale" in text and r"\$5 acre" in text


# --- self-contained -----------------------------------------------------------------

def test_page_requests_nothing_from_elsewhere(passing):
    _, html = passing
    page = Page(html)
    for tag, attrs, _ in page.elements:
        for name in ("src", "href", "action", "data", "poster"):
            value = attrs.get(name)
            if value is not None:
                assert not re.match(r"(?i)\s*(https?:|//|ftp:)", value), (tag, name, value)
                if name == "src":
                    assert value.startswith("data:image/svg+xml;base64,"), tag
    assert not page.find("link") and not page.find("iframe")
    assert "@import" not in html and "url(" not in html


def test_content_security_policy_allows_exactly_the_inline_style_and_script(passing):
    # CSP Level 3 (W3C), "hash-source": base64 of the SHA-256 of the element's text.
    _, html = passing
    page = Page(html)
    policy = page.find("meta", **{"http-equiv": "Content-Security-Policy"})[0][1]["content"]
    assert "default-src 'none'" in policy and "img-src data:" in policy
    for tag, directive in (("style", "style-src"), ("script", "script-src")):
        body = re.search(rf"<{tag}>(.*?)</{tag}>", html, re.S).group(1)
        digest = base64.b64encode(hashlib.sha256(body.encode()).digest()).decode()
        assert f"{directive} 'sha256-{digest}'" in policy


def test_figures_embed_svg_without_scripts_and_have_text_alternatives(passing):
    _, html = passing
    page = Page(html)
    images = page.find("img")
    assert len(images) == 6  # sorted estimates, pooling, traces, energy, divergences, ppc (no funnel: normal)
    for _, attrs, _ in images:
        assert len(attrs["alt"]) > 40
        svg = base64.b64decode(attrs["src"].split(",", 1)[1]).decode()
        assert svg.lstrip().startswith("<?xml") and "<script" not in svg
    figures_ = page.find("figure")
    assert len(figures_) == len(images)
    assert len(page.find("figcaption")) == len(images)


# --- content and order --------------------------------------------------------------

def test_sections_come_in_the_promised_order(passing):
    _, html = passing
    ids = [a.get("id") for t, a, _ in Page(html).elements if t == "section"]
    assert ids == ["verdict", "standout", "estimates", "pooling", "diagnostics", "sensitivity", "fit", "provenance",
                   "caution"]


def test_passing_verdict_and_no_not_for_use_marks(passing):
    _, html = passing
    verdict = Page(html).find("section", id="verdict")[0]
    assert "passed" in verdict[1]["class"]
    assert "Gate passed: all 6 convergence checks met their limits." in verdict[2]
    page = Page(html)
    assert "NOT FOR USE" not in _text(html) and "do not use" not in _text(html)
    assert not [a for t, a, _ in page.elements if "not-for-use" in a.get("class", "")]
    for _, attrs, _ in page.find("img"):
        assert "NOT FOR USE" not in base64.b64decode(attrs["src"].split(",", 1)[1]).decode()


def test_failing_verdict_names_check_value_limit_parameter_and_advice(failing):
    run, html = failing
    diagnostics = json.loads((run / "diagnostics.json").read_text())
    check = next(c for c in diagnostics["checks"] if c["name"] == "ess_bulk")
    verdict = Page(html).find("section", id="verdict")[0][2]
    assert verdict.startswith("Verdict \u2716 Gate failed (")
    assert (f"Bulk ESS {round(check['value'])} on {check['worst_parameter']}: must be at least "
            f"100,000; short of the limit by {fmt(round(100000 - check['value']))}") in verdict
    assert all(advice in verdict for advice in diagnostics["advice"]) and diagnostics["advice"]
    assert "do not use them" in verdict
    # Estimates and pooling sections are marked, and every figure is stamped.
    page = Page(html)
    for key in ("standout", "estimates", "pooling"):
        section = page.find("section", id=key)[0]
        assert "not-for-use" in section[1]["class"]
        assert "GATE FAILED \u2013 NOT FOR USE" in section[2]
    for _, attrs, _ in page.find("img"):
        svg = base64.b64decode(attrs["src"].split(",", 1)[1]).decode()
        assert "GATE FAILED \u2013 NOT FOR USE" in svg


def test_gate_breaches_are_flagged_in_the_parameter_table(failing):
    run, html = failing
    summary = pd.read_csv(run / "summary.csv")
    page = Page(html)
    flagged = page.find("td", **{"class": "bad"})
    # Every bulk ESS is below the failing run's minimum of 100 000.
    assert sum("fails the gate" in text for _, _, text in flagged) >= len(summary)


def test_group_table_lists_every_group_with_its_csv_values(passing):
    run, html = passing
    table = pd.read_csv(run / "group_estimates.csv", keep_default_na=False)
    text = _text(html)
    for row in table.itertuples():
        assert (f"{row.group} {row.rows} {fmt(row.outcome_mean)} {fmt(row.outcome_lower)} {fmt(row.outcome_upper)} "
                f"{fmt(row.no_pooling_outcome)} {fmt(row.pooling_weight, 2)}") in text


def test_pooling_section_shows_the_recorded_pooling_factor(passing):
    run, html = passing
    value = pd.read_csv(run / "pooling.csv")["pooling_factor"].iloc[0]
    section = Page(html).find("section", id="pooling")[0][2]
    assert f"Pooling factor \u03bb = {fmt(value, 2)}" in section
    assert "Gelman and Pardoe 2006" in section


def test_pooling_alt_text_reports_smallest_and_largest_group(passing):
    run, html = passing
    table = pd.read_csv(run / "group_estimates.csv", keep_default_na=False).sort_values("rows")
    page = Page(html)
    assert page.find("figure", id="pooling-farm-intercept")
    img = [a for t, a, _ in page.elements if t == "img" and a["alt"].startswith("Pooling plot")][0]
    small, large = table.iloc[0], table.iloc[-1]
    assert (f"{small.group} ({small.rows} rows) moved from {fmt(small.no_pooling_outcome)} on its own "
            f"data to {fmt(small.outcome_mean)}") in img["alt"]
    assert f"{large.group} ({large.rows} rows)" in img["alt"]


def test_provenance_and_caution_are_present(passing):
    run, html = passing
    provenance = json.loads((run / "provenance.json").read_text())
    text = _text(html)
    assert provenance["data_sha256"] in text and provenance["reproduce"] in text
    assert (run / "spec.yaml").read_text().splitlines()[1] in html
    caution = Page(html).find("section", id="caution")[0][2]
    assert "qualified analyst" in caution and "health or safety" in caution


def test_provenance_lists_overrides_as_key_value(failing):
    # The failing fixture is fitted with overrides of two gate keys (test_report_fixture.build_run).
    provenance = Page(failing[1]).find("section", id="provenance")[0][2]
    assert "gate.r_hat_max = 1.0; gate.ess_bulk_min = 100000" in provenance


def test_failed_check_plots_its_worst_parameter(failing):
    run, html = failing
    diagnostics = json.loads((run / "diagnostics.json").read_text())
    worst = next(c["worst_parameter"] for c in diagnostics["checks"] if c["name"] == "ess_bulk")
    assert "__" not in worst
    figure = [a for _, a, _ in Page(html).find("img") if worst in a.get("alt", "")]
    assert figure, worst
    assert "What failed: the worst parameters" in _text(html)


def test_fit_section_shows_pareto_k_rows_and_calibration(run_root, tmp_path):
    # loo.json and calibration.json as hierwork.results writes them (docs/predictive.md); two rows of
    # the run are given a Pareto k above 0.7 so that the report must name them.
    run = copy_run(build_run(run_root), tmp_path / "high-k")
    loo = json.loads((run / "loo.json").read_text())
    record = loo["models"]["partial_pooling"]
    record.update({"pareto_k_above_0.7": 2, "pareto_k_max": 0.91, "pareto_k_high_rows": [
        {"row": 16, "pareto_k": 0.91, "outcome": 7.25, "groups": {"farm": "north_02"}},
        {"row": 3, "pareto_k": 0.74, "outcome": 2.5, "groups": {"farm": "Hill & Dale"}}]})
    (run / "loo.json").write_text(json.dumps(loo))
    html = render_report(run)
    fit = Page(html).find("section", id="fit")[0][2]
    assert "2 of " in fit and "Pareto k above 0.7" in fit
    assert "row 17 (farm north_02, outcome 7.25, k = 0.91)" in fit and "row 4 (farm Hill & Dale" in fit
    calibration = json.loads((run / "calibration.json").read_text())
    level = calibration["levels"][0]
    worst = level["by_factor"]["farm"]["worst_group"]
    assert f"inside the {level['nominal']:.0%} interval" in fit and worst in fit
    write_report(run)
    summary = (run / "summary.md").read_text()
    assert "row 17 (farm north\\_02" in summary and "Calibration of the predictive intervals" in summary
    assert "Not stored" not in html


def test_missing_files_are_named_and_the_rest_still_renders(run_root, tmp_path):
    run = copy_run(build_run(run_root), tmp_path / "partial")
    for name in ("posterior.nc", "pooling.csv", "summary.csv"):
        (run / name).unlink()
    html = render_report(run)
    text = _text(html)
    assert "Missing from this run folder: posterior.nc, summary.csv." in text
    assert "posterior.nc is missing: no diagnostic figures." in text
    assert "Pooling factor not recorded (pooling.csv is missing)." in text
    assert "No posterior predictive draws were stored" in text
    assert len(Page(html).find("img")) == 2  # the sorted estimates and the pooling plot need only the CSV


def test_run_without_diagnostics_is_marked_unchecked(run_root, tmp_path):
    run = copy_run(build_run(run_root), tmp_path / "unchecked")
    (run / "diagnostics.json").unlink()
    verdict = Page(render_report(run)).find("section", id="verdict")[0]
    assert "unknown" in verdict[1]["class"]
    assert "Gate not evaluated" in verdict[2]


# --- writing ------------------------------------------------------------------------

def test_write_report_replaces_files_atomically(run_root, tmp_path):
    run = copy_run(build_run(run_root), tmp_path / "rewrite")
    written = write_report(run)
    assert set(written.paths) == {"report.html", "summary.md", "figures"}
    figures = sorted(p.name for p in (run / "figures").iterdir())
    ids = [a["id"] for t, a, _ in Page((run / "report.html").read_text()).elements if t == "figure"]
    assert figures == sorted([f"{i}.png" for i in ids] + [f"{i}.svg" for i in ids])
    first = (run / "report.html").read_text()
    (run / "diagnostics.json").write_text("{not json")
    with pytest.raises(RunFolderError, match=re.escape("diagnostics.json is not valid JSON")):
        write_report(run)
    assert (run / "report.html").read_text() == first
    assert sorted(p.name for p in run.iterdir() if p.name.startswith(".")) == []


def test_not_a_run_folder_is_a_clear_error(tmp_path):
    with pytest.raises(RunFolderError, match=re.escape("run folder not found")):
        render_report(tmp_path / "nowhere")
    with pytest.raises(RunFolderError, match=re.escape("not a run folder (none of")):
        render_report(tmp_path)


# --- pieces -------------------------------------------------------------------------

def test_check_line_states_the_miss():
    low = CheckLine("ess_bulk", "Bulk ESS", 212.0, 400.0, ">=", "farm__sd[intercept]", False)
    assert low.sentence() == ("Bulk ESS 212 on farm__sd[intercept]: must be at least 400; "
                              "short of the limit by 188 (47% short)")
    high = CheckLine("r_hat", "R-hat", 1.05, 1.01, "<=", "b[intercept]", False)
    assert high.sentence() == "R-hat 1.05 on b[intercept]: must be at most 1.01; over the limit by 0.04"


def test_fmt_keeps_four_significant_digits():
    assert [fmt(v) for v in (4.12345, 0.012345, 1234.0, 123456.7, 0.00012, -8.858e-4, 3e-6, float("nan"), None)] \
        == ["4.123", "0.01235", "1234", "123,457", "0.00012", "-0.0008858", "3.000e-06", "-", "-"]


def test_thousands_of_groups_draw_a_capped_scatter():
    rng = np.random.default_rng(3)
    n = rng.integers(1, 50, 5000)
    own = rng.uniform(0.01, 0.3, 5000)
    rows = pd.DataFrame({"factor": "depot", "group": [f"d{i}" for i in range(5000)],
                         "term": "intercept", "rows": n, "no_pooling_outcome": own,
                         "complete_pooling_outcome": 0.1, "outcome_mean": (own * n + 0.5) / (n + 5),
                         "outcome_lower": own / 2, "outcome_upper": own * 1.5,
                         "p_above_population": rng.uniform(0, 1, 5000)})
    scale = Scale("probability", "probability of late")
    plot = estimate_figures.pooling_plot(rows, "depot", "intercept", scale, 0.94)
    assert "Drawn: 3000 of 5000 groups" in plot.caption
    assert "probability of late (%)" in plot.svg
    assert "5000 groups" in plot.alt
    ranked = estimate_figures.ranked_plot(rows, "depot", "intercept", scale, 0.94,
                                          {"mean": 0.1, "lower": 0.09, "upper": 0.11})
    assert "Drawn: 3000 of 5000 groups" in ranked.caption and "highest estimate first" in ranked.svg


def test_count_outcome_ppc_compares_shares_per_value():
    import arviz as az

    rng = np.random.default_rng(5)
    observed = rng.poisson(2.0, 80)
    idata = az.from_dict(posterior={"b": rng.normal(size=(2, 50, 1))},
                         posterior_predictive={"defects": rng.poisson(2.0, (2, 50, 80))},
                         observed_data={"defects": observed})
    plot = diagnostic_figures.ppc_plot(idata, outcome="defects")
    assert plot.alt == ("Posterior predictive check of defects: the share of rows at each value "
                        "of defects in the 80 observed rows drawn over 40 data sets replicated from the "
                        "posterior.")
    assert ">defects<" in plot.svg  # the axis is labelled with the outcome column
    assert diagnostic_figures.ppc_plot(az.from_dict(posterior={"b": rng.normal(size=(2, 50))})) is None


def test_hyperparameters_follow_the_posterior_naming_contract():
    # docs/contracts.md, "Names inside posterior.nc"; shown by the names of README, "Parameter names".
    import arviz as az

    rng = np.random.default_rng(6)
    idata = az.from_dict(
        posterior={"b": rng.normal(size=(2, 10, 2)), "residual_sd": rng.random((2, 10)),
                   "farm__sd": rng.random((2, 10, 2)), "farm__gamma": rng.normal(size=(2, 10, 1)),
                   "farm__corr": rng.random((2, 10, 2, 2)),
                   "farm__effect": rng.normal(size=(2, 10, 3, 2))},
        coords={"term": ["intercept", "nitrogen_kg"], "farm__term": ["intercept", "nitrogen_kg"],
                "farm__predictor": ["soil_carbon"], "farm": ["a", "b", "c"]},
        dims={"b": ["term"], "farm__sd": ["farm__term"], "farm__gamma": ["farm__predictor"],
              "farm__corr": ["farm__term", "farm__term_bis"],
              "farm__effect": ["farm", "farm__term"]})
    labels = [label for label, _, _ in diagnostic_figures.hyperparameters(idata.posterior)]
    assert labels == ["intercept", "nitrogen_kg", "residual_sd", "farm.sd",
                      "farm.nitrogen_kg.sd", "farm.soil_carbon"]


def test_long_group_tables_are_cut_with_a_pointer_to_the_csv(run_root, monkeypatch):
    from hierwork.report import groups

    monkeypatch.setattr(groups, "MAX_TABLE_ROWS", 5)
    html = render_report(build_run(run_root))
    page = Page(html)
    section = page.find("section", id="estimates")[0][2]
    assert "Showing the highest 5 of 12 groups; all are in group_estimates.csv in the run folder." in section
    assert page.find("a", href="group_estimates.csv")
    # The group table: a header and 5 groups, highest estimate first.
    table = re.search(r'<caption class="sr-only">Group estimates: farm, intercept</caption>(.*?)</table>', html, re.S)
    assert table.group(1).count("<tr>") == 1 + 5
    estimates = pd.read_csv(build_run(run_root) / "group_estimates.csv", keep_default_na=False)
    highest = estimates.sort_values("outcome_mean", ascending=False)["group"].head(5)
    cells = [text for _, a, text in Page(table.group(1)).find("td", **{"class": "label"})]
    assert cells == list(highest)


def test_run_folder_of_an_older_version_still_renders(run_root, tmp_path):
    # Before the outcome's scale: `n` for the sizes, no outcome columns, no estimands in plan.json.
    run = copy_run(build_run(run_root), tmp_path / "older")
    table = pd.read_csv(run / "group_estimates.csv", keep_default_na=False)
    table = table[["factor", "group", "term", "rows", "no_pooling", "complete_pooling", "partial_mean",
                   "partial_sd", "lower", "upper"]].rename(columns={"rows": "n"})
    table.to_csv(run / "group_estimates.csv", index=False)
    plan = json.loads((run / "plan.json").read_text())
    del plan["estimands"]
    (run / "plan.json").write_text(json.dumps(plan))
    page = Page(render_report(run))
    assert page.errors == []
    assert "written by an older version" in page.find("section", id="standout")[0][2]
    assert page.find("figure", id="traces") and page.find("figure", id="divergences")


def test_standing_out_reads_the_difference_not_the_groups_own_interval():
    """A group whose own interval covers the population value but whose difference from it does not stands out.

    On crossed designs the population value's uncertainty (the shared intercept)
    widens every group's interval; the difference, drawn jointly, cancels it
    (the rule in docs/report.md). Levels: a 90% interval leaves 5% in each tail.
    """
    from hierwork.report.view import away_from_population

    rows = pd.DataFrame({"group": ["a", "b", "c", "d"], "outcome_lower": [9.0, 9.0, 8.0, 7.0],
                         "outcome_upper": [13.0, 12.0, 11.0, 10.5], "p_above_population": [0.999, 0.94, 0.5, 0.01]})
    above, below = away_from_population(rows, 0.90)
    assert above.tolist() == [True, False, False, False]
    assert below.tolist() == [False, False, False, True]
