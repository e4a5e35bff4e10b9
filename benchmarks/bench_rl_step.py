"""One whole RL step: bonft's trainer step against the plain loop a user would write, same model and prompts.

The plain loop (:func:`plain_step`) is what one writes with transformers and torch alone:
``model.generate(do_sample=True, top_k=0, top_p=1.0, num_return_sequences=n)`` (``top_k=0``:
generate's default keeps only the top 50 tokens, and full-softmax log-probs of such samples are
off-policy), the same verifier on the decoded texts, the leave-one-out credit in torch (Kool et al.
2019), one forward over the ``[prompt ; response]`` rows for the token log-probs (position ids from
the attention mask, so left padding changes nothing), the masked loss, backward and an AdamW step.
bonft's side is the trainer's own step (``bonft.trainer.loop._one_step``: lr, sample -> score ->
credit -> forward -> loss -> backward, finite check, clipping, AdamW step) with
``objective="reinforce"`` (the same leave-one-out credit), no anchor and no SNR measurement, so
both do the same work. Each side trains its own copy of the same initial weights with AdamW at
the same lr on the same prompts (the trainer's batch draw); one torch thread; the two steps
alternate and the medians are compared. Reported: samples/s and the split (sampling, scoring,
credit, forward, backward, optimizer; bonft's from the times the trainer logs for every step).

Shapes (goal: bonft >= 1.5x the plain loop's samples/s on both):
* the demo's RL step: 64 prompts x 32 samples, 4 new tokens, the demo's tiny GPT-2 (2 x 128);
* a larger one: a 6 x 384 GPT-2, 16 prompts x 16 samples x 32 new tokens.

Process state: the trainer raises glibc's mmap threshold (``bonft.trainer.memory``), so that a
step's large tensors are reused rather than page-faulted in again at every step; the benchmark
does the same at the start (both sides run in this one process and share it), or not with
``--default-malloc`` (then every large tensor of both sides costs page faults).

Run: python benchmarks/bench_rl_step.py [--reps 5] [--shape demo|large|both] [--default-malloc]
The load average is printed with the results.
"""
from __future__ import annotations

import argparse
import copy
import os
import statistics
import tempfile
import time

import torch
from transformers.utils import logging as hf_logging

from bonft.trainer.config import from_dict
from bonft.trainer.loop import _one_step
from bonft.trainer.memory import keep_freed_memory
from bonft.trainer.run import build_run, make_optimizer, prompt_batch
from bonft.verifiers.scoring import score_batch

PARTS = ("sample", "score", "credit", "forward", "backward", "optimizer")
SHAPES = {
    "demo": dict(prompts_per_step=64, n=32, max_new_tokens=4),  # the demo's tiny model (TrainConfig defaults)
    "large": dict(prompts_per_step=16, n=16, max_new_tokens=32, layers=6, width=384, heads=6, max_positions=160),
}


def plain_step(model, opt, tokenizer, verifier, prompts: list[str], *, n: int, max_new_tokens: int,
               temperature: float) -> dict:
    """The loop a user writes with transformers' generate; returns the seconds of each part."""
    t = {}
    t0 = time.perf_counter()
    enc = tokenizer(prompts, return_tensors="pt", padding=True)  # left padding (the tokenizer's side)
    model.eval()
    with torch.no_grad():
        out = model.generate(**enc, do_sample=True, top_k=0, top_p=1.0, temperature=temperature,
                             max_new_tokens=max_new_tokens, num_return_sequences=n,
                             pad_token_id=tokenizer.pad_token_id, eos_token_id=tokenizer.eos_token_id)
    P = enc["input_ids"].shape[1]
    resp = out[:, P:]  # (B*n, T) responses; row b*n + j is sample j of prompt b
    t1 = time.perf_counter()
    t["sample"] = t1 - t0
    texts = tokenizer.batch_decode(resp, skip_special_tokens=True)
    v = score_batch(verifier, [p for p in prompts for _ in range(n)], texts)
    t2 = time.perf_counter()
    t["score"] = t2 - t1
    R = torch.tensor(v.scores, dtype=torch.float32).view(len(prompts), n)
    others = (R.sum(-1, keepdim=True) - R) / (n - 1)  # leave-one-out baseline
    credit = (R - others) / n
    t3 = time.perf_counter()
    t["credit"] = t3 - t2
    model.train()
    attn = torch.cat([enc["attention_mask"].repeat_interleave(n, 0), torch.ones_like(resp)], dim=1)
    pos = (attn.cumsum(-1) - 1).clamp(min=0)
    T = resp.shape[1]  # logits of the last T + 1 positions only: the ones that predict response tokens
    logits = model(input_ids=out, attention_mask=attn, position_ids=pos, logits_to_keep=T + 1).logits[:, :-1]
    lp = torch.log_softmax(logits.float() / temperature, -1).gather(-1, resp[..., None])[..., 0]  # (B*n, T)
    eos = resp == tokenizer.eos_token_id
    mask = ((eos.cumsum(-1) - eos.long()) == 0).to(lp.dtype)  # tokens up to and including the first EOS
    seq = (lp * mask).sum(-1).view(len(prompts), n)
    loss = -(credit * seq).sum(-1).mean()
    t4 = time.perf_counter()
    t["forward"] = t4 - t3
    loss.backward()
    t5 = time.perf_counter()
    t["backward"] = t5 - t4
    opt.step()
    opt.zero_grad(set_to_none=True)
    t["optimizer"] = time.perf_counter() - t5
    t["step"] = time.perf_counter() - t0
    return t


def bench(shape: str, reps: int) -> dict:
    torch.manual_seed(0)
    with tempfile.TemporaryDirectory() as d:
        cfg = from_dict(dict(task="refunds", objective="reinforce", k=1, optimizer="adamw", lr=1e-4, warmup_steps=0,
                             anchor_weight=0.0, snr_every=0, clip_grad_norm=0.0, rl_steps=reps + 2,
                             train_prompts=256, heldout_prompts=16, run_dir=d, **SHAPES[shape]))
        run = build_run(cfg)
    run.optimizer = make_optimizer(run, "rl")
    model = copy.deepcopy(run.model)  # the plain loop's copy of the same initial weights
    opt = torch.optim.AdamW(model.parameters(), lr=cfg.lr)
    B, n = cfg.prompts_per_step, cfg.n

    def prompts_of(step):
        return [run.train[i].prompt for i in prompt_batch(cfg, step, B, len(run.train), 0, 1)]

    ours, plain = [], []
    _one_step(run, "rl", 0)  # warm-up, both
    plain_step(model, opt, run.tokenizer, run.verifiers["train"], prompts_of(0), n=n,
               max_new_tokens=cfg.max_new_tokens, temperature=cfg.temperature)
    for s in range(1, reps + 1):
        rec = _one_step(run, "rl", s)
        ours.append({k[5:]: v for k, v in rec.items() if k.startswith("time/")})
        plain.append(plain_step(model, opt, run.tokenizer, run.verifiers["train"], prompts_of(s), n=n,
                                max_new_tokens=cfg.max_new_tokens, temperature=cfg.temperature))
    med = {side: {k: statistics.median(r[k] for r in rows) for k in ("step", *PARTS)}
           for side, rows in (("bonft", ours), ("plain", plain))}
    print(f"== {shape}: {B} prompts x {n} samples x {cfg.max_new_tokens} new tokens, GPT-2 {cfg.layers} x {cfg.width} "
          f"({sum(p.numel() for p in model.parameters()) / 1e6:.2f} M weights), medians of {reps} alternating steps, "
          f"{torch.get_num_threads()} thread(s)")
    print(f"  {'':8s} {'s/step':>8s} {'samples/s':>10s}  " + "  ".join(f"{p:>9s}" for p in PARTS))
    for side in ("bonft", "plain"):
        m = med[side]
        print(f"  {side:8s} {m['step']:8.3f} {B * n / m['step']:10.0f}  "
              + "  ".join(f"{m[p]:6.3f} s" for p in PARTS))
        print(f"  {'':8s} {'':8s} {'':10s}  " + "  ".join(f"{100 * m[p] / m['step']:7.1f}% " for p in PARTS))
    ratio = med["plain"]["step"] / med["bonft"]["step"]
    print(f"  bonft / plain loop samples/s = {ratio:.2f}x (goal >= 1.5x: {'met' if ratio >= 1.5 else 'NOT met'}); "
          f"per part (plain / bonft): " + ", ".join(
              f"{p} {med['plain'][p] / med['bonft'][p]:.2f}x" for p in PARTS if med["bonft"][p] > 0))
    return med


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=5)
    ap.add_argument("--shape", choices=("demo", "large", "both"), default="both")
    ap.add_argument("--default-malloc", action="store_true", help="leave glibc's mmap threshold as it is")
    args = ap.parse_args()
    torch.set_num_threads(1)
    kept = False if args.default_malloc else keep_freed_memory()
    print(f"allocator: {'freed memory kept for reuse, as the trainer sets it' if kept else 'glibc default'}")
    hf_logging.set_verbosity_error()
    load0 = os.getloadavg()[0]
    for shape in (("demo", "large") if args.shape == "both" else (args.shape,)):
        bench(shape, args.reps)
    print(f"load average {load0:.2f} at the start, {os.getloadavg()[0]:.2f} at the end, on {os.cpu_count()} cores")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
