"""Sub-commands of the ``bonft`` command, one module each.

Each module defines ``HELP`` (one line), ``add_arguments(parser)`` and
``run(args) -> int``. Modules import heavy dependencies inside ``run`` so that
``bonft --help`` stays fast.
"""
