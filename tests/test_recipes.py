"""Every recipe carries the setting the study supports, names the study row behind it, and runs.

Source of the setting: docs/study_results.md, "The setting" (RL: 60 steps x 64 prompts x 32 samples, plain
SGD with 5 warm-up steps, no clipping, anchor_weight 0.2, on the refunds task after 400 warm-start steps) and
its table of chosen settings (each objective's learning rate, chosen on the study's validation split); the
checks below read the document, not the code. The demo's DemoConfig shares the setting.
"""
import json
import re
from pathlib import Path

import pytest

from bonft.cli import main
from bonft.trainer.config import load_config, tomllib

ROOT = Path(__file__).resolve().parent.parent
RECIPES = sorted((ROOT / "recipes").glob("*.toml"))
STUDY = (ROOT / "docs" / "study_results.md").read_text(encoding="utf-8")
# the study's RL setting as docs/study_results.md states it, key by key (the learning rate is each objective's own)
SETTING = {"task": "refunds", "warm_start_steps": 400, "rl_steps": 60, "prompts_per_step": 64, "n": 32,
           "optimizer": "sgd", "warmup_steps": 5, "clip_grad_norm": 0.0, "anchor_weight": 0.2}


def chosen_lrs() -> dict[str, float]:
    """The study document's table of chosen settings: objective label -> learning rate (admissible ones)."""
    part = STUDY[STUDY.index("Chosen settings (validation split)"):]
    part = part[:part.index("\n\n", part.index("|---"))]
    return {label: float(lr) for label, lr in re.findall(r"^\| ([^|]+?) \| ([0-9.]+) \| yes \|$", part, re.M)}


def grid_admissible(label: str, lr: float) -> bool:
    """The study document's validation grid: is ``label`` at ``lr`` admissible (its placebo within noise)?"""
    rows = re.findall(rf"^\| {re.escape(label)} \| {lr:g} \|.*\| (yes|no) \|[^|]*\|$", STUDY, re.M)
    assert len(rows) == 1, (label, lr, rows)
    return rows[0] == "yes"


def test_the_setting_is_the_one_the_study_document_states():
    setting = STUDY[STUDY.index("## The setting"):]
    setting = setting[:setting.index("\n## ", 5)]
    for phrase in ("`refunds`", "400 steps", "60 steps x 64 prompts x 32 samples", "plain SGD (5 warm-up steps)",
                   "no clipping", "`anchor_weight = 0.2`"):
        assert phrase in setting, phrase


def test_the_chosen_settings_table_covers_every_study_objective():
    from bonft.trainer.demo.study import StudyConfig, arms

    assert set(chosen_lrs()) == {arm.label for arm in arms(StudyConfig())}  # every arm admissible at its choice


def test_demo_defaults_are_the_same_setting_at_an_admissible_lr():
    from bonft.trainer.demo import DemoConfig

    dc = DemoConfig()
    assert {key: getattr(dc, key) for key in SETTING} == SETTING
    assert dc.lr == chosen_lrs()["pass@k unbiased"]  # the demo's headline objective at its chosen lr
    # the same lr is admissible for the demo's other objective (its placebo within noise on the validation split)
    assert grid_admissible("leave-one-out REINFORCE", dc.lr) and grid_admissible("pass@k unbiased", dc.lr)


@pytest.mark.parametrize("recipe", RECIPES, ids=[p.stem for p in RECIPES])
def test_recipe_uses_the_validated_setting_and_names_its_row(recipe):
    cfg = load_config(recipe)
    assert {key: getattr(cfg, key) for key in SETTING} == SETTING, recipe.name
    comments = " ".join(ln.lstrip("# ") for ln in recipe.read_text(encoding="utf-8").splitlines() if ln.startswith("#"))
    rows = re.findall(r'Study row: "([^"]+)"', comments)
    chosen = chosen_lrs()
    if rows:  # a row of the study's chosen settings, and the recipe runs at that row's lr
        assert len(rows) == 1 and rows[0] in chosen, rows
        assert cfg.lr == chosen[rows[0]], (recipe.name, cfg.lr, chosen[rows[0]])
    else:  # not in the study: the lr chosen for the closest objective it tested, pass@k unbiased
        assert "Not in the study" in comments and cfg.lr == chosen["pass@k unbiased"], recipe.name


def test_placebo_recipe_is_the_pass_at_k_recipe_with_shuffled_outcomes():
    real = tomllib.loads((ROOT / "recipes" / "pass_at_k.toml").read_text(encoding="utf-8"))
    placebo = tomllib.loads((ROOT / "recipes" / "pass_at_k_placebo.toml").read_text(encoding="utf-8"))
    assert placebo.pop("placebo") is True
    for key in ("name", "run_dir"):
        real.pop(key), placebo.pop(key)
    assert placebo == real


TINY = ["layers=1", "width=32", "heads=2", "train_prompts=32", "heldout_prompts=2", "warm_start_steps=1",
        "warm_start_batch_size=8", "rl_steps=2", "prompts_per_step=4", "n=16", "eval_samples=16", "eval_ks=1,16",
        "save_every=0", "plots=false", "n_boot=20", "threads=1", "log_every=1"]


@pytest.mark.parametrize("recipe", RECIPES, ids=[p.stem for p in RECIPES])
def test_recipe_runs_two_steps_in_its_own_setting(recipe, tmp_path, capsys):
    # only the sizes shrink: optimizer, lr, warm-up, clipping and anchor stay the recipe's
    out = tmp_path / "r"
    assert main(["train", str(recipe), "--output", str(out), "--quiet", *[a for s in TINY for a in ("--set", s)]]) == 0
    capsys.readouterr()
    written = load_config(out / "config.toml")
    lr = load_config(recipe).lr
    assert (written.optimizer, written.lr, written.anchor_weight, written.clip_grad_norm) == ("sgd", lr, 0.2, 0.0)
    rl = [json.loads(ln) for ln in (out / "metrics.jsonl").read_text().splitlines()]
    rl = [r for r in rl if r.get("kind") == "train" and r.get("stage") == "rl"]
    assert [r["step"] for r in rl] == [2, 3]
    assert all("anchor/kl" in r for r in rl)  # the anchor to the warm start is on
    assert all(r["grad/clipped"] == 0 for r in rl)  # no clipping
    assert (out / "checkpoints" / "step-00000003" / "model").is_dir()
