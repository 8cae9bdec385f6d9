"""Options shared by several commands: spec overrides, and the output of the commands that write a table."""
from __future__ import annotations

import sys
from pathlib import Path

import yaml

from hierwork.errors import SpecError


def add_override_options(parser) -> None:
    """``--chains --draws --warmup --seed`` and the general ``--set KEY=VALUE``."""
    group = parser.add_argument_group("spec overrides (validated as if written in the spec)")
    for name in ("chains", "draws", "warmup", "seed"):
        group.add_argument(f"--{name}", type=int, metavar="N", help=f"sampling.{name}")
    group.add_argument("--engine", choices=("auto", "pymc", "nutpie"), help="sampling.engine")
    group.add_argument("--set", dest="settings", action="append", default=[], metavar="KEY=VALUE",
                       help="any spec key by its dotted path, e.g. --set sampling.target_accept=0.95 "
                            "or --set groups.farm.parameterisation=non_centred (repeatable)")


def overrides_from(args) -> dict:
    """Collect the override options into ``{dotted.key: value}``."""
    out = {}
    for name in ("chains", "draws", "warmup", "seed", "engine"):
        if getattr(args, name, None) is not None:
            out[f"sampling.{name}"] = getattr(args, name)
    for item in args.settings:
        key, sep, raw = item.partition("=")
        if not sep or not key.strip():
            raise SpecError(f"--set expects KEY=VALUE, got {item!r}", hint="e.g. --set sampling.draws=2000")
        try:
            value = yaml.safe_load(raw) if raw.strip() else None
        except yaml.YAMLError:
            value = raw
        out[key.strip()] = value
    return out


def add_table_options(parser, what: str) -> None:
    """``--out FILE.csv --seed N --interval P`` of the commands that write a table from a run folder."""
    parser.add_argument("--out", metavar="FILE.csv", help=f"write the {what} here (default: standard output)")
    parser.add_argument("--seed", type=int, metavar="N", help="seed of the draws (default: the run's seed)")
    parser.add_argument("--interval", type=float, metavar="P",
                        help="probability of the central interval (default: the run's estimates.interval)")


def output_path(args) -> Path | None:
    """``--out`` as a path, refused before any work if its folder does not exist."""
    from hierwork.errors import HierworkError

    out = Path(args.out) if args.out else None
    if out is not None and not out.parent.is_dir():
        raise HierworkError(f"folder {str(out.parent)!r} does not exist", where="--out",
                            hint="create it first or choose another path")
    return out


def write_table(table, out: Path | None) -> bool:
    """Write ``table`` as CSV to ``out`` atomically, or to standard output; whether a file was written.

    Cells that a spreadsheet would run as a formula are neutralised (:func:`hierwork.runfolder.spreadsheet_safe`).
    """
    from hierwork.runfolder import spreadsheet_safe, write_atomic

    table = spreadsheet_safe(table)
    if out is None:
        table.to_csv(sys.stdout, index=False)
        return False
    write_atomic(out, table.to_csv(index=False))
    return True
