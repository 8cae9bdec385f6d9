"""``hierwork predict RUN NEW.csv [--out FILE.csv]``: posterior predictive summaries for new rows."""
from __future__ import annotations

import sys
from pathlib import Path


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
    p.add_argument("--out", metavar="FILE.csv", help="write the predictions here (default: standard output)")
    p.add_argument("--seed", type=int, metavar="N", help="seed of the draws (default: the run's seed)")
    p.add_argument("--interval", type=float, metavar="P",
                   help="probability of the central interval (default: the run's estimates.interval)")
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork
    from hierwork.errors import HierworkError
    from hierwork.runfolder import spreadsheet_safe, write_atomic

    out = Path(args.out) if args.out else None
    if out is not None and not out.parent.is_dir():
        raise HierworkError(f"folder {str(out.parent)!r} does not exist", where="--out",
                            hint="create it first or choose another path")
    table = spreadsheet_safe(hierwork.predict(args.run, args.new, seed=args.seed, interval=args.interval))
    if out is None:
        table.to_csv(sys.stdout, index=False)
        return 0
    write_atomic(out, table.to_csv(index=False))
    status = table["group_status"].astype(str)
    print(f"wrote {out}: {len(table)} rows ({int(status.str.contains('new').sum())} with an unseen group)")
    return 0
