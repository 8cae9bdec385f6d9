"""``hierwork poststratify RUN POPULATION.csv [--by AREA]... [--count COLUMN] [--out FILE.csv]``."""
from __future__ import annotations

import sys
from pathlib import Path


def register(sub) -> None:
    p = sub.add_parser("poststratify", help="population-weighted estimates per area from a run folder",
                       description="Post-stratification: the expected outcome of every cell of POPULATION.csv "
                                   "(on the outcome's scale, per posterior draw), weighted by the cell's count, "
                                   "per area and for the whole population. Writes by, area, count, mean, sd, "
                                   "lower, upper; the last row (area 'all') is the whole population.")
    p.add_argument("run", metavar="RUN", help="run folder written by 'hierwork fit'")
    p.add_argument("population", metavar="POPULATION.csv",
                   help="one row per population cell: the run's predictor and group columns and a count")
    p.add_argument("--by", action="append", default=[], metavar="AREA",
                   help="a factor of the run or a column of the table to estimate per area (repeatable)")
    p.add_argument("--count", default="count", metavar="COLUMN",
                   help="column of population counts (default: count)")
    p.add_argument("--out", metavar="FILE.csv", help="write the estimates here (default: standard output)")
    p.add_argument("--seed", type=int, metavar="N", help="seed of unseen groups' effects (default: the run's seed)")
    p.add_argument("--interval", type=float, metavar="P",
                   help="probability of the central interval (default: the run's estimates.interval)")
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork
    from hierwork.errors import HierworkError
    from hierwork.runfolder import write_atomic

    out = Path(args.out) if args.out else None
    if out is not None and not out.parent.is_dir():
        raise HierworkError(f"folder {str(out.parent)!r} does not exist", where="--out",
                            hint="create it first or choose another path")
    table = hierwork.poststratify(args.run, args.population, by=args.by, count=args.count, seed=args.seed,
                                  interval=args.interval)
    if out is None:
        table.to_csv(sys.stdout, index=False)
        return 0
    write_atomic(out, table.to_csv(index=False))
    print(f"wrote {out}: {len(table) - 1} areas and the whole population")
    return 0
