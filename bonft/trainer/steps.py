"""The trainer's parts: seeds, schedules, the optimizer, the warm-start and RL steps, setup and evaluation.

:mod:`bonft.trainer.loop` holds the loop; this module holds what one step does
(up to and including ``backward()``; the loop checks, clips and steps). See
:mod:`bonft.trainer.loop` for the RNG, distributed and caution notes.
"""
from __future__ import annotations

import contextlib
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch

from bonft.trainer.config import TrainConfig
from bonft.trainer.measure import GradientMoments, Stopwatch
from bonft.trainer.metrics import GRAD_SNR, info_metric
from bonft.trainer.objectives import OBJECTIVES, Pools, policy_loss, shuffle_pools

PLACEBO_STREAM = 5  # prompt_seed stream of the placebo's permutations (0: sampling, 2: evaluation)


# ----------------------------------------------------------------------------- helpers
@contextlib.contextmanager
def quiet_transformers():
    """No transformers progress bars ("Loading weights") inside the trainer's own bar."""
    from transformers.utils import logging as hf_logging

    was = hf_logging.is_progress_bar_enabled()
    hf_logging.disable_progress_bar()
    try:
        yield
    finally:
        if was:
            hf_logging.enable_progress_bar()


def dist_info() -> tuple[int, int]:
    """(rank, world size); (0, 1) without an initialised process group."""
    if torch.distributed.is_available() and torch.distributed.is_initialized():
        return torch.distributed.get_rank(), torch.distributed.get_world_size()
    return 0, 1


def step_seed(seed: int, step: int, rank: int = 0, stream: int = 0) -> int:
    """A 63-bit seed for one (seed, step, rank, stream); independent streams, no collisions in practice."""
    from bonft._core.seeds import derive_seed

    return derive_seed(seed, step, rank, stream)


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


def encode_pairs(tokenizer: Any, prompts: list[str], responses: list[str], device: torch.device):
    """Prompts as the sampler encodes them, one reference response each (EOS appended).

    Returns prompt_tokens (B, Tp), prompt_valid (B, Tp), reply_tokens (B, 1, T), reply_valid (B, 1, T).
    """
    from bonft.generation.sampling import encode_responses

    return tuple(x.to(device) for x in encode_responses(tokenizer, prompts, responses))


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
    verifiers: dict  # "train" + evaluation verifiers ("exact", "proxy", user name)
    device: torch.device
    rank: int = 0
    world: int = 1
    optimizer: Any = None
    anchor_model: Any = None
    ctx: Any = None  # bonft.trainer.distributed.DistContext
    updating: bool = False  # inside optimizer.step(): the weights are half-updated

    @property
    def module(self) -> Any:
        """The plain model (inside DDP on several ranks)."""
        from bonft.trainer.distributed import unwrap_model

        return unwrap_model(self.model)

    @property
    def is_main(self) -> bool:
        return self.rank == 0


def make_optimizer(run: Run, stage: str) -> torch.optim.Optimizer:
    """The warm start: AdamW; the RL stage: ``cfg.optimizer`` (AdamW with ``adam_eps``, or SGD with ``momentum``).

    The learning rate is set by the loop before every step (:func:`lr_at`).
    """
    cfg, params = run.cfg, run.module.parameters()
    if stage == "rl" and cfg.optimizer == "sgd":
        return torch.optim.SGD(params, lr=cfg.lr, momentum=cfg.momentum, weight_decay=cfg.weight_decay)
    eps = cfg.adam_eps if stage == "rl" else 1e-8
    return torch.optim.AdamW(params, lr=cfg.lr, eps=eps, weight_decay=cfg.weight_decay)


def _prompt_batch(cfg: TrainConfig, step: int, size: int, n_items: int, rank: int, world: int) -> np.ndarray:
    """This rank's share of the step's global batch: same global draw everywhere, rank takes a contiguous block.

    The block is slots ``shard_bounds(size, rank=rank, world_size=world)`` of the global batch (whole prompts).
    """
    from bonft.trainer.distributed import shard_prompts

    rng = np.random.default_rng(step_seed(cfg.seed, step, 0, stream=1))
    idx = rng.choice(n_items, size=size, replace=size > n_items)
    return shard_prompts(idx, rank=rank, world_size=world)


# ----------------------------------------------------------------------------- the two steps
def sft_step(run: Run, step: int, clock: Stopwatch) -> dict:
    """Warm start: NLL (sum over tokens) of reference responses, divided by the global batch size."""
    from bonft.trainer.distributed import reduce_metrics
    from bonft.objectives.losses import nll_loss
    from bonft.generation.sampling import sequence_logprobs

    cfg = run.cfg
    B = cfg.warm_start_batch_size
    idx = _prompt_batch(cfg, step, B, len(run.train), run.rank, run.world)
    ex = [run.train[i] for i in idx]
    pids, pmask, rids, rmask = encode_pairs(run.tokenizer, [e.prompt for e in ex], [e.reference for e in ex], run.device)
    with clock("forward"):
        logp = sequence_logprobs(run.model, pids, pmask, rids, rmask)  # (b, 1, T)
        loss = nll_loss(logp[:, 0], mask=rmask[:, 0], token_reduction="sum", reduction="sum")  # (b, 1, T) -> (b, T)
    with clock("backward"):
        (loss * run.world / B).backward()  # x W/B: DDP averages over W ranks (bonft.trainer.distributed.global_mean_scale)
    tot = reduce_metrics({"nll": float(loss.detach()), "tokens": float(rmask.sum())}, run.ctx)
    return {"loss": tot["nll"] / B, "nll_per_token": tot["nll"] / tot["tokens"]}


def _score(run: Run, prompts: list[str], texts: list[list[str]], references: list[str] | None, seeds: list[int]):
    """Score the pools -> Pools on the device (and the verifier's failure count); placebo-shuffled if asked."""
    from bonft.verifiers.scoring import score_batch

    cfg, n = run.cfg, len(texts[0])
    v = score_batch(run.verifiers["train"], [p for p in prompts for _ in range(n)], [s for row in texts for s in row])
    scores = np.asarray(v.scores, dtype=np.float64).reshape(len(prompts), n)  # row b*n + i is sample i of prompt b
    rewards = scores if cfg.reward_source == "scores" or v.rewards is None else np.asarray(v.rewards, np.float64).reshape(scores.shape)
    answers = None
    if OBJECTIVES[cfg.objective].answers:  # vote objectives: a failed extraction votes alone (a key of its own)
        extract = run.task.extract_answer
        answers = np.array([[str(a) if (a := extract(y)) is not None else f"\x00none{i}" for i, y in enumerate(row)]
                            for row in texts], dtype=object)
    if cfg.placebo:
        scores, rewards = shuffle_pools(seeds, scores, rewards)
        if answers is not None:  # the same permutation as scores and rewards (same seeds)
            (answers,) = shuffle_pools(seeds, answers)
    t = lambda x: torch.as_tensor(x, dtype=torch.float64, device=run.device)
    expert = None
    if references is not None:
        expert = t(score_batch(run.verifiers["train"], prompts, references).scores)
    pools = Pools(scores=t(scores), rewards=t(rewards), correct=t(rewards >= cfg.correct_threshold), reference_scores=expert,
                  answers=answers)
    return pools, v.n_failed


def _pool_loss(run: Run, model: Any, rows: tuple, expert_rows: tuple | None, credit: torch.Tensor,
               anchor_logp: torch.Tensor | None) -> tuple[torch.Tensor, dict]:
    """Summed loss of the prompts in ``rows`` (prompt_tokens, prompt_valid, reply_tokens, reply_valid)."""
    from bonft.generation.sampling import sequence_logprobs

    cfg = run.cfg
    # log-probs of the policy that drew the samples: same temperature and top-p
    logp = sequence_logprobs(model, *rows, temperature=cfg.temperature, top_p=cfg.top_p)
    e_lp = e_mask = None
    if expert_rows is not None:  # (b, 1, T) -> (b, T): the reference response
        e_lp, e_mask = sequence_logprobs(model, *expert_rows)[:, 0], expert_rows[3][:, 0]
    return policy_loss(logp, credit, mask=rows[3], token_reduction=cfg.token_reduction, anchor_logprobs=anchor_logp,
                       anchor_weight=cfg.anchor_weight, reference_logprobs=e_lp, reference_mask=e_mask)


def _add_prompt_gradients(run: Run, moments: GradientMoments, rows: tuple, expert_rows: tuple | None,
                          credit: torch.Tensor, anchor_logp: torch.Tensor | None) -> None:
    """Each prompt's own gradient of its loss term (one forward + backward per prompt) into ``moments``.

    Through the plain model with ``autograd.grad``: the parameters' ``.grad`` (the step's) stay untouched.
    """
    params = [p for p in run.module.parameters() if p.requires_grad]
    one = lambda x, j: tuple(r[j:j + 1] for r in x) if x is not None else None
    for j in range(credit.shape[0]):
        anchor_j = anchor_logp[j:j + 1] if anchor_logp is not None else None
        loss, _ = _pool_loss(run, run.module, one(rows, j), one(expert_rows, j), credit[j:j + 1], anchor_j)
        moments.add(torch.autograd.grad(loss, params, allow_unused=True, materialize_grads=True))


def rl_step(run: Run, step: int, clock: Stopwatch) -> dict:
    """Sample n per prompt -> score -> credit -> loss -> backward, over grad_accum micro-batches.

    With ``snr_every`` due, also the per-prompt gradients of the same samples (``grad/snr``).
    """
    from bonft.trainer.distributed import prompt_seed, reduce_metrics, sample_per_prompt, shard_bounds
    from bonft.generation.sampling import sequence_logprobs

    cfg, n, T = run.cfg, run.cfg.n, run.cfg.temperature
    B, obj = cfg.prompts_per_step, OBJECTIVES[cfg.objective]
    k = k_at(cfg, step - cfg.warm_start_steps)
    idx = _prompt_batch(cfg, step, B, len(run.train), run.rank, run.world)
    slots = np.arange(*shard_bounds(B, rank=run.rank, world_size=run.world))  # positions in the global batch
    moments = GradientMoments() if cfg.snr_every and (step - cfg.warm_start_steps) % cfg.snr_every == 0 else None
    acc: dict = {}
    for mb, sl in zip(np.array_split(idx, cfg.grad_accum), np.array_split(slots, cfg.grad_accum)):
        ex = [run.train[i] for i in mb]
        prompts, b = [e.prompt for e in ex], len(ex)
        with clock("sample"):  # one generator per global slot: a prompt draws the same samples whichever rank holds it
            smp = sample_per_prompt(run.module, run.tokenizer, prompts, seeds=[prompt_seed(cfg.seed, step=step, slot=int(j))
                                    for j in sl], n=n, temperature=T, top_p=cfg.top_p, max_new_tokens=cfg.max_new_tokens)
        with clock("score"):
            refs = [e.reference for e in ex] if obj.expert else None
            pools, failed = _score(run, prompts, smp.texts, refs,
                                   [prompt_seed(cfg.seed, step=step, slot=int(j), stream=PLACEBO_STREAM) for j in sl])
        rows = (smp.prompt_tokens, smp.prompt_valid, smp.reply_tokens, smp.reply_valid)
        expert_rows = encode_pairs(run.tokenizer, prompts, refs, run.device) if obj.expert else None
        with clock("credit"):
            credit = obj.credit(pools, k)
            value = obj.value(pools, k) if obj.value is not None else None
        with clock("forward"):
            anchor_logp = None
            if run.anchor_model is not None:
                with torch.no_grad():
                    anchor_logp = sequence_logprobs(run.anchor_model, *rows, temperature=T, top_p=cfg.top_p)
            loss, info = _pool_loss(run, run.model, rows, expert_rows, credit, anchor_logp)
        with clock("backward"):
            (loss * run.world / B).backward()  # x W/B: DDP averages over W ranks (global_mean_scale)
        if moments is not None:
            with clock("snr"):
                _add_prompt_gradients(run, moments, rows, expert_rows, credit, anchor_logp)
        info.update({"pool_value": float(value.mean())} if value is not None else {})
        if obj.expert:
            info["beaten_frac"] = float((pools.scores > pools.reference_scores[:, None]).double().mean())
        for key, val in [("loss", float(loss.detach()) / B), ("reward", float(pools.rewards.mean()) * b / B),
                         ("score", float(pools.scores.mean()) * b / B), ("verifier_failures", failed),
                         *((info_metric(key), float(v) * b / B) for key, v in info.items())]:
            acc[key] = acc.get(key, 0.0) + val
    acc = reduce_metrics(acc, run.ctx)  # per-rank parts of global means -> their sum
    acc["k"] = k
    if moments is not None:
        acc[GRAD_SNR] = moments.snr(run.ctx)
    return acc
# ----------------------------------------------------------------------------- setup
def build_run(cfg: TrainConfig) -> Run:
    """Task, data split, verifiers, model and tokenizer for ``cfg`` (no optimizer yet)."""
    from bonft.trainer.models import build_tiny_model, check_context, load_model
    from bonft.tasks import build_tokenizer, get_task
    from bonft.verifiers.scoring import load_verifier

    from bonft.trainer.distributed import init_from_env

    ctx = init_from_env(device=cfg.device)  # a process group under torchrun, else one process
    rank, world, device = ctx.rank, ctx.world_size, ctx.device
    extra = {"path": cfg.prompts_file} if cfg.task == "jsonl" else {}
    task = get_task(cfg.task, **extra, **cfg.task_params)
    train, held = task.split(n_train=cfg.train_prompts, n_eval=cfg.heldout_prompts, seed=cfg.seed)
    everything = list(train) + list(held)
    verifiers = {"exact": task.verifier(everything)}
    proxy = task.proxy_verifier(everything) if hasattr(task, "proxy_verifier") else None
    if proxy is not None:
        verifiers["proxy"] = proxy
    if cfg.verifier in ("exact", "proxy"):
        if cfg.verifier not in verifiers:
            raise ValueError(f"verifier='proxy' needs a task with a proxy verifier; task {cfg.task!r} has none")
        verifiers["train"] = verifiers[cfg.verifier]
    else:
        verifiers["train"] = verifiers[cfg.verifier] = load_verifier(cfg.verifier)
    if cfg.start_from:
        with quiet_transformers():
            model, tokenizer = load_model(cfg.start_from, device=device)
    else:
        tokenizer = build_tokenizer()
        model = build_tiny_model(
            cfg.arch, vocab_size=len(tokenizer), layers=cfg.layers, width=cfg.width, heads=cfg.heads,
            max_positions=cfg.max_positions, seed=cfg.seed, pad_token_id=tokenizer.pad_token_id,
            eos_token_id=tokenizer.eos_token_id, bos_token_id=tokenizer.bos_token_id,
        ).to(device)
    check_context(model, tokenizer, [e.prompt for e in everything], max_new_tokens=cfg.max_new_tokens,  # before any work
                  references=[e.reference for e in train] if cfg.warm_start_steps else (),
                  knob="start_from's context" if cfg.start_from else "max_positions")
    return Run(cfg=cfg, out=Path(cfg.run_dir), model=model, tokenizer=tokenizer, task=task, train=list(train),
               eval=list(held), verifiers=verifiers, device=device, rank=rank, world=world, ctx=ctx)


def evaluate_run(run: Run, step: int):
    """Evaluate on the held-out prompts (same prompts and seeds at every evaluation); None on ranks > 0.

    Each rank samples and scores its block of the held-out prompts (prompt j from
    its own seed, so the pools do not depend on the number of ranks); rank 0
    gathers the pools and runs the estimators once on all of them.
    """
    from bonft.trainer.distributed import gather_objects, prompt_seed, shard_bounds
    from bonft.trainer.evaluation import collect_pools, merge_pools, report_from_pools

    cfg = run.cfg
    held = run.eval[: cfg.eval_prompts or len(run.eval)]
    vers = {name: v for name, v in run.verifiers.items() if name != "train"}
    a, b = shard_bounds(len(held), rank=run.rank, world_size=run.world, allow_uneven=True)
    raw = None
    if b > a:
        raw = collect_pools(run.module, run.tokenizer, [e.prompt for e in held[a:b]], verifiers=vers,
                            extract_answer=getattr(run.task, "extract_answer", None), n=cfg.eval_samples,
                            temperature=cfg.eval_temperature, max_new_tokens=cfg.max_new_tokens,
                            seeds=[prompt_seed(cfg.seed, step=0, slot=j, stream=2) for j in range(a, b)])
    pools = gather_objects(raw, run.ctx)
    if not run.is_main:
        return None
    return report_from_pools(merge_pools(pools), ks=cfg.eval_ks, temperature=cfg.eval_temperature,
                             seed=step_seed(cfg.seed, 0, 0, stream=2), step=step, confidence=cfg.confidence,
                             n_boot=cfg.n_boot, groups=[(e.meta or {}).get("family", "all") for e in held])
