"""UserTask: prompts from the user's data (JSONL, datasets files and directories, Dataset objects), a field map,
chat templates, and verifiers bound to the rows.

Outside references: rows are compared with what Python's ``csv`` and ``json`` modules read from the same
files, and with the ``datasets`` objects written; chat-template prompts are checked against
``transformers``' own ``apply_chat_template(tokenize=True)`` token ids.
"""
import csv
import json

import datasets
import numpy as np
import pytest

from bonft.tasks import build_tokenizer, get_task
from bonft.tasks.user import UserTask
from bonft.verifiers.fields import UnitTests, bind_rows

ROWS = [
    {"question": "shelf 3 holds 4 jars; add 5", "tests": "assert total() == 9", "hint": "count", "sol": "def total(): return 9"},
    {"question": "shelf 1 holds 2 jars; add 2", "tests": "assert total() == 4", "hint": "count", "sol": "def total(): return 4"},
    {"question": "shelf 7 holds 1 jar; add 6", "tests": "assert total() == 7", "hint": "add", "sol": "def total(): return 7"},
]
TEMPLATE = ("{{ bos_token }}{% for m in messages %}[{{ m['role'] }}] {{ m['content'] }}\n{% endfor %}"
            "{% if add_generation_prompt %}[assistant] {% endif %}")


def write_jsonl(path, rows):
    path.write_text("".join(json.dumps(r) + "\n" for r in rows))
    return path


def test_jsonl_without_answers_reads_every_row(tmp_path):
    path = write_jsonl(tmp_path / "shelves.jsonl", ROWS)
    task = get_task("user", data=str(path), prompt_field="question", tests_field="tests")
    assert [ex.prompt for ex in task.examples] == [r["question"] for r in ROWS]
    assert all(ex.answer is None and ex.reference == "" for ex in task.examples)
    assert task.examples[1].meta["fields"] == ROWS[1]  # every column handed over (extra_fields=None)
    assert task.examples[1].meta["where"] == f"{path} line 2"
    train, held = task.split(n_train=2, n_eval=1, seed=3)
    assert len(train) == 2 and len(held) == 1
    assert {e.prompt for e in train} | {held[0].prompt} == {r["question"] for r in ROWS}
    assert task.split(n_train=2, n_eval=1, seed=3) == (train, held)  # seeded
    with pytest.raises(ValueError, match=r"n_train \+ n_eval must be <= 3 \(distinct prompts in the data\), got 3 \+ 1"):
        task.split(n_train=3, n_eval=1)


def test_csv_parquet_json_and_saved_dataset_match_the_standard_readers(tmp_path):
    csv_path = tmp_path / "shelves.csv"
    with open(csv_path, "w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=list(ROWS[0]))
        w.writeheader()
        w.writerows(ROWS)
    with open(csv_path, newline="") as f:
        want = [dict(r) for r in csv.DictReader(f)]  # Python's csv module: the outside reference
    got = UserTask(data=str(csv_path), prompt_field="question")
    assert [ex.meta["fields"] for ex in got.examples] == want
    ds = datasets.Dataset.from_list(ROWS)
    ds.to_parquet(str(tmp_path / "shelves.parquet"))
    (tmp_path / "shelves.json").write_text(json.dumps(ROWS))
    ds.save_to_disk(str(tmp_path / "saved"))
    datasets.DatasetDict({"train": ds, "test": ds.select([0])}).save_to_disk(str(tmp_path / "saved_dict"))
    for data, extra in ((tmp_path / "shelves.parquet", {}), (tmp_path / "shelves.json", {}), (tmp_path / "saved", {}),
                        (tmp_path / "saved_dict", {"dataset_split": "train"}), (ds, {})):
        task = UserTask(data=data, prompt_field="question", **extra)
        assert [ex.meta["fields"] for ex in task.examples] == ROWS, data
    one = UserTask(data=tmp_path / "saved_dict", prompt_field="question", dataset_split="test")
    assert [ex.prompt for ex in one.examples] == [ROWS[0]["question"]]
    with pytest.raises(ValueError, match=r"dataset_split must name one split of .*saved_dict' \(splits: \['train', 'test'\]\), got None"):
        UserTask(data=tmp_path / "saved_dict", prompt_field="question")


def test_csv_cells_are_read_as_written(tmp_path):
    # a reader that infers types turns an integer column with a blank cell into floats ('1' -> '1.0'), so the
    # exact verifier would refuse the right answer; Python's csv module (the reference) keeps the text
    path = tmp_path / "totals.csv"
    path.write_text("prompt,total\nx?,1\ny?,\nz?,007\n")
    task = UserTask(data=str(path), prompt_field="prompt", answer_field="total")
    with open(path, newline="") as f:
        assert [ex.meta["fields"] for ex in task.examples] == [dict(r) for r in csv.DictReader(f)]
    assert [ex.meta["fields"]["total"] for ex in task.examples] == ["1", "", "007"]
    x = next(ex for ex in task.examples if ex.prompt == "x?")
    assert [ex.answer for ex in task.examples] == ["1", None, "007"]  # a blank cell is a missing answer
    answered = [ex for ex in task.examples if ex.answer is not None]
    assert task.verifier(answered)(["x?", "x?"], ["1", ""]).scores.tolist() == [1.0, 0.0] and x.meta["where"].endswith("line 2")
    with pytest.raises(ValueError, match=r"totals.csv line 3: field 'total' is missing \(absent, null or blank\)"):
        task.verifier(task.examples)
    (tmp_path / "ragged.csv").write_text("prompt,total\nx?,1,2\n")
    with pytest.raises(ValueError, match=r"ragged.csv' line 2: 3 cells, but the header names 2 columns"):
        UserTask(data=str(tmp_path / "ragged.csv"), prompt_field="prompt")
    # a quoted cell may hold line breaks (RFC 4180): a row is named by its first line, as an editor shows it
    (tmp_path / "multi.csv").write_text('prompt,total\n"first\nline?",1\n"two\nthree\nlines?",2\n"bad\nrow?",3,4\n')
    with pytest.raises(ValueError, match=r"multi.csv' line 7: 3 cells, but the header names 2 columns"):
        UserTask(data=str(tmp_path / "multi.csv"), prompt_field="prompt")
    (tmp_path / "multi.csv").write_text('prompt,total\n"first\nline?",1\n\n"two\nthree\nlines?",2\n')
    task = UserTask(data=str(tmp_path / "multi.csv"), prompt_field="prompt", answer_field="total")
    assert [ex.meta["where"].rsplit(" ", 2)[-2:] for ex in task.examples] == [["line", "2"], ["line", "5"]]
    (tmp_path / "twice.csv").write_text("prompt,prompt\nx?,y?\n")
    with pytest.raises(ValueError, match=r"twice.csv' line 1: the header must name every column once"):
        UserTask(data=str(tmp_path / "twice.csv"), prompt_field="prompt")
    (tmp_path / "latin.csv").write_bytes(b"prompt\ncaf\xe9?\n")
    with pytest.raises(ValueError, match=r"latin.csv' is not UTF-8 text \(byte 0xe9\)"):
        UserTask(data=str(tmp_path / "latin.csv"), prompt_field="prompt")


def test_field_map_answers_references_and_extra_fields(tmp_path):
    rows = [{"q": "a?", "ans": " 4 ", "ref": "4", "tests": "assert 1", "noise": 1}, {"q": "b?", "ans": 5, "ref": "5", "tests": "x", "noise": 2}]
    task = UserTask(data=write_jsonl(tmp_path / "d.jsonl", rows), prompt_field="q", answer_field="ans",
                    reference_field="ref", extra_fields=["noise"])
    assert [(e.answer, e.reference) for e in task.examples] == [("4", "4"), ("5", "5")]
    assert task.examples[0].meta["fields"] == {"q": "a?", "ans": " 4 ", "ref": "4", "noise": 1}  # 'tests' not kept
    verify = task.verifier(task.examples)
    v = verify(["a?", "b?", "a?"], ["4", " 5", "44"])
    assert v.rewards.tolist() == [1.0, 1.0, 0.0]


def test_bad_data_errors_name_the_field_and_row(tmp_path):
    path = write_jsonl(tmp_path / "d.jsonl", [{"q": "a"}, {"q": 7}])
    with pytest.raises(ValueError, match=r"d.jsonl line 2: field 'q' \(the prompt\) must be a non-empty string, got int 7"):
        UserTask(data=path, prompt_field="q")
    path = write_jsonl(tmp_path / "e.jsonl", [{"q": "a"}, {"q": "b"}])
    with pytest.raises(ValueError, match=r"answer_field must name a column of .*e.jsonl' \(columns: \['q'\]\), got 'answer'"):
        UserTask(data=path, prompt_field="q", answer_field="answer")
    with pytest.raises(ValueError, match=r"answer_field is not set"):
        UserTask(data=path, prompt_field="q").verifier(UserTask(data=path, prompt_field="q").examples)
    with pytest.raises(ValueError, match=r"data must name a JSONL"):
        UserTask()
    with pytest.raises(ValueError, match=r"not one written by datasets' save_to_disk"):
        UserTask(data=tmp_path)
    with pytest.raises(ValueError, match=r"data must be a \.jsonl, \.json, \.csv or \.parquet file"):
        UserTask(data=write_jsonl(tmp_path / "d.txt", [{"q": "a"}]), prompt_field="q")
    with pytest.raises(ValueError, match=r"line 2: the prompt 'a' is also at .* line 1 with other fields"):
        UserTask(data=write_jsonl(tmp_path / "dup.jsonl", [{"q": "a", "t": "1"}, {"q": "a", "t": "2"}]), prompt_field="q")
    same = UserTask(data=write_jsonl(tmp_path / "same.jsonl", [{"q": "a", "t": "1"}, {"q": "a", "t": "1"}]), prompt_field="q")
    assert len(same.examples) == 1
    with pytest.raises(ValueError, match=r"system .* cannot take effect without chat_template = true"):
        UserTask(data=path, prompt_field="q", system="be brief")
    ans = UserTask(data=write_jsonl(tmp_path / "f.jsonl", [{"q": "a", "x": "1"}, {"q": "b"}]), prompt_field="q", answer_field="x")
    with pytest.raises(ValueError, match=r"f.jsonl line 2: field 'x' is missing \(absent, null or blank\), and the exact verifier needs it"):
        ans.verifier(ans.examples)


@pytest.mark.parametrize("cell", ['""', '"   "', '"\\n"', "null"])
def test_blank_or_null_answers_are_missing_and_never_reward_an_empty_response(tmp_path, cell):
    # a blank answer would make the empty response right; it is refused as a null one is, naming the line
    path = tmp_path / "blank.jsonl"
    path.write_text('{"q": "a", "x": "4"}\n{"q": "b", "x": ' + cell + '}\n')
    task = UserTask(data=path, prompt_field="q", answer_field="x")
    assert [ex.answer for ex in task.examples] == ["4", None] and not task.has_answers
    with pytest.raises(ValueError, match=r"blank.jsonl line 2: field 'x' is missing \(absent, null or blank\)"):
        task.verifier(task.examples)


@pytest.mark.parametrize("value, stored", [("7", "7"), (" 7 ", "7"), (7, "7"), (-12, "-12"), (10**30, "1" + "0" * 30)])
def test_answers_are_strings_or_integers_in_decimal_text(tmp_path, value, stored):
    # JSON integers read as their decimal text (json.dumps writes the same digits); the response "7" is right
    path = write_jsonl(tmp_path / "t.jsonl", [{"q": "a", "x": value}])
    task = UserTask(data=path, prompt_field="q", answer_field="x")
    assert task.examples[0].answer == stored == json.dumps(value).strip('" ')
    assert task.verifier(task.examples)(["a"], [stored]).scores.tolist() == [1.0]


@pytest.mark.parametrize("line, shown", [('7.0', "float 7.0"), ('1e2', "float 100.0"), ('true', "bool True"),
                                         ('[7]', r"list \[7\]"), ('{"v": 7}', r"dict \{'v': 7\}")])
def test_float_bool_and_other_answers_are_refused_naming_the_line(tmp_path, line, shown):
    # Python's spelling ('7.0', 'True', '100.0') is no text a right response need match: the file must say
    path = tmp_path / "t.jsonl"
    path.write_text('{"q": "a", "x": "4"}\n\n{"q": "b", "x": ' + line + '}\n')
    with pytest.raises(ValueError, match=rf"t.jsonl line 3: field 'x' \(the answer\) must be a string or an integer, got {shown}; write it as"):
        UserTask(data=path, prompt_field="q", answer_field="x")
    # a datasets column of numbers with a fraction is float64 throughout: refused the same way
    with pytest.raises(ValueError, match=r"the dataset row 0: field 'x' \(the answer\) must be a string or an integer, got float 7.0"):
        UserTask(data=datasets.Dataset.from_list([{"q": "a", "x": 7}, {"q": "b", "x": 2.5}]), prompt_field="q", answer_field="x")


def chat_tokenizer():
    tok = build_tokenizer()  # adds <bos> itself; the template also starts with {{ bos_token }}
    tok.chat_template = TEMPLATE
    return tok


def test_chat_template_matches_transformers_tokens_without_a_doubled_start_token(tmp_path):
    tok = chat_tokenizer()
    path = write_jsonl(tmp_path / "d.jsonl", ROWS)
    for system in (None, "you count jars"):
        task = UserTask(data=path, prompt_field="question", chat_template=True, system=system, tokenizer=tok)
        for ex, row in zip(task.examples, ROWS):
            messages = ([{"role": "system", "content": system}] if system else []) + [{"role": "user", "content": row["question"]}]
            want = tok.apply_chat_template(messages, tokenize=True, add_generation_prompt=True)
            want = list(want["input_ids"]) if hasattr(want, "keys") else list(want)
            assert list(tok(ex.prompt)["input_ids"]) == want  # what the sampler and the training forward encode
            assert want.count(tok.bos_token_id) == 1
            assert ex.meta["fields"]["question"] == row["question"]  # the raw prompt stays in the row
    assert task.examples[0].prompt == "[system] you count jars\n[user] shelf 3 holds 4 jars; add 5\n[assistant] "
    tok.save_pretrained(str(tmp_path / "tok"))
    from_dir = UserTask(data=path, prompt_field="question", chat_template=True, tokenizer=str(tmp_path / "tok"))
    assert from_dir.examples[0].prompt == "[user] shelf 3 holds 4 jars; add 5\n[assistant] "


def test_chat_template_missing_is_an_error(tmp_path):
    path = write_jsonl(tmp_path / "d.jsonl", ROWS)
    with pytest.raises(ValueError, match=r"has no chat template \(tokenizer.chat_template is None\)"):
        UserTask(data=path, prompt_field="question", chat_template=True, tokenizer=build_tokenizer())
    with pytest.raises(ValueError, match=r"chat_template = true needs the tokenizer"):
        UserTask(data=path, prompt_field="question", chat_template=True)


def test_bind_verifier_checks_needed_fields_and_hands_rows(tmp_path):
    rows = [dict(r) for r in ROWS]
    del rows[2]["tests"]
    path = write_jsonl(tmp_path / "d.jsonl", rows)
    task = UserTask(data=path, prompt_field="question")
    with pytest.raises(ValueError, match=r"d.jsonl line 3: field 'tests' is missing, and verifier UnitTests needs it "
                                         r"\(the prompt's unit tests"):
        task.bind_verifier(UnitTests(field="tests"), task.examples)
    seen = {}

    def by_hint(prompts, responses, rows):
        seen["rows"] = rows
        return np.array([float(r == row["hint"]) for r, row in zip(responses, rows)])

    verify = task.bind_verifier(by_hint, task.examples)
    out = verify([ROWS[2]["question"], ROWS[0]["question"]], ["add", "add"])
    assert out.tolist() == [1.0, 0.0]
    assert [r["hint"] for r in seen["rows"]] == ["add", "count"]
    by_hint.fields = {"solution": "compares with the solution"}
    with pytest.raises(ValueError, match=r"line 1: field 'solution' is missing, and verifier by_hint needs it \(compares with the solution\)"):
        task.bind_verifier(by_hint, task.examples)

    def plain(prompts, responses):
        return [1.0] * len(prompts)

    assert bind_rows(plain, []) is plain


def test_unit_tests_from_the_row_run_in_code_runner(tmp_path):
    task = UserTask(data=write_jsonl(tmp_path / "d.jsonl", ROWS), prompt_field="question")
    verify = task.bind_verifier(UnitTests(field="tests", wall_time=5.0, workers=2), task.examples)
    prompts = [r["question"] for r in ROWS] + [ROWS[0]["question"]]
    responses = [r["sol"] for r in ROWS] + ["def total(): return 8"]
    v = verify(prompts, responses)
    assert v.scores.tolist() == [1.0, 1.0, 1.0, 0.0]
    bad = write_jsonl(tmp_path / "bad.jsonl", [{"q": "a", "tests": 3}])
    bad_task = UserTask(data=bad, prompt_field="q")
    with pytest.raises(ValueError, match=r"field 'tests' must hold the prompt's unit tests as Python source .*got int 3"):
        bad_task.bind_verifier(UnitTests(), bad_task.examples)
    with pytest.raises(TypeError, match=r"bind it to the rows first"):
        UnitTests()(["a"], ["b"])


@pytest.mark.parametrize("tests, message", [
    ("# TODO write tests", r"d.jsonl line 2: field 'tests' of prompt 'b' must hold at least one statement, got none "
                           r"\(only blanks or comments\): any code would pass"),
    ("   ", r"d.jsonl line 2: field 'tests' of prompt 'b' must hold at least one statement"),
    (["# one", "# two"], r"d.jsonl line 2: field 'tests' of prompt 'b' must hold at least one statement"),
    ("assert total(", r"d.jsonl line 2: field 'tests' of prompt 'b' must be valid Python, got a SyntaxError at line 1"),
    (None, r"d.jsonl line 2: field 'tests' is null, and verifier UnitTests needs it"),
])
def test_unit_tests_refuse_rows_any_code_would_pass_naming_the_line(tmp_path, tests, message):
    rows = [{"q": "a", "tests": "assert total() == 1"}, {"q": "b", "tests": tests}]
    task = UserTask(data=write_jsonl(tmp_path / "d.jsonl", rows), prompt_field="q")
    with pytest.raises(ValueError, match=message):
        task.bind_verifier(UnitTests(field="tests"), task.examples)


def test_sampler_and_training_forward_see_the_chat_template_tokens(tmp_path):
    from bonft.generation import encode_responses, sample
    from bonft.trainer.models import build_tiny_model

    tok = chat_tokenizer()
    task = UserTask(data=write_jsonl(tmp_path / "d.jsonl", ROWS), prompt_field="question", chat_template=True,
                    system="you count jars", tokenizer=tok)
    model = build_tiny_model("gpt2", vocab_size=len(tok), layers=1, width=16, heads=2, max_positions=96, seed=0,
                             pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id)
    prompts = [ex.prompt for ex in task.examples]
    smp = sample(model, tok, prompts, n=2, max_new_tokens=2, seed=0)
    pids, pvalid, _, _ = encode_responses(tok, prompts, ["1"] * len(prompts))
    for b, row in enumerate(ROWS):
        messages = [{"role": "system", "content": "you count jars"}, {"role": "user", "content": row["question"]}]
        want = tok.apply_chat_template(messages, tokenize=True, add_generation_prompt=True)
        want = list(want["input_ids"]) if hasattr(want, "keys") else list(want)
        assert smp.prompt_tokens[b][smp.prompt_valid[b] == 1].tolist() == want  # what the sampler conditioned on
        assert pids[b][pvalid[b] == 1].tolist() == want  # what the training forward conditions on


def test_chat_template_without_the_start_token_the_tokenizer_adds_says_how_to_fix_it(tmp_path):
    # build_tokenizer adds <bos> to every text; a template that does not render {{ bos_token }} makes the rendered
    # text one token longer than apply_chat_template's tokens: the error names the start token and both fixes
    tok = build_tokenizer()
    tok.chat_template = TEMPLATE.replace("{{ bos_token }}", "")
    assert "bos_token" not in tok.chat_template
    path = write_jsonl(tmp_path / "d.jsonl", ROWS)
    with pytest.raises(ValueError, match=r"the tokenizer adds its start token '<bos>' to every text, but the chat template "
                                         r"does not render it.*begin the template with \{\{ bos_token \}\}, or make the "
                                         r"tokenizer not add it \(add_bos_token = false"):
        UserTask(data=path, prompt_field="question", chat_template=True, tokenizer=tok)
