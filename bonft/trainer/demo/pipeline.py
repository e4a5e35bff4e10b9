"""The demo's pipeline: the warm start, the RL stages from it, their evaluation and tables, and the study.

See :mod:`bonft.trainer.demo` for what the demo shows.
"""
from __future__ import annotations

import json
import math
import multiprocessing as mp
import time
from dataclasses import dataclass, field, fields, replace
from pathlib import Path

import numpy as np
import torch
from tqdm.auto import tqdm

from bonft.tasks import get_task
from bonft.trainer.checkpoint import latest_checkpoint, quiet_transformers
from bonft.trainer.config import MODEL_KEYS, TrainConfig
from bonft.trainer.demo.stats import LABELS, best_temperatures, per_prompt_curves, seed_table, study_table
from bonft.trainer.evaluation import collect_pools
from bonft.trainer.loop import train
from bonft.trainer.metrics import GRAD_CLIPPED, GRAD_NORM, GRAD_SNR
from bonft.trainer.models import load_model
from bonft.trainer.run import Stream


@dataclass
class DemoConfig(TrainConfig):
    """The demo's knobs: every :class:`TrainConfig` key (passed on to each stage), with the demo's
    defaults where they differ, plus its own (objectives, workers and the temperature sweep).

    The defaults are the study's settings (docs/study_results.md): the refunds task, whose return
    prompts a warm start answers right about 4% of the time; RL steps of 64 prompts x 32 samples,
    plain SGD at lr 0.02 with no clipping and an anchor (KL to the warm start, weight 0.2), the
    setting under which the placebo run stayed at the warm start. They fit ~10 minutes on 2 CPU cores.
    """

    run_dir: str = "runs/demo"
    task: str = "refunds"
    task_params: dict = field(default_factory=dict)
    warm_start_steps: int = 400
    rl_steps: int = 60
    prompts_per_step: int = 64
    n: int = 32
    k: int = 8
    optimizer: str = "sgd"
    lr: float = 0.02
    warmup_steps: int = 5
    clip_grad_norm: float = 0.0
    anchor_weight: float = 0.2
    snr_every: int = 10
    max_new_tokens: int = 4
    save_every: int = 0
    log_every: int = 1  # every step: grad/snr (measured every snr_every steps) is only in the lines written
    objectives: tuple = ("reinforce", "pass_at_k", "placebo")
    workers: int = 2  # stages run in parallel processes, one core each
    plan_temperatures: tuple = (0.6, 0.8, 1.0, 1.2, 1.4)  # the planner's sweep; () = skip it
    plan_prompts: int = 100  # held-out prompts of the sweep (the first ones)
    plan_n: int = 32  # samples per prompt and temperature in the sweep
    plan_policies: tuple = ("warm_start", "reinforce", "pass_at_k", "best_of_k")
    warm_start_clip: float = 1.0  # clip_grad_norm of the warm-start stage (clip_grad_norm is the RL stages')


def stage_config(dc: DemoConfig, **kw) -> TrainConfig:
    """A stage's TrainConfig: the demo's values of every trainer key, then the stage's own (``kw``)."""
    values = {f.name: getattr(dc, f.name) for f in fields(TrainConfig)}
    values.update(task_params=dict(dc.task_params), eval_ks=list(dc.eval_ks))
    values.update(kw)
    if values["start_from"]:  # the model comes from start_from: the tiny model's keys stay unset
        values.update({name: getattr(TrainConfig, name) for name in MODEL_KEYS})
    return TrainConfig(**values)


def _final_eval(run_dir: Path) -> dict | None:
    path = run_dir / "summary.json"
    if not path.is_file():
        return None
    evals = json.loads(path.read_text())["evaluations"]
    return evals[-1] if evals else None


def _stage(cfg: TrainConfig, progress: bool) -> dict:
    """Run one trainer stage, or reuse it when its run directory already holds a finished run."""
    done = _final_eval(Path(cfg.run_dir))
    if done is not None:
        print(f"{cfg.name}: reusing the finished run in {cfg.run_dir}")
        return done
    resume = (Path(cfg.run_dir) / "checkpoints").exists()
    train(cfg, resume=resume, progress=progress)
    return _final_eval(Path(cfg.run_dir))


def _stage_in_child(cfg: TrainConfig) -> None:
    torch.set_num_threads(cfg.threads)
    _stage(cfg, progress=False)


def _parallel_stages(cfgs: list[TrainConfig], workers: int, progress: bool) -> dict:
    """Run stages in ``workers`` processes (one core each); a parent bar follows their metrics files.

    Ctrl-C reaches the children too (same process group): each writes a checkpoint; rerunning the
    demo resumes them.
    """
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
    """The RL stage of ``objective`` from the warm start ``warm``; besides the trainer's objectives:
    ``pass_at_k_anneal`` (k from min(16, n) to 1, geometric) and ``placebo`` (pass@k with the outcomes
    shuffled within each pool). ``best_of_k`` selects with the task's proxy verifier."""
    if objective == "pass_at_k_anneal":  # k annealing: from large k toward 1
        extra = {"objective": "pass_at_k", "k": min(16, dc.n), "k_final": 1, "k_schedule": "geometric"}
    elif objective == "placebo":
        extra = {"objective": "pass_at_k", "k": dc.k, "placebo": True}
    elif objective == "best_of_k":
        extra = {"objective": "best_of_k", "k": dc.k, "verifier": "proxy"}
    else:
        extra = {"objective": objective, "k": 1 if objective == "reinforce" else dc.k}
    return stage_config(dc, name=objective, run_dir=str(out / objective), start_from=warm, warm_start_steps=0, rl_steps=dc.rl_steps,
                 eval_at_start=False, **extra)


def warm_config(dc: DemoConfig, out: Path) -> TrainConfig:
    return stage_config(dc, name="warm_start", run_dir=str(out / "warm_start"), warm_start_steps=dc.warm_start_steps, rl_steps=0,
                 clip_grad_norm=dc.warm_start_clip)


def collect_stage_pools(dc: DemoConfig, stage_dir: Path, *, temperature: float, n_prompts: int, n: int) -> dict:
    """Pools of the stage's final policy on the first ``n_prompts`` held-out prompts, cached in the stage directory.

    Prompt j draws from the trainer's evaluation seed of slot j, so at the evaluation temperature these
    are the pools of the stage's own final evaluation. Returns ``{"rewards": (P, n), "proxy": (P, n),
    "family": (P,)}`` (``proxy`` only when the task has one).
    """
    path = stage_dir / f"pools-T{temperature:g}-P{n_prompts}-n{n}.npz"
    if path.is_file():
        with np.load(path) as z:
            return {key: z[key] for key in z.files}

    task = get_task(dc.task, **dc.task_params)
    train, held = task.split(n_train=dc.train_prompts, n_eval=dc.heldout_prompts, seed=dc.seed)
    held = held[:n_prompts]
    everything = list(train) + list(held)
    vers = {"exact": task.verifier(everything)}
    proxy = task.proxy_verifier(everything)
    if proxy is not None:
        vers["proxy"] = proxy
    with quiet_transformers():
        model, tok = load_model(latest_checkpoint(stage_dir), device="cpu")
    model.eval()
    raw = collect_pools(model, tok, [e.prompt for e in held], verifiers=vers, extract_answer=task.extract_answer, n=n,
                        temperature=temperature, max_new_tokens=dc.max_new_tokens,
                        seeds=[Stream.EVALUATION.for_prompt(dc.seed, step=0, slot=j) for j in range(len(held))])
    out = {"rewards": raw["rewards"], "family": np.array([str((e.meta or {}).get("family", "all")) for e in held])}
    if "proxy" in raw["scores"]:
        out["proxy"] = raw["scores"]["proxy"]
    np.savez_compressed(path, **out)
    return out


def gradient_summary(stage_dir: Path) -> dict:
    """Medians over the logged RL steps of ``grad/snr`` and ``grad/norm``, the share of clipped steps,
    and the training reward of the first and last fifth of the run."""
    path = stage_dir / "metrics.jsonl"
    if not path.is_file():
        return {}
    rows = [json.loads(ln) for ln in path.read_text().splitlines() if '"train"' in ln and '"rl"' in ln]
    if not rows:
        return {}
    fifth = max(1, len(rows) // 5)
    snr = [r[GRAD_SNR] for r in rows if GRAD_SNR in r]
    return {"grad_snr": float(np.median(snr)) if snr else float("nan"),
            "grad_norm": float(np.median([r[GRAD_NORM] for r in rows if GRAD_NORM in r])),
            "clipped": float(np.mean([r.get(GRAD_CLIPPED, 0.0) for r in rows])),
            "reward_first": float(np.mean([r["reward"] for r in rows[:fifth]])),
            "reward_last": float(np.mean([r["reward"] for r in rows[-fifth:]]))}


def gradient_table(per_stage: dict[str, dict], batch: int) -> str:
    """Markdown: the gradient figures of each RL stage (see :func:`gradient_summary`)."""
    lines = [f"Gradient signal-to-noise per RL stage (median over measured steps; pure noise gives about "
             f"1/sqrt({batch}) = {1 / math.sqrt(batch):.3f})", "",
             "| policy | grad/snr | grad/norm | clipped steps | training reward, first -> last fifth |", "|---|---|---|---|---|"]
    for name, g in per_stage.items():
        if g:
            lines.append(f"| {LABELS.get(name, name)} | {g['grad_snr']:.3f} | {g['grad_norm']:.2f} | {g['clipped']:.0%} "
                         f"| {g['reward_first']:.3f} -> {g['reward_last']:.3f} |")
    return "\n".join(lines)


def temperature_table(dc: DemoConfig, out: Path, names: list[str]) -> tuple[str, dict]:
    """The planner's best sampling temperature for pass@k at each k of ``eval_ks``, per policy."""
    if not dc.plan_temperatures:
        return "", {}
    best = {}
    for name in names:
        if name not in dc.plan_policies or not (out / name / "checkpoints").is_dir():
            continue
        pools = {t: collect_stage_pools(dc, out / name, temperature=t, n_prompts=min(dc.plan_prompts, dc.heldout_prompts),
                                        n=dc.plan_n)["rewards"] for t in dc.plan_temperatures}
        best[name] = best_temperatures(pools, [k for k in dc.eval_ks if k <= dc.plan_n], seed=dc.seed)
    if not best:
        return "", {}
    ks = list(next(iter(best.values())))
    lines = [f"The planner's best temperature for pass@k (grid {', '.join(f'{t:g}' for t in dc.plan_temperatures)}; "
             f"{min(dc.plan_prompts, dc.heldout_prompts)} held-out prompts x {dc.plan_n} samples per temperature)", "",
             "| policy | " + " | ".join(f"k = {k}" for k in ks) + " |", "|---" * (len(ks) + 1) + "|"]
    for name, b in best.items():
        lines.append(f"| {LABELS.get(name, name)} | " + " | ".join(f"{b[k]:g}" for k in ks) + " |")
    return "\n".join(lines), best


def run_demo(dc: DemoConfig | None = None, *, progress: bool = True) -> dict:
    """Warm start once, then each objective from the same warm start; returns the summary dict.

    Writes ``comparison.md`` (per-policy means with bootstrap CIs over prompts, paired differences from
    the warm start and from REINFORCE, the gradient figures, the planner's best temperatures),
    ``comparison.png`` and ``summary.json`` under ``run_dir``.
    """
    from bonft.viz import plot_comparison  # matplotlib: a heavy import, only when the demo runs

    dc = dc or DemoConfig()
    out = Path(dc.run_dir)
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    results = {"warm_start": _stage(warm_config(dc, out), progress)}
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
    t2 = time.perf_counter()
    report = demo_report(dc, out, list(results))
    timings["evaluation"] = time.perf_counter() - t2
    table = comparison_table(results)
    summary = {
        "config": {k: (list(v) if isinstance(v, tuple) else v) for k, v in dc.__dict__.items()},
        "results": results, "seconds": timings, "table": table, "report": report["text"],
        "gradients": report["gradients"], "best_temperature": report["best_temperature"],
    }
    (out / "summary.json").write_text(json.dumps(summary, indent=1))
    (out / "comparison.md").write_text(report["text"] + "\n\nThe trainer's own evaluations:\n\n" + table + "\n")
    plot_comparison({LABELS.get(k, k): v for k, v in results.items()}, out / "comparison.png",
                    title=f"{dc.task} task, {dc.heldout_prompts} held-out prompts x {dc.eval_samples} samples")
    print("\n" + report["text"])
    print(f"\nwrote {out}/summary.json, {out}/comparison.md, {out}/comparison.png "
          f"({sum(timings.values()):.0f} s)")
    return summary


def demo_report(dc: DemoConfig, out: Path, names: list[str]) -> dict:
    """One seed's tables from the stages in ``out``: paired comparisons, gradient figures, best temperatures."""
    curves = {name: per_prompt_curves(collect_stage_pools(dc, out / name, temperature=dc.eval_temperature,
                                                          n_prompts=dc.heldout_prompts, n=dc.eval_samples), dc.eval_ks)
              for name in names}
    grads = {name: gradient_summary(out / name) for name in names if name != "warm_start"}
    temps_text, best = temperature_table(dc, out, names)
    parts = [seed_table(curves, dc.eval_ks, n_boot=dc.n_boot, seed=dc.seed, confidence=dc.confidence),
             gradient_table(grads, dc.prompts_per_step)]
    if temps_text:
        parts.append(temps_text)
    return {"text": "\n\n".join(parts), "curves": curves, "gradients": grads, "best_temperature": best}


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
STUDY_OBJECTIVES = ("reinforce", "pass_at_k", "best_of_k", "pass_at_k_anneal", "placebo")
STUDY_SEEDS = (0, 1, 2, 3, 4)  # fixed before looking at any result


def run_study(dc: DemoConfig | None = None, *, seeds=STUDY_SEEDS, objectives=STUDY_OBJECTIVES, progress: bool = False) -> str:
    """The demo over several seeds; writes ``study.md`` under ``run_dir`` and returns it.

    Each seed has its own warm start (the seed changes the model init, the data split and the held-out
    prompts). All warm starts run first, then every RL stage of every seed, ``workers`` at a time.
    ``study.md``: means over seeds with t-intervals, paired per-seed differences from the warm start and
    from REINFORCE with t-intervals over seeds, per-seed values, and each seed's own tables (bootstrap
    intervals over prompts, gradient figures, the planner's best temperatures).
    """
    dc = dc or DemoConfig()
    root = Path(dc.run_dir)
    root.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    per_dc = {s: replace(dc, seed=s, run_dir=str(root / f"seed{s}"), objectives=tuple(objectives)) for s in seeds}
    _parallel_stages([warm_config(d, Path(d.run_dir)) for d in per_dc.values()], dc.workers, progress)
    rl = [objective_config(d, obj, str(latest_checkpoint(Path(d.run_dir) / "warm_start")), Path(d.run_dir))
          for d in per_dc.values() for obj in objectives]
    _parallel_stages(rl, dc.workers, progress)
    names = ["warm_start", *objectives]
    reports = {s: demo_report(d, Path(d.run_dir), names) for s, d in per_dc.items()}
    minutes = (time.perf_counter() - t0) / 60
    text = [f"# Study: {len(seeds)} seeds x ({', '.join(names)})", "",
            f"{dc.task} task, {dc.heldout_prompts} held-out prompts x {dc.eval_samples} samples at T = {dc.eval_temperature:g} per seed; "
            f"RL: {dc.rl_steps} steps of {dc.prompts_per_step} prompts x {dc.n} samples, optimizer {dc.optimizer}, lr {dc.lr:g}, "
            f"anchor_weight {dc.anchor_weight:g}, clip_grad_norm {dc.clip_grad_norm:g}. Wall time {minutes:.0f} min.", "",
            study_table({s: r["curves"] for s, r in reports.items()}, dc.eval_ks, confidence=dc.confidence), "",
            _study_gradients({s: r["gradients"] for s, r in reports.items()}), ""]
    for s, r in reports.items():
        text += [f"## Seed {s}", "", r["text"], ""]
    out = "\n".join(text)
    (root / "study.md").write_text(out)
    print(out)
    return out


def _study_gradients(per_seed: dict[int, dict[str, dict]]) -> str:
    seeds = list(per_seed)
    names = list(per_seed[seeds[0]])
    lines = ["Gradient figures, mean over seeds of each run's median", "",
             "| policy | grad/snr | grad/norm | clipped steps |", "|---|---|---|---|"]
    for n in names:
        g = [per_seed[s][n] for s in seeds if per_seed[s].get(n)]
        if g:
            lines.append(f"| {LABELS.get(n, n)} | {np.mean([x['grad_snr'] for x in g]):.3f} | "
                         f"{np.mean([x['grad_norm'] for x in g]):.2f} | {np.mean([x['clipped'] for x in g]):.0%} |")
    return "\n".join(lines)
