"""Spec loading: the key table, defaults, overrides, line numbers, schema and README sync."""
from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

import hierwork
from hierwork.declare.keys import SPEC_KEYS
from hierwork.declare.schema import spec_schema
from hierwork.declare.schema import END, START, key_rows, render_into

README = Path(__file__).parent.parent / "README.md"
PLOTS = Path(__file__).parent / "bad_inputs" / "plots.csv"

MINIMAL = f"""
format: hierwork/1
name: plots
data: {PLOTS}
outcome:
  column: yield
groups:
  site: {{}}
"""


def test_defaults_filled_in(spec_writer):
    spec = hierwork.load_spec(spec_writer(MINIMAL))
    assert spec.sampling == {"chains": 4, "warmup": 1000, "draws": 1000, "target_accept": 0.9,
                             "max_treedepth": 10, "seed": 20261202, "cores": None, "engine": "auto",
                             "path": "auto"}
    assert spec.gate["r_hat_max"] == 1.01 and spec.gate["ess_bulk_min"] == 400
    factor = spec.factor("site")
    assert factor.column == "site" and factor.varying == ("intercept",) and factor.parameterisation == "auto"
    assert spec.interval == 0.94


def test_overrides_are_validated_like_the_file(spec_writer):
    path = spec_writer(MINIMAL)
    spec = hierwork.load_spec(path, {"sampling.draws": 200, "groups.site.parameterisation": "non_centred"})
    assert spec.sampling["draws"] == 200
    assert spec.factor("site").parameterisation == "non_centred"
    with pytest.raises(hierwork.SpecError, match=re.escape("sampling.draws: 10 is out of range")):
        hierwork.load_spec(path, {"sampling.draws": 10})
    with pytest.raises(hierwork.SpecError, match=re.escape("unknown key 'draw'")):
        hierwork.load_spec(path, {"sampling.draw": 200})


def test_error_points_at_line_of_nested_key(spec_writer):
    path = spec_writer(MINIMAL + "sampling:\n  target_accept: 1.5\n")
    with pytest.raises(hierwork.SpecError) as err:
        hierwork.load_spec(path)
    assert str(err.value).startswith(f"{path}:9: sampling.target_accept: 1.5 is out of range")


def test_bare_string_list_and_predictor_shorthand(spec_writer):
    text = MINIMAL.replace("  site: {}", "  site: {varying: intercept}") + "predictors: [treat, {column: plot_area}]\n"
    spec = hierwork.load_spec(spec_writer(text))
    assert [p.column for p in spec.predictors] == ["treat", "plot_area"]
    assert spec.factor("site").varying == ("intercept",)


def test_schema_covers_every_key_and_is_json():
    schema = spec_schema()
    json.dumps(schema)
    props = schema["properties"]
    assert set(props) == set(SPEC_KEYS)
    assert props["sampling"]["properties"]["chains"] == {
        "description": "Number of chains.", "default": 4, "type": "integer", "minimum": 1, "maximum": 64}
    assert props["outcome"]["required"] == ["column"]
    assert "normal" in props["priors"]["additionalProperties"]["properties"]


def test_readme_key_reference_is_in_sync():
    text = README.read_text(encoding="utf-8")
    assert START in text and END in text
    assert render_into(text) == text, "run: python -m hierwork.declare.schema README.md"
    for key, *_ in key_rows(SPEC_KEYS):
        assert f"`{key}`" in text
