"""``hierwork compare RUN_A RUN_B [--html OUT]``: what changed between two runs."""
from __future__ import annotations

from pathlib import Path

from . import printable


def register(sub) -> None:
    p = sub.add_parser("compare", help="spec, estimate and diagnostics changes between two runs",
                       description="Compare two run folders: spec differences, estimates whose "
                                   "posterior mean moved by more than their posterior SD, and "
                                   "the gate's checks side by side.")
    p.add_argument("run_a", metavar="RUN_A", help="reference run folder")
    p.add_argument("run_b", metavar="RUN_B", help="run folder to compare with it")
    p.add_argument("--html", metavar="OUT", help="also write the comparison as an HTML page")
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork
    from hierwork.errors import HierworkError
    from hierwork.runfolder import write_atomic

    comparison = hierwork.compare_runs(args.run_a, args.run_b)
    print(printable(comparison.text()), end="")
    if args.html:
        out = Path(args.html)
        if not out.parent.is_dir():
            raise HierworkError(f"folder {str(out.parent)!r} does not exist", where="--html",
                                hint="create it first or choose another path")
        write_atomic(out, comparison.html())
        print(f"wrote {out}")
    return 0
