"""The study (bonft.trainer.demo.study): its rule for admissible settings and its choice on hand-made numbers,
the validation split, bad input refused before any training, and the whole study at a tiny scale through
`bonft demo --study` and recipes/study.py."""
import json
import re
import runpy
import sys
from pathlib import Path

import numpy as np
import pytest

from bonft.cli import main
from bonft.tasks import get_task
from bonft.trainer.demo import DemoConfig, StudyConfig
from bonft.trainer.demo.study import Arm, arms, check_study, grid_results, stage_key, validation_split, within_noise

ROOT = Path(__file__).resolve().parent.parent


# ----------------------------------------------------------------------------- the rule, on hand-made numbers
def _curves(pass1, passK):
    """Per-prompt pass@1 and pass@K columns (ks = [1, K]) as the study stores them."""
    return {"pass": np.stack([np.asarray(pass1, float), np.asarray(passK, float)], axis=1)}


def test_within_noise_on_constant_and_balanced_differences():
    # a constant difference c on every prompt: every bootstrap mean is c, so the interval is [c, c] (arithmetic)
    r = within_noise(np.full(20, -0.2), n_boot=200, seed=0, confidence=0.95, tolerance=0.01)
    assert (r["mean"], r["lo"], r["hi"], r["ok"]) == pytest.approx((-0.2, -0.2, -0.2, False))
    # the same shape below the tolerance counts as noise although its interval excludes 0
    assert within_noise(np.full(20, -0.005), n_boot=200, seed=0, confidence=0.95, tolerance=0.01)["ok"]
    # +1 and -1 on alternate prompts: mean 0, the interval straddles it
    r = within_noise(np.tile([1.0, -1.0], 10), n_boot=500, seed=0, confidence=0.95, tolerance=0.0)
    assert r["mean"] == 0.0 and r["lo"] < 0 < r["hi"] and r["ok"]


def test_grid_choice_skips_inadmissible_settings_and_uses_the_right_reference():
    dc = DemoConfig(eval_ks=[1, 32], n_boot=200)
    sc = StudyConfig(objectives=("pass_at_k", "best_of_k_sft"), reference_ks=(4,),
                     lr_grid={"pass_at_k": (0.01, 0.02, 0.04), "best_of_k_sft": (0.01, 0.02)})
    P = 10
    warm = _curves([0.2] * P, [0.6] * P)
    pk, sft = Arm("pass_at_k", "pass_at_k"), Arm("sft", "best_of_k_sft", k=1, placebo=False)
    bon = Arm("best_of_k_sft-k4", "best_of_k_sft", k=4, reference="sft")
    curves = {"warm_start": warm,
              # lr 0.01: placebo equal to the warm start; lr 0.02: placebo 0.005 below at pass@32 on every prompt
              # (interval [-0.005, -0.005] excludes 0, but within the 0.01 tolerance); lr 0.04: placebo collapses
              stage_key(pk, 0.01): _curves([0.2] * P, [0.65] * P), stage_key(pk, 0.01, True): warm,
              stage_key(pk, 0.02): _curves([0.2] * P, [0.70] * P), stage_key(pk, 0.02, True): _curves([0.2] * P, [0.595] * P),
              stage_key(pk, 0.04): _curves([0.1] * P, [0.90] * P), stage_key(pk, 0.04, True): _curves([0.1] * P, [0.4] * P),
              # plain SFT has no placebo; BoN-SFT's placebo is compared with plain SFT at the same lr, not the warm start
              stage_key(sft, 0.01): _curves([0.3] * P, [0.5] * P), stage_key(sft, 0.02): _curves([0.3] * P, [0.55] * P),
              stage_key(bon, 0.01): _curves([0.25] * P, [0.7] * P), stage_key(bon, 0.01, True): _curves([0.3] * P, [0.5] * P),
              stage_key(bon, 0.02): _curves([0.25] * P, [0.8] * P), stage_key(bon, 0.02, True): _curves([0.2] * P, [0.6] * P)}
    g = grid_results(dc, sc, curves)
    rows = {(r["arm"], r["lr"]): r for r in g["rows"]}
    assert [rows["pass_at_k", lr]["admissible"] for lr in (0.01, 0.02, 0.04)] == [True, True, False]
    assert rows["pass_at_k", 0.02]["placeboK"]["mean"] == pytest.approx(-0.005)
    assert rows["pass_at_k", 0.04]["placebo1"]["mean"] == pytest.approx(-0.1)
    # the best admissible pass@32 is lr 0.02 (0.70); lr 0.04's 0.90 is not admissible
    assert g["chosen"]["pass_at_k"] == {"lr": 0.02, "admissible": True}
    assert rows["sft", 0.02]["admissible"] and "placebo1" not in rows["sft", 0.02]
    assert g["chosen"]["sft"]["lr"] == 0.02  # 0.55 > 0.50
    # BoN-SFT at lr 0.02: placebo (0.2, 0.6) against plain SFT (0.3, 0.55): -0.1 at pass@1, not admissible
    assert rows["best_of_k_sft-k4", 0.01]["admissible"] and not rows["best_of_k_sft-k4", 0.02]["admissible"]
    assert rows["best_of_k_sft-k4", 0.02]["placebo1"]["mean"] == pytest.approx(-0.1)
    assert g["chosen"]["best_of_k_sft-k4"] == {"lr": 0.01, "admissible": True}
    assert [r["chosen"] for r in g["rows"] if r["arm"] == "pass_at_k"] == [False, True, False]


def test_no_admissible_setting_falls_back_to_the_smallest_lr_and_says_so():
    dc = DemoConfig(eval_ks=[1, 32], n_boot=100)
    sc = StudyConfig(objectives=("reinforce",), lr_grid={"reinforce": (0.05, 0.02)})
    arm = Arm("reinforce", "reinforce")
    bad = _curves([0.0] * 5, [0.0] * 5)
    curves = {"warm_start": _curves([0.3] * 5, [0.8] * 5), stage_key(arm, 0.05): bad, stage_key(arm, 0.05, True): bad,
              stage_key(arm, 0.02): bad, stage_key(arm, 0.02, True): bad}
    assert grid_results(dc, sc, curves)["chosen"]["reinforce"] == {"lr": 0.02, "admissible": False}


def test_arms_plain_sft_is_best_of_k_sft_at_k_1_whose_sample_credit_is_zero():
    from bonft.objectives.credit import best_of_k_sft_credit

    names = [(a.name, a.k, a.placebo, a.reference) for a in arms(StudyConfig(objectives=("reinforce", "best_of_k_sft"), reference_ks=(4, 8)))]
    assert names == [("reinforce", 0, True, "warm_start"), ("sft", 1, False, "warm_start"),
                     ("best_of_k_sft-k4", 4, True, "sft"), ("best_of_k_sft-k8", 8, True, "sft")]
    # Chow et al. 2024: log pi_bon(y*) = log pi(y*) + log sum_{j<k} F^j F_<^(k-1-j); at k = 1 the sum is 1, its log 0
    rng = np.random.default_rng(0)
    w = best_of_k_sft_credit(rng.random((3, 8)), rng.random(3), k=1)
    assert np.all(np.asarray(w) == 0.0)


# ----------------------------------------------------------------------------- the validation split
def test_validation_split_is_disjoint_and_leaves_the_trainers_split_alone():
    dc = DemoConfig(train_prompts=300, heldout_prompts=50)
    val = validation_split(dc, 80)
    task = get_task("refunds")
    train, held = task.split(n_train=300, n_eval=50, seed=0)
    prompts = [e.prompt for e in val]
    assert len(prompts) == len(set(prompts)) == 80
    assert not set(prompts) & {e.prompt for e in train} and not set(prompts) & {e.prompt for e in held}
    assert {e.meta["family"] for e in val} == {"plain", "return"}
    assert [e.prompt for e in validation_split(dc, 80)] == prompts  # reproducible


def test_a_validation_split_that_would_overlap_is_refused():
    # max_qty = 1 makes 40 distinct plain prompts: 24 + 6 are taken by training and held-out, 24 more cannot fit
    dc = DemoConfig(train_prompts=40, heldout_prompts=10, task_params={"max_qty": 1})
    with pytest.raises(ValueError, match=r"^validation_prompts=40 would overlap the training or held-out prompts: the task "
                                         r"cannot make train_prompts \+ heldout_prompts \+ validation_prompts = 90 distinct"):
        validation_split(dc, 40)
    assert len(validation_split(dc, 10)) == 10


# ----------------------------------------------------------------------------- bad input, before any training
@pytest.mark.parametrize("kw, message", [
    ({"objectives": ("reinforce", "pass_at_k_best")}, r"^objectives must be among \('reinforce', .*\), got 'pass_at_k_best'$"),
    ({"objectives": ("placebo",)}, r"^objectives must not list 'placebo': the study runs each objective's own placebo"),
    ({"objectives": ()}, r"^objectives must name at least one of"),
    ({"seeds": ()}, r"^seeds must name at least one seed, got an empty list$"),
    ({"seeds": (0, 0)}, r"^seeds must not repeat a seed, got \[0, 0\]$"),
    ({"replication_seeds": (4, 5)}, r"^replication_seeds must be apart from seeds, got \[4\] in both$"),
    ({"tune_seeds": (5,)}, r"^tune_seeds must not include a replication seed \(nothing is tuned on those\), got \[5\]$"),
    ({"lr_grid": {"pass_at_k": (0.01, 0.0)}}, r"lr_grid\['pass_at_k'\] must hold learning rates > 0, got 0.0 in \[0.01, 0.0\]$"),
    ({"lr_grid": {"pass_at_k": (-0.02,)}}, r"lr_grid\['pass_at_k'\] must hold learning rates > 0, got -0.02"),
    ({"lr_grid": {"pass_at_k": ()}}, r"lr_grid\['pass_at_k'\] must be a non-empty list of learning rates"),
    ({"validation_prompts": 0}, r"^validation_prompts must be >= 1"),
    ({"reference_ks": (4, 64)}, r"^reference_ks must be <= 32"),
])
def test_check_study_names_the_knob(kw, message):
    sc = StudyConfig(**kw)
    if "lr_grid" in kw:
        sc.objectives = ("pass_at_k",)
    with pytest.raises((ValueError, TypeError), match=message):
        check_study(DemoConfig(), sc)


@pytest.mark.parametrize("argv, message", [
    (["--study", "--set", "objectives=reinforce,nope"], r"--set objectives: objectives must be among .* got 'nope'"),
    (["--study", "--seeds", ""], r"--seeds: seeds must name at least one seed, got an empty list"),
    (["--study", "--grid", "pass_at_k=0.01,0"], r"--grid pass_at_k must hold learning rates > 0, got 0 in '0.01,0'"),
    (["--study", "--grid", "pass_at_k=-0.1"], r"--grid pass_at_k must hold learning rates > 0, got -0.1"),
    (["--study", "--grid", "majority_vote=0.1"], r"--grid majority_vote: not an objective of this study"),
    (["--study", "--validation-prompts", "40", "--set", "task_params.max_qty=1", "--set", "train_prompts=40", "--set",
      "heldout_prompts=10"], r"--validation-prompts: validation_prompts=40 would overlap the training or held-out prompts"),
    (["--study", "--seed", "3"], r"--seed cannot take effect with --study: name the study's seeds with --seeds"),
    (["--study", "--set", "lr=0.1"], r"--set lr cannot take effect with --study: the study chooses each objective's lr"),
    (["--seeds", "1"], r"--seeds applies to --study only"),
    (["--grid-only"], r"--grid-only applies to --study only"),
])
def test_cli_study_errors_before_any_training(argv, message, tmp_path, capsys):
    out = tmp_path / "s"
    assert main(["demo", "--output", str(out), "--quiet", *argv]) == 2
    assert re.search(message, capsys.readouterr().err)
    assert not out.exists() or not any(out.iterdir())


# ----------------------------------------------------------------------------- the whole study, tiny
TINY = ["train_prompts=64", "heldout_prompts=6", "warm_start_steps=30", "warm_start_batch_size=32", "warm_start_lr=0.01",
        "rl_steps=2", "prompts_per_step=4", "n=8", "k=4", "eval_samples=16", "eval_ks=1,4,16", "layers=1", "width=32",
        "heads=2", "n_boot=50", "threads=1", "workers=1", "snr_every=0", "objectives=reinforce,best_of_k_sft"]
STUDY_ARGS = ["--seeds", "0", "--replication-seeds", "1", "--tune-seeds", "0", "--grid", "reinforce=0.02,0.2",
              "--grid", "best_of_k_sft=0.05", "--reference-ks", "2", "--validation-prompts", "5"]


def test_tiny_study_end_to_end_and_recipe_reproduces_it(tmp_path, capsys):
    out = tmp_path / "study"
    argv = ["demo", "--study", "--output", str(out), "--quiet", *[a for s in TINY for a in ("--set", s)], *STUDY_ARGS]
    # the validation grid alone first: the tuning seed's stages only; the full run below reuses them
    assert main([*argv, "--grid-only"]) == 0
    assert "(validation grid only)" in (out / "study.md").read_text() and not (out / "seed1").exists()
    assert "Main seeds" not in (out / "study.md").read_text() and (out / "frontier.png").is_file()
    grid_stamps = {p: p.stat().st_mtime_ns for p in out.glob("seed0/*/summary.json")}
    assert len(grid_stamps) == 8  # warm start + 2 x 2 REINFORCE + plain SFT + BoN-SFT and its placebo
    assert main(argv) == 0
    capsys.readouterr()
    assert {p: p.stat().st_mtime_ns for p in grid_stamps} == grid_stamps
    md, res = (out / "study.md").read_text(), json.loads((out / "study.json").read_text())
    assert (out / "frontier.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert res["design"]["lr_grid"] == {"reinforce": [0.02, 0.2], "best_of_k_sft": [0.05]}
    assert res["machine"]["commit"] and res["seconds"]["total"] > 0 and "commit " in md and "wall time" in md
    # every grid point of the tuning seed ran with its placebo; plain SFT has none
    s0 = out / "seed0"
    for key in ("reinforce-lr0.02", "reinforce-placebo-lr0.02", "reinforce-lr0.2", "reinforce-placebo-lr0.2", "sft-lr0.05",
                "best_of_k_sft-k2-lr0.05", "best_of_k_sft-k2-placebo-lr0.05"):
        assert (s0 / key / "validation-T1-P5-n16.npz").is_file(), key
    assert not (s0 / "sft-placebo-lr0.05").exists()
    # the grid's final evaluations are never read: no samples file; a held-out run on another seed writes one
    assert not list(s0.glob("*-lr*/heldout_samples.jsonl"))
    assert list(out.glob("seed1/*-lr*/heldout_samples.jsonl"))
    cfg = (s0 / "reinforce-placebo-lr0.2" / "config.toml").read_text()
    assert "placebo = true" in cfg and "lr = 0.2" in cfg and 'objective = "reinforce"' in cfg
    cfg = (s0 / "sft-lr0.05" / "config.toml").read_text()
    assert 'objective = "best_of_k_sft"' in cfg and "\nk = 1\n" in cfg and 'verifier = "proxy"' in cfg
    # the grid's numbers are the validation pools' own: pass@1 of a pool is the mean of its 0/1 rewards (Chen et al.
    # 2021's estimator at k = 1), and the placebo difference is the difference of those means over the same prompts
    warm = np.load(s0 / "warm_start" / "validation-T1-P5-n16.npz")["rewards"]
    for row in res["grid"]["rows"]:
        key = f"{row['arm']}-lr{row['lr']:g}"
        rewards = np.load(s0 / key / "validation-T1-P5-n16.npz")["rewards"]
        assert row["pass1"] == pytest.approx(rewards.mean(), abs=1e-12)
        if row["arm"] == "reinforce":
            plc = np.load(s0 / f"reinforce-placebo-lr{row['lr']:g}" / "validation-T1-P5-n16.npz")["rewards"]
            assert row["placebo1"]["mean"] == pytest.approx(plc.mean() - warm.mean(), abs=1e-12)
    # the choice follows the rule: the admissible setting with the highest validation pass@16
    rows = [r for r in res["grid"]["rows"] if r["arm"] == "reinforce"]
    ok = [r for r in rows if r["admissible"]]
    best = max(ok, key=lambda r: (r["passK"], -r["lr"]))["lr"] if ok else 0.02
    assert res["grid"]["chosen"]["reinforce"]["lr"] == best
    # the validation prompts are neither training nor held-out prompts of the seed
    dc = DemoConfig(train_prompts=64, heldout_prompts=6)
    train, held = get_task("refunds").split(n_train=64, n_eval=6, seed=0)
    val = {e.prompt for e in validation_split(dc, 5)}
    assert not val & ({e.prompt for e in train} | {e.prompt for e in held})
    # held-out: the replication seed ran every arm at its chosen lr, reported apart
    lr = res["grid"]["chosen"]["reinforce"]["lr"]
    assert (out / "seed1" / f"reinforce-lr{lr:g}" / "pools-T1-P6-n16.npz").is_file()
    assert not (out / "seed1" / "reinforce-lr0.02" / "validation-T1-P5-n16.npz").exists()  # nothing tuned on seed 1
    assert "## Main seeds: every objective at its chosen setting" in md and "## Replication seeds (nothing tuned on them)" in md
    assert "BoN-SFT against plain SFT" in md and "Paired difference from plain SFT (references' NLL)" in md
    assert "By prompt family, mean over seeds 0 (pass@1 / pass@16)" in md and "| plain | return |" in md
    held1 = res["held_out"]["replication"]["1"]
    name = f"leave-one-out REINFORCE, lr {lr:g}" + ("" if res["grid"]["chosen"]["reinforce"]["admissible"] else " (no admissible lr)")
    rewards = np.load(out / "seed1" / f"reinforce-lr{lr:g}" / "pools-T1-P6-n16.npz")["rewards"]
    assert held1[name]["pass"][0] == pytest.approx(rewards.mean(), abs=1e-12)
    # recipes/study.py is the same command: on the finished directory it reuses every stage and writes the same tables
    stamps = {p: p.stat().st_mtime_ns for p in out.glob("seed*/*/summary.json")}
    argv_recipe = [str(ROOT / "recipes" / "study.py"), str(out), "--quiet", *[a for s in TINY for a in ("--set", s)], *STUDY_ARGS]
    old = sys.argv
    try:
        sys.argv = argv_recipe
        with pytest.raises(SystemExit) as done:
            runpy.run_path(str(ROOT / "recipes" / "study.py"), run_name="__main__")
    finally:
        sys.argv = old
    assert done.value.code == 0
    assert {p: p.stat().st_mtime_ns for p in out.glob("seed*/*/summary.json")} == stamps
    again = (out / "study.md").read_text()

    def body(text):  # the header line with the wall time, the load and the commit differs between the runs
        return [ln for ln in text.splitlines() if not ln.startswith("Machine ")]
    assert body(again) == body(md)


def test_credit_bias_rows_separate_the_unbiased_credit_from_the_biased_ones():
    from bonft.trainer.demo.study import bias_table, credit_bias

    rows = {r["objective"]: r for r in credit_bias(DemoConfig(k=4, n=8), ("reinforce", "pass_at_k", "pass_at_k_plugin",
                                                                        "pass_at_k_positive"))}
    assert list(rows) == ["pass_at_k", "pass_at_k_plugin", "pass_at_k_positive"]  # REINFORCE: not a binary pass@k credit
    # the unbiased U-statistic credit (Chen et al. 2021) has the exact gradient as its mean: projection 1
    assert rows["pass_at_k"]["unbiased"] and rows["pass_at_k"]["rel_bias"] < 1e-9
    assert rows["pass_at_k"]["projection"] == pytest.approx([1.0, 1.0], abs=1e-9)
    # plug-in 1-(1-p_hat)^k is biased for finite n (Jensen); positive-only credit drops the push-down of wrong
    # samples, which shrinks the gradient along itself (derivation in bonft.objectives.credit; tests/test_objcheck.py)
    assert not rows["pass_at_k_plugin"]["unbiased"] and rows["pass_at_k_plugin"]["rel_bias"] > 1e-3
    lo, hi = rows["pass_at_k_positive"]["projection"]
    assert not rows["pass_at_k_positive"]["unbiased"] and 0 < lo <= hi < 1
    assert rows["pass_at_k_positive"]["cosine"] == pytest.approx(1.0, abs=1e-9)
    table = bias_table(list(rows.values()))
    assert "| pass@k plug-in | 4 | 8 |" in table and "| pass@k unbiased | 4 | 8 |" in table and "| no |" in table
