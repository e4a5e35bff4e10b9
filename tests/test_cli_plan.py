"""`bonft plan` end to end: samples file, exact file, model mode with the on-disk cache.

Outside references: the definition of best-of-k at its two ends, recomputed from the raw
file with the json module (k = 1: mean reward; k = n: the reward of the top-scored sample,
tied top scores sharing their mean reward), and enumeration of all k-tuples for exact mode.
"""
from __future__ import annotations

import itertools
import json
import math
import re
from collections import defaultdict

import numpy as np
import pytest

import bonft.plan.from_model
from bonft.cli import main
from bonft.io import write_samples
from bonft.tasks.examples import ledger_rows


@pytest.fixture()
def samples_file(tmp_path):
    path = tmp_path / "ledger.jsonl"
    write_samples(path, ledger_rows(n_prompts=40, n_samples=12, temperatures=(0.5, 0.8, 1.2), seed=7))
    return path


def raw_ends(path):
    """{T: (V_1, V_n)} from the raw rows: mean reward, and the top-scored sample's reward (definition)."""
    pools = defaultdict(list)
    with open(path) as f:
        for line in f:
            d = json.loads(line)
            pools[(d["temperature"], d["prompt_id"])].append((d["score"], d["reward"]))
    out = defaultdict(lambda: ([], []))
    for (t, _), pool in pools.items():
        top = max(s for s, _ in pool)
        tied = [r for s, r in pool if s == top]
        out[t][0].append(sum(r for _, r in pool) / len(pool))
        out[t][1].append(sum(tied) / len(tied))
    return {t: (np.mean(a), np.mean(b)) for t, (a, b) in out.items()}


def test_plan_command_on_samples_file(samples_file, tmp_path, capsys):
    out_json, plots = tmp_path / "plan.json", tmp_path / "plots"
    rc = main(["plan", "--samples", str(samples_file), "--budget-samples", "4", "--budget-tokens", "600",
               "--n-boot", "300", "--json", str(out_json), "--plot-dir", str(plots)])
    text = capsys.readouterr().out
    assert rc == 0, text
    assert "T=0.5" in text and "T=1.2" in text and "budget 4 samples/prompt" in text and "budget 600 tokens/prompt" in text
    assert "a fit of this data, not a law" in text
    d = json.loads(out_json.read_text())
    ref = raw_ends(samples_file)
    for i, t in enumerate(d["temperatures"]):
        assert d["value"][i][0] == pytest.approx(ref[t][0], abs=1e-12)  # k = 1: mean reward
        assert d["value"][i][-1] == pytest.approx(ref[t][1], abs=1e-12)  # k = n = 12: top-scored sample
    assert d["ks"] == list(range(1, 13)) and d["paired"] is True
    tokens = [c for c in d["budgets"] if c["kind"] == "tokens"][0]
    assert tokens["cost"] <= 600
    for name in ("plan_heatmap.png", "plan_curves.png"):
        assert (plots / name).read_bytes()[:4] == b"\x89PNG"


def test_plan_command_errors(samples_file, tmp_path, capsys):
    assert main(["plan"]) == 2
    assert "give exactly one of --samples, --model or --exact, got 0" in capsys.readouterr().err
    assert main(["plan", "--samples", str(samples_file), "--max-k", "20"]) == 2
    assert "max_k must be <= the smallest pool at every temperature (n=12" in capsys.readouterr().err
    assert main(["plan", "--samples", str(samples_file), "--temperatures", "0.5,x"]) == 2
    assert "--temperatures must be comma-separated numbers" in capsys.readouterr().err
    # every list option reads its items one way (parse_list): an empty item is an error, never dropped
    assert main(["plan", "--samples", str(samples_file), "--temperatures", "0.7,,1.0"]) == 2
    assert "--temperatures must be comma-separated values with none empty, got '0.7,,1.0'" in capsys.readouterr().err
    assert main(["plan", "--samples", str(samples_file), "--budget-samples", "4,"]) == 2
    assert "--budget-samples must be comma-separated values with none empty" in capsys.readouterr().err
    assert main(["plan", "--samples", str(tmp_path / "missing.jsonl")]) == 2
    assert "--samples file not found" in capsys.readouterr().err


@pytest.mark.parametrize("extra, match", [
    (["--n", "8"], r"--n applies to --model only \(sampling from a model\), got --n 8 with --samples"),
    (["--device", "cuda"], r"--device applies to --model only .*got --device cuda with --samples"),
    (["--top-p", "0.5"], r"--top-p applies to --model only .*got --top-p 0.5 with --samples"),
    (["--cache", "cachedir"], r"--cache applies to --model only .*got --cache cachedir with --samples"),
    (["--strategy", "best_of_k", "--budget-tokens", "100"], r"--budget-tokens has no effect with --strategy"),
    (["--strategy", "best_of_k", "--min-gain", "0.1"], r"--min-gain has no effect with --strategy"),
    (["--max-subsets", "10"], r"--max-subsets applies to --strategy with weighted_vote .*without --strategy"),
])
def test_plan_samples_refuses_options_that_cannot_take_effect(samples_file, extra, match, capsys):
    assert main(["plan", "--samples", str(samples_file), "--n-boot", "50", *extra]) == 2
    assert re.search(match, capsys.readouterr().err)


@pytest.mark.parametrize("extra, match", [
    (["--n-boot", "50"], r"--n-boot has no effect with --exact \(exact values have no bootstrap intervals\), got "
                         r"--n-boot 50 with --exact"),
    (["--confidence", "0.5"], r"--confidence has no effect with --exact .*got --confidence 0.5"),
    (["--seed", "3"], r"--seed has no effect with --exact"),
    (["--score-field", "foo"], r"--score-field applies to reading a --samples file, got --score-field foo with --exact"),
    (["--allow-duplicates"], r"--allow-duplicates applies to reading a --samples file, got --allow-duplicates with"),
    (["--n", "8"], r"--n applies to --model only .*with --exact"),
    (["--strategy", "majority_vote", "--answer-field", "a"], r"--answer-field has no effect with --exact \(answers "
                                                             r"come from the file's 'answers' field\)"),
    (["--strategy", "weighted_vote", "--max-subsets", "10"], r"--max-subsets has no effect with --exact"),
    (["--strategy", "best_of_k", "--plot-dir", "plots"], r"--plot-dir has no effect with --exact --strategy"),
])
def test_plan_exact_refuses_options_that_cannot_take_effect(tmp_path, extra, match, capsys):
    spec = tmp_path / "exact.json"
    spec.write_text(json.dumps({"logits": [0, 1], "scores": [0, 1], "rewards": [0, 1], "answers": ["a", "b"],
                                "temperatures": [1.0]}))
    assert main(["plan", "--exact", str(spec), "--max-k", "2", *extra]) == 2
    assert re.search(match, capsys.readouterr().err)


def test_plan_command_exact_file(tmp_path, capsys):
    logits, scores, rewards = [1.0, 0.0, -1.0], [0.2, 0.9, 0.5], [1.0, 0.0, 1.0]
    spec = tmp_path / "exact.json"
    spec.write_text(json.dumps({"logits": logits, "scores": scores, "rewards": rewards, "temperatures": [0.5, 1.0, 2.0]}))
    out_json = tmp_path / "exact_plan.json"
    assert main(["plan", "--exact", str(spec), "--max-k", "3", "--json", str(out_json)]) == 0
    d = json.loads(out_json.read_text())
    # reference: enumeration of all k-tuples of softmax(logits / T) (definition, distinct scores)
    for i, t in enumerate([0.5, 1.0, 2.0]):
        e = [math.exp(x / t) for x in logits]
        p = [x / sum(e) for x in e]
        for k in (1, 2, 3):
            v = sum(math.prod(p[j] for j in tup) * rewards[max(tup, key=lambda j: scores[j])]
                    for tup in itertools.product(range(3), repeat=k))
            assert d["value"][i][k - 1] == pytest.approx(v, abs=1e-10)
    assert d["lo"] is None and d["mode"] == "exact"
    capsys.readouterr()


def test_plan_command_model_mode_reuses_cache(tmp_path, monkeypatch, capsys):
    from bonft.tasks import build_tokenizer
    from bonft.trainer.checkpoint import save_model
    from bonft.trainer.models import build_tiny_model

    tok = build_tokenizer()
    model = build_tiny_model(vocab_size=len(tok), layers=1, width=32, heads=2, pad_token_id=tok.pad_token_id,
                             eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id, seed=1)
    save_model(model, tok, tmp_path / "ckpt")
    calls = []
    real = bonft.plan.from_model.sample  # the planner's own reference to the sampler

    def counting(*a, **kw):
        calls.append(kw["temperature"])
        return real(*a, **kw)

    monkeypatch.setattr(bonft.plan.from_model, "sample", counting)
    common = ["plan", "--model", str(tmp_path / "ckpt"), "--task", "ledger", "--n-prompts", "5", "--n", "3",
              "--max-new-tokens", "4", "--n-boot", "100", "--cache", str(tmp_path / "cache"), "--quiet"]
    assert main(common + ["--temperatures", "0.7,1.0", "--json", str(tmp_path / "a.json")]) == 0
    assert sorted(set(calls)) == [0.7, 1.0]
    calls.clear()
    assert main(common + ["--temperatures", "0.7,1.0,1.3", "--json", str(tmp_path / "b.json")]) == 0
    assert calls and set(calls) == {1.3}, f"second run sampled at {calls}"
    assert len(list((tmp_path / "cache").glob("plan-*.jsonl"))) == 3
    a, b = (json.loads((tmp_path / f).read_text()) for f in ("a.json", "b.json"))
    assert b["sampling"]["cached"] == [0.7, 1.0] and b["sampling"]["sampled"] == [1.3]
    np.testing.assert_array_equal(np.asarray(a["value"]), np.asarray(b["value"])[:2])  # same pools reused
    assert "reused T=[0.7, 1.0]" in capsys.readouterr().out


def test_plan_model_mode_samples_as_long_as_the_run_did(tmp_path, monkeypatch, capsys):
    # a bonft run records max_new_tokens (bonft sample and eval use it); a plain model directory records none
    import bonft.plan.from_model
    from bonft.tasks import build_tokenizer
    from bonft.trainer.checkpoint import save_checkpoint, save_model
    from bonft.trainer.config import TrainConfig, to_toml
    from bonft.trainer.models import build_tiny_model

    tok = build_tokenizer()
    model = build_tiny_model(vocab_size=len(tok), layers=1, width=32, heads=2, pad_token_id=tok.pad_token_id,
                             eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id, seed=1)
    save_checkpoint(tmp_path / "run", step=1, model=model, tokenizer=tok, optimizer=None,
                    config_toml=to_toml(TrainConfig(max_new_tokens=3, rl_steps=1)))
    save_model(model, tok, tmp_path / "plain")
    lengths, truncations = [], []
    real = bonft.plan.from_model.sample

    def recording(*a, **kw):
        lengths.append(kw["max_new_tokens"])
        truncations.append(kw["top_k"])
        return real(*a, **kw)

    monkeypatch.setattr(bonft.plan.from_model, "sample", recording)
    common = ["--task", "ledger", "--n-prompts", "2", "--n", "2", "--n-boot", "20", "--temperatures", "1.0", "--quiet"]
    for model_dir, extra, want, whence in [("run", [], 3, "the run's, from"), ("plain", [], 32, "the default for a model"),
                                           ("run", ["--max-new-tokens", "5"], 5, "--max-new-tokens")]:
        lengths.clear()
        assert main(["plan", "--model", str(tmp_path / model_dir), *common, *extra]) == 0
        assert set(lengths) == {want}, (model_dir, lengths)
        assert f"max_new_tokens {want} ({whence}" in capsys.readouterr().out
    assert set(truncations) == {0}
    truncations.clear()
    assert main(["plan", "--model", str(tmp_path / "plain"), *common, "--top-k", "3"]) == 0
    assert set(truncations) == {3}  # the sampler draws from the 3 most likely tokens
    assert main(["plan", "--samples", str(tmp_path / "none.jsonl"), "--top-k", "3"]) == 2
    assert "--top-k applies to --model only" in capsys.readouterr().err


def test_plan_model_mode_takes_the_first_n_prompts_of_a_prompts_file(tmp_path, capsys):
    from bonft.tasks import build_tokenizer
    from bonft.trainer.checkpoint import save_model
    from bonft.trainer.models import build_tiny_model

    tok = build_tokenizer()
    model = build_tiny_model(vocab_size=len(tok), layers=1, width=32, heads=2, pad_token_id=tok.pad_token_id,
                             eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id, seed=1)
    save_model(model, tok, tmp_path / "ckpt")
    prompts = tmp_path / "prompts.jsonl"
    prompts.write_text("".join(json.dumps({"prompt": f"add {i} and {i}", "answer": str(2 * i)}) + "\n"
                               for i in range(9)))
    argv = ["plan", "--model", str(tmp_path / "ckpt"), "--prompts-file", str(prompts), "--n", "3",
            "--max-new-tokens", "2", "--n-boot", "50", "--temperatures", "1.0", "--quiet"]
    assert main(argv + ["--n-prompts", "4", "--json", str(tmp_path / "p.json")]) == 0
    out = capsys.readouterr().out
    assert "model mode, 4 prompts" in out  # 4 of the file's 9 prompts were sampled, the table says where from
    assert json.loads((tmp_path / "p.json").read_text())["mode"] == "model"
    assert main(argv + ["--n-prompts", "10"]) == 2
    assert "--n-prompts must be <= the 9 prompts of" in capsys.readouterr().err
    assert main(["plan", "--samples", str(prompts), "--n-prompts", "4"]) == 2
    assert "--n-prompts applies to --model only" in capsys.readouterr().err
    assert main(["plan", "--samples", str(prompts), "--quiet"]) == 2  # only model mode has a progress bar to hide
    assert "--quiet applies to --model only (sampling from a model), got --quiet with --samples" in capsys.readouterr().err


def test_a_named_temperature_field_must_be_in_the_file(tmp_path, capsys):
    # a misspelt --temperature-field used to pool every temperature of the file into one pool without a word
    path = tmp_path / "s.jsonl"
    write_samples(path, ledger_rows(n_prompts=12, n_samples=4, temperatures=(0.7, 1.0), seed=1))
    assert main(["plan", "--samples", str(path), "--temperature-field", "temp", "--n-boot", "20"]) == 2
    assert "'temp'" in capsys.readouterr().err
    assert main(["plan", "--samples", str(path), "--temperature-field", "temperature", "--n-boot", "20"]) == 0


@pytest.mark.parametrize("extra, match", [
    (["--confidence", "1.5"], r"confidence must be in \(0, 1\)"),
    (["--budget-samples", "0"], "budget_samples must be >= 1"),
    (["--budget-tokens", "-1"], "budget_tokens must be a finite number > 0"),
    (["--min-gain", "nan"], "min_gain must be a finite number"),
    # options that depend on the grid and --n, known before any sampling
    (["--n-boot", "1000000"], r"n_boot x temperatures x max_k must be <= 134,217,728 .*got 1,000,000 x 4 x 64"),
    (["--temperatures", "0.5,0.50000001"], r"temperatures must be distinct as float32 .*got 0.5 and 0.50000001, "
                                            r"both T=0.5$"),
    (["--budget-tokens", "0.5"], r"budget_tokens must be >= 1 \(a sampled response costs at least one generated token"),
    (["--budget-samples", "4,4"], r"budget_samples must not repeat a budget .*got \[4, 4\] \(4 more than once\)"),
    (["--budget-samples", "8", "--n", "4"], r"budget_samples must be <= n \(n=4, the samples drawn per prompt\): the "
                                             r"grid cannot reach a larger budget, got budget_samples=8"),
    (["--budget-samples", "8", "--max-k", "4"], r"budget_samples must be <= max_k \(max_k=4, the largest k planned\)"),
    (["--device", "cuda:7"], r"--device must be one of \('auto', 'cpu', 'cuda'\), got 'cuda:7'"),
])
def test_plan_model_mode_refuses_bad_planner_options_before_loading_a_model(tmp_path, extra, match, capsys):
    # the model directory does not exist: an option error must come first, before any load or sampling
    argv = ["plan", "--model", str(tmp_path / "no-model"), "--task", "ledger", "--quiet", *extra]
    assert main(argv) == 2
    assert re.search(match, capsys.readouterr().err)


@pytest.mark.parametrize("spec, extra, match", [
    ({"temperatures": [1.0]}, ["--temperatures", "0.5"],
     r"--exact takes the temperatures once: --temperatures or the file's 'temperatures' field, got both"),
    ({"temperatures": [1.0], "answers": ["a", "b"]}, [],
     r"--exact file's 'answers' field is read only by --strategy majority_vote or weighted_vote, got it without"),
    ({"temperatures": [1.0], "answers": ["a", "b"]}, ["--strategy", "best_of_k"],
     r"'answers' field is read only by .*got it with --strategy best_of_k"),
])
def test_plan_exact_refuses_file_fields_that_cannot_take_effect(tmp_path, spec, extra, match, capsys):
    # the file's temperatures used to be replaced by --temperatures, and its answers ignored, without a word
    path = tmp_path / "exact.json"
    path.write_text(json.dumps({"logits": [0, 1], "scores": [0, 1], "rewards": [0, 1], **spec}))
    assert main(["plan", "--exact", str(path), "--max-k", "2", *extra]) == 2
    assert re.search(match, capsys.readouterr().err)


@pytest.mark.parametrize("extra", [[], ["--strategy", "best_of_k"]])
def test_plan_samples_refuses_two_temperatures_that_select_one_pool(samples_file, extra, capsys):
    # 0.5 and 0.50000001 are equal as float32: both selected the file's T=0.5 pool, planned twice as two columns
    assert main(["plan", "--samples", str(samples_file), "--temperatures", "0.5,0.50000001", "--n-boot", "20",
                 *extra]) == 2
    assert re.search(r"temperatures must select distinct pools, got 0.5 and 0.50000001, both the file's 0.5",
                     capsys.readouterr().err)


def test_a_plan_cache_file_reads_as_a_samples_file_without_a_repeat_warning(tmp_path, capsys):
    # the cache is bonft's own samples file: its rows carry a sample index, so identical short responses are
    # distinct samples, not "a file concatenated with itself"; a cache written without the index is still reused
    import warnings

    from bonft.io import DuplicateRowsWarning
    from bonft.tasks import build_tokenizer
    from bonft.trainer.checkpoint import save_model
    from bonft.trainer.models import build_tiny_model

    tok = build_tokenizer()
    model = build_tiny_model(vocab_size=len(tok), layers=1, width=32, heads=2, pad_token_id=tok.pad_token_id,
                             eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id, seed=1)
    save_model(model, tok, tmp_path / "ckpt")
    argv = ["plan", "--model", str(tmp_path / "ckpt"), "--task", "ledger", "--n-prompts", "4", "--n", "6",
            "--max-new-tokens", "1", "--n-boot", "20", "--temperatures", "0.3", "--cache", str(tmp_path / "cache"),
            "--quiet"]
    assert main(argv) == 0
    (cache,) = (tmp_path / "cache").glob("plan-*.jsonl")
    rows = [json.loads(line) for line in cache.read_text().splitlines()]
    assert [r["sample"] for r in rows] == list(range(6)) * 4
    assert len({(r["prompt_id"], r["response"]) for r in rows}) < len(rows)  # 1-token responses repeat
    with warnings.catch_warnings():
        warnings.simplefilter("error", DuplicateRowsWarning)
        assert main(["plan", "--samples", str(cache), "--n-boot", "20"]) == 0
    cache.write_text("".join(json.dumps({k: v for k, v in r.items() if k != "sample"}) + "\n" for r in rows))
    capsys.readouterr()
    assert main(argv) == 0
    assert "reused T=[0.3]" in capsys.readouterr().out
