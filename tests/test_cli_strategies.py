"""``bonft estimate --strategy`` / ``bonft plan --strategy`` and the pool file's answer field.

Reference values: majority vote and best-of-k computed here straight from their definitions over
every k-subset of each pool (the U-statistic, Hoeffding 1948; majority vote with ties split
uniformly, Wang et al. 2023).
"""
from __future__ import annotations

import itertools
import json
import math
from collections import Counter

import numpy as np
import pytest

from bonft.cli import main
from bonft.io import group_pools, read_samples

POOLS = {  # prompt -> [(answer, score, reward)]
    "p1": [("12", 0.9, 1), ("12", 0.2, 1), ("7", 0.8, 0), ("x", 0.8, 0), ("7", 0.1, 0)],
    "p2": [("3", 0.5, 0), ("4", 0.6, 1), ("3", 0.5, 0), ("4", 0.1, 1), ("5", 0.7, 0)],
}


def _write(path, with_answer=True):
    rows = [{"prompt_id": p, "i": i, "score": s, "reward": r, **({"answer": a} if with_answer else {})}
            for p, pool in POOLS.items() for i, (a, s, r) in enumerate(pool)]
    path.write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    return path


def _majority(pool, k):
    vals = []
    for S in itertools.combinations(pool, k):
        c = Counter(a for a, _, _ in S)
        top = max(c.values())
        win = [a for a in c if c[a] == top]
        vals.append(np.mean([np.mean([r for a2, _, r in S if a2 == a]) for a in win]))
    return np.mean(vals)


def _best_of_k(pool, k):
    vals = []
    for S in itertools.combinations(pool, k):
        top = max(s for _, s, _ in S)
        vals.append(np.mean([r for _, s, r in S if s == top]))
    return np.mean(vals)


def test_answer_field_is_read_and_grouped(tmp_path):
    t = read_samples(_write(tmp_path / "p.jsonl"))
    keys, s, r, a = group_pools(t, with_answers=True)
    assert keys == ["p1", "p2"] and list(a[0]) == ["12", "12", "7", "x", "7"]
    with pytest.raises(ValueError, match="answer"):
        group_pools(read_samples(_write(tmp_path / "q.jsonl", with_answer=False)), with_answers=True)


def test_estimate_strategies_side_by_side(tmp_path, capsys):
    out = tmp_path / "o.json"
    rc = main(["estimate", str(_write(tmp_path / "p.jsonl")), "--strategy", "majority_vote,best_of_k",
               "--ks", "1,2,3,5", "--n-boot", "50", "--json", str(out)])
    assert rc == 0
    assert "majority_vote" in capsys.readouterr().out
    d = json.loads(out.read_text())["blocks"][0]["strategies"]
    for j, k in enumerate([1, 2, 3, 5]):
        want_m = np.mean([_majority(p, k) for p in POOLS.values()])
        want_b = np.mean([_best_of_k(p, k) for p in POOLS.values()])
        assert abs(d["majority_vote"]["mean"][j] - want_m) < 1e-12
        assert abs(d["best_of_k"]["mean"][j] - want_b) < 1e-12


def _args(f, strategy):
    import argparse

    from bonft.cli import estimate

    p = argparse.ArgumentParser()
    estimate.add_arguments(p)
    return p.parse_args([str(f), "--strategy", strategy, "--n-boot", "50"])


def test_strategy_needs_answers_and_known_names(tmp_path):
    from bonft.cli import estimate

    f = _write(tmp_path / "p.jsonl", with_answer=False)
    with pytest.raises(ValueError, match="needs an answer field"):
        estimate.run(_args(f, "majority_vote"))
    with pytest.raises(ValueError, match="--strategy must list ids from best_of_k, majority_vote, weighted_vote, pass_at_k, got 'vote'"):
        estimate.run(_args(f, "vote"))
    with pytest.raises(ValueError, match=r"got 'majority' \(the strategy id is 'majority_vote'\)"):
        estimate.run(_args(f, "majority"))


def test_plan_strategies_picks_best(tmp_path, capsys):
    out = tmp_path / "plan.json"
    rc = main(["plan", "--samples", str(_write(tmp_path / "p.jsonl")), "--strategy", "majority_vote,best_of_k",
               "--max-k", "5", "--n-boot", "50", "--budget-samples", "3", "--json", str(out)])
    assert rc == 0
    rows = json.loads(out.read_text())["best_by_k"]
    for row in rows:
        k = row["k"]
        vals = {"majority_vote": np.mean([_majority(p, k) for p in POOLS.values()]),
                "best_of_k": np.mean([_best_of_k(p, k) for p in POOLS.values()])}
        assert abs(row["value"] - max(vals.values())) < 1e-12
    assert "budget 3 samples/prompt" in capsys.readouterr().out


def test_null_answers_vote_alone(tmp_path):
    # two failed extractions must not agree with each other: with k = 2 drawn from {null, null, "5"}
    # majority ties every pair (each answer once), so V_2 = mean over pairs of the mean reward = E[R]
    f = tmp_path / "n.jsonl"
    rows = [{"prompt_id": 0, "i": 0, "score": 0.1, "reward": 0, "answer": None},
            {"prompt_id": 0, "i": 1, "score": 0.2, "reward": 0, "answer": None},
            {"prompt_id": 0, "i": 2, "score": 0.3, "reward": 1, "answer": "5"}]
    f.write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    _, s, r, a = group_pools(read_samples(f), with_answers=True)
    assert len(set(a[0])) == 3
    from bonft.strategies.estimators import majority_vote_per_prompt

    assert abs(majority_vote_per_prompt(a, r, ks=[2])[0, 0] - 1 / 3) < 1e-15


def test_plan_exact_strategies(tmp_path):
    # reference: majority vote over every ordered 3-tuple of a 4-outcome softmax policy at T = 0.5
    spec = {"logits": [1.0, 0.2, 0.8, -0.5], "answers": ["7", "7", "3", "9"], "scores": [0.9, 0.3, 0.8, 0.2],
            "rewards": [1, 1, 0, 0]}
    f = tmp_path / "e.json"
    f.write_text(json.dumps(spec))
    out = tmp_path / "o.json"
    rc = main(["plan", "--exact", str(f), "--temperatures", "0.5", "--strategy", "majority_vote,best_of_k",
               "--max-k", "3", "--json", str(out)])
    assert rc == 0
    z = np.array(spec["logits"]) / 0.5
    p = np.exp(z - z.max())
    p /= p.sum()
    want = 0.0
    for t in itertools.product(range(4), repeat=3):
        c = Counter(spec["answers"][i] for i in t)
        top = max(c.values())
        win = [a for a in c if c[a] == top]
        want += np.prod(p[list(t)]) * np.mean([np.mean([spec["rewards"][i] for i in t if spec["answers"][i] == a])
                                                for a in win])
    got = json.loads(out.read_text())["values"]["majority_vote@T=0.5"][2]
    assert abs(got - want) < 1e-12


def test_plan_exact_majority_vote_at_the_default_max_k(tmp_path, capsys):
    # reference: two answers with masses q and 1 - q under softmax(logits); answer "7" (reward 1) wins k draws
    # with c > k/2 of them and ties at c = k/2 (half the reward): a binomial sum over c (definition)
    spec = {"logits": [0.5, 0.0, 0.2], "answers": ["7", "7", "3"], "scores": [0.1, 0.2, 0.3], "rewards": [1, 1, 0]}
    f = tmp_path / "e.json"
    f.write_text(json.dumps(spec))
    out = tmp_path / "o.json"
    assert main(["plan", "--exact", str(f), "--temperatures", "1", "--strategy", "majority_vote",
                 "--json", str(out)]) == 0
    capsys.readouterr()
    got = json.loads(out.read_text())["values"]["majority_vote@T=1"]
    assert len(got) == 64  # --max-k defaults to 64
    e = np.exp(spec["logits"])
    q = (e[0] + e[1]) / e.sum()
    for k in (21, 64):
        want = sum(math.comb(k, c) * q**c * (1 - q) ** (k - c) * (1.0 if 2 * c > k else 0.5 if 2 * c == k else 0.0)
                   for c in range(k + 1))
        assert abs(got[k - 1] - want) < 1e-12


class _Terminal:
    """A stand-in for stderr that says it is a terminal (tqdm draws bars only there)."""

    def __init__(self):
        self.text = []

    def write(self, s):
        self.text.append(s)

    def flush(self):
        pass

    def isatty(self):
        return True


def test_vote_estimates_show_a_progress_bar_on_a_terminal_unless_quiet(tmp_path, monkeypatch, capsys):
    # bonft plan --strategy weighted_vote on 500 prompts x 200 samples ran for minutes without a sign of life
    import sys

    from bonft.strategies.estimators import VoteProgress, weighted_vote_per_prompt

    a, s, r = [np.array([0, 1, 0])] * 3, [np.ones(3)] * 3, [np.array([1.0, 0.0, 1.0])] * 3
    term = _Terminal()
    monkeypatch.setattr(sys, "stderr", term)
    weighted_vote_per_prompt(a, s, r, ks=[2])
    assert not term.text  # the Python API draws no bar
    with VoteProgress():
        weighted_vote_per_prompt(a, s, r, ks=[2])
    assert "weighted_vote:" in "".join(term.text) and "/3 [" in "".join(term.text)  # a bar over the 3 pools
    monkeypatch.undo()
    # the command reads --quiet with --samples --strategy (it refused it: only model mode had a bar)
    p = _write(tmp_path / "p.jsonl")
    assert main(["plan", "--samples", str(p), "--strategy", "majority_vote", "--n-boot", "20", "--quiet"]) == 0
    assert main(["plan", "--samples", str(p), "--n-boot", "20", "--quiet"]) == 2
    assert "--quiet applies to --model only" in capsys.readouterr().err
    # bonft estimate --strategy draws the same bar on a terminal, and --quiet turns it off
    for extra, bar in (([], True), (["--quiet"], False)):
        term = _Terminal()
        monkeypatch.setattr(sys, "stderr", term)
        assert main(["estimate", str(p), "--strategy", "weighted_vote", "--n-boot", "20", *extra]) == 0
        monkeypatch.undo()
        assert ("weighted_vote:" in "".join(term.text)) == bar, (extra, term.text)
    assert main(["estimate", str(p), "--n-boot", "20", "--quiet"]) == 2
    assert "--quiet applies to --strategy only" in capsys.readouterr().err


def test_strategy_plan_selects_a_float32_temperature_by_the_value_typed(tmp_path):
    # a file that stored 0.7 as float32 (0.699999988079071) holds the temperature 0.7 under the one rule of every
    # command (equal as float32); the values are the brute-force ones of that temperature's pools
    rows = [{"prompt_id": p, "i": i, "score": s, "reward": r, "answer": a, "temperature": float(np.float32(t))}
            for t in (0.7, 1.0) for p, pool in POOLS.items() for i, (a, s, r) in enumerate(pool)]
    path = tmp_path / "t32.jsonl"
    path.write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    out = tmp_path / "plan.json"
    assert main(["plan", "--samples", str(path), "--strategy", "majority_vote,best_of_k", "--temperatures", "0.7",
                 "--max-k", "2", "--n-boot", "20", "--json", str(out)]) == 0
    for row in json.loads(out.read_text())["best_by_k"]:
        k = row["k"]
        best = max(np.mean([f(p, k) for p in POOLS.values()]) for f in (_majority, _best_of_k))
        assert abs(row["value"] - best) < 1e-12 and abs(row["temperature"] - 0.7) < 1e-7
    assert main(["plan", "--samples", str(path), "--strategy", "best_of_k", "--temperatures", "0.8", "--max-k", "2"]) == 2


def test_strategy_ks_above_a_short_pool_names_that_prompt(tmp_path, capsys):
    rows = [{"prompt_id": p, "i": i, "score": s, "reward": r, "answer": a}
            for p, pool in POOLS.items() for i, (a, s, r) in enumerate(pool) if not (p == "p2" and i >= 3)]
    path = tmp_path / "short.jsonl"
    path.write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    assert main(["estimate", str(path), "--strategy", "majority_vote", "--ks", "4"]) == 2
    assert ("--ks must be <= the smallest pool (n=3: prompt 'p2'; the largest holds 5), got 4"
            in capsys.readouterr().err)


def test_strategy_plan_with_a_shorter_pool_at_a_later_temperature(tmp_path, capsys):
    # the k grid is one for every temperature, up to the smallest pool of them all (it was the first temperature's,
    # and a later temperature's shorter pool crashed the table with an IndexError); a column of one value prints
    # "no spread", as bonft estimate does
    rows = [{"prompt_id": f"q{p}", "i": i, "score": float(i), "reward": i % 2, "answer": str(i % 2), "temperature": t}
            for t in (0.5, 1.0) for p in range(10) for i in range(2 if (t, p) != (1.0, 0) else 1)]
    path = tmp_path / "short_later.jsonl"
    path.write_text("\n".join(json.dumps(r) for r in rows) + "\n")
    assert main(["plan", "--samples", str(path), "--strategy", "best_of_k,majority_vote", "--n-boot", "20"]) == 0
    out = capsys.readouterr().out
    table = out[out.index("best servable strategy"):].splitlines()
    assert len(table) == 3 and table[2].split()[:2] == ["1", "best_of_k"] and table[2].endswith("no spread")


def test_plan_exact_strategies_on_two_prompts_average_the_prompts(tmp_path, capsys):
    # the layout docs/planning.md documents: logits (P, V), one row per prompt, prompts weighted equally.
    # reference: majority vote and best-of-k over every ordered 2-tuple of each prompt's softmax(logits / T),
    # averaged over the two prompts (definition)
    spec = {"logits": [[1.5, 0.5, 0.0, -1.0], [1.0, 0.8, 0.0, -1.2]], "scores": [[0.5, 0.2, 0.4, 0.1], [0.3, 0.2, 0.4, 0.9]],
            "rewards": [[1, 0, 1, 0], [0, 0, 0, 1]], "answers": [["a", "b", "a", "c"], ["x", "y", "z", "w"]]}
    f, out = tmp_path / "e.json", tmp_path / "o.json"
    f.write_text(json.dumps(spec))
    assert main(["plan", "--exact", str(f), "--temperatures", "0.7", "--strategy", "majority_vote,best_of_k",
                 "--max-k", "2", "--json", str(out)]) == 0
    capsys.readouterr()
    want_mv, want_bon = [], []
    for lg, sc, rw, an in zip(spec["logits"], spec["scores"], spec["rewards"], spec["answers"]):
        z = np.array(lg) / 0.7
        p = np.exp(z - z.max())
        p /= p.sum()
        mv = bon = 0.0
        for t in itertools.product(range(4), repeat=2):
            c = Counter(an[i] for i in t)
            win = [a for a in c if c[a] == max(c.values())]
            mv += np.prod(p[list(t)]) * np.mean([np.mean([rw[i] for i in t if an[i] == a]) for a in win])
            top = max(sc[i] for i in t)
            bon += np.prod(p[list(t)]) * np.mean([rw[i] for i in t if sc[i] == top])
        want_mv.append(mv), want_bon.append(bon)
    got = json.loads(out.read_text())["values"]
    assert abs(got["majority_vote@T=0.7"][1] - np.mean(want_mv)) < 1e-12
    assert abs(got["best_of_k@T=0.7"][1] - np.mean(want_bon)) < 1e-12


def test_plan_exact_strategies_report_a_conflicting_reward_not_an_empty_table(tmp_path, capsys):
    # answer 'a' has rewards 1 and 0: strategy_value's own error, which a size-limit handler used to swallow before
    # failing on "max() arg is an empty sequence"
    f = tmp_path / "e.json"
    f.write_text(json.dumps({"logits": [1.5, 0.5, 0.0, -1.0], "scores": [0.5, 0.2, 0.5, 0.1], "rewards": [1, 0, 0, 0],
                             "answers": ["a", "b", "a", "c"]}))
    assert main(["plan", "--exact", str(f), "--temperatures", "1", "--strategy", "majority_vote", "--max-k", "3"]) == 2
    err = capsys.readouterr().err
    assert "rewards must be one value per answer for majority_vote, got answer 'a'" in err
    # the command has no conflicts= option: the message says what to change in the file
    assert "(outcome 2): the --exact file must give the outcomes of one answer one reward (in Python" in err, err
    assert "; pass conflicts" not in err
