"""A run's set-up: the :class:`Run` the loop carries, its random streams, schedules and optimizer.

:func:`build_run` turns a :class:`~bonft.trainer.config.TrainConfig` into a :class:`Run`
(task, data split, verifiers, model, tokenizer, process group); :func:`make_optimizer`
gives each stage its optimizer; :func:`lr_at` and :func:`k_at` are the learning-rate and
k schedules; :class:`Stream` names every random stream of a run, so each seed is derived
in one way from ``(seed, step, rank or prompt slot, stream)``. What one step does is in
:mod:`bonft.trainer.steps`, the loop in :mod:`bonft.trainer.loop`.
"""
from __future__ import annotations

import enum
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch

from bonft.generation import encode_responses
from bonft.tasks import build_tokenizer, get_task
from bonft.trainer.checkpoint import quiet_transformers
from bonft.trainer.config import TrainConfig
from bonft.trainer.distributed import derive_seed, init_from_env, prompt_seed, shard_prompts, unwrap_model
from bonft.trainer.models import build_tiny_model, check_context, check_vocabulary, load_model, policy_model
from bonft.trainer.objectives import OBJECTIVES, resolve_objective
from bonft.verifiers.roles import Roles, build_roles


class Stream(enum.IntEnum):
    """The independent random streams of a run.

    A stream drawn per rank takes its seed from :meth:`seed` (``derive_seed(seed, step, rank,
    stream)``); a stream drawn per prompt from :meth:`for_prompt` (``prompt_seed(seed, step,
    slot, stream)``, the prompt's slot in the step's global batch, so a prompt draws the same
    numbers whichever rank holds it). Distinct members give independent seeds; the values are part
    of what makes a run reproducible, so they never change.
    """

    SAMPLES = 0  # per prompt: a training prompt's n samples
    BATCH = 1  # per step: which training prompts the step draws (rank 0's seed, the same on every rank)
    EVALUATION = 2  # per prompt: the held-out samples (step 0 at every evaluation); per step: the bootstrap
    STEP = 3  # per rank: torch's global RNG inside a step (anything random the step does not seed itself)
    SAMPLE_COMMAND = 4  # per step: the draw of ``bonft sample``
    PLACEBO = 5  # per prompt: the placebo's permutation of the prompt's pool

    def seed(self, seed: int, *, step: int, rank: int = 0) -> int:
        """The 63-bit seed of this stream at ``(seed, step, rank)``."""
        return derive_seed(seed, step=step, rank=rank, stream=int(self))

    def for_prompt(self, seed: int, *, step: int, slot: int) -> int:
        """The 63-bit seed of this stream for the prompt in ``slot`` of step ``step``'s global batch."""
        return prompt_seed(seed, step=step, slot=slot, stream=int(self))


# ----------------------------------------------------------------------------- schedules
def k_at(cfg: TrainConfig, rl_step: int) -> int:
    """k of the RL step ``rl_step`` (0-based) under the k schedule; k -> k_final at the last step."""
    if cfg.k_schedule == "constant" or cfg.k_final == 0 or cfg.rl_steps <= 1:
        return cfg.k
    frac = rl_step / (cfg.rl_steps - 1)
    if cfg.k_schedule == "linear":
        k = cfg.k + frac * (cfg.k_final - cfg.k)
    else:  # geometric: equal ratios per step
        k = math.exp(math.log(cfg.k) + frac * (math.log(cfg.k_final) - math.log(cfg.k)))
    return int(min(cfg.n, max(1, round(k))))


def lr_at(cfg: TrainConfig, step: int) -> float:
    """SFT: linear warm-up over 5% then cosine to 10%; RL: linear warm-up then constant."""
    if step < cfg.warm_start_steps:
        warm = max(1, cfg.warm_start_steps // 20)
        if step < warm:
            return cfg.warm_start_lr * (step + 1) / warm
        frac = (step - warm) / max(1, cfg.warm_start_steps - warm)
        return cfg.warm_start_lr * (0.1 + 0.9 * 0.5 * (1 + math.cos(math.pi * frac)))
    rl_step = step - cfg.warm_start_steps
    if rl_step < cfg.warmup_steps:
        return cfg.lr * (rl_step + 1) / cfg.warmup_steps
    return cfg.lr


# ----------------------------------------------------------------------------- the run
@dataclass
class Run:
    """What the loop carries: the model, tokenizer, optimizer, data, verifiers.

    ``model`` is the model as trained: on several ranks it is wrapped in DDP (which
    averages gradients in backward), so training forward passes go through it;
    sampling, evaluation and saving use :attr:`module`, the plain model inside.
    """

    cfg: TrainConfig
    out: Path
    model: Any
    tokenizer: Any
    task: Any
    train: list
    eval: list
    verifiers: dict  # "train" + evaluation verifiers by name (the evaluation verifier's, the training verifier's, a task's "proxy")
    device: torch.device
    rank: int = 0
    world: int = 1
    optimizer: Any = None
    anchor_model: Any = None
    ctx: Any = None  # bonft.trainer.distributed.DistContext
    updating: bool = False  # inside optimizer.step(): the weights are half-updated
    roles: Roles | None = None  # the training verifier and the evaluation verifier, by name (bonft.verifiers.roles)
    partial_step: bool = False  # some, not all, of a step's updates (updates_per_batch > 1) are in the weights
    apply_update: Any = None  # during a step: (loss, what) -> (grad norm, clipped); check, clip, optimizer.step()

    @property
    def module(self) -> Any:
        """The plain model (inside DDP on several ranks)."""
        return unwrap_model(self.model)

    @property
    def is_main(self) -> bool:
        return self.rank == 0


def task_split(cfg: TrainConfig, tokenizer: Any = None) -> tuple[Any, list, list]:
    """``(task, training prompts, held-out prompts)`` of ``cfg``, as every run of it draws them.

    ``tokenizer``: the sampling model's, whose chat template renders a user task's prompts when
    ``task_params.chat_template`` is true (and ``task_params`` names no tokenizer of its own).
    """
    extra = {"path": cfg.prompts_file} if cfg.task == "jsonl" else {}
    if cfg.task == "user" and cfg.task_params.get("chat_template") is True and "tokenizer" not in cfg.task_params:
        extra["tokenizer"] = tokenizer  # the chat template of the model that samples
    task = get_task(cfg.task, **extra, **cfg.task_params)
    try:
        train, held = task.split(n_train=cfg.train_prompts, n_eval=cfg.heldout_prompts, seed=cfg.seed)
    except ValueError as e:  # the task names its own arguments: n_train is train_prompts, n_eval heldout_prompts
        raise ValueError(f"train_prompts = {cfg.train_prompts} and heldout_prompts = {cfg.heldout_prompts} do not fit "
                         f"task {cfg.task!r} ({e}); lower them in the recipe") from None
    return task, list(train), list(held)


def build_run(cfg: TrainConfig, *, training: bool = True) -> Run:
    """Task, data split, verifiers, model and tokenizer for ``cfg`` (no optimizer yet).

    ``training``: the model is set up to train as the recipe says (an adapter, recomputed activations:
    :func:`bonft.trainer.models.policy_model`); False (an evaluation) keeps it as loaded.
    """
    if training and cfg.rl_steps:
        resolve_objective(cfg.objective)  # an objective of your own ('module:name'): imported before any work
    ctx = init_from_env(device=cfg.device)  # a process group under torchrun, else one process
    rank, world, device = ctx.rank, ctx.world_size, ctx.device
    if cfg.start_from:
        with quiet_transformers():
            model, tokenizer = load_model(cfg.start_from, device=device)
        model = policy_model(model, cfg, training=training)
    else:
        tokenizer = build_tokenizer()
        model = build_tiny_model(
            cfg.arch, vocab_size=len(tokenizer), layers=cfg.layers, width=cfg.width, heads=cfg.heads,
            max_positions=cfg.max_positions, seed=cfg.seed, pad_token_id=tokenizer.pad_token_id,
            eos_token_id=tokenizer.eos_token_id, bos_token_id=tokenizer.bos_token_id,
        ).to(device)
        model = policy_model(model, cfg, training=training)
    task, train, held = task_split(cfg, tokenizer)
    everything = list(train) + list(held)
    roles = build_roles(task, everything, verifier=cfg.verifier, verifier_params=cfg.verifier_params,
                        eval_verifier=cfg.eval_verifier, eval_verifier_params=cfg.eval_verifier_params, device=str(device))
    verifiers = {"train": roles.verifier, **roles.evaluation_verifiers()}
    uses = ("warm_start_steps", cfg.warm_start_steps) if cfg.warm_start_steps else None
    if uses is None and cfg.rl_steps and training and OBJECTIVES[cfg.objective].reference:
        uses = ("objective", repr(cfg.objective))
    unreferenced = [e for e in train if not e.reference]
    fix = "set warm_start_steps = 0" if uses and uses[0] == "warm_start_steps" else "choose an objective without references"
    if uses and unreferenced:
        where = (unreferenced[0].meta or {}).get("where", repr(unreferenced[0].prompt[:60]))
        raise ValueError(f"{uses[0]} = {uses[1]} trains on reference responses, but {len(unreferenced)} of {len(train)} "
                         f"training prompts have none (e.g. {where}); set task_params.reference_field to the column "
                         f"of reference responses, or {fix}")
    check_context(model, tokenizer, [e.prompt for e in everything], max_new_tokens=cfg.max_new_tokens,  # before any work
                  references=[e.reference for e in train] if cfg.warm_start_steps else (),
                  knob="start_from's context" if cfg.start_from else "max_positions")
    check_vocabulary(tokenizer, [e.prompt for e in everything],
                     [e.reference for e in train] if cfg.warm_start_steps and training else ())
    return Run(cfg=cfg, out=Path(cfg.run_dir), model=model, tokenizer=tokenizer, task=task, train=list(train),
               eval=list(held), verifiers=verifiers, device=device, rank=rank, world=world, ctx=ctx, roles=roles)


def make_optimizer(run: Run, stage: str) -> torch.optim.Optimizer:
    """The warm start: AdamW; the RL stage: ``cfg.optimizer`` (AdamW with ``adam_eps``, or SGD with ``momentum``).

    The learning rate is set by the loop before every step (:func:`lr_at`). The weights that train:
    every weight, or an adapter's (the base model's are frozen).
    """
    cfg, params = run.cfg, [p for p in run.module.parameters() if p.requires_grad]
    if stage == "rl" and cfg.optimizer == "sgd":
        return torch.optim.SGD(params, lr=cfg.lr, momentum=cfg.momentum, weight_decay=cfg.weight_decay)
    eps = cfg.adam_eps if stage == "rl" else 1e-8
    return torch.optim.AdamW(params, lr=cfg.lr, eps=eps, weight_decay=cfg.weight_decay)


def prompt_batch(cfg: TrainConfig, step: int, size: int, n_items: int, rank: int, world: int) -> np.ndarray:
    """This rank's share of the step's global batch: same global draw everywhere, rank takes a contiguous block.

    The block is slots ``shard_bounds(size, rank=rank, world_size=world)`` of the global batch (whole prompts).
    """
    rng = np.random.default_rng(Stream.BATCH.seed(cfg.seed, step=step))
    idx = rng.choice(n_items, size=size, replace=size > n_items)
    return shard_prompts(idx, rank=rank, world_size=world)


def encode_pairs(tokenizer: Any, prompts: list[str], responses: list[str], device: torch.device):
    """Prompts as the sampler encodes them, one reference response each (EOS appended).

    Returns prompt_tokens (B, Tp), prompt_valid (B, Tp), response_tokens (B, 1, T), response_valid (B, 1, T).
    """
    return tuple(x.to(device) for x in encode_responses(tokenizer, prompts, responses))
