"""``hierwork status BATCH_DIR``: a batch's progress and every job's state, from any terminal."""
from __future__ import annotations

import time


def register(sub) -> None:
    p = sub.add_parser("status", help="show a batch's progress and its jobs")
    p.add_argument("batch", metavar="BATCH_DIR", help="folder given to 'hierwork batch --out'")
    p.set_defaults(func=run)


def run(args) -> int:
    from hierwork.batch.progress import duration, status_lines
    from hierwork.batch.queue import Queue

    queue = Queue(args.batch)
    try:
        owner = queue.running_owner()
        print(f"batch {args.batch}: " + (f"running (pid {owner['pid']})" if owner else "not running"))
        for line in status_lines(queue):
            print(line)
        jobs = queue.jobs()
        width = max([len(j["name"]) for j in jobs] + [3])
        print()
        print(f"{'job':<{width}}  {'status':<11}  attempts  {'time':>7}  note")
        now = time.time()
        for job in jobs:
            took = duration((job["finished"] or now) - job["started"]) if job["started"] else ""
            print(f"{job['name']:<{width}}  {job['status']:<11}  {job['attempts']:>8}  {took:>7}  "
                  f"{job['message'] or ''}")
    finally:
        queue.close()
    return 0
