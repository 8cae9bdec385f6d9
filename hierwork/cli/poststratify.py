"""``hierwork poststratify RUN POPULATION.csv [--by AREA]... [--count COLUMN] [--out FILE.csv]``."""
from __future__ import annotations

from hierwork.cli.options import add_table_options, output_path, write_table


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
    add_table_options(p, "estimates")
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork

    out = output_path(args)
    table = hierwork.poststratify(args.run, args.population, by=args.by, count=args.count, seed=args.seed,
                                  interval=args.interval)
    if not write_table(table, out):
        return 0
    print(f"wrote {out}: {len(table) - 1} areas and the whole population")
    return 0
