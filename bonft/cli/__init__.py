"""The ``bonft`` command: :mod:`.main` dispatches to one module per sub-command.

Each command module defines ``HELP`` (one line), ``add_arguments(parser)`` and
``run(args) -> int``. Modules import heavy dependencies inside ``run`` so that
``bonft --help`` stays fast.
"""
from bonft.cli.main import COMMANDS, build_parser, main

__all__ = ["COMMANDS", "build_parser", "main"]
