"""Benchmark of the planner: 8 temperatures x 500 prompts x 256 samples from a samples file.

Times, in one process: loading the file, the full plan (every k = 1..256 at every
temperature, 2000 paired bootstrap resamples, best temperature, near-best sets,
budgets, doubling, fit), the table, the two plots; the estimator's share (the same
best_of_k_per_prompt calls timed alone); and as a baseline one np.sort of all the
scores (the floor any exact best-of-k estimator pays). Goal: table + plots in
under 5 s after loading, on a 2-core machine.

Data: the simulated ledger-puzzle scenario of bonft.tasks.examples, at 8 temperatures.
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

    from bonft.estimate import best_of_k_per_prompt
    from bonft.io import group_pools, read_samples, write_samples
    from bonft.plan import plan_samples
    from bonft.tasks.examples import ledger_rows

    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "samples.jsonl")
        t0 = time.perf_counter()
        n_rows = write_samples(path, ledger_rows(n_prompts=args.prompts, n_samples=args.samples, temperatures=TEMPERATURES))
        t_make = time.perf_counter() - t0

        t0, c0 = time.perf_counter(), time.process_time()
        table = read_samples(path)
        t_load, c_load = time.perf_counter() - t0, time.process_time() - c0

        t0, c0 = time.perf_counter(), time.process_time()
        res = plan_samples(table, budget_samples=[16, 64], budget_tokens=[2000.0, 8000.0], n_boot=args.boot)
        t_plan, c_plan = time.perf_counter() - t0, time.process_time() - c0
        t0, c0 = time.perf_counter(), time.process_time()
        text = res.table()
        t_table, c_table = time.perf_counter() - t0, time.process_time() - c0
        t0, c0 = time.perf_counter(), time.process_time()
        import matplotlib.pyplot  # noqa: F401  (import timed on its own line below)
        t_mpl, c_mpl = time.perf_counter() - t0, time.process_time() - c0
        t0, c0 = time.perf_counter(), time.process_time()
        res.plot_heatmap(os.path.join(tmp, "heat.png"))
        res.plot_curves(os.path.join(tmp, "curves.png"))
        t_plots, c_plots = time.perf_counter() - t0, time.process_time() - c0

        # the estimator alone on the same pools (what plan_samples calls once per temperature)
        pools = []
        for t in TEMPERATURES:
            _, s, r = group_pools(table, temperature=t)
            pools.append((np.stack(s), np.stack(r)))
        ks = np.arange(1, args.samples + 1)
        t0, c0 = time.perf_counter(), time.process_time()
        for s, r in pools:
            best_of_k_per_prompt(s, r, ks=ks)
        t_est, c_est = time.perf_counter() - t0, time.process_time() - c0
        # baseline: one sort of every pool (the floor of an exact estimator)
        all_scores = np.stack([s for s, _ in pools])  # (T, P, n)
        t0 = time.perf_counter()
        np.sort(all_scores, axis=-1)
        t_sort = time.perf_counter() - t0

    total = t_plan + t_table + t_mpl + t_plots
    c_total = c_plan + c_table + c_mpl + c_plots
    print(text.splitlines()[0])
    print(f"data: {len(TEMPERATURES)} temperatures x {args.prompts} prompts x {args.samples} samples = {n_rows} rows "
          f"(generated and written in {t_make:.2f} s)")
    print(f"{'phase':32}{'wall s':>8}{'cpu s':>8}   (cpu = process time, all threads; less hit by other load)")
    for name, w, c in (("load samples file", t_load, c_load), (f"plan (all k, {args.boot} resamples)", t_plan, c_plan),
                       ("  of which estimator", t_est, c_est), ("table", t_table, c_table),
                       ("import matplotlib", t_mpl, c_mpl), ("two plots", t_plots, c_plots),
                       ("table + plots after loading", total, c_total)):
        print(f"{name:32}{w:8.3f}{c:8.3f}")
    print(f"estimator share of the plan: {100 * t_est / t_plan:.0f}% wall, {100 * c_est / max(c_plan, 1e-9):.0f}% cpu")
    print(f"goal < 5 s for table + plots after loading: {'met' if total < 5 else 'NOT met'} (wall {total:.2f} s)")
    print(f"baseline np.sort of all pools {t_sort:6.3f} s; plan / sort = {t_plan / t_sort:.1f}x, "
          f"estimator / sort = {t_est / t_sort:.1f}x")
    print(f"cores available: {os.cpu_count()}, load average (1 min): {os.getloadavg()[0]:.1f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
