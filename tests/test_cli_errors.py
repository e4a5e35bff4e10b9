"""Every user error of the command line ends in one clear line on stderr, never a Python traceback.

Each case runs ``bonft`` the way the console script does (``main(argv)``); an exception escaping
``main`` is printed as the interpreter would print it, so "Traceback" in stderr means a raw
traceback reached the user. Two cases run in a real subprocess: a closed pipe (``| head``) and a
sample of the error cases, to check the console entry point itself.
"""
import contextlib
import hashlib
import io
import json
import os
import pickle
import re
import shutil
import subprocess
import sys
import traceback
from pathlib import Path

import pytest

from bonft.cli.main import main
from bonft.trainer.config import from_dict, to_toml

RUN = dict(layers=1, width=16, heads=2, max_positions=40, train_prompts=16, heldout_prompts=2, warm_start_steps=0, rl_steps=2,
           prompts_per_step=2, n=2, k=2, lr=1e-2, eval_samples=2, eval_ks=[1], n_boot=10, log_every=1, save_every=1,
           keep_checkpoints=2, max_new_tokens=4, plots=False, eval_at_start=False, threads=1)


def bonft(*argv) -> tuple[int, str, str]:
    """(exit status, stdout, stderr) of ``bonft ARGV``, run in this process."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = main([str(a) for a in argv])
        except SystemExit as e:
            code = e.code
        except BaseException:  # what the interpreter would show the user
            traceback.print_exc()
            code = 1
    return code, out.getvalue(), err.getvalue()


def expect_error(argv, pattern: str) -> str:
    code, _, err = bonft(*argv)
    assert "Traceback" not in err, err
    assert code == 2, (code, err)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and lines[0].startswith(f"bonft {argv[0]}: error: "), err
    assert re.search(pattern, lines[0]), lines[0]
    return lines[0]


# ----------------------------------------------------------------------------- files
@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("files")
    ok = '{"prompt_id": 1, "score": 1, "reward": 1, "temperature": 1.0, "n_tokens": 3}\n'
    (d / "bad8.jsonl").write_bytes(ok.encode() + b'{"prompt_id": 2, "score": 1, "reward": \xff1}\n')
    (d / "deep.jsonl").write_text(ok + '{"prompt_id": ' + "[" * 100_000 + "]" * 100_000 + "}\n")
    rows = [{"prompt_id": p, "score": s, "reward": s, "temperature": 1.0, "n_tokens": 0} for p in (1, 2) for s in (0, 1)]
    (d / "zero_tokens.jsonl").write_text("".join(json.dumps(r) + "\n" for r in rows))
    (d / "neg_tokens.jsonl").write_text(ok + ok.replace('"n_tokens": 3', '"n_tokens": -3'))
    twice = "".join(json.dumps({"prompt_id": p, "score": s, "reward": s}) + "\n" for p in (1, 2) for s in (0, 1))
    (d / "twice.jsonl").write_text(twice + twice)  # a file concatenated with itself
    (d / "one_prompt.jsonl").write_text("".join(json.dumps({"prompt_id": "a", "score": s, "reward": r}) + "\n"
                                                for s, r in ((0.9, 1), (0.2, 0), (0.5, 1), (0.1, 0))))
    (d / "exact.json").write_text('{"scores": [1, 2], "rewards": [0, 1],\n  "logits": [0, 0}')
    (d / "prompts.jsonl").write_text('{"prompt": "lamps 3 ?", "answer": "3"}\n{"prompt": "mugs 2 ?", "answer": 2\n')
    (d / "prompts8.jsonl").write_bytes(b'{"prompt": "lamps 3 ?", "answer": "3"}\n{"prompt": "caf\xe9", "answer": "1"}\n')
    (d / "recipe.toml").write_text(to_toml(from_dict(RUN)))
    (d / "not.toml").write_text("rl_steps = = 3\n")
    (d / "a_dir").mkdir()
    return d


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """A finished tiny run with checkpoints step-1 and step-2 (a source for damaged copies)."""
    from bonft.trainer.loop import train

    run = tmp_path_factory.mktemp("trained") / "run"
    train(from_dict({**RUN, "run_dir": str(run)}), progress=False)
    return run


def damaged_copy(trained: Path, dest: Path, *, which=("step-00000002",), remove="model/model.safetensors") -> Path:
    shutil.copytree(trained, dest)
    for name in which:
        target = dest / "checkpoints" / name / remove
        shutil.rmtree(target) if target.is_dir() else target.write_bytes(target.read_bytes()[:10])
    return dest


@pytest.fixture(scope="module")
def model_without_tokenizer(tmp_path_factory):
    from bonft.tasks import build_tokenizer
    from bonft.trainer.models import build_tiny_model

    d = tmp_path_factory.mktemp("bare") / "model"
    build_tiny_model("gpt2", vocab_size=len(build_tokenizer()), layers=1, width=16, heads=2).save_pretrained(d)
    return d


# ----------------------------------------------------------------------------- the cases
def test_pool_files(files):
    expect_error(["estimate", files / "bad8.jsonl"], r"bad8.jsonl line 2: not UTF-8 text \(byte 0xff at column 40\)")
    expect_error(["estimate", files / "deep.jsonl"], r"deep.jsonl line 2: JSON nested too deeply")
    expect_error(["estimate", files / "missing.jsonl"], r"POOLS file not found: .*missing.jsonl")
    expect_error(["plan", "--samples", files / "neg_tokens.jsonl"], r"neg_tokens.jsonl line 2: field 'n_tokens' must be >= 0 tokens, got -3")
    expect_error(["plan", "--samples", files / "deep.jsonl"], r"deep.jsonl line 2: JSON nested too deeply")


def test_too_many_bootstrap_replicates(files):
    expect_error(["estimate", "--example", "--n-boot", "100000000000"],
                 r"--n-boot must be between 10 and 1,000,000 bootstrap replicates, got 100,000,000,000")
    expect_error(["plan", "--samples", files / "zero_tokens.jsonl", "--n-boot", "100000000000"], r"--n-boot must be between 1")
    expect_error(["train", files / "recipe.toml", "--set", "n_boot=100000000000"],
                 r"n_boot must be <= 1,000,000 \(each replicate is a row of the bootstrap table held in memory; .*\), "
                 r"got n_boot=100,000,000,000$")


def test_token_budget_with_zero_lengths_says_so(files):
    expect_error(["plan", "--samples", files / "zero_tokens.jsonl", "--budget-tokens", "100"],
                 r"--budget-tokens needs positive response lengths, but field 'n_tokens' of .*zero_tokens.jsonl "
                 r"averages 0 tokens at temperature 1")
    expect_error(["plan", "--samples", files / "twice.jsonl", "--budget-tokens", "100", "--allow-duplicates"],
                 r"--budget-tokens needs response lengths: .*twice.jsonl has no 'n_tokens' field")


def test_exact_file_that_is_not_json(files):
    expect_error(["plan", "--exact", files / "exact.json"], r"--exact file .*exact.json must hold one JSON object in UTF-8 \(line 2, column")


def test_repeated_rows_warn_with_their_count_and_the_flag_silences_it(files):
    code, out, err = bonft("estimate", files / "twice.jsonl")
    assert code == 0 and "Traceback" not in err
    assert err.strip() == ("bonft estimate: warning: twice.jsonl: 4 of 8 rows repeat an earlier row exactly (line 5 repeats "
                           "line 1); a file concatenated with itself doubles its pools. If they are distinct samples that "
                           "happen to be identical (common for rows without a response or a sample index), give each "
                           "row a sample index (field 'sample') or allow them (duplicates='allow', --allow-duplicates on "
                           "the command line)")
    code, out, err = bonft("estimate", files / "twice.jsonl", "--allow-duplicates")
    assert code == 0 and err == ""


def test_one_prompt_prints_no_interval(files):
    code, out, err = bonft("estimate", files / "one_prompt.jsonl", "--ks", "1,2")
    assert code == 0 and err == ""
    rows = [ln for ln in out.splitlines() if re.match(r"\s+[12]\s", ln)]
    assert len(rows) == 2 and all(ln.count("n/a") == 2 and "[" not in ln for ln in rows), out
    assert "intervals n/a: 1 prompt(s); a bootstrap over prompts needs at least 10 (see docs/estimate.md)" in out
    # best-of-1 is the pool's mean reward: (1 + 0 + 1 + 0) / 4 = 0.5, printed even without an interval
    assert re.search(r"^\s+1\s+0\.5000\s", rows[0]), rows[0]


def test_output_paths_that_cannot_be_written(files, tmp_path):
    # the check commands test --json and --plot-dir before any work; estimate through the shared writer
    (tmp_path / "v.py").write_text("def judge(prompts, responses):\n    return [1.0] * len(responses)\n")
    (tmp_path / "ex.jsonl").write_text('{"prompt": "a", "response": "1"}\n')
    (tmp_path / "tests.jsonl").write_text('{"prompt": "p", "tests": "assert f() == 1"}\n')
    (tmp_path / "cr.py").write_text("def credit(scores, rewards, *, k):\n    return rewards\n")
    a_file = files / "recipe.toml"
    commands = [["estimate", "--example", "--n-boot", "20"],
                ["check-verifier", f"{tmp_path / 'v.py'}:judge", "--examples", tmp_path / "ex.jsonl"],
                ["check-tests", tmp_path / "tests.jsonl", "--probes", "constant_reply"],
                ["check-objective", f"{tmp_path / 'cr.py'}:credit", "--target", "pass_at_k", "--k", "1", "--n", "2",
                 "--skip-transformer"]]
    for argv in commands:
        expect_error([*argv, "--json", files / "a_dir"], r"--json must be a file path, got a directory: \S+a_dir$")
        expect_error([*argv, "--json", a_file / "out.json"],
                     r"--json must be a file path in a folder, but \S+recipe.toml is a file: \S+recipe.toml/out.json$")
        if argv[0] != "check-tests":  # it writes no plot
            expect_error([*argv, "--plot-dir", a_file], r"--plot-dir must be a directory, got a file: \S+recipe.toml$")
            expect_error([*argv, "--plot-dir", a_file / "plots"],
                         r"--plot-dir must be a directory path, but \S+recipe.toml is a file: \S+recipe.toml/plots$")
    assert sorted(os.listdir(files / "a_dir")) == []


def test_json_writer_names_the_option_and_path_not_its_temporary_file(tmp_path, monkeypatch):
    import tempfile

    from bonft.cli.options import write_json_atomic

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied", str(tmp_path / ".bonft-x1y2.tmp"))

    monkeypatch.setattr(tempfile, "mkstemp", refuse)
    with pytest.raises(PermissionError, match=r"^\[Errno 13\] --json cannot be written: Permission denied: ") as e:
        write_json_atomic(str(tmp_path / "out.json"), {"a": 1})
    assert e.value.filename == str(tmp_path / "out.json")


def test_json_writer_keeps_the_previous_file_on_failure_and_the_usual_mode(tmp_path):
    # common practice (no source): a file is replaced whole or not at all, and with the mode any new file gets
    # (0o666 less the umask), not the 0o600 of a temporary file
    import os

    from bonft.cli.options import write_json_atomic

    path = tmp_path / "out.json"
    write_json_atomic(str(path), {"a": 1})
    umask = os.umask(0)
    os.umask(umask)
    assert (path.stat().st_mode & 0o777, json.loads(path.read_text())) == (0o666 & ~umask, {"a": 1})
    with pytest.raises(ValueError, match="Out of range float"):
        write_json_atomic(str(path), {"a": [1.0, float("nan")]})
    assert json.loads(path.read_text()) == {"a": 1} and [p.name for p in tmp_path.iterdir()] == ["out.json"]


def test_recipes(files):
    expect_error(["train", files / "nope.toml"], r"recipe not found: .*nope.toml")
    expect_error(["train", files / "not.toml"], r"not.toml: not valid TOML")
    expect_error(["train", files / "recipe.toml", "--set", "train_prompts=100000000"],
                 r"train_prompts \+ heldout_prompts asks for 75,000,002 distinct 'easy' prompts of task 'ledger', but it makes about 1\d,\d{3}")


def test_context_too_short_is_refused_before_any_work(files, tmp_path):
    for arch in ("gpt2", "llama"):
        out = tmp_path / arch
        expect_error(["train", files / "recipe.toml", "--set", "max_positions=4", "--set", f"arch={arch}", "--output", out],
                     r"max_positions must fit the longest prompt plus max_new_tokens: prompt '.*' takes \d+ tokens "
                     r"\+ max_new_tokens=4 = \d+ > 4 positions of the model; raise max_positions")
        assert not (out / "checkpoints").exists() and not (out / "metrics.jsonl").exists()


def test_malformed_prompts_files(files, tmp_path, trained):
    for name, pattern in (("prompts.jsonl", r"prompts.jsonl line 2: not valid JSON \(Expecting ',' delimiter"),
                          ("prompts8.jsonl", r"prompts8.jsonl line 2: not UTF-8 text \(byte 0xe9 at column \d+\)")):
        expect_error(["train", files / "recipe.toml", "--set", "task=jsonl", "--set", f"prompts_file={files / name}",
                      "--output", tmp_path / name], pattern)
        expect_error(["plan", "--model", trained, "--prompts-file", files / name, "--n", "2"], pattern)


def test_model_directory_without_its_tokenizer(model_without_tokenizer, trained, tmp_path):
    expect_error(["plan", "--model", model_without_tokenizer, "--task", "ledger"],
                 rf"no tokenizer for the model in '{model_without_tokenizer}': expected tokenizer files "
                 r"\(tokenizer_config.json, tokenizer.json\)")
    run = damaged_copy(trained, tmp_path / "no_tok", which=("step-00000001", "step-00000002"), remove="tokenizer")
    expect_error(["eval", run, "--n", "2", "--ks", "1"], r"no good checkpoint in .*checkpoints: checkpoint .*step-00000002 is damaged: "
                                           r"tokenizer/\S+ is missing")


def test_damaged_newest_checkpoint_falls_back_with_one_warning(trained, tmp_path):
    run = damaged_copy(trained, tmp_path / "newest_bad")
    code, out, err = bonft("eval", run, "--n", "2", "--ks", "1,2")
    assert code == 0 and "Traceback" not in err, err
    warn = [ln for ln in err.splitlines() if "warning" in ln]
    assert len(warn) == 1 and re.match(r"bonft eval: warning: checkpoint \S+step-00000002 is damaged: model/model.safetensors "
                                       r"has 10 bytes, the manifest says \d+ \(truncated or overwritten\); using the newest "
                                       r"good checkpoint \S+step-00000001 instead$", warn[0]), err
    assert out.startswith(str(run / "checkpoints" / "step-00000001"))
    code, out, err = bonft("sample", run, "--n", "2", "-o", tmp_path / "s.jsonl")
    assert code == 0 and "step-00000002 is damaged" in err and "Traceback" not in err
    rows = [json.loads(ln) for ln in (tmp_path / "s.jsonl").read_text().splitlines()]
    assert [r["sample"] for r in rows] == [0, 1, 0, 1]  # a sample index: identical answers are not repeated rows
    all_bad = damaged_copy(trained, tmp_path / "all_bad", which=("step-00000001", "step-00000002"))
    for cmd in (["eval", all_bad, "--n", "2", "--ks", "1"], ["sample", all_bad, "-o", tmp_path / "t.jsonl"],
                ["plan", "--model", all_bad, "--task", "ledger"],
                ["train", all_bad / "config.toml", "--resume", "--output", all_bad]):
        expect_error(cmd, r"no good checkpoint in \S+checkpoints: checkpoint \S+step-00000002 is damaged: .*; "
                          r"checkpoint \S+step-00000001 is damaged: model/model.safetensors has 10 bytes")


class _Payload:
    marker = ""

    def __reduce__(self):
        return (os.mkdir, (self.marker,))


def test_resume_refuses_a_crafted_state_pickle(trained, tmp_path):
    run = tmp_path / "crafted"
    shutil.copytree(trained, run)
    shutil.rmtree(run / "checkpoints" / "step-00000002")
    ckpt = run / "checkpoints" / "step-00000001"
    _Payload.marker = str(tmp_path / "pwned")
    (ckpt / "state.pt").write_bytes(pickle.dumps({"step": 1, "extra": _Payload()}))
    man = json.loads((ckpt / "manifest.json").read_text())
    data = (ckpt / "state.pt").read_bytes()
    man["files"]["state.pt"] = {"bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()}
    (ckpt / "manifest.json").write_text(json.dumps(man))
    expect_error(["train", run / "config.toml", "--resume", "--output", run],
                 r"refusing \S+state.pt: it holds objects other than tensors and plain values")
    assert not (tmp_path / "pwned").exists()


# ----------------------------------------------------------------------------- a real process
def test_console_entry_point_closed_pipe_and_errors(files):
    cmd = f"{sys.executable} -m bonft.cli estimate --example --n-boot 20 | head -3"
    res = subprocess.run(["bash", "-o", "pipefail", "-c", cmd], capture_output=True, text=True, timeout=120)
    assert "Traceback" not in res.stderr and "BrokenPipeError" not in res.stderr, res.stderr
    assert len(res.stdout.splitlines()) == 3 and res.stdout.startswith("samples: ")
    assert res.returncode in (0, 141)  # 141 = 128 + SIGPIPE, what a command killed by the closed pipe reports
    res = subprocess.run([sys.executable, "-m", "bonft.cli", "estimate", str(files / "bad8.jsonl")],
                         capture_output=True, text=True, timeout=120)
    assert res.returncode == 2 and res.stderr.startswith("bonft estimate: error: bad8.jsonl line 2: not UTF-8")
    assert "Traceback" not in res.stderr


def test_verifier_examples_that_are_not_utf8(files, tmp_path):
    (tmp_path / "v.py").write_text("def judge(prompts, responses):\n    return [1.0] * len(responses)\n")
    (tmp_path / "ex.jsonl").write_bytes(b'{"prompt": "a", "response": "1"}\n{"prompt": "b\xff", "response": "2"}\n')
    expect_error(["check-verifier", f"{tmp_path / 'v.py'}:judge", "--examples", tmp_path / "ex.jsonl"],
                 r"--examples file \S+ex.jsonl line 2: not UTF-8 text \(byte 0xff\)")


def test_sampling_commands_say_what_they_draw(trained, tmp_path):
    code, out, err = bonft("eval", trained, "--n", "2", "--ks", "1,2")
    assert code == 0 and err == "sampling 2 responses for each of 2 held-out prompts at temperature 1 (4 samples)...\n"


@pytest.mark.parametrize("seed", ["-1", str(2**63)])
def test_every_seed_option_is_bounded_before_any_work(seed, files, trained, tmp_path):
    # seeds are kept as int64 and torch.manual_seed overflows from 2**64 (torch's documented range)
    cr = tmp_path / "cr.py"
    cr.write_text("def credit(scores, rewards, *, k):\n    return rewards\n")
    for argv in (["estimate", "--example"], ["eval", trained], ["sample", trained, "-o", tmp_path / "s.jsonl"],
                 ["demo", "--output", tmp_path / "demo"],
                 ["check-objective", f"{cr}:credit", "--target", "pass_at_k", "--k", "2", "--n", "4"]):
        expect_error([*argv, f"--seed={seed}"], r"--seed must be >= 0 and < 2\*\*63 .*got " + seed)
    assert not (tmp_path / "s.jsonl").exists() and not (tmp_path / "demo").exists()


def test_eval_and_compare_check_their_output_paths_before_any_work(trained, tmp_path):
    # a --plot-dir that is a file, or a --json that is a directory, found only after sampling wastes the run
    a_file = tmp_path / "taken"
    a_file.write_text("x")
    expect_error(["eval", trained, "--n", "2", "--ks", "1", "--plot-dir", a_file],
                 r"--plot-dir must be a directory, got a file: \S+taken$")
    expect_error(["eval", trained, "--n", "2", "--ks", "1", "--json", tmp_path],
                 r"--json must be a file path, got a directory: ")
    samples = trained / "heldout_samples.jsonl"
    expect_error(["compare", samples, samples, "--names", "a,b", "--plot-dir", a_file],
                 r"--plot-dir must be a directory, got a file: \S+taken$")
    expect_error(["compare", samples, samples, "--names", "a,b", "--json", tmp_path],
                 r"--json must be a file path, got a directory: ")
    # and the report still goes where it should: atomically, as JSON
    code, _, err = bonft("eval", trained, "--n", "2", "--ks", "1", "--json", tmp_path / "e.json")
    assert code == 0, err
    assert json.loads((tmp_path / "e.json").read_text())["ks"] == [1]
