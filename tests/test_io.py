"""bonft.io: the samples JSONL format, checked against the standard-library json module."""
import json
import os

import numpy as np
import pytest

from bonft.io import SampleTable, group_pools, read_samples, same_temperature, temperatures_of, write_samples
from bonft.tasks.examples import example_samples_path, ledger_rows


def write_lines(path, lines):
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


ROWS = [
    {"prompt_id": "a", "score": 0.5, "reward": 1, "temperature": 0.7, "n_tokens": 12, "response": "x = 1"},
    {"prompt_id": "b", "score": -1.25, "reward": 0.0, "temperature": 0.7, "n_tokens": 30},
    {"prompt_id": "a", "score": 2.0, "reward": False, "temperature": 1.0, "n_tokens": 7},
    {"prompt_id": 3, "score": 1, "reward": True, "temperature": 1.0, "n_tokens": 9},
]


def test_round_trip_matches_stdlib_json(tmp_path):
    p = tmp_path / "s.jsonl"
    assert write_samples(p, ROWS) == 4
    # the file is plain JSON Lines: the standard library reads back exactly what we wrote
    back = [json.loads(line) for line in p.read_text().splitlines()]
    assert back == ROWS
    t = read_samples(p)
    assert isinstance(t, SampleTable) and len(t) == 4
    assert list(t.prompt_keys) == ["a", "b", "a", "3"]
    np.testing.assert_array_equal(t.scores, [0.5, -1.25, 2.0, 1.0])
    np.testing.assert_array_equal(t.rewards, [1.0, 0.0, 0.0, 1.0])
    np.testing.assert_array_equal(t.temperatures, [0.7, 0.7, 1.0, 1.0])
    np.testing.assert_array_equal(t.n_tokens, [12, 30, 7, 9])
    assert t.scores.dtype == np.float64 and t.n_tokens.dtype == np.int64
    assert temperatures_of(t) == [0.7, 1.0]


def test_numpy_scalars_are_written_as_plain_numbers(tmp_path):
    p = tmp_path / "s.jsonl"
    write_samples(p, [{"prompt_id": np.int64(4), "score": np.float32(0.5), "reward": np.float64(1.0),
                       "n_tokens": np.int32(17), "passed": np.bool_(True)}])
    assert json.loads(p.read_text()) == {"prompt_id": 4, "score": 0.5, "reward": 1.0, "n_tokens": 17, "passed": True}
    with pytest.raises(ValueError, match=r"rows\[0\] cannot be written as JSON: Out of range float"):
        write_samples(p, [{"prompt_id": 1, "score": 0.5, "reward": 1, "extra": float("inf")}])
    with pytest.raises(TypeError, match=r"rows\[0\] cannot be written as JSON: set is not JSON serializable"):
        write_samples(p, [{"prompt_id": 1, "score": 0.5, "reward": 1, "extra": {1}}])
    assert json.loads(p.read_text())["n_tokens"] == 17  # failed writes left the file as it was


def test_optional_columns_absent_and_blank_lines(tmp_path):
    p = write_lines(tmp_path / "s.jsonl", ['{"prompt_id": "a", "score": 1, "reward": 0}', "", "  ",
                                           '{"prompt_id": "a", "score": 2, "reward": 1}'])
    t = read_samples(p)
    assert len(t) == 2 and t.temperatures is None and t.n_tokens is None
    assert temperatures_of(t) == []
    keys, s, r = group_pools(t)
    assert keys == ["a"] and list(s[0]) == [1.0, 2.0] and list(r[0]) == [0.0, 1.0]


def test_renamed_fields(tmp_path):
    p = write_lines(tmp_path / "s.jsonl", [
        json.dumps({"task": "q1", "rm": 0.2, "ok": 1, "temp": 0.5, "len": 4}),
        json.dumps({"task": "q1", "rm": 0.9, "ok": 0, "temp": 0.5, "len": 8}),
    ])
    t = read_samples(p, prompt_field="task", score_field="rm", reward_field="ok",
                     temperature_field="temp", tokens_field="len")
    assert list(t.prompt_keys) == ["q1", "q1"]
    np.testing.assert_array_equal(t.scores, [0.2, 0.9])
    np.testing.assert_array_equal(t.rewards, [1.0, 0.0])
    np.testing.assert_array_equal(t.temperatures, [0.5, 0.5])
    np.testing.assert_array_equal(t.n_tokens, [4, 8])
    with pytest.raises(ValueError, match=r"s.jsonl line 1: missing field 'score' \(fields there: len, ok, rm, task, temp\); "
                                         r"if the file calls it something else, pass score_field=NAME \(--score-field NAME"):
        read_samples(p, prompt_field="task")


@pytest.mark.parametrize(
    "bad,match",
    [
        ('{"prompt_id": "a", "score": 1, reward: 0}', r"bad.jsonl line 3: not valid JSON"),
        ('[1, 2]', r"bad.jsonl line 3: expected a JSON object \(a sample\), got list"),
        ('{"prompt_id": "a", "score": 1, "reward": 0}, {"prompt_id": "a", "score": 1, "reward": 0}',
         r"bad.jsonl line 3: not valid JSON"),
        ('{"prompt_id": "a", "score": "high", "reward": 0}', r"bad.jsonl line 3: field 'score' must be a number, got 'high'"),
        ('{"prompt_id": "a", "score": NaN, "reward": 0}', r"bad.jsonl line 3: field 'score' must be finite, got nan"),
        ('{"prompt_id": "a", "score": 1, "reward": Infinity}', r"bad.jsonl line 3: field 'reward' must be finite"),
        ('{"prompt_id": "a", "score": true, "reward": 0}', r"bad.jsonl line 3: field 'score' must be a number, got True"),
        ('{"prompt_id": 1.5, "score": 1, "reward": 0}', r"bad.jsonl line 3: field 'prompt_id' must be a string or an integer"),
        ('{"prompt_id": "a", "score": 1}', r"bad.jsonl line 3: missing field 'reward'.*reward_field=NAME"),
        ('{"prompt_id": "a", "score": 1, "reward": 0, "score": 3}',
         r"bad.jsonl line 3: key 'score' appears twice in one object"),
        ('{"prompt_id": "a", "score": 1, "reward": 0, "temperature": 1.0}',
         r"bad.jsonl line 1: missing field 'temperature'.*temperature_field=NAME"),
        ('{"prompt_id": "a", "score": 1, "reward": 0, "n_tokens": 2.5}', r"line 1: missing field 'n_tokens'"),
    ],
)
def test_malformed_line_reports_its_number(tmp_path, bad, match):
    good = '{"prompt_id": "a", "score": 1, "reward": 0}'
    p = write_lines(tmp_path / "bad.jsonl", [good, "", bad, good])  # the bad one is line 3 (line 2 blank)
    with pytest.raises(ValueError, match=match):
        read_samples(p)


def test_tokens_must_be_integers(tmp_path):
    p = write_lines(tmp_path / "t.jsonl", ['{"prompt_id": "a", "score": 1, "reward": 0, "n_tokens": 2.5}'])
    with pytest.raises(ValueError, match=r"t.jsonl line 1: field 'n_tokens' must be an integer, got 2.5"):
        read_samples(p)


def test_empty_and_missing_files(tmp_path):
    p = write_lines(tmp_path / "e.jsonl", [""])
    with pytest.raises(ValueError, match=r"e.jsonl: no samples"):
        read_samples(p)
    with pytest.raises(FileNotFoundError):
        read_samples(tmp_path / "nope.jsonl")
    with pytest.raises(TypeError, match=r"score_field must be a non-empty str, got 3"):
        read_samples(p, score_field=3)


def test_write_is_atomic_and_refuses_bad_rows(tmp_path):
    p = tmp_path / "s.jsonl"
    write_samples(p, ROWS)
    before = p.read_bytes()

    def rows():
        yield ROWS[0]
        yield {"prompt_id": "a", "score": float("nan"), "reward": 1}

    with pytest.raises(ValueError, match=r"rows\[1\]\['score'\] must be finite, got nan"):
        write_samples(p, rows())
    assert p.read_bytes() == before  # the good file survives a failed write
    assert os.listdir(tmp_path) == ["s.jsonl"]  # and no temporary file is left behind
    with pytest.raises(ValueError, match=r"rows\[0\] must have the field 'reward'"):
        write_samples(p, [{"prompt_id": "a", "score": 1.0}])
    with pytest.raises(TypeError, match=r"rows\[0\] must be a dict, got list"):
        write_samples(p, [[1, 2]])
    with pytest.raises(TypeError, match=r"rows\[0\]\['score'\] must be a number, got str"):
        write_samples(p, [{"prompt_id": "a", "score": "1", "reward": 0}])
    assert p.read_bytes() == before


def test_group_pools_by_prompt_and_temperature(tmp_path):
    p = tmp_path / "s.jsonl"
    write_samples(p, ROWS)
    t = read_samples(p)
    with pytest.raises(ValueError, match=r"temperature must pick one of the table's temperatures \[0.7, 1.0\]"):
        group_pools(t)
    keys, s, r = group_pools(t, temperature=1.0)
    assert keys == ["a", "3"]
    assert [list(x) for x in s] == [[2.0], [1.0]] and [list(x) for x in r] == [[0.0], [1.0]]
    keys, s, r = group_pools(t, temperature=0.7)
    assert keys == ["a", "b"]
    with pytest.raises(ValueError, match=r"temperature must be one of \[0.7, 1.0\], got 0.5"):
        group_pools(t, temperature=0.5)
    with pytest.raises(TypeError, match=r"table must be a SampleTable"):
        temperatures_of({"scores": []})


def test_group_pools_keeps_first_appearance_order_and_file_order():
    t = SampleTable(prompt_keys=np.array(["z", "y", "z", "x", "y", "z"]), scores=np.arange(6.0), rewards=-np.arange(6.0))
    keys, s, r = group_pools(t)
    assert keys == ["z", "y", "x"]
    assert [list(x) for x in s] == [[0.0, 2.0, 5.0], [1.0, 4.0], [3.0]]
    assert [list(x) for x in r] == [[-0.0, -2.0, -5.0], [-1.0, -4.0], [-3.0]]


def test_bundled_example_is_reproducible_and_well_formed():
    path = example_samples_path()
    lines = open(path, encoding="utf-8").read().splitlines()
    # regenerating from the committed script gives the committed file, line for line
    assert [json.loads(x) for x in lines] == ledger_rows()
    t = read_samples(path)
    assert len(t) == 6400 and temperatures_of(t) == [0.6, 1.0]
    keys, s, r = group_pools(t, temperature=0.6)
    assert len(keys) == 200 and {len(x) for x in s} == {16}
    assert set(np.unique(t.rewards)) <= {0.0, 1.0}
    assert os.path.getsize(path) < 700_000


def test_identical_samples_with_a_sample_index_are_not_repeated_rows(tmp_path):
    import warnings

    from bonft.io import DuplicateRowsWarning

    # four identical short answers of one prompt: distinct samples, told apart by their index in the pool
    rows = [json.dumps({"prompt_id": "a", "sample": i, "score": 0.5, "reward": 1, "response": "7"}) for i in range(4)]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert len(read_samples(write_lines(tmp_path / "indexed.jsonl", rows))) == 4
    # the same rows under another field name: sample_field names it
    renamed = [r.replace('"sample"', '"draw"') for r in rows]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert len(read_samples(write_lines(tmp_path / "draw.jsonl", renamed), sample_field="draw")) == 4
    # without an index they are exact repeats (3 of 4 rows)
    bare = [json.dumps({"prompt_id": "a", "score": 0.5, "reward": 1, "response": "7"})] * 4
    with pytest.warns(DuplicateRowsWarning, match=r"3 of 4 rows repeat an earlier row exactly \(line 2 repeats line 1\)"):
        read_samples(write_lines(tmp_path / "bare.jsonl", bare))
    # a file concatenated with itself repeats (prompt, temperature, sample) even when a score was rewritten
    twice = rows + [rows[0].replace('"score": 0.5', '"score": 0.25')]
    with pytest.warns(DuplicateRowsWarning, match=r"1 of 5 rows repeat the prompt, temperature and sample index of "
                                                   r"an earlier row \(line 5 repeats line 1\)"):
        read_samples(write_lines(tmp_path / "twice.jsonl", twice))
    # the same index at another temperature is another sample
    other_t = [r.replace('"reward"', '"temperature": %s, "reward"' % t) for t in ("0.7", "1.0") for r in rows]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert len(read_samples(write_lines(tmp_path / "temps.jsonl", other_t))) == 8
    with pytest.raises(ValueError, match=r"line 1: field 'sample' must be an integer or a string .* got 0.5"):
        read_samples(write_lines(tmp_path / "bad.jsonl", [rows[0].replace('"sample": 0', '"sample": 0.5')]))


@pytest.mark.parametrize("extra, line, err, match", [
    ({"n_tokens": -3}, '"n_tokens":-3', ValueError, r"rows\[1\]\['n_tokens'\] must be >= 0 .*got -3"),
    ({"n_tokens": 2.5}, '"n_tokens":2.5', TypeError, r"rows\[1\]\['n_tokens'\] must be an int, got float 2.5"),
    ({"n_tokens": 2**63}, f'"n_tokens":{2**63}', ValueError, r"rows\[1\]\['n_tokens'\] must be >= 0 and < 2\*\*63"),
    ({"n_tokens": True}, '"n_tokens":true', TypeError, r"rows\[1\]\['n_tokens'\] must be an int, got bool"),
    ({"answer": 1.5}, '"answer":1.5', TypeError, r"rows\[1\]\['answer'\] must be a str, an int or None, got float"),
    ({"answer": True}, '"answer":true', TypeError, r"rows\[1\]\['answer'\] must be a str, an int or None, got bool"),
    ({"sample": True}, '"sample":true', TypeError, r"rows\[1\]\['sample'\] must be an int or a str .*got bool"),
    ({"sample": 1.5}, '"sample":1.5', TypeError, r"rows\[1\]\['sample'\] must be an int or a str"),
    ({"temperature": -1}, '"temperature":-1', ValueError, r"rows\[1\]\['temperature'\] must be >= 0 .*got -1"),
    ({"temperature": True}, '"temperature":true', TypeError, r"rows\[1\]\['temperature'\] must be a number, got bool"),
    ({"score": 10**400}, f'"score":{10**400}', ValueError,
     r"rows\[1\]\['score'\] must be an integer of magnitude <= 2\*\*53 .*got 1000000"),
    ({"reward": -(10**400)}, f'"reward":{-(10**400)}', ValueError, r"rows\[1\]\['reward'\] must be an integer of magnitude"),
    # 2**53 + 1 is no float64: read as 2**53, it would tie with 2**53
    ({"score": 2**53 + 1}, f'"score":{2**53 + 1}', ValueError,
     r"rows\[1\]\['score'\] must be an integer of magnitude <= 2\*\*53 .*got 9007199254740993"),
    ({"reward": -(2**53) - 1}, f'"reward":{-(2**53) - 1}', ValueError, r"rows\[1\]\['reward'\] must be an integer of"),
])
def test_write_refuses_up_front_what_read_refuses(tmp_path, extra, line, err, match):
    good = {"prompt_id": "a", "score": 0.5, "reward": 1}
    # read_samples refuses the line the row would become ...
    base = {k: v for k, v in good.items() if k not in extra}  # a key given twice is refused on its own
    p = write_lines(tmp_path / "by_hand.jsonl", [json.dumps(base)[:-1] + "," + line + "}"])
    with pytest.raises(ValueError, match=r"by_hand.jsonl line 1: field '\w+' must"):
        read_samples(p)
    # ... so write_samples refuses the row before writing anything, naming row and field
    out = tmp_path / "out.jsonl"
    with pytest.raises(err, match=match):
        write_samples(out, [good, {**good, **extra}])
    assert sorted(os.listdir(tmp_path)) == ["by_hand.jsonl"]


def test_write_refuses_an_optional_field_on_some_rows_and_no_rows(tmp_path):
    good = {"prompt_id": "a", "score": 0.5, "reward": 1}
    p = write_lines(tmp_path / "by_hand.jsonl", [json.dumps({**good, "temperature": 1}), json.dumps(good)])
    with pytest.raises(ValueError, match=r"line 2: missing field 'temperature'"):
        read_samples(p)
    with pytest.raises(ValueError, match=r"rows\[1\] must have the field 'temperature' as rows\[0\] has"):
        write_samples(tmp_path / "out.jsonl", [{**good, "temperature": 1}, good])
    with pytest.raises(ValueError, match=r"rows\[1\] has the field 'n_tokens', which rows\[0\] lacks"):
        write_samples(tmp_path / "out.jsonl", [good, {**good, "n_tokens": 3}])
    with pytest.raises(ValueError, match=r"rows\[2\] must have the field 'sample' as rows\[0\] has"):  # a generator
        write_samples(tmp_path / "out.jsonl", ({**good, "sample": i} if i < 2 else good for i in range(3)))
    with pytest.raises(ValueError, match=r"rows must hold at least one sample, got none"):
        write_samples(tmp_path / "out.jsonl", iter([]))
    with pytest.raises(ValueError, match=r"rows must hold at least one sample, got none"):
        write_samples(tmp_path / "out.jsonl", [])
    with pytest.raises(TypeError, match=r"rows must be an iterable of dicts, got dict \(wrap a single row in a list\)"):
        write_samples(tmp_path / "out.jsonl", good)
    assert sorted(os.listdir(tmp_path)) == ["by_hand.jsonl"]


def test_read_refuses_a_negative_temperature(tmp_path):
    p = write_lines(tmp_path / "t.jsonl", ['{"prompt_id": "a", "score": 1, "reward": 0, "temperature": 0}',
                                           '{"prompt_id": "a", "score": 1, "reward": 0, "temperature": -0.5}'])
    with pytest.raises(ValueError, match=r"t.jsonl line 2: field 'temperature' must be >= 0 .*got -0.5"):
        read_samples(p, duplicates="allow")


def test_write_keeps_the_mode_and_writes_through_a_link(tmp_path):
    row = [{"prompt_id": "a", "score": 0.5, "reward": 1}]
    old = os.umask(0o027)
    try:
        fresh = tmp_path / "new.jsonl"
        write_samples(fresh, row)
        assert fresh.stat().st_mode & 0o777 == 0o640  # 0o666 less the umask, as open() gives
    finally:
        os.umask(old)
    kept = tmp_path / "kept.jsonl"
    kept.write_text("")
    kept.chmod(0o644)
    write_samples(kept, row)
    assert kept.stat().st_mode & 0o777 == 0o644 and json.loads(kept.read_text()) == row[0]
    real = tmp_path / "data" / "real.jsonl"
    real.parent.mkdir()
    real.write_text("old\n")
    link = tmp_path / "link.jsonl"
    link.symlink_to(real)
    write_samples(link, row)
    assert link.is_symlink() and os.readlink(link) == str(real)
    assert json.loads(real.read_text()) == row[0]
    assert sorted(os.listdir(real.parent)) == ["real.jsonl"]  # the temporary file lived beside the target


def test_write_names_a_directory_or_a_missing_folder(tmp_path):
    row = [{"prompt_id": "a", "score": 0.5, "reward": 1}]
    with pytest.raises(ValueError, match=r"path must be a file path, got a directory"):
        write_samples(tmp_path, row)
    with pytest.raises(FileNotFoundError, match=r"path's folder does not exist: .*nope"):
        write_samples(tmp_path / "nope" / "s.jsonl", row)


def test_a_required_temperature_field_must_exist(tmp_path):
    # a file at T = 0.7 and 1.0 read through a misnamed field would pool both temperatures into one pool
    p = tmp_path / "two.jsonl"
    p.write_text("".join(json.dumps({"prompt_id": q, "score": i, "reward": i % 2, "temperature": t}) + "\n"
                         for t in (0.7, 1.0) for q in range(2) for i in range(3)))
    assert read_samples(p, temperature_field="nosuch").temperatures is None  # optional: absent from every line
    with pytest.raises(ValueError, match=r"two.jsonl line 1: missing field 'nosuch' \(fields there: prompt_id, reward, "
                                         r"score, temperature\); .*temperature_field=NAME"):
        read_samples(p, temperature_field="nosuch", temperature_required=True)
    assert temperatures_of(read_samples(p, temperature_required=True)) == [0.7, 1.0]
    with pytest.raises(TypeError, match=r"temperature_required must be a bool, got str 'yes'"):
        read_samples(p, temperature_required="yes")


def test_rows_with_a_failed_verdict_are_named_when_read(tmp_path):
    # bonft's own samples files mark a sample a verifier failed on (field 'failed'): its 0 judged nothing
    import warnings

    from bonft.io import FailedVerdictsWarning

    rows = [{"prompt_id": 0, "score": 0.0, "reward": 0.0, "sample": 0, "failed": ["proxy"]},
            {"prompt_id": 0, "score": 0.5, "reward": 1.0, "sample": 1},
            {"prompt_id": 0, "score": 0.0, "reward": 0.0, "sample": 2, "failed": ["exact", "proxy"]}]
    path = tmp_path / "s.jsonl"
    write_samples(path, rows)
    with pytest.warns(FailedVerdictsWarning, match=r"s.jsonl: 2 of 3 rows mark a verdict their verifier failed to give "
                                                   r"\(field 'failed': exact, proxy; first on line 1\)"):
        table = read_samples(path)
    assert table.rewards.tolist() == [0.0, 1.0, 0.0]  # read as they are
    write_samples(path, rows[1:2])
    with warnings.catch_warnings():
        warnings.simplefilter("error", FailedVerdictsWarning)
        read_samples(path)


def test_integers_beyond_2_53_are_refused_naming_the_line(tmp_path):
    # 9007199254740993 = 2**53 + 1 has no float64: it reads as 9007199254740992, ties with it, and best-of-2 of this
    # pool came out 0.5 (the higher score holds reward 1: 1.0 by the definition); the Python API refuses such scores
    rows = ['{"prompt_id": 0, "score": 9007199254740992, "reward": 0}',
            '{"prompt_id": 0, "score": 9007199254740993, "reward": 1}']
    with pytest.raises(ValueError, match=r"big.jsonl line 2: field 'score' must be an integer of magnitude <= 2\*\*53 "
                                         r".*got 9007199254740993"):
        read_samples(write_lines(tmp_path / "big.jsonl", rows))
    with pytest.raises(ValueError, match=r"line 1: field 'reward' must be an integer of magnitude <= 2\*\*53"):
        read_samples(write_lines(tmp_path / "r.jsonl", ['{"prompt_id": 0, "score": 1, "reward": -9007199254740993}']))
    # 2**53 itself is exact, and a float beyond it is a float (its rounding is the writer's choice)
    ok = ['{"prompt_id": 0, "score": 9007199254740992, "reward": 0}', '{"prompt_id": 0, "score": 1e20, "reward": 1}']
    np.testing.assert_array_equal(read_samples(write_lines(tmp_path / "ok.jsonl", ok)).scores, [2.0**53, 1e20])


def test_a_temperature_stored_as_float32_is_the_temperature_typed(tmp_path):
    # 0.699999988079071 is float32(0.7): the same temperature under the one rule (equal as float32); messages print
    # each temperature as it can be typed
    t32 = float(np.float32(0.7))
    rows = [{"prompt_id": p, "score": float(p), "reward": 1, "temperature": t} for t in (t32, 1.0) for p in range(3)]
    p = tmp_path / "f32.jsonl"
    write_samples(p, rows)
    t = read_samples(p)
    assert temperatures_of(t) == [t32, 1.0]
    keys, s, _ = group_pools(t, temperature=0.7)
    assert keys == ["0", "1", "2"] and len(s) == 3
    with pytest.raises(ValueError, match=r"temperature must be one of \[0.7, 1.0\], got 0.8"):
        group_pools(t, temperature=0.8)
    with pytest.raises(ValueError, match=r"temperatures \[0.7, 1.0\] \(pools would mix them\)"):
        group_pools(t)
    assert same_temperature(0.7, t32) and not same_temperature(0.7, 0.7001)


def test_a_utf8_byte_order_mark_is_read_past(tmp_path):
    # editors on Windows start a UTF-8 file with EF BB BF; it was refused as "not valid JSON (Unexpected UTF-8 BOM
    # (decode using utf-8-sig) ...)", Python's wording
    p = tmp_path / "bom.jsonl"
    p.write_bytes(b"\xef\xbb\xbf" + b'{"prompt_id": "a", "score": 0.5, "reward": 1}\n{"prompt_id": "a", "score": 1, "reward": 0}\n')
    t = read_samples(p)
    assert list(t.prompt_keys) == ["a", "a"] and list(t.scores) == [0.5, 1.0]
    # only at the start: inside the file it is a character of a line, refused naming that line
    p.write_bytes(b'{"prompt_id": "a", "score": 0.5, "reward": 1}\n\xef\xbb\xbf{"prompt_id": "a", "score": 1, "reward": 0}\n')
    with pytest.raises(ValueError, match=r"bom.jsonl line 2"):
        read_samples(p)
