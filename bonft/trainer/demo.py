"""The demo: does a best-of-N-aware objective buy pass@k at large k over leave-one-out REINFORCE?

From nothing, on a CPU: build a tiny GPT-2-style model, warm-start it on the
ledger task's reference answers, then from that same warm start train

(a) leave-one-out REINFORCE (Kool et al. 2019) -- optimises the mean reward (pass@1), and
(b) a pass@k-aware objective (unbiased pass@k credit, Chen et al. 2021; Walder & Karkhanis 2025)

with the same prompts per step, samples per prompt and steps, and evaluate all
three policies on the same held-out prompts with many samples each: pass@k,
best-of-k under the task's imperfect proxy verifier, distinct answers per
prompt and an entropy estimate. Writes ``summary.json``, ``comparison.png`` and
``comparison.md`` under the output directory; each stage is a normal trainer
run directory, so it can be inspected with ``bonft eval`` / ``bonft sample``.

:func:`run_study` repeats the comparison over seeds and all objectives
(k-annealing included) and writes a markdown table of means with CIs.
"""
from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass, field, fields, replace
from pathlib import Path

import numpy as np

from .config import TrainConfig


@dataclass
class DemoConfig(TrainConfig):
    """The demo's knobs: every :class:`TrainConfig` key (passed on to each stage), with the demo's
    defaults where they differ (the defaults fit ~10 minutes on 2 CPU cores), plus two of its own."""

    run_dir: str = "runs/demo"
    task_params: dict = field(default_factory=lambda: {"hard_share": 0.3, "max_factor": 9})
    sft_steps: int = 400
    rl_steps: int = 200
    lr: float = 2e-4
    max_new_tokens: int = 6
    save_every: int = 0
    objectives: tuple = ("loo_reinforce", "pass_at_k")
    workers: int = 2  # RL stages run in parallel processes, one core each


LABELS = {
    "warm_start": "warm start (before RL)",
    "loo_reinforce": "leave-one-out REINFORCE",
    "best_of_k": "best-of-k (verifier)",
    "pass_at_k": "pass@k unbiased",
    "pass_at_k_plugin": "pass@k plug-in",
    "pass_at_k_positive": "pass@k positive-only",
    "best_of_k_sft": "best-of-k SFT",
    "pass_at_k_anneal": "pass@k, k annealed 16 -> 1",
}


def _base(dc: DemoConfig, **kw) -> TrainConfig:
    """A stage's TrainConfig: the demo's values of every trainer key, then the stage's own (``kw``)."""
    values = {f.name: getattr(dc, f.name) for f in fields(TrainConfig)}
    values.update(task_params=dict(dc.task_params), eval_ks=list(dc.eval_ks))
    values.update(kw)
    return TrainConfig(**values)


def _final_eval(run_dir: Path) -> dict | None:
    path = run_dir / "summary.json"
    if not path.is_file():
        return None
    evals = json.loads(path.read_text())["evaluations"]
    return evals[-1] if evals else None


def _stage(cfg: TrainConfig, progress: bool) -> dict:
    """Run one trainer stage, or reuse it when its run directory already holds a finished run."""
    from .loop import train

    done = _final_eval(Path(cfg.run_dir))
    if done is not None:
        print(f"{cfg.name}: reusing the finished run in {cfg.run_dir}")
        return done
    resume = (Path(cfg.run_dir) / "checkpoints").exists()
    train(cfg, resume=resume, progress=progress)
    return _final_eval(Path(cfg.run_dir))


def _stage_in_child(cfg: TrainConfig) -> None:
    import torch

    torch.set_num_threads(cfg.threads)
    _stage(cfg, progress=False)


def _parallel_stages(cfgs: list[TrainConfig], workers: int, progress: bool) -> dict:
    """Run stages in ``workers`` processes (one core each); a parent bar follows their metrics files.

    Ctrl-C reaches the children too (same process group): each writes a checkpoint; rerunning the
    demo resumes them.
    """
    import multiprocessing as mp

    from tqdm.auto import tqdm

    ctx = mp.get_context("spawn")
    pending, running = list(cfgs), []
    total = sum(c.rl_steps for c in cfgs)
    bar = tqdm(total=total, desc="RL stages (parallel)", disable=not progress, dynamic_ncols=True)

    def done_steps(c: TrainConfig) -> int:
        path = Path(c.run_dir) / "metrics.jsonl"
        if (Path(c.run_dir) / "summary.json").is_file():
            return c.rl_steps
        if not path.is_file():
            return 0
        steps = [json.loads(ln).get("step", 0) for ln in path.read_text().splitlines() if '"train"' in ln]
        return max(steps, default=0)

    try:
        while pending or running:
            while pending and len(running) < workers:
                c = pending.pop(0)
                p = ctx.Process(target=_stage_in_child, args=(c,), name=c.name)
                p.start()
                running.append((c, p))
            time.sleep(1.0)
            for c, p in list(running):
                if not p.is_alive():
                    p.join()
                    if p.exitcode != 0:
                        raise RuntimeError(f"stage {c.name} failed (exit code {p.exitcode}); see {c.run_dir}")
                    running.remove((c, p))
            bar.n = sum(done_steps(c) for c in cfgs)
            bar.refresh()
    except BaseException:
        for _, p in running:
            p.join(timeout=60)
        raise
    finally:
        bar.close()
    return {c.name: _final_eval(Path(c.run_dir)) for c in cfgs}


def objective_config(dc: DemoConfig, objective: str, warm: str, out: Path) -> TrainConfig:
    extra = {}
    if objective == "pass_at_k_anneal":  # k annealing: from large k toward 1
        extra = {"objective": "pass_at_k", "k": min(16, dc.n), "k_final": 1, "k_schedule": "geometric"}
    else:
        extra = {"objective": objective, "k": 1 if objective == "loo_reinforce" else dc.k}
    return _base(dc, name=objective, run_dir=str(out / objective), start_from=warm, sft_steps=0, rl_steps=dc.rl_steps,
                 eval_at_start=False, **extra)


def run_demo(dc: DemoConfig | None = None, *, progress: bool = True) -> dict:
    """Warm start once, then each objective from the same warm start; returns the summary dict."""
    from .checkpoint import latest_checkpoint
    from ..viz import plot_comparison

    dc = dc or DemoConfig()
    out = Path(dc.run_dir)
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    warm_cfg = _base(dc, name="warm_start", run_dir=str(out / "warm_start"), sft_steps=dc.sft_steps, rl_steps=0)
    results = {"warm_start": _stage(warm_cfg, progress)}
    timings = {"warm_start": time.perf_counter() - t0}
    warm = str(latest_checkpoint(out / "warm_start"))
    cfgs = [objective_config(dc, obj, warm, out) for obj in dc.objectives]
    t1 = time.perf_counter()
    if dc.workers > 1 and len(cfgs) > 1:
        results.update(_parallel_stages(cfgs, dc.workers, progress))
    else:
        for c in cfgs:
            results[c.name] = _stage(c, progress)
    timings["rl_stages"] = time.perf_counter() - t1
    table = comparison_table(results)
    summary = {
        "config": {k: (list(v) if isinstance(v, tuple) else v) for k, v in dc.__dict__.items()},
        "results": results, "seconds": timings, "table": table,
    }
    (out / "summary.json").write_text(json.dumps(summary, indent=1))
    (out / "comparison.md").write_text(table + "\n")
    plot_comparison({LABELS.get(k, k): v for k, v in results.items()}, out / "comparison.png",
                    title=f"ledger task, {dc.n_eval} held-out prompts x {dc.eval_n} samples")
    print("\n" + table)
    print(f"\nwrote {out}/summary.json, {out}/comparison.md, {out}/comparison.png "
          f"({sum(timings.values()):.0f} s)")
    return summary


def _cell(c: dict, j: int) -> str:
    return f"{c['mean'][j]:.3f} [{c['lo'][j]:.3f}, {c['hi'][j]:.3f}]"


def comparison_table(results: dict[str, dict]) -> str:
    """Markdown: one row per policy; pass@k and proxy best-of-k per k with 95% CIs, diversity."""
    any_ev = next(iter(results.values()))
    ks = any_ev["ks"]
    groups = sorted(any_ev.get("by_group", {}))
    head = (["policy"] + [f"pass@{k}" for k in ks] + [f"proxy best-of-{k}" for k in ks]
            + [f"pass@1 / pass@{ks[-1]} {g}" for g in groups] + ["distinct answers", "entropy (nats)", "length"])
    lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for name, ev in results.items():
        cells = [LABELS.get(name, name)] + [_cell(ev["pass_at_k"], j) for j in range(len(ks))]
        proxy = ev["best_of_k"].get("proxy")
        cells += [_cell(proxy, j) if proxy else "-" for j in range(len(ks))]
        for g in groups:
            d = ev.get("by_group", {}).get(g)
            cells.append(f"{d['pass_at_k'][0]:.3f} / {d['pass_at_k'][-1]:.3f}" if d else "-")
        cells += [f"{ev['distinct_answers']:.2f}", f"{ev['entropy']:.2f}", f"{ev['mean_length']:.2f}"]
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)


# ----------------------------------------------------------------------------- study
STUDY_OBJECTIVES = ("loo_reinforce", "best_of_k", "pass_at_k", "pass_at_k_plugin", "pass_at_k_positive",
                    "best_of_k_sft", "pass_at_k_anneal")


def run_study(dc: DemoConfig | None = None, *, seeds=(0, 1, 2), objectives=STUDY_OBJECTIVES, progress: bool = False) -> str:
    """The demo over several seeds and all objectives; writes ``study.md`` (means over seeds, t-intervals).

    Each seed has its own warm start (the seed changes the model init and the data split).
    Slow: about (1 + len(objectives)) trainer stages per seed.
    """
    dc = dc or DemoConfig()
    root = Path(dc.run_dir)
    per = {}
    for s in seeds:
        res = run_demo(replace(dc, seed=s, run_dir=str(root / f"seed{s}"), objectives=tuple(objectives)), progress=progress)
        per[s] = res["results"]
    table = study_table(per)
    (root / "study.md").write_text(table + "\n")
    print(table)
    return table


def study_table(per_seed: dict[int, dict[str, dict]]) -> str:
    """Markdown: mean over seeds of pass@k per k, with a 95% Student-t interval over seeds."""
    from scipy import stats

    seeds = list(per_seed)
    names = list(per_seed[seeds[0]])
    ks = per_seed[seeds[0]][names[0]]["ks"]
    head = ["policy"] + [f"pass@{k}" for k in ks] + ["distinct answers"]
    lines = [f"pass@k: mean over {len(seeds)} seeds [95% t-interval over seeds]", "",
             "| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
    for name in names:
        cells = [LABELS.get(name, name)]
        for j in range(len(ks)):
            v = np.array([per_seed[s][name]["pass_at_k"]["mean"][j] for s in seeds])
            half = stats.t.ppf(0.975, len(v) - 1) * v.std(ddof=1) / math.sqrt(len(v)) if len(v) > 1 else float("nan")
            cells.append(f"{v.mean():.3f} [{v.mean() - half:.3f}, {v.mean() + half:.3f}]" if len(v) > 1 else f"{v.mean():.3f}")
        cells.append(f"{np.mean([per_seed[s][name]['distinct_answers'] for s in seeds]):.2f}")
        lines.append("| " + " | ".join(cells) + " |")
    return "\n".join(lines)
