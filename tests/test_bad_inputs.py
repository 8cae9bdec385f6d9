"""The bad-input corpus: every case exits 2 with one clear line and writes nothing.

Each ``bad_inputs/*.yaml`` starts with ``# expect: TEXT`` (the message must
contain it) and optionally ``# argv: ARGS`` (extra command-line arguments).
"""
from __future__ import annotations

import shlex
from pathlib import Path

import pytest

from hierwork.cli import main

CORPUS = Path(__file__).parent / "bad_inputs"
CASES = sorted(CORPUS.glob("*.yaml"))


def _header(path: Path, key: str) -> str:
    for line in path.read_text(encoding="utf-8").splitlines():
        if line.startswith(f"# {key}: "):
            return line[len(f"# {key}: "):]
    return ""


def _run(argv, capsys):
    code = main(argv)
    captured = capsys.readouterr()
    return code, captured.err.strip()


@pytest.mark.parametrize("case", CASES, ids=[c.stem for c in CASES])
def test_check_rejects_with_one_line(case, capsys):
    code, err = _run(["check", str(case), *shlex.split(_header(case, "argv"))], capsys)
    assert code == 2
    assert "Traceback" not in err
    assert len(err.splitlines()) == 1, err
    assert err.startswith("hierwork: error: ")
    assert _header(case, "expect") in err


@pytest.mark.parametrize("case", CASES, ids=[c.stem for c in CASES])
def test_fit_rejects_before_sampling_and_writes_nothing(case, tmp_path, capsys):
    out = tmp_path / "run"
    code, err = _run(["fit", str(case), "--out", str(out), *shlex.split(_header(case, "argv"))], capsys)
    assert code == 2
    assert _header(case, "expect") in err
    assert list(tmp_path.iterdir()) == []


def test_messages_name_file_and_line(capsys):
    case = CORPUS / "unknown_top_key.yaml"
    _, err = _run(["check", str(case)], capsys)
    assert f"{case}:5: outcom" in err


def test_missing_spec_file(tmp_path, capsys):
    code, err = _run(["check", str(tmp_path / "absent.yaml")], capsys)
    assert code == 2 and "spec file not found" in err


def test_existing_output_refused_without_force(tmp_path, capsys):
    out = tmp_path / "run"
    out.mkdir()
    (out / "keep.txt").write_text("earlier work")
    spec = CORPUS / "plots.csv"
    good = tmp_path / "good.yaml"
    good.write_text(f"format: hierwork/1\nname: ok\ndata: {spec}\noutcome: {{column: yield}}\ngroups: {{site: {{}}}}\n")
    code, err = _run(["fit", str(good), "--out", str(out)], capsys)
    assert code == 2 and "already exists" in err and "--force" in err
    assert (out / "keep.txt").read_text() == "earlier work"


def test_usage_error_exits_2(capsys):
    code = None
    with pytest.raises(SystemExit) as exc:
        main(["fit"])
    code = exc.value.code
    assert code == 2
    err = capsys.readouterr().err
    assert err == "hierwork: error: the following arguments are required: spec, --out (see 'hierwork fit --help')\n"


def test_override_errors_name_the_override(tmp_path, capsys):
    spec = tmp_path / "spec.yaml"
    spec.write_text(f"format: hierwork/1\nname: ok\ndata: {CORPUS / 'plots.csv'}\noutcome: {{column: yield}}\n"
                    "groups: {site: {}}\nsampling: {chains: 2}\n")
    assert main(["check", str(spec), "--chains", "0"]) == 2
    assert capsys.readouterr().err.startswith("hierwork: error: override sampling.chains=0: sampling.chains: 0 is out")
