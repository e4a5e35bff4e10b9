"""The trainer's configuration: one dataclass, loaded from TOML, overridable with ``key=value``.

Every field carries its own help text (``field(metadata={"help": ...})``);
:func:`config_reference` renders them as the markdown table in
``docs/training.md`` (a test checks that the doc lists every field).

A recipe is a flat TOML file; tables are only used for the knobs of the task and of the verifiers
(``task_params``, ``verifier_params``, ``eval_verifier_params``)::

    objective = "pass_at_k"
    k = 8
    rl_steps = 200

    [task_params]
    hard_share = 0.3

``--set key=value`` overrides convert the text to the field's type
(``--set lr=1e-4``, ``--set eval_ks=1,4,16``, ``--set task_params.hard_share=0.5``,
``--set eval_verifier_params.threshold=0.5``).

Deprecated spellings (:data:`DEPRECATED_KEYS`) are still read, with a
:class:`DeprecatedKeyWarning` naming the new key: ``n_train`` -> ``train_prompts``,
``n_eval`` -> ``heldout_prompts``, ``eval_n`` -> ``eval_samples``, ``sft_steps`` ->
``warm_start_steps``, ``sft_batch_size`` -> ``warm_start_batch_size``, ``sft_lr`` ->
``warm_start_lr``; the objective ``loo_reinforce`` is read as ``reinforce``.
Giving both spellings of one key is an error.
"""
from __future__ import annotations

import collections
import dataclasses
import json
import math
import os
import random
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from bonft._core.checks import (
    MAX_POOL,
    MAX_PROMPTS_PER_STEP,
    MAX_SAMPLES_AT_ONCE,
    MIN_BOOT,
    check_bound,
    check_choice,
    check_fraction,
    check_int,
    check_n_boot,
    check_positive,
    check_real,
    check_seed,
)
from bonft._core.toml import tomllib
from bonft.objectives.validation import RATIO_LEVELS
from bonft.tasks import TASKS, get_task
from bonft.tasks.base import family_counts
from bonft.trainer.adapters import peft_missing
from bonft.trainer.objectives import (  # the registry: objective name -> credit function + options
    OBJECTIVES,
    is_objective_spec,
)
from bonft.verifiers.roles import USER_DATA_TASKS, check_spec

K_SCHEDULES = ("constant", "linear", "geometric")
# old spelling -> key: read with a warning naming the key
DEPRECATED_KEYS = {
    "n_train": "train_prompts",
    "n_eval": "heldout_prompts",
    "eval_n": "eval_samples",
    "sft_steps": "warm_start_steps",
    "sft_batch_size": "warm_start_batch_size",
    "sft_lr": "warm_start_lr",
}
DEPRECATED_OBJECTIVES = {"loo_reinforce": "reinforce"}
# keys that build the tiny model: with start_from the model comes from there and they cannot take effect
MODEL_KEYS = ("arch", "layers", "width", "heads", "max_positions")
# keys that shape a new adapter (adapter_rank >= 1); with adapter_from they come from the adapter directory
ADAPTER_SHAPE_KEYS = ("adapter_rank", "adapter_scale", "adapter_dropout", "adapter_modules")
# keys of how the policy trains: an evaluation of a checkpoint (its model as saved) drops them
TRAINING_MODEL_KEYS = (*ADAPTER_SHAPE_KEYS, "adapter_from", "recompute_activations")
MAX_ADAPTER_RANK = 65_536


class DeprecatedKeyWarning(FutureWarning):
    """A recipe key or objective under its old spelling (read as the new one)."""
OPTIMIZERS = ("adamw", "sgd")
MAX_UPDATES_PER_BATCH = 64  # updates_per_batch: beyond this a reused batch has drifted far from its sampler
TOKEN_REDUCTIONS = ("sum", "mean")


def _f(default: Any, help: str, **kw: Any) -> Any:
    if isinstance(default, (list, dict)):
        return field(default_factory=lambda d=default: type(d)(d), metadata={"help": help, **kw})
    return field(default=default, metadata={"help": help, **kw})


@dataclass
class TrainConfig:
    """Everything a training run needs; see :func:`config_reference` for the table."""

    # --- run ---
    name: str = _f("run", "A label for the run, written into metrics and summaries.", group="run")
    seed: int = _f(0,
                   "Seed of the run. The RNG of every step is derived from (seed, step, rank), so a resumed run"
                   " draws what an uninterrupted one would. 0 <= seed < 2**63.", group="run")
    run_dir: str = _f("runs/run", "Directory for metrics.jsonl, checkpoints/, plots and summary.json.", group="run")
    device: str = _f("cpu", "'cpu', 'cuda' or 'auto'.", group="run")
    threads: int = _f(1,
                      "torch intra-op threads, 1 to the machine's cores (os.cpu_count()). Tiny models run fastest "
                      "single-threaded; use the other cores for parallel runs.", group="run")
    # --- model ---
    start_from: str = _f("",
                         "Start from this model: a bonft checkpoint directory or a local transformers "
                         "directory. Empty = build a tiny model from the fields below (setting those together "
                         "with start_from is an error: the model comes from start_from).", group="model")
    arch: str = _f("gpt2", "Tiny model family when building from scratch: 'gpt2' or 'llama'.", group="model")
    layers: int = _f(2, "Transformer layers of the tiny model.", group="model")
    width: int = _f(128, "Width of the tiny model (with layers and max_positions: at most 2**30 weights).",
                    group="model")
    heads: int = _f(4, "Attention heads of the tiny model.", group="model")
    max_positions: int = _f(96, "Context length of the tiny model (prompt + response tokens).", group="model")
    adapter_rank: int = _f(0,
                           "Train a LoRA adapter (Hu et al. 2021) of this rank on the start_from model, whose own "
                           "weights stay frozen; checkpoints then hold the adapter only. 0 = train every weight. "
                           "Needs start_from and peft (pip install 'bonft[peft]'); see 'Adapters and memory' in docs/training.md.",
                           group="model")
    adapter_scale: float = _f(1.0,
                              "Factor on the adapter's update (alpha / rank in Hu et al. 2021): a layer computes "
                              "W x + adapter_scale * B A x. Needs adapter_rank.", group="model")
    adapter_dropout: float = _f(0.0,
                                "Dropout on the adapter's input in training forwards, in [0, 1). > 0 makes the training "
                                "log-probs differ from the sampler's (which runs without dropout). Needs adapter_rank.",
                                group="model")
    adapter_modules: list = _f([],
                               "Last names of the layers to adapt, e.g. ['q_proj', 'v_proj']; [] = peft's default for "
                               "the model type. Needs adapter_rank.", group="model", items=str)
    adapter_from: str = _f("",
                           "Continue training this adapter directory (peft's save_pretrained, or a checkpoint of an "
                           "adapter run) on start_from, which must be the base model it records; its rank, scale, "
                           "dropout and layers come from it.", group="model")
    recompute_activations: bool = _f(False,
                                     "Gradient checkpointing (Chen et al. 2016): training forwards keep only each "
                                     "layer's input and recompute the rest in backward, trading about one more "
                                     "forward for activation memory; same results to float round-off.", group="model")
    # --- task ---
    task: str = _f("ledger", "Built-in task name (see docs/tasks.md), or 'jsonl' to read prompts_file.", group="task")
    task_params: dict = _f({},
                           "Task knobs passed to get_task(task, **task_params), e.g. [task_params] hard_share ="
                           " 0.3.", group="task")
    prompts_file: str = _f("",
                           "With task = 'jsonl': local JSONL with 'prompt' and 'answer' fields; trained and "
                           "evaluated by exact match.", group="task")
    train_prompts: int = _f(2000, "Training prompts drawn from the task (old spelling: n_train).", group="task")
    heldout_prompts: int = _f(200, "Held-out evaluation prompts (old spelling: n_eval).", group="task")
    verifier: str = _f("exact",
                       "Verifier that scores training samples: 'exact' (the task's answer check), 'proxy' (a "
                       "built-in task's imperfect proxy), 'unit_tests' (each prompt's tests from a field of its "
                       "row, run sandboxed), 'reward_model' (a local sequence-classification model directory) "
                       "or 'module:function' (loading runs its code). See docs/your-task.md.", group="task")
    verifier_params: dict = _f({},
                               "Knobs of the verifier kind, e.g. [verifier_params] path = 'rm/' and threshold = "
                               "0.0 for 'reward_model', field = 'tests' for 'unit_tests'.", group="task")
    eval_verifier: str = _f("",
                     "Verifier whose rewards define pass@k in evaluation (same names as verifier). Empty = "
                     "the default: 'exact' for built-in tasks and for verifier = 'exact'; else the verifier "
                     "itself, whose rewards must then be 0 or 1.", group="task")
    eval_verifier_params: dict = _f({}, "Knobs of the eval_verifier kind (as verifier_params).", group="task")
    # --- warm start (supervised, on reference responses) ---
    warm_start_steps: int = _f(0,
                               "Supervised warm-start steps (NLL of the reference responses) before RL. 0 = "
                               "skip. (old spelling: sft_steps)", group="warm_start")
    warm_start_batch_size: int = _f(128,
                                    "Prompts per warm-start step, <= 65,536; needs warm_start_steps >= 1 (old spelling: "
                                    "sft_batch_size).",
                                    group="warm_start")
    warm_start_lr: float = _f(3e-3,
                              "Warm-start learning rate (AdamW, cosine decay to 10%); needs warm_start_steps >= 1 (old spelling: "
                              "sft_lr).", group="warm_start")
    # --- RL stage ---
    objective: str = _f("pass_at_k", f"What the RL stage optimises: one of {', '.join(OBJECTIVES)}, or 'module:name' "
                        "naming an Objective of your own (docs/training.md, Objectives).", group="rl")
    rl_steps: int = _f(0, "RL optimizer steps. 0 = skip the RL stage.", group="rl")
    prompts_per_step: int = _f(16, "Prompts per RL optimizer step (global, over all ranks), <= 65,536; prompts_per_step / grad_accum x n "
                               "<= 2**20 responses sampled at once.", group="rl")
    n: int = _f(16, "Responses sampled per prompt, <= 65,536.", group="rl")
    k: int = _f(8,
                "k of best-of-k / pass@k that the objective targets (1 <= k <= n). reinforce targets the mean "
                "reward (pass@1): its k is 1, and setting another is an error.", group="rl")
    k_final: int = _f(0,
                      "k at the last RL step when annealing k (e.g. from k=16 toward 1). 0 = keep k constant.", group="rl")
    k_schedule: str = _f("constant", f"How k moves from k to k_final: one of {', '.join(K_SCHEDULES)}.", group="rl")
    temperature: float = _f(1.0,
                            "Sampling temperature of the training samples; log-probs are taken at the same "
                            "temperature.", group="rl")
    top_p: float = _f(1.0, "Nucleus sampling threshold of training samples (1 = off); evaluation uses eval_top_p.",
                      group="rl")
    top_k: int = _f(0, "Keep the top_k most likely tokens of the training samples' distribution, renormalised, before "
                    "top_p (0 = all); the training log-probs score the same truncated law. Evaluation uses eval_top_k.",
                    group="rl")
    max_new_tokens: int = _f(8, "Longest response sampled (tokens, EOS included).", group="rl")
    lr: float = _f(1e-4,
                   "RL learning rate (constant after warmup_steps). With AdamW keep it well below the warm "
                   "start's last learning rate: the RL stage starts with fresh moments, whose first steps move "
                   "every weight by about lr.", group="rl")
    warmup_steps: int = _f(10, "Linear learning-rate warm-up steps of the RL stage.", group="rl")
    optimizer: str = _f("adamw",
                        f"Optimizer of the RL stage: one of {', '.join(OPTIMIZERS)}. AdamW moves every weight by"
                        f" about lr per step even when the gradient is pure noise; SGD's step shrinks with the "
                        f"gradient. The warm start always uses AdamW.", group="rl")
    adam_eps: float = _f(1e-8,
                         "AdamW's epsilon in the RL stage (> 0). Large values (e.g. 1e-3) make steps of weights"
                         " with small, noisy gradients proportional to the gradient, as SGD.", group="rl")
    momentum: float = _f(0.0, "SGD momentum in [0, 1) (optimizer = 'sgd' only).", group="rl")
    weight_decay: float = _f(0.0, "Weight decay (both stages; decoupled for AdamW, L2 for SGD).", group="rl")
    grad_accum: int = _f(1,
                         "Micro-batches per optimizer step (whole prompts: a prompt's n samples stay together); "
                         "prompts_per_step must divide evenly. A step's forward and backward hold one micro-batch's "
                         "activations at a time.", group="rl")
    clip_grad_norm: float = _f(1.0, "Clip the gradient's global norm to this value; 0 = no clipping.", group="rl")
    updates_per_batch: int = _f(1,
                                "Optimizer updates per sampled batch, 1..64: the batch is sampled, scored and credited "
                                "once, then reused with importance ratios pi/pi_old (pi_old = the policy that sampled, "
                                "from the first update's forward); 1 = on-policy. The learning rate and the step label "
                                "count sampled batches (step-S holds S batches' updates).", group="rl")
    ratio_level: str = _f("sequence",
                          "Where the reuse ratio is taken (updates_per_batch > 1): 'sequence' (one per response), "
                          "'token' (one per token) or 'pool' (one per prompt's pool; unbiased, no clipping).",
                          group="rl")
    clip_ratio: float = _f(0.0,
                           "Clipped surrogate (Schulman et al. 2017) on reused batches: drop a term's gradient once "
                           "its ratio leaves [1 - clip_ratio, 1 + clip_ratio] in its credit's direction; 0 = off. "
                           "Needs updates_per_batch > 1 and ratio_level 'sequence' or 'token'.", group="rl")
    anchor_weight: float = _f(0.0,
                              "Weight of the KL penalty to the anchor, the policy at the start of the RL stage "
                              "(saved in RUN/rl_start); with an adapter, the base model with the adapter switched off "
                              "(nothing saved, no second model). 0 = none.", group="rl")
    placebo: bool = _f(False,
                       "Placebo control: shuffle the outcomes (score and reward together) within each pool "
                       "before the credit, one seeded permutation per pool. Same credit sizes, zero expected "
                       "update for leave-one-out credit: what noise alone does to the policy.", group="rl")
    snr_every: int = _f(0,
                        "Measure the gradient signal-to-noise ratio (metric grad/snr, see docs/training.md) "
                        "every this many RL steps on the step's own samples; costs one extra forward and "
                        "backward per prompt. 0 = never.", group="rl")
    token_reduction: str = _f("sum",
                              "'sum': sequence log-prob (unbiased policy gradient); 'mean': length-normalised "
                              "(biased).", group="rl")
    reward_source: str = _f("rewards",
                            "'rewards': train on the verifier's true rewards where it reports them (task "
                            "labels; the verifier still selects for best_of_k), else its scores; 'scores': "
                            "train on the verifier's scores only (e.g. against a reward model; with "
                            "verifier='proxy' this shows reward hacking).", group="rl")
    correct_threshold: float = _f(0.5,
                                  "A sample counts as correct for the pass@k objectives (pass_at_k, pass_at_k_plugin, "
                                  "pass_at_k_positive) when its reward is >= this; the others train on the rewards "
                                  "themselves, and setting it with them is an error.", group="rl")
    # --- evaluation ---
    eval_every: int = _f(0,
                         "Evaluate every this many RL steps (and always before and after RL); 0 = only before "
                         "and after.", group="eval")
    eval_at_start: bool = _f(True,
                             "Evaluate before the first RL step (the 'before' of a before/after comparison).", group="eval")
    eval_samples: int = _f(64, "Samples per held-out prompt at evaluation, <= 65,536 (old spelling: eval_n).",
                          group="eval")
    eval_ks: list = _f([1, 4, 16, 32],
                       "k values of the best-of-k / pass@k curves (each <= eval_samples).", group="eval")
    eval_temperature: float = _f(1.0, "Sampling temperature at evaluation.", group="eval")
    eval_top_p: float = _f(1.0, "Nucleus of the evaluation samples (1 = none): set it, and eval_top_k, to what you serve "
                           "with, so that pass@k and best-of-k are those of the served law.", group="eval")
    eval_top_k: int = _f(0, "Most likely tokens kept in the evaluation samples, before eval_top_p (0 = all).", group="eval")
    eval_prompts: int = _f(0,
                           "Evaluate on the first this many held-out prompts; 0 = all heldout_prompts.", group="eval")
    confidence: float = _f(0.95, "Confidence level of the bootstrap intervals.", group="eval")
    n_boot: int = _f(1000, "Bootstrap resamples of the intervals, 10 to 1,000,000.", group="eval")
    # --- checkpoints and logging ---
    save_every: int = _f(100,
                         "Write a checkpoint every this many optimizer steps (both stages); 0 = only at the end"
                         " and on Ctrl-C.", group="checkpoint")
    keep_checkpoints: int = _f(2, "How many recent checkpoints to keep (>= 1).", group="checkpoint")
    log_every: int = _f(10, "Write a metrics line every this many steps.", group="checkpoint")
    plots: bool = _f(True, "Write PNG plots of the evaluation curves.", group="checkpoint")
    heldout_samples: bool = _f(True,
                               "Write every sample of the final evaluation (response, reward, each verifier's score) "
                               "to heldout_samples.jsonl, the samples file bonft estimate reads.", group="checkpoint")

    def __post_init__(self) -> None:
        validate(self)

    # derived -----------------------------------------------------------------
    @property
    def total_steps(self) -> int:
        return self.warm_start_steps + self.rl_steps

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)


# ------------------------------------------------------------------- validation
def _nonneg_real(name: str, value: Any) -> float:
    """Every float key: a finite real number >= 0 (keys with tighter ranges are checked again below)."""
    return check_real(name, value, min=0.0)


def validate(c: TrainConfig) -> None:
    """Check every field; raise ``TypeError``/``ValueError`` naming the key."""
    for f in dataclasses.fields(c):
        v = getattr(c, f.name)
        if f.type in ("str", str) and not isinstance(v, str):
            raise TypeError(f"{f.name} must be a string, got {type(v).__name__} {v!r}")
        if f.type in ("bool", bool) and not isinstance(v, bool):
            raise TypeError(f"{f.name} must be true or false, got {type(v).__name__} {v!r}")
        if f.type in ("int", int):
            check_int(f.name, v, min=0)
        if f.type in ("float", float):
            setattr(c, f.name, _nonneg_real(f.name, v))
    if not isinstance(c.task_params, dict):
        raise TypeError(f"task_params must be a table of task knobs, got {type(c.task_params).__name__}")
    check_spec("verifier", c.verifier, c.verifier_params)
    check_spec("eval_verifier", c.eval_verifier, c.eval_verifier_params, allow_empty=True)
    if c.objective in DEPRECATED_OBJECTIVES:
        new = DEPRECATED_OBJECTIVES[c.objective]
        warnings.warn(f"objective {c.objective!r} is now called {new!r}; reading it as {new!r}",
                      DeprecatedKeyWarning, stacklevel=3)
        c.objective = new
    if c.objective not in OBJECTIVES and not is_objective_spec(c.objective):  # a spec is imported by the run
        raise ValueError(f"objective must be one of {tuple(OBJECTIVES)} or 'module:name' naming an Objective of your "
                         f"own, got {c.objective!r}")
    check_choice("task", c.task, tuple(TASKS))
    check_choice("optimizer", c.optimizer, OPTIMIZERS)
    check_fraction("momentum", c.momentum, open_high=True)
    if c.momentum and c.optimizer != "sgd":
        raise ValueError(f"momentum applies to optimizer='sgd' only, got momentum={c.momentum} with optimizer={c.optimizer!r}")
    if c.optimizer == "sgd" and not _is_default(c, "adam_eps"):
        raise ValueError(f"adam_eps applies to optimizer='adamw' only, got adam_eps={c.adam_eps} with optimizer='sgd'")
    check_choice("k_schedule", c.k_schedule, K_SCHEDULES)
    check_choice("token_reduction", c.token_reduction, TOKEN_REDUCTIONS)
    check_choice("reward_source", c.reward_source, ("rewards", "scores"))
    check_choice("arch", c.arch, ("gpt2", "llama"))
    check_choice("device", c.device, ("cpu", "cuda", "auto"))
    check_int("n", c.n, min=1)
    check_int("k", c.k, min=1)
    check_read_keys(c)
    if c.k > c.n:
        raise ValueError(f"k must be <= n (n={c.n}), got k={c.k}")
    if c.k_final > c.n:
        raise ValueError(f"k_final must be <= n (n={c.n}), got k_final={c.k_final}")
    if c.k_schedule != "constant" and c.k_final < 1:
        raise ValueError(f"k_schedule={c.k_schedule!r} needs k_final >= 1, got k_final={c.k_final}")
    if c.k_schedule == "constant" and c.k_final:
        raise ValueError(f"k_final applies to k_schedule 'linear' or 'geometric' (with 'constant', k stays {c.k}), "
                         f"got k_final={c.k_final} with k_schedule='constant'")
    if c.start_from:
        for name in MODEL_KEYS:
            if getattr(c, name) != FIELDS[name].default:
                raise ValueError(f"{name} must be left unset with start_from (the model comes from {c.start_from!r}), "
                                 f"got {name}={getattr(c, name)!r}")
    check_adapter(c)
    if c.objective == "reinforce" and c.n < 2:
        raise ValueError(f"n must be >= 2 for a leave-one-out baseline, got n={c.n}")
    for name in ("threads", "prompts_per_step", "grad_accum", "max_new_tokens", "train_prompts", "heldout_prompts", "eval_samples",
                 "warm_start_batch_size", "keep_checkpoints", "layers", "width", "heads", "max_positions", "n_boot"):
        check_int(name, getattr(c, name), min=1)
    check_work_sizes(c)
    check_int("updates_per_batch", c.updates_per_batch, min=1, max=MAX_UPDATES_PER_BATCH)
    check_choice("ratio_level", c.ratio_level, RATIO_LEVELS)
    if isinstance(c.clip_ratio, bool) or not isinstance(c.clip_ratio, (int, float)):
        raise TypeError(f"clip_ratio must be a number >= 0 (0 = off), got {type(c.clip_ratio).__name__} {c.clip_ratio!r}")
    if not (math.isfinite(c.clip_ratio) and c.clip_ratio >= 0):
        raise ValueError(f"clip_ratio must be a finite number >= 0 (0 = off), got clip_ratio={c.clip_ratio}")
    c.clip_ratio = float(c.clip_ratio)
    if c.updates_per_batch == 1 and (c.clip_ratio or c.ratio_level != "sequence"):
        key = "clip_ratio" if c.clip_ratio else "ratio_level"
        raise ValueError(f"{key} needs updates_per_batch > 1 (with one update per batch every ratio is 1), "
                         f"got {key}={getattr(c, key)!r} with updates_per_batch=1")
    if c.clip_ratio and c.ratio_level == "pool":
        raise ValueError(f"clip_ratio applies to ratio_level 'sequence' or 'token', got ratio_level='pool' with "
                         f"clip_ratio={c.clip_ratio} (the pool ratio is unbiased unclipped; set clip_ratio=0)")
    if c.prompts_per_step % c.grad_accum:
        raise ValueError(f"prompts_per_step must be divisible by grad_accum (grad_accum={c.grad_accum}), got prompts_per_step={c.prompts_per_step}")
    for name in ("lr", "warm_start_lr", "temperature", "eval_temperature", "adam_eps"):
        check_positive(name, getattr(c, name))
    check_fraction("top_p", c.top_p, open_low=True)
    check_int("top_k", c.top_k, min=0)
    check_fraction("eval_top_p", c.eval_top_p, open_low=True)
    check_int("eval_top_k", c.eval_top_k, min=0)
    check_fraction("confidence", c.confidence, open_low=True, open_high=True)
    if not isinstance(c.eval_ks, (list, tuple)) or not c.eval_ks:
        raise TypeError(f"eval_ks must be a non-empty list of ints, got {c.eval_ks!r}")
    for kk in c.eval_ks:
        check_int("eval_ks", kk, min=1)
        if kk > c.eval_samples:
            raise ValueError(f"eval_ks must be <= eval_samples (eval_samples={c.eval_samples}), got eval_ks={list(c.eval_ks)}")
    c.eval_ks = [int(v) for v in c.eval_ks]
    if len(set(c.eval_ks)) < len(c.eval_ks):
        raise ValueError(f"eval_ks must not repeat a k (each is one column of every evaluation), got eval_ks={c.eval_ks}")
    if c.eval_prompts > c.heldout_prompts:
        raise ValueError(f"eval_prompts must be <= heldout_prompts (heldout_prompts={c.heldout_prompts}), got eval_prompts={c.eval_prompts}")
    if c.task == "jsonl" and not c.prompts_file:
        raise ValueError("prompts_file must name a JSONL file when task = 'jsonl', got ''")
    if c.task != "jsonl" and c.prompts_file:
        where = "; your own data goes in task_params.data" if c.task == "user" else ""
        raise ValueError(f"prompts_file applies to task = 'jsonl' only (task {c.task!r} takes no prompts file{where}), "
                         f"got prompts_file={c.prompts_file!r}")
    if c.warm_start_steps == 0 and c.rl_steps == 0 and not c.start_from:
        raise ValueError("nothing to train: warm_start_steps and rl_steps are both 0 (set one, e.g. --set rl_steps=100)")
    check_task_sizes(c)


def unread_keys(objective: str, warm_start_steps: int) -> dict[str, str]:
    """The keys a run of ``objective`` with ``warm_start_steps`` never reads, each with why.

    A built-in objective says which keys its credit reads (:class:`bonft.trainer.objectives.Objective`);
    an objective of your own ('module:name') is assumed to read them all.
    """
    out = {}
    obj = OBJECTIVES.get(objective)
    if obj is not None and not obj.reads_k:
        why = f"objective {objective!r} targets the mean reward (pass@1) and reads no k"
        out.update(k=why, k_final=why, k_schedule=why)
    if obj is not None and not obj.reads_correct:
        out["correct_threshold"] = (f"objective {objective!r} trains on the rewards themselves; only pass_at_k, "
                                    f"pass_at_k_plugin and pass_at_k_positive count a sample correct at a threshold")
    if warm_start_steps == 0:
        why = "warm_start_steps = 0 runs no warm start"
        out.update(warm_start_lr=why, warm_start_batch_size=why)
    return out


def check_read_keys(c: TrainConfig) -> None:
    """Refuse a key set where it cannot take effect (:func:`unread_keys`); an unset ``k`` of an objective that
    reads none becomes 1 (what it targets), so that ``k <= n`` holds for any ``n``."""
    unread = unread_keys(c.objective, c.warm_start_steps)
    for key, why in unread.items():
        if _is_default(c, key) or (key == "k" and c.k == 1):
            continue
        raise ValueError(f"{key} cannot take effect here ({why}); leave it unset, got {key}={_toml_value(getattr(c, key))}")
    if "k" in unread:
        c.k = 1


def _is_default(c: TrainConfig, key: str) -> bool:
    f = FIELDS[key]
    return getattr(c, key) == (f.default if f.default is not dataclasses.MISSING else f.default_factory())


def check_adapter(c: TrainConfig) -> None:
    """The adapter keys and recompute_activations: each set only where it takes effect."""
    check_int("adapter_rank", c.adapter_rank, min=0, max=MAX_ADAPTER_RANK)
    if not math.isfinite(c.adapter_scale) or c.adapter_scale <= 0:
        raise ValueError(f"adapter_scale must be a finite number > 0, got adapter_scale={c.adapter_scale}")
    check_fraction("adapter_dropout", c.adapter_dropout, open_high=True)
    if not isinstance(c.adapter_modules, (list, tuple)) or not all(isinstance(m, str) and m for m in c.adapter_modules):
        raise TypeError(f"adapter_modules must be a list of layer names (non-empty strings), got {c.adapter_modules!r}")
    c.adapter_modules = list(c.adapter_modules)
    if c.adapter_from:
        for key in ADAPTER_SHAPE_KEYS:
            if not _is_default(c, key):
                raise ValueError(f"{key} must be left unset with adapter_from (the adapter's shape comes from "
                                 f"{c.adapter_from!r}), got {key}={getattr(c, key)!r}")
    elif not c.adapter_rank:
        for key in ADAPTER_SHAPE_KEYS[1:]:
            if not _is_default(c, key):
                raise ValueError(f"{key} needs adapter_rank >= 1 (it shapes a LoRA adapter, and with adapter_rank = 0 "
                                 f"every weight trains), got {key}={getattr(c, key)!r}")
    key = "adapter_from" if c.adapter_from else "adapter_rank"
    if (c.adapter_rank or c.adapter_from) and not c.start_from:
        raise ValueError(f"{key} needs start_from (the base model the adapter trains on: a transformers model directory "
                         f"or a bonft checkpoint), got start_from=''")
    if c.adapter_rank or c.adapter_from:
        missing = peft_missing(key)
        if missing:
            raise ValueError(missing)
    if c.adapter_rank and not (c.warm_start_steps or c.rl_steps):
        raise ValueError(f"adapter_rank cannot take effect without training steps (warm_start_steps and rl_steps are 0, "
                         f"and a new adapter starts as the base model itself), got adapter_rank={c.adapter_rank}; to "
                         f"evaluate a trained adapter use adapter_from or bonft eval ADAPTER_DIR")
    if c.recompute_activations and not (c.warm_start_steps or c.rl_steps):
        raise ValueError("recompute_activations cannot take effect without training steps (warm_start_steps and "
                         "rl_steps are 0: nothing runs backward); leave it unset for an evaluation")


MAX_TINY_PARAMS = 2**30  # weights of a tiny model built from the recipe's layers / width / max_positions


def check_work_sizes(c: TrainConfig) -> None:
    """The keys that size a step's work or memory, each against its documented bound (bonft._core.checks)."""

    check_seed(c.seed)
    check_n_boot(c.n_boot, min=MIN_BOOT)
    pool = "samples per prompt: a pool is sampled, scored and credited at once"
    check_bound("n", c.n, max=MAX_POOL, why=pool)
    check_bound("eval_samples", c.eval_samples, max=MAX_POOL, why=pool)
    check_bound("prompts_per_step", c.prompts_per_step, max=MAX_PROMPTS_PER_STEP,
                why="a step holds every prompt's pool until its update")
    at_once = -(-c.prompts_per_step // c.grad_accum) * c.n
    if at_once > MAX_SAMPLES_AT_ONCE:
        raise ValueError(
            f"prompts_per_step / grad_accum x n must be <= {MAX_SAMPLES_AT_ONCE:,} responses (a micro-batch samples "
            f"them together, each with a row of logits per decoding step), got {c.prompts_per_step:,} / "
            f"{c.grad_accum} x {c.n:,} = {at_once:,}; raise grad_accum or lower n")
    cores = os.cpu_count() or 1
    if c.threads > cores:
        raise ValueError(f"threads must be <= {cores} (the cores of this machine, os.cpu_count(); more threads than "
                         f"cores only contend, and the BLAS library fails on very large counts), got threads={c.threads}")
    check_bound("warm_start_batch_size", c.warm_start_batch_size, max=MAX_PROMPTS_PER_STEP,
                why="a warm-start step holds every prompt with its reference")
    if not c.start_from:  # the tiny model built from scratch: 16 width^2 weights a layer at most (Llama, MLP 4x)
        params = 16 * c.layers * c.width**2 + (c.max_positions + 256) * c.width
        if params > MAX_TINY_PARAMS:
            raise ValueError(
                f"layers, width and max_positions must give a model of <= {MAX_TINY_PARAMS:,} weights (4 GiB in float32, "
                f"and AdamW holds two more copies), got about {params:,} (16 x layers {c.layers:,} x width {c.width:,}^2 "
                f"+ max_positions {c.max_positions:,} x width); for a large model use start_from")


PROBE_DRAWS = 50_000  # sizes above this are checked against a probe of the task before any prompt is kept


def check_task_sizes(c: TrainConfig) -> None:
    """Refuse ``train_prompts + heldout_prompts`` far beyond the distinct prompts a built-in task can make, before generating.

    Small sizes (<= ``PROBE_DRAWS`` per family) pass untouched: generating them
    takes well under a second and ``Task.split`` reports a shortfall exactly.
    Larger ones draw ``PROBE_DRAWS`` prompts of each family and estimate how
    many distinct prompts the family has with the Chao1 richness estimator
    ``d + f1 (f1 - 1) / (2 (f2 + 1))`` (Chao 1984, Scand. J. Statist. 11; d distinct,
    f1 seen once, f2 seen twice), a lower bound; a family asked for more than
    twice that is refused. ``task = 'jsonl'`` is checked exactly by the task itself.
    """
    if c.task in USER_DATA_TASKS or c.train_prompts + c.heldout_prompts <= PROBE_DRAWS:
        return
    task = get_task(c.task, **c.task_params)
    shares = task._families()
    c_train, c_eval = family_counts(c.train_prompts, shares), family_counts(c.heldout_prompts, shares)
    for fam in shares:
        need = c_train[fam] + c_eval[fam]
        if need <= PROBE_DRAWS:
            continue
        rng = random.Random(f"{task.name}/probe/{fam}")
        seen = collections.Counter(task._make(rng, fam).prompt for _ in range(PROBE_DRAWS))
        f = collections.Counter(seen.values())
        richness = len(seen) + f[1] * (f[1] - 1) / (2 * (f[2] + 1))
        if need > 2 * richness:
            raise ValueError(
                f"train_prompts + heldout_prompts asks for {need:,} distinct {fam!r} prompts of task {c.task!r}, but it makes about "
                f"{int(richness):,} ({len(seen):,} distinct in {PROBE_DRAWS:,} draws); lower train_prompts (now {c.train_prompts:,}) "
                f"or heldout_prompts (now {c.heldout_prompts:,}), or widen the task (task_params)")


# ---------------------------------------------------------------- loading, overrides
FIELDS = {f.name: f for f in dataclasses.fields(TrainConfig)}
TABLES = ("task_params", "verifier_params", "eval_verifier_params")  # the keys holding a table of knobs


def convert_value(name: str, text: str, like: Any) -> Any:
    """Turn override text into the type of the field's default ``like``."""
    if isinstance(like, bool):
        low = text.strip().lower()
        if low not in ("true", "false", "1", "0", "yes", "no"):
            raise ValueError(f"{name} must be true or false, got {text!r}")
        return low in ("true", "1", "yes")
    if isinstance(like, int):
        try:
            return int(text)
        except ValueError:
            raise ValueError(f"{name} must be an int, got {text!r}") from None
    if isinstance(like, float):
        try:
            return float(text)
        except ValueError:
            raise ValueError(f"{name} must be a number, got {text!r}") from None
    if isinstance(like, list) and any(not v.strip() for v in text.replace("[", "").replace("]", "").split(",")) \
            and text.replace("[", "").replace("]", "").strip():
        raise ValueError(f"{name} must be a comma-separated list with no empty item, got {text!r}")
    if isinstance(like, list) and FIELDS[name].metadata.get("items") is str:
        return [v.strip().strip("'\"") for v in text.replace("[", "").replace("]", "").split(",") if v.strip()]
    if isinstance(like, list):
        try:
            return [int(v) for v in text.replace("[", "").replace("]", "").split(",") if v.strip()]
        except ValueError:
            raise ValueError(f"{name} must be a comma-separated list of ints, got {text!r}") from None
    if len(text) >= 2 and text[0] == text[-1] and text[0] in "'\"":  # a TOML string, as a recipe would write it
        try:
            return tomllib.loads(f"v = {text}")["v"]
        except tomllib.TOMLDecodeError:
            raise ValueError(f"{name} must be a string; a quoted one is read as TOML (as in a recipe), got {text!r}, "
                             f"which is not a valid TOML string") from None
    return text


def parse_scalar(text: str) -> Any:
    """Task knob values: TOML-like literals (int, float, bool, quoted or bare string)."""
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def current_key(key: str, where: str = "") -> str:
    """A deprecated spelling -> its key, with a warning naming the key; other keys unchanged."""
    if key in DEPRECATED_KEYS:
        warnings.warn(f"{where}config key {key!r} is now called {DEPRECATED_KEYS[key]!r}; reading it as "
                      f"{DEPRECATED_KEYS[key]!r}", DeprecatedKeyWarning, stacklevel=4)
        return DEPRECATED_KEYS[key]
    return key


def current_keys(values: dict) -> dict:
    """``values`` with every deprecated key renamed (warning once per key); both spellings of one key is an error."""
    out = {}
    for key, v in values.items():
        new = current_key(key)
        if new != key and new in values:
            raise ValueError(f"{key} and {new} are the same key (old and new spelling), got both; keep {new}")
        out[new] = v
    return out


def apply_overrides(values: dict, overrides: list[str]) -> dict:
    """Apply ``key=value`` strings to a dict of config values (copied)."""
    values = current_keys(dict(values))
    for table in TABLES:
        values[table] = dict(values.get(table, {}))
    for item in overrides:
        if not isinstance(item, str) or "=" not in item:
            raise ValueError(f"--set expects key=value, got {item!r}")
        key, text = item.split("=", 1)
        key = key.strip()
        table, dot, knob = key.partition(".")
        if dot and table in TABLES:
            values[table][knob] = parse_scalar(text.strip())
            continue
        key = current_key(key, "--set ")
        if key not in FIELDS:
            raise ValueError(f"--set key must be a config field (see docs/training.md), got {key!r}")
        default = FIELDS[key].default if FIELDS[key].default is not dataclasses.MISSING else FIELDS[key].default_factory()
        values[key] = convert_value(key, text.strip(), default)
    return values


def from_dict(values: dict) -> TrainConfig:
    """Build and validate a config; unknown keys are an error (typos must not pass silently)."""
    if not isinstance(values, dict):
        raise TypeError(f"config must be a dict, got {type(values).__name__}")
    values = current_keys(values)
    unknown = sorted(set(values) - set(FIELDS))
    if unknown:
        raise ValueError(f"unknown config key(s) {unknown}; known keys are listed in docs/training.md")
    if values.get("start_from"):
        for name in MODEL_KEYS:
            if name in values:
                raise ValueError(f"{name} must be left unset with start_from (the model comes from "
                                 f"{values['start_from']!r}), got {name}={values[name]!r}")
    if not values.get("adapter_rank") and not values.get("adapter_from"):
        for name in ADAPTER_SHAPE_KEYS[1:]:
            if name in values:
                raise ValueError(f"{name} needs adapter_rank >= 1 (it shapes a LoRA adapter, and with adapter_rank = 0 "
                                 f"every weight trains), got {name}={values[name]!r}")
    return TrainConfig(**values)


def load_config(path: str | Path | None = None, overrides: list[str] | None = None) -> TrainConfig:
    """Read a TOML recipe (or start from defaults when ``path`` is None) and apply overrides."""
    values = read_recipe(path) if path is not None else {}
    return from_dict(apply_overrides(values, list(overrides or [])))


def read_recipe(path: str | Path) -> dict:
    """The key -> value table of a TOML recipe, deprecated spellings renamed (not yet validated)."""
    path = Path(path)
    if not path.is_file():
        raise FileNotFoundError(f"recipe not found: {path}")
    raw = path.read_bytes()
    if b"\x00" in raw:  # TOML text never holds a NUL byte: a checkpoint, an archive, a model file...
        raise ValueError(f"recipe {path} is a binary file (a NUL byte at offset {raw.index(0)}), not a TOML text recipe")
    try:
        values = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as e:
        line = raw.count(b"\n", 0, e.start) + 1
        raise ValueError(f"recipe {path} is not UTF-8 text (byte {raw[e.start]:#04x} on line {line}): a TOML recipe is "
                         f"UTF-8 text; is it the right file?") from None
    except tomllib.TOMLDecodeError as e:
        raise ValueError(f"{path}: not valid TOML: {e}") from None
    return current_keys(values)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    return json.dumps(str(v))  # a JSON string is a valid TOML basic string


def to_toml(c: TrainConfig) -> str:
    """Serialise a config to TOML that :func:`load_config` reads back to an equal config."""
    lines = []
    for name, v in c.to_dict().items():
        if c.start_from and name in MODEL_KEYS:
            continue  # the model comes from start_from
        if not c.adapter_rank and name in ADAPTER_SHAPE_KEYS[1:]:
            continue  # no new adapter to shape (setting them is an error then)
        if name not in TABLES:
            lines.append(f"{name} = {_toml_value(v)}")
    for table in TABLES:
        lines.append(f"\n[{table}]")
        lines += [f"{k} = {_toml_value(v)}" for k, v in getattr(c, table).items()]
    return "\n".join(lines) + "\n"


# keys a resumed run may change: where and how it runs and records, not what it trains
RESUMABLE_KEYS = ("name", "run_dir", "device", "threads", "keep_checkpoints", "save_every", "log_every", "plots",
                  "heldout_samples", "eval_every", "eval_at_start")
# step sizes a resumed run may lower after a non-finite step (the steps from the checkpoint on use them; a warning)
RESUME_STEP_KEYS = ("lr", "warm_start_lr", "clip_grad_norm")


def resume_changes(saved: TrainConfig, cfg: TrainConfig) -> tuple[list[str], list[str]]:
    """How ``cfg`` differs from the run's ``saved`` configuration, as ``"key: saved -> new"`` lines:
    ``(refused, step_sizes)``. ``--resume`` refuses the first (keys that shape the training: task, model,
    objective, k, n, seeds, sizes) and continues with the second (:data:`RESUME_STEP_KEYS`, e.g. a lower ``lr``
    after a non-finite step) with a warning.

    A resumed run ends with the weights of an uninterrupted one only when every key that shapes the training
    is the run's own; :data:`RESUMABLE_KEYS` only move where and how it runs and records. ``rl_steps`` may
    change (to train longer, or stop earlier) unless a k schedule spreads k over the run's steps.
    """
    a, b = saved.to_dict(), cfg.to_dict()
    free = set(RESUMABLE_KEYS)
    if cfg.k_schedule == "constant" or cfg.k_final == 0:
        free.add("rl_steps")
    changed = [key for key in a if key not in free and a[key] != b.get(key)]
    line = {key: f"{key}: {_toml_value(a[key])} -> {_toml_value(b.get(key))}" for key in changed}
    return ([line[key] for key in changed if key not in RESUME_STEP_KEYS],
            [line[key] for key in changed if key in RESUME_STEP_KEYS])


def config_reference() -> str:
    """The markdown table of every config key (used in docs/training.md)."""
    rows = ["| key | default | meaning |", "|---|---|---|"]
    for f in dataclasses.fields(TrainConfig):
        default = f.default if f.default is not dataclasses.MISSING else f.default_factory()
        rows.append(f"| `{f.name}` | `{_toml_value(default)}` | {f.metadata['help']} |")
    return "\n".join(rows)


if __name__ == "__main__":  # python -m bonft.trainer.config  -> the key table of docs/training.md
    print(config_reference())
