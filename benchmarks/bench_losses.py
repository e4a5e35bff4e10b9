"""Cost of best-of-k credit and losses, as ratios against baselines run in the same process.

1. Loss alone (forward + backward w.r.t. token log-probs), B = 256 prompts,
   n = 64 samples, T = 32 tokens: bon_rl_loss / pass_at_k_loss / bon_sft_loss
   versus leave-one-out REINFORCE (reinforce_loss) on the same log-probs.
   Goal: <= 1.5x.
2. Share of a full training step (forward, backward and AdamW step of a tiny
   GPT-2 built from a config, on the B*n responses) taken by computing the
   credit. Goal: < 2%. Sampling the responses is not included; it would only
   make the share smaller.

Run: python benchmarks/bench_losses.py [--quick]
"""
from __future__ import annotations

import argparse
import time

import torch

from bonft.credit import bon_credit
from bonft.losses import bon_rl_loss, bon_sft_loss, pass_at_k_loss, reinforce_loss


def best_time(fn, repeats: int) -> float:
    """Minimum wall time of `repeats` calls (after one warm-up call)."""
    fn()
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def interleaved_best(fns: dict, repeats: int) -> dict:
    """Best time of each function, calling them in turn so that load spikes hit all alike."""
    for fn in fns.values():
        fn()  # warm-up
    best = {name: float("inf") for name in fns}
    for _ in range(repeats):
        for name, fn in fns.items():
            t0 = time.perf_counter()
            fn()
            best[name] = min(best[name], time.perf_counter() - t0)
    return best


def loss_step(loss_fn, lp0):
    def run():
        lp = lp0.detach().requires_grad_(True)
        loss, _ = loss_fn(lp)
        loss.backward()
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
    reps = 5 if args.quick else 40

    lp0 = -torch.rand(B, n, T)  # float32 token log-probs, as a model would give
    lengths = torch.randint(4, T + 1, (B, n))
    mask = torch.arange(T)[None, None] < lengths[..., None]  # (B, n, T) ragged responses
    scores = torch.randint(0, 8, (B, n)).float()  # few levels: many ties
    rewards = (torch.rand(B, n) < 0.3).float()
    expert_lp0 = -torch.rand(B, T)
    expert_scores = torch.randint(0, 8, (B,)).float()

    cases = {
        "reinforce_loss (leave-one-out baseline)": lambda lp: reinforce_loss(lp, rewards, mask=mask),
        "bon_rl_loss k=4": lambda lp: bon_rl_loss(lp, scores, rewards, k=4, mask=mask),
        "bon_rl_loss k=64 (= n)": lambda lp: bon_rl_loss(lp, scores, rewards, k=64, mask=mask),
        "pass_at_k_loss k=8": lambda lp: pass_at_k_loss(lp, rewards, k=8, mask=mask),
        "bon_sft_loss k=8": lambda lp: bon_sft_loss(expert_lp0, lp, scores, expert_scores, k=8, mask=mask),
    }
    times = interleaved_best({name: loss_step(fn, lp0) for name, fn in cases.items()}, reps)
    base = times.pop("reinforce_loss (leave-one-out baseline)")
    print(f"loss alone, B={B} n={n} T={T} (forward+backward, best of {reps}, interleaved):")
    print(f"  {'reinforce_loss (leave-one-out baseline)':40s} {base * 1e3:8.2f} ms   1.00x")
    worst = 0.0
    for name, t in times.items():
        worst = max(worst, t / base)
        print(f"  {name:40s} {t * 1e3:8.2f} ms   {t / base:4.2f}x")
    print(f"  worst ratio {worst:.2f}x (goal <= 1.5x): {'met' if worst <= 1.5 else 'NOT met'}")

    if args.no_step:
        return 0
    # --- share of a training step -------------------------------------------
    from transformers import GPT2Config, GPT2LMHeadModel

    cfg = GPT2Config(vocab_size=64, n_positions=64, n_embd=64, layers=2, heads=2, bos_token_id=0, eos_token_id=0)
    model = GPT2LMHeadModel(cfg)
    opt = torch.optim.AdamW(model.parameters(), lr=1e-4)
    P, micro = 8, 16  # prompt length; prompts per micro-batch (gradient accumulation, as on a CPU)
    ids = torch.randint(0, cfg.vocab_size, (B, n, P + T))  # prompt + response tokens

    def micro_step(b0):
        x = ids[b0:b0 + micro].reshape(micro * n, P + T)  # (micro*n, P+T)
        logits = model(x).logits[:, P - 1: -1]  # predictions of the response tokens
        lp = torch.log_softmax(logits, -1).gather(-1, x[:, P:, None])[..., 0]  # (micro*n, T)
        loss, _ = bon_rl_loss(lp.view(micro, n, T), scores[b0:b0 + micro], rewards[b0:b0 + micro], k=4,
                              mask=mask[b0:b0 + micro], reduction="sum")
        (loss / B).backward()  # accumulate the mean over all B prompts

    def train_step():
        opt.zero_grad()
        for b0 in range(0, B, micro):
            micro_step(b0)
        opt.step()

    step_reps = 1
    t_step = best_time(train_step, step_reps)
    t_credit = best_time(lambda: bon_credit(scores, rewards, 4), reps)
    share = t_credit / t_step
    print(f"training step, tiny GPT-2 (n_embd={cfg.n_embd}, 2 layers) on B*n={B * n} responses of T={T} "
          f"({B // micro} micro-batches of {micro} prompts):")
    print(f"  full step {t_step * 1e3:9.1f} ms, credit {t_credit * 1e3:6.2f} ms -> share {100 * share:.3f}% "
          f"(goal < 2%): {'met' if share < 0.02 else 'NOT met'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
