"""Cost of the losses against a hand-written leave-one-out REINFORCE, run in the same process.

1. Loss alone (forward + backward w.r.t. float32 token log-probs), B = 256
   prompts, n = 64 samples, T = 32 tokens, a ragged bool mask: every bonft
   loss against the five lines a user would otherwise write (the baseline,
   :func:`hand_written_loo`, below). Interleaved repetitions, medians.
   Goal: every loss <= 2x the baseline.
2. Share of a full training step (forward, backward and AdamW step of a tiny
   GPT-2 built from a config, on the B*n responses) taken by computing the
   credit. Goal: < 2%. Sampling the responses is not included; it would only
   make the share smaller.

Run: python benchmarks/bench_losses.py [--quick] [--no-step]
The load of the machine while it ran (``os.getloadavg``) is printed with the results. Wall and
CPU-time medians are both printed. With glibc's default allocator every fresh (B, n, T) tensor can
cost page faults that dominate the baseline's time; run with
``MALLOC_MMAP_THRESHOLD_=100000000 MALLOC_TRIM_THRESHOLD_=100000000`` to compare the compute alone.
"""
from __future__ import annotations

import argparse
import os
import time

import torch
from _timing import interleaved_medians

from bonft.objectives.credit import best_of_k_credit
from bonft.objectives.losses import (
    best_of_k_loss,
    best_of_k_sft_loss,
    nll_loss,
    pass_at_k_loss,
    policy_gradient_loss,
    reinforce_loss,
)


def hand_written_loo(lp, rewards, mask):
    """The baseline: leave-one-out REINFORCE in five lines (Kool et al. 2019)."""
    seq = (lp * mask).sum(-1)  # (B, n) sequence log-probs
    n = rewards.shape[1]
    others = (rewards.sum(-1, keepdim=True) - rewards) / (n - 1)  # mean reward of the other n-1
    credit = (rewards - others) / n
    return -(credit * seq).sum(-1).mean()


def loss_step(loss_fn, lp0):
    def run():
        lp = lp0.detach().requires_grad_(True)
        loss_fn(lp).backward()
    return run


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer repeats")
    ap.add_argument("--threads", type=int, default=1,
                    help="torch intra-op threads (default 1: small ops thrash when cores are shared)")
    ap.add_argument("--no-step", action="store_true", help="skip the training-step share (the slow part)")
    args = ap.parse_args(argv)
    torch.manual_seed(0)
    torch.set_num_threads(args.threads)
    B, n, T = 256, 64, 32
    reps = 7 if args.quick else 41
    load0 = os.getloadavg()

    lp0 = -torch.rand(B, n, T)  # float32 token log-probs, as a model would give
    lengths = torch.randint(4, T + 1, (B, n))
    mask = torch.arange(T)[None, None] < lengths[..., None]  # (B, n, T) ragged responses, bool
    scores_np = torch.randint(0, 8, (B, n)).double().numpy()  # few levels: many ties; host arrays, as verifiers give
    distinct_np = torch.randn(B, n).double().numpy()  # a reward model's scores: no ties
    rewards_np = (torch.rand(B, n) < 0.3).double().numpy()
    rewards = torch.from_numpy(rewards_np).float()
    expert_lp0 = -torch.rand(B, T)
    reference_scores = torch.randint(0, 8, (B,)).double().numpy()
    credit = best_of_k_credit(scores_np, rewards_np, k=4)

    base_name = "hand-written leave-one-out (baseline)"
    cases = {
        base_name: lambda lp: hand_written_loo(lp, rewards, mask),
        "reinforce_loss": lambda lp: reinforce_loss(lp, rewards_np, mask=mask),
        "policy_gradient_loss (given credit)": lambda lp: policy_gradient_loss(lp, credit, mask=mask),
        "best_of_k_loss k=4": lambda lp: best_of_k_loss(lp, scores_np, rewards_np, k=4, mask=mask),
        "best_of_k_loss k=64 (= n)": lambda lp: best_of_k_loss(lp, scores_np, rewards_np, k=64, mask=mask),
        "best_of_k_loss k=4, distinct scores": lambda lp: best_of_k_loss(lp, distinct_np, rewards_np, k=4, mask=mask),
        "pass_at_k_loss k=8": lambda lp: pass_at_k_loss(lp, rewards_np, k=8, mask=mask),
        "pass_at_k_loss k=8 plugin": lambda lp: pass_at_k_loss(lp, rewards_np, k=8, estimator="plugin", mask=mask),
        "best_of_k_sft_loss k=8": lambda lp: best_of_k_sft_loss(lp, scores_np, expert_lp0, reference_scores, k=8, mask=mask),
        "best_of_k_loss k=4, return_info": lambda lp: best_of_k_loss(lp, scores_np, rewards_np, k=4, mask=mask,
                                                               return_info=True)[0],
        "nll_loss (B*n rows)": lambda lp: nll_loss(lp.view(B * n, T), mask=mask.view(B * n, T)),
    }
    steps = {name: loss_step(fn, lp0) for name, fn in cases.items()}
    wall = interleaved_medians(steps, reps)
    cpu = interleaved_medians(steps, reps, clock=time.thread_time)  # steadier when the cores are shared
    load1 = os.getloadavg()
    print(f"loss alone, B={B} n={n} T={T} float32, forward+backward, medians of {reps} interleaved, "
          f"{torch.get_num_threads()} thread(s); load average {load0[0]:.2f} before, {load1[0]:.2f} after "
          f"on {os.cpu_count()} cores:")
    print(f"  {'':40s} {'wall':>8s}  {'ratio':>6s} {'CPU':>8s}  {'ratio':>6s}")
    worst = 0.0
    for name in cases:
        rw, rc = wall[name] / wall[base_name], cpu[name] / cpu[base_name]
        if name != base_name:
            worst = max(worst, rw, rc)
        print(f"  {name:40s} {wall[name] * 1e3:6.2f}ms  {rw:5.2f}x {cpu[name] * 1e3:6.2f}ms  {rc:5.2f}x")
    print(f"  worst ratio {worst:.2f}x (goal <= 2x): {'met' if worst <= 2 else 'NOT met'}")

    if args.no_step:
        return 0
    # --- share of a training step -------------------------------------------
    from bonft.trainer.models import build_tiny_model

    vocab, width = 64, 64
    model = build_tiny_model("gpt2", vocab_size=vocab, layers=2, width=width, heads=2, max_positions=64,
                             bos_token_id=0, eos_token_id=0)
    opt = torch.optim.AdamW(model.parameters(), lr=1e-4)
    P, micro = 8, 16  # prompt length; prompts per micro-batch (gradient accumulation, as on a CPU)
    ids = torch.randint(0, vocab, (B, n, P + T))  # prompt + response tokens

    def micro_step(b0):
        x = ids[b0:b0 + micro].reshape(micro * n, P + T)  # (micro*n, P+T)
        logits = model(x).logits[:, P - 1: -1]  # predictions of the response tokens
        lp = torch.log_softmax(logits, -1).gather(-1, x[:, P:, None])[..., 0]  # (micro*n, T)
        loss = best_of_k_loss(lp.view(micro, n, T), scores_np[b0:b0 + micro], rewards_np[b0:b0 + micro], k=4,
                           mask=mask[b0:b0 + micro], reduction="sum")
        (loss / B).backward()  # accumulate the mean over all B prompts

    def train_step():
        opt.zero_grad()
        for b0 in range(0, B, micro):
            micro_step(b0)
        opt.step()

    train_step()  # warm-up
    t0 = time.perf_counter()
    train_step()
    t_step = time.perf_counter() - t0
    t_credit = interleaved_medians({"credit": lambda: best_of_k_credit(scores_np, rewards_np, k=4)}, reps)["credit"]
    share = t_credit / t_step
    print(f"training step, tiny GPT-2 (width {width}, 2 layers) on B*n={B * n} responses of T={T} "
          f"({B // micro} micro-batches of {micro} prompts):")
    print(f"  full step {t_step * 1e3:9.1f} ms, credit {t_credit * 1e3:6.2f} ms -> share {100 * share:.3f}% "
          f"(goal < 2%): {'met' if share < 0.02 else 'NOT met'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
