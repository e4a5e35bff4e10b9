"""The trainer's objective registry, the placebo control, the gradient SNR and the optimizer choice."""
import itertools
import json
import math
import sys

import numpy as np
import pytest
import torch

from bonft.trainer.config import from_dict
from bonft.trainer.measure import GradientMoments
from bonft.trainer.objectives import OBJECTIVES, Pools, policy_loss, shuffle_pools

f64 = lambda x: torch.as_tensor(np.asarray(x), dtype=torch.float64)


def pools_of(scores, rewards, expert=None, answers=None):
    extra = {} if answers is None else {"answers": answers}  # answer keys: vote objectives only
    return Pools(scores=f64(scores), rewards=f64(rewards), correct=f64(np.asarray(rewards) >= 0.5),
                 reference_scores=None if expert is None else f64(expert), **extra)


@pytest.fixture
def batch():
    rng = np.random.default_rng(0)
    scores = rng.integers(0, 4, size=(5, 8)).astype(float)  # ties on purpose
    rewards = (rng.random((5, 8)) < 0.4).astype(float)
    return scores, rewards, np.full(5, 2.5)


@pytest.mark.parametrize("name", sorted(OBJECTIVES))
def test_placebo_keeps_each_pools_credit_sizes(batch, name):
    scores, rewards, expert = batch
    answers = np.where(rewards > 0, "right", scores.astype(int).astype(str)).astype(object)  # a key per sample
    seeds = list(range(100, 105))
    s2, r2, a2 = shuffle_pools(seeds, scores, rewards, answers)
    for j in range(5):  # each pool: same outcomes, score, reward and answer still together
        assert sorted(zip(s2[j], r2[j], a2[j])) == sorted(zip(scores[j], rewards[j], answers[j]))
    assert not np.array_equal(r2, rewards)
    obj = OBJECTIVES[name]
    with_answers = getattr(obj, "answers", False)
    c = obj.credit(pools_of(scores, rewards, expert, answers if with_answers else None), 4)
    c2 = obj.credit(pools_of(s2, r2, expert, a2 if with_answers else None), 4)
    c, c2 = np.asarray(c), np.asarray(c2)
    # permuting a pool's samples permutes its credit: the same multiset of credits per pool
    np.testing.assert_allclose(np.sort(c2, axis=1), np.sort(c, axis=1), atol=1e-12)


def test_placebo_permutations_are_independent_per_pool():
    same = np.tile(np.arange(8.0), (4, 1))
    (out,) = shuffle_pools([1, 2, 3, 4], same)
    assert len({tuple(row) for row in out}) == 4  # identical pools, four different orders
    (again,) = shuffle_pools([1, 2, 3, 4], same)
    assert np.array_equal(out, again)  # seeded


def _toy_gradient(name, y, scores, rewards, theta, *, seed=None):
    """Gradient wrt the logits of a 5-action softmax policy of the loss on one fixed pool."""
    th = theta.clone().requires_grad_(True)
    logp = torch.log_softmax(th, -1)[y][None]  # (1, n) sequence log-probs
    if seed is not None:
        scores, rewards = shuffle_pools([seed], scores, rewards)
    credit = OBJECTIVES[name].credit(pools_of(scores, rewards), 3)
    loss, _ = policy_loss(logp, credit, mask=None, token_reduction="sum")
    (g,) = torch.autograd.grad(loss, th)
    return g.numpy()


@pytest.mark.parametrize("name", ["reinforce", "pass_at_k", "best_of_k", "pass_at_k_positive"])
def test_placebo_update_has_zero_mean_on_a_fixed_pool(name):
    theta = torch.tensor([0.3, -0.2, 0.5, 0.0, -0.6], dtype=torch.float64)
    y = torch.tensor([0, 1, 2, 2, 3, 4, 0, 2])
    rewards = np.array([[1.0, 0, 0, 0, 1, 0, 1, 0]])
    scores = np.array([[0.9, 0.1, 0.4, 0.3, 0.7, 0.2, 0.8, 0.5]])
    real = _toy_gradient(name, y, scores, rewards, theta)
    G = np.stack([_toy_gradient(name, y, scores, rewards, theta, seed=s) for s in range(3000)])
    se = G.std(0, ddof=1) / math.sqrt(len(G))
    # a uniformly random permutation gives each sample the pool's mean credit cbar, so the expected
    # update is cbar * sum_i grad log pi(y_i) (score-function identity; common practice): zero when the
    # credit sums to zero in the pool (leave-one-out credit), not for positive-only pass@k credit
    credit = OBJECTIVES[name].credit(pools_of(scores, rewards), 3).numpy()[0]
    th = theta.clone().requires_grad_(True)
    (sum_score,) = torch.autograd.grad(torch.log_softmax(th, -1)[y].sum(), th)
    expected = -credit.mean() * sum_score.numpy()
    assert np.all(np.abs(G.mean(0) - expected) < 5 * se + 1e-12)
    assert np.linalg.norm(real - expected) > 10 * np.linalg.norm(se)  # the real update is far from it
    if name != "pass_at_k_positive":
        assert abs(credit.sum()) < 1e-12 and np.linalg.norm(expected) < 1e-12


def test_placebo_exact_average_over_all_permutations():
    # brute force over all 6! orders of a 6-sample pool: the mean credit of every sample is the pool's mean
    rewards = np.array([[1.0, 0, 1, 0, 0, 0]])
    scores = np.array([[0.2, 0.9, 0.4, 0.4, 0.1, 0.7]])
    for name in ("best_of_k", "pass_at_k", "reinforce"):
        tot = np.zeros(6)
        for perm in itertools.permutations(range(6)):
            tot += OBJECTIVES[name].credit(pools_of(scores[:, perm], rewards[:, perm]), 3).numpy()[0]
        np.testing.assert_allclose(tot / 720, 0.0, atol=1e-12)


def _moments(G):
    m = GradientMoments()
    for g in G:
        m.add([torch.as_tensor(g)])
    return m.snr()


def test_grad_snr_of_pure_noise_is_one_over_sqrt_B():
    # mean of B iid zero-mean vectors: E||gbar||^2 = sigma^2 / B, while the deviations' unbiased
    # variance estimates sigma^2 (standard sampling theory; common practice) -> SNR ~ 1/sqrt(B)
    rng = np.random.default_rng(1)
    for B in (4, 16, 64):
        G = rng.normal(size=(B, 20000))
        assert _moments(G) == pytest.approx(1 / math.sqrt(B), rel=0.05)
    # signal with ||mu||^2 = sigma^2 (per-prompt noise norm): E SNR^2 ~ 1 + 1/B
    G = rng.normal(size=(16, 20000)) + 1.0
    assert _moments(G) == pytest.approx(math.sqrt(1 + 1 / 16), rel=0.03)
    # one prompt with a gradient, B - 1 without: gbar = g/B and sum ||d_b||^2 = ||g||^2 (B-1)/B, so exactly 1/sqrt(B)
    G = np.zeros((16, 30))
    G[3] = rng.normal(size=30)
    assert _moments(G) == pytest.approx(0.25, rel=1e-12)
    assert _moments(np.zeros((16, 30))) == 0.0  # no credit anywhere: no signal
    # the streamed sums against the formula on the stored vectors (numpy)
    G = rng.normal(size=(8, 50)) + 0.3
    mean = G.mean(0)
    direct = np.linalg.norm(mean) / math.sqrt(((G - mean) ** 2).sum() / 7)
    assert _moments(G) == pytest.approx(direct, rel=1e-10)


def _tiny_run(tmp_path, **kw):
    from bonft.trainer.run import build_run

    torch.set_num_threads(1)
    cfg = from_dict({**dict(layers=1, width=32, heads=2, max_positions=48, train_prompts=32, heldout_prompts=4, rl_steps=2,
                            prompts_per_step=4, n=4, k=2, max_new_tokens=5, verifier="proxy",
                            run_dir=str(tmp_path / "r")), **kw})
    return build_run(cfg)


@pytest.mark.parametrize("objective, anchor", [("pass_at_k", False), ("best_of_k_sft", False), ("pass_at_k", True)])
def test_snr_uses_the_steps_own_per_prompt_gradients(tmp_path, monkeypatch, objective, anchor):
    import copy

    import bonft.trainer.steps as S
    from bonft.trainer.measure import Stopwatch

    run = _tiny_run(tmp_path, objective=objective, snr_every=1, reward_source="scores", anchor_weight=0.5 if anchor else 0.0)
    if anchor:  # an anchor away from the policy: the KL term has a gradient of its own
        run.anchor_model = copy.deepcopy(run.module).requires_grad_(False)
        with torch.no_grad():
            for p in run.anchor_model.parameters():
                p.add_(0.05 * torch.randn_like(p))
    run.verifiers["train"] = lambda ps, rs: np.array([float(len(r) % 2) for r in rs])  # mixed outcomes at random init
    seen = []
    monkeypatch.setattr(S, "GradientMoments", lambda: seen.append(GradientMoments()) or seen[-1])
    run.module.zero_grad(set_to_none=True)
    clock = Stopwatch()
    rec = S.rl_step(run, 0, clock)
    (m,) = seen
    assert m.count == 4 and rec["grad/snr"] == pytest.approx(m.snr()) and 0 < rec["grad/snr"] < 10
    # the step's gradient is the mean of the per-prompt gradients the SNR is computed from
    params = [p for p in run.module.parameters() if p.requires_grad]
    for p, tot in zip(params, m.total):
        torch.testing.assert_close(p.grad.double(), tot / 4, atol=1e-7, rtol=1e-4)
    assert sum(float(p.grad.abs().sum()) for p in params) > 1e-3  # a real gradient, not zeros
    assert clock.totals["snr"] > 0 and "grad/snr" not in S.rl_step(_tiny_run(tmp_path, snr_every=2), 1, Stopwatch())


def test_placebo_step_moves_credit_not_the_pools(tmp_path):
    from bonft.trainer.measure import Stopwatch
    from bonft.trainer.steps import rl_step

    recs = []
    for placebo in (False, True):
        run = _tiny_run(tmp_path, objective="best_of_k", placebo=placebo, n=8, reward_source="scores")
        run.verifiers["train"] = lambda ps, rs: np.array([float(len(r)) for r in rs])  # varied scores at random init
        recs.append(rl_step(run, 0, Stopwatch()))
    plain, placebo = recs
    # the same samples (same weights and seeds): same reward and pool value, different credit assignment
    assert placebo["reward"] == plain["reward"] and placebo["pool/value"] == pytest.approx(plain["pool/value"])
    assert placebo["loss"] != pytest.approx(plain["loss"])


def test_optimizer_choice(tmp_path):
    from bonft.trainer.run import make_optimizer

    run = _tiny_run(tmp_path, optimizer="sgd", lr=0.1)
    assert isinstance(make_optimizer(run, "sft"), torch.optim.AdamW)  # the warm start is always AdamW
    opt = make_optimizer(run, "rl")
    assert isinstance(opt, torch.optim.SGD)
    p = next(run.module.parameters())
    before = p.detach().clone()
    for q in run.module.parameters():
        q.grad = torch.full_like(q, 0.5)
    opt.step()
    # plain SGD: theta <- theta - lr * g (Robbins & Monro 1951)
    torch.testing.assert_close(p.detach(), before - 0.1 * 0.5)
    run = _tiny_run(tmp_path, adam_eps=1e-3)
    assert make_optimizer(run, "rl").param_groups[0]["eps"] == 1e-3


def test_snr_and_placebo_on_two_ranks_match_one_process(tmp_path, monkeypatch):
    """2 gloo ranks vs 1 process: the SNR sums are all-reduced, the placebo's permutations follow the global slot."""
    import json
    import os
    import socket
    import subprocess
    import sys
    from pathlib import Path

    from bonft.trainer.loop import train

    scripts = Path(__file__).parent / "dist_scripts"
    monkeypatch.syspath_prepend(str(scripts))  # the toy verifier, here and in the ranks
    cfg = dict(arch="llama", layers=1, width=32, heads=2, max_positions=48, train_prompts=64, heldout_prompts=4, rl_steps=2,
               prompts_per_step=4, n=4, k=2, lr=1e-3, eval_samples=4, eval_ks=[1, 4], n_boot=50, log_every=1, save_every=0,
               max_new_tokens=6, plots=False, eval_at_start=False, objective="pass_at_k", correct_threshold=0.2,
               verifier="toy_verifier:digit_share", snr_every=1, placebo=True)
    (tmp_path / "two.json").write_text(json.dumps({**cfg, "run_dir": str(tmp_path / "two")}))
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    base = {k: v for k, v in os.environ.items() if k not in ("RANK", "WORLD_SIZE", "LOCAL_RANK", "MASTER_ADDR", "MASTER_PORT")}
    base["PYTHONPATH"] = os.pathsep.join([str(scripts), os.environ.get("PYTHONPATH", "")])
    procs = [subprocess.Popen([sys.executable, str(scripts / "train_ranks.py"), str(tmp_path / "two.json")],
                              env={**base, "RANK": str(r), "WORLD_SIZE": "2", "LOCAL_RANK": str(r), "MASTER_ADDR": "127.0.0.1",
                                   "MASTER_PORT": str(port), "OMP_NUM_THREADS": "1"},
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for r in range(2)]
    try:
        train(from_dict({**cfg, "run_dir": str(tmp_path / "one")}), progress=False)
        res = [p.communicate(timeout=300) + (p.returncode,) for p in procs]
    finally:
        for p in procs:
            if p.poll() is None:
                p.kill()
    assert [rc for _, _, rc in res] == [0, 0], res[0][1][-2000:] + res[1][1][-2000:]
    rows = {run: [json.loads(ln) for ln in (tmp_path / run / "metrics.jsonl").read_text().splitlines() if '"train"' in ln]
            for run in ("one", "two")}
    assert len(rows["one"]) == len(rows["two"]) == 2
    for a, b in zip(rows["one"], rows["two"]):
        assert 0 < a["grad/snr"] < 10 and b["grad/snr"] == pytest.approx(a["grad/snr"], rel=1e-5)
        assert b["loss"] == pytest.approx(a["loss"], rel=1e-5, abs=1e-6) and b["reward"] == pytest.approx(a["reward"])


def test_a_registered_objective_trains_like_the_builtin_with_the_same_credit(tmp_path):
    from bonft.objectives import credit as C
    from bonft.trainer.measure import Stopwatch
    from bonft.trainer.objectives import Objective, register_objective
    from bonft.trainer.steps import rl_step

    with pytest.raises(ValueError, match=r"name must not be taken already, got 'pass_at_k'"):
        register_objective("pass_at_k", OBJECTIVES["pass_at_k"])
    with pytest.raises(TypeError, match=r"objective must be a bonft.trainer.objectives.Objective, got function"):
        register_objective("mine", lambda p, k: p.rewards)
    register_objective("my_reinforce", Objective(credit=lambda p, k: C.reinforce_credit(p.rewards), value=None, summary="mine"))
    try:
        recs = []
        for name in ("reinforce", "my_reinforce"):
            run = _tiny_run(tmp_path, objective=name, reward_source="scores", k=1)  # reinforce reads no k: 1 or unset
            run.verifiers["train"] = lambda ps, rs: np.array([float(len(r) % 2) for r in rs])
            recs.append(rl_step(run, 0, Stopwatch()))
            recs[-1]["grad"] = torch.cat([p.grad.reshape(-1) for p in run.module.parameters() if p.grad is not None])
        assert recs[0]["loss"] == recs[1]["loss"] and torch.equal(recs[0]["grad"], recs[1]["grad"])
        assert recs[0]["grad"].abs().sum() > 0 and "pool/value" not in recs[1]
    finally:
        del OBJECTIVES["my_reinforce"]


def test_a_recipe_names_an_objective_of_its_own_by_module_and_it_trains_like_the_builtin(tmp_path, monkeypatch):
    # `bonft train` cannot call register_objective: a recipe names the Objective by its place ('module:name'),
    # imported from the working directory when the run starts; same credit as 'reinforce', so the same step
    from bonft.cli.main import main
    from bonft.trainer.config import to_toml
    from bonft.trainer.objectives import resolve_objective

    (tmp_path / "my_objectives_t.py").write_text(
        "from bonft.objectives import credit as C\n"
        "from bonft.trainer.objectives import Objective\n"
        "mine = Objective(credit=lambda p, k: C.reinforce_credit(p.rewards), value=None, summary='mine')\n"
        "def helper(p, k):\n    return p.rewards\n")
    (tmp_path / "parity_grader_t.py").write_text("def score(prompts, responses):\n"
                                                 "    return [float(len(r) % 2) for r in responses]\n")
    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(sys, "path", list(sys.path))
    spec = "my_objectives_t:mine"
    try:
        base = dict(layers=1, width=32, heads=2, max_positions=48, train_prompts=32, heldout_prompts=4, rl_steps=2,
                    prompts_per_step=4, n=4, k=1, max_new_tokens=5, verifier="parity_grader_t:score", eval_samples=4,
                    eval_ks=[1, 2], n_boot=20, plots=False, save_every=0, eval_at_start=False, log_every=1)
        out = {}
        for name in ("reinforce", spec):
            cfg = from_dict({**base, "objective": name, "run_dir": str(tmp_path / name.replace(":", "-"))})
            recipe = tmp_path / f"{name.replace(':', '-')}.toml"
            recipe.write_text(to_toml(cfg))
            assert main(["train", str(recipe), "--quiet"]) == 0
            out[name] = [json.loads(ln)["loss"] for ln in (tmp_path / name.replace(":", "-") / "metrics.jsonl").read_text()
                         .splitlines() if '"train"' in ln]
        assert out[spec] == out["reinforce"] and len(out[spec]) == 2 and any(x != 0 for x in out[spec])
        assert OBJECTIVES[spec] is resolve_objective(spec)  # imported once, then registered under its spec
        # evaluating the run does not import the objective (here: from a directory with the verifier alone)
        elsewhere = tmp_path / "elsewhere"
        elsewhere.mkdir()
        (elsewhere / "parity_grader_t.py").write_text((tmp_path / "parity_grader_t.py").read_text())
        monkeypatch.chdir(elsewhere)
        del OBJECTIVES[spec]
        assert main(["eval", str(tmp_path / spec.replace(":", "-")), "--n", "2", "--ks", "1"]) == 0
        assert spec not in OBJECTIVES
    finally:
        OBJECTIVES.pop(spec, None)
    monkeypatch.chdir(tmp_path)
    with pytest.raises(TypeError, match=r"objective 'my_objectives_t:helper' must name a bonft.trainer.objectives.Objective "
                                        r"\(credit, value, summary\), got function"):
        resolve_objective("my_objectives_t:helper")
    with pytest.raises(ValueError, match=r"spec names 'nothing', but 'my_objectives_t' has no attribute 'nothing'"):
        resolve_objective("my_objectives_t:nothing")
    with pytest.raises(ValueError, match=r"objective must be one of \('reinforce', .*\) or 'module:name' naming an Objective "
                                         r"of your own, got 'ppo'"):
        from_dict({**base, "objective": "ppo"})
