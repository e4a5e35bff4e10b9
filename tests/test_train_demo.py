"""The demo pipeline on a tiny scale (warm start once, REINFORCE, pass@k and the placebo from it, one
comparison) and the study's statistics against outside references."""
import itertools
import json
from math import comb

import numpy as np
import pytest

from bonft.estimate.paired import paired_bootstrap, per_prompt_curves, t_interval
from bonft.tasks import get_task
from bonft.trainer.demo import DemoConfig, collect_stage_pools, run_demo
from bonft.trainer.demo.pipeline import policy_pools
from bonft.trainer.demo.stats import best_temperatures, study_table


def test_tiny_demo_end_to_end(tmp_path, monkeypatch):
    dc = DemoConfig(run_dir=str(tmp_path / "demo"), train_prompts=32, heldout_prompts=4, warm_start_steps=3, warm_start_batch_size=8, rl_steps=2,
                    prompts_per_step=4, n=8, k=4, eval_samples=8, eval_ks=[1, 8], layers=1, width=32, heads=2,
                    max_new_tokens=4, n_boot=50, threads=1, workers=1, snr_every=1, log_every=1, plan_temperatures=(0.7, 1.3),
                    plan_prompts=4, plan_n=8, plan_policies=("warm_start", "pass_at_k"))
    summary = run_demo(dc, progress=False)
    out = tmp_path / "demo"
    assert set(summary["results"]) == {"warm_start", "reinforce", "pass_at_k", "placebo"}
    assert (out / "comparison.png").stat().st_size > 0
    md = (out / "comparison.md").read_text()
    assert "Paired difference from warm start" in md and "Paired difference from leave-one-out REINFORCE" in md
    assert "placebo (pass@k, outcomes shuffled)" in md and "best temperature" in md
    for ev in summary["results"].values():  # all evaluated on the same held-out prompts and budget
        assert ev["n_prompts"] == 4 and ev["n_samples"] == 8 and ev["ks"] == [1, 8]
    # the demo's own pools are the trainer's final evaluation (same policy, same per-prompt seeds), read
    # from its samples file: equal, bit for bit, to the pools sampled afresh from the stage's checkpoint
    task = get_task(dc.task)
    train, held = task.split(n_train=dc.train_prompts, n_eval=dc.heldout_prompts, seed=dc.seed)
    for name, ev in summary["results"].items():
        pools = np.load(out / name / "pools-T1-P4-n8.npz")
        assert pools["rewards"].mean() == pytest.approx(ev["mean_reward"], abs=1e-12)
        assert pools["rewards"].shape == (4, 8) and pools["proxy"].shape == (4, 8)
        fresh = policy_pools(dc, out / name, held, list(train) + list(held), path=tmp_path / f"{name}.npz",
                             temperature=1.0, n=8, step=0)
        assert np.array_equal(fresh["rewards"], pools["rewards"]) and np.array_equal(fresh["proxy"], pools["proxy"])
        assert fresh["family"].tolist() == pools["family"].tolist()
        rows = [json.loads(ln) for ln in (out / name / "heldout_samples.jsonl").read_text().splitlines()]
        assert [(r["prompt_id"], r["sample"]) for r in rows] == [(j, i) for j in range(4) for i in range(8)]
        assert [r["prompt"] for r in rows[::8]] == [e.prompt for e in held]
        assert all(r["temperature"] == 1.0 and r["score_exact"] == r["reward"] for r in rows)
    # the report's pools come from that file: with sampling switched off they are found all the same
    monkeypatch.setattr("bonft.trainer.demo.pipeline.collect_pools", lambda *a, **kw: pytest.fail("sampled again"))
    before = dict(np.load(out / "pass_at_k" / "pools-T1-P4-n8.npz"))
    (out / "pass_at_k" / "pools-T1-P4-n8.npz").unlink()
    again = collect_stage_pools(dc, out / "pass_at_k", temperature=1.0, n_prompts=3, n=8)
    assert np.array_equal(again["rewards"], before["rewards"][:3]) and np.array_equal(again["proxy"], before["proxy"][:3])
    monkeypatch.undo()
    # the RL stages started from the warm start's checkpoint; the placebo is pass@k with shuffled outcomes
    placebo = (out / "placebo" / "config.toml").read_text()
    assert "warm_start/checkpoints/step-00000003" in placebo and "placebo = true" in placebo
    assert 'objective = "pass_at_k"' in placebo and 'optimizer = "sgd"' in placebo
    for name in ("reinforce", "pass_at_k", "placebo"):
        # the gradient table holds the medians (numpy) of the values each RL step logged; snr_every=1
        # measures the SNR at both steps; clipping is off by default
        g = summary["gradients"][name]
        rows = [json.loads(ln) for ln in (out / name / "metrics.jsonl").read_text().splitlines()]
        rl = [r for r in rows if r.get("kind") == "train" and r.get("stage") == "rl"]
        assert [r["step"] for r in rl] == [1, 2] and all(r["grad/clipped"] == 0 for r in rl)
        assert g["grad_snr"] == np.median([r["grad/snr"] for r in rl])
        assert g["grad_norm"] == np.median([r["grad/norm"] for r in rl]) and g["clipped"] == 0.0
    assert set(summary["best_temperature"]) == {"warm_start", "pass_at_k"}
    assert set(summary["best_temperature"]["pass_at_k"].values()) <= {0.7, 1.3}
    # a rerun reuses every finished stage: no stage's summary is rewritten
    stamps = {p: p.stat().st_mtime_ns for p in out.glob("*/summary.json")}
    again = run_demo(dc, progress=False)
    assert again["results"] == summary["results"] and len(stamps) == 4
    assert {p: p.stat().st_mtime_ns for p in out.glob("*/summary.json")} == stamps


def test_t_interval_matches_a_t_table():
    # mean 0.3, sd 0.1, n 3: half-width t_{0.975,2} * 0.1 / sqrt(3) = 4.3027 * 0.05774 = 0.2484
    # (t quantile 4.303 from a Student-t table, e.g. NIST/SEMATECH e-Handbook, Table 1.4.2 of t critical values)
    m, lo, hi = t_interval([0.2, 0.4, 0.3])
    assert (m, lo, hi) == pytest.approx((0.3, 0.0516, 0.5484), abs=1e-4)
    # 5 seeds: t_{0.975,4} = 2.776 (same table)
    v = np.array([0.01, 0.03, 0.02, 0.05, 0.04])
    assert t_interval(v)[2] - v.mean() == pytest.approx(2.776 * v.std(ddof=1) / np.sqrt(5), abs=1e-3)


def test_paired_bootstrap_agrees_with_scipy():
    from scipy import stats

    rng = np.random.default_rng(0)
    a = rng.random(200)
    b = a - 0.05 + 0.1 * rng.standard_normal(200)
    m, lo, hi = paired_bootstrap(a, b, n_boot=4000, seed=1)
    ref = stats.bootstrap((a - b,), np.mean, n_resamples=4000, method="percentile", random_state=2).confidence_interval
    assert m == pytest.approx(np.mean(a - b), abs=1e-12)
    assert lo == pytest.approx(ref.low, abs=0.004) and hi == pytest.approx(ref.high, abs=0.004)


def test_per_prompt_curves_match_enumeration():
    rewards = np.array([[1, 0, 0, 0, 1], [0, 0, 0, 0, 0], [1, 1, 1, 0, 1]], dtype=float)
    proxy = np.array([[0.2, 0.9, 0.1, 0.5, 0.3], [0.1, 0.2, 0.3, 0.4, 0.5], [0.5, 0.1, 0.9, 0.95, 0.2]])
    c = per_prompt_curves({"rewards": rewards, "proxy": proxy}, ks=[1, 2, 5])
    for p in range(3):
        for j, k in enumerate([1, 2, 5]):  # brute force over every k-subset of the pool
            subsets = list(itertools.combinations(range(5), k))
            assert c["pass"][p, j] == pytest.approx(np.mean([rewards[p, list(s)].max() for s in subsets]))
            best = [rewards[p, max(s, key=lambda i: proxy[p, i])] for s in subsets]  # no ties in these scores
            assert c["proxy"][p, j] == pytest.approx(np.mean(best))
    # Chen et al. 2021: pass@k = 1 - C(n - c, k) / C(n, k); prompt 0 has c = 2 of n = 5
    assert c["pass"][0, 1] == pytest.approx(1 - comb(3, 2) / comb(5, 2))


def test_best_temperatures_follow_the_pools():
    rng = np.random.default_rng(0)
    # T = 0.5: half the prompts at 0.6 per sample, half never solved -> pass@16 ~ 0.5;
    # T = 1.5: every prompt at 0.3 -> pass@16 = 1 - 0.7^16 ~ 0.997 (Chen et al. 2021 formula)
    lo = (rng.random((300, 32)) < 0.6).astype(float)
    lo[150:] = 0.0
    hi = (rng.random((300, 32)) < 0.3).astype(float)
    best = best_temperatures({0.5: lo, 1.5: hi}, [16], n_boot=100)
    assert best[16] == 1.5


def test_study_table_pairs_by_seed():
    def curves(p1, p32):
        return {"pass": np.array([[p1, p32]] * 4), "proxy": np.array([[p1, p32]] * 4)}

    per_seed = {s: {"warm_start": curves(0.2, 0.6), "reinforce": curves(0.3, 0.6 + 0.01 * s),
                    "pass_at_k": curves(0.25, 0.7 + 0.01 * s)} for s in range(3)}
    table = study_table(per_seed, [1, 32])
    # pass@k - REINFORCE at pass@32 is exactly 0.1 on every seed: a zero-width interval, marked
    assert "+0.100 [+0.100, +0.100] *" in table
    # pass@k - warm start at pass@32: 0.10, 0.11, 0.12 -> mean 0.11, sd 0.01, t_{0.975,2} = 4.303
    assert "+0.110 [+0.085, +0.135] *" in table


def test_a_demo_stage_stopped_before_its_first_checkpoint_starts_again(tmp_path):
    # a stage killed while writing its first checkpoint leaves metrics lines, an empty checkpoints/ and an unfinished
    # checkpoint folder: rerunning the demo has nothing to continue, so the stage runs from step 0 (the trainer
    # refuses to resume over metrics it cannot continue) and keeps the stopped run's lines aside
    from bonft.trainer.config import from_dict
    from bonft.trainer.demo.pipeline import _stage

    out = tmp_path / "stage"
    (out / "checkpoints" / "step-00000002.tmp-999").mkdir(parents=True)
    (out / "metrics.jsonl").write_text('{"kind": "train", "step": 1, "loss": 0.5}\n')
    cfg = from_dict(dict(layers=1, width=32, heads=2, max_positions=48, train_prompts=16, heldout_prompts=2, rl_steps=2,
                         prompts_per_step=2, n=4, k=2, eval_samples=4, eval_ks=[1, 4], n_boot=20, max_new_tokens=4,
                         plots=False, save_every=0, log_every=1, threads=1, run_dir=str(out), name="stage"))
    final = _stage(cfg, progress=False)
    assert final["step"] == 2 and (out / "metrics.stopped.jsonl").read_text() == '{"kind": "train", "step": 1, "loss": 0.5}\n'
    assert [p.name for p in (out / "checkpoints").iterdir()] == ["step-00000002"]
    steps = [json.loads(ln)["step"] for ln in (out / "metrics.jsonl").read_text().splitlines() if '"train"' in ln]
    assert steps == [1, 2]


def test_sigterm_to_the_demo_stops_every_stage_with_a_checkpoint_and_a_rerun_finishes(tmp_path):
    # a scheduler preempting a job sends SIGTERM to its main process: the demo passes a Ctrl-C on to its stage
    # workers (each checkpoints its last step, as on Ctrl-C) and exits 143 (128 + SIGTERM); no stage keeps
    # training after it, and the same command then finishes from the checkpoints
    import re
    import signal
    import subprocess
    import sys
    import time

    out = tmp_path / "demo"
    tiny = ["train_prompts=32", "heldout_prompts=4", "warm_start_steps=3", "warm_start_batch_size=8", "rl_steps=40",
            "prompts_per_step=4", "n=8", "k=4", "eval_samples=8", "eval_ks=1,8", "layers=1", "width=32", "heads=2",
            "max_new_tokens=4", "n_boot=20", "threads=1", "workers=3", "snr_every=0", "log_every=1",
            "plan_temperatures=0.7,1.3", "plan_prompts=4", "plan_n=8"]
    cmd = [sys.executable, "-m", "bonft.cli", "demo", "--output", str(out), "--quiet", *[a for t in tiny for a in ("--set", t)]]
    p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    stages = [out / name for name in ("reinforce", "pass_at_k", "placebo")]

    def training(st):  # past its start-up (a worker still importing may print multiprocessing's traceback)
        return (st / "metrics.jsonl").exists() and (st / "metrics.jsonl").read_text().count('"train"') >= 2

    deadline = time.monotonic() + 240
    while not all(training(st) for st in stages) and time.monotonic() < deadline:
        assert p.poll() is None, p.communicate()
        time.sleep(0.2)
    p.send_signal(signal.SIGTERM)
    stdout, stderr = p.communicate(timeout=240)
    assert p.returncode == 143 and "stopped by SIGTERM; rerun the same command to continue" in stdout, stderr
    # a stage interrupted while training says what it checkpointed, without a traceback (a worker still importing
    # when the Ctrl-C arrives may print one from multiprocessing's start-up)
    training = re.compile(r'File ".*bonft/(trainer/(loop|steps)\.py|generation/)')  # a traceback frame of a stage's work
    assert "interrupted: checkpoint of step" in stdout and not training.search(stderr), stderr[-3000:]
    # each running stage checkpoints its last whole step (none when the interrupt comes mid-update, by design:
    # half-updated weights are not saved, and that stage starts again on the rerun)
    sizes = [(st / "metrics.jsonl").stat().st_size if (st / "metrics.jsonl").exists() else 0 for st in stages]
    time.sleep(2)
    assert sizes == [(st / "metrics.jsonl").stat().st_size if (st / "metrics.jsonl").exists() else 0 for st in stages]
    again = subprocess.run(cmd, capture_output=True, text=True, timeout=400)
    assert again.returncode == 0, again.stderr[-2000:]
    results = json.loads((out / "summary.json").read_text())["results"]
    assert set(results) == {"warm_start", "reinforce", "pass_at_k", "placebo"} and results["reinforce"]["step"] == 40
