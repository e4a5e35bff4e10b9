"""A toy policy-gradient run sharded by prompt over the ranks of a process group (or one process).

python toy_ddp.py OUT.pt   (under a launcher's RANK / WORLD_SIZE / ... environment)

Each of B "prompts" has a feature vector and n fixed "responses" (actions) with
rewards; the policy is a 2-layer MLP, the loss bonft's leave-one-out REINFORCE
with reduction="sum" times global_mean_scale. Rank 0 writes the final weights
of two runs: with the right constant (W/B) and with 1/B (DDP would then halve
every step), plus every rank's first draw from its derive_seed generator.
"""
import sys

import torch

from bonft.objectives.losses import reinforce_loss
from bonft.trainer.distributed import (
    all_gather_objects,
    derive_seed,
    global_mean_scale,
    init_from_env,
    shard_prompts,
    shutdown,
    unwrap_model,
    wrap_model,
)

B, N, F, A, STEPS, LR = 8, 4, 6, 5, 5, 0.5


def make_data():
    g = torch.Generator().manual_seed(1234)
    x = torch.randn(B, F, generator=g)  # (B, F): one feature vector per prompt
    actions = torch.randint(0, A, (B, N), generator=g)  # (B, n): the n responses of each prompt
    rewards = torch.rand(B, N, generator=g)  # (B, n)
    return x, actions, rewards


def make_model():
    torch.manual_seed(0)
    return torch.nn.Sequential(torch.nn.Linear(F, 16), torch.nn.Tanh(), torch.nn.Linear(16, A))


def run(ctx, scale_mode="right"):
    x, actions, rewards = make_data()
    # this rank's prompts; a prompt's n rows move together (here rows are prompts, pool_size=1)
    x, actions, rewards = (shard_prompts(t, rank=ctx.rank, world_size=ctx.world_size) for t in (x, actions, rewards))
    model = wrap_model(make_model(), ctx)
    opt = torch.optim.SGD(model.parameters(), lr=LR)
    scale = global_mean_scale(global_count=B, world_size=ctx.world_size)
    if scale_mode == "wrong":
        scale = 1.0 / B  # the constant one would write without thinking of DDP's averaging
    for _ in range(STEPS):
        opt.zero_grad()
        logp = torch.log_softmax(model(x), -1).gather(-1, actions)  # (b, A) -> (b, n)
        loss = reinforce_loss(logp, rewards, baseline="loo", reduction="sum")
        (loss * scale).backward()
        opt.step()
    return {k: v.detach().clone() for k, v in unwrap_model(model).state_dict().items()}


if __name__ == "__main__":
    ctx = init_from_env(device="cpu", timeout_s=20)
    right, wrong = run(ctx, "right"), run(ctx, "wrong")
    g = torch.Generator().manual_seed(derive_seed(7, step=3, rank=ctx.rank))
    draws = all_gather_objects(float(torch.rand(1, generator=g)), ctx)
    if ctx.is_main:
        torch.save({"right": right, "wrong": wrong, "draws": draws, "world": ctx.world_size}, sys.argv[1])
    shutdown(ctx)
