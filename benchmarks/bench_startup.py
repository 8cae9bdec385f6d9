"""Start-up time of the quick commands, against bare Python in the same run.

Each command is started as a new process ``--repeat`` times (default 7); the
median wall time is printed beside the median of ``python -c pass`` and their
ratio, and whether the command finished under the target (0.5 s on an idle
2-core machine, issue "One home per concept"). Also printed: whether the
command imported PyMC, ArviZ or matplotlib (it must not).

    python benchmarks/bench_startup.py [--repeat 7]
"""
from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

TARGET_SECONDS = 0.5
HEAVY = ("pymc", "arviz", "matplotlib")
#: Prints which heavy modules a command imported, after running it in-process.
PROBE = ("import sys, runpy; sys.argv = ['hierwork'] + sys.argv[1:]\n"
         "try:\n    runpy.run_module('hierwork', run_name='__main__')\nexcept SystemExit:\n    pass\n"
         f"print('HEAVY:' + ','.join(m for m in {HEAVY!r} if m in sys.modules), file=sys.stderr)")


def _time(argv: list[str], repeat: int) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        subprocess.run(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def _heavy(args: list[str]) -> str:
    out = subprocess.run([sys.executable, "-c", PROBE, *args], capture_output=True, text=True).stderr
    line = [x for x in out.splitlines() if x.startswith("HEAVY:")]
    return line[-1][len("HEAVY:"):] if line else "?"


def _fixtures(folder: Path) -> dict:
    """A batch folder for ``status`` and a spec with a misspelt key for the bad-input path of ``check``."""
    from hierwork.batch.queue import Queue

    (folder / "batch").mkdir()
    Queue(folder / "batch", create=True).close()
    bad = folder / "bad.yaml"
    bad.write_text("format: hierwork/1\nname: x\ndata: d.csv\noutcom: {column: y}\ngroups: {g: {}}\n")
    return {"status": ["status", str(folder / "batch")], "check (bad input)": ["check", str(bad)]}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=7)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        commands = {"--help": ["--help"], "--version": ["--version"], "schema": ["schema"], **_fixtures(Path(tmp))}
        bare = _time([sys.executable, "-c", "pass"], args.repeat)
        print(f"python -c pass: {bare:.3f} s (median of {args.repeat})")
        print(f"{'command':<20} {'seconds':>8} {'x bare':>7}  {'target':<8} heavy imports")
        for name, argv in commands.items():
            seconds = _time([sys.executable, "-m", "hierwork", *argv], args.repeat)
            verdict = "met" if seconds < TARGET_SECONDS else "MISSED"
            print(f"{name:<20} {seconds:8.3f} {seconds / bare:7.2f}  {verdict:<8} {_heavy(argv) or 'none'}")


if __name__ == "__main__":
    main()
