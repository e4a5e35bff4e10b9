"""``bonft demo``: warm start a tiny model, then compare leave-one-out REINFORCE, a pass@k-aware objective and a placebo."""
from __future__ import annotations

import argparse
import dataclasses
import inspect
import re

from bonft.cli.interrupts import EXIT_TERMINATED, Terminated, terminate_as_interrupt

HELP = "the built-in demo: REINFORCE vs a pass@k-aware objective vs a placebo from one warm start (about 3.5 min on 2 CPU cores)"
DESCRIPTION = (
    "Build a tiny GPT-2-style model, warm-start it on a built-in task (--task: refunds by default; workshop "
    "writes one-line Python helpers judged by unit tests in the sandbox, with its own budget and best-of-k under "
    "its proxy too), then train leave-one-out "
    "REINFORCE, a pass@8-aware objective and its placebo (outcomes shuffled within each pool) from the "
    "same warm start with the same budget, and compare pass@k and proxy-selected best-of-k "
    "(k = 1, 4, 16, 32) on held-out prompts: means with 95% bootstrap intervals over prompts and paired "
    "differences from the warm start and from REINFORCE; also each run's gradient signal-to-noise and "
    "the planner's best temperature per k. A rerun reuses finished stages in --output. --study runs the "
    "study of docs/study_results.md: every objective (REINFORCE, pass@k with unbiased, plug-in and "
    "positive-only credit, best-of-k with the proxy, k annealing, plain SFT and BoN-SFT) at its own best "
    "learning rate from a fixed grid, chosen on a validation split where its placebo stays within noise, "
    "on main and replication seeds; it writes study.md, study.json and frontier.png (slow: hours on 2 cores)."
)
STUDY_OPTIONS = ("seeds", "replication_seeds", "tune_seeds", "grid", "reference_ks", "validation_prompts", "grid_only")
OPTION_OF = {"seeds": "--seeds", "replication_seeds": "--replication-seeds", "tune_seeds": "--tune-seeds",
             "objectives": "--set objectives", "lr_grid": "--grid", "validation_prompts": "--validation-prompts",
             "reference_ks": "--reference-ks"}
NOT_IN_STUDY = {"lr": "the study chooses each objective's lr from --grid",
                "plan_temperatures": "the study runs no temperature sweep", "plan_prompts": "the study runs no temperature sweep",
                "plan_n": "the study runs no temperature sweep", "plan_policies": "the study runs no temperature sweep"}


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--output", default="runs/demo", metavar="DIR", help="output directory (default: runs/demo)")
    p.add_argument("--seed", type=int, default=None, help="seed of model init, data split and sampling (default: 0; "
                   "the study takes --seeds)")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a demo knob, e.g. --set rl_steps=300 (see bonft.trainer.demo.DemoConfig); with "
                        "--study, objectives=... picks the study's objectives")
    p.add_argument("--study", action="store_true",
                   help="the study: every objective at its best admissible lr on main and replication seeds, BoN-SFT "
                        "vs SFT; writes study.md, study.json, frontier.png")
    g = p.add_argument_group("study options (with --study)")
    g.add_argument("--seeds", metavar="LIST", help="main seeds, comma-separated (default: 0,1,2,3,4)")
    g.add_argument("--replication-seeds", metavar="LIST", help="replication seeds, reported apart; '' for none "
                   "(default: 5,6,7)")
    g.add_argument("--tune-seeds", metavar="LIST", help="seeds whose validation split chooses the lr (default: 0)")
    g.add_argument("--grid", action="append", metavar="OBJECTIVE=LR,LR,...",
                   help="the lr grid of one objective (repeatable; default: bonft.trainer.demo.LR_GRID)")
    g.add_argument("--reference-ks", metavar="LIST", help="k of each BoN-SFT arm, beside plain SFT (default: 4,8,16)")
    g.add_argument("--validation-prompts", type=int, metavar="N", help="validation prompts per seed (default: 200)")
    g.add_argument("--grid-only", action="store_true", help="stop after the validation grid on the tuning seeds")
    p.add_argument("--task", default="refunds", metavar="NAME",
                   help="the demo's task: refunds (default), workshop (code judged by unit tests; 11 min of CPU, under 8 on 2 idle cores), ledger or "
                        "restock; the task's own demo settings apply (bonft.tasks TASKS[NAME].demo_settings), --set wins")
    p.add_argument("--sandbox", choices=("auto", "prestarted", "fresh"), default=None,
                   help="tasks that run programs (workshop): prestarted = CodeRunner's pool of pre-started sandbox "
                        "workers, fresh = two fresh interpreters per program (same verdicts, slower); auto (the task's "
                        "default) = prestarted when running as root (the recipe key: task_params.pool = true/false/'auto')")
    p.add_argument("--quiet", action="store_true", help="no progress bars")


def _seeds(option: str, text: str) -> tuple:
    parts = [v.strip() for v in text.split(",")]
    if parts == [""]:
        return ()
    try:
        return tuple(int(v) for v in parts)
    except ValueError:
        raise ValueError(f"{option} must be a comma-separated list of integers, got {text!r}") from None


def _keys(overrides) -> set:
    return {item.split("=", 1)[0].strip() for item in overrides if "=" in item}


def _demo_config(args):
    from bonft.tasks.registry import TASKS  # numpy and every task module: only when a command runs
    from bonft.trainer.config import convert_value, current_key, parse_scalar  # torch: only when a command runs
    from bonft.trainer.demo import DemoConfig  # torch: only when a command runs
    from bonft.verifiers.roles import USER_DATA_TASKS  # the verifier kinds: only when a command runs

    names = tuple(t for t in TASKS if t not in USER_DATA_TASKS)
    if args.task not in names:
        raise ValueError(f"--task must be one of {names}, got {args.task!r}")
    dc = DemoConfig.for_task(args.task, run_dir=args.output, seed=args.seed or 0)
    if args.sandbox is not None:
        if "pool" not in inspect.signature(TASKS[args.task].__init__).parameters:
            raise ValueError(f"--sandbox applies to tasks that run programs "
                             f"({', '.join(t for t in names if 'pool' in inspect.signature(TASKS[t].__init__).parameters)}), "
                             f"got --task {args.task}")
        dc.task_params["pool"] = {"auto": "auto", "prestarted": True, "fresh": False}[args.sandbox]
    fields = {f.name: f for f in dataclasses.fields(DemoConfig)}
    for item in args.overrides:
        if "=" not in item:
            raise ValueError(f"--set expects key=value, got {item!r}")
        key, text = (s.strip() for s in item.split("=", 1))
        key = current_key(key, "--set ")
        if key == "task":
            raise ValueError(f"--set task cannot choose the demo's task: use --task {text} (the task's demo settings follow it)")
        if key.startswith("task_params."):
            dc.task_params[key.split(".", 1)[1]] = parse_scalar(text)
        elif key in ("objectives", "plan_policies"):
            setattr(dc, key, tuple(v.strip() for v in text.split(",") if v.strip()))
        elif key == "plan_temperatures":
            try:
                dc.plan_temperatures = tuple(float(v) for v in text.split(",") if v.strip())
            except ValueError:
                raise ValueError(f"plan_temperatures must be a comma-separated list of numbers, got {text!r}") from None
        elif key in fields and key not in ("run_dir", "seed"):
            setattr(dc, key, convert_value(key, text, getattr(dc, key)))
        else:
            raise ValueError(f"--set key must be a demo knob among {sorted(set(fields) - {'run_dir', 'seed'})}, got {key!r}")
    return dc


def study_config(args, dc):
    """The study's design from the --study options (defaults: bonft.trainer.demo.study)."""
    from bonft.trainer.demo import StudyConfig  # torch: only when a command runs

    sc = StudyConfig()
    if args.seeds is not None:
        sc.seeds = _seeds("--seeds", args.seeds)
    if args.replication_seeds is not None:
        sc.replication_seeds = _seeds("--replication-seeds", args.replication_seeds)
    if args.tune_seeds is not None:
        sc.tune_seeds = _seeds("--tune-seeds", args.tune_seeds)
    if "objectives" in _keys(args.overrides):
        if not dc.objectives:
            raise ValueError("--set objectives must name at least one study objective, got an empty list")
        sc.objectives = tuple(dc.objectives)
        sc.lr_grid = {o: v for o, v in sc.lr_grid.items() if o in sc.objectives}
    for item in args.grid or []:
        obj, sep, text = item.partition("=")
        obj = obj.strip()
        if not sep:
            raise ValueError(f"--grid expects OBJECTIVE=LR,LR,..., got {item!r}")
        try:
            lrs = tuple(float(v) for v in text.split(",") if v.strip())
        except ValueError:
            raise ValueError(f"--grid {obj} must be a comma-separated list of learning rates, got {text!r}") from None
        if not lrs:
            raise ValueError(f"--grid {obj} must name at least one learning rate, got {text!r}")
        bad = [v for v in lrs if not v > 0]
        if bad:
            raise ValueError(f"--grid {obj} must hold learning rates > 0, got {bad[0]:g} in {text!r}")
        if obj not in sc.objectives:
            raise ValueError(f"--grid {obj}: not an objective of this study (objectives: {', '.join(sc.objectives)})")
        sc.lr_grid[obj] = lrs
    if args.reference_ks is not None:
        sc.reference_ks = _seeds("--reference-ks", args.reference_ks)
    if args.validation_prompts is not None:
        sc.validation_prompts = args.validation_prompts
    sc.grid_only = bool(args.grid_only)
    return sc


def run(args: argparse.Namespace) -> int:
    from bonft.cli.options import check_seed
    from bonft.trainer.demo import run_demo, run_study
    from bonft.trainer.demo.schedule import busy_pids
    from bonft.trainer.demo.study import check_study

    if args.seed is not None:
        check_seed("--seed", args.seed)
    given = [o for o in STUDY_OPTIONS if getattr(args, o) not in (None, False)]
    if not args.study and given:
        raise ValueError(f"--{given[0].replace('_', '-')} applies to --study only")
    if args.study:
        if args.seed is not None:
            raise ValueError("--seed cannot take effect with --study: name the study's seeds with --seeds")
        for key in sorted(_keys(args.overrides) & set(NOT_IN_STUDY)):
            raise ValueError(f"--set {key} cannot take effect with --study: {NOT_IN_STUDY[key]}")
    dc = _demo_config(args)
    try:
        with terminate_as_interrupt(children=busy_pids):  # SIGTERM: every running stage checkpoints, as on Ctrl-C
            if args.study:
                sc = study_config(args, dc)
                try:
                    check_study(dc, sc)  # every study knob, before any training
                except (ValueError, TypeError) as e:  # name the option that sets the knob
                    knob = re.match(r"[a-z_]*", str(e)).group()
                    if knob in OPTION_OF:
                        raise type(e)(f"{OPTION_OF[knob]}: {e}") from None
                    raise
                run_study(dc, sc, progress=not args.quiet)
            else:
                run_demo(dc, progress=not args.quiet)
    except KeyboardInterrupt as e:
        how = "stopped by SIGTERM" if isinstance(e, Terminated) else "interrupted"
        print(f"\n{how}; rerun the same command to continue (finished stages are reused)")
        return EXIT_TERMINATED if isinstance(e, Terminated) else 130
    return 0
