"""`bonft compare` on planted samples files: the means and paired differences against hand computation.

References: pass@k per prompt is Chen et al. 2021, eq. (1), computed here with exact integers; best-of-n with
k = n is the reward of the top-scored sample, ties averaged (Chow et al. 2024, the definition); the paired
difference is the mean of the per-prompt differences (common practice; the interval is a percentile bootstrap,
checked against scipy in tests/test_train_demo.py).
"""
import json
import math
import re

import numpy as np
import pytest

from bonft.cli import main

P, N = 12, 4


def chen_pass_at_k(n, c, k):
    return 1 - math.comb(n - c, k) / math.comb(n, k)


def write(path, rewards, scores, *, texts=None, ids=None):
    """A samples file as bonft writes it: prompt-major rows with sample indices and prompt texts."""
    with open(path, "w", encoding="utf-8") as f:
        for p, (rr, ss) in enumerate(zip(rewards, scores)):
            for i, (r, s) in enumerate(zip(rr, ss)):
                row = {"prompt_id": p if ids is None else ids[p], "sample": i, "score": s, "reward": r, "temperature": 1.0,
                       "score_alt": -s}
                if texts is not False:
                    row["prompt"] = (texts or [f"jars {q}" for q in range(len(rewards))])[p]
                f.write(json.dumps(row) + "\n")


@pytest.fixture
def planted(tmp_path):
    rng = np.random.default_rng(3)
    base_r = (rng.random((P, N)) < 0.3).astype(int)
    tuned_r = (rng.random((P, N)) < 0.6).astype(int)
    base_s, tuned_s = rng.integers(0, 3, (P, N)), rng.integers(0, 3, (P, N))  # ties in the scores
    (tmp_path / "base").mkdir()  # a run directory: its heldout_samples.jsonl
    write(tmp_path / "base" / "heldout_samples.jsonl", base_r.tolist(), base_s.tolist())
    write(tmp_path / "tuned.jsonl", tuned_r.tolist(), tuned_s.tolist())
    return tmp_path, (base_r, base_s), (tuned_r, tuned_s)


def best_of_n(r, s):
    top = s == s.max()
    return r[top].mean()  # the top-scored sample's reward, ties averaged


def test_means_and_paired_differences_match_hand_computation(planted, capsys):
    tmp, (br, bs), (tr, ts) = planted
    out = tmp / "c.json"
    assert main(["compare", str(tmp / "base"), str(tmp / "tuned.jsonl"), "--ks", "1,2,4", "--json", str(out),
                 "--plot-dir", str(tmp / "plots")]) == 0
    text = capsys.readouterr().out
    assert "| policy | pass@1 | pass@2 | pass@4 | score best-of-4 |" in text and "Paired difference from base" in text
    doc = json.loads(out.read_text())
    assert doc["baseline"] == "base" and doc["n_prompts"] == [P] and doc["intervals_valid"] is True
    assert doc["columns"] == ["pass@1", "pass@2", "pass@4", "score best-of-4"]
    hand = {}
    for name, (r, s) in (("base", (br, bs)), ("tuned", (tr, ts))):
        hand[name] = [np.mean([chen_pass_at_k(N, int(row.sum()), k) for row in r]) for k in (1, 2, 4)]
        hand[name].append(np.mean([best_of_n(r[p], s[p]) for p in range(P)]))
        for (m, lo, hi), want in zip(doc["means"][name], hand[name]):
            assert m == pytest.approx(want, abs=1e-12) and lo <= m <= hi
    for (d, lo, hi), a, b in zip(doc["differences"]["base"]["tuned"], hand["tuned"], hand["base"]):
        assert d == pytest.approx(a - b, abs=1e-12) and lo <= d <= hi
    assert (tmp / "plots" / "compare_curves.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # another verifier's pick (a field of its own), a chosen baseline and names
    assert main(["compare", str(tmp / "base"), str(tmp / "tuned.jsonl"), "--ks", "4", "--score-field", "score_alt",
                 "--names", "a,b", "--baseline", "b", "--json", str(out)]) == 0
    doc = json.loads(out.read_text())
    low = [np.mean([tr[p][ts[p] == ts[p].min()].mean() for p in range(P)])]  # score_alt = -score: the lowest score picks
    assert doc["means"]["b"][1][0] == pytest.approx(low[0], abs=1e-12) and list(doc["differences"]) == ["b"]


def test_too_few_prompts_give_means_without_intervals(tmp_path, capsys):
    write(tmp_path / "a.jsonl", [[1, 0], [0, 0]], [[1, 2], [0, 1]])
    write(tmp_path / "b.jsonl", [[1, 1], [0, 1]], [[1, 2], [0, 1]])
    assert main(["compare", str(tmp_path / "a.jsonl"), str(tmp_path / "b.jsonl"), "--json", str(tmp_path / "c.json")]) == 0
    assert "intervals n/a: 2 prompt(s); a bootstrap over prompts needs at least 10" in capsys.readouterr().out
    doc = json.loads((tmp_path / "c.json").read_text())
    assert doc["intervals_valid"] is False and doc["differences"]["a"]["b"][0] == [0.5, None, None]  # pass@1 0.5 vs 0.25


def test_policies_that_solve_nothing_get_an_exact_interval_not_a_zero_width_one(tmp_path, capsys):
    # every reward 0 on 20 prompts: each mean gets [0, 1 - 0.025^(1/20)] = [0, 0.168] (Clopper & Pearson 1934, 0 of
    # 20, two-sided 95%); the paired difference is 0 on every prompt, which no bootstrap can put an interval on
    zeros = [[0] * N for _ in range(20)]
    write(tmp_path / "a.jsonl", zeros, [[float(i) for i in range(N)]] * 20)
    write(tmp_path / "b.jsonl", zeros, [[float(i) for i in range(N)]] * 20)
    assert main(["compare", str(tmp_path / "a.jsonl"), str(tmp_path / "b.jsonl"), "--ks", "1,4", "--n-boot", "200",
                 "--json", str(tmp_path / "c.json")]) == 0
    out = capsys.readouterr().out
    assert "0.000 [0.000, 0.168]" in out and "[0.000, 0.000]" not in out and "[+0.000, +0.000]" not in out
    assert "no interval for b - a pass@1, b - a pass@4, b - a best-of-4" in out
    doc = json.loads((tmp_path / "c.json").read_text())
    assert doc["means"]["a"][0][2] == pytest.approx(1 - 0.025 ** (1 / 20), rel=1e-12)
    assert doc["differences"]["a"]["b"][0] == [0.0, None, None] and "b - a pass@1" in doc["no_interval"]


@pytest.mark.parametrize("case, message", [
    ("other prompts", r"b and a must hold the same prompts to be compared paired: 1 prompt\(s\) only in a \(e.g. \['11'\]\), "
                      r"1 only in b \(e.g. \['99'\]\)"),
    ("other texts", r"b and a give prompt 0 different texts \('seed 7 prompt' vs 'jars 0'; 1 of 12 prompts differ\): they "
                    r"were evaluated on different prompts"),
    ("one input", r"RUN_OR_FILE must name at least 2 inputs to compare, got 1"),
    ("same names", r"the inputs' names must differ, got \['a', 'a'\]; pass --names A,B,..."),
    ("bad baseline", r"--baseline must be one of the inputs' names \['a', 'b'\], got 'c'"),
    ("bad names", r"--names must give one non-empty name per input \(2\), got 'x'"),
    ("big k", r"--ks must be <= the smallest pool \(n=4\), got 8"),
    ("short pool", r"--ks must be <= the smallest pool \(n=3: prompt '5' in b; the largest holds 4\), got 4: one short "
                   r"pool caps k for every prompt"),
    ("repeated k", r"--ks must not repeat a k .*got '2,1,2' \(k=2 more than once\)"),
    ("no samples", r"RUN_OR_FILE '.*empty' is a directory without heldout_samples.jsonl .*bonft sample"),
])
def test_what_cannot_be_paired_is_refused_naming_why(tmp_path, capsys, case, message):
    r, s = np.ones((P, N), int).tolist(), np.zeros((P, N), int).tolist()
    write(tmp_path / "a.jsonl", r, s)
    b, extra = tmp_path / "b.jsonl", []
    ids = list(range(P - 1)) + [99] if case == "other prompts" else None
    texts = ["seed 7 prompt"] + [f"jars {q}" for q in range(1, P)] if case == "other texts" else None
    if case == "short pool":  # prompt 5 of b has 3 samples where every other pool has 4
        r_b, s_b = [row[:-1] if q == 5 else row for q, row in enumerate(r)], [row[:-1] if q == 5 else row for q, row in enumerate(s)]
        write(b, r_b, s_b, ids=ids, texts=texts)
    else:
        write(b, r, s, ids=ids, texts=texts)
    args = {"one input": [str(tmp_path / "a.jsonl")], "same names": [str(tmp_path / "a.jsonl")] * 2}.get(case, [str(tmp_path / "a.jsonl"), str(b)])
    extra = {"bad baseline": ["--baseline", "c"], "bad names": ["--names", "x"], "big k": ["--ks", "1,8"], "short pool": ["--ks", "1,4"],
             "repeated k": ["--ks", "2,1,2"]}.get(case, [])
    if case == "no samples":
        (tmp_path / "empty").mkdir()
        args = [str(tmp_path / "empty"), str(b)]
    assert main(["compare", *args, *extra]) == 2
    err = capsys.readouterr().err
    assert err.startswith("bonft compare: error: ")
    assert re.search(message, err), err


def test_files_without_prompt_texts_pair_by_id_and_say_so(tmp_path, capsys):
    r, s = np.ones((P, N), int).tolist(), np.zeros((P, N), int).tolist()
    write(tmp_path / "a.jsonl", r, s, texts=False)
    write(tmp_path / "b.jsonl", r, s)
    assert main(["compare", str(tmp_path / "a.jsonl"), str(tmp_path / "b.jsonl")]) == 0
    assert "paired by prompt id alone: a carries no prompt texts" in capsys.readouterr().out


def test_one_run_per_training_seed_gives_a_student_t_interval_over_seeds(tmp_path, capsys):
    """Three seeds, each its own prompts: per-seed pass@1 differences 0.1, 0.2, 0.3 -> mean 0.2, sd 0.1, and
    t_{0.975, 2} = 4.303 (a t table, Student 1908) gives 0.2 +- 4.303 * 0.1 / sqrt(3)."""
    runs = {"base": [], "tuned": []}
    for s, extra in enumerate((4, 8, 12)):  # tuned: 10 + extra correct samples of 40 -> pass@1 0.25 + extra / 40
        texts = [f"seed {s} prompt {q}" for q in range(10)]
        base = [[1, 0, 0, 0]] * 10  # 10 of 40: pass@1 0.25
        tuned = [[1] * min(4, 1 + extra // 10 + (q < extra % 10)) + [0] * (4 - min(4, 1 + extra // 10 + (q < extra % 10)))
                 for q in range(10)]
        assert sum(map(sum, tuned)) == 10 + extra
        for name, rows in (("base", base), ("tuned", tuned)):
            path = tmp_path / f"{name}-{s}.jsonl"
            write(path, rows, [[0, 0, 0, 0]] * 10, texts=texts)
            runs[name].append(str(path))
    out = tmp_path / "c.json"
    assert main(["compare", ",".join(runs["base"]), ",".join(runs["tuned"]), "--ks", "1,4", "--names", "base,tuned",
                 "--json", str(out), "--plot-dir", str(tmp_path / "plots")]) == 0
    text = capsys.readouterr().out
    assert "Mean over 3 seeds (seeds 1, 2, 3) [95% Student-t interval over seeds]" in text
    assert "Paired difference from base, per seed then over seeds" in text and "| tuned | 0.350 / " in text
    doc = json.loads(out.read_text())
    assert doc["training_seeds"] == 3 and doc["n_prompts"] == [10, 10, 10] and doc["interval"] == "Student-t over training seeds"
    d, lo, hi = doc["differences"]["base"]["tuned"][0]
    half = 4.303 * 0.1 / math.sqrt(3)
    assert d == pytest.approx(0.2, abs=1e-12) and lo == pytest.approx(0.2 - half, abs=1e-3) and hi == pytest.approx(0.2 + half, abs=1e-3)
    assert [row[0] for row in doc["per_seed"]["tuned"]] == pytest.approx([0.35, 0.45, 0.55], abs=1e-12)
    assert (tmp_path / "plots" / "compare_curves.png").is_file()
    # every input lists one run per seed; a seed whose runs hold other prompts is named
    assert main(["compare", ",".join(runs["base"]), ",".join(runs["tuned"][:2])]) == 2
    assert "every input must list the same number of runs (one per training seed), got [3, 2]" in capsys.readouterr().err
    assert main(["compare", ",".join(runs["base"]), ",".join(runs["tuned"][::-1]), "--names", "a,b"]) == 2
    assert "training seed 1 (1 of 3): b and a give prompt 0 different texts ('seed 2 prompt 0' vs 'seed 0 prompt 0'" in capsys.readouterr().err


def test_run_directories_are_labelled_by_their_recorded_training_seeds(tmp_path, capsys):
    """Runs trained with seeds 7 and 9 (their config.toml) are labelled 7 and 9, not by position; runs whose
    s-th members record different seeds keep the positions. With 2 seeds, t_{0.975, 1} = 12.706 (a t table)."""
    runs = {"base": [], "tuned": []}
    for seed, extra in ((7, 4), (9, 8)):
        texts = [f"seed {seed} prompt {q}" for q in range(10)]
        for name, rows in (("base", [[1, 0, 0, 0]] * 10),
                           ("tuned", [[1, 1, 0, 0]] * (extra // 2) + [[1, 0, 0, 0]] * (10 - extra // 2))):
            run = tmp_path / f"{name}-s{seed}"
            run.mkdir()
            write(run / "heldout_samples.jsonl", rows, [[0, 0, 0, 0]] * 10, texts=texts)
            (run / "config.toml").write_text(f'name = "{name}"\nseed = {seed}\n')
            runs[name].append(str(run))
    out = tmp_path / "c.json"
    assert main(["compare", ",".join(runs["base"]), ",".join(runs["tuned"]), "--ks", "1", "--names", "base,tuned",
                 "--json", str(out)]) == 0
    text = capsys.readouterr().out
    assert "training seeds 7, 9 (each run's config.toml): the runs of one seed paired; 10, 10 prompts" in text
    assert "Mean over 2 seeds (seeds 7, 9)" in text and "12.7 standard errors" in text
    doc = json.loads(out.read_text())
    assert doc["seed_labels"] == [7, 9]
    # per-seed pass@1 differences 2/40 and 4/40: mean 0.075, sample sd 0.025 * sqrt(2), standard error 0.025
    d, lo, hi = doc["differences"]["base"]["tuned"][0]
    assert d == pytest.approx(0.075, abs=1e-12)
    assert hi - d == pytest.approx(12.706 * 0.025, abs=1e-3) and d - lo == pytest.approx(12.706 * 0.025, abs=1e-3)
    # the s-th runs record different seeds (7 beside 9): labelled by position
    assert main(["compare", ",".join(runs["base"]), ",".join(runs["tuned"][::-1]), "--names", "a,b"]) == 2
    assert "training seed 1 (1 of 2): b and a give prompt 0 different texts" in capsys.readouterr().err


def test_inputs_sampled_at_different_temperatures_are_named(tmp_path, capsys):
    r, s = np.ones((P, N), int).tolist(), np.zeros((P, N), int).tolist()
    write(tmp_path / "a.jsonl", r, s)
    write(tmp_path / "b.jsonl", r, s)
    text = (tmp_path / "b.jsonl").read_text().replace('"temperature": 1.0', '"temperature": 0.7')
    (tmp_path / "b.jsonl").write_text(text)
    assert main(["compare", str(tmp_path / "a.jsonl"), str(tmp_path / "b.jsonl")]) == 0
    out = capsys.readouterr().out
    assert "a: " in out and "(temperature 1)" in out and "(temperature 0.7)" in out
    assert "note: the inputs were sampled at different temperatures (0.7, 1)" in out


def test_a_temperature_stored_as_float32_is_selected_by_the_value_typed(tmp_path, capsys):
    # files whose temperatures were written as float32 (0.699999988079071 for 0.7) and 1.0: --temperature 0.7 picks
    # the first (it was refused: "temperature must be one of [0.699999988079071, 1.0], got 0.7")
    r, s = np.ones((P, N), int).tolist(), np.zeros((P, N), int).tolist()
    for name in ("a", "b"):
        write(tmp_path / f"{name}.jsonl", r, s)
        text = (tmp_path / f"{name}.jsonl").read_text()
        (tmp_path / f"{name}.jsonl").write_text(text + text.replace('"temperature": 1.0', f'"temperature": {float(np.float32(0.7))!r}'))
    assert main(["compare", str(tmp_path / "a.jsonl"), str(tmp_path / "b.jsonl"), "--temperature", "0.7"]) == 0
    assert "(temperature 0.7)" in capsys.readouterr().out
    assert main(["compare", str(tmp_path / "a.jsonl"), str(tmp_path / "b.jsonl")]) == 2
    assert "temperatures [0.7, 1.0] (pools would mix them)" in capsys.readouterr().err


def test_without_ks_a_short_pool_that_caps_k_is_named(tmp_path, capsys):
    # every pool holds 4 samples but prompt 5 of b, which holds 2: k stopped at 2 for every prompt without a word
    r, s = np.ones((P, N), int).tolist(), np.zeros((P, N), int).tolist()
    write(tmp_path / "a.jsonl", r, s)
    write(tmp_path / "b.jsonl", [row[:2] if q == 5 else row for q, row in enumerate(r)],
          [row[:2] if q == 5 else row for q, row in enumerate(s)])
    assert main(["compare", str(tmp_path / "a.jsonl"), str(tmp_path / "b.jsonl"), "--n-boot", "50",
                 "--json", str(tmp_path / "c.json")]) == 0
    out = capsys.readouterr().out
    assert ("note: k stops at 2, the smallest pool (prompt '5' in b); the median pool holds 4 samples: leave that "
            "prompt out, or give --ks, to measure larger k") in out, out
    doc = json.loads((tmp_path / "c.json").read_text())
    assert doc["ks"] == [1, 2] and doc["k_capped_note"].startswith("k stops at 2, the smallest pool (prompt '5' in b)")
    # equal pools: no note
    assert main(["compare", str(tmp_path / "a.jsonl"), str(tmp_path / "a.jsonl"), "--names", "x,y", "--n-boot", "50"]) == 0
    assert "k stops at" not in capsys.readouterr().out
