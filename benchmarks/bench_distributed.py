"""Throughput of RL steps (samples per second) on 1 and on 2 processes of this machine, and the ratio.

One RL step = sample n responses for each of the rank's prompts (one generator per
prompt slot) -> a reward -> leave-one-out REINFORCE loss -> backward through DDP
(gloo all-reduce) -> AdamW step, on a tiny GPT-2 built in code. The global
batch is the same at every world size, so the ratio is the speed-up of the same
optimisation, not of a bigger one.

Goal (ratio in this process family, same machine): 2 processes >= 1.3x the
samples/s of 1 process when 2 idle cores are available; each rank uses 1 thread.
On a machine where other jobs hold the cores the ratio says little: the load
average and CPU seconds are printed beside it.

Run: python benchmarks/bench_distributed.py [--quick] [--steps S] [--prompts B] [--n N]
"""
from __future__ import annotations

import argparse
import json
import os
import socket
import subprocess
import sys
import time

RESULT_TAG = "BENCH_RESULT "


def worker(args: argparse.Namespace) -> None:
    """One rank (or the only process): time ``args.steps`` RL steps after one warm-up step."""
    import torch

    torch.set_num_threads(1)
    from bonft.generation import sample, sequence_logprobs
    from bonft.objectives.losses import reinforce_loss
    from bonft.tasks import build_tokenizer
    from bonft.trainer.distributed import (
        global_mean_scale,
        init_from_env,
        prompt_seed,
        reduce_metrics,
        shard_bounds,
        shutdown,
        unwrap_model,
        wrap_model,
    )
    from bonft.trainer.models import build_tiny_model

    ctx = init_from_env(device="cpu", timeout_s=120)
    tok = build_tokenizer()
    model = build_tiny_model("gpt2", vocab_size=len(tok), layers=2, width=args.width, heads=4, max_positions=64,
                             seed=0, pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id,
                             bos_token_id=tok.bos_token_id)
    ddp = wrap_model(model, ctx)
    opt = torch.optim.AdamW(model.parameters(), lr=1e-3)
    B, n = args.prompts, args.n
    prompts = [f"{a}+{b}=" for a, b in zip(range(10, 10 + B), range(50, 50 + B))]
    start, stop = shard_bounds(B, rank=ctx.rank, world_size=ctx.world_size, name="--prompts")
    scale = global_mean_scale(global_count=B, world_size=ctx.world_size)

    def step(s: int) -> None:
        opt.zero_grad(set_to_none=True)
        mine = prompts[start:stop]
        smp = sample(unwrap_model(ddp), tok, mine, seeds=[prompt_seed(0, step=s, slot=j) for j in range(start, stop)],
                                n=n, temperature=1.0, max_new_tokens=args.max_new_tokens)
        rewards = torch.tensor([[float(any(c.isdigit() for c in t)) for t in row] for row in smp.texts])  # (b, n)
        logp = sequence_logprobs(ddp, smp.prompt_tokens, smp.prompt_valid, smp.response_tokens, smp.response_valid)
        loss = reinforce_loss(logp, rewards, baseline="loo", mask=smp.response_valid, reduction="sum")
        (loss * scale).backward()
        opt.step()

    step(0)  # warm-up: first DDP bucket set-up, allocator
    reduce_metrics({"sync": 0.0}, ctx)
    t0, c0 = time.perf_counter(), time.process_time()
    for s in range(1, args.steps + 1):
        step(s)
    reduce_metrics({"sync": 0.0}, ctx)  # everybody done
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    tot = reduce_metrics({"cpu": cpu, "wall_max": wall}, ctx, op="max")
    cpu_sum = reduce_metrics({"cpu": cpu}, ctx, op="sum")["cpu"]
    if ctx.is_main:
        samples = B * n * args.steps
        print(RESULT_TAG + json.dumps({"world": ctx.world_size, "wall_s": tot["wall_max"], "cpu_s": cpu_sum,
                                       "samples": samples, "samples_per_s": samples / tot["wall_max"]}), flush=True)
    shutdown(ctx)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def launch(world: int, argv: list[str]) -> dict:
    """Run ``world`` ranks of this script on 127.0.0.1 and return rank 0's result line."""
    port = free_port()
    procs = []
    for r in range(world):
        env = {**os.environ, "OMP_NUM_THREADS": "1"}
        if world > 1:
            env.update(RANK=str(r), WORLD_SIZE=str(world), LOCAL_RANK=str(r), MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port))
        procs.append(subprocess.Popen([sys.executable, __file__, "--worker", *argv], env=env, stdout=subprocess.PIPE,
                                      text=True))
    outs = [p.communicate()[0] for p in procs]
    if any(p.returncode for p in procs):
        raise SystemExit(f"a rank failed (exit codes {[p.returncode for p in procs]})")
    line = next(ln for ln in outs[0].splitlines() if ln.startswith(RESULT_TAG))
    return json.loads(line[len(RESULT_TAG):])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="fewer steps (a smoke run)")
    ap.add_argument("--steps", type=int, default=6)
    ap.add_argument("--prompts", type=int, default=16, help="global prompts per step (even)")
    ap.add_argument("--n", type=int, default=16, help="samples per prompt")
    ap.add_argument("--d-model", type=int, default=128)
    ap.add_argument("--max-new-tokens", type=int, default=8)
    ap.add_argument("--worker", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.quick:
        args.steps, args.prompts, args.n = 2, 8, 8
    if args.worker:
        return worker(args)
    argv = [f"--steps={args.steps}", f"--prompts={args.prompts}", f"--n={args.n}", f"--d-model={args.width}",
            f"--max-new-tokens={args.max_new_tokens}"]
    load0 = os.getloadavg()[0]
    one = launch(1, argv)
    two = launch(2, argv)
    load1 = os.getloadavg()[0]
    ratio = two["samples_per_s"] / one["samples_per_s"]
    print(f"global batch {args.prompts} prompts x n={args.n}, {args.steps} timed steps, width={args.width}, "
          f"{os.cpu_count()} cores, load average {load0:.1f} -> {load1:.1f}")
    for r in (one, two):
        print(f"  {r['world']} process(es): {r['samples_per_s']:8.1f} samples/s   wall {r['wall_s']:6.2f} s   "
              f"CPU {r['cpu_s']:6.2f} s (all ranks)")
    print(f"  ratio 2 vs 1 process: {ratio:.2f}x  (goal >= 1.3x with 2 idle cores; "
          f"{'MET' if ratio >= 1.3 else 'NOT MET'})")
    if load1 > (os.cpu_count() or 1):
        print("  note: the load average exceeds the core count; other jobs share these cores, so this ratio is not the speed-up")


if __name__ == "__main__":
    main()
