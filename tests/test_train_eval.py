"""Held-out evaluation: its numbers against direct computations from the raw samples."""
import json

import numpy as np
import pytest
import torch
from scipy.special import comb

from bonft.generation import sequence_logprobs
from bonft.tasks import build_tokenizer, get_task
from bonft.trainer.evaluation import evaluate_policy
from bonft.trainer.models import build_tiny_model


@pytest.fixture(scope="module")
def setup():
    torch.set_num_threads(1)
    tok = build_tokenizer()
    model = build_tiny_model("gpt2", vocab_size=len(tok), layers=1, width=32, heads=2, max_positions=48, seed=1,
                             pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id)
    task = get_task("ledger")
    _, held = task.split(n_train=8, n_eval=6, seed=0)
    return tok, model, task, held


def test_eval_numbers_match_direct_computation(setup):
    tok, model, task, held = setup
    prompts = [e.prompt for e in held]
    # a verifier that marks a response correct when it starts with a digit: gives non-trivial pass counts
    digit = lambda ps, rs: np.array([float(r[:1].isdigit()) for r in rs])
    rep, raw = evaluate_policy(model, tok, prompts, verifiers={"exact": digit, "proxy": task.proxy_verifier(held)},
                               extract_answer=task.extract_answer, n=8, ks=[1, 2, 8], max_new_tokens=4, seed=3,
                               n_boot=200, groups=[e.meta["family"] for e in held])
    R = raw["rewards"]
    assert R.shape == (6, 8)
    c = R.sum(1)
    for j, k in enumerate([1, 2, 8]):
        # Chen et al. 2021, unbiased pass@k: 1 - C(n-c, k) / C(n, k), averaged over prompts (scipy.special.comb)
        direct = np.mean(1 - comb(8 - c, k) / comb(8, k))
        assert rep.pass_at_k["mean"][j] == pytest.approx(direct, abs=1e-12)
        assert rep.pass_at_k["lo"][j] <= direct <= rep.pass_at_k["hi"][j]
    assert rep.mean_reward == pytest.approx(R.mean())
    # distinct answers: brute force over the decoded texts
    assert rep.distinct_answers == pytest.approx(np.mean([len({task.extract_answer(t) for t in row}) for row in raw["texts"]]))
    assert rep.mean_length == pytest.approx(raw["n_tokens"].mean())
    assert sum(g["n_prompts"] for g in rep.by_group.values()) == 6
    assert "proxy" in rep.best_of_k and len(rep.best_of_k["proxy"]["mean"]) == 3


def test_entropy_estimate_is_mean_negative_logprob(setup):
    tok, model, _, held = setup
    from bonft.generation.sampling import sample

    prompts = [e.prompt for e in held[:3]]
    rep, raw = evaluate_policy(model, tok, prompts, verifiers={"exact": lambda p, r: np.zeros(len(r))}, n=4, ks=[1],
                               max_new_tokens=4, seed=5, n_boot=20, temperature=0.8)
    smp = sample(model, tok, prompts, n=4, temperature=0.8, max_new_tokens=4, seed=5, batch_size=4096)
    with torch.no_grad():  # recomputed with the training forward pass at the same temperature
        lp = sequence_logprobs(model, smp.prompt_tokens, smp.prompt_valid, smp.response_tokens, smp.response_valid, temperature=0.8)
    assert rep.entropy == pytest.approx(float(-lp.sum(-1).mean()), rel=1e-5)
    assert raw["texts"] == smp.texts


def test_a_verifier_that_fails_on_every_sample_is_an_error_not_a_row_of_zeros(setup):
    # an evaluation verifier that cannot run (a missing interpreter, a KeyError) used to print pass@k 0.000 and exit 0
    from bonft.verifiers.scoring import VerifierError

    tok, model, _, held = setup
    prompts = [e.prompt for e in held[:3]]

    def broken(p, r):
        raise KeyError("gold")

    ok = lambda p, r: np.zeros(len(r))  # noqa: E731
    for verifiers in ({"exact": broken}, {"exact": ok, "proxy": broken}):
        with pytest.raises(VerifierError, match=r"the verifier '(exact|proxy)' failed on every one of the 12 evaluation "
                                                r"samples \(.*KeyError.*gold.*\), so its row would read 0"):
            evaluate_policy(model, tok, prompts, verifiers=verifiers, n=4, ks=[1], max_new_tokens=3, seed=0, n_boot=20)
    flaky = lambda p, r: [1.0] + [float("nan")] * (len(r) - 1)  # noqa: E731  (11 of 12 fail: counted, not an error)
    rep, _ = evaluate_policy(model, tok, prompts, verifiers={"exact": flaky}, n=4, ks=[1], max_new_tokens=3, seed=0,
                             n_boot=20)
    assert rep.verifier_failures == 11
    from bonft.trainer.evaluation import sample_rows

    _, raw = evaluate_policy(model, tok, prompts, verifiers={"exact": ok, "proxy": flaky}, n=4, ks=[1], max_new_tokens=3,
                             seed=0, n_boot=20)
    rows = list(sample_rows(raw, prompts, temperature=1.0, score="proxy"))
    # the samples file tells a failed verdict (scored 0) from a judged one: the first is proxy's only verdict
    assert [r.get("failed") for r in rows] == [None] + [["proxy"]] * 11


def test_report_table_prints_no_interval_below_ten_prompts():
    # intervals over fewer than MIN_BOOT_PROMPTS prompts print n/a, with the count
    from bonft.trainer.evaluation import EvalReport

    curve = {"mean": [0.5, 0.75], "lo": [0.5, 0.75], "hi": [0.5, 0.75]}
    few = EvalReport(step=0, ks=[1, 4], n_prompts=1, n_samples=4, temperature=1.0, pass_at_k=curve,
                     best_of_k={"proxy": curve})
    assert "[n/a]" in few.table() and "intervals n/a: 1 prompt(s)" in few.table()
    assert "[0.500,0.500]" not in few.table()
    many = EvalReport(step=0, ks=[1, 4], n_prompts=12, n_samples=4, temperature=1.0, pass_at_k=curve)
    assert "[0.500,0.500]" in many.table() and "n/a" not in many.table()


def test_sample_rows_write_the_samples_file_that_read_samples_reads_back(tmp_path):
    """Pools planted by hand -> rows -> the samples file -> bonft.io's reader: the same numbers, prompt-major."""
    from bonft.io import group_pools, read_samples, write_samples
    from bonft.trainer.evaluation import sample_rows

    raw = {"texts": [["7", "8"], ["x", "9"]], "n_tokens": np.array([[2, 2], [2, 3]]),
           "rewards": np.array([[1.0, 0.0], [0.0, 1.0]]),
           "scores": {"exact": np.array([[1.0, 0.0], [0.0, 1.0]]), "proxy": np.array([[0.25, 0.75], [0.5, 0.125]])}}
    rows = list(sample_rows(raw, ["p0", "p1"], temperature=0.7, score="proxy", extract_answer=str.strip, every_score=True))
    assert rows[3] == {"prompt_id": 1, "prompt": "p1", "sample": 1, "score": 0.125, "reward": 1.0, "temperature": 0.7,
                       "response": "9", "n_tokens": 3, "answer": "9", "score_exact": 1.0, "score_proxy": 0.125}
    write_samples(tmp_path / "s.jsonl", sample_rows(raw, ["p0", "p1"], temperature=0.7, score="proxy"))
    keys, scores, rewards = group_pools(read_samples(tmp_path / "s.jsonl"))
    assert keys == ["0", "1"] and [s.tolist() for s in scores] == [[0.25, 0.75], [0.5, 0.125]]
    assert [r.tolist() for r in rewards] == [[1.0, 0.0], [0.0, 1.0]]
    # an answer that is not a str, an int or None is kept by its str, so bonft.io reads the file back
    odd = {"7": 7, "8": 2.5, "x": None, "9": (1, 2)}
    write_samples(tmp_path / "a.jsonl", sample_rows(raw, ["p0", "p1"], temperature=1.0, score="proxy", extract_answer=odd.get))
    assert read_samples(tmp_path / "a.jsonl").answers[:2].tolist() == ["7", "2.5"]
    assert [json.loads(line)["answer"] for line in (tmp_path / "a.jsonl").read_text().splitlines()] == [7, "2.5", None, "(1, 2)"]
    # a response that makes the task's extractor raise (ast.unparse's recursion limit, int's 4300 digits) is a
    # missing answer, said once per extractor, instead of ending the evaluation or the training step that reads it
    from bonft.trainer.evaluation import ExtractAnswerWarning

    def fragile(text):
        return int(text)  # "x" raises ValueError

    with pytest.warns(ExtractAnswerWarning, match=r"extract_answer \(.*fragile\) raised ValueError: invalid literal "
                                                  r".* on a response starting 'x'; such a response's answer counts as "
                                                  r"missing \(shown once\)"):
        rows = list(sample_rows(raw, ["p0", "p1"], temperature=1.0, score="proxy", extract_answer=fragile))
    assert [r["answer"] for r in rows] == [7, 8, None, 9]
    with pytest.raises(ValueError, match=r"prompts must hold the pools' P = 2 prompts, got 1"):
        sample_rows(raw, ["p0"], temperature=1.0, score="proxy")
    with pytest.raises(ValueError, match=r"score must name one of the pools' verifiers \['exact', 'proxy'\], got 'rm'"):
        sample_rows(raw, ["p0", "p1"], temperature=1.0, score="rm")
