"""Commands train / eval / sample end to end, and every recipe's objective runs a few tiny steps."""
import json
from pathlib import Path

import pytest

from bonft.cli import main
from bonft.io import read_samples

RECIPES = sorted((Path(__file__).parent.parent / "recipes").glob("*.toml"))
SHRINK = ["layers=1", "width=32", "heads=2", "max_positions=48", "train_prompts=32", "heldout_prompts=4", "warm_start_steps=2",
          "warm_start_batch_size=8", "rl_steps=2", "prompts_per_step=4", "n=16", "eval_samples=16", "eval_ks=1,16",
          "eval_every=0", "save_every=0", "plots=false", "n_boot=50", "max_new_tokens=5", "threads=1"]


def _set(items):
    return [a for it in items for a in ("--set", it)]


@pytest.mark.parametrize("recipe", RECIPES, ids=[p.stem for p in RECIPES])
def test_every_recipe_runs_tiny(recipe, tmp_path, capsys):
    extra = ["anchor_weight=0.05"] if recipe.stem == "pass_at_k" else []  # the KL-to-start path too
    rc = main(["train", str(recipe), "--output", str(tmp_path / "r"), "--quiet", *_set(SHRINK + extra)])
    assert rc == 0
    assert (tmp_path / "r" / "checkpoints" / "step-00000004" / "model").is_dir()
    assert "run directory" in capsys.readouterr().out
    if extra:
        assert (tmp_path / "r" / "rl_start" / "model").is_dir()
        lines = (tmp_path / "r" / "metrics.jsonl").read_text()
        assert '"anchor/kl"' in lines


def test_eval_and_sample_commands(tmp_path, capsys):
    run = tmp_path / "run"
    assert main(["train", str(RECIPES[0]), "--output", str(run), "--quiet", *_set(SHRINK)]) == 0
    capsys.readouterr()
    assert main(["eval", str(run), "--n", "8", "--ks", "1,2,8", "--json", str(tmp_path / "e.json"),
                 "--plot-dir", str(tmp_path / "plots")]) == 0
    out = capsys.readouterr().out
    assert "pass@k" in out and "best-of-k proxy" in out and (tmp_path / "e.json").is_file()
    assert (tmp_path / "plots" / "eval_curves.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    samples = tmp_path / "s.jsonl"
    assert main(["sample", str(run), "--n", "4", "--temperatures", "0.7,1.0", "--n-prompts", "3", "-o", str(samples)]) == 0
    table = read_samples(samples)  # the file bonft estimate / bonft plan read
    assert len(table.scores) == 3 * 4 * 2 and sorted(set(table.temperatures.tolist())) == [0.7, 1.0]
    # each row carries its prompt's text: the first 3 held-out prompts of the run's split, one text per prompt_id
    from bonft.tasks import get_task
    from bonft.trainer.config import load_config

    cfg = load_config(RECIPES[0], SHRINK)
    _, held = get_task(cfg.task, **cfg.task_params).split(n_train=cfg.train_prompts, n_eval=cfg.heldout_prompts,
                                                          seed=cfg.seed)
    rows = [json.loads(line) for line in samples.read_text().splitlines()]
    assert {(r["prompt_id"], r["prompt"]) for r in rows} == {(b, held[b].prompt) for b in range(3)}
    assert main(["estimate", str(samples)]) == 0
    assert "repeat" not in capsys.readouterr().err  # identical short responses carry distinct sample indices
    # the run's final evaluation wrote its samples: bonft estimate on them gives the evaluation's own pass@k
    final = json.loads((run / "summary.json").read_text())["evaluations"][-1]
    assert main(["estimate", str(run / "heldout_samples.jsonl"), "--ks", "1,16", "--json", str(tmp_path / "h.json")]) == 0
    (block,) = json.loads((tmp_path / "h.json").read_text())["blocks"]
    assert block["pass_at_k_mean"] == pytest.approx(final["pass_at_k"]["mean"], abs=1e-12)
    held_rows = [json.loads(line) for line in (run / "heldout_samples.jsonl").read_text().splitlines()]
    assert [(r["prompt_id"], r["sample"]) for r in held_rows] == [(b, i) for b in range(4) for i in range(16)]
    assert [r["prompt"] for r in held_rows[::16]] == [e.prompt for e in held]
    # its lengths are the evaluation's (mean tokens per response), its scores every verifier's
    assert sum(r["n_tokens"] for r in held_rows) / len(held_rows) == pytest.approx(final["mean_length"], abs=1e-12)
    assert all({"score_exact", "score_proxy"} <= set(r) for r in held_rows)
    # a --set that cannot change what eval / sample draw or report is refused before the model loads
    capsys.readouterr()
    for cmd in (["eval", str(run), "--ks", "1"], ["sample", str(run), "-o", str(tmp_path / "x.jsonl")]):
        assert main([*cmd, "--n", "4", "--set", "rl_steps=5"]) == 2
        assert "--set rl_steps cannot take effect when sampling a checkpoint (it shapes training only)" in capsys.readouterr().err
        assert main([*cmd, "--n", "4", "--set", "eval_samples=9"]) == 2
        assert "--set eval_samples has no effect here: --n sets it" in capsys.readouterr().err
        assert main([*cmd, "--n", "4", "--n-prompts", "500"]) == 2  # the split holds 4 held-out prompts
        assert "--n-prompts must be <= the held-out prompts of the split (4), got 500" in capsys.readouterr().err
    assert not (tmp_path / "x.jsonl").exists()
    assert main(["eval", str(run), "--n", "4", "--ks", "1", "--set", "max_new_tokens=2", "--set", "n_boot=50"]) == 0
    # the served law: with top_k = 1 only the most likely token is ever kept, so every response of a prompt is the
    # same and each has probability 1 under the truncated law (entropy exactly 0)
    capsys.readouterr()
    assert main(["eval", str(run), "--n", "4", "--ks", "1", "--top-k", "1", "--json", str(tmp_path / "k1.json")]) == 0
    assert "top_k=1)" in capsys.readouterr().out
    rep = json.loads((tmp_path / "k1.json").read_text())
    assert (rep["top_k"], rep["top_p"], rep["distinct_answers"], rep["entropy"]) == (1, 1.0, 1.0, 0.0)
    assert str(rep["entropy"]) == "0.0"  # not -0.0 (minus a mean of zeros)
    assert main(["sample", str(run), "--n", "3", "--top-k", "1", "-o", str(tmp_path / "k1.jsonl")]) == 0
    by_prompt = {}
    for line in (tmp_path / "k1.jsonl").read_text().splitlines():
        r = json.loads(line)
        by_prompt.setdefault(r["prompt_id"], set()).add(r["response"])
    assert by_prompt and all(len(v) == 1 for v in by_prompt.values())
    assert main(["eval", str(run), "--n", "4", "--ks", "1", "--top-p", "1.5"]) == 2
    assert "--top-p must be in (0, 1], got --top-p=1.5" in capsys.readouterr().err


@pytest.mark.parametrize(
    "argv, message",
    [
        (["--set", "k=99"], "k must be <= n"),
        (["--set", "objective=ppo"], "objective must be one of"),
        (["--set", "lr=-1"], "lr must be a finite number >= 0, got lr=-1.0"),
        (["--set", "colour=red"], "--set key must be a config field"),
    ],
)
def test_bad_recipe_values_exit_2(argv, message, tmp_path, capsys):
    assert main(["train", str(RECIPES[0]), "--output", str(tmp_path / "x"), "--quiet", *argv]) == 2
    assert message in capsys.readouterr().err


def test_eval_bad_ks(tmp_path, capsys):
    assert main(["eval", str(tmp_path), "--n", "4", "--ks", "1,8"]) == 2
    assert "--ks must be <= --n (n=4)" in capsys.readouterr().err


def test_old_key_spelling_warns_on_the_command_line(tmp_path, capsys):
    # the warning names the new key; the run then stops at the next problem (k > n), before any training
    assert main(["train", str(RECIPES[0]), "--output", str(tmp_path / "x"), "--quiet", "--set", "n_train=40",
                 "--set", "k=99"]) == 2
    err = capsys.readouterr().err.splitlines()
    assert err[0] == ("bonft train: warning: --set config key 'n_train' is now called 'train_prompts'; "
                      "reading it as 'train_prompts'")
    assert err[-1].startswith("bonft train: error: k must be <= n")


def test_sigterm_writes_a_checkpoint_of_the_last_step_and_exits_143(tmp_path, monkeypatch, capsys):
    # SIGTERM (what a scheduler sends to preempt a job) stops `bonft train` as Ctrl-C does: the last completed
    # step is checkpointed; 143 = 128 + SIGTERM (15), the shell's status for a process ended by that signal
    import os
    import signal

    import bonft.trainer.steps as S
    from bonft.trainer.checkpoint import latest_checkpoint, load_state

    real = S.rl_step

    def preempted(run, s, clock):
        if s == 3:  # during the 4th step: 3 steps are done
            os.kill(os.getpid(), signal.SIGTERM)
        return real(run, s, clock)

    def unhandled(signum, frame):
        raise RuntimeError("SIGTERM reached the caller's handler")

    monkeypatch.setattr(S, "rl_step", preempted)
    old = signal.signal(signal.SIGTERM, unhandled)  # what runs if bonft train does not take SIGTERM itself
    try:
        rc = main(["train", str(RECIPES[0]), "--output", str(tmp_path / "r"), "--quiet", *_set(SHRINK)])
        assert signal.getsignal(signal.SIGTERM) is unhandled  # given back after the run
    finally:
        signal.signal(signal.SIGTERM, old)
    assert rc == 143
    assert "bonft train: stopped by SIGTERM" in capsys.readouterr().err
    ckpt = latest_checkpoint(tmp_path / "r")
    assert ckpt.name == "step-00000003" and load_state(ckpt)["step"] == 3


def test_sample_checks_its_output_path_before_any_sampling(tmp_path, capsys):
    # the folder of -o is checked first (the checkpoint named here does not even exist): no sampling is wasted
    out = tmp_path / "missing" / "s.jsonl"
    assert main(["sample", str(tmp_path / "no-run"), "-o", str(out)]) == 2
    assert f"--output's folder does not exist: {tmp_path / 'missing'}" in capsys.readouterr().err
    assert main(["sample", str(tmp_path / "no-run"), "-o", str(tmp_path)]) == 2
    assert "--output must be a file path, got a directory" in capsys.readouterr().err
