"""The README's spec key reference, generated from ``SPEC_KEYS``.

``python -m hierwork.specdoc README.md`` rewrites the block between the
``<!-- spec-keys ... -->`` markers; a test checks that the README is in sync.
"""
from __future__ import annotations

import sys
from pathlib import Path

from .spec import REQUIRED, SPEC_KEYS, Key

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
        elif key.kind == "list" and key.item.kind == "predictor":
            rows += key_rows(key.item.fields, f"{path}[].")
    return rows


def _type(key: Key) -> str:
    if key.kind == "choice":
        return " \\| ".join(f"`{c}`" for c in key.choices)
    return {"named": "mapping", "section": "mapping", "predictor": "name or mapping",
            "prior": "`{dist: {param: value}}`"}.get(key.kind, key.kind)


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
