"""Options shared by several commands (spec overrides)."""
from __future__ import annotations

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
