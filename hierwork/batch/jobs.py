"""Turn spec files and folders into the batch's jobs.

A job is one spec (or one variant of it) with everything needed to run it
anywhere: the spec as a dict with ``variants``/``remedies`` removed and the
data path made absolute, the overrides for ``hierwork fit --set``, the retry
policy, and the hashes that tell a resumed batch whether the job changed.
A spec that cannot be read becomes a job that carries its error message, so
one bad file does not stop the batch.
"""
from __future__ import annotations

import hashlib
import json
import re
from dataclasses import dataclass, field
from pathlib import Path

import yaml

from hierwork.declare.remedies import DEFAULT_POLICY, Policy, parse_policy
from hierwork.declare.variants import SLUG, expand_variants, parse_variants
from hierwork.errors import HierworkError

SPEC_SUFFIXES = (".yaml", ".yml")


@dataclass(frozen=True)
class JobDef:
    """One job of a batch.

    Attributes
    ----------
    name : str
        ``<spec name>`` or ``<spec name>.<variant>``; names the job's folder.
    source : str
        The spec file it came from (absolute).
    overrides : dict
        Dotted spec path -> value, given to ``fit`` as ``--set``.
    spec : dict
        The spec to run (no variants/remedies, data path absolute).
    policy : Policy
        Retry policy when the gate fails.
    job_sha, data_sha : str
        SHA-256 of the job (spec + overrides) and of the data file (None if unreadable).
    error : str or None
        Why the spec could not be read; such a job is recorded as invalid.
    """

    name: str
    source: str
    overrides: dict = field(default_factory=dict)
    spec: dict = field(default_factory=dict)
    policy: Policy = DEFAULT_POLICY
    job_sha: str = ""
    data_sha: str | None = None
    error: str | None = None

    @property
    def data_path(self) -> Path | None:
        """The absolute data file, if the spec names one."""
        data = self.spec.get("data")
        return Path(data) if isinstance(data, str) else None

    def spec_text(self, data: str | None = None) -> str:
        """The job's spec as YAML, optionally pointing ``data`` elsewhere (e.g. a worker's copy)."""
        spec = dict(self.spec)
        if data is not None:
            spec["data"] = data
        return yaml.safe_dump(spec, sort_keys=False, allow_unicode=True)


def spec_files(paths) -> list[Path]:
    """The spec files named by ``paths`` (files as given; folders: their ``*.yaml``/``*.yml``, sorted).

    Raises
    ------
    HierworkError
        When a path does not exist or nothing is found.
    """
    found = []
    for raw in paths:
        path = Path(raw)
        if path.is_dir():
            found.extend(sorted(p for p in path.iterdir() if p.suffix in SPEC_SUFFIXES and p.is_file()))
        elif path.is_file():
            found.append(path)
        else:
            raise HierworkError(f"no spec file or folder at {str(raw)!r}", where="hierwork batch",
                                hint="give spec files or folders holding *.yaml specs")
    if not found:
        raise HierworkError(f"no *.yaml specs found in {', '.join(map(str, paths))}", where="hierwork batch")
    return [p.resolve() for p in found]


def load_jobs(paths) -> list[JobDef]:
    """Read every spec under ``paths`` and expand its variants into jobs.

    Raises
    ------
    HierworkError
        When a path is missing or two jobs share a name.
    """
    jobs = [job for path in spec_files(paths) for job in _jobs_of(path)]
    sources = {}
    for job in jobs:
        if job.name in sources:
            raise HierworkError(f"two jobs are named {job.name!r} ({sources[job.name]} and {job.source})",
                                where="hierwork batch", hint="give each spec its own 'name'")
        sources[job.name] = job.source
    return jobs


def _jobs_of(path: Path) -> list[JobDef]:
    jobs = _read_jobs(path)
    if jobs[0].error:  # hash the message and file, so a resumed batch retries it once it is edited
        try:
            content = file_sha256(path)
        except OSError:
            content = ""
        job_sha = hashlib.sha256(f"{jobs[0].error}\n{content}".encode()).hexdigest()
        jobs = [JobDef(name=jobs[0].name, source=str(path), error=jobs[0].error, job_sha=job_sha)]
    return jobs


def _read_jobs(path: Path) -> list[JobDef]:
    try:
        raw = yaml.safe_load(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, yaml.YAMLError) as exc:
        return [JobDef(name=_slug(path.stem), source=str(path),
                       error=f"{path}: cannot read the spec: {_first_line(exc)}")]
    if not isinstance(raw, dict):
        return [JobDef(name=_slug(path.stem), source=str(path),
                       error=f"{path}: a spec is a YAML mapping, got {raw!r}")]
    name = raw.get("name")
    name = name if isinstance(name, str) and SLUG.match(name) else _slug(path.stem)
    try:
        variants = parse_variants(raw.get("variants"), where=f"{path}: variants")
        policy = parse_policy(raw.get("remedies"), where=f"{path}: remedies")
    except HierworkError as exc:
        return [JobDef(name=name, source=str(path), error=str(exc))]
    base = {k: v for k, v in raw.items() if k not in ("variants", "remedies")}
    return [_job(job_name, path, base, overrides, policy)
            for job_name, overrides in expand_variants({"name": name, "variants": variants})]


def _job(name: str, path: Path, base: dict, overrides: dict, policy: Policy) -> JobDef:
    spec = dict(base)
    overrides = dict(overrides)
    if "data" in overrides:  # a variant may point at other data, relative to its spec file
        spec["data"] = overrides.pop("data")
    if isinstance(spec.get("data"), str):
        spec["data"] = str((path.parent / spec["data"]).resolve())
    data = spec.get("data")
    data_sha = file_sha256(Path(data)) if isinstance(data, str) and Path(data).is_file() else None
    job_sha = hashlib.sha256(json.dumps({"spec": spec, "overrides": overrides}, sort_keys=True,
                                        default=str).encode()).hexdigest()
    return JobDef(name=name, source=str(path), overrides=overrides, spec=spec, policy=policy,
                  job_sha=job_sha, data_sha=data_sha)


def file_sha256(path: Path) -> str:
    """SHA-256 of a file's bytes, read in 1 MiB blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _slug(text: str) -> str:
    """A job (and folder) name from a file name: letters, digits, '-' and '_' only."""
    return re.sub(r"[^A-Za-z0-9_-]+", "-", text).strip("-") or "spec"


def _first_line(exc: Exception) -> str:
    return " ".join(str(exc).split())
