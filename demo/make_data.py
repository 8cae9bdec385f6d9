"""Write the invented demo data sets into demo/data/ (or --out).

Usage: python demo/make_data.py [--out DIR] [--seed N]

The simulation itself lives in :mod:`hierwork.demo`, which ``hierwork demo``
also calls.
"""
import argparse
from pathlib import Path

from hierwork.demo import DEFAULT_SEED, make_demo_data


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=Path(__file__).resolve().parent / "data",
                        help="folder to write the CSV files into (default: demo/data)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED,
                        help=f"random seed (default: {DEFAULT_SEED})")
    args = parser.parse_args(argv)
    for name, path in make_demo_data(args.out, seed=args.seed).items():
        print(f"{name}: {path}")


if __name__ == "__main__":
    main()
