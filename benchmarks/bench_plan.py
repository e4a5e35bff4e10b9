"""Benchmark of the planner: 8 temperatures x 500 prompts x 256 samples from a samples file.

Times, in one process: loading the file, the full plan (every k = 1..256 at every
temperature, 2000 paired bootstrap resamples, best temperature, near-best sets,
budgets, doubling, fit), the table, the two plots; the estimator's share (the same
bon_at_k_per_prompt calls timed alone); and as a baseline one np.sort of all the
scores (the floor any exact best-of-k estimator pays). Goal: table + plots in
under 5 s after loading, on a 2-core machine.

Data: the simulated ledger-puzzle scenario of bonft.examples, at 8 temperatures.
Run: python benchmarks/bench_plan.py [--prompts 500 --samples 256]
"""
from __future__ import annotations

import argparse
import os
import tempfile
import time

import numpy as np

TEMPERATURES = (0.3, 0.45, 0.6, 0.75, 0.9, 1.1, 1.3, 1.6)


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--prompts", type=int, default=500)
    ap.add_argument("--samples", type=int, default=256)
    ap.add_argument("--boot", type=int, default=2000)
    args = ap.parse_args()

    from bonft.estimate import bon_at_k_per_prompt
    from bonft.examples import ledger_rows
    from bonft.plan import plan_samples
    from bonft.samples import group_pools, read_samples, write_samples

    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "samples.jsonl")
        t0 = time.perf_counter()
        n_rows = write_samples(path, ledger_rows(n_prompts=args.prompts, n_samples=args.samples, temperatures=TEMPERATURES))
        t_make = time.perf_counter() - t0

        t0 = time.perf_counter()
        table = read_samples(path)
        t_load = time.perf_counter() - t0

        t0 = time.perf_counter()
        res = plan_samples(table, budget_samples=[16, 64], budget_tokens=[2000.0, 8000.0], n_boot=args.boot)
        t_plan = time.perf_counter() - t0
        t0 = time.perf_counter()
        text = res.table()
        t_table = time.perf_counter() - t0
        t0 = time.perf_counter()
        res.plot_heatmap(os.path.join(tmp, "heat.png"))
        res.plot_curves(os.path.join(tmp, "curves.png"))
        t_plots = time.perf_counter() - t0

        # the estimator alone on the same pools (what plan_samples calls once per temperature)
        pools = []
        for t in TEMPERATURES:
            _, s, r = group_pools(table, temperature=t)
            pools.append((np.stack(s), np.stack(r)))
        ks = np.arange(1, args.samples + 1)
        t0 = time.perf_counter()
        for s, r in pools:
            bon_at_k_per_prompt(s, r, ks)
        t_est = time.perf_counter() - t0
        # baseline: one sort of every pool (the floor of an exact estimator)
        all_scores = np.stack([s for s, _ in pools])  # (T, P, n)
        t0 = time.perf_counter()
        np.sort(all_scores, axis=-1)
        t_sort = time.perf_counter() - t0

    total = t_plan + t_table + t_plots
    print(text.splitlines()[0])
    print(f"data: {len(TEMPERATURES)} temperatures x {args.prompts} prompts x {args.samples} samples = {n_rows} rows "
          f"(generated and written in {t_make:.2f} s)")
    print(f"load samples file            {t_load:7.3f} s")
    print(f"plan (all k, {args.boot} resamples)  {t_plan:7.3f} s")
    print(f"  of which estimator         {t_est:7.3f} s  ({100 * t_est / t_plan:.0f}% of the plan)")
    print(f"table                        {t_table:7.3f} s")
    print(f"two plots                    {t_plots:7.3f} s")
    print(f"table + plots after loading  {total:7.3f} s  (goal < 5 s: {'met' if total < 5 else 'NOT met'})")
    print(f"baseline np.sort of all pools {t_sort:6.3f} s; plan / sort = {t_plan / t_sort:.1f}x, "
          f"estimator / sort = {t_est / t_sort:.1f}x")
    print(f"cores available: {os.cpu_count()}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
