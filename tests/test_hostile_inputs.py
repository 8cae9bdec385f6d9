"""Hostile specs and data: labels read as written, and a property test that ``check`` never crashes.

The property test feeds generated specs and data files to ``hierwork check``
and requires exit 0, or exit 2 with one ``hierwork: error:`` line; never a
traceback (common practice: fuzzing the input boundary).
"""
from __future__ import annotations

import os
import tempfile
from pathlib import Path

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from hierwork.cli import main
from hierwork.data.reading import load_dataset
from hierwork.declare.spec import load_spec
from hierwork.plan.families import FAMILY_NAMES

LOOK_ALIKES = ["7", "07", "007", "12", "012", "3", "3.0", "4", "NA", "null", "None", "N/A", "nan"]


def _spec(folder: Path, data: str, extra: str = "", groups: str = "{depot: {}}") -> Path:
    path = folder / "spec.yaml"
    path.write_text(f"format: hierwork/1\nname: case\ndata: {data}\noutcome: {{column: y}}\ngroups: {groups}\n{extra}")
    return path


def test_labels_that_look_like_numbers_or_missing_stay_distinct(tmp_path):
    rows = [f"{label},{k % 2},{k + i / 10:.2f}" for i, label in enumerate(LOOK_ALIKES) for k in range(3)]
    (tmp_path / "d.csv").write_text("depot,shift,y\n" + "\n".join(rows) + "\n")
    dataset = load_dataset(load_spec(_spec(tmp_path, "d.csv", "predictors: [{column: shift, type: categorical}]")))
    assert sorted(set(dataset.labels["depot"])) == sorted(LOOK_ALIKES)
    assert dataset.categorical["shift"] == ["0", "1"]


def test_empty_label_is_missing_and_numeric_markers_still_are(tmp_path, capsys):
    (tmp_path / "d.csv").write_text("depot,y\nNA,1.5\n,2.5\nb,3.1\nb,2.0\n")
    assert main(["check", str(_spec(tmp_path, "d.csv"))]) == 2
    assert "column 'depot' has missing values in 1 row (lines 3)" in capsys.readouterr().err
    (tmp_path / "d.csv").write_text("depot,y\nNA,1.5\na,NA\nb,3.1\nb,2.0\n")
    assert main(["check", str(_spec(tmp_path, "d.csv"))]) == 2
    assert "column 'y' has missing values in 1 row (lines 3)" in capsys.readouterr().err


def test_nested_labels_compose_without_collisions(tmp_path):
    (tmp_path / "d.csv").write_text("region,site,y\nn,7,1.0\nn,07,2.0\ns,7,3.0\ns,7,3.5\nn,7,1.2\n")
    spec = _spec(tmp_path, "d.csv", groups="{region: {}, site: {within: region}}")
    assert sorted(set(load_dataset(load_spec(spec)).labels["site"])) == ["n/07", "n/7", "s/7"]


def test_data_file_that_is_a_symlink_loop(tmp_path, capsys):
    os.symlink("loop.csv", tmp_path / "loop.csv")
    out = tmp_path / "run"
    assert main(["fit", str(_spec(tmp_path, "loop.csv")), "--out", str(out)]) == 2
    assert "data file 'loop.csv' is a symbolic link loop" in capsys.readouterr().err
    assert not out.exists()


# --------------------------------------------------------------------------- property test

HOSTILE_TEXT = st.one_of(
    st.sampled_from(LOOK_ALIKES + ["", " ", "a/b", "b/c", "x=1", "intercept", "=SUM(A1)", "\t", "é", "1e400"]),
    st.text(st.characters(blacklist_categories=("Cs",)), max_size=6),
)
HOSTILE_NUMBERS = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-10**30, 10**30),
                            st.sampled_from(["", "NA", "text", "1e307", "-0", "0x10"]))
COLUMNS = st.sampled_from(["y", "g", "h", "x", "n", "t", "absent", "g/h", "y\n"])
#: Parts of a case; each case makes up to two of them hostile, so later checks are reached too.
PARTS = ("y", "g", "h", "x", "n", "family", "outcome", "extra", "factor", "inner", "predictors", "name", "sampling")


@st.composite
def cases(draw):
    """A data table of 2-12 rows and a spec over it, with up to two hostile parts."""
    hostile = draw(st.sets(st.sampled_from(PARTS), max_size=2))
    pick = lambda part, valid, bad: draw(bad if part in hostile else valid)  # noqa: E731
    n = draw(st.integers(2, 12))
    rows = lambda part, valid, bad: pick(part, st.lists(valid, min_size=n, max_size=n),  # noqa: E731
                                         st.lists(st.one_of(valid, bad), min_size=n, max_size=n))
    labels = st.sampled_from(["a", "b", "c", "7", "07"])
    counts = st.integers(0, 40)
    table = {"y": rows("y", st.floats(-100, 100), HOSTILE_NUMBERS), "g": rows("g", labels, HOSTILE_TEXT),
             "h": rows("h", labels, HOSTILE_TEXT), "x": rows("x", st.floats(-100, 100), HOSTILE_NUMBERS),
             "n": rows("n", counts, st.one_of(st.integers(-2, 10**20), st.floats(0, 1e30))),
             "t": [40] * n}
    family = pick("family", st.sampled_from(["normal", "poisson", "student_t"]),
                  st.sampled_from([*FAMILY_NAMES, "nope"]))
    outcome = {"column": "n" if family in ("poisson", "binomial", "negative_binomial", "bernoulli") else "y",
               "family": family}
    if "outcome" in hostile:
        outcome["column"] = draw(COLUMNS)
    if "extra" in hostile:
        outcome[draw(st.sampled_from(["trials", "exposure", "known_sd"]))] = draw(COLUMNS)
    groups = {pick("factor", st.just("site"), st.sampled_from(["depot/site", " g", "g\n", "a__b"])): {"column": "g"}}
    if draw(st.booleans()):
        groups["inner"] = {"column": pick("inner", st.just("h"), COLUMNS), "within": next(iter(groups))}
    predictors = pick("predictors", st.lists(st.just("x"), max_size=1), st.lists(st.one_of(COLUMNS, st.fixed_dictionaries(
        {"column": COLUMNS, "type": st.sampled_from(["auto", "numeric", "categorical"])})), max_size=2))
    spec = {"format": "hierwork/1", "name": pick("name", st.just("ok"), st.sampled_from(["ok\n", "a b", ""])),
            "data": "data.csv", "outcome": outcome, "groups": groups, "predictors": predictors}
    if "sampling" in hostile:
        spec["sampling"] = {draw(st.sampled_from(["chains", "draws", "seed", "target_accept"])):
                            draw(st.one_of(st.integers(-5, 10**12), st.floats(allow_nan=True), st.text(max_size=3)))}
    return table, spec


@pytest.mark.slow  # not MCMC, but 500 inputs take about half a minute
@settings(max_examples=500, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(cases())
def test_check_never_crashes(case):
    import pandas as pd

    table, spec = case
    with tempfile.TemporaryDirectory() as folder, pytest.MonkeyPatch.context() as mp:
        pd.DataFrame(table).to_csv(Path(folder) / "data.csv", index=False)
        (Path(folder) / "spec.yaml").write_text(yaml.safe_dump(spec, allow_unicode=True), encoding="utf-8")
        import io
        import sys

        err = io.StringIO()
        mp.setattr(sys, "stderr", err)
        mp.setattr(sys, "stdout", io.StringIO())
        code = main(["check", str(Path(folder) / "spec.yaml")])
    message = err.getvalue()
    assert code in (0, 2), message
    assert "Traceback" not in message
    if code == 2:
        assert len(message.strip().splitlines()) == 1 and message.startswith("hierwork: error: "), message


def test_csv_cells_never_run_as_formulas_and_labels_read_back_exactly(tmp_path):
    import pandas as pd

    from hierwork.runfolder import read_csv, write_csv

    labels = ["=SUM(A1)", "-3", "+1", "@cmd", "'quoted", "''=x", "\tTab", "plain", "NA", "7"]
    write_csv(tmp_path / "t.csv", pd.DataFrame({"group": labels, "partial_mean": [-1.5] * len(labels)}))
    cells = [line.split(",")[0].strip('"') for line in (tmp_path / "t.csv").read_text().splitlines()[1:]]
    assert all(not c.startswith(("=", "+", "-", "@", "\t")) for c in cells)  # OWASP, "CSV Injection"
    back = read_csv(tmp_path / "t.csv")
    assert back["group"].tolist() == labels and back["partial_mean"].tolist() == [-1.5] * len(labels)


def test_control_characters_never_reach_the_terminal(tmp_path, capsys):
    (tmp_path / "d.csv").write_text("depot,y\na,1.5\na,2.5\nb,3.1\nb,2.0\n")
    spec = _spec(tmp_path, "d.csv", 'title: "Depots \\e[2J\\e]0;owned\\a"\n')
    assert main(["check", str(spec)]) == 0
    out = capsys.readouterr().out
    assert "\x1b" not in out and "\x07" not in out and "Depots \\x1b[2J\\x1b]0;owned\\x07" in out
