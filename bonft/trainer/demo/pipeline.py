"""The demo's pipeline: the warm start, the RL stages from it, their evaluation and tables (the study: :mod:`.study`).

See :mod:`bonft.trainer.demo` for what the demo shows.
"""
from __future__ import annotations

import json
import math
import resource
import time
from dataclasses import dataclass, field, fields
from pathlib import Path

import numpy as np
import torch
from tqdm.auto import tqdm

from bonft.estimate.paired import per_prompt_curves
from bonft.io import group_pools, read_samples
from bonft.tasks import TASKS, get_task
from bonft.trainer.checkpoint import latest_checkpoint, quiet_transformers
from bonft.trainer.config import MODEL_KEYS, TrainConfig, read_recipe, unread_keys
from bonft.trainer.demo.schedule import Workers, run_jobs
from bonft.trainer.demo.stats import LABELS, best_temperatures, seed_table
from bonft.trainer.evaluation import HELDOUT_SAMPLES, collect_pools
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
    plain SGD at lr 0.01 with no clipping and an anchor (KL to the warm start, weight 0.2). lr 0.01 is
    the study's choice for pass@k (unbiased) on its validation grid and admissible for REINFORCE too
    (its placebo within noise of the warm start; at 0.02 neither placebo was). They take about 3.5 minutes on
    2 CPU cores.
    Another task brings its own settings (``Task.demo_settings``, e.g. longer responses for a task
    whose answers are programs): build the config with :meth:`for_task`.
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
    lr: float = 0.01  # the study's validated lr for pass@k (docs/study_results.md, the chosen settings)
    warmup_steps: int = 5
    clip_grad_norm: float = 0.0
    anchor_weight: float = 0.2
    snr_every: int = 10
    max_new_tokens: int = 4
    save_every: int = 0
    log_every: int = 1  # every step: grad/snr (measured every snr_every steps) is only in the lines written
    objectives: tuple = ("reinforce", "pass_at_k", "placebo")
    workers: int = 3  # RL stages at once, each in a worker process with one torch thread (3 on 2 cores: no core idles)
    plan_temperatures: tuple = (0.6, 0.8, 1.0, 1.2, 1.4)  # the planner's sweep; () = skip it
    plan_prompts: int = 100  # held-out prompts of the sweep (the first ones)
    plan_n: int = 32  # samples per prompt and temperature in the sweep
    plan_policies: tuple = ("warm_start", "reinforce", "pass_at_k", "best_of_k")
    warm_start_clip: float = 1.0  # clip_grad_norm of the warm-start stage (clip_grad_norm is the RL stages')

    @classmethod
    def for_task(cls, task: str, **overrides) -> "DemoConfig":
        """The demo's config for ``task``: DemoConfig's defaults, then the task's ``demo_settings``, then
        ``overrides`` (a knob named in ``overrides`` wins over the task's setting)."""
        if not isinstance(task, str) or task not in TASKS:
            raise ValueError(f"task must be one of {tuple(TASKS)}, got {task!r}")
        return cls(**{**TASKS[task].demo_settings, **overrides, "task": task})


def check_demo(dc: DemoConfig) -> None:
    """What the trainer's own checks cannot know: the room a right answer of the task needs."""
    task = get_task(dc.task, **dc.task_params)
    if dc.max_new_tokens < task.min_new_tokens:
        raise ValueError(f"max_new_tokens must be >= {task.min_new_tokens} for task {dc.task!r} (its longest right "
                         f"response and EOS; its demo uses {task.demo_settings.get('max_new_tokens', task.min_new_tokens)}), "
                         f"got max_new_tokens={dc.max_new_tokens}")


def training_verifier(objective: str) -> str:
    """The training verifier of a demo stage: ``proxy`` for best-of-k (it selects), else ``exact`` (the task's oracle)."""
    return "proxy" if objective == "best_of_k" else "exact"


def _verifier_cell(objective: str) -> str:
    v = training_verifier(objective)
    return "proxy" if v == "proxy" else f"{v} (the evaluation verifier)"


def verifier_caption(dc: DemoConfig, names) -> str:
    """One line under every table's title: the evaluation verifier, the proxy that picks best-of-k and
    each RL stage's training verifier, in the task's words."""
    task = get_task(dc.task, **dc.task_params)
    by: dict[str, list] = {}
    for name in names:
        if name != "warm_start":
            by.setdefault(training_verifier(name), []).append(LABELS.get(name, name))
    train = "; ".join(f"{'the proxy verifier' if v == 'proxy' else 'the evaluation verifier'} for {', '.join(ns)}"
                      for v, ns in by.items())
    return (f"Evaluation verifier (pass@k, and the reward of each best-of-k pick): {task.verifier_label}. "
            f"Proxy verifier (picks best-of-k): {task.proxy_label}. Training verifier: {train or 'none (no RL stage)'}.")


def stage_config(dc: DemoConfig, **kw) -> TrainConfig:
    """A stage's TrainConfig: the demo's values of every trainer key, then the stage's own (``kw``)."""
    values = {f.name: getattr(dc, f.name) for f in fields(TrainConfig)}
    values.update(task_params=dict(dc.task_params), eval_ks=list(dc.eval_ks))
    values.update(kw)
    if values["start_from"]:  # the model comes from start_from: the tiny model's keys stay unset
        values.update({name: getattr(TrainConfig, name) for name in MODEL_KEYS})
    # keys the stage never reads (the warm start's in an RL stage, k of reinforce...) stay unset: setting them is an error
    values.update({name: getattr(TrainConfig, name) for name in unread_keys(values["objective"], values["warm_start_steps"])})
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
    out = Path(cfg.run_dir)
    # a stage stopped before its first checkpoint starts again from step 0 (the trainer keeps its lines aside)
    train(cfg, resume=(out / "checkpoints").exists(), progress=progress)
    return _final_eval(out)


def _stage_in_child(cfg: TrainConfig, dc: DemoConfig | None = None) -> None:
    """A worker's job: the stage, then (given ``dc``) the pools the report reads from it (:func:`stage_pools`)."""
    torch.set_num_threads(cfg.threads)
    _stage(cfg, progress=False)
    if dc is not None:
        stage_pools(dc, Path(cfg.run_dir))


def _parallel_stages(cfgs: list[TrainConfig], workers: int, progress: bool, *, dc: DemoConfig | None = None,
                     pool: Workers | None = None, meanwhile=None) -> dict:
    """Run stages in worker processes, ``workers`` at a time (:mod:`.schedule`); a parent bar follows
    their metrics files.

    ``dc``: each worker then samples its stage's pools for the report. ``pool``: workers started
    earlier (their imports done). ``meanwhile``: run here once the stages are handed out.
    Ctrl-C reaches the children too (same process group): each writes a checkpoint; rerunning the
    demo resumes them.
    """
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

    def tick() -> None:
        bar.n = sum(done_steps(c) for c in cfgs)
        bar.refresh()

    try:
        run_jobs([(c.name, c.run_dir, _stage_in_child, (c, dc)) for c in cfgs], workers, pool=pool,
                 meanwhile=meanwhile, tick=tick)
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
        extra = {"objective": "best_of_k", "k": dc.k, "verifier": training_verifier(objective)}
    else:
        extra = {"objective": objective, "k": dc.k}
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
    task = get_task(dc.task, **dc.task_params)
    train, held = task.split(n_train=dc.train_prompts, n_eval=dc.heldout_prompts, seed=dc.seed)
    path = stage_dir / f"pools-T{temperature:g}-P{n_prompts}-n{n}.npz"
    if not path.is_file():
        found = final_eval_pools(dc, stage_dir, held[:n_prompts], temperature=temperature, n=n,
                                 proxy=task.proxy_verifier(held[:n_prompts]) is not None)
        if found is not None:
            np.savez_compressed(path, **found)
            return found
    return policy_pools(dc, stage_dir, held[:n_prompts], list(train) + list(held[:n_prompts]),
                        path=path, temperature=temperature, n=n, step=0)


# the stage's keys that fix its final evaluation's prompts and samples, besides temperature and n
_EVAL_KEYS = ("task", "task_params", "seed", "train_prompts", "heldout_prompts", "max_new_tokens")


def final_eval_pools(dc: DemoConfig, stage_dir: Path, prompts: list, *, temperature: float, n: int,
                     proxy: bool) -> dict | None:
    """The pools :func:`policy_pools` would sample, read from the samples file of the stage's own final
    evaluation (``HELDOUT_SAMPLES``: the same prompts, seeds, weights and verifiers), or None when the
    stage has none that matches: a finished run whose last evaluation used the oracle (``exact``) at
    ``temperature`` with ``n`` samples on at least ``len(prompts)`` prompts, whose config has the
    demo's values of the keys that fix the prompts and the draws, and whose file holds these prompts'
    texts in this order (and a ``score_proxy`` field when ``proxy``)."""
    last = _final_eval(stage_dir)
    file = stage_dir / HELDOUT_SAMPLES
    if last is None or not file.is_file() or not (stage_dir / "config.toml").is_file():
        return None
    if (last.get("eval_verifier") != "exact" or last.get("temperature") != temperature or last.get("n_samples") != n
            or last.get("n_prompts", 0) < len(prompts)):
        return None
    cfg = read_recipe(stage_dir / "config.toml")
    if any(cfg.get(key) != (dict(dc.task_params) if key == "task_params" else getattr(dc, key)) for key in _EVAL_KEYS):
        return None
    fields_ = {"score_field": "score_proxy"} if proxy else {}
    try:
        table = read_samples(file, duplicates="allow", text_field="prompt", **fields_)  # identical responses: distinct samples
    except ValueError:  # no score_proxy field: sample afresh
        return None
    keys, proxies, rewards = group_pools(table)
    P = len(prompts)
    if keys[:P] != [str(j) for j in range(P)] or any(len(r) != n for r in rewards[:P]):
        return None
    first = {}  # each prompt id's text: the file's prompts must be these, in this order
    for key, text in zip(table.prompt_keys, table.prompts if table.prompts is not None else [None] * len(table)):
        first.setdefault(key, text)
    if [first[str(j)] for j in range(P)] != [e.prompt for e in prompts]:
        return None
    out = {"rewards": np.stack(rewards[:P]), "family": np.array([str((e.meta or {}).get("family", "all")) for e in prompts])}
    if proxy:
        out["proxy"] = np.stack(proxies[:P])
    return out


def policy_pools(dc: DemoConfig, stage_dir: Path, prompts: list, examples: list, *, path: Path, temperature: float,
                 n: int, step: int) -> dict:
    """Pools of the stage's final policy on ``prompts`` (examples), cached in ``path``: ``n`` samples per prompt at
    ``temperature``, prompt j drawing from the trainer's evaluation seed of (``step``, slot j); the verifiers are
    the task's over ``examples``. Returns ``{"rewards": (P, n), "proxy": (P, n), "family": (P,)}`` (``proxy``
    only when the task has one)."""
    if path.is_file():
        with np.load(path) as z:
            return {key: z[key] for key in z.files}
    task = get_task(dc.task, **dc.task_params)
    vers = {"exact": task.verifier(examples)}
    proxy = task.proxy_verifier(examples)
    if proxy is not None:
        vers["proxy"] = proxy
    with quiet_transformers():
        model, tok = load_model(latest_checkpoint(stage_dir), device="cpu")
    model.eval()
    raw = collect_pools(model, tok, [e.prompt for e in prompts], verifiers=vers, extract_answer=task.extract_answer,
                        n=n, temperature=temperature, max_new_tokens=dc.max_new_tokens,
                        seeds=[Stream.EVALUATION.for_prompt(dc.seed, step=step, slot=j) for j in range(len(prompts))])
    out = {"rewards": raw["rewards"], "family": np.array([str((e.meta or {}).get("family", "all")) for e in prompts])}
    if "proxy" in raw["scores"]:
        out["proxy"] = raw["scores"]["proxy"]
    np.savez_compressed(path, **out)
    return out


def stage_pools(dc: DemoConfig, stage_dir: Path) -> None:
    """Sample (or find cached) every pool :func:`demo_report` reads from one stage: the held-out pools at
    the evaluation temperature and, for the planner's policies, the sweep's."""
    collect_stage_pools(dc, stage_dir, temperature=dc.eval_temperature, n_prompts=dc.heldout_prompts, n=dc.eval_samples)
    if stage_dir.name in dc.plan_policies and (stage_dir / "checkpoints").is_dir():
        for t in dc.plan_temperatures:
            collect_stage_pools(dc, stage_dir, temperature=t, n_prompts=min(dc.plan_prompts, dc.heldout_prompts), n=dc.plan_n)


def _cpu_seconds() -> float:
    """User + system CPU seconds of this process and of its children that have ended."""
    own, kids = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


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
    step_s = [r.get("time/step", 0.0) for r in rows]
    return {"score_share": sum(r.get("time/score", 0.0) for r in rows) / sum(step_s) if sum(step_s) > 0 else float("nan"),
            "step_s": float(np.median(step_s)),
            "grad_snr": float(np.median(snr)) if snr else float("nan"),
            "grad_norm": float(np.median([r[GRAD_NORM] for r in rows if GRAD_NORM in r])),
            "clipped": float(np.mean([r.get(GRAD_CLIPPED, 0.0) for r in rows])),
            "reward_first": float(np.mean([r["reward"] for r in rows[:fifth]])),
            "reward_last": float(np.mean([r["reward"] for r in rows[-fifth:]]))}


def gradient_table(per_stage: dict[str, dict], batch: int, caption: str = "") -> str:
    """Markdown: the gradient figures of each RL stage and its training verifier's share of the step's
    time (``time/score`` over ``time/step``, summed over the logged steps; see :func:`gradient_summary`)."""
    lines = [f"Gradient signal-to-noise per RL stage (median over measured steps; pure noise gives about "
             f"1/sqrt({batch}) = {1 / math.sqrt(batch):.3f}), and the training verifier's share of the RL step"]
    lines += [caption] if caption else []
    lines += ["", "| policy | training verifier | grad/snr | grad/norm | clipped steps | training reward, first -> last fifth "
              "| s per step (median) | verifier's share of the step |", "|---|---|---|---|---|---|---|---|"]
    for name, g in per_stage.items():
        if g:
            lines.append(f"| {LABELS.get(name, name)} | {_verifier_cell(name)} | {g['grad_snr']:.3f} | {g['grad_norm']:.2f} "
                         f"| {g['clipped']:.0%} | {g['reward_first']:.3f} -> {g['reward_last']:.3f} "
                         f"| {g.get('step_s', float('nan')):.2f} | {g.get('score_share', float('nan')):.0%} |")
    return "\n".join(lines)


def temperature_table(dc: DemoConfig, out: Path, names: list[str], caption: str = "") -> tuple[str, dict]:
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
             f"{min(dc.plan_prompts, dc.heldout_prompts)} held-out prompts x {dc.plan_n} samples per temperature)",
             *([caption] if caption else []), "",
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
    check_demo(dc)
    out = Path(dc.run_dir)
    out.mkdir(parents=True, exist_ok=True)
    torch.set_num_threads(dc.threads)  # the pools sampled here (a reused warm start never calls train) as in the workers
    parallel = dc.workers > 1 and len(dc.objectives) > 1
    # workers started now import torch and transformers on the core the warm start leaves idle
    pool = Workers(min(dc.workers, len(dc.objectives)), preload=(__name__,)) if parallel else None
    timings, cpu = {}, {}
    try:
        t0, c0 = time.perf_counter(), _cpu_seconds()
        results = {"warm_start": _stage(warm_config(dc, out), progress)}
        timings["warm_start"], cpu["warm_start"] = time.perf_counter() - t0, _cpu_seconds() - c0
        warm = str(latest_checkpoint(out / "warm_start"))
        cfgs = [objective_config(dc, obj, warm, out) for obj in dc.objectives]
        t1, c1 = time.perf_counter(), _cpu_seconds()
        if parallel:  # every worker samples its stage's pools for the report; this process the warm start's meanwhile
            results.update(_parallel_stages(cfgs, dc.workers, progress, dc=dc, pool=pool,
                                            meanwhile=lambda: stage_pools(dc, out / "warm_start")))
        else:
            for c in cfgs:
                results[c.name] = _stage(c, progress)
    finally:
        if pool is not None:
            pool.close()
    timings["rl_stages"], cpu["rl_stages"] = time.perf_counter() - t1, _cpu_seconds() - c1
    t2, c2 = time.perf_counter(), _cpu_seconds()
    report = demo_report(dc, out, list(results))
    timings["evaluation"], cpu["evaluation"] = time.perf_counter() - t2, _cpu_seconds() - c2
    table = comparison_table(results)
    summary = {
        "config": {k: (list(v) if isinstance(v, tuple) else v) for k, v in dc.__dict__.items()},
        "results": results, "seconds": timings, "cpu_seconds": cpu, "table": table, "report": report["text"],
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
                                                          n_prompts=dc.heldout_prompts, n=dc.eval_samples), ks=dc.eval_ks)
              for name in names}
    grads = {name: gradient_summary(out / name) for name in names if name != "warm_start"}
    caption = verifier_caption(dc, names)
    temps_text, best = temperature_table(dc, out, names, caption)
    parts = [seed_table(curves, dc.eval_ks, n_boot=dc.n_boot, seed=dc.seed, confidence=dc.confidence, caption=caption),
             gradient_table(grads, dc.prompts_per_step, caption)]
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
