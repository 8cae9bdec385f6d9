"""The run folder: its files, the one writer, and the one reader.

A run folder is assembled in a hidden temporary sibling and renamed into place
only when every file is written, so a crash or a kill never leaves a folder
that looks finished. With ``force``, an existing folder is replaced only after
the new one is complete. :data:`RUN_FILES` lists every file; :class:`Run` reads
them for ``report``, ``compare``, ``predict``, the batch and the Python API.
"""
from __future__ import annotations

import glob
import json
import os
import shutil
import time
import uuid
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

from hierwork.errors import RunFolderError

RUN_FORMAT = "hierwork-run/1"
#: Level of the central interval when the run does not record one.
DEFAULT_INTERVAL = 0.94


@dataclass(frozen=True)
class RunFile:
    """One file of the run folder: its name, whether every run has it, and what it holds."""

    name: str
    required: bool
    what: str


RUN_FILES = (
    RunFile("report.html", False, "the shareable report (verdict first)"),
    RunFile("summary.md", False, "the verdict and headline tables in Markdown"),
    RunFile("group_estimates.csv", True, "partial pooling beside both baselines, per factor, group and term"),
    RunFile("summary.csv", True, "population-level and variance parameters"),
    RunFile("pooling.csv", False, "pooling factor per factor and varying term"),
    RunFile("sensitivity.csv", False, "how much each parameter moves when the priors or the likelihood are power-scaled"),
    RunFile("contrasts.csv", False, "the requested differences between two groups, on the outcome's scale"),
    RunFile("figures/", False, "every figure of the report as NAME.png and NAME.svg"),
    RunFile("diagnostics.json", True, "the gate: every check, its value, threshold and worst parameter"),
    RunFile("posterior.nc", True, "ArviZ InferenceData (NetCDF): posterior and predictive draws"),
    RunFile("calibration.json", False, "coverage of the posterior predictive intervals"),
    RunFile("loo.json", False, "PSIS-LOO of the fit, with Pareto k counts"),
    RunFile("pooling_comparison.csv", False, "partial, complete and no pooling compared by PSIS-LOO"),
    RunFile("predictive_rows.csv", False, "per-row predictive summaries when the stored draws were thinned"),
    RunFile("spec.yaml", True, "the spec as run (overrides applied, data path absolute)"),
    RunFile("plan.json", True, "the resolved plan: terms, priors, parameterisation and why"),
    RunFile("provenance.json", True, "hashes, versions, seed, times and the command that reproduces the run"),
)
REQUIRED_FILES = tuple(f.name for f in RUN_FILES if f.required)
#: Columns of the CSV files that hold labels (read as text: a group called ``NA`` stays ``NA``).
LABEL_COLUMNS = ("factor", "group", "term", "parameter", "model", "group_a", "group_b")


# --------------------------------------------------------------------------- writing

#: Hidden siblings of ``out``: ``.NAME.tmp-ID`` while a fit writes, ``.NAME.new-ID`` for an instant
#: before (locked, then renamed), ``.NAME.old-ID`` while a forced run replaces the old one.
_STAGING, _FRESH, _OLD = ".tmp-", ".new-", ".old-"
_LOCK = ".lock"


def destination(out) -> Path:
    """``out`` as an absolute, normalised path (``.`` and ``..`` resolved, symlinks kept)."""
    return Path(os.path.abspath(os.fspath(out)))


def is_run_folder(path: Path) -> bool:
    """Whether ``path`` is a hierwork run folder: its ``provenance.json`` names the run format."""
    try:
        provenance = json.loads((Path(path) / "provenance.json").read_text(encoding="utf-8"))
    except (OSError, ValueError, UnicodeDecodeError):
        return False
    return isinstance(provenance, dict) and str(provenance.get("format", "")).startswith("hierwork-run/")


def refuse_existing(out: Path, force: bool) -> None:
    """Raise before any work if ``out`` cannot receive a run folder.

    Refused: an existing ``out`` without ``force``; with ``force``, anything
    but a hierwork run folder, and the current folder or one containing it;
    a path under a file; a location this process cannot write.
    """
    given, out = str(out), destination(out)
    if out.exists() or out.is_symlink():
        if not force:
            raise RunFolderError(f"output folder {given!r} already exists",
                                 hint="choose another --out, or add --force to replace it once the new run is complete")
        if not out.is_dir():
            raise RunFolderError(f"output path {given!r} exists and is not a folder", hint="choose another --out")
        if not is_run_folder(out):
            raise RunFolderError(f"--force replaces run folders only, and {given!r} is not one "
                                 "(it has no provenance.json of a hierwork run)",
                                 hint="choose another --out, or move that folder away yourself")
        cwd = destination(os.getcwd())
        if cwd == out or out in cwd.parents:
            raise RunFolderError(f"--force would replace {given!r}, which holds the current folder",
                                 hint="run from outside it, or choose another --out")
    parent = out.parent
    while not parent.exists():
        if parent.is_symlink():
            raise RunFolderError(f"output path {given!r} lies under a broken symbolic link {str(parent)!r}",
                                 hint="choose another --out")
        parent = parent.parent
    if not parent.is_dir():
        raise RunFolderError(f"output path {given!r} lies under {str(parent)!r}, which is a file, not a folder",
                             hint="choose another --out")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise RunFolderError(f"cannot write under {str(parent)!r} (read-only or no permission)",
                             where=f"--out {given}", hint="choose a folder you can write to")


class Staging:
    """The hidden folder a run is assembled in, reserved before sampling.

    Reserving it proves the destination writable and takes an exclusive lock
    (``flock``, released by the system when the process dies, however it dies):
    a second fit into the same ``out`` fails at once instead of after sampling,
    and staging folders whose lock nobody holds (left by a killed fit) are
    removed. On leaving the ``with`` block without :meth:`write`, the folder is
    removed.
    """

    def __init__(self, out, force: bool):
        self.given = str(out)
        self.out = destination(out)
        self.force = force
        self.path: Path | None = None
        self._lock = None

    def __enter__(self) -> "Staging":
        try:
            self._clear_stale()
        except OSError:  # tidying is best effort; writing below reports a real problem
            pass
        refuse_existing(self.out, self.force)
        try:
            self.out.parent.mkdir(parents=True, exist_ok=True)
            fresh = self.out.parent / f".{self.out.name}{_FRESH}{uuid.uuid4().hex[:8]}"
            fresh.mkdir()
            self._lock = _locked(fresh / _LOCK)
            self.path = fresh.with_name(fresh.name.replace(_FRESH, _STAGING, 1))
            os.rename(fresh, self.path)
            self._clear_stale()  # again, now that ours is visible: of two fits started together, one yields
        except OSError as exc:
            self._remove()
            raise RunFolderError(f"cannot write the run folder ({_first_line(exc)})", where=f"--out {self.given}",
                                 hint="choose a folder you can write to") from None
        except BaseException:
            self._remove()
            raise
        return self

    def _clear_stale(self) -> None:
        """Tidy what killed fits left beside ``out``; refuse if a live fit is writing there.

        A staging folder whose lock nobody holds is removed. An old run set
        aside by a forced replacement that was killed half-way is put back if
        ``out`` is missing (it is then the only copy), else removed.
        """
        name = glob.escape(self.out.name)
        for entry in [*self.out.parent.glob(f".{name}{_STAGING}*"), *self.out.parent.glob(f".{name}{_FRESH}*")]:
            if entry == self.path:
                continue
            if (entry / _LOCK).exists():
                try:
                    _locked(entry / _LOCK).close()
                except BlockingIOError:
                    raise RunFolderError(f"another fit is writing to {self.given!r} now",
                                         hint="wait for it to finish, or choose another --out") from None
            elif _FRESH in entry.name and time.time() - entry.stat().st_mtime < 60:
                continue  # created an instant ago by a fit about to lock it
            shutil.rmtree(entry, ignore_errors=True)
        for entry in sorted(self.out.parent.glob(f".{name}{_OLD}*"), key=lambda e: e.stat().st_mtime):
            if not self.out.exists() and is_run_folder(entry):
                os.rename(entry, self.out)
            else:
                shutil.rmtree(entry, ignore_errors=True)

    def write(self, contents: dict) -> None:
        """Write every file into the staging folder, then rename it into place (see :func:`write_run`)."""
        try:
            _write_contents(self.path, contents)
        except OSError as exc:
            raise RunFolderError(f"cannot write the run folder ({_first_line(exc)})", where=f"--out {self.given}",
                                 hint="free some space or choose another --out; nothing was published") from None
        from hierwork.interrupts import Interrupted, signals_deferred

        try:
            with signals_deferred():
                publish(self.path, self.out, self.force)
                self.path = None
                (self.out / _LOCK).unlink(missing_ok=True)
        except Interrupted as stop:
            if self.path is None:
                stop.outcome = f"the run folder {self.given!r} had been written completely"
            raise

    def __exit__(self, *exc) -> None:
        self._remove()

    def _remove(self) -> None:
        if self.path is not None:
            shutil.rmtree(self.path, ignore_errors=True)
            self.path = None
        if self._lock is not None:
            self._lock.close()
            self._lock = None


def _locked(path: Path):
    """Open ``path`` (created if needed) holding an exclusive lock; BlockingIOError if another holds it."""
    import fcntl

    handle = open(path, "a+b")
    try:
        fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BaseException:
        handle.close()
        raise
    return handle


def publish(tmp: Path, out: Path, force: bool) -> None:
    """Rename a finished folder into place, replacing ``out`` only if ``force`` (old one kept until then)."""
    old = None
    if out.exists():
        refuse_existing(out, force)
        old = out.parent / f".{out.name}{_OLD}{uuid.uuid4().hex[:8]}"
        os.rename(out, old)
    try:
        os.rename(tmp, out)
    except BaseException:
        if old is not None:
            os.rename(old, out)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def write_run(out, force: bool, contents: dict) -> None:
    """Write a complete run folder atomically.

    ``contents`` maps file names to what they hold: a DataFrame (CSV), a dict
    (JSON), text, an InferenceData (NetCDF), or a callable ``(folder) -> None``
    run last, once every other file is in the staging folder (the report).
    """
    with Staging(out, force) as stage:
        stage.write(contents)


def _write_contents(tmp: Path, contents: dict) -> None:
    last = []
    for name, content in contents.items():
        if callable(content):
            last.append(content)
        elif hasattr(content, "to_netcdf"):
            # Uncompressed: zlib saves about 5% on posterior draws and costs ten times the write time.
            content.to_netcdf(str(tmp / name), engine="h5netcdf", compress=False)
        elif hasattr(content, "to_csv"):
            write_csv(tmp / name, content)
        elif isinstance(content, dict):
            write_json(tmp / name, content)
        else:
            (tmp / name).write_text(str(content), encoding="utf-8")
    for step in last:
        step(tmp)


def write_json(path: Path, data) -> None:
    path.write_text(json.dumps(data, indent=2, default=_jsonable) + "\n", encoding="utf-8")


def _jsonable(value):
    if hasattr(value, "item"):
        return value.item()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")


def write_csv(path: Path, frame) -> None:
    """A table as CSV, without the index; Arrow's writer, several times faster than pandas' on millions of rows.

    Missing values are written as empty fields, as pandas writes them.
    """
    import pyarrow as pa
    from pyarrow import csv

    csv.write_csv(pa.Table.from_pandas(spreadsheet_safe(frame), preserve_index=False), str(path),
                  csv.WriteOptions(quoting_style="needed"))


#: First characters that make a spreadsheet read a cell as a formula (OWASP, "CSV Injection").
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def spreadsheet_safe(frame):
    """The table with every text cell that a spreadsheet would run as a formula prefixed by ``'``.

    A group called ``=SUM(A1)`` or ``-3`` is written ``'=SUM(A1)``, ``'-3``; a
    text that already starts with ``'`` gets one more, so :func:`read_csv`
    restores every label exactly by removing one. Numbers are untouched.
    """
    import pandas as pd

    out = frame.copy()
    for column in out.columns:
        values = out[column]
        if values.dtype == object or pd.api.types.is_string_dtype(values):
            text = values.map(lambda v: f"'{v}" if isinstance(v, str) and v.startswith(("'", *FORMULA_STARTS)) else v)
            out[column] = text
    return out


def write_atomic(path: Path, text: str) -> None:
    """Replace a single file atomically (write a sibling, then rename)."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{uuid.uuid4().hex[:8]}")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


# --------------------------------------------------------------------------- reading

@dataclass
class Run:
    """A run folder, read back. Files are read on first use; absent optional files give None.

    Open one with :meth:`load` (every required file must be there) or
    :meth:`open` (any run file is enough: a partial report says what is missing).
    """

    path: Path
    _cache: dict = field(default_factory=dict, repr=False)

    @classmethod
    def load(cls, path) -> "Run":
        """Open a complete run folder.

        Raises
        ------
        RunFolderError
            If the folder or any of its required files is missing, or its format is unknown.
        """
        run = cls.open(path)
        if run.missing_required:
            raise RunFolderError(f"run folder {str(run.path)!r} is incomplete: missing "
                                 f"{', '.join(run.missing_required)}", hint="fit again with --force")
        if run.provenance.get("format") != RUN_FORMAT:
            raise RunFolderError(f"run folder {str(run.path)!r} has unknown format {run.provenance.get('format')!r}",
                                 hint=f"this version reads {RUN_FORMAT}")
        return run

    @classmethod
    def open(cls, path) -> "Run":
        """Open a folder holding at least one run file (possibly a partial one)."""
        path = Path(getattr(path, "path", path))
        if not path.is_dir():
            raise RunFolderError("run folder not found", where=str(path), hint="give the --out folder of 'hierwork fit'")
        if not any((path / f.name).is_file() for f in RUN_FILES):
            raise RunFolderError("not a run folder (none of its files is present)", where=str(path),
                                 hint="give the --out folder of 'hierwork fit'")
        return cls(path)

    @property
    def missing(self) -> list:
        """Required files that are absent, sorted (optional ones are reported by the sections that use them)."""
        return sorted(name for name in REQUIRED_FILES if not (self.path / name).is_file())

    @property
    def missing_required(self) -> list:
        return self.missing

    def has(self, name: str) -> bool:
        return (self.path / name).is_file()

    def _read(self, name: str, reader):
        if name not in self._cache:
            path = self.path / name
            if not path.is_file():
                self._cache[name] = None
            else:
                try:
                    self._cache[name] = reader(path)
                except json.JSONDecodeError as exc:
                    raise RunFolderError(f"{name} is not valid JSON ({_first_line(exc)})", where=str(path),
                                         hint="rerun the fit to rewrite it") from None
                except (OSError, ValueError, UnicodeDecodeError) as exc:
                    raise RunFolderError(f"{name} cannot be read ({_first_line(exc)})", where=str(path),
                                         hint="rerun the fit to rewrite it") from None
        return self._cache[name]

    def _json(self, name: str):
        def mapping(path):
            value = json.loads(path.read_text(encoding="utf-8"))
            if not isinstance(value, dict):
                raise ValueError(f"it holds {type(value).__name__}, not a mapping")
            return value
        return self._read(name, mapping)

    def _csv(self, name: str):
        return self._read(name, read_csv)

    # files
    @property
    def diagnostics(self) -> dict | None:
        return self._json("diagnostics.json")

    @property
    def provenance(self) -> dict:
        return self._json("provenance.json") or {}

    @property
    def plan(self) -> dict | None:
        return self._json("plan.json")

    @property
    def calibration(self) -> dict | None:
        return self._json("calibration.json")

    @property
    def loo(self) -> dict | None:
        return self._json("loo.json")

    @property
    def spec_text(self) -> str | None:
        return self._read("spec.yaml", lambda p: p.read_text(encoding="utf-8"))

    @cached_property
    def spec(self) -> dict:
        """The spec as run, as a plain mapping (empty if absent)."""
        import yaml

        text = self.spec_text
        if text is None:
            return {}
        try:
            value = yaml.safe_load(text)
        except yaml.YAMLError as exc:
            raise RunFolderError(f"spec.yaml cannot be parsed ({_first_line(exc)})",
                                 where=str(self.path / "spec.yaml"), hint="rerun the fit to rewrite it") from None
        return value if isinstance(value, dict) else {}

    @property
    def group_estimates(self):
        return self._csv("group_estimates.csv")

    @property
    def summary(self):
        return self._csv("summary.csv")

    @property
    def pooling(self):
        return self._csv("pooling.csv")

    @property
    def sensitivity(self):
        return self._csv("sensitivity.csv")

    @property
    def contrasts(self):
        return self._csv("contrasts.csv")

    @property
    def estimands(self) -> dict | None:
        """Reference values, outcome scale, target and contrasts (``plan.json``; None for older runs)."""
        return (self.plan or {}).get("estimands")

    @property
    def pooling_comparison(self):
        return self._csv("pooling_comparison.csv")

    @cached_property
    def posterior(self):
        """``posterior.nc`` as ArviZ InferenceData (None if absent)."""
        def load(path):
            from hierwork import runtime  # noqa: F401  (before ArviZ)
            import arviz as az

            try:
                return az.from_netcdf(path)
            except Exception as exc:  # a truncated or foreign file: h5py, netCDF and xarray raise many kinds
                raise ValueError(f"{type(exc).__name__}: {_first_line(exc)}") from None
        return self._read("posterior.nc", load)

    # facts
    @property
    def passed(self) -> bool | None:
        """Whether the gate passed; None when diagnostics.json is missing."""
        return None if self.diagnostics is None else bool(self.diagnostics.get("passed"))

    @property
    def name(self) -> str:
        """The spec's ``name``, else the folder's name."""
        return str(self.spec.get("name") or self.path.name)

    @property
    def title(self) -> str:
        return str(self.spec.get("title") or self.name)

    @property
    def interval(self) -> float:
        """Level of the central intervals in the estimate tables."""
        section = self.spec.get("estimates")
        value = section.get("interval") if isinstance(section, dict) else None
        return float(value) if value else DEFAULT_INTERVAL

    @property
    def family(self) -> str:
        """Outcome family (``normal`` if unstated)."""
        if self.plan and self.plan.get("family"):
            return str(self.plan["family"])
        outcome = self.spec.get("outcome") or {}
        return str(outcome.get("family", "normal")) if isinstance(outcome, dict) else "normal"

    @property
    def seed(self) -> int:
        """The seed the run used: its spec's, else the one provenance recorded."""
        sampling = self.spec.get("sampling") or {}
        seed = sampling.get("seed") if isinstance(sampling, dict) else None
        if seed is None:
            seed = self.provenance.get("seed")
        if seed is None:
            from hierwork.declare.keys import SPEC_KEYS

            seed = SPEC_KEYS["sampling"].fields["seed"].default
        return int(seed)


def read_csv(path: Path):
    """Read a run-folder CSV keeping labels such as ``NA`` or ``null`` as text."""
    import pandas as pd

    try:
        header = pd.read_csv(path, nrows=0).columns
        labels = [c for c in header if c in LABEL_COLUMNS]
        numbers = [c for c in header if c not in labels]
        table = pd.read_csv(path, dtype={c: str for c in labels}, keep_default_na=False,
                            na_values={c: ["", "nan", "NaN", "NA"] for c in numbers})
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise ValueError(_first_line(exc)) from None
    for column in labels:  # undo spreadsheet_safe
        table[column] = table[column].map(lambda v: v[1:] if isinstance(v, str) and v.startswith("'") else v)
    return table


def _first_line(exc) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__
