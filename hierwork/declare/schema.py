"""Documents derived from the key table: the JSON Schema and the README's key reference.

``hierwork schema`` prints :func:`spec_schema`. ``python -m hierwork.declare.schema
README.md`` rewrites the block of the README between the ``<!-- spec-keys ...
-->`` markers with :func:`table`; a test checks that the README is in sync.
"""
from __future__ import annotations

import sys
from pathlib import Path

from hierwork.declare.keys import REQUIRED, SPEC_KEYS, Key
from hierwork.plan.priors import DISTRIBUTIONS


def spec_schema() -> dict:
    """A JSON Schema (draft 2020-12) of the spec, generated from ``SPEC_KEYS``."""
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "$id": "hierwork-spec-1",
        "title": "hierwork model spec, format hierwork/1",
        **_schema_of(Key("section", "hierwork model spec", fields=SPEC_KEYS)),
    }


def _schema_of(key: Key) -> dict:
    out: dict = {"description": key.doc}
    if key.default is not REQUIRED and key.default is not None and key.kind not in ("section", "named"):
        out["default"] = key.default
    if key.kind == "section":
        out.update(type="object", additionalProperties=False,
                   properties={k: _schema_of(v) for k, v in key.fields.items()},
                   required=[k for k, v in key.fields.items() if v.default is REQUIRED])
    elif key.kind == "named":
        out.update(type="object", additionalProperties=_schema_of(key.item))
    elif key.kind == "list":
        item = _schema_of(key.item)
        out["anyOf"] = [{"type": "array", "items": item}, item]
    elif key.kind == "predictor":
        out["anyOf"] = [{"type": "string"}, _schema_of(Key("section", key.doc, fields=key.fields))]
    elif key.kind == "prior":
        out.update(type="object", minProperties=1, maxProperties=1, properties={
            dist: {"type": "object", "additionalProperties": False, "required": list(params),
                   "properties": {p: {"type": "number"} for p in params}}
            for dist, params in ((d.name, d.params) for d in DISTRIBUTIONS.values())}, additionalProperties=False)
    elif key.kind == "choice":
        out["enum"] = list(key.choices)
    elif key.kind in ("int", "float"):
        out["type"] = "integer" if key.kind == "int" else "number"
        if key.low is not None:
            out["exclusiveMinimum" if key.open_low else "minimum"] = key.low
        if key.high is not None:
            out["exclusiveMaximum" if key.open_high else "maximum"] = key.high
    elif key.kind == "str":
        out["type"] = "string"
        if key.pattern is not None:
            out["pattern"] = key.pattern.pattern
    elif key.kind == "bool":
        out["type"] = "boolean"
    elif key.kind == "reference":
        out["type"] = ["string", "number"]
    return out


# --------------------------------------------------------------------------- README table

START, END = "<!-- spec-keys:", "<!-- /spec-keys -->"


def key_rows(keys: dict, prefix: str = "") -> list:
    """(dotted key, type, default, description) for every key, depth first."""
    rows = []
    for name, key in keys.items():
        path = f"{prefix}{name}"
        rows.append((path, _type(key), _default(key), key.doc))
        if key.kind == "section":
            rows += key_rows(key.fields, f"{path}.")
        elif key.kind == "named" and key.item.kind == "section":
            rows += key_rows(key.item.fields, f"{path}.NAME.")
        elif key.kind == "list" and key.item.kind in ("predictor", "section"):
            rows += key_rows(key.item.fields, f"{path}[].")
    return rows


def _type(key: Key) -> str:
    if key.kind == "choice":
        return " \\| ".join(f"`{c}`" for c in key.choices)
    return {"named": "mapping", "section": "mapping", "predictor": "name or mapping",
            "prior": "`{dist: {param: value}}`",
            "reference": "`mean` \\| `zero` \\| number \\| level"}.get(key.kind, key.kind)


def _default(key: Key) -> str:
    if key.default is REQUIRED:
        return "required"
    if key.default in (None, {}, []) or key.kind == "section":
        return ""
    return f"`{key.default}`"


def table() -> str:
    lines = ["| key | type | default | meaning |", "| --- | --- | --- | --- |"]
    lines += [f"| `{k}` | {t} | {d} | {m} |" for k, t, d, m in key_rows(SPEC_KEYS)]
    return "\n".join(lines)


def render_into(text: str) -> str:
    """Replace the generated block of a README text with the current table."""
    head, _, rest = text.partition(START)
    marker_line, _, rest = rest.partition("\n")
    _, _, tail = rest.partition(END)
    return f"{head}{START}{marker_line}\n{table()}\n{END}{tail}"


if __name__ == "__main__":
    target = Path(sys.argv[1] if len(sys.argv) > 1 else "README.md")
    target.write_text(render_into(target.read_text(encoding="utf-8")), encoding="utf-8")
