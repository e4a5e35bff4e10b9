"""The shared validation helpers: messages name the argument, expectation and value."""
import numpy as np
import pytest
import torch

from bonft._core.checks import check_finite, check_items, check_k, check_ks, check_probs


def test_check_k_messages():
    assert check_k(3, 8) == 3
    with pytest.raises(ValueError, match=r"k must be <= n \(n=8\), got k=16"):
        check_k(16, 8)
    with pytest.raises(ValueError, match=r"k must be >= 1, got k=0"):
        check_k(0, 8)
    with pytest.raises(TypeError, match=r"k must be an int"):
        check_k(2.0, 8)
    ks, scalar = check_ks([1, 2, 4], 4)
    assert ks.tolist() == [1, 2, 4] and not scalar


def test_check_finite_and_probs():
    with pytest.raises(ValueError, match=r"scores must be finite, got nan at index \(1,\)"):
        check_finite("scores", np.array([0.0, np.nan]))
    with pytest.raises(ValueError, match=r"scores must be finite"):
        check_finite("scores", torch.tensor([[0.0, float("inf")]]))
    with pytest.raises(ValueError, match=r"probs must sum to 1"):
        check_probs("probs", np.array([0.5, 0.6]))
    with pytest.raises(ValueError, match=r"probs must be non-negative"):
        check_probs("probs", np.array([1.5, -0.5]))


def test_bool_nonnegative_and_binary_messages():
    from bonft._core.checks import check_binary, check_bool, check_nonnegative

    assert check_bool("return_info", True) is True and check_nonnegative("anchor_weight", 0) == 0.0
    with pytest.raises(TypeError, match=r"return_info must be a bool, got int 1"):
        check_bool("return_info", 1)
    with pytest.raises(ValueError, match=r"anchor_weight must be a finite number >= 0, got anchor_weight=-0.5"):
        check_nonnegative("anchor_weight", -0.5)
    with pytest.raises(TypeError, match=r"smoothing must be a real number >= 0, got str"):
        check_nonnegative("smoothing", "1")
    with pytest.raises(ValueError, match=r"correct must hold only 0/1 \(or booleans\), got 2.0 at index \(1, 0\)"):
        check_binary("correct", np.array([[1, 0], [2, 1]]))
    with pytest.raises(ValueError, match=r"mask must hold only 0/1 \(or booleans\), got 0.5 at index \(0, 1\)"):
        check_binary("mask", torch.tensor([[1.0, 0.5]]))


def test_check_real_one_policy_for_every_real_argument():
    from bonft._core.checks import check_real

    assert check_real("x", 3) == 3.0 and check_real("x", 0.5, min=0.0, max=1.0) == 0.5
    with pytest.raises(TypeError, match=r"x must be a real number, got bool True"):
        check_real("x", True)
    with pytest.raises(TypeError, match=r"x must be a real number, got str '1'"):
        check_real("x", "1")
    with pytest.raises(ValueError, match=r"x must be a finite number, got x=nan"):
        check_real("x", float("nan"))
    with pytest.raises(ValueError, match=r"x must be a finite number >= 0, got x=-1.0"):
        check_real("x", -1, min=0.0)
    with pytest.raises(ValueError, match=r"x must be a finite number in \[0, 1\], got x=inf"):
        check_real("x", float("inf"), min=0.0, max=1.0)


def test_verifier_kit_arguments_follow_the_exception_policy():
    # the exception policy: a NaN threshold is a wrong value (ValueError), a str pool size a wrong type (TypeError)
    from bonft.testing import check_verifier

    ex = [{"prompt": "p", "responses": ["a", "b"], "labels": [True, False]}]
    with pytest.raises(ValueError, match=r"threshold must be a finite number, got threshold=nan"):
        check_verifier(lambda p, r: [1.0] * len(r), ex, threshold=float("nan"))
    with pytest.raises(TypeError, match=r"pool_size must be an int, got str 'x'"):
        check_verifier(lambda p, r: [1.0] * len(r), ex, pool_size="x")


def test_check_items_messages():
    assert check_items("prompts", ("a", "b"), str, "str") == ["a", "b"]
    with pytest.raises(TypeError, match=r"prompts must be a sequence of str, got a single str \(wrap it in a list\)"):
        check_items("prompts", "ab", str, "str")
    with pytest.raises(TypeError, match=r"prompts must be a sequence of str, got int$"):
        check_items("prompts", 3, str, "str")
    with pytest.raises(ValueError, match=r"prompts must not be empty"):
        check_items("prompts", [], str, "str")
    with pytest.raises(TypeError, match=r"examples must be a sequence of Example, got int at index 1"):
        check_items("examples", [1.5, 2], float, "Example")
