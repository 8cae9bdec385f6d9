"""``hierwork demo --out DIR``: make the demo data (if missing) and fit every demo spec."""
from __future__ import annotations

from pathlib import Path

from . import EXIT_GATE, EXIT_OK


def register(sub) -> None:
    p = sub.add_parser("demo", help="generate the invented demo data and fit every demo spec")
    p.add_argument("--out", default="runs/demo", metavar="DIR", help="folder for the run folders (default runs/demo)")
    p.add_argument("--force", action="store_true", help="replace existing run folders")
    p.add_argument("--only", action="append", metavar="NAME", help="fit only these demo specs (repeatable)")
    p.add_argument("--draws", type=int, metavar="N", help="override sampling.draws (quick look)")
    p.add_argument("--warmup", type=int, metavar="N", help="override sampling.warmup (quick look)")
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork

    overrides = {f"sampling.{k}": getattr(args, k) for k in ("draws", "warmup") if getattr(args, k) is not None}
    results = hierwork.run_demo(Path(args.out), force=args.force, only=args.only, overrides=overrides,
                                echo=print)
    failed = [name for name, run in results.items() if not run.passed]
    print(f"demo: {len(results) - len(failed)} of {len(results)} runs passed the gate; folders in {args.out}")
    return EXIT_GATE if failed else EXIT_OK
