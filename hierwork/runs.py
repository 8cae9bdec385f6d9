"""The run folder: written atomically, self-describing, loadable back.

A run folder is assembled in a hidden temporary sibling and renamed into place
only when every file is written, so a crash or a kill never leaves a folder
that looks finished. With ``force``, an existing folder is replaced only after
the new one is complete.
"""
from __future__ import annotations

import json
import os
import shutil
import uuid
from contextlib import contextmanager
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import pandas as pd
import yaml

from .errors import RunFolderError

RUN_FORMAT = "hierwork-run/1"
REQUIRED_FILES = ("diagnostics.json", "group_estimates.csv", "summary.csv", "spec.yaml", "provenance.json",
                  "posterior.nc")


def refuse_existing(out: Path, force: bool) -> None:
    """Raise before any work if ``out`` exists and may not be replaced."""
    if out.exists() and not force:
        raise RunFolderError(f"output folder {str(out)!r} already exists",
                             hint="choose another --out, or add --force to replace it once the new run is complete")
    if out.exists() and not out.is_dir():
        raise RunFolderError(f"output path {str(out)!r} exists and is not a folder", hint="choose another --out")


@contextmanager
def staged_folder(out: Path, force: bool):
    """Yield a temporary folder; on success move it to ``out`` (replacing it if ``force``).

    On any exception the temporary folder is removed and ``out`` is untouched.
    """
    out = Path(out)
    refuse_existing(out, force)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.parent / f".{out.name}.tmp-{uuid.uuid4().hex[:8]}"
    tmp.mkdir()
    try:
        yield tmp
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    publish(tmp, out, force)


def publish(tmp: Path, out: Path, force: bool) -> None:
    """Rename a finished folder into place, replacing ``out`` only if ``force``."""
    old = None
    if out.exists():
        refuse_existing(out, force)
        old = out.parent / f".{out.name}.old-{uuid.uuid4().hex[:8]}"
        os.rename(out, old)
    os.rename(tmp, out)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def write_json(path: Path, data) -> None:
    path.write_text(json.dumps(data, indent=2, default=_jsonable) + "\n", encoding="utf-8")


def _jsonable(value):
    if hasattr(value, "item"):
        return value.item()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")


def write_csv(path: Path, frame: pd.DataFrame) -> None:
    """A table as CSV, without the index; Arrow's writer, several times faster than pandas' on millions of rows.

    Missing values are written as empty fields, as pandas writes them.
    """
    import pyarrow as pa
    from pyarrow import csv

    csv.write_csv(pa.Table.from_pandas(frame, preserve_index=False), str(path),
                  csv.WriteOptions(quoting_style="needed"))


def write_atomic(path: Path, text: str) -> None:
    """Replace a single file atomically (write a sibling, then rename)."""
    tmp = path.with_name(f".{path.name}.tmp-{uuid.uuid4().hex[:8]}")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)


@dataclass
class Run:
    """A finished run folder, loaded back.

    Attributes are read lazily from the files; ``posterior`` opens
    ``posterior.nc`` as ArviZ InferenceData.
    """

    path: Path
    _cache: dict = field(default_factory=dict, repr=False)

    @classmethod
    def load(cls, path) -> "Run":
        """Open a run folder, checking that it is complete.

        Raises
        ------
        RunFolderError
            If the folder or any of its required files is missing.
        """
        path = Path(path)
        if not path.is_dir():
            raise RunFolderError(f"run folder {str(path)!r} not found", hint="give the folder written by 'hierwork fit'")
        missing = [f for f in REQUIRED_FILES if not (path / f).is_file()]
        if missing:
            raise RunFolderError(f"run folder {str(path)!r} is incomplete: missing {', '.join(missing)}",
                                 hint="fit again with --force")
        run = cls(path)
        if run.provenance.get("format") != RUN_FORMAT:
            raise RunFolderError(f"run folder {str(path)!r} has unknown format {run.provenance.get('format')!r}",
                                 hint=f"this version reads {RUN_FORMAT}")
        return run

    def _json(self, name):
        if name not in self._cache:
            self._cache[name] = json.loads((self.path / name).read_text(encoding="utf-8"))
        return self._cache[name]

    @property
    def diagnostics(self) -> dict:
        return self._json("diagnostics.json")

    @property
    def provenance(self) -> dict:
        return self._json("provenance.json")

    @property
    def plan(self) -> dict:
        return self._json("plan.json")

    @property
    def passed(self) -> bool:
        return bool(self.diagnostics["passed"])

    @cached_property
    def spec(self) -> dict:
        """The spec as run, as a plain mapping."""
        return yaml.safe_load((self.path / "spec.yaml").read_text(encoding="utf-8"))

    @cached_property
    def group_estimates(self) -> pd.DataFrame:
        return pd.read_csv(self.path / "group_estimates.csv", keep_default_na=False, na_values=[""],
                           dtype={"group": str})

    @cached_property
    def summary(self) -> pd.DataFrame:
        return pd.read_csv(self.path / "summary.csv")

    @cached_property
    def posterior(self):
        import arviz as az

        return az.from_netcdf(self.path / "posterior.nc")
