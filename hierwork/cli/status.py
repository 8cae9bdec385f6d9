"""``hierwork status BATCH_DIR``: a batch's progress and every job's state, from any terminal."""
from __future__ import annotations

from . import printable


def register(sub) -> None:
    p = sub.add_parser("status", help="show a batch's progress and its jobs")
    p.add_argument("batch", metavar="BATCH_DIR", help="folder given to 'hierwork batch --out'")
    p.set_defaults(func=run)


def run(args) -> int:
    import hierwork

    print(printable(hierwork.batch_status(args.batch)))
    return 0
