"""Simulated pools for docs/strategies.md: three kinds of prompt, four strategies, our own scenario.

Each prompt has one correct answer and a few wrong ones; the policy puts mass ``p`` on the
correct answer and spreads the rest over the wrong answers (Dirichlet). Each sample gets a
verifier score = exp(answer bias + per-sample noise), a positive vote weight whose logarithm is the
verifier's margin: it has a consistent opinion of each answer (``bias``) and a noisy reading of each
sample (``noise``); a weighted vote adds these weights per answer. Three regimes:

* ``plurality``: the correct answer is the most likely one (p ~ 0.45) and the verifier is noisy;
* ``verifier``: the correct answer is rare (p ~ 0.15) but the verifier reads samples well;
* ``decoy``: one wrong answer is more likely than the correct one (p ~ 0.25, decoy ~ 0.45),
  and the verifier is moderately good.

Run: ``python docs/strategies_scenario.py OUT_DIR [FIGURE.png]`` -> OUT_DIR/<regime>.jsonl
(200 prompts x 64 samples, fields prompt_id, i, answer, score, reward) and, with a second
argument, the figure of docs/strategies.md (every strategy's V_k against k, one panel per regime).
"""
from __future__ import annotations

import json
import os
import sys

import numpy as np

REGIMES = {  # p_correct (Beta a, b), decoy mass, verifier bias gap, per-sample noise
    "plurality": dict(beta=(9, 11), decoy=0.0, gap=0.2, noise=1.0),
    "verifier": dict(beta=(3, 17), decoy=0.0, gap=1.5, noise=0.5),
    "decoy": dict(beta=(5, 15), decoy=0.45, gap=0.8, noise=0.6),
}


def simulate(regime: str, *, prompts: int = 200, n: int = 64, seed: int = 0) -> list[dict]:
    cfg = REGIMES[regime]
    rng = np.random.default_rng(seed)
    rows = []
    for p in range(prompts):
        pc = rng.beta(*cfg["beta"])
        wrong = int(rng.integers(2, 7))
        rest = 1.0 - pc - cfg["decoy"]
        masses = np.concatenate([[pc, cfg["decoy"]], rest * rng.dirichlet(np.ones(wrong))])
        masses = np.clip(masses, 0, None) / np.clip(masses, 0, None).sum()
        bias = np.concatenate([[cfg["gap"]], rng.normal(0.0, 0.3, len(masses) - 1)])  # verifier's view of each answer
        ans = rng.choice(len(masses), size=n, p=masses)
        score = np.exp(bias[ans] + cfg["noise"] * rng.normal(size=n))  # a positive vote weight (log: the margin)
        for i in range(n):
            rows.append({"prompt_id": f"{regime[0]}{p:03d}", "i": i, "answer": f"a{ans[i]}",
                         "score": round(float(score[i]), 6), "reward": int(ans[i] == 0)})
    return rows


def main(folder: str, figure: str | None = None) -> None:
    from bonft.io import group_pools, read_samples
    from bonft.strategies.curves import compare_strategies
    from bonft.viz import plot_strategy_curves

    os.makedirs(folder, exist_ok=True)
    curves = {}
    for regime in REGIMES:
        path = os.path.join(folder, f"{regime}.jsonl")
        with open(path, "w", encoding="utf-8") as f:
            for row in simulate(regime):
                f.write(json.dumps(row) + "\n")
        if figure:
            _, s, r, a = group_pools(read_samples(path), with_answers=True)
            curves[regime] = compare_strategies(["best_of_k", "majority_vote", "weighted_vote", "pass_at_k"], ks=[1, 2, 4, 8, 16, 32, 64],
                                                rewards=r, scores=s, answers=a, n_boot=1000)
            print(regime)
            print(curves[regime].table())
    if figure:
        print("wrote", plot_strategy_curves(curves, figure, title="simulated pools: 200 prompts x 64 samples per regime"))


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else "runs/strategies", sys.argv[2] if len(sys.argv) > 2 else None)
