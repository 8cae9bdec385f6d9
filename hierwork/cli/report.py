"""``hierwork report RUN``: rebuild report.html and summary.md in a run folder."""
from __future__ import annotations

from . import printable


def register(sub) -> None:
    p = sub.add_parser("report", help="rebuild report.html and summary.md of a run folder",
                       description="Rebuild report.html and summary.md in RUN from its files. "
                                   "Exit code 3 when the run's convergence gate failed.")
    p.add_argument("run", help="run folder written by 'hierwork fit'")
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork
    from hierwork.cli import EXIT_GATE, EXIT_OK

    written = hierwork.write_report(args.run)
    for path in written.paths.values():
        print(f"wrote {path}")
    print(printable(written.headline))
    return EXIT_GATE if written.status == "failed" else EXIT_OK
