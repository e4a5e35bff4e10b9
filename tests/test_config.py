"""TrainConfig: validation messages, TOML round trip, --set overrides, the documented key table."""
import dataclasses
from pathlib import Path

import pytest

from bonft._core.toml import tomllib
from bonft.trainer.config import FIELDS, TrainConfig, apply_overrides, config_reference, from_dict, load_config, to_toml

BASE = {"rl_steps": 2}


def make(**kw):
    return from_dict({**BASE, **kw})


@pytest.mark.parametrize(
    "kw, exc, match",
    [
        ({"k": 16, "n": 8}, ValueError, r"k must be <= n \(n=8\), got k=16"),
        ({"objective": "ppo"}, ValueError, r"objective must be one of .*got 'ppo'"),
        ({"lr": -1e-3}, ValueError, r"lr must be a finite number >= 0, got lr=-0.001"),
        ({"lr": 0.0}, ValueError, r"lr must be a finite number > 0, got lr=0.0"),
        ({"lr": "fast"}, TypeError, r"lr must be a real number, got str 'fast'"),
        ({"n": 2.0}, TypeError, r"n must be an int, got float 2.0"),
        ({"prompts_per_step": 10, "grad_accum": 3}, ValueError, r"prompts_per_step must be divisible by grad_accum \(grad_accum=3\)"),
        ({"eval_ks": [1, 128]}, ValueError, r"eval_ks must be <= eval_samples \(eval_samples=64\)"),
        ({"top_p": 1.5}, ValueError, r"top_p must be in \(0, 1\], got top_p=1.5"),
        ({"verifier": "oracle"}, ValueError, r"verifier must be 'exact', 'proxy', one of \('unit_tests', 'reward_model'\) or "
                                             r"'module:function', got 'oracle'"),
        ({"k_schedule": "linear"}, ValueError, r"k_schedule='linear' needs k_final >= 1"),
        ({"k_final": 99}, ValueError, r"k_final must be <= n \(n=16\), got k_final=99"),
        ({"objective": "reinforce", "n": 1, "k": 1}, ValueError, r"n must be >= 2 for a leave-one-out baseline"),
        ({"rl_steps": 0}, ValueError, r"nothing to train"),
        ({"plots": "yes"}, TypeError, r"plots must be true or false, got str 'yes'"),
        ({"task": "jsonl"}, ValueError, r"prompts_file must name a JSONL file"),
        ({"temperature": float("nan")}, ValueError, r"temperature must be a finite number"),
        ({"optimizer": "adam"}, ValueError, r"optimizer must be one of \('adamw', 'sgd'\), got 'adam'"),
        ({"adam_eps": 0.0}, ValueError, r"adam_eps must be a finite number > 0, got adam_eps=0.0"),
        ({"confidence": 1.0}, ValueError, r"confidence must be in \(0, 1\), got confidence=1.0"),
        ({"momentum": 0.9}, ValueError, r"momentum applies to optimizer='sgd' only, got momentum=0.9 with optimizer='adamw'"),
        ({"momentum": 1.0, "optimizer": "sgd"}, ValueError, r"momentum must be in \[0, 1\), got momentum=1.0"),
        ({"placebo": 1}, TypeError, r"placebo must be true or false, got int 1"),
        ({"snr_every": -1}, ValueError, r"snr_every must be >= 0, got"),
        ({"eval_ks": [1, 1, 4]}, ValueError, r"eval_ks must not repeat a k .*got eval_ks=\[1, 1, 4\]"),
        # keys that cannot take effect with the others
        ({"k_final": 2}, ValueError, r"k_final applies to k_schedule 'linear' or 'geometric' \(with 'constant', k stays 8\), "
                                     r"got k_final=2 with k_schedule='constant'"),
        ({"optimizer": "sgd", "adam_eps": 1e-3}, ValueError, r"adam_eps applies to optimizer='adamw' only, got adam_eps=0.001"),
        ({"task": "user", "prompts_file": "x.jsonl"}, ValueError,
         r"prompts_file applies to task = 'jsonl' only \(task 'user' takes no prompts file; your own data goes in task_params.data\)"),
    ],
)
def test_bad_values_name_the_key(kw, exc, match):
    with pytest.raises(exc, match=match):
        make(**kw)


def test_unknown_key_is_an_error():
    with pytest.raises(ValueError, match=r"unknown config key\(s\) \['lerning_rate'\]"):
        from_dict({**BASE, "lerning_rate": 1e-3})


def test_overrides_convert_types():
    v = apply_overrides(BASE, ["lr=2e-4", "n=32", "eval_ks=1,8", "plots=false", "objective=best_of_k", "task_params.hard_share=0.25",
                               "placebo=true", "optimizer=sgd", "momentum=0.5", "snr_every=10"])
    c = from_dict(v)
    assert (c.lr, c.n, c.eval_ks, c.plots, c.objective) == (2e-4, 32, [1, 8], False, "best_of_k")
    assert (c.placebo, c.optimizer, c.momentum, c.snr_every, c.adam_eps) == (True, "sgd", 0.5, 10, 1e-8)
    assert c.task_params == {"hard_share": 0.25}


def test_quoted_string_overrides_read_as_in_a_recipe():
    # a recipe line `name = 'x y'` and `--set name='x y'` give the same value (TOML 1.0's literal and basic strings)
    v = apply_overrides(BASE, ["name='x y'", 'run_dir="runs/a b"', "objective=best_of_k", "verifier='exact'"])
    assert (v["name"], v["run_dir"], v["objective"], v["verifier"]) == ("x y", "runs/a b", "best_of_k", "exact")
    assert apply_overrides(BASE, ['name="tab\\there"'])["name"] == "tab\there"  # a basic string's escape, as TOML reads it
    with pytest.raises(ValueError, match=r"name must be a string; a quoted one is read as TOML .*not a valid TOML string"):
        apply_overrides(BASE, ['name="a"b"'])


@pytest.mark.parametrize("item, match", [("n", r"--set expects key=value, got 'n'"), ("nn=3", r"--set key must be a config field"),
                                         ("n=many", r"n must be an int, got 'many'"),
                                         ("eval_ks=1,,4", r"eval_ks must be a comma-separated list with no empty item, got '1,,4'"),
                                         ("eval_ks=[1,4,]", r"eval_ks must be a comma-separated list with no empty item")])
def test_bad_overrides(item, match):
    with pytest.raises(ValueError, match=match):
        apply_overrides(BASE, [item])


def test_toml_round_trip(tmp_path):
    c = make(objective="pass_at_k_plugin", k=4, k_final=1, k_schedule="geometric", eval_ks=[1, 2, 4], task_params={"hard_share": 0.3, "mode": "x"})
    p = tmp_path / "r.toml"
    p.write_text(to_toml(c))
    assert load_config(p) == c
    assert load_config(p, ["k=2"]).k == 2


def test_missing_and_broken_recipe(tmp_path):
    with pytest.raises(FileNotFoundError, match="recipe not found"):
        load_config(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("k = = 3\n")
    with pytest.raises(ValueError, match="not valid TOML"):
        load_config(bad)


def test_every_field_documented_in_docs():
    doc = (Path(__file__).parent.parent / "docs" / "training.md").read_text()
    missing = [f.name for f in dataclasses.fields(TrainConfig) if f"`{f.name}`" not in doc]
    assert missing == []
    assert all(f.metadata.get("help") for f in dataclasses.fields(TrainConfig))
    # the table in the doc is the generated one (regenerate with python -m bonft.trainer.config)
    assert config_reference() in doc


def test_recipes_load():
    recipes = sorted((Path(__file__).parent.parent / "recipes").glob("*.toml"))
    assert len(recipes) >= 6
    objectives = {load_config(p).objective for p in recipes}
    assert objectives == {"reinforce", "best_of_k", "pass_at_k", "pass_at_k_plugin", "pass_at_k_positive", "best_of_k_sft",
                          "majority_vote"}


# The renamed keys of 0.3 (CHANGELOG.md): the old spelling is read with a warning naming the new key.
OLD_KEYS = [("n_train", "train_prompts", 40), ("n_eval", "heldout_prompts", 7), ("eval_n", "eval_samples", 32),
            ("sft_steps", "warm_start_steps", 3), ("sft_batch_size", "warm_start_batch_size", 16),
            ("sft_lr", "warm_start_lr", 0.01)]


@pytest.mark.parametrize("old, new, value", OLD_KEYS)
def test_old_key_spelling_is_read_with_a_warning_naming_the_new_key(old, new, value, tmp_path):
    from bonft.trainer.config import DeprecatedKeyWarning

    warm = {} if new == "warm_start_steps" else {"warm_start_steps": 3}  # the warm start's keys need one to take effect
    with pytest.warns(DeprecatedKeyWarning, match=rf"config key '{old}' is now called '{new}'"):
        assert getattr(make(**warm, **{old: value}), new) == value
    with pytest.warns(DeprecatedKeyWarning, match=rf"--set config key '{old}' is now called '{new}'"):
        assert apply_overrides({}, [f"{old}={value}"])[new] == value
    recipe = tmp_path / "old.toml"
    recipe.write_text(f"rl_steps = 2\n{old} = {value}\n" + "".join(f"{k} = {v}\n" for k, v in warm.items()))
    with pytest.warns(DeprecatedKeyWarning, match=rf"'{old}' is now called '{new}'"):
        assert getattr(load_config(recipe), new) == value
    with pytest.warns(DeprecatedKeyWarning), pytest.raises(
            ValueError, match=rf"{old} and {new} are the same key \(old and new spelling\), got both; keep {new}"):
        make(**warm, **{old: value, new: value})


def test_objective_loo_reinforce_is_read_as_reinforce_with_a_warning():
    from bonft.trainer.config import DeprecatedKeyWarning

    with pytest.warns(DeprecatedKeyWarning, match=r"objective 'loo_reinforce' is now called 'reinforce'"):
        assert make(objective="loo_reinforce", k=1).objective == "reinforce"


@pytest.mark.parametrize("key, value", [("arch", "llama"), ("layers", 3), ("width", 64), ("heads", 2),
                                        ("max_positions", 200), ("layers", 2)])
def test_tiny_model_keys_with_start_from_are_an_error(key, value):
    # given explicitly in a recipe, even at its default value (layers = 2), the key cannot take effect
    with pytest.raises(ValueError, match=rf"{key} must be left unset with start_from \(the model comes from 'ckpt'\), "
                                         rf"got {key}={value!r}"):
        make(start_from="ckpt", **{key: value})
    if value != TrainConfig.__dataclass_fields__[key].default:  # the dataclass itself: any non-default value
        with pytest.raises(ValueError, match=rf"{key} must be left unset with start_from"):
            TrainConfig(start_from="ckpt", rl_steps=1, **{key: value})


def test_a_config_with_start_from_writes_no_tiny_model_keys():
    text = to_toml(make(start_from="ckpt"))
    assert 'start_from = "ckpt"' in text
    assert [ln.split(" =")[0] for ln in text.splitlines() if ln.split(" =")[0] in
            ("arch", "layers", "width", "heads", "max_positions")] == []
    assert "layers = 2" in to_toml(make())  # built from scratch: the keys are the model's


def test_unknown_task_names_the_task_key():
    with pytest.raises(ValueError, match=r"^task must be one of \('ledger', 'restock', 'refunds', .*\), got 'x'$"):
        make(task="x")


# A key that cannot take effect is an error, not ignored (the project's rule for every option): the built-in
# objectives say which keys their credit reads (bonft.trainer.objectives.Objective.reads_k / reads_correct).
@pytest.mark.parametrize("kw, key", [
    ({"objective": "reinforce", "k": 4}, "k"),  # reinforce's leave-one-out credit targets the mean reward
    ({"objective": "reinforce", "k_schedule": "linear", "k_final": 1}, "k_final"),
    ({"objective": "reinforce", "correct_threshold": 0.7}, "correct_threshold"),
    ({"objective": "best_of_k", "correct_threshold": 0.7}, "correct_threshold"),  # trains on the rewards themselves
    ({"objective": "best_of_k_sft", "correct_threshold": 0.7}, "correct_threshold"),
    ({"objective": "majority_vote", "correct_threshold": 0.7}, "correct_threshold"),
    ({"warm_start_lr": 1e-3}, "warm_start_lr"),  # warm_start_steps = 0: no warm start runs
    ({"warm_start_batch_size": 16}, "warm_start_batch_size"),
])
def test_a_key_the_run_never_reads_is_refused_naming_it(kw, key):
    with pytest.raises(ValueError, match=rf"^{key} cannot take effect here \(.*\); leave it unset, got {key}="):
        make(**kw)


def test_keys_are_accepted_where_they_take_effect_and_reinforce_runs_at_k_1():
    assert make(objective="pass_at_k", correct_threshold=0.7).correct_threshold == 0.7
    assert make(objective="pass_at_k_positive", correct_threshold=0.7).correct_threshold == 0.7
    assert make(warm_start_steps=3, warm_start_lr=1e-3, warm_start_batch_size=16).warm_start_lr == 1e-3
    assert make(objective="mine:objective", correct_threshold=0.7, k=4).k == 4  # an objective of your own may read both
    # an unset k of reinforce is what it targets, 1, so that k <= n holds with n below the default k of 8
    cfg = make(objective="reinforce", n=4)
    assert (cfg.k, FIELDS["k"].default) == (1, 8)
    assert make(objective="reinforce", k=1).k == 1
    assert from_dict(tomllib.loads(to_toml(cfg))) == cfg  # the saved recipe reads back to the same run


def test_the_demo_leaves_unset_what_each_stage_never_reads(tmp_path):
    # one demo recipe feeds every stage: its warm-start keys and correct_threshold take effect in some stages only
    from bonft.trainer.demo.pipeline import DemoConfig, objective_config, warm_config

    dc = DemoConfig(run_dir=str(tmp_path), warm_start_lr=1e-3, warm_start_batch_size=16, correct_threshold=0.7)
    warm = warm_config(dc, tmp_path)
    assert (warm.warm_start_lr, warm.warm_start_batch_size) == (1e-3, 16)
    stages = {name: objective_config(dc, name, str(tmp_path / "w"), tmp_path) for name in ("reinforce", "pass_at_k", "best_of_k")}
    assert {name: (c.k, c.correct_threshold, c.warm_start_lr, c.warm_start_batch_size) for name, c in stages.items()} == {
        "reinforce": (1, 0.5, 3e-3, 128), "pass_at_k": (8, 0.7, 3e-3, 128), "best_of_k": (8, 0.5, 3e-3, 128)}
