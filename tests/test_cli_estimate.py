"""`bonft estimate` end to end on the bundled example and on small files."""
import json
import math
import re
from collections import defaultdict

import pytest

from bonft.cli import main
from bonft.tasks.examples import example_samples_path


def chen_pass_at_k(n, c, k):
    # Chen et al. 2021, eq. (1), exact integers
    return 1 - math.comb(n - c, k) / math.comb(n, k)


def test_example_prints_table_and_writes_json_and_png(tmp_path, capsys):
    out_json, out_png = tmp_path / "curves.json", tmp_path / "plots" / "estimate_curves.png"
    rc = main(["estimate", "--example", "--n-boot", "300", "--json", str(out_json), "--plot-dir", str(tmp_path / "plots")])
    text = capsys.readouterr().out
    assert rc == 0
    assert "temperature 0.6" in text and "temperature 1" in text
    assert text.count("prompts: 200   smallest pool: 16") == 2
    assert "best-of-k" in text and "pass@k" in text and "95% CI" in text
    assert open(out_png, "rb").read(8) == b"\x89PNG\r\n\x1a\n"

    doc = json.loads(out_json.read_text())
    assert [b["temperature"] for b in doc["blocks"]] == [0.6, 1.0]
    # the oracle curve must equal Chen et al. pass@k averaged over prompts, recomputed here from the raw file
    correct = defaultdict(lambda: [0, 0])
    with open(example_samples_path(), encoding="utf-8") as f:
        for line in f:
            row = json.loads(line)
            cell = correct[(row["temperature"], row["prompt_id"])]
            cell[0] += 1
            cell[1] += row["reward"]
    for block in doc["blocks"]:
        assert block["ks"] == [1, 2, 4, 8, 16]
        cells = [v for (t, _), v in correct.items() if t == block["temperature"]]
        for j, k in enumerate(block["ks"]):
            want = sum(chen_pass_at_k(n, c, k) for n, c in cells) / len(cells)
            assert block["pass_at_k_mean"][j] == pytest.approx(want, rel=1e-10)
            assert block["pass_at_k_lo"][j] <= want <= block["pass_at_k_hi"][j]
            assert f"{want:.4f}" in text
        # k = 1: the verifier plays no part, both curves are the mean reward
        assert block["best_of_k_mean"][0] == pytest.approx(block["pass_at_k_mean"][0], abs=1e-12)


def test_single_temperature_file_with_renamed_fields_and_k(tmp_path, capsys):
    p = tmp_path / "mine.jsonl"
    rows = []
    for q in range(6):
        for i in range(5):
            rows.append({"q": f"q{q}", "rm": (i * 7 + q) % 5 / 4, "ok": int(i % 2 == 0)})
    p.write_text("".join(json.dumps(r) + "\n" for r in rows))
    rc = main(["estimate", str(p), "--prompt-field", "q", "--score-field", "rm", "--reward-field", "ok",
               "--ks", "1,5", "--n-boot", "50", "--confidence", "0.8", "--json", str(tmp_path / "o.json")])
    text = capsys.readouterr().out
    assert rc == 0 and "\ntemperature " not in text  # no temperature column: one block, no header
    assert "80% CI" in text and "prompts: 6   smallest pool: 5" in text
    block = json.loads((tmp_path / "o.json").read_text())["blocks"][0]
    assert block["ks"] == [1, 5] and block["temperature"] is None
    # 3 of 5 correct per prompt: pass@1 = 0.6 and pass@5 = 1 (Chen et al. 2021 eq. (1))
    assert block["pass_at_k_mean"] == pytest.approx([chen_pass_at_k(5, 3, 1), chen_pass_at_k(5, 3, 5)])


@pytest.mark.parametrize(
    "argv,match",
    [
        (["estimate", "--example", "--ks", "1,64"], r"--ks must be <= the smallest pool \(n=16\), got 64"),
        (["estimate", "--example", "--ks", "1,two"], r"--ks must be comma-separated integers like 1,2,4, got '1,two'"),
        (["estimate", "--example", "--ks", "0,2"], r"--ks must be >= 1, got 0"),
        (["estimate", "--example", "--confidence", "1.5"], r"confidence must be in \(0, 1\), got confidence=1.5"),
        (["estimate", "--example", "--n-boot", "0"], r"--n-boot must be between 10 and 1,000,000 bootstrap replicates, got 0"),
        # one replicate printed a "95% CI" (its two percentiles are that replicate): no interval worth the name
        (["estimate", "--example", "--n-boot", "1"], r"--n-boot must be between 10 and 1,000,000 bootstrap replicates, got 1"),
        (["estimate", "--example", "x.jsonl"], r"give either POOLS or --example, got both"),
        (["estimate"], r"POOLS must be a pool file \(JSONL of scored samples\) \(or pass --example\)"),
        (["estimate", "nope.jsonl"], r"POOLS file not found: nope.jsonl"),
        (["estimate", "--example", "--score-field", "rm"], r"missing field 'rm'.*--score-field NAME"),
        # a temperature field named on purpose must exist: the example holds T = 0.6 and 1.0, which would be pooled
        (["estimate", "--example", "--temperature-field", "nosuch"],
         r"example_samples.jsonl line 1: missing field 'nosuch'.*--temperature-field NAME"),
        (["estimate", "--example", "--ks", "2,1,2"], r"--ks must not repeat a k .*got '2,1,2' \(k=2 more than once\)"),
        # options that cannot take effect, and list items that are empty
        (["estimate", "--example", "--ks", "1,,2"], r"--ks must be comma-separated values with none empty, got '1,,2'"),
        (["estimate", "--example", "--ks", "1,2,"], r"--ks must be comma-separated values with none empty"),
        (["estimate", "--example", "--strategy", ""], r"--strategy must list at least one value, got ''"),
        (["estimate", "--example", "--strategy", "best_of_k,,pass_at_k"], r"--strategy must be comma-separated values "
                                                                         r"with none empty"),
        (["estimate", "--example", "--max-subsets", "10"], r"--max-subsets applies to --strategy with weighted_vote .*"
                                                           r"got --max-subsets 10 without --strategy"),
        (["estimate", "--example", "--strategy", "majority_vote,best_of_k", "--max-subsets", "10"],
         r"got --max-subsets 10 with --strategy majority_vote,best_of_k"),
        (["estimate", "--example", "--answer-field", "final"], r"--answer-field applies to --strategy with "
                                                               r"majority_vote or weighted_vote .*got --answer-field "
                                                               r"'final' without --strategy"),
        (["estimate", "--example", "--strategy", "best_of_k,pass_at_k", "--answer-field", "final"],
         r"got --answer-field 'final' with --strategy best_of_k,pass_at_k"),
    ],
)
def test_errors_exit_2_with_a_message(argv, match, capsys):
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.startswith("bonft estimate: error: ")
    assert re.search(match, err), err


def test_a_run_directory_is_read_through_its_heldout_samples(tmp_path, capsys):
    run = tmp_path / "mine"
    run.mkdir()
    rows = [{"prompt_id": q, "sample": i, "score": float(i), "reward": int(i < 2), "temperature": 1.0}
            for q in range(3) for i in range(4)]
    (run / "heldout_samples.jsonl").write_text("".join(json.dumps(r) + "\n" for r in rows))
    assert main(["estimate", str(run), "--n-boot", "50"]) == 0
    out = capsys.readouterr().out
    assert f"samples: {run / 'heldout_samples.jsonl'} (12 rows)" in out
    # 2 of 4 correct per prompt: pass@2 = 1 - C(2,2)/C(4,2) = 5/6 (Chen et al. 2021 eq. (1))
    assert f"{chen_pass_at_k(4, 2, 2):.4f}" in out
    (tmp_path / "empty").mkdir()
    assert main(["estimate", str(tmp_path / "empty")]) == 2
    assert "is a directory without heldout_samples.jsonl" in capsys.readouterr().err


def test_the_default_temperature_field_stays_optional(tmp_path, capsys):
    p = tmp_path / "t.jsonl"
    p.write_text("".join(json.dumps({"prompt_id": q, "score": i, "reward": i % 2}) + "\n"
                         for q in range(3) for i in range(4)))
    assert main(["estimate", str(p), "--n-boot", "50"]) == 0  # no temperature column: one block
    assert main(["estimate", str(p), "--n-boot", "50", "--temperature-field", "temperature"]) == 2
    assert "missing field 'temperature'" in capsys.readouterr().err


def test_ks_above_one_short_pool_names_that_prompt(tmp_path, capsys):
    # every prompt holds 12 samples but 'q7', which holds 1: k <= 1 for all of them, and the error says which prompt
    rows = [{"prompt_id": f"q{p}", "sample": i, "score": i / 12, "reward": 1} for p in range(10) for i in range(12 if p != 7 else 1)]
    path = tmp_path / "short.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows))
    assert main(["estimate", str(path), "--ks", "8"]) == 2
    err = capsys.readouterr().err
    assert re.search(r"--ks must be <= the smallest pool \(n=1: prompt 'q7'; the largest holds 12\), got 8", err), err


def test_ks_above_a_short_pool_at_a_later_temperature_stops_before_any_table(tmp_path, capsys):
    # the first temperature's table was printed, then the second temperature's short pool stopped the command
    rows = [{"prompt_id": f"q{p}", "sample": i, "score": i / 12, "reward": i % 2, "temperature": t}
            for t in (0.7, 1.0) for p in range(10) for i in range(12 if (t, p) != (1.0, 3) else 4)]
    path = tmp_path / "two.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows))
    assert main(["estimate", str(path), "--ks", "8", "--n-boot", "50"]) == 2
    out, err = capsys.readouterr()
    assert "--ks must be <= the smallest pool (n=4: prompt 'q3' at temperature 1" in err, err
    assert "temperature 0.7" not in out and "pass@k" not in out, out


def test_a_column_of_ones_keeps_its_exact_interval(tmp_path, capsys):
    # 10 prompts x 12 samples, every reward 1, scores j/12, --ks 7: estimate crashed ("values must lie within bounds
    # [0, 1], got 1.0000000000000007"). Every value is 1: Clopper & Pearson 1934, 10 of 10 at 95%: [0.025^(1/10), 1]
    rows = [{"prompt_id": p, "sample": j, "score": j / 12, "reward": 1} for p in range(10) for j in range(12)]
    path = tmp_path / "ones.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in rows))
    assert main(["estimate", str(path), "--ks", "1,2,7"]) == 0
    out = capsys.readouterr().out
    lo = f"{0.025 ** (1 / 10):.4f}"
    assert out.count(f"1.0000  [{lo}, 1.0000]") == 6 and "no spread" not in out
