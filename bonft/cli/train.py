"""``bonft train RECIPE.toml``: run (or resume) a training run from a recipe."""
from __future__ import annotations

import argparse
import os
import sys

from bonft.cli.interrupts import EXIT_TERMINATED, Terminated, terminate_as_interrupt

HELP = "fine-tune a model for best-of-N / pass@k from a TOML recipe (warm start + RL)"
DESCRIPTION = (
    "Run a recipe: an optional supervised warm start, then RL with a best-of-N-aware objective. "
    "Writes metrics.jsonl, checkpoints/, summary.json and curves.png under the run directory. "
    "Ctrl-C or SIGTERM (what a scheduler sends to preempt a job) writes a checkpoint of the last completed step "
    "(exit status 130 or 143); --resume continues exactly where the last checkpoint left off. "
    "Every recipe key is listed in docs/training.md."
)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("recipe", help="TOML recipe (see recipes/)")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a recipe key, e.g. --set lr=1e-4 --set task_params.hard_share=0.3 (repeatable)")
    p.add_argument("--output", default=None, metavar="DIR", help="run directory (overrides run_dir)")
    p.add_argument("--resume", action="store_true", help="continue from the newest checkpoint in the run directory")
    p.add_argument("--quiet", action="store_true", help="no progress bar or tables")


def run(args: argparse.Namespace) -> int:
    from bonft.trainer.config import load_config
    from bonft.trainer.loop import train

    overrides = list(args.overrides) + ([f"run_dir={args.output}"] if args.output else [])
    cfg = load_config(args.recipe, overrides)
    try:
        with terminate_as_interrupt():
            summary = train(cfg, resume=args.resume, progress=not args.quiet)
    except Terminated:
        print("bonft train: stopped by SIGTERM", file=sys.stderr)
        return EXIT_TERMINATED
    except KeyboardInterrupt:
        return 130
    if os.environ.get("RANK", "0") == "0":  # under torchrun only rank 0 reports, as only rank 0 writes
        print(f"run directory: {summary['run_dir']}")
    return 0
