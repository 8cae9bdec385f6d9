"""``hierwork fit SPEC --out DIR``: sample, gate, and write a run folder."""
from __future__ import annotations

import sys

from . import EXIT_GATE, EXIT_OK, printable
from .options import add_override_options, overrides_from


def register(sub) -> None:
    p = sub.add_parser("fit", help="fit a spec and write a gated run folder")
    p.add_argument("spec", help="model spec (YAML)")
    p.add_argument("--out", required=True, metavar="DIR", help="run folder to create")
    p.add_argument("--force", action="store_true", help="replace DIR if it exists (after the new run is complete)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_override_options(p)
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork
    from hierwork.formatting import number, number_against

    result = hierwork.fit(args.spec, out=args.out, force=args.force, overrides=overrides_from(args),
                          progress=False if args.quiet else None)
    print(printable(f"run folder: {result.path}"))
    for check in result.diagnostics["checks"]:
        mark = "ok  " if check["passed"] else "FAIL"
        where = f"  (worst: {check['worst_parameter']})" if check["worst_parameter"] and not check["passed"] else ""
        print(f"  {mark} {check['name']:<12} {number_against(check['value'], check['threshold'])}  needs "
              f"{check['comparison']} {number(check['threshold'])}{where}")
    verdict = "gate PASSED: estimates may be used" if result.passed else \
        "gate FAILED: estimates are NOT valid (see diagnostics.json for advice)"
    print(verdict, file=sys.stdout)
    return EXIT_OK if result.passed else EXIT_GATE
