"""Bad input found before any work, with the file and the line: pool files, prompt files,
too few prompts for an interval, task sizes, the model's context, progress on long generation."""
import json
import re
import warnings

import numpy as np
import pytest

from bonft.estimate import MIN_BOOT_PROMPTS, summarize
from bonft.io import DuplicateRowsWarning, read_samples
from bonft.tasks import load_prompts_jsonl


# ----------------------------------------------------------------------------- pool files
def test_non_utf8_bytes_name_the_line_and_column(tmp_path):
    p = tmp_path / "latin1.jsonl"
    p.write_bytes(b'{"prompt_id": 1, "score": 1, "reward": 1}\n\n{"prompt_id": "caf\xe9", "score": 1, "reward": 1}\n')
    with pytest.raises(ValueError, match=r"^latin1.jsonl line 3: not UTF-8 text \(byte 0xe9 at column 19\); save the file as UTF-8$"):
        read_samples(p)


def test_deeply_nested_line_is_a_value_error_not_recursion(tmp_path):
    p = tmp_path / "deep.jsonl"
    p.write_text('{"prompt_id": 1, "score": 1, "reward": 1}\n{"prompt_id": ' + "[" * 200_000 + "]" * 200_000 + "}\n")
    with pytest.raises(ValueError, match=r"^deep.jsonl line 2: JSON nested too deeply"):
        read_samples(p)


def test_repeated_rows_warn_error_or_pass(tmp_path):
    rows = [{"prompt_id": p, "score": s, "reward": s} for p in ("a", "b") for s in (0.25, 0.75)]
    text = "".join(json.dumps(r) + "\n" for r in rows)
    p = tmp_path / "twice.jsonl"
    p.write_text(text + "\n" + text)  # concatenated with itself (and a blank line between)
    with pytest.warns(DuplicateRowsWarning, match=r"twice.jsonl: 4 of 8 rows repeat an earlier row exactly \(line 6 repeats line 1\)"):
        table = read_samples(p)
    assert len(table) == 8  # a warning, not a silent fix: the rows are still all there
    with pytest.raises(ValueError, match=r"4 of 8 rows repeat an earlier row exactly"):
        read_samples(p, duplicates="error")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert len(read_samples(p, duplicates="allow")) == 8
        once = tmp_path / "once.jsonl"
        once.write_text(text)
        assert len(read_samples(once)) == 4  # no repeats, no warning
    with pytest.raises(ValueError, match=r"duplicates must be one of \('warn', 'error', 'allow'\), got 'drop'"):
        read_samples(p, duplicates="drop")


def test_negative_token_counts_are_refused_with_the_line(tmp_path):
    p = tmp_path / "t.jsonl"
    p.write_text('{"prompt_id": 1, "score": 1, "reward": 1, "n_tokens": 4}\n{"prompt_id": 1, "score": 0, "reward": 0, "n_tokens": -1}\n')
    with pytest.raises(ValueError, match=r"^t.jsonl line 2: field 'n_tokens' must be >= 0 tokens, got -1$"):
        read_samples(p)



# Lines that are each malformed but join into valid JSON when glued with commas. The expected error is
# what Python's own json.loads says of that line alone (the standard library as the reference parser).
_A = '{"prompt_id": "a", "score": 0.2, "reward": 1'
_JOIN_TRICKS = [
    # an unterminated string closed on the next line: two invalid lines, two "valid" rows when joined
    ([_A + ', "note": "x', '"}, {"prompt_id": "a", "score": 0.9, "reward": 0}'], 1),
    # an unclosed list closed on the next line
    ([_A + ', "x": [1', '2]}, {"prompt_id": "a", "score": 0.9, "reward": 0}'], 1),
    # two objects on one line, made up for by one object split over the next two: the row count matches
    ([_A + '}, {"prompt_id": "b", "score": 0.5, "reward": 0}', '{"prompt_id": "c", "score": 0.1', '"reward": 1}'], 1),
    # a valid first line, then an object split over two lines
    ([_A + "}", '{"prompt_id": "a", "score": 0.9', '"reward": 0}'], 2),
    # a bare value and a leading comma
    ([_A + "}", "1", _A + "}"], 2),
    ([_A + "}", ', ' + _A + "}"], 2),
]


@pytest.mark.parametrize("lines,bad", _JOIN_TRICKS)
def test_each_line_is_parsed_alone(tmp_path, lines, bad):
    p = tmp_path / "joined.jsonl"
    p.write_text("\n".join(lines) + "\n")
    try:
        json.loads(lines[bad - 1])
        want = None
    except json.JSONDecodeError as e:
        want = f"not valid JSON ({e.msg.removesuffix(' at')} at column {e.colno})"
    expected = want or "expected a JSON object (a sample), got int"
    with pytest.raises(ValueError) as err:
        read_samples(p)
    assert str(err.value) == f"joined.jsonl line {bad}: {expected}"


def test_two_invalid_lines_are_never_read_as_two_samples(tmp_path):
    p = tmp_path / "two.jsonl"
    p.write_text(_JOIN_TRICKS[0][0][0] + "\n" + _JOIN_TRICKS[0][0][1] + "\n")
    with pytest.raises(ValueError, match=r"^two.jsonl line 1: not valid JSON \(Unterminated string starting at column 55\)$"):
        read_samples(p)


def test_blank_lines_keep_the_line_numbers_of_the_rest(tmp_path):
    p = tmp_path / "b.jsonl"
    p.write_text("\n" + _A + "}\n\n  \n" + _A + ', "x": [1\n')
    with pytest.raises(ValueError, match=r"^b.jsonl line 5: not valid JSON"):
        read_samples(p)
    p.write_text("\n" + _A + "}\n\n" + _A.replace('"a"', '"b"') + "}\n\n")
    t = read_samples(p)
    assert t.prompt_keys.tolist() == ["a", "b"] and t.scores.tolist() == [0.2, 0.2]



def test_only_newline_ends_a_line(tmp_path):
    """JSON strings may hold U+2028, U+2029 and U+0085 raw (RFC 8259 escapes only U+0000-U+001F); str.splitlines
    would cut a line there, so the reader splits on newline alone and reads these two samples whole."""
    p = tmp_path / "u.jsonl"
    p.write_text('{"prompt_id": "a\u2028b", "score": 1, "reward": 1, "response": "x\u0085y\u2029"}\n'
                 '{"prompt_id": "c", "score": 0, "reward": 0}\n', encoding="utf-8")
    assert "\u2028" in p.read_text(encoding="utf-8")  # written raw, not as an escape
    t = read_samples(p)
    assert t.prompt_keys.tolist() == ["a\u2028b", "c"] and t.scores.tolist() == [1.0, 0.0]

@pytest.mark.parametrize("value,pattern", [
    ("9" * 401, r"^n.jsonl line 2: field 'score' must fit in a float64 \(\|x\| < 1.8e308\), got an integer of 401 digits$"),
    ("-" + "9" * 309, r"^n.jsonl line 2: field 'score' must fit in a float64 \(\|x\| < 1.8e308\), got an integer of 309 digits$"),
    ("1e400", r"^n.jsonl line 2: field 'score' must be finite, got inf \(Infinity, or a number beyond the float64 range \|x\| < 1.8e308\)$"),
    ("1" * 5000, r"^n.jsonl line 2: a number too long to read \(Exceeds the limit \(4300 digits\)"),
])
def test_scores_that_do_not_fit_a_float_name_file_line_and_field(tmp_path, value, pattern):
    p = tmp_path / "n.jsonl"
    p.write_text(_A + "}\n" + _A.replace("0.2", value) + "}\n")
    with pytest.raises(ValueError, match=pattern):
        read_samples(p)
    # IEEE 754 binary64: the largest finite value is (2 - 2**-52) * 2**1023 = 2**1024 - 2**971; an integer rounds
    # to it (round half to even) below the midpoint 2**1024 - 2**970 and overflows from there on. Every integer
    # above 2**53 rounds, so one that fits is refused as inexact, one that does not as too large
    for v, match in ((2**1024 - 2**970 - 1, r"must be an integer of magnitude <= 2\*\*53"),
                     (2**1024 - 2**970, r"must fit in a float64")):
        p.write_text(_A + "}\n" + _A.replace("0.2", str(v)) + "}\n")
        with pytest.raises(ValueError, match=r"^n.jsonl line 2: field 'score' " + match):
            read_samples(p)


def test_token_counts_beyond_int64_name_file_line_and_field(tmp_path):
    p = tmp_path / "t.jsonl"
    row = '{"prompt_id": 1, "score": 0, "reward": 0, "temperature": 0.7, "n_tokens": %s}\n'
    p.write_text(row % 4 + row % (10**20))
    with pytest.raises(ValueError, match=r"^t.jsonl line 2: field 'n_tokens' must fit in a 64-bit integer "
                                         r"\(\|x\| < 2\*\*63\), got an integer of 21 digits$"):
        read_samples(p)
    p.write_text(row % 4 + row % "1e20")
    with pytest.raises(ValueError, match=r"^t.jsonl line 2: field 'n_tokens' must be an integer, got 1e\+20$"):
        read_samples(p)
    p.write_text(row % 4 + row % (2**63 - 1))
    assert read_samples(p).n_tokens[1] == 2**63 - 1

# ----------------------------------------------------------------------------- prompt files
@pytest.mark.parametrize("body,pattern", [
    (b'{"prompt": "a", "answer": "1"}\n{"prompt": "b" "answer": "2"}\n', r"p.jsonl line 2: not valid JSON \(Expecting ',' delimiter at column 16\)"),
    (b'{"prompt": "a", "answer": "1"}\n\n["b", "2"]\n', r"p.jsonl line 3: expected a JSON object \(a prompt with its fields\), got list"),
    (b'{"prompt": "a", "answer": "1"}\n{"prompt": "", "answer": "2"}\n', r"p.jsonl line 2: field 'prompt' must be a non-empty string, got ''"),
    (b'{"prompt": "a", "answer": "1"}\n{"answer": "2"}\n', r"p.jsonl line 2: field 'prompt' must be a non-empty string, got None"),
    (b'{"prompt": "a\xff"}\n', r"p.jsonl line 1: not UTF-8 text \(byte 0xff at column \d+\)"),
    (b'{"prompt": ' + b"[" * 100_000 + b"]" * 100_000 + b"}\n", r"p.jsonl line 1: JSON nested too deeply"),
])
def test_malformed_prompt_files_name_file_and_line(tmp_path, body, pattern):
    p = tmp_path / "p.jsonl"
    p.write_bytes(body)
    with pytest.raises(ValueError, match=pattern):
        load_prompts_jsonl(p)


def test_prompt_file_fields_and_blank_lines(tmp_path):
    p = tmp_path / "p.jsonl"
    p.write_text('{"prompt": "2+2=", "answer": 4, "level": 1}\n\n{"prompt": "3+3="}\n')
    a, b = load_prompts_jsonl(p)
    assert (a.prompt, a.answer, a.reference, a.meta) == ("2+2=", "4", "4", {"level": 1})
    assert (b.prompt, b.answer, b.reference) == ("3+3=", None, "")


# ----------------------------------------------------------------------------- too few prompts for an interval
def test_intervals_are_na_below_the_minimum_number_of_prompts():
    rng = np.random.default_rng(0)
    s, r = rng.random((3, 4)), (rng.random((3, 4)) < 0.5).astype(float)
    few = summarize(s, r, ks=[1, 2], n_boot=200)
    text = few.table()
    assert text.count("n/a") == 2 * 2 + 1 and "[" not in text
    assert f"intervals n/a: 3 prompt(s); a bootstrap over prompts needs at least {MIN_BOOT_PROMPTS}" in text
    d = few.to_dict()
    assert d["intervals_valid"] is False and "3 prompt(s)" in d["intervals_note"]
    # the means are still printed: best-of-1 is the mean reward over every sample (Chen et al. 2021, pass@1)
    assert f"{r.mean():.4f}" in text.splitlines()[2]
    many = summarize(rng.random((MIN_BOOT_PROMPTS, 4)), np.ones((MIN_BOOT_PROMPTS, 4)), ks=[1], n_boot=50)
    assert "n/a" not in many.table() and many.to_dict()["intervals_valid"] is True and "intervals_note" not in many.to_dict()


# ----------------------------------------------------------------------------- sizes and context
def _ledger_prompt_count(n_moves: int, max_qty: int, items: int = 8) -> int:
    """Distinct easy ledger prompts by brute-force enumeration of every opening stock and move sequence."""
    def paths(stock, left):
        if left == 0:
            return 1
        total = sum(paths(stock + q, left - 1) for q in range(1, max_qty + 1))  # "got q"
        if stock > 0:
            total += sum(paths(stock - q, left - 1) for q in range(1, min(max_qty, stock) + 1))  # "sold q"
        return total
    return items * sum(paths(s, n_moves) for s in range(max_qty + 1))


def test_task_sizes_beyond_what_the_task_makes_are_refused_before_generating():
    from bonft.trainer.config import PROBE_DRAWS, from_dict

    exact = _ledger_prompt_count(2, 9)
    assert exact == 16200
    with pytest.raises(ValueError) as err:
        from_dict({"rl_steps": 1, "train_prompts": 100_000_000})
    msg = str(err.value)
    assert msg.startswith("train_prompts + heldout_prompts asks for 75,000,150 distinct 'easy' prompts of task 'ledger', but it makes about ")
    about = int(msg.split("makes about ")[1].split(" ")[0].replace(",", ""))
    assert 0.9 * exact <= about <= 1.1 * exact  # the Chao1 estimate against the enumerated count
    from_dict({"rl_steps": 1, "train_prompts": PROBE_DRAWS})  # small sizes are left to Task.split, which is exact
    from_dict({"rl_steps": 1, "train_prompts": 200_000, "task_params": {"max_qty": 99}})  # a wide task has room


def test_context_check_names_the_prompt_and_the_fix():
    from bonft.tasks import build_tokenizer
    from bonft.trainer.models import build_tiny_model, check_context, context_length

    tok = build_tokenizer()
    model = build_tiny_model("llama", vocab_size=len(tok), layers=1, width=16, heads=2, max_positions=12)
    assert context_length(model) == 12
    check_context(model, tok, ["ab ?"], max_new_tokens=7)  # BOS + 4 characters + 7 = 12
    with pytest.raises(ValueError, match=r"prompt 'ab \?' takes 5 tokens \+ max_new_tokens=8 = 13 > 12 positions of the model; "
                                         r"lower max_new_tokens to <= 7 or raise max_positions"):
        check_context(model, tok, ["a", "ab ?"], max_new_tokens=8)
    with pytest.raises(ValueError, match=r"with reference '1234567' and EOS takes 13 tokens > 12"):
        check_context(model, tok, ["ab ?"], max_new_tokens=2, references=["1234567"])


def test_long_generation_shows_progress():
    from bonft.tasks.base import _progress

    assert _progress(199_999, "x") is None  # well under a second of work: no bar
    bar = _progress(200_000, "ledger 'easy' prompts")
    try:
        assert bar.total == 200_000 and bar.desc.startswith("ledger 'easy' prompts")
    finally:
        bar.close()


def test_step_guard_is_a_no_op_for_one_process():
    from bonft.trainer.distributed import DistContext, step_guard

    with pytest.raises(RuntimeError, match="^boom$"):  # no peers: the error is not relabelled
        with step_guard(DistContext(), step=3, run_dir=None):
            raise RuntimeError("boom")


def test_a_peer_lost_during_an_evaluation_is_named_with_the_step(tmp_path, monkeypatch):
    # a rank killed while the held-out pools were gathered left the others with "gather_object failed; a peer
    # process probably died": the guard of a training step now covers evaluations, naming the rank and the step
    from bonft.trainer.distributed import DistContext, PeerError, step_guard, stopping

    calls = []
    monkeypatch.setattr(stopping, "stopped_ranks", lambda ctx, tag: calls.append(tag) or [1])
    two = DistContext(rank=0, world_size=2, enabled=True)
    with pytest.raises(PeerError, match=r"^rank 1 of 2 stopped during the evaluation of step 6; rank 0 noticed it and "
                                        r"stops too\. No checkpoint was written yet in .*; restart the run\. Cause: "
                                        r"gather_object failed"):
        with step_guard(two, step=6, run_dir=tmp_path, evaluation=True):
            raise RuntimeError("gather_object failed")
    assert calls == ["eval-6"]  # its own roll call, apart from training step 6's



# ----------------------------------------------------------------------------- knobs that size work or memory
def _cli(*argv) -> tuple[int, str]:
    """(exit status, stderr) of ``bonft ARGV`` run in this process, as the console script runs it."""
    import contextlib
    import io

    from bonft.cli.main import main

    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = main([str(a) for a in argv])
        except SystemExit as e:
            code = e.code
    return code, err.getvalue().strip()


def test_max_subsets_is_bounded_in_the_api_and_the_command_line():
    from bonft.strategies import weighted_vote_credit, weighted_vote_per_prompt

    a, s, r = [[1, 2, 1]], [[1.0, 2.0, 3.0]], [[1.0, 0.0, 1.0]]
    why = r"\(each sampled subset draws n random keys at once; 10\^6 subsets put the standard error near sd\(f\) / 1000\)"
    for f in (lambda m: weighted_vote_per_prompt(a, s, r, ks=[2], max_subsets=m),
              lambda m: weighted_vote_credit(a, s, r, k=2, max_subsets=m)):
        with pytest.raises(ValueError, match=rf"^max_subsets must be <= 1,000,000 {why}, got max_subsets=1,000,000,000,000$"):
            f(10**12)
        f(10**6)  # the bound itself is accepted (C(3, 2) = 3 subsets: exact, nothing sampled)
    code, err = _cli("estimate", "--example", "--strategy", "weighted_vote", "--max-subsets", 10**12)
    assert code == 2 and err == ("bonft estimate: error: --max-subsets must be between 2 and 1,000,000 k-subsets (each sampled "
                                 "subset draws n random keys at once; 10^6 put the standard error near sd / 1000), got "
                                 "1,000,000,000,000")


def test_n_boot_has_the_command_lines_cap_in_the_api():
    from bonft.estimate import bootstrap_ci
    from bonft.plan.sweep import Pools, plan_pools
    from bonft.strategies import compare_strategies

    rng = np.random.default_rng(0)
    s, r = rng.random((12, 4)), (rng.random((12, 4)) < 0.5).astype(float)
    pattern = (r"^n_boot must be <= 1,000,000 \(each replicate is a row of the bootstrap table held in memory; more than "
               r"this cost time and memory and do not move a percentile interval measurably\), got n_boot=20,000,000$")
    for f in (lambda: summarize(s, r, n_boot=2 * 10**7), lambda: bootstrap_ci(r, n_boot=2 * 10**7),
              lambda: plan_pools({1.0: Pools(s, r)}, n_boot=2 * 10**7),
              lambda: compare_strategies(["best_of_k"], ks=[1], rewards=r, scores=s, n_boot=2 * 10**7)):
        with pytest.raises(ValueError, match=pattern):
            f()
    for cmd in (("estimate", "--example"), ("plan", "--samples", "x.jsonl")):
        code, err = _cli(*cmd, "--n-boot", 2 * 10**7)
        assert code == 2 and err.endswith("error: --n-boot must be between 10 and 1,000,000 bootstrap replicates, got 20,000,000")


def test_seeds_beyond_what_the_generators_take_are_refused():
    import torch

    with pytest.raises(ValueError, match="Overflow"):  # torch's own limit, the reason for a bound: 2**64 does not fit
        torch.Generator().manual_seed(2**64)
    torch.Generator().manual_seed(2**63 - 1)  # the largest seed bonft passes on
    with pytest.raises(ValueError, match=r"^seed must be < 2\*\*63 \(seeds are kept as int64; torch.manual_seed overflows "
                                         r"from 2\*\*64\), got seed=1180591620717411303424$"):
        summarize(np.ones((12, 2)), np.ones((12, 2)), n_boot=10, seed=2**70)
    code, err = _cli("estimate", "--example", "--seed", 2**70)
    assert code == 2 and err.endswith("error: --seed must be >= 0 and < 2**63 (seeds are kept as int64; torch.manual_seed "
                                      "overflows from 2**64), got 1180591620717411303424")


@pytest.mark.parametrize("key,value,pattern", [
    ("seed", 2**70, r"^seed must be < 2\*\*63 \(seeds are kept as int64; torch.manual_seed overflows from 2\*\*64\), got seed=\d+$"),
    ("threads", 100_000, r"^threads must be <= \d+ \(the cores of this machine, os.cpu_count\(\); more threads than cores only "
                         r"contend, and the BLAS library fails on very large counts\), got threads=100000$"),
    ("n", 10**12, r"^n must be <= 65,536 \(samples per prompt: a pool is sampled, scored and credited at once\), "
                  r"got n=1,000,000,000,000$"),
    ("eval_samples", 10**6, r"^eval_samples must be <= 65,536 \(samples per prompt"),
    ("prompts_per_step", 10**12, r"^prompts_per_step must be <= 65,536 \(a step holds every prompt's pool until its "
                                 r"update\), got prompts_per_step=1,000,000,000,000$"),
    ("n_boot", 2 * 10**7, r"^n_boot must be <= 1,000,000 \(each replicate is a row of the bootstrap table"),
    ("warm_start_batch_size", 10**12, r"^warm_start_batch_size must be <= 65,536 \(a warm-start step holds every prompt "
                                      r"with its reference\), got warm_start_batch_size=1,000,000,000,000$"),
    # 16 x 2 x 128^2 + (96 + 256) x 128 weights for the defaults layers=2, width=128, max_positions=96
    ("layers", 10**6, r"^layers, width and max_positions must give a model of <= 1,073,741,824 weights \(4 GiB in float32, "
                      r"and AdamW holds two more copies\), got about 262,144,045,056 \(16 x layers 1,000,000 x width 128\^2 "
                      r"\+ max_positions 96 x width\); for a large model use start_from$"),
    ("width", 10**9, r"^layers, width and max_positions must give a model of <= 1,073,741,824 weights"),
    ("max_positions", 10**9, r"got about 128,000,557,056 \(16 x layers 2 x width 128\^2 \+ max_positions 1,000,000,000 x"),
])
def test_config_keys_that_size_work_are_bounded_before_the_run(key, value, pattern):
    import os

    from bonft.trainer.config import from_dict

    if key == "threads":
        assert value > (os.cpu_count() or 1)
    warm = {"warm_start_steps": 1} if key.startswith("warm_start_") else {}  # read only with a warm start
    with pytest.raises(ValueError, match=pattern):
        from_dict({"rl_steps": 1, **warm, key: value})


def test_config_bounds_the_samples_of_one_micro_batch():
    from bonft.trainer.config import from_dict

    with pytest.raises(ValueError, match=r"^prompts_per_step / grad_accum x n must be <= 1,048,576 responses \(a micro-batch "
                                         r"samples them together, each with a row of logits per decoding step\), got 64 / 1 x "
                                         r"65,536 = 4,194,304; raise grad_accum or lower n$"):
        from_dict({"rl_steps": 1, "n": 65_536, "prompts_per_step": 64})
    from_dict({"rl_steps": 1, "n": 65_536, "prompts_per_step": 64, "grad_accum": 4})  # 16 prompts x 65,536 = 2**20


def test_config_bounds_hold_on_the_command_line(tmp_path):
    recipe = tmp_path / "r.toml"
    recipe.write_text("rl_steps = 1\n")
    code, err = _cli("train", recipe, "--set", f"seed={2**70}")
    assert code == 2 and err.startswith("bonft train: error: seed must be < 2**63")
    code, err = _cli("train", recipe, "--set", "threads=100000")
    assert code == 2 and err.startswith("bonft train: error: threads must be <= ")


def test_planner_sizes_are_bounded_before_any_work():
    from bonft.plan.from_model import plan_model
    from bonft.plan.sweep import Pools, plan_exact, plan_pools

    with pytest.raises(ValueError, match=r"^max_k must be <= 65,536 \(one value per k is computed, tabulated and "
                                         r"bootstrapped\), got max_k=1,000,000,000$"):
        plan_exact(scores=[1.0, 2.0], rewards=[0.0, 1.0], probs=[0.5, 0.5], temperatures=[1.0], max_k=10**9)
    rng = np.random.default_rng(0)
    pools = {t: Pools(rng.random((12, 64)), rng.random((12, 64))) for t in (0.5, 1.0, 1.5)}
    with pytest.raises(ValueError, match=r"^n_boot x temperatures x max_k must be <= 134,217,728 \(the bootstrap table of "
                                         r"every resample, temperature and k is held in memory at once, 1 GiB of float64\), "
                                         r"got 1,000,000 x 3 x 64 = 192,000,000; lower n_boot or max_k$"):
        plan_pools(pools, n_boot=10**6)
    # sampling from a model: the knobs are checked before the model is touched (None would fail at the first use)
    with pytest.raises(ValueError, match=r"^n must be <= 65,536 \(samples per prompt: a pool is sampled, scored and planned "
                                         r"over at once\), got n=1,000,000,000,000$"):
        plan_model(None, None, ["a"], lambda p, r: r, temperatures=[1.0], n=10**12)
    with pytest.raises(ValueError, match=r"^n_boot must be <= 1,000,000"):
        plan_model(None, None, ["a"], lambda p, r: r, temperatures=[1.0], n=4, n_boot=2 * 10**7)
    with pytest.raises(ValueError, match=r"^max_k must be <= n \(n=4, the samples drawn per prompt\), got max_k=8$"):
        plan_model(None, None, ["a"], lambda p, r: r, temperatures=[1.0], n=4, max_k=8)


# ----------------------------------------------------------------------------- recipes
def test_a_binary_or_non_utf8_recipe_names_the_file(tmp_path):
    from bonft.trainer.config import load_config

    binary = tmp_path / "model.bin"
    binary.write_bytes(b"PK\x03\x04" + bytes(range(256)))  # a zip archive's first bytes, then every byte value
    with pytest.raises(ValueError, match=rf"^recipe {binary} is a binary file \(a NUL byte at offset 4\), not a TOML text recipe$"):
        load_config(binary)
    latin = tmp_path / "latin1.toml"
    latin.write_bytes(b'rl_steps = 1\nname = "caf\xe9"\n')
    with pytest.raises(ValueError, match=rf"^recipe {latin} is not UTF-8 text \(byte 0xe9 on line 2\): a TOML recipe is UTF-8 "
                                         r"text; is it the right file\?$"):
        load_config(latin)
    code, err = _cli("train", binary)
    assert code == 2 and err == f"bonft train: error: recipe {binary} is a binary file (a NUL byte at offset 4), not a TOML text recipe"
    latin.write_bytes('rl_steps = 1\nname = "café"\n'.encode())  # the same recipe in UTF-8 reads
    assert load_config(latin).name == "café"


# ----------------------------------------------------------------------------- checkpoints
class _Payload:
    """A pickle that runs code when loaded: it would create the marker file."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        import os

        return (os.system, (f"touch {self.marker}",))


def _relist(ckpt, files=None) -> None:
    """Rewrite a checkpoint's manifest: ``files`` as given, or every file it now holds with its true size and hash."""
    import hashlib

    man = json.loads((ckpt / "manifest.json").read_text())
    if files is None:
        files = {p.relative_to(ckpt).as_posix(): {"bytes": p.stat().st_size, "sha256": hashlib.sha256(p.read_bytes()).hexdigest()}
                 for p in sorted(ckpt.rglob("*")) if p.is_file() and p.name != "manifest.json"}
    man["files"] = files
    (ckpt / "manifest.json").write_text(json.dumps(man))


@pytest.fixture(scope="module")
def two_checkpoints(tmp_path_factory):
    """A finished tiny run with checkpoints step-1 and step-2 (a source for damaged copies)."""
    from bonft.trainer.config import from_dict
    from bonft.trainer.loop import train

    run = tmp_path_factory.mktemp("trained") / "run"
    cfg = dict(layers=1, width=16, heads=2, max_positions=40, train_prompts=16, heldout_prompts=2, rl_steps=2,
               prompts_per_step=2, n=2, k=2, lr=1e-2, eval_samples=2, eval_ks=[1], n_boot=10, log_every=1,
               save_every=1, keep_checkpoints=2, max_new_tokens=4, plots=False, eval_at_start=False, threads=1)
    train(from_dict({**cfg, "run_dir": str(run)}), progress=False)
    return run


def _copy(run, dest):
    import shutil

    shutil.copytree(run, dest)
    return dest, dest / "checkpoints" / "step-00000002"


def test_a_manifest_must_list_every_file_the_checkpoint_needs(two_checkpoints, tmp_path):
    from bonft.trainer.checkpoint import CheckpointError, CheckpointWarning, latest_checkpoint, verify_checkpoint

    run, newest = _copy(two_checkpoints, tmp_path / "empty")
    _relist(newest, files={})  # a manifest that lists nothing proves nothing
    with pytest.raises(CheckpointError, match=rf"^checkpoint {newest} is damaged: manifest.json does not list state.pt, "
                                              r"config.toml, model/config.json, model/\*.safetensors \(the weights\), "
                                              r"tokenizer/ \(the tokenizer files\); a manifest must list every file the "
                                              r"checkpoint needs$"):
        verify_checkpoint(newest)
    with pytest.warns(CheckpointWarning, match=r"using the newest good checkpoint .*step-00000001 instead"):
        assert latest_checkpoint(run).name == "step-00000001"
    man = json.loads((two_checkpoints / "checkpoints" / "step-00000002" / "manifest.json").read_text())["files"]
    _relist(newest, files={k: v for k, v in man.items() if not k.startswith("tokenizer/")})
    with pytest.raises(CheckpointError, match=r"does not list tokenizer/ \(the tokenizer files\); a manifest must list"):
        verify_checkpoint(newest)
    _relist(newest, files=man)
    assert verify_checkpoint(newest) == newest  # the written manifest is complete
    (newest / "model" / "notes.txt").write_text("added later")
    with pytest.raises(CheckpointError, match=rf"^checkpoint {newest} is damaged: model/notes.txt is not in manifest.json "
                                              r"\(added after the save, or the manifest was rewritten\)$"):
        verify_checkpoint(newest)


def test_pickled_weights_are_refused_naming_the_file_and_the_older_checkpoint_is_used(two_checkpoints, tmp_path):
    import pickle

    from bonft.trainer.checkpoint import CheckpointError, CheckpointWarning, latest_checkpoint, verify_checkpoint

    marker = tmp_path / "ran"
    run, newest = _copy(two_checkpoints, tmp_path / "pickle")
    (newest / "model" / "model.safetensors").unlink()
    with open(newest / "model" / "pytorch_model.bin", "wb") as fh:
        pickle.dump({"w": _Payload(marker)}, fh)
    _relist(newest)  # the attacker rewrites the manifest too: sizes and hashes match
    why = r"refusing model/pytorch_model.bin, a pickle file \(loading it can run code\); bonft checkpoints hold weights as safetensors only"
    with pytest.raises(CheckpointError, match=rf"^checkpoint {newest} is damaged: {why}$"):
        verify_checkpoint(newest)
    with pytest.warns(CheckpointWarning, match=rf"{why}; using the newest good checkpoint .*step-00000001 instead"):
        assert latest_checkpoint(run).name == "step-00000001"
    for argv, code in ((["eval", run, "--n", "2", "--ks", "1"], 0),
                       (["eval", newest, "--n", "2", "--ks", "1"], 2),  # named directly: refused, no substitute
                       (["train", run / "config.toml", "--resume", "--output", run, "--quiet"], 0)):  # last: it saves
        got, err = _cli(*argv)
        lines = [ln for ln in err.splitlines() if ln.startswith("bonft ")]
        assert got == code and "Traceback" not in err, err
        assert len(lines) == 1 and re.search(why, lines[0]), err
        if code == 0:
            assert lines[0].startswith(f"bonft {argv[0]}: warning: checkpoint {newest} is damaged: ")
    assert not marker.exists()


@pytest.mark.filterwarnings("ignore:Detected pickle protocol")  # torch, about the crafted file
def test_a_model_directory_with_a_crafted_pickle_is_one_line(tmp_path):
    import pickle

    import torch

    from bonft.tasks import build_tokenizer
    from bonft.trainer.models import build_tiny_model, load_model

    marker, bare = tmp_path / "ran", tmp_path / "bare"
    tok = build_tokenizer()
    model = build_tiny_model("gpt2", vocab_size=len(tok), layers=1, width=16, heads=2)
    model.save_pretrained(bare / "model")  # a bonft model directory without a manifest (not a training checkpoint)
    tok.save_pretrained(bare / "tokenizer")
    (bare / "model" / "model.safetensors").unlink()  # weights as another program may leave them: a pickle of tensors
    torch.save(model.state_dict(), bare / "model" / "pytorch_model.bin")
    load_model(bare, device="cpu")  # a plain pickle of tensors loads (torch's weights-only loader accepts it)
    with open(bare / "model" / "pytorch_model.bin", "wb") as fh:
        pickle.dump({"w": _Payload(marker)}, fh)
    pattern = (rf"^refusing {bare / 'model' / 'pytorch_model.bin'}: pickled weights holding objects other than tensors \(loading "
               r"them can run code\); bonft loads such files only as plain tensors. Was it written by another program\? "
               r"Save the model as safetensors$")
    with pytest.raises(ValueError, match=pattern):
        load_model(bare, device="cpu")
    code, err = _cli("eval", bare, "--n", "2", "--ks", "1")
    assert code == 2 and re.match(pattern.replace("^", "^bonft eval: error: ", 1), err.splitlines()[-1]), err
    assert not marker.exists()
