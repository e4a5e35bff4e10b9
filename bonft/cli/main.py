"""The ``bonft`` command: a thin dispatcher over :mod:`bonft.cli`.

User errors end in one line on stderr (``bonft COMMAND: error: ...``) and exit
status 2, never a Python traceback: bad values and types, missing or damaged
files and checkpoints, a failed peer process, running out of memory. Warnings
print as ``bonft COMMAND: warning: ...``. A closed stdout (``bonft ... | head``)
ends the command quietly with status 141 (128 + SIGPIPE, as other tools do);
Ctrl-C ends it with status 130. Anything else is a bug and keeps its traceback.
"""
from __future__ import annotations

import argparse
import importlib
import os
import sys
import warnings

# name on the command line -> module in bonft.cli
COMMANDS = {
    "demo": "demo",
    "estimate": "estimate",
    "compare": "compare",
    "plan": "plan",
    "train": "train",
    "eval": "evaluate",
    "sample": "sample",
    "check-verifier": "check_verifier",
    "check-tests": "check_tests",
    "check-objective": "check_objective",
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="bonft",
        description="Measure, plan and fine-tune for best-of-N sampling and pass@k.",
        allow_abbrev=False,
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, module in COMMANDS.items():
        try:
            mod = importlib.import_module(f"bonft.cli.{module}")
        except ModuleNotFoundError as e:  # a command whose module is not there yet
            if e.name != f"bonft.cli.{module}":
                raise
            continue
        # allow_abbrev=False: an option is spelled out, so a retired spelling is an error, never a prefix
        p = sub.add_parser(name, help=mod.HELP, description=getattr(mod, "DESCRIPTION", mod.HELP), allow_abbrev=False)
        mod.add_arguments(p)
        p.set_defaults(_run=mod.run)
    return parser


def _user_errors() -> tuple[type, ...]:
    """Exceptions that report a problem with the user's input or environment, not a bug."""
    errors: list[type] = [ValueError, TypeError, OSError, MemoryError, RecursionError]
    if "torch" in sys.modules:  # PeerError is a RuntimeError; import it only when torch is already loaded
        from bonft.trainer.distributed import PeerError

        errors.append(PeerError)
    if "bonft.verifiers.scoring" in sys.modules:  # a verifier that fails on a whole training step
        from bonft.verifiers.scoring import VerifierError

        errors.append(VerifierError)
    return tuple(errors)


def _message(e: BaseException) -> str:
    if isinstance(e, MemoryError):
        return f"out of memory ({e or 'allocation failed'}); lower --n-boot, --n or the batch sizes"
    if isinstance(e, RecursionError):
        return "input nested too deeply to read (a JSON line or value nested thousands of levels)"
    if isinstance(e, OSError) and e.filename is not None and e.strerror:
        return f"{e.strerror}: {e.filename}"
    text = str(e).strip() or type(e).__name__
    return text.splitlines()[0] if isinstance(e, OSError) else text


def _stdout_closed() -> int:
    """stdout's reader went away (``| head``): stop quietly, and keep Python from failing to flush at exit."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):
        pass
    return 141


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    prefix = f"bonft {args.command}"

    def show(message, category, filename, lineno, file=None, line=None) -> None:
        print(f"{prefix}: warning: {message}", file=sys.stderr)

    try:
        with warnings.catch_warnings():
            warnings.showwarning = show
            code = int(args._run(args) or 0)
            sys.stdout.flush()  # a closed pipe shows here, not at interpreter exit
        return code
    except BrokenPipeError:
        return _stdout_closed()
    except KeyboardInterrupt:
        print(f"\n{prefix}: interrupted", file=sys.stderr)
        return 130
    except _user_errors() as e:
        if isinstance(e, BrokenPipeError):  # pragma: no cover - handled above
            return _stdout_closed()
        print(f"{prefix}: error: {_message(e)}", file=sys.stderr)
        return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
