"""Model spec: YAML file -> validated, frozen :class:`Spec`.

Every key is checked against the table :data:`hierwork.declare.keys.SPEC_KEYS`
(types, defaults, ranges); this module walks it, applies overrides, and checks
what spans several keys (family columns, nesting, priors' parameters).
"""
from __future__ import annotations

import hashlib
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

from hierwork.declare.estimates import check_estimates
from hierwork.declare.keys import REQUIRED, SPEC_KEYS, Key
from hierwork.declare.yamlsource import YamlDocument, join, read_yaml
from hierwork.errors import SpecError, choices_hint
from hierwork.plan.families import FAMILY_NAMES, get_family
from hierwork.plan.families.base import COLUMN_ROLES
from hierwork.plan.priors import DISTRIBUTIONS

@dataclass(frozen=True)
class Outcome:
    """The outcome column, its family and the family's extra columns."""

    column: str
    family: str
    trials: str | None = None
    exposure: str | None = None
    known_sd: str | None = None
    levels: tuple | None = None


@dataclass(frozen=True)
class Predictor:
    """A population-level column: numeric (optionally transformed) or categorical (with reference level)."""

    column: str
    type: str = "auto"
    reference: object = None
    transform: str | None = None


@dataclass(frozen=True)
class Interaction:
    """An interaction of predictor columns; ``position`` is its entry in ``predictors`` (for messages)."""

    columns: tuple
    position: int


@dataclass(frozen=True)
class Factor:
    """A grouping factor as declared: name, label column, varying terms and nesting."""

    name: str
    column: str
    varying: tuple
    predictors: tuple
    within: str | None
    parameterisation: str
    predictor_settings: tuple = ()  # Predictor of each group-level column (type, reference, transform)
    spread: str = "fixed"  # "varying": each group its own residual SD


@dataclass(frozen=True)
class PriorSpec:
    """A prior as written: distribution name and its parameters."""

    dist: str
    params: dict


@dataclass(frozen=True)
class Spec:
    """A validated model spec.

    ``values`` is the full key tree with defaults filled in; the typed fields
    are views of it. ``document`` remembers file, text and key lines for messages.
    """

    values: dict
    document: YamlDocument = field(repr=False)
    data_path: Path = None
    outcome: Outcome = None
    predictors: tuple = ()
    factors: tuple = ()
    priors: dict = field(default_factory=dict)
    interactions: tuple = ()

    @property
    def name(self) -> str:
        return self.values["name"]

    @property
    def title(self) -> str:
        return self.values["title"] or self.values["name"]

    @property
    def sampling(self) -> dict:
        return self.values["sampling"]

    @property
    def gate(self) -> dict:
        return self.values["gate"]

    @property
    def interval(self) -> float:
        return self.values["estimates"]["interval"]

    @property
    def estimates(self) -> dict:
        """The ``estimates`` section (reference values, target, ranks, contrasts), defaults filled in."""
        return self.values["estimates"]

    @property
    def path(self) -> Path:
        return self.document.path

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.document.text.encode("utf-8")).hexdigest()

    def where(self, key_path: str) -> str:
        """``file:line: key.path`` of a key, for messages."""
        return self.document.where(key_path)

    def factor(self, name: str) -> Factor:
        return next(f for f in self.factors if f.name == name)


# --------------------------------------------------------------------------- loading

def load_spec(path, overrides: dict | None = None) -> Spec:
    """Read and validate a model spec.

    Parameters
    ----------
    path : str or Path
        The YAML spec file.
    overrides : dict, optional
        Dotted key paths and values applied before validation
        (``{"sampling.draws": 500}``), checked exactly as if written in the file.

    Returns
    -------
    Spec

    Raises
    ------
    SpecError
        Naming file, line and key path of the first problem found.
    """
    document = read_yaml(Path(path))
    if overrides:
        document = _apply_overrides(document, overrides)
    return spec_from_document(document)


def spec_from_document(document: YamlDocument) -> Spec:
    """Validate a parsed YAML document into a :class:`Spec`."""
    if not isinstance(document.content, dict):
        raise SpecError("a spec must be a YAML mapping of keys such as 'format', 'name', 'data'",
                        where=str(document.path), hint="see the README's spec reference")
    values = _validate_section(document.content, SPEC_KEYS, "", document)
    data_path = _data_file(document.path.parent / values["data"], values["data"], document.where("data"))
    outcome = Outcome(**values["outcome"])
    _check_outcome(outcome, document)
    predictors, interactions = _predictor_entries(values["predictors"], document)
    factors = tuple(
        Factor(name=name, column=f["column"] or name, varying=tuple(f["varying"]),
               predictors=tuple(p["column"] for p in f["predictors"]), within=f["within"],
               parameterisation=f["parameterisation"],
               predictor_settings=tuple(Predictor(**p) for p in f["predictors"]), spread=f["spread"])
        for name, f in values["groups"].items()
    )
    _check_factors(factors, predictors, document)
    _check_spread(factors, outcome, document)
    _check_names(outcome, predictors, factors, document)
    check_estimates(values, outcome, predictors, factors, document)
    priors = {k: PriorSpec(*next(iter(v.items()))) for k, v in values["priors"].items()}
    return Spec(values=values, document=document, data_path=data_path, outcome=outcome,
                predictors=predictors, factors=factors, priors=priors, interactions=interactions)


def _predictor_entries(entries: list, doc: YamlDocument) -> tuple:
    """Split ``predictors`` into columns and interactions, checking each entry's form."""
    columns = [e["column"] for e in entries if e["column"] is not None]
    predictors, interactions, seen = [], [], set()
    for i, e in enumerate(entries):
        where = doc.where(f"predictors[{i}]")
        if e["interaction"] is None:
            if e["column"] is None:
                raise SpecError("a predictor needs 'column' (or 'interaction')", where=where,
                                hint="write - dose, - {column: dose, transform: log} or "
                                     "- {interaction: [engine_hours, sea_state]}")
            if columns.count(e["column"]) > 1:
                raise SpecError(f"predictor {e['column']!r} is listed twice", where=where)
            predictors.append(Predictor(e["column"], e["type"], e["reference"], e["transform"]))
            continue
        extra = [k for k in ("column", "reference", "transform") if e[k] is not None] + ["type"] * (e["type"] != "auto")
        if extra:
            raise SpecError(f"an interaction entry takes no {extra[0]!r}", where=where,
                            hint="list the columns under 'predictors' with their own settings; "
                                 "the interaction multiplies their terms")
        parts = tuple(e["interaction"])
        if len(set(parts)) < 2 or len(set(parts)) != len(parts):
            raise SpecError(f"an interaction needs two or more different columns, got {list(parts)!r}",
                            where=doc.where(f"predictors[{i}].interaction"))
        for column in parts:
            if column not in columns:
                raise SpecError(f"interaction column {column!r} is not listed in 'predictors'",
                                where=doc.where(f"predictors[{i}].interaction"),
                                hint=f"add - {column} to 'predictors' (its main effect)")
        if frozenset(parts) in seen:
            raise SpecError(f"the interaction of {' and '.join(parts)} is listed twice", where=where)
        seen.add(frozenset(parts))
        interactions.append(Interaction(parts, i))
    return tuple(predictors), tuple(interactions)


def _data_file(path: Path, given: str, where: str) -> Path:
    """The data file's absolute path; a user error unless it is a readable regular file."""
    try:
        resolved = path.resolve(strict=False)
    except (RuntimeError, OSError):  # RuntimeError: Python 3.11's report of a symbolic link loop
        raise SpecError(f"data file {given!r} is a symbolic link loop", where=where,
                        hint="point 'data' at the file itself") from None
    if resolved.is_dir():
        raise SpecError(f"data {given!r} is a folder, not a file (looked for {resolved})", where=where,
                        hint="give the CSV or Parquet file inside it")
    if resolved.exists() and not resolved.is_file():
        raise SpecError(f"data {given!r} is not a regular file (a pipe or device: {resolved})", where=where,
                        hint="save the data to a file first")
    if not resolved.is_file():
        raise SpecError(f"data file {given!r} not found (looked for {resolved})", where=where,
                        hint="paths are relative to the spec file")
    return resolved


def _apply_overrides(document: YamlDocument, overrides: dict) -> YamlDocument:
    import copy

    content = copy.deepcopy(document.content) if isinstance(document.content, dict) else {}
    for dotted, value in overrides.items():
        parts = str(dotted).split(".")
        if parts[0] == "priors" and len(parts) > 2:
            parts = ["priors", ".".join(parts[1:])]  # prior names contain dots: farm.nitrogen.sd
        node = content
        for i, part in enumerate(parts[:-1]):
            if part not in node or node[part] is None:
                node[part] = {}
            node = node[part]
            if not isinstance(node, dict):
                raise SpecError(f"cannot set {dotted!r}: {'.'.join(parts[:i + 1])!r} is not a mapping",
                                where=f"override {dotted}={value!r}")
        node[parts[-1]] = value
    origins = {".".join(parts): f"override {dotted}={value!r}" for dotted, value in overrides.items()
               for parts in [str(dotted).split(".")]}
    return YamlDocument(document.path, document.text, content, dict(document.lines), origins)


def _validate_section(content, keys: dict, path: str, doc: YamlDocument) -> dict:
    if not isinstance(content, dict):
        raise SpecError(f"expected a mapping, got {_show(content)}", where=doc.where(path))
    for key in content:
        if key not in keys:
            raise SpecError(f"unknown key {key!r}", where=doc.where(join(path, key)),
                            hint=choices_hint(key, list(keys)))
    out = {}
    for name, key in keys.items():
        child = join(path, name)
        if name in content and content[name] is not None:
            out[name] = _validate_value(content[name], key, child, doc)
        elif key.default is REQUIRED:
            raise SpecError(f"missing required key {name!r}", where=doc.where(path) if path else str(doc.path),
                            hint=key.doc)
        elif key.kind == "section" and key.default is not None:
            out[name] = _validate_section({}, key.fields, child, doc)
        else:
            out[name] = key.default
    return out


def _validate_value(value, key: Key, path: str, doc: YamlDocument):
    where = doc.where(path)
    kind = key.kind
    if kind == "section":
        return _validate_section(value, key.fields, path, doc)
    if kind == "named":
        if not isinstance(value, dict):
            raise SpecError(f"expected a mapping of names, got {_show(value)}", where=where)
        if key.default is REQUIRED and not value:
            raise SpecError("at least one entry is needed", where=where, hint=key.doc)
        return {name: _validate_value(v if v is not None else {}, key.item, join(path, name), doc)
                for name, v in value.items()}
    if kind == "list":
        if isinstance(value, (str, int, float)):
            value = [value]
        if not isinstance(value, list):
            raise SpecError(f"expected a list, got {_show(value)}", where=where)
        return [_validate_value(v, key.item, join(path, i), doc) for i, v in enumerate(value)]
    if kind == "predictor":
        if isinstance(value, str):
            value = {"column": value}
        return _validate_section(value, key.fields, path, doc)
    if kind == "prior":
        return _validate_prior(value, path, doc)
    if kind in ("str", "choice"):
        if isinstance(value, bool) or not isinstance(value, (str, int, float)):
            raise SpecError(f"expected text, got {_show(value)}", where=where)
        value = str(value)
        if kind == "choice" and value not in key.choices:
            raise SpecError(f"{value!r} is not allowed", where=where, hint=choices_hint(value, key.choices))
        if key.pattern is not None and not key.pattern.match(value):
            raise SpecError(f"{value!r} is not a valid name", where=where, hint=key.doc)
        return value
    if kind == "bool":
        if not isinstance(value, bool):
            raise SpecError(f"expected true or false, got {_show(value)}", where=where)
        return value
    if kind in ("int", "float"):
        return _validate_number(value, key, where)
    if kind == "reference":
        if isinstance(value, bool) or not isinstance(value, (str, int, float)):
            raise SpecError(f"expected 'mean', 'zero', a number or a level, got {_show(value)}", where=where,
                            hint=key.doc)
        return value
    if kind == "batch":
        key.check(value, where)
        return value
    raise AssertionError(f"unknown key kind {kind}")


def _validate_number(value, key: Key, where: str):
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise SpecError(f"expected a number, got {_show(value)}", where=where)
    if key.kind == "int":
        if isinstance(value, float) and not value.is_integer():
            raise SpecError(f"expected a whole number, got {value!r}", where=where)
        value = int(value)
    else:
        value = float(value)
        if not math.isfinite(value):
            raise SpecError(f"expected a finite number, got {value!r}", where=where)
    too_low = key.low is not None and (value <= key.low if key.open_low else value < key.low)
    too_high = key.high is not None and (value >= key.high if key.open_high else value > key.high)
    if too_low or too_high:
        raise SpecError(f"{value!r} is out of range", where=where, hint=f"allowed: {_range_text(key)}")
    return value


def _validate_prior(value, path: str, doc: YamlDocument) -> dict:
    where = doc.where(path)
    example = "write it as {normal: {mu: 0, sigma: 1}}"
    if not isinstance(value, dict) or len(value) != 1:
        raise SpecError(f"a prior is one distribution with its parameters, got {_show(value)}",
                        where=where, hint=example)
    dist, params = next(iter(value.items()))
    if dist not in DISTRIBUTIONS:
        raise SpecError(f"unknown prior distribution {dist!r}", where=where,
                        hint=choices_hint(dist, DISTRIBUTIONS))
    params = params or {}
    if not isinstance(params, dict):
        raise SpecError(f"parameters of {dist!r} must be a mapping, got {_show(params)}",
                        where=where, hint=example)
    wanted = DISTRIBUTIONS[dist].params
    for name in params:
        if name not in wanted:
            raise SpecError(f"unknown parameter {name!r} for {dist!r}", where=doc.where(join(path, dist)),
                            hint=choices_hint(name, wanted))
    missing = [w for w in wanted if w not in params]
    if missing:
        raise SpecError(f"{dist!r} needs {', '.join(map(repr, missing))}", where=doc.where(join(path, dist)),
                        hint=f"parameters: {', '.join(wanted)}")
    checked = {}
    for name in wanted:
        v = params[name]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise SpecError(f"parameter {name!r} must be a finite number, got {_show(v)}",
                            where=doc.where(join(path, dist)))
        if name in DISTRIBUTIONS[dist].positive and v <= 0:
            raise SpecError(f"parameter {name!r} of {dist!r} must be positive, got {v!r}",
                            where=doc.where(join(path, dist)))
        checked[name] = float(v)
    if dist == "uniform" and checked["lower"] >= checked["upper"]:
        raise SpecError("uniform prior needs lower < upper", where=where)
    return {dist: checked}


def _check_outcome(outcome: Outcome, doc: YamlDocument) -> None:
    """The outcome's extra columns must be ones its family uses, and those it needs must be given."""
    family = get_family(outcome.family)
    for key in ("trials", "exposure", "known_sd"):
        if getattr(outcome, key) is not None and key not in family.columns:
            users = [name for name in FAMILY_NAMES if key in get_family(name).columns]
            raise SpecError(f"'{key}' does not apply to family {family.name!r}", where=doc.where(f"outcome.{key}"),
                            hint=f"it is for {' / '.join(users)}; remove it or change the family")
    if outcome.levels is not None:
        if family.name != "ordinal":
            raise SpecError(f"'levels' does not apply to family {family.name!r}", where=doc.where("outcome.levels"),
                            hint="it gives the order of an ordinal outcome; remove it or use family ordinal")
        if len(outcome.levels) < 2 or len(set(outcome.levels)) != len(outcome.levels):
            raise SpecError(f"outcome.levels must list two or more different levels, got {list(outcome.levels)}",
                            where=doc.where("outcome.levels"), hint="write e.g. levels: [low, mid, high]")
    for key in family.required:
        if getattr(outcome, key) is None:
            raise SpecError(f"family {family.name!r} needs {key!r}: the column with the {COLUMN_ROLES[key]}",
                            where=doc.where("outcome.family"),
                            hint=f"add outcome.{key}" + (", or use family bernoulli for 0/1"
                                                         if family.name == "binomial" else ""))


#: Characters a factor's name may not hold: the joiner of nested labels, and line breaks or
#: other control characters (names become parts of file, column and variable names).
_NAME_FORBIDDEN = re.compile(r"[/\x00-\x1f\x7f]")


def _check_names(outcome, predictors, factors, doc: YamlDocument) -> None:
    """Names that later stages use as labels and parameter names must be usable; the outcome is not an input."""
    for f in factors:
        if _NAME_FORBIDDEN.search(f.name) or f.name != f.name.strip() or not f.name:
            raise SpecError(f"factor name {f.name!r} cannot be used: no '/', line breaks, control characters "
                            "or surrounding spaces", where=doc.where(f"groups.{f.name}"),
                            hint="rename the factor (e.g. 'site'), and give its column with 'column:'")
    for i, p in enumerate(predictors):
        if p.column == "intercept" or "=" in p.column:
            raise SpecError(f"predictor {p.column!r} clashes with the names of terms ('intercept', 'column=level')",
                            where=doc.where(f"predictors[{i}]"), hint="rename the column in the data file")
    inputs = {p.column: f"predictors[{i}]" for i, p in enumerate(predictors)}
    for f in factors:
        inputs.setdefault(f.column, f"groups.{f.name}.column")
        for term in f.varying:
            inputs.setdefault(term, f"groups.{f.name}.varying")
        for column in f.predictors:
            inputs.setdefault(column, f"groups.{f.name}.predictors")
    if outcome.column in inputs:
        where = inputs[outcome.column]
        raise SpecError(f"the outcome {outcome.column!r} is also used as an input ({where})",
                        where=doc.where(where), hint="a column cannot explain itself; remove it there")


def _check_factors(factors, predictors, doc: YamlDocument) -> None:
    names = [f.name for f in factors]
    pred_names = [p.column for p in predictors]
    transformed = {p.column: p.transform for p in predictors if p.transform}
    for f in factors:
        base = f"groups.{f.name}"
        if "intercept" not in f.varying:
            raise SpecError("'varying' must include 'intercept'", where=doc.where(f"{base}.varying"),
                            hint="write varying: [intercept, ...]")
        if len(set(f.varying)) != len(f.varying):
            raise SpecError("a term is listed twice in 'varying'", where=doc.where(f"{base}.varying"))
        for i, term in enumerate(f.varying):
            if term != "intercept" and term in f.predictors:
                raise SpecError(f"{term!r} cannot be both a varying slope and a group-level predictor",
                                where=doc.where(f"{base}.varying[{i}]"))
            if term in transformed:
                raise SpecError(f"{term!r} enters transformed ({transformed[term]}); only untransformed "
                                "columns can have varying slopes", where=doc.where(f"{base}.varying[{i}]"),
                                hint="add a column holding the transformed values and vary that")
        if f.within is not None:
            if f.within not in names:
                raise SpecError(f"'within' names {f.within!r}, which is not a factor in 'groups'",
                                where=doc.where(f"{base}.within"), hint=choices_hint(f.within, names))
            if f.within == f.name:
                raise SpecError("a factor cannot be nested within itself", where=doc.where(f"{base}.within"))
    parent = {f.name: f.within for f in factors}
    for f in factors:
        seen, node = [f.name], parent[f.name]
        while node is not None:
            if node in seen:
                cycle = " -> ".join(seen + [node])
                raise SpecError(f"nesting forms a cycle: {cycle}", where=doc.where(f"groups.{f.name}.within"),
                                hint="'within' must point up a tree, towards larger groups")
            seen.append(node)
            node = parent[node]
    columns = [f.column for f in factors]
    for f in factors:
        if columns.count(f.column) > 1:
            raise SpecError(f"column {f.column!r} is used by two factors", where=doc.where(f"groups.{f.name}"))
        if f.column in pred_names:
            raise SpecError(f"column {f.column!r} is both a grouping factor and a predictor",
                            where=doc.where(f"groups.{f.name}"))


def _check_spread(factors, outcome: Outcome, doc: YamlDocument) -> None:
    """A varying spread needs a family with a residual SD to vary (not known per-row SDs)."""
    from hierwork.plan.families.base import OutcomeRows

    family = get_family(outcome.family)
    for f in factors:
        if f.spread != "varying":
            continue
        where = doc.where(f"groups.{f.name}.spread")
        if "residual_sd" not in family.parameters(OutcomeRows(None)):
            users = [n for n in FAMILY_NAMES if "residual_sd" in get_family(n).parameters(OutcomeRows(None))]
            raise SpecError(f"family {family.name!r} has no residual SD to vary by {f.name}", where=where,
                            hint=f"spread: varying is for {' / '.join(users)} outcomes; remove it")
        if outcome.known_sd is not None:
            raise SpecError("spread: varying cannot apply with known per-row SDs (outcome.known_sd)",
                            where=where, hint="remove one of the two")


def _show(value) -> str:
    kind = {dict: "a mapping", list: "a list", type(None): "nothing"}.get(type(value))
    return kind or repr(value)


def _range_text(key: Key) -> str:
    lo = "" if key.low is None else f"{key.low} {'<' if key.open_low else '<='} "
    hi = "" if key.high is None else f" {'<' if key.open_high else '<='} {key.high}"
    return f"{lo}value{hi}"
