"""``bonft compare A B ...``: runs evaluated on the same prompts, compared paired (means, differences, intervals)."""
from __future__ import annotations

import argparse
import math
import os

from bonft._core.toml import tomllib
from bonft.cli.options import (
    add_plot_dir,
    check_ks_in_pools,
    check_output_paths,
    check_sizes,
    make_plot_dir,
    parse_list,
    write_json_atomic,
)

HELP = "compare runs evaluated on the same held-out prompts: pass@k and best-of-k with paired differences and CIs"
DESCRIPTION = (
    "Read two or more samples files, or run directories (each run's heldout_samples.jsonl: every sample of its "
    "final evaluation), evaluated on the same prompts, and print each one's pass@k and best-of-k (picked by "
    "--score-field) with bootstrap intervals over prompts, then each one's paired difference from the baseline "
    "(the first, or --baseline): per prompt first, then averaged, so the prompts' own difficulty cancels. Files "
    "are paired by prompt id, and by prompt text where the rows carry it: runs evaluated on different prompts (another "
    "seed's split, other data) are refused. These intervals cover the evaluation's noise, not the training run's: "
    "give each input one run per training seed (A1,A2,A3 B1,B2,B3) to get per-seed means and paired differences with a "
    "Student-t interval over the seeds, which covers both."
)
SAMPLES_FILE = "heldout_samples.jsonl"  # a run directory's (bonft.trainer.evaluation.HELDOUT_SAMPLES, without torch)


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("inputs", nargs="+", metavar="RUN_OR_FILE",
                   help=f"two or more run directories (their {SAMPLES_FILE}) or samples files; A1,A2,A3 gives one "
                        "input's runs of several training seeds (every input the same number, the s-th runs paired)")
    p.add_argument("--names", default=None, metavar="A,B",
                   help="row names, one per input (default: each run directory's or file's name)")
    p.add_argument("--baseline", default=None, metavar="NAME",
                   help="the input the others are compared with, by name (default: the first)")
    p.add_argument("--ks", default=None, help="comma-separated k values (default: 1,2,4,... up to the smallest pool)")
    p.add_argument("--score-field", default="score",
                   help="field of the verifier whose pick is best-of-k (default: score, the training verifier's in a "
                        f"run's {SAMPLES_FILE}, which also has score_NAME for each verifier)")
    p.add_argument("--reward-field", default="reward", help="field holding the true reward (default: reward)")
    p.add_argument("--prompt-field", default="prompt_id", help="field holding the prompt id (default: prompt_id)")
    p.add_argument("--temperature", type=float, default=None,
                   help="the temperature to compare, when the files hold several (default: their only one)")
    p.add_argument("--confidence", type=float, default=0.95, help="confidence level of the intervals (default: 0.95)")
    p.add_argument("--n-boot", type=int, default=2000, help="bootstrap replicates (default: 2000)")
    p.add_argument("--seed", type=int, default=0, help="bootstrap seed (default: 0)")
    p.add_argument("--json", metavar="OUT.json", default=None, help="also write the means and differences as JSON")
    add_plot_dir(p, "compare_curves.png (each input's pass@k and its paired difference from the baseline, against k)")


def _recorded_seed(path: str) -> int | None:
    """The training seed a run directory's config.toml records; None for a samples file or without one."""
    try:
        with open(os.path.join(path, "config.toml"), "rb") as f:
            seed = tomllib.load(f).get("seed", 0)  # a run's config.toml omits no key; 0 is the default
    except (OSError, tomllib.TOMLDecodeError):
        return None
    return seed if isinstance(seed, int) and not isinstance(seed, bool) else None


def _seed_labels(groups: list[list[str]]) -> list[int] | None:
    """Each seed position's recorded training seed, where the s-th runs of every input record one seed and the
    positions' seeds differ; else None (the positions 1..S label them)."""
    labels = []
    for runs in zip(*groups):
        seeds = {_recorded_seed(r) if os.path.isdir(r) else None for r in runs}
        if len(seeds) != 1 or None in seeds:
            return None
        labels.append(seeds.pop())
    return labels if len(set(labels)) == len(labels) else None


def _resolve(path: str) -> str:
    """A run directory -> its samples file; a file as it is."""
    if os.path.isdir(path):
        file = os.path.join(path, SAMPLES_FILE)
        if not os.path.isfile(file):
            raise FileNotFoundError(
                f"RUN_OR_FILE {path!r} is a directory without {SAMPLES_FILE} (a run's final evaluation writes it, "
                f"unless heldout_samples = false); write one with `bonft sample {path} -o FILE` and compare FILE")
        return file
    if not os.path.isfile(path):
        raise FileNotFoundError(f"RUN_OR_FILE not found: {path}")
    return path


def _names(args, inputs: list[str]) -> list[str]:
    """--names, or each input's run directory's or file's name; they must differ."""
    if args.names is not None:
        names = [v.strip() for v in args.names.split(",")]
        if len(names) != len(inputs) or not all(names):
            raise ValueError(f"--names must give one non-empty name per input ({len(inputs)}), got {args.names!r}")
    else:
        names = [os.path.basename(os.path.normpath(a)) if os.path.isdir(a) else os.path.splitext(os.path.basename(a))[0]
                 for a in inputs]
    if len(set(names)) < len(names):
        raise ValueError(f"the inputs' names must differ, got {names}; pass --names A,B,...")
    return names


def _pools(name: str, path: str, args) -> tuple[list, list, list, dict | None, float | None]:
    """(keys, score pools, reward pools, {key: prompt text} or None, temperature or None) of one input."""
    from bonft.io import (  # numpy: only when the command runs
        group_pools,
        read_samples,
        same_temperature,
        temperatures_of,
    )

    table = read_samples(path, prompt_field=args.prompt_field, score_field=args.score_field,
                         reward_field=args.reward_field, text_field="prompt")
    keys, scores, rewards = group_pools(table, temperature=args.temperature)
    texts = None
    if table.prompts is not None:
        keep = slice(None) if args.temperature is None else same_temperature(table.temperatures, args.temperature)
        texts = {}
        for key, text in zip(table.prompt_keys[keep], table.prompts[keep]):
            if texts.setdefault(str(key), text) != text:
                raise ValueError(f"{name} ({path}) gives prompt {key} two different texts ({texts[str(key)]!r} and {text!r})")
    temps = temperatures_of(table)
    temperature = args.temperature if args.temperature is not None else (temps[0] if temps else None)
    return keys, scores, rewards, texts, temperature


def _check_paired(names: list[str], inputs: list[tuple]) -> None:
    """Every input holds the first one's prompts, and where both carry prompt texts, the same texts."""
    keys0, texts0 = set(inputs[0][0]), inputs[0][3]
    for name, (keys, _, _, texts, _) in zip(names[1:], inputs[1:]):
        only_a, only_b = sorted(keys0 - set(keys)), sorted(set(keys) - keys0)
        if only_a or only_b:
            raise ValueError(
                f"{name} and {names[0]} must hold the same prompts to be compared paired: {len(only_a)} prompt(s) only in "
                f"{names[0]} (e.g. {only_a[:3]}), {len(only_b)} only in {name} (e.g. {only_b[:3]})")
        if texts0 is not None and texts is not None:
            bad = [k for k in inputs[0][0] if texts0[k] != texts[k]]
            if bad:
                k = bad[0]
                raise ValueError(
                    f"{name} and {names[0]} give prompt {k} different texts ({texts[k]!r} vs {texts0[k]!r}; {len(bad)} of "
                    f"{len(keys0)} prompts differ): they were evaluated on different prompts (another seed's split or other "
                    "data), so they cannot be compared paired")


def _paired_pools(names: list[str], inputs: list[tuple]) -> dict:
    """Every input's pools in the first input's prompt order: name -> {"proxy": [...], "rewards": [...]}."""
    order = inputs[0][0]
    pools = {}
    for name, (keys, scores, rewards, _, _) in zip(names, inputs):
        at = {k: j for j, k in enumerate(keys)}
        pools[name] = {"proxy": [scores[at[k]] for k in order], "rewards": [rewards[at[k]] for k in order]}
    return pools


def run(args: argparse.Namespace) -> int:
    from bonft._core.bootstrap import confidence_label
    from bonft.estimate import MIN_BOOT_PROMPTS, default_ks, reward_bounds
    from bonft.estimate.paired import paired_comparison, paired_table, per_prompt_curves, seed_comparison
    from bonft.viz import plot_paired_differences

    check_sizes(args)
    check_output_paths(args)  # before any reading: a wrong --json or --plot-dir found at the end wastes the work
    ks = parse_list("--ks", args.ks)
    repeated = sorted({k for k in ks if ks.count(k) > 1}) if ks is not None else []
    if repeated:
        raise ValueError(f"--ks must not repeat a k (each is one column of the table), got {args.ks!r} "
                         f"(k={repeated[0]} more than once)")
    if len(args.inputs) < 2:
        raise ValueError(f"RUN_OR_FILE must name at least 2 inputs to compare, got {len(args.inputs)}")
    groups = [[part for part in a.split(",") if part] for a in args.inputs]  # one run per training seed
    S = len(groups[0])
    if any(len(g) != S for g in groups):
        raise ValueError(f"RUN_OR_FILE: every input must list the same number of runs (one per training seed), got "
                         f"{[len(g) for g in groups]}")
    paths = [[_resolve(a) for a in g] for g in groups]  # [input][seed]
    names = _names(args, [g[0] for g in groups])
    base = args.baseline if args.baseline is not None else names[0]
    if base not in names:
        raise ValueError(f"--baseline must be one of the inputs' names {names}, got {base!r}")
    recorded = _seed_labels(groups) if S > 1 else None
    labels = recorded or list(range(1, S + 1))  # the runs' own seeds where they record them, else positions
    per_seed, orders, no_text, P, temps = {}, {}, set(), [], {}
    for s in range(S):
        inputs = [_pools(n, p[s], args) for n, p in zip(names, paths)]
        try:
            _check_paired(names, inputs)
        except ValueError as e:
            raise ValueError(f"training seed {labels[s]} ({s + 1} of {S}): {e}" if S > 1 else str(e)) from None
        per_seed[labels[s]] = _paired_pools(names, inputs)
        orders[labels[s]] = inputs[0][0]  # the prompt ids, in the pools' order
        no_text |= {n for n, inp in zip(names, inputs) if inp[3] is None}
        for n, inp in zip(names, inputs):
            temps.setdefault(n, set()).add(inp[4])
        P.append(len(inputs[0][0]))
    n_min = min(len(r) for pools in per_seed.values() for p in pools.values() for r in p["rewards"])
    flat = [(key, f"{name}" + (f" (training seed {s})" if S > 1 else ""), r)  # every pool, with where it comes from
            for s, pools in per_seed.items() for name, p in pools.items() for key, r in zip(orders[s], p["rewards"])]
    check_ks_in_pools(ks, [f[0] for f in flat], [f[2] for f in flat], sources=[f[1] for f in flat])
    capped = None  # without --ks, k stops at the smallest pool: say which pool when the others hold more
    if ks is None:
        sizes = [len(f[2]) for f in flat]
        middle = sorted(sizes)[len(sizes) // 2]  # the median pool (the upper one of an even count)
        if n_min < middle:
            key, source, _ = flat[sizes.index(n_min)]
            capped = (f"note: k stops at {n_min}, the smallest pool (prompt {key!r} in {source}); the median pool holds "
                      f"{middle} samples: leave that prompt out, or give --ks, to measure larger k")
    ks = ks if ks is not None else default_ks(n_min)
    curves = {s: {name: per_prompt_curves(p, ks=ks) for name, p in pools.items()} for s, pools in per_seed.items()}
    intervals = S > 1 or P[0] >= MIN_BOOT_PROMPTS
    if S == 1:
        bounds = reward_bounds([r for p in per_seed[labels[0]].values() for r in p["rewards"]])
        comp = paired_comparison(curves[labels[0]], ks=ks, baselines=[base], n_boot=args.n_boot, seed=args.seed,
                                 confidence=args.confidence, intervals=intervals, bounds=bounds)
    else:
        comp = seed_comparison(curves, ks=ks, baselines=[base], confidence=args.confidence)
    for name, runs in zip(names, paths):
        at = sorted(t for t in temps[name] if t is not None)
        print(f"{name}: {', '.join(runs)}" + (f" (temperature {', '.join(f'{t:g}' for t in at)})" if at else ""))
    if S > 1 and recorded:
        print(f"training seeds {', '.join(map(str, recorded))} (each run's config.toml): the runs of one seed paired; "
              f"{', '.join(map(str, P))} prompts")
    elif S > 1:
        print(f"training seed s = 1..{S}: the s-th run of every input (the runs record no common seed); "
              f"{', '.join(map(str, P))} prompts")
    print()
    caption = f"pass@k: best '{args.reward_field}' among k; best-of-k: the '{args.reward_field}' of the sample '{args.score_field}' ranks first"
    print(paired_table(comp, n_prompts=P[0], picker=args.score_field, confidence=args.confidence, caption=caption))
    print()
    if not intervals:
        print(f"intervals n/a: {P[0]} prompt(s); a bootstrap over prompts needs at least {MIN_BOOT_PROMPTS} (see docs/estimate.md)")
    if capped:
        print(capped)
    drawn = {t for ts in temps.values() for t in ts if t is not None}
    if len(drawn) > 1:
        print(f"note: the inputs were sampled at different temperatures ({', '.join(f'{t:g}' for t in sorted(drawn))}): "
              "a difference then mixes the policies with their temperatures")
    if no_text:
        print("paired by prompt id alone: " + ", ".join(n for n in names if n in no_text) + " carries no prompt texts")
    if S == 1:
        print("Intervals: percentile bootstrap over prompts, the same prompts resampled for both sides of a difference; "
              "they cover the evaluation's noise, not the training run's (another training seed can move a difference "
              "more: give each input one run per seed, A1,A2,A3 B1,B2,B3).")
    else:
        print(f"Intervals: Student-t over the {S} training seeds of each seed's mean over its prompts (and of each "
              "seed's paired difference): they cover the training's noise as well as the evaluation's."
              + (" With 2 seeds the interval is the mean +- 12.7 standard errors at 95% (t with 1 degree of freedom) "
                 "and may pass 0 or 1: 3 seeds or more give a usable one." if S == 2 else ""))

    if args.json:
        def plain(cells):
            return [[None if isinstance(v, float) and math.isnan(v) else v for v in c] for c in cells]

        write_json_atomic(args.json, {
            "inputs": {n: [os.path.abspath(x) for x in runs] for n, runs in zip(names, paths)}, "baseline": base,
            "ks": ks, "n_prompts": P, "training_seeds": S, "seed_labels": labels, "interval": "bootstrap over prompts" if S == 1 else
            "Student-t over training seeds", "confidence": args.confidence, "n_boot": args.n_boot, "seed": args.seed,
            "intervals_valid": intervals, **({"k_capped_note": capped[len("note: "):]} if capped else {}),
            "score_field": args.score_field, "reward_field": args.reward_field,
            "columns": [label if kind == "pass" else f"{args.score_field} {label}" for label, kind, _ in comp["columns"]],
            "means": {n: plain(c) for n, c in comp["means"].items()},
            "differences": {b: {n: plain(c) for n, c in rows.items()} for b, rows in comp["differences"].items()},
            **({"per_seed": comp["per_seed"]} if S > 1 else {}),
            **({"no_interval": comp["no_spread"], "no_interval_note": "every prompt has the same value (or difference) "
                "in these cells, so a bootstrap gives no interval: their bounds are null"} if comp.get("no_spread") else {})})
        print(f"wrote {args.json}")
    if args.plot_dir:
        out = os.path.join(make_plot_dir(args.plot_dir), "compare_curves.png")
        what = f"{P[0]} prompts, {confidence_label(args.confidence)} bootstrap CI over prompts" if S == 1 else \
            f"{S} training seeds, {confidence_label(args.confidence)} Student-t interval over seeds"
        plot_paired_differences(comp, out, ks=ks, title=what)
        print(f"wrote {out}")
    return 0
