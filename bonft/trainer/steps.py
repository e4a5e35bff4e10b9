"""What one optimizer step computes, up to and including ``backward()``: the warm-start step and the RL step.

The loop (:mod:`bonft.trainer.loop`) sets the learning rate, checks, clips and applies
the update; the run's set-up, schedules and random streams are in :mod:`bonft.trainer.run`.

One RL step, for each micro-batch of this rank's prompts::

    sample (bonft.generation.sample, one generator per global prompt slot)
    -> score (the training verifier; host float64 arrays)
    -> credit (the objective's credit function: float64 numpy on the host)
    -> the credit goes to the device, once
    -> forward (bonft.generation.sequence_logprobs) -> loss (bonft.objectives.losses) -> backward

With ``updates_per_batch = U > 1`` the first update is exactly that (on-policy) and keeps, per
micro-batch, the samples, the credit, the anchor's log-probs and the log-probs of the policy that
sampled (detached, from that first forward). Then ``U - 1`` times: apply the update so far
(``run.apply_update``: the loop's finite check, clip and optimizer step), then forward -> loss with
``sampling_logprobs`` (importance ratio pi/pi_old, ``ratio_level``, ``clip_ratio``) -> backward on
the same samples. The loop applies the last update; the step logs the last update's ``loss`` and
``ratio/...`` monitors and ``grad/norm``, and everything else of the sampled batch.

Scores and rewards stay on the host: credit functions compute there, and only the
``(b, n)`` credit crosses to the training device.
"""
from __future__ import annotations

import numpy as np
import torch

from bonft.generation import encode_responses, sample, sequence_logprobs
from bonft.generation.gelu import chunked_tanh_gelu
from bonft.generation.inputs import left_pad, special_ids
from bonft.objectives.losses import nll_loss
from bonft.trainer.distributed import reduce_metrics, shard_bounds
from bonft.trainer.evaluation import answer_reader
from bonft.trainer.measure import GradientMoments, Stopwatch
from bonft.trainer.metrics import GRAD_SNR, info_metric
from bonft.trainer.objectives import OBJECTIVES, Pools, policy_loss, shuffle_pools
from bonft.trainer.run import Run, Stream, k_at, prompt_batch
from bonft.verifiers.scoring import VerifierError, score_batch


# ----------------------------------------------------------------------------- the warm start
def sft_step(run: Run, step: int, clock: Stopwatch) -> dict:
    """Warm start: NLL (sum over tokens) of reference responses, divided by the global batch size."""
    cfg = run.cfg
    B = cfg.warm_start_batch_size
    idx = prompt_batch(cfg, step, B, len(run.train), run.rank, run.world)
    pids, pmask, rids, rmask = _reference_pairs(run, idx)
    with clock("forward"), chunked_tanh_gelu(run.model):  # the model's own numbers, fewer trips to memory
        logp = sequence_logprobs(run.model, pids, pmask, rids, rmask)  # (b, 1, T)
        loss = nll_loss(logp[:, 0], mask=rmask[:, 0], token_reduction="sum", reduction="sum")  # (b, 1, T) -> (b, T)
    with clock("backward"):
        (loss * run.world / B).backward()  # x W/B: DDP averages over W ranks (bonft.trainer.distributed.global_mean_scale)
    tot = reduce_metrics({"nll": float(loss.detach()), "tokens": float(rmask.sum())}, run.ctx)
    return {"loss": tot["nll"] / B, "nll_per_token": tot["nll"] / tot["tokens"]}


def _reference_pairs(run: Run, idx) -> tuple[torch.Tensor, ...]:
    """``encode_pairs`` of the training examples ``idx`` (prompt, reference): the same four tensors,
    from token lists each example's texts are encoded into once per run (the run keeps them), so a
    warm-start step spends no time in the tokenizer."""
    tokens = run.__dict__.setdefault("_reference_tokens", {})  # training index -> (prompt ids, reference ids + EOS)
    new = sorted({int(i) for i in idx} - tokens.keys())
    if new:
        p, pv, r, rv = encode_responses(run.tokenizer, [run.train[i].prompt for i in new], [run.train[i].reference for i in new])
        for j, i in enumerate(new):
            tokens[i] = (p[j][pv[j] == 1].tolist(), r[j, 0][rv[j, 0] == 1].tolist())
    pad_id, _ = special_ids(run.tokenizer)
    rows = [tokens[int(i)] for i in idx]
    prompt_tokens, prompt_valid = left_pad([pr for pr, _ in rows], pad_id)
    T = max(1, max(len(rs) for _, rs in rows))  # as encode_responses pads: right, to the longest
    ids = torch.full((len(rows), T), pad_id, dtype=torch.long)
    mask = torch.zeros((len(rows), T), dtype=torch.long)
    for j, (_, rs) in enumerate(rows):
        ids[j, :len(rs)] = torch.tensor(rs, dtype=torch.long)
        mask[j, :len(rs)] = 1
    B = len(rows)
    return tuple(x.to(run.device) for x in (prompt_tokens, prompt_valid, ids.view(B, 1, T), mask.view(B, 1, T)))


# ----------------------------------------------------------------------------- the RL step
def rl_step(run: Run, step: int, clock: Stopwatch) -> dict:
    """Sample n per prompt -> score -> credit -> loss -> backward, over grad_accum micro-batches.

    With ``snr_every`` due, also the per-prompt gradients of the same samples (``grad/snr``).
    """
    cfg, n, T = run.cfg, run.cfg.n, run.cfg.temperature
    B, obj = cfg.prompts_per_step, OBJECTIVES[cfg.objective]
    k = k_at(cfg, step - cfg.warm_start_steps)
    idx = prompt_batch(cfg, step, B, len(run.train), run.rank, run.world)
    slots = np.arange(*shard_bounds(B, rank=run.rank, world_size=run.world))  # positions in the global batch
    moments = GradientMoments() if cfg.snr_every and (step - cfg.warm_start_steps) % cfg.snr_every == 0 else None
    acc: dict = {}
    reason = ""  # this rank's first reason of a failed verifier call
    kept: list = []  # updates_per_batch > 1: what each micro-batch's later updates reuse
    for mb, sl in zip(np.array_split(idx, cfg.grad_accum), np.array_split(slots, cfg.grad_accum)):
        ex = [run.train[i] for i in mb]
        prompts, b = [e.prompt for e in ex], len(ex)
        with clock("sample"):  # one generator per global slot: a prompt draws the same samples whichever rank holds it
            smp = sample(run.module, run.tokenizer, prompts, n=n, temperature=T, top_p=cfg.top_p, top_k=cfg.top_k,
                         max_new_tokens=cfg.max_new_tokens,
                         seeds=[Stream.SAMPLES.for_prompt(cfg.seed, step=step, slot=int(j)) for j in sl])
        with clock("score"):
            refs = [e.reference for e in ex] if obj.reference else None
            pools, failed, why = _score(run, prompts, smp.texts, refs,
                                        [Stream.PLACEBO.for_prompt(cfg.seed, step=step, slot=int(j)) for j in sl])
            reason = reason or why
        rows = (smp.prompt_tokens, smp.prompt_valid, smp.response_tokens, smp.response_valid)
        reference_rows = _reference_pairs(run, mb) if obj.reference else None
        with clock("credit"):  # float64 on the host; the (b, n) credit is the one thing that goes to the device
            credit = torch.as_tensor(obj.credit(pools, k), dtype=torch.float64, device=run.device)
            value = obj.value(pools, k) if obj.value is not None else None
        with clock("forward"), chunked_tanh_gelu(run.model, run.anchor_model):
            anchor_logp = None
            if run.anchor_model is not None:
                with torch.no_grad():
                    anchor_logp = sequence_logprobs(run.anchor_model, *rows, temperature=T, top_p=cfg.top_p, top_k=cfg.top_k)
            loss, info, logp = _pool_loss(run, run.model, rows, reference_rows, credit, anchor_logp)
        if cfg.updates_per_batch > 1:  # the sampling policy's log-probs: this first forward, before any update
            kept.append((rows, reference_rows, credit, anchor_logp, logp.detach()))
        with clock("backward"):
            (loss * run.world / B).backward()  # x W/B: DDP averages over W ranks (global_mean_scale)
        if moments is not None:
            with clock("snr"):
                _add_prompt_gradients(run, moments, rows, reference_rows, credit, anchor_logp)
        info.update({"pool_value": _host_mean(value)} if value is not None else {})
        if obj.reference:
            info["beaten_frac"] = _host_mean(pools.scores > pools.reference_scores[:, None])
        for key, val in [("loss", float(loss.detach()) / B), ("reward", _host_mean(pools.rewards) * b / B),
                         ("score", _host_mean(pools.scores) * b / B), ("verifier_failures", failed),
                         *((info_metric(key), float(v) * b / B) for key, v in info.items())]:
            acc[key] = acc.get(key, 0.0) + val
    acc = reduce_metrics(acc, run.ctx)  # per-rank parts of global means -> their sum
    if acc["verifier_failures"] >= B * n:  # the same sum on every rank: all stop, before the update
        raise VerifierError(
            f"the training verifier failed on every one of the {B * n} samples of step {step} "
            f"({reason or 'on another rank'}), so every sample would get one stand-in score and the step would learn "
            "nothing from the verifier; fix it (bonft check-verifier tests one on a few samples) and continue "
            "with --resume from the last checkpoint")
    if kept:
        acc.update(_reuse(run, kept, acc["loss"], clock))
    acc["k"] = k
    if moments is not None:
        acc[GRAD_SNR] = moments.snr(run.ctx)
    return acc


def _reuse(run: Run, kept: list, loss: float, clock: Stopwatch) -> dict:
    """Updates 2..U of one sampled batch; the gradient of the last is left for the loop to apply.

    ``kept``: per micro-batch (rows, reference_rows, credit, anchor_logp, sampling_logp);
    ``loss``: the first update's (global) loss. -> the last update's loss and ratio monitors.
    """
    cfg, B, U = run.cfg, run.cfg.prompts_per_step, run.cfg.updates_per_batch
    clip = cfg.clip_ratio or None
    out: dict = {}
    for u in range(1, U):
        run.apply_update(loss, f" (update {u} of {U} on its sampled batch)")
        run.partial_step = True
        run.optimizer.zero_grad(set_to_none=True)
        part: dict = {}
        for rows, reference_rows, credit, anchor_logp, old in kept:
            b = credit.shape[0]
            with clock("forward"), chunked_tanh_gelu(run.model):
                mb_loss, info, _ = _pool_loss(run, run.model, rows, reference_rows, credit, anchor_logp,
                                              sampling_logp=old, clip_ratio=clip, ratio_level=cfg.ratio_level)
            with clock("backward"):
                (mb_loss * run.world / B).backward()
            for key, val in [("loss", float(mb_loss.detach()) / B),
                             *((info_metric(key), float(v) * b / B) for key, v in info.items() if key in _RATIO_INFO)]:
                part[key] = part.get(key, 0.0) + val
        out = reduce_metrics(part, run.ctx)
        loss = out["loss"]
    return out


_RATIO_INFO = ("ratio_ess", "clip_frac")  # what a reused update logs besides its loss


def _host_mean(a) -> float:
    """Mean of a host array in float64, summed as torch sums on the CPU: a run logs the same numbers on any device."""
    return float(torch.as_tensor(np.asarray(a), dtype=torch.float64).mean())


def _score(run: Run, prompts: list[str], texts: list[list[str]], references: list[str] | None,
           seeds: list[int]) -> tuple[Pools, int, str]:
    """Score the pools -> host float64 :class:`Pools`, the verifier's failure count and its first failure's reason
    ("" when none failed); placebo-shuffled if asked."""
    cfg, n = run.cfg, len(texts[0])
    v = score_batch(run.verifiers["train"], [p for p in prompts for _ in range(n)], [s for row in texts for s in row])
    scores = np.asarray(v.scores, dtype=np.float64).reshape(len(prompts), n)  # row b*n + i is sample i of prompt b
    rewards = (scores if cfg.reward_source == "scores" or v.rewards is None
               else np.asarray(v.rewards, np.float64).reshape(scores.shape))
    answers = None
    if OBJECTIVES[cfg.objective].answers:  # vote objectives: a failed extraction votes alone (a key of its own)
        extract = answer_reader(run.task.extract_answer)  # a response that makes it raise: a missing answer
        answers = np.array([[str(a) if (a := extract(y)) is not None else f"\x00none{i}" for i, y in enumerate(row)]
                            for row in texts], dtype=object)
    if cfg.placebo:
        scores, rewards = shuffle_pools(seeds, scores, rewards)
        if answers is not None:  # the same permutation as scores and rewards (same seeds)
            (answers,) = shuffle_pools(seeds, answers)
    reference = None
    if references is not None:
        reference = np.asarray(score_batch(run.verifiers["train"], prompts, references).scores, dtype=np.float64)
    pools = Pools(scores=scores, rewards=rewards, correct=(rewards >= cfg.correct_threshold).astype(np.float64),
                  reference_scores=reference, answers=answers)
    return pools, v.n_failed, next((r for r, f in zip(v.reasons, v.failed) if f and r), "")


def _pool_loss(run: Run, model, rows: tuple, reference_rows: tuple | None, credit: torch.Tensor,
               anchor_logp: torch.Tensor | None, **reuse) -> tuple[torch.Tensor, dict, torch.Tensor]:
    """Summed loss of the prompts in ``rows`` (prompt_tokens, prompt_valid, response_tokens, response_valid).

    ``reuse``: ``sampling_logp``, ``clip_ratio``, ``ratio_level`` for a reused batch (none: on-policy).
    -> loss, info, the (b, n, T) log-probs of the responses.
    """
    cfg = run.cfg
    # log-probs of the policy that drew the samples: same temperature, top-k and top-p
    logp = sequence_logprobs(model, *rows, temperature=cfg.temperature, top_p=cfg.top_p, top_k=cfg.top_k)
    ref_lp = ref_mask = None
    if reference_rows is not None:  # (b, 1, T) -> (b, T): the reference response
        ref_lp, ref_mask = sequence_logprobs(model, *reference_rows)[:, 0], reference_rows[3][:, 0]
    loss, info = policy_loss(logp, credit, mask=rows[3], token_reduction=cfg.token_reduction,
                             anchor_logprobs=anchor_logp, anchor_weight=cfg.anchor_weight,
                             reference_logprobs=ref_lp, reference_mask=ref_mask, **reuse)
    return loss, info, logp


def _add_prompt_gradients(run: Run, moments: GradientMoments, rows: tuple, reference_rows: tuple | None,
                          credit: torch.Tensor, anchor_logp: torch.Tensor | None) -> None:
    """Each prompt's own gradient of its loss term (one forward + backward per prompt) into ``moments``.

    Through the plain model with ``autograd.grad``: the parameters' ``.grad`` (the step's) stay untouched.
    """
    params = [p for p in run.module.parameters() if p.requires_grad]

    def one(x, j):
        return tuple(r[j:j + 1] for r in x) if x is not None else None

    for j in range(credit.shape[0]):
        anchor_j = anchor_logp[j:j + 1] if anchor_logp is not None else None
        with chunked_tanh_gelu(run.module):
            loss, _, _ = _pool_loss(run, run.module, one(rows, j), one(reference_rows, j), credit[j:j + 1], anchor_j)
        moments.add(torch.autograd.grad(loss, params, allow_unused=True, materialize_grads=True))
