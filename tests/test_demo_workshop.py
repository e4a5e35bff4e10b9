"""The demo on the workshop task (programs judged by unit tests) at a tiny budget: its tables, which
verifier trains and which evaluates, the oracle's columns computed by running programs, and the
demo's task options.

Expected rewards of planted programs are derived here from the task's definition (boxes of k for x
parts is ceil(x / k); the hidden inputs include multiples of k, where ``x//k+1`` is one box too many,
and the visible examples never are), not from the task's code.
"""
import json
import math
import os
import re
import types

import pytest
import torch

from bonft.cli import main
from bonft.estimate.paired import per_prompt_curves
from bonft.tasks import get_task
from bonft.trainer.demo import DemoConfig, collect_stage_pools, run_demo
from bonft.trainer.demo.pipeline import check_demo, verifier_caption
from bonft.verifiers.sandbox.runner import CodeRunner

CAPTION = "Evaluation verifier (pass@k, and the reward of each best-of-k pick): oracle: CodeRunner, all unit tests incl. hidden inputs"


def tiny(tmp_path, **kw):
    knobs = dict(run_dir=str(tmp_path / "demo"), train_prompts=32, heldout_prompts=4, warm_start_steps=2, warm_start_batch_size=8,
                 rl_steps=2, prompts_per_step=4, n=4, k=2, eval_samples=4, eval_ks=[1, 4], layers=1, width=16, heads=2, n_boot=50,
                 threads=1, workers=1, snr_every=1, log_every=1, plan_temperatures=())
    return DemoConfig.for_task("workshop", **{**knobs, **kw})


def test_the_task_brings_its_demo_settings():
    dc = DemoConfig.for_task("workshop")
    # the workshop's budget (fixed before any of its runs was compared) and its longer responses
    assert (dc.max_new_tokens, dc.rl_steps, dc.prompts_per_step, dc.n, dc.k, dc.lr) == (20, 30, 32, 16, 8, 0.02)
    assert dc.objectives == ("reinforce", "pass_at_k", "best_of_k", "placebo") and dc.task == "workshop"
    # a knob given by the caller wins over the task's setting; the refunds demo keeps DemoConfig's defaults
    assert DemoConfig.for_task("workshop", rl_steps=3).rl_steps == 3
    assert DemoConfig.for_task("refunds") == DemoConfig()
    with pytest.raises(ValueError, match=r"task must be one of \('ledger', 'restock', 'refunds', 'workshop', 'jsonl', 'user'\), got 'chess'"):
        DemoConfig.for_task("chess")
    # the longest right program, str(x).zfill(9), is 15 characters, then EOS: 16 tokens at least
    with pytest.raises(ValueError, match=r"max_new_tokens must be >= 16 for task 'workshop' .* got max_new_tokens=4"):
        check_demo(DemoConfig(task="workshop"))
    check_demo(DemoConfig(task="workshop", max_new_tokens=16))


def test_tiny_workshop_demo(tmp_path, monkeypatch):
    ran = []  # every (solution, tests) pair the code runner executed in this process
    real = CodeRunner.run_code

    def recording(self, jobs, **kw):
        ran.extend(jobs)
        return real(self, jobs, **kw)

    monkeypatch.setattr(CodeRunner, "run_code", recording)
    dc = tiny(tmp_path)
    summary = run_demo(dc, progress=False)
    out = tmp_path / "demo"
    assert list(summary["results"]) == ["warm_start", "reinforce", "pass_at_k", "best_of_k", "placebo"]
    md = (out / "comparison.md").read_text()
    # three tables of means and differences, one of gradients: each names the verifiers under its title
    assert md.count(CAPTION) == 4
    assert ("Training verifier: the evaluation verifier for leave-one-out REINFORCE, pass@k unbiased, placebo (pass@k, "
            "outcomes shuffled); the proxy verifier for best-of-k (proxy verifier).") in md
    for title in ("Mean over 4 held-out prompts", "Paired difference from warm start", "Paired difference from leave-one-out REINFORCE"):
        block = md.split(title, 1)[1].split("\n\n", 2)
        assert block[0].splitlines()[1].startswith(CAPTION)
        assert block[1].splitlines()[0] == "| policy | pass@1 | pass@4 | proxy best-of-4 |"
    rows = {ln.split(" | ")[0][2:]: ln.split(" | ") for ln in md.splitlines() if ln.startswith("| ") and "(the evaluation verifier)" in ln
            or ln.startswith("| best-of-k (proxy verifier) | proxy |")}
    assert set(rows) == {"leave-one-out REINFORCE", "pass@k unbiased", "best-of-k (proxy verifier)", "placebo (pass@k, outcomes shuffled)"}
    for name, stage in (("reinforce", "leave-one-out REINFORCE"), ("best_of_k", "best-of-k (proxy verifier)")):
        # the verifier's share of the step is the logged time/score over time/step, summed over the RL steps
        lines = [json.loads(ln) for ln in (out / name / "metrics.jsonl").read_text().splitlines()]
        rl = [r for r in lines if r.get("kind") == "train" and r.get("stage") == "rl"]
        share = sum(r["time/score"] for r in rl) / sum(r["time/step"] for r in rl)
        assert summary["gradients"][name]["score_share"] == pytest.approx(share, rel=1e-12)
        assert rows[stage][-1].strip(" |") == f"{share:.0%}" and 0 < share < 1
        assert rows[stage][1] == ("proxy" if name == "best_of_k" else "exact (the evaluation verifier)")
    assert 'verifier = "proxy"' in (out / "best_of_k" / "config.toml").read_text()
    assert 'verifier = "exact"' in (out / "pass_at_k" / "config.toml").read_text()
    # the oracle ran in the sandbox: programs went through CodeRunner (the pool, as root)
    assert ran and all(sol.startswith("def f(x):\n    return (\n") for sol, _ in ran)
    assert get_task("workshop").uses_pool is (os.geteuid() == 0)


def test_the_oracle_columns_come_from_running_the_tests(tmp_path, monkeypatch):
    """Plant the responses of a policy: the pools' rewards are the sandbox's verdicts on the hidden inputs."""
    dc = tiny(tmp_path, rl_steps=0, objectives=())
    run_demo(dc, progress=False)
    task = get_task("workshop")
    held = task.split(n_train=dc.train_prompts, n_eval=dc.heldout_prompts, seed=dc.seed)[1]
    boxes = [e for e in held if e.meta["family"] == "boxes"]
    assert len(boxes) == 2  # boxes_share 0.4 of 4 prompts
    planted = []
    for e in held:
        k = e.meta["k"]
        if e.meta["family"] == "boxes":  # ceil(x / k), the patch (one too many on multiples of k), the floor, not code
            planted.append([f"-(-x//{k})", f"x//{k}+1", f"x//{k}", "x) or (1"])
        else:
            planted.append([e.answer, e.answer, "x", "x) or (1"])

    def fake_sample(model, tokenizer, prompts, *, n, seeds, **kw):
        assert [p for p in prompts] == [e.prompt for e in held] and n == 4
        return types.SimpleNamespace(texts=planted, response_valid=torch.ones(len(prompts), n, 2, dtype=torch.bool),
                                     token_logprobs=torch.zeros(len(prompts), n, 2))

    monkeypatch.setattr("bonft.trainer.evaluation.sample", fake_sample)
    ran = []
    real = CodeRunner.run_code
    monkeypatch.setattr(CodeRunner, "run_code", lambda self, jobs, **kw: ran.extend(jobs) or real(self, jobs, **kw))
    pools = collect_stage_pools(dc, tmp_path / "demo" / "warm_start", temperature=0.5, n_prompts=4, n=4)
    fams = [e.meta["family"] for e in held]
    assert pools["family"].tolist() == fams
    for j, e in enumerate(held):
        if e.meta["family"] == "boxes":
            k = e.meta["k"]
            # check the planted programs against the definition on the hidden multiples of k: 3k parts fill 3 boxes
            assert -(-3 * k // k) == math.ceil(3 * k / k) == 3 and 3 * k // k + 1 == 4
            assert pools["rewards"][j].tolist() == [1.0, 0.0, 0.0, 0.0]
            # the proxy sees the two visible examples only: the shorter patch outscores the right program
            assert pools["proxy"][j][1] > pools["proxy"][j][0] > 0 and pools["proxy"][j][2] == 0 == pools["proxy"][j][3]
        else:
            assert pools["rewards"][j].tolist() == [1.0, 1.0, 0.0, 0.0]
    # every distinct parseable planted program ran once in the sandbox; the response that is not code never did
    sols = [s for s, _ in ran]
    assert len(sols) == len({(e.prompt, g) for e, row in zip(held, planted) for g in row[:3]})
    assert not any("x) or (1" in s for s in sols)
    # so on a boxes prompt pass@4 is 1 and best-of-4 under the proxy is 0 (it picks the patch)
    curves = per_prompt_curves(pools, ks=[1, 4])
    b = [j for j, f in enumerate(fams) if f == "boxes"]
    assert curves["pass"][b, 1].tolist() == [1.0, 1.0] and curves["proxy"][b, 1].tolist() == [0.0, 0.0]
    assert curves["pass"][b, 0].tolist() == [0.25, 0.25]


def test_caption_names_each_role():
    cap = verifier_caption(DemoConfig(), ["warm_start", "reinforce", "best_of_k"])
    assert cap == ("Evaluation verifier (pass@k, and the reward of each best-of-k pick): exact answer. Proxy verifier "
                   "(picks best-of-k): last digit, smaller counts first. Training verifier: the evaluation verifier for "
                   "leave-one-out REINFORCE; the proxy verifier for best-of-k (proxy verifier).")


@pytest.mark.parametrize("argv, error", [
    (["--task", "chess"], r"--task must be one of \('ledger', 'restock', 'refunds', 'workshop'\), got 'chess'"),
    (["--task", "user"], r"--task must be one of .* got 'user'"),
    (["--sandbox", "prestarted"], r"--sandbox applies to tasks that run programs \(workshop\), got --task refunds"),
    (["--set", "task=workshop"], r"--set task cannot choose the demo's task: use --task workshop"),
    (["--task", "workshop", "--set", "max_new_tokens=8"], r"max_new_tokens must be >= 16 for task 'workshop'"),
    (["--task", "workshop", "--set", "task_params.pool=maybe"], r"pool must be True, False or 'auto', got 'maybe'"),
])
def test_demo_task_options_refuse_bad_input(tmp_path, capsys, argv, error):
    rc = main(["demo", "--output", str(tmp_path / "d"), "--quiet", *argv])
    err = capsys.readouterr().err
    assert rc == 2 and re.search(error, err), err
    assert not (tmp_path / "d" / "warm_start").exists()  # refused before any training


def test_sandbox_pool_option_sets_the_task_knob(tmp_path):
    from bonft.cli.demo import _demo_config
    from bonft.cli.main import build_parser

    for value, want in (("prestarted", True), ("fresh", False), ("auto", "auto")):
        args = build_parser().parse_args(["demo", "--task", "workshop", "--sandbox", value, "--output", str(tmp_path)])
        assert _demo_config(args).task_params == {"pool": want}
