"""``--strategy`` for ``bonft estimate`` and ``bonft plan``: several inference strategies side by side."""
from __future__ import annotations

import argparse
import os

import numpy as np

from bonft._core.checks import as_float_array
from bonft.cli.options import check_ks_in_pools, no_empty_items, parse_list, write_curve_outputs, write_json_atomic
from bonft.estimate import default_ks
from bonft.io import group_pools, same_temperature, temperature_label, temperatures_of
from bonft.viz import plot_strategy_curves

STRATEGY_HELP = ("comma-separated inference strategies to compare: best_of_k (verifier picks), majority_vote "
                 "(most frequent answer), weighted_vote (answer with the largest total score), pass_at_k (best true "
                 "reward among k, a ceiling); majority_vote and weighted_vote need an answer field in the file")


ANSWER_FIELD = "answer"  # --answer-field's default
VOTES = ("majority_vote", "weighted_vote")  # the strategies that read answer keys


def add_strategy_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--strategy", default=None, metavar="NAMES", help=STRATEGY_HELP)
    p.add_argument("--answer-field", default=ANSWER_FIELD,
                   help="field holding each sample's extracted answer key (default: answer)")
    p.add_argument("--max-subsets", type=int, default=None,
                   help="weighted vote: exact over all k-subsets up to this many, else this many sampled (default: 4000)")


def check_strategy_options(args, *, exact: bool = False) -> list[str] | None:
    """``--strategy`` ids (None without it); ``--answer-field`` and ``--max-subsets`` where no strategy given reads
    them are errors (``exact``: ``plan --exact``, whose answers come from the file and whose values sample nothing)."""
    names = strategy_names(args.strategy)
    given = f"with --strategy {args.strategy}" if names else "without --strategy"
    if args.answer_field != ANSWER_FIELD:
        if exact:
            raise ValueError(f"--answer-field has no effect with --exact (answers come from the file's 'answers' "
                             f"field), got --answer-field {args.answer_field!r}")
        if not names or not any(n in VOTES for n in names):
            raise ValueError(f"--answer-field applies to --strategy with majority_vote or weighted_vote (the answer "
                             f"key they vote on), got --answer-field {args.answer_field!r} {given}")
    if args.max_subsets is not None:
        if exact:
            raise ValueError(f"--max-subsets has no effect with --exact (exact values sample no k-subsets), got "
                             f"--max-subsets {args.max_subsets}")
        if not names or "weighted_vote" not in names:
            raise ValueError(f"--max-subsets applies to --strategy with weighted_vote (the k-subsets its estimate "
                             f"samples), got --max-subsets {args.max_subsets} {given}")
    return names


def strategy_names(text: str | None) -> list[str] | None:
    from bonft.strategies import get_strategy  # loads torch: only when a command runs

    no_empty_items("--strategy", text)
    names = parse_list("--strategy", text, str)
    if names is None:
        return None
    out = []
    for s in names:
        try:
            out.append(get_strategy(s.strip()).name)
        except ValueError as e:  # get_strategy's message names the id an old spelling stands for
            raise ValueError(str(e).replace("strategy must be one of", "--strategy must list ids from", 1)) from None
    return list(dict.fromkeys(out))


def _curves(table, t, names, ks, args):
    from bonft.strategies import MAX_SUBSETS, compare_strategies, get_strategy  # loads torch: only when a command runs

    need_answers = any(get_strategy(n).uses_answers for n in names)
    if need_answers and table.answers is None:
        raise ValueError(f"--strategy {','.join(names)} needs an answer field ({args.answer_field!r}) on every line "
                         f"of the pool file, got none")
    pools = group_pools(table, temperature=t, with_answers=need_answers)
    s, r = pools[1], pools[2]
    a = pools[3] if need_answers else None
    check_ks_in_pools(ks, pools[0], s, t)
    n_min = min(len(x) for x in s)
    use = ks if ks is not None else default_ks(n_min)
    s = s if any(get_strategy(n).uses_scores for n in names) else None
    return compare_strategies(names, ks=use, rewards=r, scores=s, answers=a, confidence=args.confidence,
                              n_boot=args.n_boot, seed=args.seed,
                              max_subsets=args.max_subsets if args.max_subsets is not None else MAX_SUBSETS)


def run_estimate(args, table, path: str, temps: list, ks) -> int:
    """``bonft estimate --strategy``: one table per temperature, every strategy a column block."""
    names = strategy_names(args.strategy)
    blocks, curves = [], {}
    for t in temps if len(temps) > 1 else [None]:
        sc = _curves(table, t, names, ks, args)
        print()
        tt = t if t is not None else (temps[0] if temps else None)
        if tt is not None:
            print(f"temperature {tt:g}")
        print(sc.table())
        curves["" if t is None else f"T={t:g}"] = sc
        blocks.append({"temperature": tt, **sc.to_dict()})
    print()
    print("V_k: the unbiased mean reward of what each strategy serves from k samples (all k-subsets of each pool); "
          "best: the strategy with the highest mean at that k.")

    write_curve_outputs(args, path, blocks, curves, plot_strategy_curves, "estimate_strategies.png")
    return 0


def run_plan(args, table, temps_wanted) -> int:
    """``bonft plan --samples F --strategy ...``: the best (strategy, temperature, k) at each k and per budget."""
    from bonft.strategies import get_strategy  # loads torch: only when a command runs

    names = strategy_names(args.strategy)
    temps = temperatures_of(table) or [None]
    if temps_wanted:  # a temperature is the file's when equal as float32 (io.same_temperature)
        missing = [t for t in temps_wanted if not any(same_temperature(t, f) for f in temps if f is not None)]
        if missing:
            raise ValueError(f"--temperatures must be in the file's [{', '.join(temperature_label(f) for f in temps if f is not None)}], "
                             f"got {missing}")
        temps = [next(f for f in temps if same_temperature(t, f)) for t in temps_wanted]
        for i, f in enumerate(temps):
            if f in temps[:i]:
                raise ValueError(f"--temperatures must select distinct pools, got {temps_wanted[temps.index(f)]!r} and "
                                 f"{temps_wanted[i]!r}, both the file's {temperature_label(f)} (equal as float32)")
    ks = None if args.max_k is None else list(range(1, args.max_k + 1))
    sel = {t: t if len(temperatures_of(table)) > 1 else None for t in temps}  # the pools' temperature filter
    if ks is None:  # one k grid for every temperature: up to the smallest pool of them all
        ks = list(default_ks(min(min(len(x) for x in group_pools(table, temperature=sel[t])[1]) for t in temps)))
    grid = {t: _curves(table, sel[t], names, ks, args) for t in temps}
    first = next(iter(grid.values()))
    print("best servable strategy (pass_at_k, the best true reward among k, is a ceiling only):")
    print(f"{'k':>6}  {'best strategy':>14}  {'T':>5}  {'V_k':>7}  {'interval':>17}")
    rows = []
    for j, k in enumerate(first.ks):
        servable = [s for s in names if get_strategy(s).servable] or names  # pass_at_k is a ceiling
        best = max(((t, s) for t in grid for s in servable), key=lambda ts: grid[ts[0]].mean[ts[1]][j])
        c = grid[best[0]]
        t_txt = "-" if best[0] is None else temperature_label(best[0])
        ci = "no spread" if c.no_interval(best[1])[j] else f"[{c.lo[best[1]][j]:.4f}, {c.hi[best[1]][j]:.4f}]"
        print(f"{int(k):>6}  {best[1]:>14}  {t_txt:>5}  {c.mean[best[1]][j]:>7.4f}  {ci}")
        rows.append({"k": int(k), "strategy": best[1], "temperature": best[0], "value": float(c.mean[best[1]][j]),
                     "lo": float(c.lo[best[1]][j]), "hi": float(c.hi[best[1]][j])})
    budgets = parse_list("--budget-samples", args.budget_samples) or []
    for b in budgets:
        ok = [r for r in rows if r["k"] <= b]
        if ok:
            r = max(ok, key=lambda r: r["value"])
            t_txt = "-" if r["temperature"] is None else temperature_label(r["temperature"])
            print(f"budget {b} samples/prompt: {r['strategy']} at T={t_txt} with k={r['k']}: "
                  f"V_k = {r['value']:.4f} [{r['lo']:.4f}, {r['hi']:.4f}]")
    if args.json:
        write_json_atomic(args.json, {"best_by_k": rows, "grid": {str(t): g.to_dict() for t, g in grid.items()}})
        print(f"wrote {args.json}")
    if args.plot_dir:

        path = os.path.join(args.plot_dir, "plan_strategies.png")
        plot_strategy_curves({("" if t is None else f"T={t:g}"): g for t, g in grid.items()}, path)
        print(f"wrote {path}")
    return 0


def _exact_rows(spec: dict):
    """The exact spec as P rows: logits (P, V), scores and rewards (P, V), answers P lists (None without them).

    ``logits`` is (V,) or (P, V) (P prompts, weighted equally); scores and rewards broadcast against it; answers
    are one key per outcome, (V,) shared by every prompt or (P, V)."""
    logits = as_float_array("logits", spec["logits"], ndim=(1, 2))
    rows = logits.reshape(-1, logits.shape[-1])
    P, V = rows.shape
    out = [rows]
    for key in ("scores", "rewards"):
        x = as_float_array(key, spec[key])
        try:
            out.append(np.broadcast_to(x, (P, V)).copy())
        except ValueError:
            raise ValueError(f"{key} must broadcast against the logits' ({P}, {V}) outcomes, got shape "
                             f"{tuple(x.shape)}") from None
    answers = spec.get("answers")
    if answers is None:
        return (*out, [None] * P)
    if not isinstance(answers, list) or not answers:
        raise TypeError(f"answers must be a list of one key per outcome, got {type(answers).__name__}")
    if all(isinstance(a, list) for a in answers):  # (P, V)
        if len(answers) != P:
            raise ValueError(f"answers must hold one row per prompt ({P} rows, as the logits), got {len(answers)}")
        return (*out, answers)
    return (*out, [answers] * P)  # (V,): the same keys for every prompt


def run_plan_exact(args, spec: dict, temps: list) -> int:
    """``bonft plan --exact F --strategy ...``: exact V_k of each strategy over temperature x k, the best per k."""

    from bonft.bon import softmax_policy  # loads torch: only when a command runs
    from bonft.strategies import get_strategy, strategy_value  # loads torch: only when a command runs

    names = strategy_names(args.strategy)
    if "logits" not in spec:
        raise ValueError("--exact with --strategy needs 'logits' (temperatures rescale them), got none")
    if any(get_strategy(s).uses_answers for s in names) and "answers" not in spec:
        raise ValueError("--exact with --strategy majority_vote/weighted_vote needs an 'answers' field (one key per outcome)")
    max_k = args.max_k or 64
    logits, scores, rewards, answers = _exact_rows(spec)  # one row per prompt, prompts weighted equally

    def value(st, probs, k):  # mean over prompts of the strategy's exact V_k
        return float(np.mean([strategy_value(st, probs[i], k=k, rewards=rewards[i],
                                             scores=scores[i] if st.uses_scores else None,
                                             answers=answers[i] if st.uses_answers else None)
                              for i in range(len(logits))]))

    grid = {}  # (T, strategy) -> (K,) values, nan where not computable (a vote beyond its k limit)
    for t in temps:
        probs = softmax_policy(logits, temperature=t)
        for s in names:
            st = get_strategy(s)
            try:
                row = [value(st, probs, 1)]  # the file's errors (a conflicting reward, a bad shape) surface here
            except ValueError as e:  # the command has no conflicts= option: say what to change in the file instead
                head, sep, _ = str(e).partition("; pass conflicts='mean'")
                if not sep:
                    raise
                raise ValueError(f"{head}: the --exact file must give the outcomes of one answer one reward (in "
                                 "Python, strategy_value(..., conflicts='mean') serves their mean)") from None
            for k in range(2, max_k + 1):
                try:
                    row.append(value(st, probs, k))
                except ValueError as e:  # the exact vote values' limits on k (float64 factorials, count vectors)
                    if not str(e).startswith("k must"):
                        raise
                    row.append(float("nan"))
            grid[t, s] = np.array(row)
    servable = [s for s in names if get_strategy(s).servable] or names
    print("exact V_k; best servable strategy (pass_at_k is a ceiling only); then each strategy at its best T:")
    print(f"{'k':>6}  {'best strategy':>14}  {'T':>5}  {'V_k':>7}  " + "  ".join(f"{s:>9}" for s in names))
    rows = []
    for j in range(max_k):
        cands = [(t, s) for t in temps for s in servable if np.isfinite(grid[t, s][j])]
        t, s = max(cands, key=lambda ts: grid[ts][j])
        best_each = [np.nanmax([grid[tt, x][j] for tt in temps]) if any(np.isfinite(grid[tt, x][j]) for tt in temps)
                     else float("nan") for x in names]
        print(f"{j + 1:>6}  {s:>14}  {t:>5g}  {grid[t, s][j]:>7.4f}  " + "  ".join(f"{v:>9.4f}" for v in best_each))
        rows.append({"k": j + 1, "strategy": s, "temperature": t, "value": float(grid[t, s][j])})
    for b in parse_list("--budget-samples", args.budget_samples) or []:
        ok = [r for r in rows if r["k"] <= b]
        if ok:
            r = max(ok, key=lambda r: r["value"])
            print(f"budget {b} samples/prompt: {r['strategy']} at T={r['temperature']:g} with k={r['k']}: V_k = {r['value']:.4f}")
    if args.json:
        write_json_atomic(args.json, {"best_by_k": rows, "values": {f"{s}@T={t:g}": [None if not np.isfinite(v) else float(v)
                                                                                    for v in grid[t, s]] for (t, s) in grid}})
        print(f"wrote {args.json}")
    return 0
