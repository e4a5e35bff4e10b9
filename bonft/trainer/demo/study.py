"""The study: every objective at its own best admissible learning rate, chosen on a validation split,
compared on held-out prompts over seeds fixed in advance; BoN-SFT against plain SFT.

Design, fixed in code before any result (:class:`StudyConfig`'s defaults):

* **Seeds.** Main seeds 0-4 and a replication set 5-7 that nothing is tuned on, reported apart. Each
  seed has its own model init, data split, warm start and held-out prompts. The learning rates are
  tuned on the tuning seeds (default: seed 0) and then used on every seed.
* **Three disjoint prompt sets per seed.** The trainer's training and held-out prompts, and a
  validation split of ``validation_prompts`` drawn from the same per-family streams after the training
  prompts (:func:`validation_split`); it is checked to share no prompt with the other two. Tuning reads
  only the validation split; the held-out prompts are read only for the final tables.
* **A learning-rate grid per objective** (:data:`LR_GRID`). At every grid point the study also runs
  that objective's **placebo**: the same run with the outcomes shuffled within each pool before the
  credit (same credit sizes, no signal).
* **Admissibility.** A grid point is admissible when its placebo stays within noise of the policy it
  should leave unchanged (the warm start; for BoN-SFT, plain SFT at the same learning rate) on the
  validation split, at pass@1 and at pass@K (K = the largest of ``eval_ks``): for each of the two, the
  paired bootstrap interval over validation prompts of (placebo - reference) contains 0, or the
  difference is at most ``tolerance`` (0.01) in size. Plain SFT has no sample credit, hence no placebo:
  all its grid points are admissible.
* **Selection.** Each objective is run at its admissible grid point with the highest validation
  pass@K (ties: the smaller learning rate); with none admissible, at its smallest learning rate,
  flagged in the tables.
* **Objectives.** Leave-one-out REINFORCE; pass@k with unbiased, plug-in and positive-only credit
  (the latter two with their bias measured by :func:`bonft.objcheck.check_objective` at the study's
  k and n, printed beside them); best-of-k ranked by the proxy verifier; pass@k with k annealed
  16 -> 1; and, when ``best_of_k_sft`` is listed, plain SFT (``best_of_k_sft`` at k = 1, whose sample
  credit is zero: the loss is the references' NLL) against BoN-SFT at each k of ``reference_ks``, every arm
  from the same warm start with the same references, steps, prompts and samples.

:func:`run_study` writes ``study.md`` (the tables), ``study.json`` (every number) and ``frontier.png``
(pass@1 against pass@K for every grid point on the validation split, and the chosen settings on the
held-out prompts) under the output directory, with the machine, the commit and the wall time.
"""
from __future__ import annotations

import json
import os
import platform
import subprocess
import time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import torch

from bonft._core.checks import check_int, check_real
from bonft.estimate.paired import format_interval, paired_bootstrap, per_prompt_curves
from bonft.objcheck import builtin, check_objective
from bonft.tasks import get_task
from bonft.trainer.checkpoint import latest_checkpoint
from bonft.trainer.config import TrainConfig
from bonft.trainer.demo.pipeline import (
    DemoConfig,
    _stage,
    collect_stage_pools,
    objective_config,
    policy_pools,
    stage_config,
    warm_config,
)
from bonft.trainer.demo.stats import LABELS, study_table

STUDY_OBJECTIVES = ("reinforce", "pass_at_k", "pass_at_k_plugin", "pass_at_k_positive", "best_of_k",
                    "pass_at_k_anneal", "best_of_k_sft")
STUDY_SEEDS = (0, 1, 2, 3, 4)  # fixed before looking at any result
REPLICATION_SEEDS = (5, 6, 7)  # fixed before looking; nothing is tuned on them
TUNE_SEEDS = (0,)  # the seeds whose validation split chooses the learning rates
#: The learning-rate grid of each objective (plain SGD, anchor 0.2, 64 prompts x 32 samples, 60 steps),
#: fixed before the study ran. REINFORCE's credit on a pool with one success in 32 is about 1/k of
#: pass@8's, so its grid reaches higher. 0.005 and REINFORCE's 0.01 were added after a preview of the
#: grid on seed 0's validation split (held-out prompts unread): REINFORCE's placebo was outside noise at
#: 0.02-0.1, and for REINFORCE and the three pass@k credits only the grid's lowest point was admissible,
#: so the lower end was binding. ``best_of_k_sft`` holds for plain SFT and every BoN-SFT arm.
LR_GRID = {
    "reinforce": (0.005, 0.01, 0.02, 0.05, 0.1),
    "pass_at_k": (0.005, 0.01, 0.02, 0.04),
    "pass_at_k_plugin": (0.005, 0.01, 0.02, 0.04),
    "pass_at_k_positive": (0.005, 0.01, 0.02, 0.04),
    "best_of_k": (0.005, 0.01, 0.02, 0.04),
    "pass_at_k_anneal": (0.005, 0.01, 0.02, 0.04),
    "best_of_k_sft": (0.01, 0.02, 0.04),
}
REFERENCE_KS = (4, 8, 16)  # BoN-SFT arms; plain SFT is k = 1
VALIDATION_PROMPTS = 200
TOLERANCE = 0.01  # a placebo difference at most this large counts as within noise whatever its interval
BINARY_CREDITS = ("pass_at_k", "pass_at_k_plugin", "pass_at_k_positive")  # their bias is measured and printed

STUDY_LABELS = {**LABELS, "sft": "plain SFT (references' NLL)"}


@dataclass
class StudyConfig:
    """The study's design (see the module docstring); the defaults are the published design."""

    seeds: tuple = STUDY_SEEDS
    replication_seeds: tuple = REPLICATION_SEEDS
    tune_seeds: tuple = TUNE_SEEDS
    objectives: tuple = STUDY_OBJECTIVES
    lr_grid: dict = field(default_factory=lambda: {k: tuple(v) for k, v in LR_GRID.items()})
    reference_ks: tuple = REFERENCE_KS
    validation_prompts: int = VALIDATION_PROMPTS
    tolerance: float = TOLERANCE
    grid_only: bool = False  # stop after the validation grid (tuning seeds only)


@dataclass(frozen=True)
class Arm:
    """One compared policy family: ``name`` (stage name), the study objective whose grid it uses, its k
    (BoN-SFT arms), whether it has a placebo, and the policy the placebo is compared with."""

    name: str
    objective: str
    k: int = 0
    placebo: bool = True
    reference: str = "warm_start"

    @property
    def label(self) -> str:
        if self.objective == "best_of_k_sft" and self.k > 1:
            return f"BoN-SFT, k = {self.k}"
        return STUDY_LABELS.get(self.name, self.name)


def arms(sc: StudyConfig) -> list[Arm]:
    out = []
    for obj in sc.objectives:
        if obj == "best_of_k_sft":
            out.append(Arm("sft", obj, k=1, placebo=False))
            out += [Arm(f"best_of_k_sft-k{k}", obj, k=k, reference="sft") for k in sc.reference_ks]
        else:
            out.append(Arm(obj, obj))
    return out


def _seed_list(name: str, seeds, *, allow_empty: bool = False) -> tuple:
    if isinstance(seeds, (str, bytes)) or not hasattr(seeds, "__iter__"):
        raise TypeError(f"{name} must be a list of seeds, got {type(seeds).__name__} {seeds!r}")
    seeds = tuple(check_int(name, s, min=0, max=2**63 - 1) for s in seeds)  # seeds are kept as int64
    if not seeds and not allow_empty:
        raise ValueError(f"{name} must name at least one seed, got an empty list")
    if len(set(seeds)) != len(seeds):
        raise ValueError(f"{name} must not repeat a seed, got {list(seeds)}")
    return seeds


def check_study(dc: DemoConfig, sc: StudyConfig) -> None:
    """Every study knob, before any training: ValueError/TypeError naming the knob."""
    sc.seeds = _seed_list("seeds", sc.seeds)
    sc.replication_seeds = _seed_list("replication_seeds", sc.replication_seeds, allow_empty=True)
    sc.tune_seeds = _seed_list("tune_seeds", sc.tune_seeds)
    if set(sc.seeds) & set(sc.replication_seeds):
        raise ValueError(f"replication_seeds must be apart from seeds, got {sorted(set(sc.seeds) & set(sc.replication_seeds))} in both")
    if set(sc.tune_seeds) & set(sc.replication_seeds):
        raise ValueError(f"tune_seeds must not include a replication seed (nothing is tuned on those), got "
                         f"{sorted(set(sc.tune_seeds) & set(sc.replication_seeds))}")
    if isinstance(sc.objectives, str) or not sc.objectives:
        raise ValueError(f"objectives must name at least one of {STUDY_OBJECTIVES}, got {sc.objectives!r}")
    for obj in sc.objectives:
        if obj == "placebo":
            raise ValueError("objectives must not list 'placebo': the study runs each objective's own placebo at every "
                             f"grid point; choose among {STUDY_OBJECTIVES}")
        if obj not in STUDY_OBJECTIVES:
            raise ValueError(f"objectives must be among {STUDY_OBJECTIVES}, got {obj!r}")
    if len(set(sc.objectives)) != len(sc.objectives):
        raise ValueError(f"objectives must not repeat an objective, got {list(sc.objectives)}")
    if not isinstance(sc.lr_grid, dict):
        raise TypeError(f"lr_grid must map objectives to learning rates, got {type(sc.lr_grid).__name__}")
    for obj, lrs in sc.lr_grid.items():
        if obj not in STUDY_OBJECTIVES:
            raise ValueError(f"lr_grid names {obj!r}, which is not a study objective {STUDY_OBJECTIVES}")
        if isinstance(lrs, (str, bytes)) or not hasattr(lrs, "__iter__") or not list(lrs):
            raise ValueError(f"lr_grid[{obj!r}] must be a non-empty list of learning rates, got {lrs!r}")
        for lr in lrs:
            if check_real(f"lr_grid[{obj!r}]", lr) <= 0:
                raise ValueError(f"lr_grid[{obj!r}] must hold learning rates > 0, got {lr!r} in {list(lrs)}")
        if len(set(lrs)) != len(list(lrs)):
            raise ValueError(f"lr_grid[{obj!r}] must not repeat a learning rate, got {list(lrs)}")
    extra = sorted(set(sc.lr_grid) - set(sc.objectives))
    if extra:
        raise ValueError(f"lr_grid names {extra}, which the study does not run (objectives: {list(sc.objectives)}): "
                         "a grid that cannot take effect")
    missing = [o for o in sc.objectives if o not in sc.lr_grid]
    if missing:
        raise ValueError(f"lr_grid has no learning rates for {missing}")
    sc.lr_grid = {o: tuple(float(v) for v in lrs) for o, lrs in sc.lr_grid.items()}
    if "best_of_k_sft" in sc.objectives:
        sc.reference_ks = tuple(check_int("reference_ks", k, min=2, max=dc.n) for k in sc.reference_ks)
        if not sc.reference_ks:
            raise ValueError("reference_ks must name at least one k of BoN-SFT (2 <= k <= n)")
    sc.validation_prompts = check_int("validation_prompts", sc.validation_prompts, min=1)
    sc.tolerance = check_real("tolerance", sc.tolerance, min=0.0)
    if 1 not in dc.eval_ks:
        raise ValueError(f"eval_ks must include 1 (the admissibility rule and the frontier read pass@1), got {list(dc.eval_ks)}")
    for s in sorted(set(sc.tune_seeds)):
        validation_split(replace(dc, seed=s), sc.validation_prompts)


# ----------------------------------------------------------------------------- the validation split
def validation_split(dc: DemoConfig, n: int) -> list:
    """``n`` validation prompts of seed ``dc.seed``, disjoint from the trainer's training and held-out prompts.

    The task's split with ``train_prompts + n`` training prompts draws the same held-out prompts and,
    per family, the same stream of prompts; the validation prompts are the first ``n`` of its training
    prompts that the trainer's own split does not train on. Disjointness is checked, not assumed.
    """
    task = get_task(dc.task, **dc.task_params)
    train, held = task.split(n_train=dc.train_prompts, n_eval=dc.heldout_prompts, seed=dc.seed)
    try:
        wider, held2 = task.split(n_train=dc.train_prompts + n, n_eval=dc.heldout_prompts, seed=dc.seed)
    except ValueError as e:
        raise ValueError(f"validation_prompts={n} would overlap the training or held-out prompts: the task cannot make "
                         f"train_prompts + heldout_prompts + validation_prompts = {dc.train_prompts + dc.heldout_prompts + n} "
                         f"distinct prompts ({e}); lower validation_prompts") from None
    taken = {e.prompt for e in train} | {e.prompt for e in held}
    val = [e for e in wider if e.prompt not in taken][:n]
    if [e.prompt for e in held2] != [e.prompt for e in held] or len(val) < n:
        raise ValueError(f"validation_prompts={n} would overlap the training or held-out prompts of task {dc.task!r} "
                         f"(seed {dc.seed}): its split does not keep them when more prompts are drawn")
    return val


def collect_validation_pools(dc: DemoConfig, stage_dir: Path, n_prompts: int) -> dict:
    """Pools of the stage's final policy on the validation split (``eval_samples`` per prompt at the evaluation
    temperature, one sampling seed per prompt, the same for every policy of a seed), cached in the stage directory."""
    val = validation_split(dc, n_prompts)
    return policy_pools(dc, stage_dir, val, val, temperature=dc.eval_temperature, n=dc.eval_samples, step=1,
                        path=stage_dir / f"validation-T{dc.eval_temperature:g}-P{n_prompts}-n{dc.eval_samples}.npz")


# ----------------------------------------------------------------------------- stages
def stage_key(arm: Arm, lr: float, placebo: bool = False) -> str:
    return f"{arm.name}{'-placebo' if placebo else ''}-lr{lr:g}"


def arm_config(d: DemoConfig, arm: Arm, lr: float, placebo: bool, warm: str) -> TrainConfig:
    """The stage of ``arm`` at learning rate ``lr`` (its placebo with ``placebo``) from the warm start ``warm``."""
    key = stage_key(arm, lr, placebo)
    run_dir = str(Path(d.run_dir) / key)
    if arm.objective == "best_of_k_sft":  # plain SFT is k = 1: zero sample credit, the references' NLL
        return stage_config(d, name=key, run_dir=run_dir, start_from=warm, warm_start_steps=0, rl_steps=d.rl_steps,
                            eval_at_start=False, objective="best_of_k_sft", k=arm.k, verifier="proxy", lr=lr,
                            placebo=placebo)
    cfg = objective_config(d, arm.objective, warm, Path(d.run_dir))
    return replace(cfg, name=key, run_dir=run_dir, lr=lr, placebo=placebo)


def _job(d: DemoConfig, cfg: TrainConfig, pools: tuple, validation_prompts: int) -> float:
    """Train one stage (or reuse it finished), then collect its pools; returns the seconds it took."""
    torch.set_num_threads(cfg.threads)
    t = time.perf_counter()
    _stage(cfg, progress=False)
    for which in pools:
        if which == "validation":
            collect_validation_pools(d, Path(cfg.run_dir), validation_prompts)
        else:
            collect_stage_pools(d, Path(cfg.run_dir), temperature=d.eval_temperature, n_prompts=d.heldout_prompts,
                                n=d.eval_samples)
    return time.perf_counter() - t


def _run_jobs(jobs: list[tuple], workers: int, progress: bool, desc: str) -> dict[str, float]:
    """Run ``(d, cfg, pools, validation_prompts)`` jobs ``workers`` at a time (one core each); -> seconds per run dir."""
    from tqdm.auto import tqdm  # a progress bar only where jobs run

    seconds = {}
    bar = tqdm(total=len(jobs), desc=desc, disable=not progress, dynamic_ncols=True)
    try:
        if workers <= 1 or len(jobs) <= 1:
            for job in jobs:
                seconds[job[1].run_dir] = _job(*job)
                bar.update()
        else:
            import multiprocessing as mp

            with ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn")) as ex:
                futures = {ex.submit(_job, *job): job[1].run_dir for job in jobs}
                for fut, run_dir in futures.items():
                    seconds[run_dir] = fut.result()
                    bar.update()
    finally:
        bar.close()
    return seconds


# ----------------------------------------------------------------------------- admissibility and selection
def _ks(dc: DemoConfig) -> list[int]:
    return sorted({int(k) for k in dc.eval_ks})


def within_noise(diff_a: np.ndarray, *, n_boot: int, seed: int, confidence: float, tolerance: float) -> dict:
    """Per-prompt differences (placebo - reference) -> mean, interval, and whether it is within noise."""
    m, lo, hi = paired_bootstrap(diff_a, np.zeros_like(diff_a), n_boot=n_boot, seed=seed, confidence=confidence)
    return {"mean": m, "lo": lo, "hi": hi, "ok": bool(lo <= 0 <= hi or abs(m) <= tolerance)}


def grid_results(dc: DemoConfig, sc: StudyConfig, curves: dict[str, dict]) -> dict:
    """curves: stage key (and ``warm_start``) -> per-prompt curves on the validation split, tuning seeds stacked.

    -> ``{"rows": [...], "chosen": {arm name: lr}}``: each grid point's validation means, its placebo's
    differences from the reference at pass@1 and pass@K, admissibility, and each arm's chosen learning rate.
    """
    ks = _ks(dc)
    j1, jK = ks.index(1), len(ks) - 1
    rows, chosen = [], {}
    for arm in arms(sc):
        cands = []
        for lr in sc.lr_grid[arm.objective]:
            c = curves[stage_key(arm, lr)]
            row = {"arm": arm.name, "label": arm.label, "lr": lr, "pass1": float(c["pass"][:, j1].mean()),
                   "passK": float(c["pass"][:, jK].mean()),
                   "proxyK": float(c["proxy"][:, jK].mean()) if "proxy" in c else float("nan")}
            if arm.placebo:
                ref = curves["warm_start"] if arm.reference == "warm_start" else curves[stage_key(Arm("sft", arm.objective, k=1), lr)]
                p = curves[stage_key(arm, lr, placebo=True)]
                for name, j in (("placebo1", j1), ("placeboK", jK)):
                    row[name] = within_noise(p["pass"][:, j] - ref["pass"][:, j], n_boot=dc.n_boot, seed=dc.seed,
                                             confidence=dc.confidence, tolerance=sc.tolerance)
                row["admissible"] = row["placebo1"]["ok"] and row["placeboK"]["ok"]
            else:
                row["admissible"] = True
            rows.append(row)
            cands.append(row)
        ok = [r for r in cands if r["admissible"]]
        if ok:
            best = max(ok, key=lambda r: (r["passK"], -r["lr"]))
            chosen[arm.name] = {"lr": best["lr"], "admissible": True}
        else:
            chosen[arm.name] = {"lr": min(sc.lr_grid[arm.objective]), "admissible": False}
        for r in cands:
            r["chosen"] = r["lr"] == chosen[arm.name]["lr"]
    return {"rows": rows, "chosen": chosen}


# ----------------------------------------------------------------------------- the binary credits' bias
def credit_bias(dc: DemoConfig, objectives) -> list[dict]:
    """check_objective of each binary pass@k credit in the study, at the study's k and n (4 random policies over
    4 outcomes, exact enumeration): relative bias, projection on the exact gradient, cosine."""
    rows = []
    for name in BINARY_CREDITS:
        if name not in objectives:
            continue
        rep = check_objective(getattr(builtin, name), target="pass_at_k", k=dc.k, n=dc.n, policies=4, outcomes=4,
                              transformer=False, seed=0)
        proj = [c["projection"] for c in rep.cases]
        cos = [c["cosine"] for c in rep.cases]
        rows.append({"objective": name, "k": dc.k, "n": dc.n, "unbiased": rep.ok, "rel_bias": rep.max_rel_error,
                     "projection": [min(proj), max(proj)], "cosine": min(cos)})
    return rows


def bias_table(rows: list[dict]) -> str:
    lines = ["Measured bias of the binary credits (`check_objective`, target pass@k, exact enumeration of every pool on 4 "
             "random categorical policies over 4 outcomes; projection = <E[credit gradient], grad pass@k> / |grad pass@k|^2, "
             "1 = unbiased)", "",
             "| credit | k | n | largest relative bias | projection (min - max) | cosine (min) | unbiased? |",
             "|---|---|---|---|---|---|---|"]
    for r in rows:
        lines.append(f"| {STUDY_LABELS.get(r['objective'], r['objective'])} | {r['k']} | {r['n']} | {r['rel_bias']:.3g} | "
                     f"{r['projection'][0]:.3f} - {r['projection'][1]:.3f} | {r['cosine']:.4f} | "
                     f"{'yes' if r['unbiased'] else 'no'} |")
    return "\n".join(lines)


# ----------------------------------------------------------------------------- tables and figure
def grid_table(dc: DemoConfig, sc: StudyConfig, grid: dict) -> str:
    K = _ks(dc)[-1]
    pct = round(100 * dc.confidence)
    lines = [f"Validation grid (tuning seeds {', '.join(map(str, sc.tune_seeds))}; {sc.validation_prompts} validation prompts "
             f"per seed x {dc.eval_samples} samples). Placebo - reference: paired difference over validation prompts "
             f"[{pct}% bootstrap]; the reference is the warm start, for BoN-SFT plain SFT at the same lr. Admissible: both "
             f"placebo intervals contain 0 or the difference is at most {sc.tolerance:g}. Chosen: the admissible lr with the "
             f"highest validation pass@{K}.", "",
             f"| objective | lr | pass@1 | pass@{K} | proxy best-of-{K} | placebo - reference, pass@1 | "
             f"placebo - reference, pass@{K} | admissible | chosen |", "|---" * 9 + "|"]
    for r in grid["rows"]:
        pl = [format_interval(r[n]["mean"], r[n]["lo"], r[n]["hi"], signed=True) if n in r else "(no placebo)" for n in ("placebo1", "placeboK")]
        lines.append(f"| {r['label']} | {r['lr']:g} | {r['pass1']:.3f} | {r['passK']:.3f} | {r['proxyK']:.3f} | {pl[0]} | "
                     f"{pl[1]} | {'yes' if r['admissible'] else 'no'} | {'**yes**' if r['chosen'] else ''} |")
    return "\n".join(lines)


def chosen_label(arm: Arm, choice: dict, placebo: bool = False) -> str:
    flag = " (no admissible lr)" if not choice["admissible"] else ""
    return f"{'placebo of ' if placebo else ''}{arm.label}, lr {choice['lr']:g}{flag}"


def plot_frontier(grid: dict, warm_val: tuple, held: dict | None, path: Path, K: int) -> None:
    """Left: every grid point on the validation split (filled: admissible); right: chosen settings, held-out means."""
    import matplotlib  # matplotlib: a heavy import, only when the figure is drawn

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    panels = 2 if held else 1
    fig, axes = plt.subplots(1, panels, figsize=(6.5 * panels, 5), squeeze=False)
    ax = axes[0][0]
    colors = plt.rcParams["axes.prop_cycle"].by_key()["color"]
    names = list(dict.fromkeys(r["arm"] for r in grid["rows"]))
    for i, name in enumerate(names):
        rows = sorted((r for r in grid["rows"] if r["arm"] == name), key=lambda r: r["lr"])
        c = colors[i % len(colors)]
        ax.plot([r["pass1"] for r in rows], [r["passK"] for r in rows], "-", color=c, alpha=0.5)
        for r in rows:
            ax.plot(r["pass1"], r["passK"], "o", color=c, mfc=c if r["admissible"] else "none", ms=8 if r["chosen"] else 6,
                    label=r["label"] if r is rows[0] else None)
            ax.annotate(f"{r['lr']:g}", (r["pass1"], r["passK"]), fontsize=7, xytext=(3, 3), textcoords="offset points")
    ax.plot(*warm_val, "k*", ms=12, label="warm start")
    ax.set(xlabel="pass@1", ylabel=f"pass@{K}", title="validation split: every grid point (hollow: not admissible)")
    ax.legend(fontsize=7)
    if held:
        ax = axes[0][1]
        for i, (label, (p1, pK)) in enumerate(held.items()):
            ax.plot(p1, pK, "*" if i == 0 else "o", ms=12 if i == 0 else 7, label=label,
                    color="k" if i == 0 else colors[(i - 1) % len(colors)])
        ax.set(xlabel="pass@1", ylabel=f"pass@{K}", title="held-out prompts, mean over main seeds: chosen settings")
        ax.legend(fontsize=7)
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=120)
    plt.close(fig)


def machine_line() -> dict:
    cpu = platform.processor() or platform.machine()
    try:
        for ln in Path("/proc/cpuinfo").read_text().splitlines():
            if ln.startswith("model name"):
                cpu = ln.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    root = Path(__file__).resolve().parents[3]
    try:
        commit = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=root, capture_output=True, text=True,
                                timeout=10).stdout.strip() or "unknown"
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"], cwd=root, capture_output=True,
                               text=True, timeout=10).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        commit, dirty = "unknown", ""
    return {"host": platform.node(), "cpu": cpu, "cores": os.cpu_count(), "python": platform.python_version(),
            "torch": torch.__version__, "commit": commit + (" (with uncommitted changes)" if dirty else "")}


# ----------------------------------------------------------------------------- the study
def run_study(dc: DemoConfig | None = None, sc: StudyConfig | None = None, *, progress: bool = False) -> str:
    """Run the study (see the module docstring); writes ``study.md``, ``study.json`` and ``frontier.png`` under
    ``dc.run_dir`` and returns the markdown. Every knob is checked before any training; finished stages are
    reused, so a rerun of the same command continues where it stopped."""
    dc = dc or DemoConfig()
    sc = sc or StudyConfig()
    check_study(dc, sc)
    root = Path(dc.run_dir)
    root.mkdir(parents=True, exist_ok=True)
    load0, t0 = os.getloadavg(), time.perf_counter()
    timings, stage_seconds = {}, {}
    order = list(dict.fromkeys([*sc.tune_seeds, *([] if sc.grid_only else [*sc.seeds, *sc.replication_seeds])]))
    per = {s: replace(dc, seed=s, run_dir=str(root / f"seed{s}")) for s in order}
    final = set() if sc.grid_only else set(sc.seeds) | set(sc.replication_seeds)

    def pools(s: int, tune: bool, held: bool) -> tuple:
        return (("validation",) if tune else ()) + (("heldout",) if held else ())

    # 1. warm starts
    t = time.perf_counter()
    stage_seconds["warm_starts"] = (_run_jobs([(per[s], warm_config(per[s], Path(per[s].run_dir)), pools(s, s in sc.tune_seeds, s in final),
                                     sc.validation_prompts) for s in order], dc.workers, progress, "warm starts"))
    timings["warm_starts"] = time.perf_counter() - t
    warm = {s: str(latest_checkpoint(Path(per[s].run_dir) / "warm_start")) for s in order}

    # 2. the validation grid on the tuning seeds, each grid point with its placebo
    t = time.perf_counter()
    jobs = []
    for s in sc.tune_seeds:
        for arm in arms(sc):
            for lr in sc.lr_grid[arm.objective]:
                for placebo in ((False, True) if arm.placebo else (False,)):
                    # the grid reads validation pools only: its final evaluations' samples files would go unread
                    cfg = replace(arm_config(per[s], arm, lr, placebo, warm[s]), heldout_samples=False)
                    jobs.append((per[s], cfg, ("validation",), sc.validation_prompts))
    stage_seconds["validation_grid"] = _run_jobs(jobs, dc.workers, progress, "validation grid")
    timings["validation_grid"] = time.perf_counter() - t
    ks = _ks(dc)
    val_curves: dict[str, dict] = {}
    for s in sc.tune_seeds:
        keys = ["warm_start"] + [stage_key(a, lr, p) for a in arms(sc) for lr in sc.lr_grid[a.objective]
                                 for p in ((False, True) if a.placebo else (False,))]
        for key in keys:
            c = per_prompt_curves(collect_validation_pools(per[s], Path(per[s].run_dir) / key, sc.validation_prompts), ks=ks)
            val_curves[key] = {kind: np.concatenate([val_curves[key][kind], v]) if key in val_curves else v for kind, v in c.items()}
    grid = grid_results(dc, sc, val_curves)
    warm_val = (float(val_curves["warm_start"]["pass"][:, 0].mean()), float(val_curves["warm_start"]["pass"][:, -1].mean()))

    bias = credit_bias(dc, sc.objectives)
    result = {"design": {"seeds": list(sc.seeds), "replication_seeds": list(sc.replication_seeds),
                         "tune_seeds": list(sc.tune_seeds), "objectives": list(sc.objectives),
                         "lr_grid": {k: list(v) for k, v in sc.lr_grid.items()}, "reference_ks": list(sc.reference_ks),
                         "validation_prompts": sc.validation_prompts, "tolerance": sc.tolerance},
              "config": {k: (list(v) if isinstance(v, tuple) else v) for k, v in dc.__dict__.items()},
              "grid": grid, "credit_bias": bias}
    held_points = None
    sections = [grid_table(dc, sc, grid), bias_table(bias) if bias else ""]
    if not sc.grid_only:
        # 3. every arm at its chosen lr (and its placebo there) on every main and replication seed
        t = time.perf_counter()
        jobs = []
        for s in [*sc.seeds, *sc.replication_seeds]:
            for arm in arms(sc):
                lr = grid["chosen"][arm.name]["lr"]
                for placebo in ((False, True) if arm.placebo else (False,)):
                    jobs.append((per[s], arm_config(per[s], arm, lr, placebo, warm[s]), ("heldout",), sc.validation_prompts))
        stage_seconds["held_out_runs"] = _run_jobs(jobs, dc.workers, progress, "held-out runs")
        timings["held_out_runs"] = time.perf_counter() - t
        t = time.perf_counter()
        tables, held_points = _held_out_tables(dc, sc, grid, per, result)
        sections += tables
        timings["tables"] = time.perf_counter() - t
    plot_frontier(grid, warm_val, held_points, root / "frontier.png", ks[-1])
    timings["total"] = time.perf_counter() - t0
    load1 = os.getloadavg()
    info = machine_line()
    result.update(machine=info, seconds=timings, stage_seconds=stage_seconds,
                  load_average={"start": list(load0), "end": list(load1)})
    minutes = timings["total"] / 60
    head = [f"# Study: {len(sc.seeds)} main seeds + {len(sc.replication_seeds)} replication seeds, "
            f"{len(arms(sc))} arms, lr chosen on a validation split" + (" (validation grid only)" if sc.grid_only else ""), "",
            f"Machine {info['host']} ({info['cpu']}, {info['cores']} cores; Python {info['python']}, torch {info['torch']}); "
            f"commit {info['commit']}; wall time {minutes:.1f} min with {dc.workers} worker(s) "
            f"(" + ", ".join(f"{k.replace('_', ' ')} {v / 60:.1f} min" for k, v in timings.items() if k != "total") + "); "
            f"load average {load0[0]:.1f} at the start, {load1[0]:.1f} at the end.", "",
            f"{dc.task} task; per seed {dc.train_prompts} training, {sc.validation_prompts} validation and "
            f"{dc.heldout_prompts} held-out prompts, {dc.eval_samples} samples per prompt at T = {dc.eval_temperature:g}. "
            f"Every arm: {dc.rl_steps} steps of {dc.prompts_per_step} prompts x {dc.n} samples from the seed's warm start, "
            f"optimizer {dc.optimizer}, anchor_weight {dc.anchor_weight:g}, clip_grad_norm {dc.clip_grad_norm:g}, k = {dc.k} "
            f"(BoN-SFT: k = {', '.join(map(str, sc.reference_ks))}; plain SFT = BoN-SFT at k = 1). Seeds: main "
            f"{', '.join(map(str, sc.seeds))}; replication {', '.join(map(str, sc.replication_seeds)) or 'none'}; tuning "
            f"{', '.join(map(str, sc.tune_seeds))}.", ""]
    text = "\n".join(head + [s for sec in sections if sec for s in (sec, "")])
    text += "\nFigure: frontier.png (pass@1 against pass@%d).\n" % ks[-1]
    (root / "study.md").write_text(text)
    (root / "study.json").write_text(json.dumps(result, indent=1, default=float))
    print(text)
    return text


def family_table(per_seed: dict, ks) -> str:
    """Per prompt family (the task's, e.g. plain / return): pass@1 / pass@K, mean over seeds of each seed's mean."""
    seeds = list(per_seed)
    names = list(per_seed[seeds[0]])
    fams = sorted({str(f) for f in per_seed[seeds[0]][names[0]]["family"]})
    lines = [f"By prompt family, mean over seeds {', '.join(map(str, seeds))} (pass@1 / pass@{ks[-1]})", "",
             "| policy | " + " | ".join(fams) + " |", "|---" * (len(fams) + 1) + "|"]
    for n in names:
        cells = []
        for f in fams:
            vals = [[float(per_seed[s][n]["pass"][per_seed[s][n]["family"] == f, j].mean()) for s in seeds] for j in (0, -1)]
            cells.append(f"{np.mean(vals[0]):.3f} / {np.mean(vals[1]):.3f}")
        lines.append(f"| {n} | " + " | ".join(cells) + " |")
    return "\n".join(lines)


def _held_out_tables(dc: DemoConfig, sc: StudyConfig, grid: dict, per: dict, result: dict) -> tuple[list[str], dict]:
    ks = dc.eval_ks
    chosen = grid["chosen"]
    warm_label = STUDY_LABELS["warm_start"]

    def one(d: DemoConfig, key: str) -> dict:
        pools = collect_stage_pools(d, Path(d.run_dir) / key, temperature=d.eval_temperature, n_prompts=d.heldout_prompts,
                                    n=d.eval_samples)
        return {**per_prompt_curves(pools, ks=ks), "family": pools["family"]}

    def curves(s: int) -> dict:
        d = per[s]
        out = {warm_label: one(d, "warm_start")}
        for arm in arms(sc):
            for placebo in ((False, True) if arm.placebo else (False,)):
                out[chosen_label(arm, chosen[arm.name], placebo)] = one(d, stage_key(arm, chosen[arm.name]["lr"], placebo))
        return out

    main = {s: curves(s) for s in sc.seeds}
    rep = {s: curves(s) for s in sc.replication_seeds}
    rl = [a for a in arms(sc) if a.objective != "best_of_k_sft"]
    sft = [a for a in arms(sc) if a.objective == "best_of_k_sft"]
    base = [warm_label] + [chosen_label(a, chosen[a.name]) for a in rl if a.name == "reinforce"]
    rl_names = [warm_label] + [chosen_label(a, chosen[a.name], p) for a in rl for p in (False, True)]
    sft_names = [warm_label] + [chosen_label(a, chosen[a.name]) for a in sft]

    def subset(per_seed, names):
        return {s: {n: c[n] for n in names} for s, c in per_seed.items()}

    out = []
    chosen_lines = ["Chosen settings (validation split)", "", "| objective | lr | admissible |", "|---|---|---|"]
    chosen_lines += [f"| {a.label} | {chosen[a.name]['lr']:g} | {'yes' if chosen[a.name]['admissible'] else 'no (smallest lr)'} |"
                     for a in arms(sc)]
    out.append("\n".join(chosen_lines))
    for title, per_seed in (("Main seeds", main), ("Replication seeds (nothing tuned on them)", rep)):
        if not per_seed:
            continue
        if len(rl_names) > 1:
            out.append(f"## {title}: every objective at its chosen setting, with its placebo\n\n"
                       + study_table(subset(per_seed, rl_names), ks, baselines=tuple(base), confidence=dc.confidence))
        if sft:
            out.append(f"## {title}: BoN-SFT against plain SFT (same warm start, references, steps and samples)\n\n"
                       + study_table(subset(per_seed, sft_names), ks, baselines=(sft_names[1],), confidence=dc.confidence))
    out.append(family_table(main, ks))
    means = {n: [float(np.mean([main[s][n]["pass"][:, j].mean() for s in sc.seeds])) for j in range(len(ks))]
             for n in main[sc.seeds[0]]}
    result["held_out"] = {"main": {str(s): {n: {"pass": c["pass"].mean(0).tolist(),
                                                "proxy": c["proxy"].mean(0).tolist() if "proxy" in c else None}
                                            for n, c in v.items()} for s, v in main.items()},
                          "replication": {str(s): {n: {"pass": c["pass"].mean(0).tolist(),
                                                       "proxy": c["proxy"].mean(0).tolist() if "proxy" in c else None}
                                                   for n, c in v.items()} for s, v in rep.items()},
                          "ks": list(ks)}
    points = {n: (m[0], m[-1]) for n, m in means.items() if not n.startswith("placebo")}
    return out, points
