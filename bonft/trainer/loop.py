"""The trainer: an optional supervised warm start, then RL on any best-of-N-aware objective.

One run is a sequence of global optimizer steps ``0 .. sft_steps + rl_steps - 1``::

    for step in steps:
        if step < sft_steps:   loss = NLL of reference responses                  (warm start)
        else:                  sample n per prompt -> score -> credit -> loss     (RL stage)
        loss.backward(); clip; optimizer.step()
        evaluate (pass@k, best-of-k under each verifier) / log / checkpoint when due

Everything random in a step is drawn from seeds derived from ``(seed, step, rank)``
(each prompt's samples from ``(seed, step, global slot of the prompt)``), so a run resumed from any checkpoint ends with the same weights as an
uninterrupted one (the optimizer state and the RNG states are in the checkpoint).

Under ``torchrun`` (see docs/scaling.md and :mod:`bonft.trainer.distributed`) the
trainer joins the process group, wraps the model in DDP and gives each rank a
contiguous block of whole prompts of the same global batch (a prompt's n
samples never leave its rank). Each prompt samples from a seed of its global
slot, losses use ``reduction="sum"`` times ``W / B`` (DDP averages gradients
over W ranks), logged numbers are reduced over ranks, and evaluation pools are
gathered on rank 0: W processes end with the weights one process ends with.
Only rank 0 writes; every rank resumes from the checkpoint rank 0 picks.

Caution: the RL stage optimises what the training verifier rewards. A proxy or
a user verifier that can be gamed (length, format, keywords) will be gamed;
compare best-of-k under the verifier with pass@k under true rewards (the
evaluation prints both). Verifiers that execute model-written code must run it
in a sandbox (see :mod:`bonft.verifiers`) and, better, in a disposable VM.
"""
from __future__ import annotations

import json
import math
import time

import torch

from .config import TrainConfig, to_toml
from .steps import (  # noqa: F401  (re-exported: the loop's parts)
    Run, _make_optimizer, _prompt_batch, build_run, dist_info, encode_pairs, evaluate_run, k_at, lr_at,
    quiet_transformers, rl_step, sft_step, step_seed,
)


# ----------------------------------------------------------------------------- the loop
def train(cfg: TrainConfig, *, resume: bool = False, progress: bool = True) -> dict:
    """Run (or resume) a training run; returns the summary also written to ``OUT/summary.json``.

    Ctrl-C writes a checkpoint of the last completed step before re-raising ``KeyboardInterrupt``.
    """
    from tqdm.auto import tqdm

    from .checkpoint import latest_checkpoint, load_state, save_checkpoint, set_rng_state
    from .distributed import barrier, broadcast_object, check_divisible, shutdown, step_guard, wrap_model
    from .models import load_model, save_model

    if not isinstance(cfg, TrainConfig):
        raise TypeError(f"cfg must be a TrainConfig, got {type(cfg).__name__}")
    torch.set_num_threads(cfg.threads)
    owns_group = not torch.distributed.is_initialized()
    run = build_run(cfg)
    if cfg.rl_steps:  # whole prompts, equal shares, equal micro-batches on every rank
        share = check_divisible("prompts_per_step", cfg.prompts_per_step, run.world)
        if share % cfg.grad_accum:
            raise ValueError(f"prompts_per_step must be divisible by world_size * grad_accum (world_size={run.world}, "
                             f"grad_accum={cfg.grad_accum}), got prompts_per_step={cfg.prompts_per_step}")
    if cfg.sft_steps:
        check_divisible("sft_batch_size", cfg.sft_batch_size, run.world)
    out, total = run.out, cfg.total_steps
    metrics_path = out / "metrics.jsonl"
    start, state, ckpt, problem = 0, None, None, None
    if run.is_main:  # rank 0 decides; every rank resumes from (or refuses) the same checkpoint
        ckpt = latest_checkpoint(out) if resume else None
        if resume and ckpt is None and (out / "summary.json").exists():
            problem = f"--resume: {out} holds a finished run without checkpoints"
        elif not resume and (out / "checkpoints").exists():
            problem = f"run_dir {str(out)!r} already holds checkpoints; pass --resume or choose another --out"
    ckpt, problem = broadcast_object((ckpt, problem), run.ctx)
    if problem:
        raise ValueError(problem)
    if ckpt is not None:
        state = load_state(ckpt)
        start = state["step"]
        with quiet_transformers():
            run.model, run.tokenizer = load_model(ckpt, device=run.device)
    run.ddp = wrap_model(run.model, run.ctx)  # several ranks: DDP (copies rank 0's weights to all); else the model
    if run.is_main:
        out.mkdir(parents=True, exist_ok=True)
        (out / "config.toml").write_text(to_toml(cfg))
        kept = []
        if ckpt is not None and metrics_path.exists():  # drop lines of work after the checkpoint (it is redone)
            kept = [ln for ln in metrics_path.read_text().splitlines() if ln and json.loads(ln)["step"] <= start]
        metrics_path.write_text("".join(ln + "\n" for ln in kept))

    def log(rec: dict) -> None:
        if run.is_main:
            with open(metrics_path, "a") as fh:
                fh.write(json.dumps(rec) + "\n")

    def stage_of(s: int) -> str:
        return "sft" if s < cfg.sft_steps else "rl"

    def enter_stage(s: int, opt_state: dict | None) -> None:
        run.optimizer = _make_optimizer(run)
        if opt_state is not None:
            run.optimizer.load_state_dict(opt_state)
        if stage_of(s) == "rl" and cfg.anchor_weight > 0:  # reference = the policy at the start of RL, kept on disk
            ref_dir = out / "rl_start"
            if not (ref_dir / "model").is_dir():
                if run.is_main:
                    save_model(run.model, run.tokenizer, ref_dir)
            barrier(run.ctx, what=f"waiting for rank 0 to write {ref_dir}")
            with quiet_transformers():
                run.anchor_model, _ = load_model(ref_dir, device=run.device)
            run.anchor_model.requires_grad_(False)

    same_stage = state is not None and state["extra"].get("stage") == stage_of(start) and start < total
    enter_stage(start, state["optimizer"] if same_stage else None)
    if state is not None:
        set_rng_state(state["rng"])

    def save(s: int) -> None:
        if run.is_main:
            save_checkpoint(out, step=s, model=run.model, tokenizer=run.tokenizer, optimizer=run.optimizer,
                            config_toml=to_toml(cfg), extra={"stage": stage_of(s - 1) if s else "sft"},
                            keep=cfg.keep_checkpoints)

    def eval_due(s: int) -> bool:
        if s == total:
            return True
        if cfg.rl_steps == 0 or s < cfg.sft_steps:
            return False
        if s == cfg.sft_steps:
            return cfg.eval_at_start
        return bool(cfg.eval_every) and (s - cfg.sft_steps) % cfg.eval_every == 0

    reports = []

    def do_eval(s: int) -> None:
        rep = evaluate_run(run, s)  # every rank samples its share; the report is rank 0's
        if rep is None:
            return
        reports.append(rep)
        log({"kind": "eval", **rep.to_dict()})
        if progress and run.is_main:
            tqdm.write(f"[eval @ step {s}]\n{rep.table()}")

    if start == 0 and eval_due(0) and total > 0:
        do_eval(0)
    bar = tqdm(total=total, initial=start, desc=cfg.name, disable=not (progress and run.is_main), dynamic_ncols=True)
    s, in_update = start, False
    try:
        while s < total:
            if s == cfg.sft_steps and s > start:  # warm start done: fresh optimizer for the RL stage
                enter_stage(s, None)
            torch.manual_seed(step_seed(cfg.seed, s, run.rank, stream=3))  # anything else random in the step
            for g in run.optimizer.param_groups:
                g["lr"] = lr_at(cfg, s)
            run.model.train()
            run.optimizer.zero_grad(set_to_none=True)
            t0 = time.perf_counter()
            with step_guard(run.ctx, step=s + 1, run_dir=out):  # a peer lost mid-step -> PeerError
                rec = sft_step(run, s) if s < cfg.sft_steps else rl_step(run, s)
            # gradients are already the global-batch mean here (DDP averaged them in backward)
            if cfg.clip_grad_norm > 0:
                rec["grad_norm"] = float(torch.nn.utils.clip_grad_norm_(run.model.parameters(), cfg.clip_grad_norm))
            in_update = True  # an interrupt inside optimizer.step() leaves half-updated weights: do not save those
            run.optimizer.step()
            s += 1
            in_update = False
            run.model.eval()
            rec.update({"kind": "train", "stage": stage_of(s - 1), "step": s, "lr": lr_at(cfg, s - 1),
                        "time/step": time.perf_counter() - t0})
            if not math.isfinite(rec["loss"]):
                save(s - 1) if s - 1 > start else None
                raise ValueError(f"the loss is not finite at step {s} ({rec['loss']}); lower lr (now {rec['lr']:.3g}) or check the verifier")
            if s % cfg.log_every == 0 or s == total or s == cfg.sft_steps:
                log(rec)
            bar.update(1)
            bar.set_postfix({key: f"{rec[key]:.3g}" for key in ("loss", "reward", "k") if key in rec}, refresh=False)
            if eval_due(s):
                do_eval(s)
            if s == total or s == cfg.sft_steps or (cfg.save_every and s % cfg.save_every == 0):
                save(s)
    except KeyboardInterrupt:
        bar.close()
        if s > start and not in_update:
            save(s)
            if run.is_main:
                print(f"\ninterrupted: checkpoint of step {s} written to {out}/checkpoints; continue with --resume")
        raise
    bar.close()
    summary = {"name": cfg.name, "steps": total, "run_dir": str(out),
               "evaluations": [r.to_dict() for r in reports] if reports else []}
    if run.is_main:
        # keep evaluations from before a resume too: they are in metrics.jsonl
        evals = [json.loads(ln) for ln in metrics_path.read_text().splitlines() if ln and '"kind": "eval"' in ln]
        summary["evaluations"] = evals
        (out / "summary.json").write_text(json.dumps(summary, indent=1))
        if cfg.plots and evals:
            from ..viz import plot_evaluations

            plot_evaluations(evals, out / "curves.png", title=cfg.name)
        if progress:
            print(f"{cfg.name}: {total} steps done; metrics, checkpoints and summary.json in {out}")
    if owns_group:
        shutdown(run.ctx)
    return summary
