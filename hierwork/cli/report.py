"""``hierwork report RUN``: rebuild report.html and summary.md in a run folder."""
from __future__ import annotations


def register(sub) -> None:
    p = sub.add_parser("report", help="rebuild report.html and summary.md of a run folder",
                       description="Rebuild report.html and summary.md in RUN from its files. "
                                   "Exit code 3 when the run's convergence gate failed.")
    p.add_argument("run", help="run folder written by 'hierwork fit'")
    p.set_defaults(func=run)


def run(args) -> int:
    from hierwork.cli import EXIT_GATE, EXIT_OK
    from hierwork.report import write_report
    from hierwork.report.runfolder import read_run
    from hierwork.report.verdict import verdict

    written = write_report(args.run)
    for path in written.values():
        print(f"wrote {path}")
    result = verdict(read_run(args.run).diagnostics)
    print(result.headline)
    return EXIT_GATE if result.status == "failed" else EXIT_OK
