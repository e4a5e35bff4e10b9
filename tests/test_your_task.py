"""End to end with a user's own model, data and verifiers: `bonft train`, `bonft eval` and `bonft sample`.

A tiny GPT-2 and its tokenizer (with a chat template) saved to a plain transformers directory; prompts
in a saved `datasets` dataset with no answer column; a verifier module in the working directory that
reads a column of each prompt's row; a separate evaluation verifier. What is checked against outside facts:

* best-of-k under any selector is at most pass@k under the same rewards, per prompt (the selected
  sample's reward cannot exceed the best reward among the k; Chow et al. 2024, definitions), so the
  verifier's best-of-k row never exceeds the evaluation verifier's pass@k row;
* at k = 1, pass@k is the mean reward of single samples (Chen et al. 2021, eq. 1 with k = 1);
* the samples file's rewards are the evaluation verifier's: recomputed here by hand from each response text;
* the same run with a LoRA adapter (Hu et al. 2021) resumed after Ctrl-C ends bit for bit where the uninterrupted
  run ends (every adapter tensor of every checkpoint and every metrics line; common practice, no outside source).
"""
import json

import datasets
import pytest
import torch
from safetensors.torch import load_file

from bonft.cli import main
from bonft.tasks import build_tokenizer
from bonft.trainer import steps
from bonft.trainer.models import build_tiny_model
from bonft.trainer.zero_credit import ZeroCreditWarning

TEMPLATE = ("{{ bos_token }}{% for m in messages %}{{ m['role'] }}: {{ m['content'] }}\n{% endfor %}"
            "{% if add_generation_prompt %}assistant: {% endif %}")
GRADER = '''
def loose(prompts, responses, rows):
    """Training verifier: longer is better (gameable on purpose); a score, no 0/1 reward."""
    assert all(isinstance(row["total"], int) for row in rows)  # the row's columns arrive
    return [float(len(r)) for r in responses]

def strict(prompts, responses):
    """Evaluation verifier: the response holds a number at all (a stand-in for a real check)."""
    return [float(any(c.isdigit() for c in r)) for r in responses]

def never(prompts, responses):
    return [0.0] * len(responses)
'''


@pytest.fixture
def user_setup(tmp_path, monkeypatch):
    tok = build_tokenizer()
    tok.chat_template = TEMPLATE
    model = build_tiny_model("gpt2", vocab_size=len(tok), layers=1, width=32, heads=2, max_positions=64, seed=0,
                             pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id)
    model.save_pretrained(str(tmp_path / "my_model"))
    tok.save_pretrained(str(tmp_path / "my_model"))
    rows = [{"question": f"jars {a}+{b}", "total": a + b} for a in range(1, 6) for b in range(1, 5)]  # 20 prompts
    datasets.Dataset.from_list(rows).save_to_disk(str(tmp_path / "jars"))
    (tmp_path / "jar_grader.py").write_text(GRADER)
    monkeypatch.chdir(tmp_path)
    recipe = tmp_path / "mine.toml"
    recipe.write_text(
        'start_from = "my_model"\ntask = "user"\nverifier = "jar_grader:loose"\neval_verifier = "jar_grader:strict"\n'
        'objective = "pass_at_k"\nk = 4\nn = 8\nrl_steps = 2\nprompts_per_step = 4\nlr = 1e-3\nwarmup_steps = 1\n'
        'train_prompts = 14\nheldout_prompts = 6\neval_samples = 8\neval_ks = [1, 4, 8]\nmax_new_tokens = 3\n'
        'n_boot = 50\nplots = false\nsave_every = 0\nthreads = 1\n'
        '[task_params]\ndata = "jars"\nprompt_field = "question"\nchat_template = true\nsystem = "count jars"\n')
    return tmp_path, recipe


def curves_ok(ev):
    assert ev["eval_verifier"] == "jar_grader:strict" and ev["verifier"] == "jar_grader:loose"
    best, passk = ev["best_of_k"]["jar_grader:loose"]["mean"], ev["pass_at_k"]["mean"]
    assert all(b <= p + 1e-12 for b, p in zip(best, passk))
    assert 0 < passk[-1] and best[-1] < passk[-1]  # the gap is there: the longest sample is not always the one with a number
    assert passk[0] == pytest.approx(ev["mean_reward"], abs=1e-12)


def test_train_eval_sample_with_a_verifier_and_a_separate_eval_verifier(user_setup, capsys):
    tmp, recipe = user_setup
    assert main(["train", str(recipe), "--output", str(tmp / "run"), "--quiet"]) == 0
    summary = json.loads((tmp / "run" / "summary.json").read_text())
    assert [e["step"] for e in summary["evaluations"]] == [0, 2]
    for ev in summary["evaluations"]:
        curves_ok(ev)
    capsys.readouterr()
    assert main(["eval", str(tmp / "run"), "--n", "8", "--ks", "1,8"]) == 0
    out = capsys.readouterr().out
    assert "pass@k [eval_verifier: jar_grader:strict]" in out and "best-of-k jar_grader:loose [verifier]" in out
    assert main(["sample", str(tmp / "run"), "--n", "4", "-o", str(tmp / "s.jsonl")]) == 0
    rows = [json.loads(line) for line in (tmp / "s.jsonl").read_text().splitlines()]
    assert len(rows) == 24
    for r in rows:  # the prompt text is the chat-rendered one; the reward is the evaluation verifier's, by hand
        assert r["prompt"].startswith("system: count jars\nuser: jars ") and r["prompt"].endswith("\nassistant: ")
        assert r["reward"] == float(any(c.isdigit() for c in r["response"]))
        assert r["score"] == float(len(r["response"]))
    assert 0 < sum(r["reward"] for r in rows) < 24  # not a vacuous check


def test_rl_steps_0_and_a_plain_model_directory_are_evaluated(user_setup, capsys):
    tmp, recipe = user_setup
    assert main(["train", str(recipe), "--output", str(tmp / "base"), "--quiet", "--set", "rl_steps=0"]) == 0
    evs = json.loads((tmp / "base" / "summary.json").read_text())["evaluations"]
    assert [e["step"] for e in evs] == [0]
    curves_ok(evs[0])
    capsys.readouterr()
    assert main(["eval", str(tmp / "my_model"), "--recipe", str(recipe), "--n", "8", "--ks", "1,8",
                 "--json", str(tmp / "e.json")]) == 0
    rep = json.loads((tmp / "e.json").read_text())
    curves_ok(rep)
    # the same policy, prompts and seeds as the rl_steps = 0 run: the same pass@k
    assert rep["pass_at_k"]["mean"] == [evs[0]["pass_at_k"]["mean"][i] for i in (0, 2)]


def test_zero_credit_warns_and_bad_rows_stop_before_any_step(user_setup, capsys):
    tmp, recipe = user_setup
    assert main(["train", str(recipe), "--output", str(tmp / "silent"), "--quiet", "--set", "verifier=jar_grader:never",
                 "--set", "eval_at_start=false"]) == 0
    err = capsys.readouterr().err  # the command prints each warning once on stderr
    assert err.count("the credit was zero on every one of the first 1 RL step (1 of 2: the first 10%, rounded up to whole steps") == 1
    assert "no sample was ever rewarded" in err
    with pytest.warns(ZeroCreditWarning):  # through the Python API: a warning of its own class
        from bonft.trainer.config import load_config
        from bonft.trainer.loop import train

        train(load_config(recipe, ["verifier=jar_grader:never", "eval_at_start=false", f"run_dir={tmp / 'api'}"]),
              progress=False)
    assert main(["train", str(recipe), "--output", str(tmp / "bad"), "--quiet", "--set", "eval_verifier=unit_tests"]) != 0
    err = capsys.readouterr().err
    assert "bonft train: error: 'jars' row 0: field 'tests' is missing, and verifier UnitTests needs it" in err
    assert len(err.strip().splitlines()) == 1 and not (tmp / "bad" / "checkpoints").exists()
    assert main(["train", str(recipe), "--output", str(tmp / "soft"), "--quiet", "--set", "eval_verifier="]) != 0
    assert ("eval_verifier must be set: the verifier 'jar_grader:loose' is the default evaluation verifier but gave "
            "rewards other than 0 and 1" in capsys.readouterr().err)  # lengths, not 0/1: it cannot define pass@k
    assert main(["train", str(recipe), "--output", str(tmp / "bad2"), "--quiet", "--set", "warm_start_steps=2"]) != 0
    assert ("warm_start_steps = 2 trains on reference responses, but 14 of 14 training prompts have none (e.g. 'jars' row"
            in capsys.readouterr().err)


def test_verifier_tables_in_recipes_overrides_and_config_toml(user_setup):
    from bonft.trainer.config import from_dict, load_config, to_toml

    tmp, recipe = user_setup
    cfg = load_config(recipe, ["verifier=reward_model", "verifier_params.path=rm", "verifier_params.threshold=0.5",
                               "eval_verifier=unit_tests", "eval_verifier_params.wall_time=3"])
    assert cfg.verifier_params == {"path": "rm", "threshold": 0.5} and cfg.eval_verifier_params == {"wall_time": 3}
    (tmp / "again.toml").write_text(to_toml(cfg))
    assert load_config(tmp / "again.toml") == cfg
    with pytest.raises(ValueError, match=r"verifier_params cannot take effect with verifier = 'exact' \(the task's own "
                                         r"checker takes no knobs\), got \['path'\]"):
        from_dict({"verifier_params": {"path": "rm"}, "rl_steps": 1})
    with pytest.raises(ValueError, match=r"eval_verifier must be 'exact', 'proxy', one of \('unit_tests', 'reward_model'\) "
                                         r"or 'module:function', got 'strict'"):
        from_dict({"eval_verifier": "strict", "rl_steps": 1})


def _without_times(run_dir):
    lines = [json.loads(x) for x in (run_dir / "metrics.jsonl").read_text().splitlines()]
    return [{k: v for k, v in r.items() if not k.startswith("time/") and k != "samples_per_s"} for r in lines]


def test_a_lora_adapter_trains_resumes_bit_for_bit_and_is_evaluated(user_setup, capsys, monkeypatch):
    # The whole path: the user's model, dataset without answers, function verifier and separate evaluation
    # verifier; a LoRA adapter (Hu et al. 2021) trained by `bonft train` with a pass@k objective, cut by Ctrl-C and
    # resumed (bit for bit equal to the uninterrupted run), then evaluated with both verifiers' rows.
    pytest.importorskip("peft")
    tmp, recipe = user_setup
    lora = ["--quiet", "--set", "adapter_rank=4", "--set", "adapter_scale=2", "--set", "rl_steps=4", "--set", "save_every=1",
            "--set", "keep_checkpoints=10", "--set", "anchor_weight=0.05", "--set", "recompute_activations=true"]
    assert main(["train", str(recipe), "--output", str(tmp / "lora"), *lora]) == 0
    real = steps.rl_step

    def ctrl_c_at_step_3(run, step, clock):
        if step == 2:
            raise KeyboardInterrupt
        return real(run, step, clock)

    monkeypatch.setattr(steps, "rl_step", ctrl_c_at_step_3)
    assert main(["train", str(recipe), "--output", str(tmp / "cut"), *lora]) == 130
    monkeypatch.setattr(steps, "rl_step", real)
    assert sorted(p.name for p in (tmp / "cut" / "checkpoints").iterdir()) == ["step-00000001", "step-00000002"]
    assert main(["train", str(recipe), "--output", str(tmp / "cut"), "--resume", *lora]) == 0
    for step in range(1, 5):  # every checkpoint of the resumed run equals the uninterrupted run's, bit for bit
        a, b = (load_file(str(tmp / run / "checkpoints" / f"step-{step:08d}" / "model" / "adapter_model.safetensors"))
                for run in ("lora", "cut"))
        assert a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)
    assert _without_times(tmp / "lora") == _without_times(tmp / "cut")
    assert not (tmp / "lora" / "checkpoints" / "step-00000004" / "model" / "model.safetensors").exists()  # adapter only
    summary = json.loads((tmp / "lora" / "summary.json").read_text())
    assert [e["step"] for e in summary["evaluations"]] == [0, 4]
    for ev in summary["evaluations"]:
        curves_ok(ev)
    trained = [r for r in _without_times(tmp / "lora") if r["kind"] == "train"]
    assert trained[-1]["anchor/kl"] > 0  # the adapter moved the policy off the base (the anchor)
    capsys.readouterr()
    assert main(["eval", str(tmp / "lora"), "--n", "8", "--ks", "1,8", "--json", str(tmp / "lora.json")]) == 0
    out = capsys.readouterr().out
    assert "pass@k [eval_verifier: jar_grader:strict]" in out and "best-of-k jar_grader:loose [verifier]" in out
    curves_ok(json.loads((tmp / "lora.json").read_text()))
