"""bonft.trainer.distributed: prompt sharding, the global loss constant, seeds, and real gloo process groups on 127.0.0.1.

Multi-process tests start their own ranks with subprocess (RANK / WORLD_SIZE /
MASTER_ADDR=127.0.0.1 / a free MASTER_PORT), so nothing listens beyond the
loopback interface. Wall-clock bounds below are hang guards (a dead peer must
not freeze the others), not speed goals.
"""
import os
import re
import signal
import socket
import subprocess
import sys
import time
from datetime import timedelta
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.distributed as dist
from hypothesis import given, settings
from hypothesis import strategies as st

from bonft.objectives.losses import reinforce_loss
from bonft.trainer.distributed import (
    DistContext,
    PeerError,
    all_gather_objects,
    barrier,
    broadcast_object,
    derive_seed,
    gather_objects,
    global_mean_scale,
    init_from_env,
    prompt_seed,
    reduce_metrics,
    shard_bounds,
    shard_prompts,
    shutdown,
    unwrap_model,
    wrap_model,
)

SCRIPTS = Path(__file__).parent / "dist_scripts"
sys.path.insert(0, str(SCRIPTS))
import toy_ddp  # noqa: E402  (tests/dist_scripts/toy_ddp.py)

LAUNCH_VARS = ("RANK", "WORLD_SIZE", "LOCAL_RANK", "MASTER_ADDR", "MASTER_PORT", "TORCHELASTIC_RUN_ID",
               "TORCHELASTIC_USE_AGENT_STORE")


# ----------------------------------------------------------------------------- launching ranks
def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def launch(script: str, ranks, world: int, *args, port: int | None = None, extra_env: dict | None = None):
    """Start the given ranks of a ``world``-rank group on 127.0.0.1; returns the Popen objects."""
    port = port or free_port()
    base = {k: v for k, v in os.environ.items() if k not in LAUNCH_VARS}
    procs = []
    for r in ranks:
        env = {**base, "RANK": str(r), "WORLD_SIZE": str(world), "LOCAL_RANK": str(r), "MASTER_ADDR": "127.0.0.1",
               "MASTER_PORT": str(port), "OMP_NUM_THREADS": "1", **(extra_env or {})}
        procs.append(subprocess.Popen([sys.executable, str(SCRIPTS / script), *map(str, args)], env=env,
                                      stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True))
    return procs


def finish(procs, limit: float) -> list[tuple[int, str, str]]:
    """Wait for every process (hang guard ``limit`` s each); kill leftovers; (returncode, stdout, stderr) each."""
    res = []
    try:
        for p in procs:
            try:
                out, err = p.communicate(timeout=limit)
            except subprocess.TimeoutExpired:
                pytest.fail(f"a rank was still running after {limit} s (hang)")
            res.append((p.returncode, out, err))
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
                p.communicate()
    return res


def wait_ready(flags: Path, ranks, procs, limit: float = 60.0) -> None:
    t0 = time.monotonic()
    while not all((flags / f"ready-{r}").exists() for r in ranks):
        for p in procs:
            if p.poll() is not None:
                pytest.fail(f"a rank exited before the run started: {p.communicate()[1][-2000:]}")
        if time.monotonic() - t0 > limit:
            pytest.fail(f"ranks not ready after {limit} s")
        time.sleep(0.05)


# ----------------------------------------------------------------------------- sharding by prompt
@settings(max_examples=60)
@given(world=st.integers(1, 9), per_rank=st.integers(0, 7), n=st.integers(1, 6))
def test_shards_keep_groups_whole_disjoint_and_cover_the_batch(world, per_rank, n):
    B = world * per_rank
    rows = np.repeat(np.arange(B), n)  # flat layout: row b*n + i belongs to prompt b
    shards = [shard_prompts(rows, rank=r, world_size=world, pool_size=n) for r in range(world)]
    owner = {}
    for r, sh in enumerate(shards):
        assert len(sh) == per_rank * n  # equal shares
        for b in np.unique(sh):
            assert b not in owner, f"prompt {b} on ranks {owner[b]} and {r}"
            owner[b] = r
            assert (sh == b).sum() == n  # all n samples of prompt b on rank r: the group is never split
    assert np.array_equal(np.concatenate(shards) if shards else rows, rows)  # union in order = the batch
    assert sorted(owner) == list(range(B))


@settings(max_examples=60)
@given(world=st.integers(2, 9), B=st.integers(0, 40))
def test_uneven_policy_refuses_by_default_and_balances_when_allowed(world, B):
    if B % world:
        with pytest.raises(ValueError, match=rf"n_prompts must be divisible by the world size \(world_size={world}\).*got n_prompts={B}"):
            shard_bounds(B, rank=0, world_size=world)
    bounds = [shard_bounds(B, rank=r, world_size=world, allow_uneven=True) for r in range(world)]
    sizes = [b - a for a, b in bounds]
    assert bounds[0][0] == 0 and bounds[-1][1] == B
    assert all(bounds[r][1] == bounds[r + 1][0] for r in range(world - 1))  # contiguous, disjoint
    assert max(sizes) - min(sizes) <= 1 and sizes == sorted(sizes, reverse=True)
    # same split as numpy's array_split (the reference for "first B % W parts one longer")
    assert sizes == [len(p) for p in np.array_split(np.arange(B), world)]


def test_shard_prompts_keeps_the_type_and_refuses_bad_input():
    t = torch.arange(12).reshape(6, 2)
    assert torch.equal(shard_prompts(t, rank=1, world_size=3), t[2:4])
    assert shard_prompts(list("abcdef"), rank=2, world_size=3) == ["e", "f"]
    with pytest.raises(ValueError, match=r"prompts_per_step must be divisible by the world size \(world_size=3\).*"
                                         r"got prompts_per_step=16; use e.g. 15 or 18"):
        shard_bounds(16, rank=0, world_size=3, name="prompts_per_step")
    with pytest.raises(ValueError, match=r"items must hold whole pools of pool_size=4 rows, got 6 rows"):
        shard_prompts(list(range(6)), rank=0, world_size=1, pool_size=4)
    with pytest.raises(ValueError, match=r"rank must be < world_size \(world_size=2\), got rank=2"):
        shard_bounds(4, rank=2, world_size=2)
    with pytest.raises(TypeError, match=r"items must be a list, tuple, numpy array or tensor, got str"):
        shard_prompts("abcd", rank=0, world_size=2)
    with pytest.raises(TypeError, match=r"world_size must be an int, got float 2.0"):
        shard_bounds(4, rank=0, world_size=2.0)


# ----------------------------------------------------------------------------- the global loss constant
@pytest.mark.parametrize("world", [1, 2, 4])
def test_averaged_rank_gradients_equal_the_full_batch_gradient(world):
    """W simulated ranks, gradients averaged as DDP does, equal autograd of the full-batch mean loss."""
    B, n = 8, 3
    g = torch.Generator().manual_seed(5)
    theta = torch.randn(B, n, generator=g, dtype=torch.float64, requires_grad=True)
    rewards = torch.rand(B, n, generator=g, dtype=torch.float64)
    # reference: Kool et al. 2019 eq. (8), (1/n) sum_i (R_i - mean_{j!=i} R_j) grad log p_i, mean over all B prompts
    base = (rewards.sum(1, keepdim=True) - rewards) / (n - 1)
    ref_loss = -((rewards - base) * torch.log_softmax(theta, 1)).mean(1).mean()
    (ref,) = torch.autograd.grad(ref_loss, theta)
    c = global_mean_scale(global_count=B, world_size=world)
    avg = torch.zeros_like(theta)
    for r in range(world):
        a, b = shard_bounds(B, rank=r, world_size=world)
        loss = reinforce_loss(torch.log_softmax(theta[a:b], 1), rewards[a:b], baseline="loo", reduction="sum")
        (gr,) = torch.autograd.grad(c * loss, theta)
        avg += gr / world  # DDP's all-reduce mean
    torch.testing.assert_close(avg, ref, rtol=0, atol=1e-12)
    assert global_mean_scale(global_count=8, world_size=4, grads="summed") == 1 / 8
    with pytest.raises(ValueError, match=r"grads must be one of \('averaged', 'summed'\), got 'mean'"):
        global_mean_scale(global_count=8, world_size=2, grads="mean")
    with pytest.raises(ValueError, match=r"global_count must be >= 1, got global_count=0"):
        global_mean_scale(global_count=0, world_size=2)


# ----------------------------------------------------------------------------- seeds
def test_seeds_are_numpy_seedsequence_reproducible_and_differ_by_rank_and_slot():
    # reference: numpy's SeedSequence documentation -- entropy list in, generate_state out
    want = int(np.random.SeedSequence([3, 10, 1, 0]).generate_state(2, np.uint64)[0] >> np.uint64(1))
    assert derive_seed(3, step=10, rank=1) == want
    by_rank = {derive_seed(3, step=10, rank=r) for r in range(64)}
    by_step = {derive_seed(3, step=s, rank=0) for s in range(64)}
    assert len(by_rank) == 64 and len(by_step) == 64
    slots = [prompt_seed(3, step=10, slot=j) for j in range(64)]
    assert len(set(slots)) == 64 and slots == [prompt_seed(3, step=10, slot=j) for j in range(64)]
    assert not set(slots) & by_rank  # prompt seeds are a stream of their own
    assert all(0 <= s < 2**63 for s in slots)
    with pytest.raises(ValueError, match=r"step must be >= 0, got step=-1"):
        derive_seed(0, step=-1)
    with pytest.raises(TypeError, match=r"slot must be an int, got float 1.0"):
        prompt_seed(0, step=0, slot=1.0)


# ----------------------------------------------------------------------------- one process, no group
def test_without_launcher_env_everything_is_a_no_op():
    ctx = init_from_env(device="cpu", env={})
    assert (ctx.enabled, ctx.rank, ctx.world_size, ctx.is_main, ctx.device.type) == (False, 0, 1, True, "cpu")
    m = torch.nn.Linear(2, 2)
    assert wrap_model(m, ctx) is m and unwrap_model(m) is m
    assert reduce_metrics({"b": 2, "a": 1.5}, ctx) == {"a": 1.5, "b": 2.0}
    assert gather_objects({"x": 1}, ctx) == [{"x": 1}] and all_gather_objects(3, ctx) == [3]
    assert broadcast_object("ckpt", ctx) == "ckpt"
    t = torch.ones(2)
    assert reduce_metrics({}, ctx) == {}
    barrier(ctx)
    shutdown(ctx)
    assert not dist.is_initialized() and torch.equal(t, torch.ones(2))


def test_bad_launcher_environment_is_named():
    good = {"RANK": "0", "WORLD_SIZE": "2", "MASTER_ADDR": "127.0.0.1", "MASTER_PORT": "29511"}
    with pytest.raises(ValueError, match=r"WORLD_SIZE must be an int >= 1, got WORLD_SIZE='two'"):
        init_from_env(device="cpu", env={**good, "WORLD_SIZE": "two"})
    with pytest.raises(ValueError, match=r"RANK must be < WORLD_SIZE \(WORLD_SIZE=2\), got RANK=2"):
        init_from_env(device="cpu", env={**good, "RANK": "2"})
    with pytest.raises(ValueError, match=r"RANK must be an int >= 0, got RANK=None"):
        init_from_env(device="cpu", env={"WORLD_SIZE": "2"})
    with pytest.raises(ValueError, match=r"MASTER_ADDR must name rank 0's host .* got nothing"):
        init_from_env(device="cpu", env={k: v for k, v in good.items() if k != "MASTER_ADDR"})
    with pytest.raises(ValueError, match=r"MASTER_PORT must be an int >= 1, got MASTER_PORT=None"):
        init_from_env(device="cpu", env={k: v for k, v in good.items() if k != "MASTER_PORT"})
    with pytest.raises(TypeError, match=r"env must be a mapping of environment variables, got list"):
        init_from_env(device="cpu", env=[("RANK", "0")])
    with pytest.raises(ValueError, match=r"timeout_s must be a finite number > 0, got timeout_s=0.0"):
        init_from_env(device="cpu", timeout_s=0, env={})
    assert init_from_env(device="cpu", env={"BONFT_DIST_TIMEOUT_S": "7.5"}).timeout_s == 7.5
    assert init_from_env(device="cpu", env={}).timeout_s == 60.0
    with pytest.raises(ValueError, match=r"BONFT_DIST_TIMEOUT_S must be a number of seconds, got 'soon'"):
        init_from_env(device="cpu", env={"BONFT_DIST_TIMEOUT_S": "soon"})
    with pytest.raises(ValueError, match=r"BONFT_DIST_TIMEOUT_S must be > 0, got '-1'"):
        init_from_env(device="cpu", env={"BONFT_DIST_TIMEOUT_S": "-1"})
    with pytest.raises(ValueError, match=r"device must be one of \('auto', 'cpu', 'cuda'\), got 'tpu'"):
        init_from_env(device="tpu", env={})
    assert not dist.is_initialized()


def test_a_one_rank_group_binds_its_store_to_loopback_only(monkeypatch):
    monkeypatch.setenv("GLOO_SOCKET_IFNAME", "lo")
    port = free_port()
    env = {"RANK": "0", "WORLD_SIZE": "1", "MASTER_ADDR": "127.0.0.1", "MASTER_PORT": str(port)}
    ctx = init_from_env(device="cpu", timeout_s=5, env=env)
    try:
        assert (ctx.enabled, ctx.backend, ctx.world_size, dist.is_initialized()) == (True, "gloo", 1, True)
        listening = set()
        for table in ("/proc/net/tcp", "/proc/net/tcp6"):
            if os.path.exists(table):  # Linux: local_address, state 0A = LISTEN (proc(5) man page)
                for line in Path(table).read_text().splitlines()[1:]:
                    local, state = line.split()[1], line.split()[3]
                    if state == "0A" and int(local.split(":")[1], 16) == port:
                        listening.add(local.split(":")[0])
        if listening:
            assert listening == {"0100007F"}, listening  # 127.0.0.1 only, not 0.0.0.0 / [::]
        assert str(ctx) == "rank 0/1 (local 0) on cpu, gloo"
    finally:
        shutdown(ctx)
    assert not dist.is_initialized()


def test_session_leaves_without_the_barrier_when_the_body_failed(monkeypatch):
    # on an error path the peers may never reach shutdown's barrier: session must not wait there
    import bonft.trainer.distributed as d
    import bonft.trainer.distributed.group as group

    calls = []
    monkeypatch.setattr(group, "shutdown", lambda ctx, **kw: calls.append(kw))
    monkeypatch.delenv("WORLD_SIZE", raising=False)
    with pytest.raises(KeyError):
        with d.session():
            raise KeyError("boom")
    with d.session():
        pass
    assert calls == [{"wait_for_peers": False}, {}]


# ----------------------------------------------------------------------------- real process groups
def reference_weights() -> dict:
    """One process, plain torch: full-batch mean of the leave-one-out REINFORCE loss (Kool et al. 2019)."""
    x, actions, rewards = toy_ddp.make_data()
    model = toy_ddp.make_model()
    opt = torch.optim.SGD(model.parameters(), lr=toy_ddp.LR)
    n = actions.shape[1]
    for _ in range(toy_ddp.STEPS):
        opt.zero_grad()
        logp = torch.log_softmax(model(x), -1).gather(-1, actions)  # (B, n)
        base = (rewards.sum(1, keepdim=True) - rewards) / (n - 1)
        (-((rewards - base) * logp).mean(1).mean()).backward()  # (1/n) sum_i, then mean over prompts
        opt.step()
    return model.state_dict()


def max_diff(a: dict, b: dict) -> float:
    assert a.keys() == b.keys()
    return max(float((a[k] - b[k]).abs().max()) for k in a)


def test_two_ranks_under_a_torchrun_style_agent_store_take_the_one_process_steps(tmp_path):
    """DDP toy: 2 processes (gloo) vs 1 process with the same global batch, to 1e-6 in float32."""
    # emulate torchrun's agent: it serves the store and tells workers TORCHELASTIC_USE_AGENT_STORE=True
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    sock.listen(16)
    port = sock.getsockname()[1]
    store = dist.TCPStore("127.0.0.1", port, None, True, timedelta(seconds=30), wait_for_workers=False,
                          master_listen_fd=sock.detach())
    out = tmp_path / "w2.pt"
    procs = launch("toy_ddp.py", [0, 1], 2, out, port=port, extra_env={"TORCHELASTIC_USE_AGENT_STORE": "True"})
    res = finish(procs, limit=60)
    del store
    assert [rc for rc, _, _ in res] == [0, 0], res[0][2][-3000:] + res[1][2][-3000:]
    got = torch.load(out)
    ref = reference_weights()
    assert got["world"] == 2
    assert max_diff(got["right"], ref) < 1e-6
    assert max_diff(toy_ddp.run(DistContext()), ref) < 1e-6  # the same script as one process
    assert max_diff(got["wrong"], ref) > 1e-3  # 1/B under DDP halves every SGD step: the check can fail
    # per-rank seeds: reproducible from (seed, step, rank), different across ranks
    for r in (0, 1):
        g = torch.Generator().manual_seed(derive_seed(7, step=3, rank=r))
        assert got["draws"][r] == float(torch.rand(1, generator=g))
    assert got["draws"][0] != got["draws"][1]


@pytest.mark.parametrize("victim,signal_name,message", [
    (1, "SIGKILL", r"Connection (closed|reset) by peer"),  # killed: its sockets close, noticed at the next collective
    (0, "SIGSTOP", "Timed out"),  # hung (and it hosts the store): noticed after timeout_s
])
def test_a_dead_or_hung_peer_makes_the_other_rank_fail_clearly(tmp_path, victim, signal_name, message):
    procs = launch("peer_loop.py", [0, 1], 2, 3, tmp_path)
    survivor = 1 - victim
    try:
        wait_ready(tmp_path, [0, 1], procs)
        os.kill(procs[victim].pid, getattr(signal, signal_name))
        try:
            _, err = procs[survivor].communicate(timeout=30)  # hang guard: timeout_s=3 plus slack
        except subprocess.TimeoutExpired:
            pytest.fail(f"rank {survivor} still running 30 s after rank {victim} got {signal_name}")
        assert procs[survivor].returncode != 0
        assert "PeerError" in err and f"rank {survivor} of 2" in err, err[-3000:]
        assert "a peer process probably died or stopped responding (process-group timeout 3 s)" in err
        assert re.search(message, err), err[-3000:]
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
            p.communicate()


def test_a_rank_whose_peers_never_come_fails_after_the_timeout():
    env = {"RANK": "1", "WORLD_SIZE": "2", "MASTER_ADDR": "127.0.0.1", "MASTER_PORT": str(free_port())}
    with pytest.raises(PeerError, match=r"rank 1 of 2: could not meet its peers at 127.0.0.1:\d+ within timeout_s=2 s"):
        init_from_env(device="cpu", timeout_s=2, env=env)  # rank 0 (the store host) never starts
    assert not dist.is_initialized()


# ----------------------------------------------------------------------------- sampling by prompt slot
@pytest.fixture(scope="module")
def tiny_lm():
    from bonft.tasks import build_tokenizer
    from bonft.trainer.models import build_tiny_model

    tok = build_tokenizer()
    model = build_tiny_model("gpt2", vocab_size=len(tok), layers=1, width=32, heads=2, max_positions=48, seed=0,
                             pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id)
    return model, tok


def test_a_prompts_samples_do_not_depend_on_the_other_prompts_in_the_call(tiny_lm):
    from bonft.generation import sample, sequence_logprobs

    model, tok = tiny_lm
    prompts = ["a+b=", "long prompt 12+30=", "x"]
    seeds = [prompt_seed(0, step=4, slot=j) for j in range(3)]
    kw = dict(n=5, temperature=1.3, max_new_tokens=6)
    full = sample(model, tok, prompts, seeds=seeds, **kw)
    # rank 1 of a 3-rank run holds slot 1 only; a reversed order must not change any prompt's draw either
    alone = sample(model, tok, prompts[1:2], seeds=seeds[1:2], **kw)
    rev = sample(model, tok, prompts[::-1], seeds=seeds[::-1], **kw)
    assert full.texts[1] == alone.texts[0] and rev.texts == full.texts[::-1]
    t = alone.response_tokens.shape[2]
    assert torch.equal(full.response_tokens[1, :, :t], alone.response_tokens[0])
    assert full.response_tokens.shape[:2] == (3, 5) and full.prompt_valid.sum(1).tolist() == [5, 19, 2]  # BOS + chars
    # the padded batch is a valid Samples: one training forward recomputes the sampler's log-probs
    lp = sequence_logprobs(model, full.prompt_tokens, full.prompt_valid, full.response_tokens, full.response_valid,
                           temperature=1.3)
    torch.testing.assert_close(lp, full.token_logprobs, rtol=0, atol=1e-5)
    assert len({tuple(r) for r in full.texts}) == 3  # different slots, different streams
    with pytest.raises(ValueError, match=r"seeds must hold one seed per prompt \(3 prompts\), got 2 seeds"):
        sample(model, tok, prompts, seeds=seeds[:2], **kw)
    with pytest.raises(TypeError, match=r"prompts must be a sequence of str, got a single str"):
        sample(model, tok, "a+b=", seeds=seeds[:1], **kw)


# ----------------------------------------------------------------------------- the trainer on 2 processes
# llama, not gpt2: GPT-2's key bias has an exactly zero true gradient (softmax ignores a shift shared by all
# keys), so Adam turns float round-off there into full-size steps that differ between any two summation orders.
# RL lr 1e-3 (the config default): Adam's first step moves a weight by lr * g / (|g| + eps), so a gradient
# that cancels to ~eps keeps float32 noise of order 1e-4 * lr (measured worst 1.4e-6 at lr=1e-2; it scales with lr).
# Hence warm_start_lr 3e-3 too: at 1e-2 the warm start's worst weight differed by 1.47e-6 once the prompt pass ran per prompt.
TRAIN_CFG = dict(
    arch="llama", layers=1, width=32, heads=2, max_positions=48, train_prompts=64, heldout_prompts=5, warm_start_steps=2, warm_start_batch_size=8,
    warm_start_lr=3e-3, rl_steps=2, prompts_per_step=4, n=4, k=2, lr=1e-3, eval_samples=4, eval_ks=[1, 4], n_boot=50,
    log_every=1, save_every=0, keep_checkpoints=2, max_new_tokens=6, plots=False, eval_at_start=False, threads=1,
    objective="pass_at_k", verifier="toy_verifier:digit_share", correct_threshold=0.2,  # varied rewards from step 1
)


def test_two_trainer_processes_end_with_the_one_process_weights(tmp_path, monkeypatch):
    """Warm start (NLL) then pass@k RL: 2 gloo ranks vs 1 process, same global batch and seed, to 1e-6."""
    import json

    from safetensors.torch import load_file

    from bonft.trainer.config import from_dict
    from bonft.trainer.loop import train

    monkeypatch.syspath_prepend(str(SCRIPTS))  # the toy verifier module, here and in the ranks
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join([str(SCRIPTS), os.environ.get("PYTHONPATH", "")]))
    two = {**TRAIN_CFG, "run_dir": str(tmp_path / "two")}
    (tmp_path / "two.json").write_text(json.dumps(two))
    procs = launch("train_ranks.py", [0, 1], 2, tmp_path / "two.json")  # runs while the 1-process run trains here
    train(from_dict({**TRAIN_CFG, "run_dir": str(tmp_path / "one")}), progress=False)
    res = finish(procs, limit=300)
    assert [rc for rc, _, _ in res] == [0, 0], res[0][2][-3000:] + res[1][2][-3000:]

    def weights(run: str, step: int) -> dict:
        return load_file(str(tmp_path / run / "checkpoints" / f"step-{step:08d}" / "model" / "model.safetensors"))

    for step in (2, 4):  # after the warm start (SFT stage), after the RL stage
        assert max_diff(weights("two", step), weights("one", step)) < 1e-6, step
    assert max_diff(weights("one", 4), weights("one", 2)) > 1e-4  # the RL steps moved the weights: not a vacuous match

    def lines(run: str) -> list:
        return [json.loads(ln) for ln in (tmp_path / run / "metrics.jsonl").read_text().splitlines()]

    one, two_ = lines("one"), lines("two")
    assert [r["kind"] for r in one] == [r["kind"] for r in two_] == ["train"] * 4 + ["eval"]
    for a, b in zip(one[:4], two_[:4]):  # logged numbers are global: reduced over the 2 ranks
        for key in ("loss", "grad/norm", "reward", "nll_per_token", "verifier_failures"):
            if key in a:
                assert b[key] == pytest.approx(a[key], rel=1e-5, abs=1e-6), key
    assert 0 < one[2]["reward"] < 1 and one[2]["grad/norm"] > 0  # the RL steps had a signal
    # evaluation: 5 held-out prompts split 3 + 2, pooled on rank 0, same report as one process
    ev1, ev2 = one[4], two_[4]
    assert ev2["n_prompts"] == ev1["n_prompts"] == 5
    assert ev2["pass_at_k"] == ev1["pass_at_k"] and ev2["mean_reward"] == pytest.approx(ev1["mean_reward"], abs=1e-12)
    assert sorted(p.name for p in (tmp_path / "two" / "checkpoints").iterdir()) == ["step-00000002", "step-00000004"]
    # rank 0 writes the final evaluation's samples of every rank's prompts: the one-process file
    assert (tmp_path / "two" / "heldout_samples.jsonl").read_text() == (tmp_path / "one" / "heldout_samples.jsonl").read_text()
    assert len((tmp_path / "one" / "heldout_samples.jsonl").read_text().splitlines()) == 5 * 4


def test_ranks_started_with_different_configurations_are_refused_naming_the_keys(tmp_path, monkeypatch):
    # a seed or a learning rate given to one rank only trained two different models under one run (rank 0 saves its
    # own; DDP copies the weights only at the start), and both ranks exited 0
    import json

    monkeypatch.setenv("PYTHONPATH", os.pathsep.join([str(SCRIPTS), os.environ.get("PYTHONPATH", "")]))
    cfg = {**TRAIN_CFG, "run_dir": str(tmp_path / "two")}
    (tmp_path / "a.json").write_text(json.dumps(cfg))
    (tmp_path / "b.json").write_text(json.dumps({**cfg, "seed": 1, "lr": 0.5}))
    port = free_port()
    procs = launch("train_ranks.py", [0], 2, tmp_path / "a.json", port=port)
    procs += launch("train_ranks.py", [1], 2, tmp_path / "b.json", port=port)
    res = finish(procs, limit=120)
    for rc, _, err in res:  # the same error on every rank, before the run directory is made
        assert rc != 0
        assert ("every rank must run the same configuration, but rank 1 of 2 differs from rank 0 in 2 key(s): "
                "seed = 0 on rank 0, 1 on rank 1; lr = 0.001 on rank 0, 0.5 on rank 1; start every rank with the same "
                "recipe") in err, err[-2000:]
    assert not (tmp_path / "two").exists()


def test_two_ranks_train_a_lora_adapter_as_one_process_does(tmp_path, monkeypatch):
    """A LoRA adapter (peft) on a user's base model, warm start then RL on 2 gloo ranks vs 1 process: the
    adapter weights agree to float32 round-off (DDP averages the adapter's gradients only; the frozen base
    has none) and the checkpoints hold the adapter alone. Reference: the one-process run, as above."""
    import json

    pytest.importorskip("peft")
    from safetensors.torch import load_file

    from bonft.tasks import build_tokenizer
    from bonft.trainer.config import from_dict
    from bonft.trainer.loop import train
    from bonft.trainer.models import build_tiny_model

    tok = build_tokenizer()
    base = build_tiny_model("llama", vocab_size=len(tok), layers=1, width=32, heads=2, max_positions=48, seed=0,
                            pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id)
    base.save_pretrained(str(tmp_path / "base"))
    tok.save_pretrained(str(tmp_path / "base"))
    monkeypatch.syspath_prepend(str(SCRIPTS))
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join([str(SCRIPTS), os.environ.get("PYTHONPATH", "")]))
    model_keys = ("arch", "layers", "width", "heads", "max_positions")
    cfg = {**{k: v for k, v in TRAIN_CFG.items() if k not in model_keys}, "start_from": str(tmp_path / "base"),
           "adapter_rank": 4}
    (tmp_path / "two.json").write_text(json.dumps({**cfg, "run_dir": str(tmp_path / "two")}))
    procs = launch("train_ranks.py", [0, 1], 2, tmp_path / "two.json")
    train(from_dict({**cfg, "run_dir": str(tmp_path / "one")}), progress=False)
    res = finish(procs, limit=300)
    assert [rc for rc, _, _ in res] == [0, 0], res[0][2][-3000:] + res[1][2][-3000:]

    def adapter(run: str, step: int) -> dict:
        return load_file(str(tmp_path / run / "checkpoints" / f"step-{step:08d}" / "model" / "adapter_model.safetensors"))

    one, two = adapter("one", 4), adapter("two", 4)
    assert sorted(one) == sorted(two) and len(one) > 0
    assert max_diff(two, one) < 1e-6
    lora_b = [k for k in one if "lora_B" in k]  # B starts at 0 (Hu et al. 2021): non-zero means it trained
    assert lora_b and max(float(one[k].abs().max()) for k in lora_b) > 1e-4
    assert not (tmp_path / "two" / "checkpoints" / "step-00000004" / "model" / "model.safetensors").exists()


def test_a_peer_killed_mid_step_is_named_with_the_step_and_the_intact_checkpoint(tmp_path, monkeypatch):
    """SIGKILL rank 1 while the trainer runs: rank 0 reports PeerError with rank 1, the step and the last checkpoint."""
    import json

    from bonft.trainer.checkpoint import verify_checkpoint

    monkeypatch.setenv("PYTHONPATH", os.pathsep.join([str(SCRIPTS), os.environ.get("PYTHONPATH", "")]))
    run = tmp_path / "run"
    cfg = {**TRAIN_CFG, "warm_start_steps": 0, "rl_steps": 500, "save_every": 1, "run_dir": str(run)}
    for key in ("warm_start_batch_size", "warm_start_lr"):  # read only with a warm start
        cfg.pop(key, None)
    (tmp_path / "cfg.json").write_text(json.dumps(cfg))
    procs = launch("train_ranks.py", [0, 1], 2, tmp_path / "cfg.json", extra_env={"BONFT_DIST_TIMEOUT_S": "10"})
    try:
        deadline = time.monotonic() + 120
        while not (run / "checkpoints" / "step-00000002").is_dir():
            if any(p.poll() is not None for p in procs) or time.monotonic() > deadline:
                pytest.fail(f"no checkpoint of step 2: {procs[0].communicate(timeout=5)[1][-2000:]}")
            time.sleep(0.02)
        os.kill(procs[1].pid, signal.SIGKILL)  # mid-run: rank 0 is sampling, in backward or in a reduction
        try:
            _, err = procs[0].communicate(timeout=60)  # hang guard: gloo notices a closed socket at once
        except subprocess.TimeoutExpired:
            pytest.fail("rank 0 still running 60 s after rank 1 was killed")
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
            p.communicate()
    assert procs[0].returncode != 0
    m = re.search(r"PeerError: rank 1 of 2 stopped during training step (\d+); rank 0 noticed it and stops too\. "
                  r"The last checkpoint (\S+) is intact \(checked against its manifest\); restart every rank with "
                  r"--resume", err)
    assert m, err[-3000:]
    step, ckpt = int(m.group(1)), Path(m.group(2))
    assert ckpt.name == f"step-{step - 1:08d}"  # save_every=1: the step before the failed one, written whole
    assert verify_checkpoint(ckpt) == ckpt
