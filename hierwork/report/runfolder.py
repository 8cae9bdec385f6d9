"""Read the files of a run folder for display.

The report renders whatever a run folder holds: each file in the contract
(docs/contracts.md, "Run folder") is read if present and listed in
:attr:`RunFiles.missing` if not, so a partial folder still gives a partial
report that says what is absent. Nothing here computes a statistic.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import pandas as pd
import yaml

from hierwork.errors import RunFolderError

__all__ = ["RunFiles", "read_run", "DEFAULT_INTERVAL", "POOLING_FILE", "LOO_FILE"]

#: Level of the central interval when the run does not record one
#: (spec-format.md, "group_estimates.csv": default 94%).
DEFAULT_INTERVAL = 0.94

_LABEL_COLUMNS = ("factor", "group", "term", "parameter")
_KNOWN = ("posterior.nc", "diagnostics.json", "group_estimates.csv", "summary.csv",
          "spec.yaml", "provenance.json", "plan.json")
#: Pooling factor per factor and varying term (``factor, term, n_groups, pooling_factor``).
POOLING_FILE = "pooling.csv"
#: Optional file with the LOO comparison of the pooling choices (ArviZ
#: ``compare`` layout: one row per model, ``elpd_loo``/``elpd_diff``/``dse``...).
LOO_FILE = "loo_compare.csv"


def _read_json(path: Path):
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise RunFolderError(f"{path.name} is not valid JSON ({exc})", where=str(path),
                             hint="rerun the fit to rewrite it") from None


def _read_csv(path: Path) -> pd.DataFrame:
    """Read a CSV keeping labels such as ``NA`` or ``null`` as text."""
    try:
        header = pd.read_csv(path, nrows=0).columns
        labels = [c for c in header if c in _LABEL_COLUMNS]
        numbers = [c for c in header if c not in labels]
        return pd.read_csv(path, dtype={c: str for c in labels}, keep_default_na=False,
                           na_values={c: ["", "nan", "NaN", "NA"] for c in numbers})
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise RunFolderError(f"{path.name} cannot be read as CSV ({exc})", where=str(path),
                             hint="rerun the fit to rewrite it") from None


@dataclass
class RunFiles:
    """The contents of one run folder, read for display.

    Attributes
    ----------
    path : pathlib.Path
        The run folder.
    spec_text : str or None
        ``spec.yaml`` as run, verbatim.
    spec : dict
        ``spec.yaml`` parsed (empty if absent).
    diagnostics, provenance, plan : dict or None
        The JSON files.
    group_estimates, summary, pooling, loo : pandas.DataFrame or None
        The CSV files.
    missing : list of str
        Contract files that are absent.
    """

    path: Path
    spec_text: str | None = None
    spec: dict = field(default_factory=dict)
    diagnostics: dict | None = None
    provenance: dict | None = None
    plan: dict | None = None
    group_estimates: pd.DataFrame | None = None
    summary: pd.DataFrame | None = None
    pooling: pd.DataFrame | None = None
    loo: pd.DataFrame | None = None
    missing: list = field(default_factory=list)

    @cached_property
    def posterior(self):
        """The ``posterior.nc`` InferenceData (loaded on first use), or None."""
        path = self.path / "posterior.nc"
        if not path.is_file():
            return None
        import arviz as az

        try:
            return az.from_netcdf(path)
        except (OSError, ValueError) as exc:
            raise RunFolderError(f"posterior.nc cannot be read ({exc})", where=str(path),
                                 hint="rerun the fit to rewrite it") from None

    @property
    def name(self) -> str:
        """The run's name: the spec's ``name``, else the folder name."""
        return str(self.spec.get("name") or self.path.name)

    @property
    def title(self) -> str:
        """The spec's ``title``, else its name."""
        return str(self.spec.get("title") or self.name)

    @property
    def passed(self) -> bool | None:
        """Whether the gate passed; None when diagnostics.json is missing."""
        return None if self.diagnostics is None else bool(self.diagnostics.get("passed"))

    @property
    def interval(self) -> float:
        """Level of the central intervals in the estimate tables."""
        section = self.spec.get("estimates")
        value = section.get("interval") if isinstance(section, dict) else None
        return float(value) if value else DEFAULT_INTERVAL

    @property
    def family(self) -> str:
        """Outcome family from the spec (``normal`` if unstated)."""
        outcome = self.spec.get("outcome") or {}
        return str(outcome.get("family", "normal")) if isinstance(outcome, dict) else "normal"


def read_run(run) -> RunFiles:
    """Read the run folder ``run`` (a path, or an object with a ``path``).

    Raises
    ------
    RunFolderError
        If the folder does not exist, holds none of the run files, or a file
        cannot be parsed.
    """
    path = Path(getattr(run, "path", run))
    if not path.is_dir():
        raise RunFolderError("run folder not found", where=str(path),
                             hint="give the --out folder of 'hierwork fit'")
    if not any((path / name).is_file() for name in _KNOWN):
        raise RunFolderError("not a run folder (none of " + ", ".join(_KNOWN) + " is present)",
                             where=str(path), hint="give the --out folder of 'hierwork fit'")
    files = RunFiles(path=path)
    files.missing = [name for name in _KNOWN if not (path / name).is_file()]
    if (path / "spec.yaml").is_file():
        files.spec_text = (path / "spec.yaml").read_text(encoding="utf-8")
        try:
            parsed = yaml.safe_load(files.spec_text)
        except yaml.YAMLError as exc:
            raise RunFolderError(f"spec.yaml cannot be parsed ({exc})",
                                 where=str(path / "spec.yaml")) from None
        files.spec = parsed if isinstance(parsed, dict) else {}
    for attr, name in (("diagnostics", "diagnostics.json"), ("provenance", "provenance.json"),
                       ("plan", "plan.json")):
        if (path / name).is_file():
            setattr(files, attr, _read_json(path / name))
    for attr, name in (("group_estimates", "group_estimates.csv"),
                       ("summary", "summary.csv"), ("pooling", POOLING_FILE),
                       ("loo", LOO_FILE)):
        if (path / name).is_file():
            setattr(files, attr, _read_csv(path / name))
    return files
