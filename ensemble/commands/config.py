"""``ensemble config``: print the documented default configuration (TOML)."""

from __future__ import annotations

import argparse

EXAMPLES = """examples:
  ensemble config > lab.toml          (then edit lab.toml and run with --config lab.toml)
  ensemble config --check lab.toml    (validate a configuration: exit 0, or 2 with the key)
"""


def add_parser(sub, parents) -> None:
    p = sub.add_parser("config", parents=parents, help="print or check a configuration",
                       description="Print the default configuration with every key, its unit, "
                                   "allowed values and meaning; or check a configuration file.",
                       epilog=EXAMPLES, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--check", metavar="FILE.toml", help="validate this file instead")
    p.set_defaults(func=main)


def main(args: argparse.Namespace) -> int:
    from ..config import documented_defaults, load_config

    if args.check:
        load_config(args.check)
        if not args.quiet:
            print(f"{args.check}: valid")
        return 0
    print(documented_defaults(), end="")
    return 0
