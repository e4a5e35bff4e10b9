"""``bonft estimate``: best-of-k and pass@k curves, with CIs, from a samples file."""
from __future__ import annotations

import argparse
import os

from bonft.cli.options import (
    add_duplicates_flag,
    add_plot_dir,
    check_ks_in_pools,
    check_sizes,
    parse_list,
    write_curve_outputs,
)
from bonft.cli.strategy_tables import add_strategy_arguments, check_strategy_options
from bonft.cli.strategy_tables import run_estimate as _run_strategies

SAMPLES_FILE = "heldout_samples.jsonl"  # a run directory's (bonft.trainer.evaluation.HELDOUT_SAMPLES, without torch)

HELP = "best-of-k (verifier picks) and pass@k with bootstrap CIs from a pool file (JSONL of scored samples)"
DESCRIPTION = (
    "Read a samples file (one JSON object a line: prompt_id, score, reward, optional temperature) "
    "and print, for each k, the unbiased best-of-k value when the verifier picks among k samples, "
    "and pass@k (the best true reward among k; the usual pass@k for 0/1 rewards), each with a bootstrap "
    "confidence interval over prompts. One block per temperature when the file has several. "
    "Try it with --example."
)

def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("samples", nargs="?",
                   help=f"samples JSONL file, or a run directory (its {SAMPLES_FILE}) (omit with --example)")
    p.add_argument("--example", action="store_true", help="use the bundled ledger-puzzle example file")
    p.add_argument("--prompt-field", default="prompt_id", help="field holding the prompt id (default: prompt_id)")
    p.add_argument("--score-field", default="score", help="field holding the verifier score (default: score)")
    p.add_argument("--reward-field", default="reward", help="field holding the true reward (default: reward)")
    p.add_argument("--temperature-field", default=None,
                   help="field holding the sampling temperature (default: temperature, optional in the file; a field "
                        "named here must be on every line)")
    p.add_argument("--sample-field", default="sample",
                   help="field holding each sample's index in its pool, optional; with it identical samples are not "
                        "counted as repeated rows (default: sample)")
    p.add_argument("--ks", default=None, help="comma-separated k values (default: 1,2,4,... up to the smallest pool)")
    p.add_argument("--confidence", type=float, default=0.95, help="confidence level of the intervals (default: 0.95)")
    p.add_argument("--n-boot", type=int, default=2000, help="bootstrap replicates (default: 2000)")
    p.add_argument("--seed", type=int, default=0, help="bootstrap seed (default: 0)")
    add_duplicates_flag(p)
    add_strategy_arguments(p)
    p.add_argument("--json", metavar="OUT.json", default=None, help="also write the curves as JSON")
    add_plot_dir(p, "estimate_curves.png (estimate_strategies.png with --strategy)")
    p.add_argument("--quiet", action="store_true",
                   help="with --strategy: no progress bar while the vote estimators run (a bar on a terminal otherwise)")


def run(args) -> int:
    from bonft.estimate import default_ks, summarize
    from bonft.io import group_pools, read_samples, temperatures_of
    from bonft.tasks.examples import example_samples_path
    from bonft.viz import plot_best_of_k_curves

    if args.example and args.samples:
        raise ValueError(f"give either POOLS or --example, got both ({args.samples!r} and --example)")
    if not args.example and not args.samples:
        raise ValueError("POOLS must be a pool file (JSONL of scored samples) (or pass --example), got nothing")
    path = example_samples_path() if args.example else args.samples
    if os.path.isdir(path):  # a run directory: its final evaluation's samples, as bonft compare reads it
        run_dir, path = path, os.path.join(path, SAMPLES_FILE)
        if not os.path.isfile(path):
            raise FileNotFoundError(
                f"POOLS {run_dir!r} is a directory without {SAMPLES_FILE} (a run's final evaluation writes it, unless "
                f"heldout_samples = false); write one with `bonft sample {run_dir} -o FILE` and estimate FILE")
    if not os.path.isfile(path):
        raise FileNotFoundError(f"POOLS file not found: {path}")
    ks = parse_list("--ks", args.ks)
    repeated = sorted({k for k in ks if ks.count(k) > 1}) if ks is not None else []
    if repeated:
        raise ValueError(f"--ks must not repeat a k (each is one row of the table), got {args.ks!r} "
                         f"(k={repeated[0]} more than once)")
    names = check_strategy_options(args)
    if args.quiet and not names:
        raise ValueError("--quiet applies to --strategy only (the vote estimators' progress bars; without --strategy "
                         "the command draws none), got --quiet without --strategy")
    check_sizes(args)
    table = read_samples(
        path,
        prompt_field=args.prompt_field,
        score_field=args.score_field,
        reward_field=args.reward_field,
        temperature_field=args.temperature_field or "temperature",
        temperature_required=args.temperature_field is not None,
        duplicates="allow" if args.allow_duplicates else "warn",
        answer_field=args.answer_field,
        sample_field=args.sample_field,
    )
    temps = temperatures_of(table)
    print(f"samples: {path} ({len(table)} rows)")
    if names:
        from bonft.strategies.estimators import VoteProgress  # loads torch: only with --strategy

        with VoteProgress(not args.quiet):  # the vote estimators take minutes on large files
            return _run_strategies(args, table, path, temps, ks)
    curves, blocks = {}, []
    blocks_in = [(t, *group_pools(table, temperature=t)) for t in (temps if len(temps) > 1 else [None])]
    for t, keys, s, _ in blocks_in:  # every temperature before any table: a short pool at the last stops the first
        check_ks_in_pools(ks, keys, s, t)
    for t, keys, s, r in blocks_in:
        n_min = min(len(x) for x in s)
        summ = summarize(s, r, ks=ks if ks is not None else default_ks(n_min),
                         confidence=args.confidence, n_boot=args.n_boot, seed=args.seed)
        label = "" if t is None else f"T={t:g}"
        print()
        if t is not None:
            print(f"temperature {t:g}")
        elif len(temps) == 1:
            print(f"temperature {temps[0]:g}")
        print(summ.table())
        curves[label] = summ
        blocks.append({"temperature": t if t is not None else (temps[0] if temps else None), **summ.to_dict()})
    print()
    print("best-of-k: reward of the sample the verifier scores highest among k (ties split evenly); "
          "pass@k: best true reward among k (the chance one of k is correct for 0/1 rewards); gap = pass@k - best-of-k.")
    write_curve_outputs(args, path, blocks, curves, plot_best_of_k_curves, "estimate_curves.png")
    return 0
