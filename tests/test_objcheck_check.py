"""check_objective's guards: a time limit on the user's credit, and enough informative policies.

References: the flat-target argument is the definition of bias (a zero gradient has nothing to
miss); the informative count is checked against the policies' own rewards (a thresholded payoff
has a non-zero gradient exactly when some outcome is above the threshold and some below);
leave-one-out REINFORCE (Kool et al. 2019) is the unbiased credit for k = 1.
"""
from __future__ import annotations

import itertools
import re
import signal
import threading
import time

import numpy as np
import pytest

from bonft.cli.main import main
from bonft.objcheck import ToyPolicy, builtin, check_objective
from bonft.objectives.credit import reinforce_credit


def never_returns(scores, rewards, *, k):
    while True:
        time.sleep(0.01)


def test_a_credit_that_never_returns_is_a_failed_check_naming_policy_and_pools():
    rep = check_objective(never_returns, target="best_of_k", k=2, n=3, transformer=False, time_limit=2.0)
    assert not rep.ok and len(rep.problems) == 1 and rep.cases == []
    msg = rep.problems[0]
    assert msg.startswith("the credit did not return within the time limit of 2 s: it was working on "
                          "policy 1 (4 outcomes), a batch of 20 pools of n=3 (the first: scores [")  # C(4+2, 3) = 20
    assert "\n" not in msg and signal.getsignal(signal.SIGALRM) in (signal.SIG_DFL, signal.default_int_handler, None)


def test_the_timer_also_stops_a_payoff_and_restores_an_earlier_timer():
    def slow_payoff(S, R):
        while True:
            pass

    signal.signal(signal.SIGALRM, lambda *a: None)
    signal.setitimer(signal.ITIMER_REAL, 100.0)
    try:
        rep = check_objective(builtin.best_of_k, target=slow_payoff, k=2, n=3, transformer=False, time_limit=1.0)
        left, _ = signal.getitimer(signal.ITIMER_REAL)
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, signal.SIG_DFL)
    assert rep.problems[0].startswith("the target payoff did not return within the time limit of 1 s: it was "
                                      "working on policy 1 (4 outcomes), on 16 sets of k=2 samples")
    assert 0 < left <= 100.0  # the earlier timer runs on


def test_time_limit_is_checked():
    with pytest.raises(ValueError, match=r"time_limit must be a finite number > 0, got time_limit=0.0"):
        check_objective(builtin.best_of_k, target="best_of_k", k=1, n=2, time_limit=0)
    errors = []

    def in_thread():
        try:
            check_objective(builtin.best_of_k, target="best_of_k", k=1, n=2, transformer=False)
        except ValueError as e:
            errors.append(str(e))

    th = threading.Thread(target=in_thread, name="worker")
    th.start()
    th.join()
    assert errors and errors[0].startswith("time_limit needs the main thread of a process with SIGALRM")
    # without a limit it runs in a thread
    out = []
    th = threading.Thread(target=lambda: out.append(check_objective(builtin.best_of_k, target="best_of_k", k=1, n=2,
                                                                    transformer=False, time_limit=None).ok))
    th.start()
    th.join()
    assert out == [True]


def _above(S, R):
    """A thresholded payoff of one sample: 1 when its reward exceeds 1.5."""
    return (R[:, 0] > 1.5).astype(float)


def _thresholded_credit(scores, rewards, *, k):
    return reinforce_credit((rewards > 1.5).astype(float))  # leave-one-out REINFORCE on the payoff: unbiased


@pytest.mark.parametrize("kw, message", [
    # settings of a part of the check that does not run would be ignored
    ({"transformer": False, "directions": 5},
     r"directions=5 has no effect with transformer=False: it sizes the transformer check, which is skipped"),
    ({"transformer": False, "mc_pools": 100}, r"mc_pools=100 has no effect with transformer=False"),
    ({"transformer": False, "policies": [ToyPolicy([0.1, -0.3], [0.0, 1.0], [0.0, 1.0])], "outcomes": 6},
     r"outcomes=6 has no effect with a list of policies: .*each given ToyPolicy has its own outcomes"),
    ({"transformer": False, "policies": [ToyPolicy([0.1, -0.3], [0.0, 1.0], [0.0, 1.0], reference=1)]},
     r"policies\[0\]\.reference=1 has no effect with target 'best_of_k': only target 'best_of_k_sft' uses a "
     r"reference outcome"),
])
def test_settings_that_cannot_take_effect_are_errors(kw, message):
    with pytest.raises(ValueError, match=message):
        check_objective(builtin.best_of_k, target="best_of_k", k=2, n=3, **kw)


def test_the_defaults_of_the_optional_sizes_are_those_documented():
    # outcomes=None means 4 outcomes; the same check with outcomes=4 given draws the same policies
    a = check_objective(builtin.best_of_k, target="best_of_k", k=2, n=3, policies=1, transformer=False)
    b = check_objective(builtin.best_of_k, target="best_of_k", k=2, n=3, policies=1, outcomes=4, transformer=False)
    assert a.cases[0]["outcomes"] == b.cases[0]["outcomes"] == 4 and a.to_dict() == b.to_dict()


def test_random_policies_are_drawn_until_enough_are_informative():
    rep = check_objective(_thresholded_credit, target=_above, k=1, n=3, policies=4, transformer=False)
    assert rep.ok, str(rep)
    assert rep.policies_requested == 4 and rep.policies_informative == 4 == len(rep.cases)
    assert rep.policies_drawn > 4  # most random policies have no reward above 1.5
    for c in rep.cases:
        r = np.array(c["exact"])
        assert np.linalg.norm(r) > 1e-6
    assert f"informative policies (non-zero target gradient): 4 of {rep.policies_drawn} drawn (4 requested)" in str(rep)


def test_a_flat_target_fails_saying_how_many_were_found():
    never = lambda S, R: (R[:, 0] > 1e9).astype(float)  # noqa: E731  a payoff no policy can move
    rep = check_objective(_thresholded_credit, target=never, k=1, n=2, policies=3, transformer=False)
    assert rep.policies_informative == 0 and rep.policies_drawn == 30 and rep.cases == []
    assert rep.problems == [
        "only 0 of 30 random policies had a non-zero gradient of the target (3 requested): too little evidence; the "
        "target may be flat for most policies (a thresholded reward?): pass policies=[ToyPolicy(...)] on which it "
        "varies"]
    # given policies: the informative one is checked, the flat one named
    good = ToyPolicy([0.1, -0.3, 0.2], [0.0, 1.0, 2.0], [0.0, 2.0, 0.0])
    flat = ToyPolicy([0.1, -0.3, 0.2], [0.0, 1.0, 2.0], [0.0, 1.0, 0.0])
    rep = check_objective(_thresholded_credit, target=_above, k=1, n=2, policies=[good, flat], transformer=False)
    assert rep.policies_informative == 1 and len(rep.cases) == 2 and rep.cases[0]["rel_error"] < 1e-12
    assert rep.problems == ["only 1 of 2 given policies have a non-zero gradient of the target (flat: policy 2): "
                            "a flat target cannot show bias"]


def test_cli_time_limit(tmp_path, capsys):
    f = tmp_path / "slow.py"
    f.write_text("import time\ndef credit(scores, rewards, *, k):\n    while True:\n        time.sleep(0.01)\n")
    rc = main(["check-objective", f"{f}:credit", "--target", "best_of_k", "--k", "1", "--n", "2", "--skip-transformer",
               "--time-limit", "2"])
    out = capsys.readouterr().out
    assert rc == 1 and "PROBLEM: the credit did not return within the time limit of 2 s: it was working on policy 1" in out


# ---------------------------------------------------------------- credits the enumeration cannot stand for

def _loo(scores, rewards, *, k):
    """Leave-one-out REINFORCE for k = 1, written out (Kool et al. 2019): (R_i - mean of the others) / n."""
    n = rewards.shape[1]
    return (rewards - (rewards.sum(1, keepdims=True) - rewards) / (n - 1)) / n


def _axis0(scores, rewards, *, k):  # baseline averaged over the batch axis: mixes prompts
    return (rewards - rewards.mean(0, keepdims=True)) / rewards.shape[1]


def _batch_mean(scores, rewards, *, k):  # baseline the mean of the whole batch
    return (rewards - rewards.mean()) / rewards.shape[1]


_tie_rng = np.random.default_rng(5)


def _random_ties(scores, rewards, *, k):
    """Best-of-2 credit for n = 3, w_i = (mean payoff of the 3 pairs) - (payoff of the pair without i) (the
    U-statistic with a leave-one-out baseline, as in bonft.strategies.estimators), each pair's tie broken by a
    draw: unbiased on average over the draws, but two calls differ."""
    B, n = rewards.shape
    pairs = list(itertools.combinations(range(n), 2))
    w = np.zeros((B, n))
    for b in range(B):
        f = {}
        for i, j in pairs:
            top = [m for m in (i, j) if scores[b, m] == max(scores[b, i], scores[b, j])]
            f[i, j] = rewards[b, _tie_rng.choice(top)]
        mean = sum(f.values()) / len(pairs)
        w[b] = [mean - f[tuple(m for m in range(n) if m != i)] for i in range(n)]
    return w


def _batch_projection(credit, pols, n):
    """Brute force over every batch of two prompts (one policy each, all V^n ordered pools of each): the mean of
    the credit's gradient estimate for prompt 0 projected on grad E[R] of prompt 0 (k = 1: grad_theta E[R] =
    p * (r - p.r), the softmax identity). 1 for an unbiased credit."""
    Ys = [np.array(list(itertools.product(range(len(p.logits)), repeat=n))) for p in pols]
    ps = [np.exp(p.logits) / np.exp(p.logits).sum() for p in pols]
    p, r = ps[0], np.asarray(pols[0].rewards, float)
    est = np.zeros(len(p))
    for a in Ys[0]:
        for b in Ys[1]:
            R = np.stack([np.asarray(pols[0].rewards, float)[a], np.asarray(pols[1].rewards, float)[b]])
            w = credit(R.copy(), R, k=1)
            est += ps[0][a].prod() * ps[1][b].prod() * (w[0] @ (np.eye(len(p))[a] - p))
    exact = p * (r - p @ r)
    return float(est @ exact / (exact @ exact))


def test_a_credit_that_mixes_the_prompts_of_a_batch_is_biased_in_training():
    # the reason for refusing it: over batches of two prompts its mean misses the gradient, unlike LOO REINFORCE.
    # By hand (E[R_i grad log pi(y_i)] = grad E[R], and a reward independent of y_i contributes 0):
    # axis 0, w_0i = (R_0i - R_1i) / 2n: half the gradient; batch mean over 2n rewards: each sample's own
    # reward enters its baseline with weight 1/2n, so 1 - 1/(2n) = 5/6 of it at n = 3
    pols = [ToyPolicy(np.array([0.3, -0.2, 0.1]), [0.0, 1.0, 2.0], [1.0, 0.0, 0.5]),
            ToyPolicy(np.array([-0.4, 0.6, 0.0]), [0.0, 1.0, 2.0], [0.2, 0.9, 0.0])]
    assert abs(_batch_projection(_loo, pols, 3) - 1) < 1e-12
    assert abs(_batch_projection(_axis0, pols, 3) - 1 / 2) < 1e-12
    assert abs(_batch_projection(_batch_mean, pols, 3) - 5 / 6) < 1e-12


@pytest.mark.parametrize("credit", [_axis0, _batch_mean])
def test_a_credit_that_mixes_the_pools_of_a_batch_is_refused(credit):
    rep = check_objective(credit, target="best_of_k", k=1, n=3, transformer=False)
    assert not rep.ok and rep.cases == [] and len(rep.problems) == 1
    # C(4 + 2, 3) = 20 pools; pool 0 is three draws of one outcome: alone its baseline is its own reward
    assert re.match(r"the credit of a pool depends on the other pools of the batch \(pool 0 \(scores \[.*\], "
                    r"rewards \[.*\]\) alone gives \[0, 0, 0\], in a batch of 20 pools \[", rep.problems[0])
    assert "compute each pool's credit from its own row" in rep.problems[0]


def test_a_credit_that_fails_on_a_pool_alone_is_refused_as_batch_dependent():
    def batch_std(scores, rewards, *, k):  # normalised by the batch's standard deviation: 0 for a batch of one pool
        with np.errstate(divide="ignore", invalid="ignore"):
            return _loo(scores, rewards, k=k) / rewards.std()

    rep = check_objective(batch_std, target="best_of_k", k=1, n=3, transformer=False)
    assert rep.problems[0].startswith("the credit of a pool depends on the other pools of the batch (pool 0 (")
    assert "alone fails (ValueError: credit returned -inf at pool 0" in rep.problems[0]


def test_a_random_credit_is_refused_as_not_deterministic():
    rep = check_objective(_random_ties, target="best_of_k", k=2, n=3, transformer=False)
    assert not rep.ok and rep.cases == [] and len(rep.problems) == 1
    assert re.match(r"credit is not deterministic: two calls on the same 20 pools differ \(\d+ of them; pool \d+ "
                    r"\(scores \[", rep.problems[0])
    assert rep.problems[0].endswith("seed it or average over ties, since the check computes the mean of one credit "
                                    "per pool")


@pytest.mark.parametrize("credit, target, k", [
    (_loo, "best_of_k", 1), (builtin.best_of_k, "best_of_k", 2), (builtin.pass_at_k, "pass_at_k", 2),
    (builtin.reinforce, "best_of_k", 1), (builtin.best_of_k_no_baseline, "best_of_k", 3)])
def test_row_wise_deterministic_credits_still_pass(credit, target, k):
    rep = check_objective(credit, target=target, k=k, n=4, transformer=False)
    assert rep.ok, str(rep)


def test_the_transformer_runs_after_the_row_checks():
    rep = check_objective(_loo, target="best_of_k", k=1, n=3, policies=1, directions=1, mc_pools=50)
    assert rep.ok, str(rep)
    assert rep.transformer["rel_error"] < 1e-10


@pytest.mark.parametrize("kw, message", [
    # C(V + n - 1, n) multisets per policy (stars and bars), bounded like the ordered pools (MAX_ROWS = 2^18);
    # the binomials are Python's math.comb
    ({"n": 40, "outcomes": 12, "transformer": False},
     r"n=40 with outcomes=12 gives C\(V\+n-1, n\) = C\(51, 40\) = 47,626,016,970 pools to enumerate, more than "
     r"the check builds \(at most 262,144\); lower n or outcomes"),
    ({"n": 200, "transformer": False}, r"n=200 with outcomes=4 gives C\(V\+n-1, n\) = C\(203, 200\) = 1,373,701 pools"),
    # the transformer's six score/reward classes: C(34, 29) = 278,256
    ({"n": 29, "outcomes": 2}, r"n=29 with the transformer's 6 score/reward classes gives C\(V\+n-1, n\) = "
                               r"C\(34, 29\) = 278,256 pools to enumerate, .*pass transformer=False"),
    ({"n": 30, "transformer": False, "policies": [ToyPolicy(np.zeros(2), [0.0, 1.0], [0.0, 1.0]),
                                                  ToyPolicy(np.zeros(12), np.arange(12.0), np.arange(12.0))]},
     r"n=30 with policies\[1\]'s 12 outcomes gives C\(V\+n-1, n\) = C\(41, 30\) = 3,159,461,968 pools"),
])
def test_too_many_pools_is_an_error_up_front(kw, message):
    with pytest.raises(ValueError, match=message):  # before any pool is built (it would not fit in memory)
        check_objective(builtin.best_of_k, target="best_of_k", k=1, **kw)
