"""``hierwork predict RUN NEW.csv [--out FILE.csv]``: posterior predictive summaries for new rows."""
from __future__ import annotations

from hierwork.cli.options import add_table_options, output_path, write_table


def register(sub) -> None:
    p = sub.add_parser("predict", help="predict the outcome of new rows from a run folder",
                       description="Posterior predictive summaries for the rows of NEW.csv: known groups "
                                   "use their fitted effects, unseen groups draw theirs from the fitted "
                                   "population distribution. Writes the input columns plus pred_mean, "
                                   "pred_sd, pred_lower, pred_upper (the row's outcome), outcome_mean, "
                                   "outcome_lower, outcome_upper (its expected value on the outcome's "
                                   "scale), link_mean, link_lower, link_upper and group_status.")
    p.add_argument("run", metavar="RUN", help="run folder written by 'hierwork fit'")
    p.add_argument("new", metavar="NEW.csv", help="rows to predict (CSV or Parquet)")
    add_table_options(p, "predictions")
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork

    out = output_path(args)
    table = hierwork.predict(args.run, args.new, seed=args.seed, interval=args.interval)
    if not write_table(table, out):
        return 0
    status = table["group_status"].astype(str)
    print(f"wrote {out}: {len(table)} rows ({int(status.str.contains('new').sum())} with an unseen group)")
    return 0
