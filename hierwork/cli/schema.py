"""``hierwork schema``: print the JSON Schema of the spec format, for editors."""
from __future__ import annotations

import json


def register(sub) -> None:
    p = sub.add_parser("schema", help="print the JSON Schema of the spec format (for editors)")
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork

    print(json.dumps(hierwork.spec_schema(), indent=2))
    return 0
