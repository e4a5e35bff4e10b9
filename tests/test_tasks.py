"""Tests of bonft.tasks: the shop tasks, their verifiers, the char tokenizer, JSONL prompt sets.

Answers are re-derived here by an independent reading of each prompt (plain
arithmetic on the words, ``math.ceil`` for boxes), not by the task code.
"""
import json
import math

import numpy as np
import pytest

from bonft.tasks import TASKS, Example, build_tokenizer, exact_match_verifier, get_task, load_prompts_jsonl
from bonft.tasks.base import extract_integer
from bonft.tasks.tokenizer import ALPHABET, BOS_ID, EOS_ID, PAD_ID, UNK_ID
from bonft.verifiers.base import Verdicts


def ledger_answer(prompt: str) -> int:
    """Closing stock read off the words: opening, then sold/got moves, then an optional xM."""
    w = prompt.split()
    assert w[-1] == "?"
    stock, i, factor = int(w[1]), 2, 1
    while i < len(w) - 1:
        if w[i] == "sold":
            stock -= int(w[i + 1])
            i += 2
        elif w[i] == "got":
            stock += int(w[i + 1])
            i += 2
        else:
            assert w[i].startswith("x")
            factor = int(w[i][1:])
            i += 1
        assert stock >= 0  # a sale never exceeds the stock on hand
    return stock * factor


def restock_answer(prompt: str) -> int:
    _, _, need, _, have, _, box, _ = prompt.split()
    return math.ceil(max(0, int(need) - int(have)) / int(box))


@pytest.mark.parametrize("name", ["ledger", "restock", "refunds"])
def test_splits_are_reproducible_and_disjoint(name):
    task = get_task(name)
    tr1, ev1 = task.split(n_train=600, n_eval=100, seed=3)
    tr2, ev2 = get_task(name).split(n_train=600, n_eval=100, seed=3)
    assert [e.prompt for e in tr1] == [e.prompt for e in tr2] and [e.prompt for e in ev1] == [e.prompt for e in ev2]
    assert len(tr1) == 600 and len(ev1) == 100
    assert not {e.prompt for e in tr1} & {e.prompt for e in ev1}
    assert len({e.prompt for e in tr1}) == 600  # no duplicate prompts
    _, ev3 = task.split(n_train=50, n_eval=100, seed=3)
    assert [e.prompt for e in ev3] == [e.prompt for e in ev1]  # eval does not move with n_train
    tr4, _ = task.split(n_train=600, n_eval=100, seed=4)
    assert len({e.prompt for e in tr4} & {e.prompt for e in tr1}) < 300  # another seed, other prompts


def test_ledger_answers_and_knobs():
    task = get_task("ledger", n_moves=3, max_qty=12, hard_share=0.4, max_factor=4)
    train, evals = task.split(n_train=500, n_eval=100, seed=0)
    for ex in train + evals:
        assert int(ex.answer) == ledger_answer(ex.prompt) and ex.reference == ex.answer
        assert len(ex.prompt.split()) == 2 + 2 * 3 + (ex.meta["family"] == "hard") + 1
        assert len(ex.prompt) <= 40
    assert sum(e.meta["family"] == "hard" for e in train) == 200  # 0.4 * 500 exactly
    assert sum(e.meta["family"] == "hard" for e in evals) == 40
    assert {e.meta["factor"] for e in train if e.meta["family"] == "hard"} == {2, 3, 4}
    assert all(e.meta["factor"] == 1 for e in train if e.meta["family"] == "easy")


def test_restock_answers():
    task = get_task("restock", max_need=40, max_box=8, enough_share=0.2)
    train, _ = task.split(n_train=400, n_eval=50, seed=1)
    for ex in train:
        assert int(ex.answer) == restock_answer(ex.prompt)
    assert sum(e.answer == "0" for e in train) >= 80  # the "enough" family (20 %) answers 0


@pytest.mark.parametrize("name", ["ledger", "restock"])
def test_exact_verifier_rewards_references_and_rejects_corruptions(name):
    task = get_task(name)
    _, evals = task.split(n_train=0, n_eval=200, seed=0)
    verify = task.verifier(evals)
    prompts = [e.prompt for e in evals]
    v = verify(prompts, [e.reference for e in evals])
    assert isinstance(v, Verdicts) and (v.rewards == 1).all() and (v.scores == v.rewards).all()
    assert (verify(prompts, [f" {e.reference} " for e in evals]).rewards == 1).all()  # spaces are fine
    for bad in ([str(int(e.answer) + 1) for e in evals], [e.answer + "0" if e.answer != "0" else "1" for e in evals],
                ["" for _ in evals], [f"{e.answer} {e.answer}" for e in evals], [f"{e.answer}x" for e in evals]):
        assert (verify(prompts, bad).rewards == 0).all()
    with pytest.raises(ValueError, match=r"prompts\[0\] is not one of the 200 prompts"):
        verify(["no such prompt"], ["1"])
    with pytest.raises(ValueError, match=r"responses must have one entry per prompt \(len\(prompts\)=2\), got 1"):
        verify(prompts[:2], ["1"])


# the expected values follow str(int(text)) on ASCII digits (Python's int); 640 is sys.int_info.str_digits_check_threshold,
# the lowest limit sys.set_int_max_str_digits accepts (Python docs, "Integer string conversion length limitation")
@pytest.mark.parametrize("response, want", [
    ("0009", "9"), (" 9 \n", "9"), ("-0", "0"), ("-007", "-7"), ("00", "0"), ("+9", None), ("9 9", None), ("-", None),
    ("\u0669", None),                 # Arabic-Indic nine
    ("\uff19", None),                 # full-width nine
    ("\U0001d7d7", None),             # mathematical bold nine
    ("\u0660" + "16", None),          # an Arabic-Indic zero glued to an ASCII answer
    ("1" * 640, "1" * 640), ("1" * 641, None), ("1" * 4301, None), ("0" * 5000 + "7", "7"),
])
def test_extract_integer_reads_ascii_digits_only_and_never_raises(response, want):
    assert extract_integer(response) == want


@pytest.mark.parametrize("name", ["ledger", "restock", "refunds"])
def test_verifiers_score_unreadable_integers_zero_without_raising(name):
    task = get_task(name)
    _, evals = task.split(n_train=0, n_eval=20, seed=0)
    e = next(ex for ex in evals if ex.answer != "0")
    arabic = e.answer.translate(str.maketrans("0123456789", "\u0660\u0661\u0662\u0663\u0664\u0665\u0666\u0667\u0668\u0669"))
    responses = ["1" * 4301, "\u0660" + e.answer, arabic, e.answer]
    for verify in (task.verifier(evals), task.proxy_verifier(evals)):
        if verify is None:
            continue
        out = verify([e.prompt] * 4, responses)
        assert out.rewards.tolist() == [0.0, 0.0, 0.0, 1.0] and out.scores[:3].tolist() == [0.0, 0.0, 0.0]


def test_ledger_proxy_accepts_near_misses():
    task = get_task("ledger", max_qty=15, hard_share=0.5)
    _, evals = task.split(n_train=0, n_eval=400, seed=0)
    proxy = task.proxy_verifier(evals)
    prompts = [e.prompt for e in evals]
    truth = np.array([int(e.answer) for e in evals])
    ok = proxy(prompts, [e.answer for e in evals])
    assert (ok.scores == 1).all() and (ok.rewards == 1).all()  # never rejects a correct answer
    # responses truth + d for d in +-1..+-4: by the documented rule (parity and tol = max(2, truth // 5))
    # d = +-2 always scores 1, d = +-1, +-3 never (wrong parity), d = +-4 iff truth // 5 >= 4, i.e. truth >= 20
    offsets = [-4, -3, -2, -1, 1, 2, 3, 4]
    fp = np.array([proxy(prompts, [str(t + d) for t in truth]).scores == 1 for d in offsets])  # (8, 400)
    expected_share = (2 + 2 * np.mean(truth >= 20)) / 8
    assert fp.mean() == pytest.approx(expected_share, abs=1e-12)
    assert 0.25 < fp.mean() < 0.5  # a measurable share of wrong answers scored as right
    hard = np.array([e.meta["family"] == "hard" for e in evals])
    assert fp[:, hard].mean() > fp[:, ~hard].mean() + 0.05  # the proxy errs most on the hard family
    v = proxy(prompts, [str(t + 2) for t in truth])
    assert (v.rewards == 0).all() and (v.scores == 1).all()  # verifier != reward
    assert (proxy(prompts, ["lots" for _ in evals]).scores == 0).all()
    assert get_task("restock").proxy_verifier(evals) is None


def refunds_answers(prompt: str) -> tuple[int, int]:
    """(closing stock, the clerk's count that skips returns) read off the words."""
    w = prompt.split()
    assert w[-1] == "?"
    stock = skipped = int(w[1])
    for verb, q in zip(w[2:-1:2], w[3:-1:2]):
        q = int(q)
        if verb == "sold":
            stock, skipped = stock - q, skipped - q
        elif verb == "got":
            stock, skipped = stock + q, skipped + q
        else:
            assert verb == "ret"
            stock += q
        assert stock >= 0 and skipped >= 0  # a sale never exceeds the stock on hand, by either count
    return stock, skipped


def test_refunds_answers_references_and_shares():
    from scipy import stats

    task = get_task("refunds", n_moves=3, max_qty=9, return_share=0.5, rule_share=0.1)
    train, evals = task.split(n_train=3000, n_eval=200, seed=0)
    for ex in train + evals:
        stock, skipped = refunds_answers(ex.prompt)
        assert int(ex.answer) == stock
        n_ret = ex.prompt.split().count("ret")
        assert n_ret == (ex.meta["family"] == "return")  # exactly one return on a return prompt, else none
        assert ex.prompt.split()[2] != "ret"  # never the first movement
        # the warm-start reference: the answer, or on a return prompt the clerk's count that skips it
        assert int(ex.reference) == (stock if ex.meta["rule_in_reference"] else skipped)
    assert sum(e.meta["family"] == "return" for e in train) == 1500  # 0.5 * 3000 exactly
    ret = [e for e in train if e.meta["family"] == "return"]
    hits = sum(e.meta["rule_in_reference"] for e in ret)
    # rule_share is a Bernoulli(0.1) per return prompt: a two-sided binomial test (scipy) must not reject it
    assert stats.binomtest(hits, len(ret), 0.1).pvalue > 0.001
    assert all(e.meta["rule_in_reference"] and e.reference == e.answer for e in train if e.meta["family"] == "plain")
    # a return that is skipped changes the count: the clerk's reference is then wrong
    assert all(e.reference != e.answer for e in ret if not e.meta["rule_in_reference"])


def test_refunds_proxy_is_a_last_digit_check_that_prefers_small_counts():
    task = get_task("refunds")
    _, evals = task.split(n_train=0, n_eval=300, seed=1)
    proxy = task.proxy_verifier(evals)
    prompts = [e.prompt for e in evals]
    truth = np.array([int(e.answer) for e in evals])
    ok = proxy(prompts, [e.answer for e in evals])
    assert (ok.rewards == 1).all() and np.allclose(ok.scores, 1 - truth / 100)  # the documented formula
    for d in range(1, 10):  # a wrong last digit scores 0 whatever the distance
        v = proxy(prompts, [str(t + d) for t in truth])
        assert (v.scores == 0).all() and (v.rewards == 0).all()
    up = proxy(prompts, [str(t + 10) for t in truth])  # right last digit, too large: passes below the truth
    assert (up.rewards == 0).all() and (up.scores > 0).all() and (up.scores < ok.scores).all()
    big = truth >= 10
    down = proxy([p for p, b in zip(prompts, big) if b], [str(t - 10) for t in truth[big]])
    assert big.sum() > 20 and (down.rewards == 0).all()
    assert (down.scores > ok.scores[big]).all()  # verifier != reward: "truth - 10" beats the truth
    assert (proxy(prompts, ["many" for _ in evals]).scores == 0).all()
    assert (proxy(prompts, ["100" for _ in evals]).scores == 0).all()  # outside 0..99


def test_refunds_knob_errors():
    with pytest.raises(ValueError, match="rule_share"):
        get_task("refunds", rule_share=1.5)
    with pytest.raises(ValueError, match="n_moves"):
        get_task("refunds", n_moves=1)


def test_get_task_errors():
    assert set(TASKS) >= {"ledger", "restock", "refunds", "jsonl"}
    with pytest.raises(ValueError, match=r"name must be one of \('ledger', 'restock', 'refunds', 'workshop', 'jsonl', 'user'\), got 'chess'"):
        get_task("chess")
    with pytest.raises(TypeError, match=r"params of task 'ledger' must be among \['n_moves', 'max_qty', 'hard_share', 'max_factor'\], "
                                        r"got unknown \['depth'\]$"):  # only the unknown key, not the valid ones beside it
        get_task("ledger", depth=3, hard_share=0.5)
    with pytest.raises(ValueError, match=r"hard_share must be in \[0, 1\], got hard_share=1.5"):
        get_task("ledger", hard_share=1.5)
    with pytest.raises(ValueError, match=r"max_factor must be >= 2, got max_factor=1"):
        get_task("ledger", max_factor=1)
    with pytest.raises(ValueError, match=r"asks for \d+ distinct 'easy' prompts"):
        get_task("ledger", n_moves=1, max_qty=1, hard_share=0.0).split(n_train=500, n_eval=10)
    with pytest.raises(ValueError, match=r"n_train must be >= 0, got n_train=-1"):
        get_task("ledger").split(n_train=-1, n_eval=10)


def test_tokenizer_round_trip_and_save_load(tmp_path):
    tok = build_tokenizer()
    assert (tok.pad_token_id, tok.bos_token_id, tok.eos_token_id, tok.unk_token_id) == (PAD_ID, BOS_ID, EOS_ID, UNK_ID)
    assert tok.vocab_size == 4 + len(ALPHABET) == len(set(ALPHABET)) + 4
    text = "lamps 7 sold 3 got 5 x2 ?"
    ids = tok(text)["input_ids"]
    assert ids[0] == BOS_ID and len(ids) == len(text) + 1
    assert tok.decode(ids, skip_special_tokens=True) == text
    assert tok.decode(tok(ALPHABET)["input_ids"], skip_special_tokens=True) == ALPHABET  # every character
    assert tok("a~b")["input_ids"][2] == UNK_ID
    batch = tok(["ab", "abcd"], padding=True)
    assert batch["input_ids"][0][:2] == [PAD_ID, PAD_ID] and batch["attention_mask"][0] == [0, 0, 1, 1, 1]
    tok.save_pretrained(tmp_path)
    from transformers import AutoTokenizer

    tok2 = AutoTokenizer.from_pretrained(tmp_path, local_files_only=True)
    assert tok2(text)["input_ids"] == ids and tok2.padding_side == "left"
    assert tok2.decode(ids + [EOS_ID, PAD_ID], skip_special_tokens=True) == text


def test_jsonl_prompts(tmp_path):
    path = tmp_path / "mine.jsonl"
    rows = [{"question": f"{i}+{i}=", "solution": 2 * i, "source": "hand"} for i in range(30)]
    path.write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    ex = load_prompts_jsonl(path, prompt_field="question", answer_field="solution")
    assert len(ex) == 30 and ex[3] == Example(prompt="3+3=", answer="6", reference="6")
    assert ex[3].meta == {"source": "hand"}
    verify = exact_match_verifier(ex)
    v = verify(["3+3=", "3+3=", "4+4="], [" 6 ", "7", "8"])
    assert v.rewards.tolist() == [1.0, 0.0, 1.0]
    task = get_task("jsonl", path=str(path), prompt_field="question", answer_field="solution")
    train, evals = task.split(n_train=20, n_eval=10, seed=0)
    assert len(train) == 20 and len(evals) == 10 and not {e.prompt for e in train} & {e.prompt for e in evals}
    assert (task.verifier(evals)([e.prompt for e in evals], [e.answer for e in evals]).rewards == 1).all()
    with pytest.raises(ValueError, match=r"n_train \+ n_eval must be <= 30"):
        task.split(n_train=25, n_eval=10)
    # no answer field: prompts load, but no exact verifier
    bare = load_prompts_jsonl(path, prompt_field="question")
    assert bare[0].answer is None
    with pytest.raises(ValueError, match=r"examples must all have an answer for an exact verifier, got answer=None at index 0"):
        exact_match_verifier(bare)
    with pytest.raises(ValueError, match=r"prompt_field must name a field of .* got 'prompt'"):
        load_prompts_jsonl(path)
    with pytest.raises(FileNotFoundError, match=r"no such file"):
        load_prompts_jsonl(tmp_path / "absent.jsonl")


def test_jsonl_task_refuses_conflicting_duplicates_naming_both_lines(tmp_path):
    # the user task refuses the same file; the jsonl task kept the first answer and dropped '5' silently
    path = tmp_path / "dup.jsonl"
    path.write_text('{"prompt": "2+2", "answer": "4"}\n{"prompt": "2+2", "answer": "5"}\n{"prompt": "3+3", "answer": "6"}\n')
    with pytest.raises(ValueError, match=r"dup.jsonl line 2: the prompt '2\+2' is also at .*dup.jsonl line 1 with other fields"):
        get_task("jsonl", path=str(path))
    path.write_text('{"prompt": "2+2", "answer": "4", "src": "a"}\n{"prompt": "2+2", "answer": "4", "src": "b"}\n')
    with pytest.raises(ValueError, match=r"dup.jsonl line 2: the prompt '2\+2' is also at"):
        get_task("jsonl", path=str(path))
    path.write_text('{"prompt": "2+2", "answer": "4"}\n\n{"prompt": "2+2", "answer": " 4 "}\n{"prompt": "3+3", "answer": 6}\n')
    task = get_task("jsonl", path=str(path))  # a repeated row with the same fields is read once
    assert [(e.prompt, e.answer) for e in task.examples] == [("2+2", "4"), ("3+3", "6")]


@pytest.mark.parametrize("cell", ['""', '"  "', "null"])
def test_jsonl_blank_answers_are_missing_and_refused_naming_the_line(tmp_path, cell):
    path = tmp_path / "blank.jsonl"
    path.write_text('{"prompt": "a", "answer": "4"}\n{"prompt": "b", "answer": ' + cell + '}\n')
    assert [e.answer for e in load_prompts_jsonl(path)] == ["4", None]
    task = get_task("jsonl", path=str(path))
    with pytest.raises(ValueError, match=r"blank.jsonl line 2: field 'answer' is missing \(absent, null or blank\)"):
        task.verifier(task.examples)
    with pytest.raises(ValueError, match=r"examples must all have an answer for an exact verifier, got answer=None at index 1"):
        exact_match_verifier(load_prompts_jsonl(path))
    # an Example built by hand with a blank answer would reward the empty response
    with pytest.raises(ValueError, match=r"examples must all have a non-blank str answer .*got answer='  ' at index 0"):
        exact_match_verifier([Example(prompt="a", answer="  ", reference="")])


@pytest.mark.parametrize("value, shown", [("7.0", "float 7.0"), ("true", "bool True"), ("1e2", "float 100.0")])
def test_jsonl_float_and_bool_answers_are_refused_naming_the_line(tmp_path, value, shown):
    path = tmp_path / "t.jsonl"
    path.write_text('{"prompt": "a", "answer": ' + value + '}\n')
    with pytest.raises(ValueError, match=rf"t.jsonl line 1: field 'answer' \(the answer\) must be a string or an integer, got {shown}"):
        load_prompts_jsonl(path)
    path.write_text('{"prompt": "a", "answer": 7}\n{"prompt": "b", "answer": "true"}\n')
    assert [e.answer for e in load_prompts_jsonl(path)] == ["7", "true"]
