"""Variants: one spec declares a sweep that expands into named jobs.

Two forms, both under the spec's ``variants:`` key::

    variants:                       # a list of named variants
      - name: centred
        set: {groups.farm.parameterisation: centred}
      - name: wide-sd-prior
        set: {priors.farm.sd: {half_normal: {sigma: 5}}}

    variants:                       # a cartesian sweep
      sweep:
        groups.farm.parameterisation: [centred, non_centred]
        sampling.target_accept: [0.9, 0.95]

Each variant becomes the job ``<spec name>.<variant name>``; a sweep's variant
names are built from the last part of each key and the value, e.g.
``parameterisation-centred.target_accept-0_95`` (dots in values become
``_``). Overrides are dotted spec paths, applied exactly like
``hierwork fit --set KEY=VALUE``.
"""
from __future__ import annotations

import itertools
import re
from collections.abc import Mapping
from dataclasses import dataclass

from hierwork.errors import SpecError

SLUG = re.compile(r"^[A-Za-z0-9_-]+$")
DOTTED_KEY = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*(\.[A-Za-z0-9_]+)*$")
#: keys a variant may not set: they describe the batch itself, not one fit.
RESERVED = ("variants", "remedies", "format", "name")


@dataclass(frozen=True)
class Variant:
    """One named set of overrides.

    Attributes
    ----------
    name : str
        Slug appended to the spec name to name the job.
    overrides : dict
        Dotted spec path -> value.
    """

    name: str
    overrides: dict


def parse_variants(value, where: str = "variants") -> tuple[Variant, ...]:
    """Validate a spec's ``variants:`` value and return the variants in order.

    Parameters
    ----------
    value : list, dict or None
        The raw YAML value (``None`` or an empty list: no variants).
    where : str
        Location used in error messages (file and key path).

    Returns
    -------
    tuple of Variant

    Raises
    ------
    SpecError
        On an unknown form, a bad name, a bad key or a duplicate name.
    """
    if value is None or value == []:
        return ()
    if isinstance(value, Mapping):
        variants = _parse_sweep(value, where)
    elif isinstance(value, list):
        variants = tuple(_parse_named(item, f"{where}[{i}]") for i, item in enumerate(value))
    else:
        raise SpecError(f"variants must be a list of {{name, set}} or {{sweep: ...}}, got {value!r}",
                        where=where, hint="see docs/batch.md, 'Variants'")
    seen = set()
    for variant in variants:
        if variant.name in seen:
            raise SpecError(f"two variants are named {variant.name!r}", where=where,
                            hint="give every variant its own name")
        seen.add(variant.name)
    return variants


def _parse_named(item, where: str) -> Variant:
    if not isinstance(item, Mapping) or "name" not in item:
        raise SpecError(f"each variant needs a name and a set of overrides, got {item!r}",
                        where=where, hint="write {name: my-variant, set: {sampling.draws: 2000}}")
    unknown = sorted(set(item) - {"name", "set"})
    if unknown:
        raise SpecError(f"unknown variant key {unknown[0]!r}", where=where, hint="valid: 'name', 'set'")
    name = str(item["name"])
    if not SLUG.match(name):
        raise SpecError(f"variant name {name!r} may only hold letters, digits, '-' and '_'",
                        where=f"{where}.name")
    overrides = item.get("set") or {}
    if not isinstance(overrides, Mapping):
        raise SpecError(f"'set' must map dotted spec keys to values, got {overrides!r}",
                        where=f"{where}.set", hint="write set: {sampling.draws: 2000}")
    for key in overrides:
        _check_key(key, f"{where}.set")
    return Variant(name, dict(overrides))


def _parse_sweep(value: Mapping, where: str) -> tuple[Variant, ...]:
    if set(value) != {"sweep"}:
        extra = sorted(set(value) - {"sweep"}) or ["(nothing)"]
        raise SpecError(f"a variants mapping holds only 'sweep', found {extra[0]!r}", where=where,
                        hint="write variants: {sweep: {sampling.target_accept: [0.9, 0.95]}}")
    sweep = value["sweep"]
    if not isinstance(sweep, Mapping) or not sweep:
        raise SpecError(f"sweep must map dotted spec keys to lists of values, got {sweep!r}",
                        where=f"{where}.sweep")
    for key, values in sweep.items():
        _check_key(key, f"{where}.sweep")
        if not isinstance(values, list) or not values:
            raise SpecError(f"sweep values for {key!r} must be a non-empty list, got {values!r}",
                            where=f"{where}.sweep.{key}", hint=f"write {key}: [value1, value2]")
    keys = list(sweep)
    labels = _labels(keys)
    variants = []
    for combo in itertools.product(*(list(enumerate(sweep[k], 1)) for k in keys)):
        parts = [f"{labels[k]}-{_value_slug(v, i)}" for k, (i, v) in zip(keys, combo)]
        variants.append(Variant(".".join(parts), {k: v for k, (_, v) in zip(keys, combo)}))
    return tuple(variants)


def _check_key(key, where: str) -> None:
    if not isinstance(key, str) or not DOTTED_KEY.match(key):
        raise SpecError(f"override key {key!r} is not a dotted spec path", where=where,
                        hint="write e.g. sampling.target_accept or groups.farm.parameterisation")
    if key.split(".")[0] in RESERVED:
        raise SpecError(f"a variant cannot set {key!r}", where=where,
                        hint=f"variants may set any key except {', '.join(RESERVED)}")


def _labels(keys: list[str]) -> dict[str, str]:
    """Short label per sweep key: its last part, or the whole path if that is ambiguous."""
    leaves = [k.split(".")[-1] for k in keys]
    return {k: (leaf if leaves.count(leaf) == 1 else k.replace(".", "-")) for k, leaf in zip(keys, leaves)}


def _value_slug(value, position: int) -> str:
    if isinstance(value, (Mapping, list)):
        return f"v{position}"
    return re.sub(r"[^A-Za-z0-9_-]+", "-", str(value).replace(".", "_")).strip("-") or f"v{position}"


def expand_variants(spec) -> list[tuple[str, dict]]:
    """Expand a spec into ``(job_name, overrides)`` pairs.

    Parameters
    ----------
    spec : Spec or mapping
        A loaded :class:`~hierwork.declare.spec.Spec` (its ``values``) or a mapping
        with ``name`` and optional ``variants`` (raw YAML or already parsed).

    Returns
    -------
    list of (str, dict)
        ``[(name, {})]`` for a spec without variants, else one pair per
        variant named ``<name>.<variant>``.
    """
    values = spec if isinstance(spec, Mapping) else spec.values
    name = str(values["name"])
    raw = values.get("variants")
    variants = raw if isinstance(raw, tuple) else parse_variants(raw)
    if not variants:
        return [(name, {})]
    return [(f"{name}.{v.name}", dict(v.overrides)) for v in variants]


def describe_variants(spec) -> list[str]:
    """Lines for ``hierwork check``: the jobs a batch would make of this spec (empty without variants)."""
    jobs = expand_variants(spec)
    if len(jobs) == 1 and not jobs[0][1]:
        return []
    lines = [f"variants ({len(jobs)} jobs in a batch)"]
    for name, overrides in jobs:
        lines.append(f"  {name}: " + (", ".join(f"{k}={v!r}" for k, v in overrides.items()) or "as written"))
    return lines
