"""ZeroCreditWatch: one warning when the first 10% of the RL stage had zero credit on every step.

The window sizes are ceil(rl_steps / 10) worked by hand; the metrics fed are written out, not produced by a run.
"""
import pytest

from bonft.trainer.zero_credit import ZeroCreditWarning, ZeroCreditWatch


def feed(watch, recs):
    out = []
    for i, rec in enumerate(recs):
        out.append(watch.update(i, rec))
    return out


@pytest.mark.parametrize("rl_steps, window", [(1, 1), (10, 1), (11, 2), (25, 3), (100, 10)])
def test_window_is_the_first_tenth(rl_steps, window):
    assert ZeroCreditWatch(rl_steps, "reinforce", 0.5).window == window


def test_never_rewarded_warns_once_with_the_count():
    watch = ZeroCreditWatch(25, "pass_at_k", 0.5)
    zero = {"pool/with_signal": 0.0, "reward": 0.0}
    with pytest.warns(ZeroCreditWarning) as got:
        out = feed(watch, [zero] * 6)
    assert len(got) == 1
    assert out[:2] == [None, None] and out[3:] == [None] * 3
    assert out[2].startswith("the credit was zero on every one of the first 3 RL steps (3 of 25: the first 10%, rounded up to whole steps")
    assert "no sample was ever rewarded" in out[2]


def test_threshold_never_reached_names_correct_threshold():
    watch = ZeroCreditWatch(10, "pass_at_k", 0.9)
    with pytest.warns(ZeroCreditWarning, match=r"mean up to 0.42\) but no sample reached correct_threshold = 0.9"):
        feed(watch, [{"pool/with_signal": 0.0, "reward": 0.42}])


def test_pass_at_k_pools_all_correct_blame_the_threshold_not_the_rewards():
    # a mean reward of 2.88 with correct_threshold 0.5: some sample reached the threshold (a mean never
    # exceeds the largest value), so "no sample reached it" would be false; every pool was all-correct instead
    watch = ZeroCreditWatch(10, "pass_at_k", 0.5)
    with pytest.warns(ZeroCreditWarning, match=r"every pool was all-correct or all-wrong at correct_threshold = 0.5 "
                                               r"\(mean reward up to 2.88\).*raise correct_threshold") as got:
        feed(watch, [{"pool/with_signal": 0.0, "reward": 2.88}])
    assert "no sample reached" not in str(got[0].message)


def test_all_equal_pools():
    watch = ZeroCreditWatch(10, "reinforce", 0.5)
    with pytest.warns(ZeroCreditWarning, match=r"every pool was all-equal \(mean reward up to 1:"):
        feed(watch, [{"pool/with_signal": 0.0, "reward": 1.0}])


def test_one_step_with_signal_silences_it(recwarn):
    watch = ZeroCreditWatch(30, "pass_at_k", 0.5)
    out = feed(watch, [{"pool/with_signal": 0.0, "reward": 0.0}, {"pool/with_signal": 0.0625, "reward": 0.01},
                       {"pool/with_signal": 0.0, "reward": 0.0}] + [{"pool/with_signal": 0.0, "reward": 0.0}] * 10)
    assert out == [None] * 13 and not [w for w in recwarn if issubclass(w.category, ZeroCreditWarning)]


def test_a_resume_inside_the_window_gives_no_verdict(recwarn):
    watch = ZeroCreditWatch(30, "pass_at_k", 0.5)
    assert watch.update(2, {"pool/with_signal": 0.0, "reward": 0.0}) is None  # steps 0 and 1 ran before the resume
    assert not recwarn.list


def test_plain_sft_has_no_sample_credit_by_design_and_is_not_watched(recwarn):
    # best_of_k_sft at k = 1: log pi_bon(y*) = log pi(y*) + log sum_{j<1} F^j F_<^{0-j} = log pi(y*) + log 1
    # (Chow et al. 2024), so its sample credit is zero on every step while the references' NLL trains.
    watch = ZeroCreditWatch(10, "best_of_k_sft", 0.5, k=1)
    assert watch.window == 0
    assert feed(watch, [{"pool/with_signal": 0.0, "reward": 0.3}] * 10) == [None] * 10 and not recwarn.list
    with pytest.warns(ZeroCreditWarning):  # BoN-SFT at k = 8 with all-equal pools is still a run without signal
        feed(ZeroCreditWatch(10, "best_of_k_sft", 0.5, k=8), [{"pool/with_signal": 0.0, "reward": 0.3}])
