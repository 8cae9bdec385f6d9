"""``hierwork batch SPEC_OR_FOLDER... --out DIR``: fit many specs, resumably, with remedies."""
from __future__ import annotations

import sys

from . import EXIT_GATE, EXIT_OK


def register(sub) -> None:
    p = sub.add_parser("batch", help="fit many specs (and their variants) into one resumable batch folder",
                       description="Fit every spec (files, or folders of *.yaml) and each of its variants "
                       "as one job; failed gates are retried with the spec's remedies. Exit code 0 when "
                       "every job passed its gate, 3 when some did not (see index.html).")
    p.add_argument("paths", nargs="*", metavar="SPEC_OR_FOLDER", help="spec files or folders of specs")
    p.add_argument("--out", metavar="DIR", help="batch folder (state, run folders, summary)")
    p.add_argument("--resume", nargs="?", const=True, default=False, metavar="DIR",
                   help="continue the batch in DIR (or --out): finished, unchanged jobs are skipped")
    p.add_argument("--workers", type=int, default=1, metavar="N",
                   help="fits running at once on this machine (default 1); chains share the cores")
    p.add_argument("--scheduler", metavar="tcp://HOST:PORT", help="run the jobs on this Dask scheduler's workers")
    p.add_argument("--dry-run", action="store_true", help="list the jobs and exit (nothing is written)")
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork
    from hierwork.batch.jobs import load_jobs
    from hierwork.errors import HierworkError

    out = args.resume if isinstance(args.resume, str) else args.out
    if args.dry_run:
        if not args.paths:
            raise HierworkError("--dry-run needs spec files or folders", where="hierwork batch")
        for line in dry_run_lines(load_jobs(args.paths)):
            print(line)
        return EXIT_OK
    if not out:
        raise HierworkError("no batch folder given", where="hierwork batch",
                            hint="add --out DIR (or --resume DIR to continue a batch)")
    if not args.paths and not args.resume:
        raise HierworkError("no specs given", where="hierwork batch",
                            hint="name spec files or folders, or --resume DIR")
    try:
        tally = hierwork.run_batch(args.paths, out, workers=args.workers, scheduler=args.scheduler,
                                   resume=bool(args.resume))
    except KeyboardInterrupt:
        print(f"hierwork: batch stopped; finished runs are kept; continue with: hierwork batch --resume {out}",
              file=sys.stderr)
        return 130
    print(f"batch finished: {', '.join(f'{n} {s}' for s, n in tally.items())}; summary: {out}/index.html")
    return EXIT_OK if set(tally) == {"passed"} else EXIT_GATE


def dry_run_lines(jobs) -> list[str]:
    """One line per job: name, spec file, overrides and retry policy, or why it cannot run.

    Each job's spec is validated with its overrides (as ``fit`` will), without reading the data.
    """
    from hierwork.errors import HierworkError
    from hierwork.declare.spec import load_spec

    lines = [f"{len(jobs)} jobs:"]
    for job in jobs:
        error = job.error
        if not error:
            try:
                load_spec(job.source, {"data": job.spec.get("data"), **job.overrides})
            except HierworkError as exc:
                error = str(exc)
        if error:
            lines.append(f"  {job.name}  [cannot run: {error}]")
            continue
        sets = " ".join(f"{k}={v!r}" for k, v in job.overrides.items()) or "(as written)"
        steps = ", ".join(s.text() for s in job.policy.steps) or "none"
        lines.append(f"  {job.name}  from {job.source}  {sets}  "
                     f"[up to {job.policy.max_attempts} attempts; remedies: {steps}]")
    return lines
