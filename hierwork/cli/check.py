"""``hierwork check SPEC``: validate spec and data and print the plan, without sampling."""
from __future__ import annotations

import json

from . import printable
from .options import add_override_options, overrides_from


def register(sub) -> None:
    p = sub.add_parser("check", help="validate a spec and its data and print the model plan (no sampling)")
    p.add_argument("spec", help="model spec (YAML)")
    p.add_argument("--json", action="store_true", help="print the plan as JSON")
    p.add_argument("--prior-predictive", action="store_true",
                   help="also simulate outcomes from the priors and summarise what they imply")
    add_override_options(p)
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork

    report = hierwork.check(args.spec, overrides_from(args))
    print(json.dumps(report.to_dict(), indent=2) if args.json else printable(report.text()))
    if args.prior_predictive:
        print("\n" + report.prior_predictive_text())
    if not args.json:
        print("\ncheck OK: spec and data are valid")
    return 0
