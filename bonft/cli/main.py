"""The ``bonft`` command: a thin dispatcher over :mod:`bonft.cli`."""
from __future__ import annotations

import argparse
import importlib
import sys

# name on the command line -> module in bonft.cli
COMMANDS = {
    "demo": "demo",
    "estimate": "estimate",
    "plan": "plan",
    "train": "train",
    "eval": "evaluate",
    "sample": "sample",
    "check-verifier": "check_verifier",
    "check-tests": "check_tests",
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="bonft",
        description="Measure, plan and fine-tune for best-of-N sampling and pass@k.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, module in COMMANDS.items():
        try:
            mod = importlib.import_module(f"bonft.cli.{module}")
        except ModuleNotFoundError as e:  # a command whose module is not there yet
            if e.name != f"bonft.cli.{module}":
                raise
            continue
        p = sub.add_parser(name, help=mod.HELP, description=getattr(mod, "DESCRIPTION", mod.HELP))
        mod.add_arguments(p)
        p.set_defaults(_run=mod.run)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    try:
        return int(args._run(args) or 0)
    except (ValueError, TypeError, FileNotFoundError) as e:
        print(f"bonft {args.command}: error: {e}", file=sys.stderr)
        return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
