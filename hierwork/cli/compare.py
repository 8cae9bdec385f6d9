"""``hierwork compare RUN_A RUN_B [--html OUT]``: what changed between two runs."""
from __future__ import annotations

from pathlib import Path

from . import printable


def register(sub) -> None:
    p = sub.add_parser("compare", help="spec, estimate and diagnostics changes between two runs",
                       description="Compare two run folders: spec differences (with the values each "
                                   "run used), every parameter side by side with its change in "
                                   "posterior SDs, the group estimates that moved, and the gate's "
                                   "checks side by side.")
    p.add_argument("run_a", metavar="RUN_A", help="reference run folder")
    p.add_argument("run_b", metavar="RUN_B", help="run folder to compare with it")
    p.add_argument("--html", metavar="OUT", help="also write the comparison as an HTML page")
    p.add_argument("--moved", metavar="SDS", type=_positive, default=1.0,
                   help="change, in posterior SDs, beyond which an estimate counts as moved (default 1)")
    p.set_defaults(func=run)


def _positive(text: str) -> float:
    import argparse

    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if not value > 0:
        raise argparse.ArgumentTypeError(f"must be a positive number of posterior SDs, not {text!r}")
    return value


def run(args) -> int:
    import hierwork
    from hierwork.errors import HierworkError
    from hierwork.runfolder import write_atomic

    comparison = hierwork.compare_runs(args.run_a, args.run_b, moved=args.moved)
    print(printable(comparison.text()), end="")
    if args.html:
        out = Path(args.html)
        if not out.parent.is_dir():
            raise HierworkError(f"folder {str(out.parent)!r} does not exist", where="--html",
                                hint="create it first or choose another path")
        write_atomic(out, comparison.html())
        print(f"wrote {out}")
    return 0
