"""The study of docs/strategies.md: each strategy's V_k before and after training for majority vote.

Reproduce (about 15 minutes on 2 busy CPU cores)::

    bonft train docs/strategies_ledger.toml --output runs/sv/warm --set rl_steps=0 --set eval_every=400
    bonft train docs/strategies_ledger.toml --output runs/sv/majority_vote --set eval_every=100
    bonft train docs/strategies_ledger.toml --output runs/sv/mv_lr1e3 --set lr=1e-3 --set rl_steps=300 --set eval_every=100
    bonft train docs/strategies_ledger.toml --output runs/sv/weighted_vote --set objective=weighted_vote --set eval_every=100
    bonft train docs/strategies_ledger.toml --output runs/sv/best_of_k --set objective=best_of_k --set eval_every=100
    bonft train docs/strategies_ledger.toml --output runs/sv/pass_at_k --set objective=pass_at_k --set eval_every=100
    for p in warm majority_vote mv_lr1e3 weighted_vote best_of_k pass_at_k; do
        bonft sample runs/sv/$p --n 32 --n-prompts 200 -o runs/sv/$p.jsonl
    done
    python docs/strategies_study.py runs/sv majority_vote mv_lr1e3 weighted_vote best_of_k pass_at_k

The stronger warm start: the same with ``--set warm_start_steps=1200`` on every run (warm, majority_vote,
pass_at_k) plus a placebo run (``--set placebo=true`` on the majority-vote run), sampled alike,
in a second directory with the placebo's pool file named ``placebo.jsonl``.

The runs share the warm start (same seed and supervised stage; their step-400 evaluations
are identical). ``bonft sample`` scores with the task's proxy verifier and writes each response's
extracted answer. The table gives each strategy's unbiased V_1 and V_8 over the same 200 held-out
prompts with 95% bootstrap intervals, and the paired change against the warm start.
"""
from __future__ import annotations

import sys

from bonft.estimate import bootstrap_ci
from bonft.io import group_pools, read_samples
from bonft.strategies import strategy_per_prompt

NAMES = ["best_of_k", "majority_vote", "weighted_vote", "pass_at_k"]
def main(root: str, trained: list[str]) -> None:
    policies = ["warm", *trained]
    vals = {}
    for pol in policies:
        keys, s, r, a = group_pools(read_samples(f"{root}/{pol}.jsonl"), with_answers=True)
        for st in NAMES:
            vals[pol, st] = (keys,) + strategy_per_prompt(st, ks=[1, 8], rewards=r, scores=s, answers=a)
    print("| policy | k | " + " | ".join(NAMES) + " |")
    print("|---|---|" + "---|" * len(NAMES))
    for pol in policies:
        for j, k in enumerate([1, 8]):
            cells = []
            for st in NAMES:
                m, lo, hi = bootstrap_ci(vals[pol, st][1][:, j], n_boot=2000, seed=0)
                cells.append(f"{m:.3f} [{lo:.3f}, {hi:.3f}]")
            print(f"| {pol} | {k} | " + " | ".join(cells) + " |")
    print("\nchange at k = 8 against the warm start (paired over the same prompts):")
    print("| trained for | " + " | ".join(NAMES) + " |")
    print("|---|" + "---|" * len(NAMES))
    for pol in policies[1:]:
        cells = []
        for st in NAMES:
            k0, v0, _ = vals["warm", st]
            k1, v1, _ = vals[pol, st]
            if k0 != k1:
                raise ValueError(f"{pol} must hold the warm start's prompts in the same order")
            m, lo, hi = bootstrap_ci(v1[:, 1] - v0[:, 1], n_boot=2000, seed=0)
            cells.append(f"{m:+.3f} [{lo:+.3f}, {hi:+.3f}]")
        print(f"| {pol} | " + " | ".join(cells) + " |")


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else "runs/sv", sys.argv[2:] or ["majority_vote", "best_of_k"])
