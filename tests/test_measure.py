"""bonft.trainer.measure: the step's time split (Stopwatch) and the gradient signal-to-noise ratio
(GradientMoments), against a scripted clock and numpy on the stored per-prompt gradients.

The SNR of pure noise and of one prompt with a gradient are checked in tests/test_train_objectives.py.
"""
import math

import numpy as np
import pytest
import torch

import bonft.trainer.measure as M
from bonft.trainer.measure import GradientMoments, Stopwatch


class _Clock:
    """A perf_counter that returns scripted instants, so the totals are exact sums (no timing in the test)."""

    def __init__(self, instants):
        self.instants = list(instants)

    def __call__(self):
        return self.instants.pop(0)


def test_stopwatch_adds_repeated_phases_and_prefixes_metrics(monkeypatch):
    monkeypatch.setattr(M.time, "perf_counter", _Clock([10.0, 10.5, 11.0, 11.25, 20.0, 23.0]))
    clock = Stopwatch()
    with clock("forward"):  # 0.5 s
        pass
    with clock("forward"):  # 0.25 s more: micro-batches add up
        pass
    with clock("backward"):  # 3 s
        pass
    assert clock.totals == {"forward": 0.75, "backward": 3.0}
    assert clock.metrics() == {"time/forward": 0.75, "time/backward": 3.0}
    assert clock.metrics(prefix="t.") == {"t.forward": 0.75, "t.backward": 3.0}


def test_stopwatch_counts_a_phase_that_raises(monkeypatch):
    monkeypatch.setattr(M.time, "perf_counter", _Clock([1.0, 3.5]))
    clock = Stopwatch()
    with pytest.raises(RuntimeError, match="boom"):
        with clock("sample"):
            raise RuntimeError("boom")
    assert clock.totals == {"sample": 2.5}


def _snr_numpy(G: np.ndarray) -> float:
    """||mean_b g_b|| / sqrt(sum_b ||g_b - mean||^2 / (B - 1)), written out on the stored vectors."""
    B = len(G)
    mean = G.mean(0)
    return float(np.linalg.norm(mean) / math.sqrt(((G - mean) ** 2).sum() / (B - 1)))


def test_gradient_moments_over_several_parameters_equal_the_flattened_formula():
    # two parameter tensors per prompt (a matrix and a bias): the SNR is that of the concatenated vector
    rng = np.random.default_rng(4)
    W = rng.normal(size=(6, 3, 4)) + 0.5
    b = rng.normal(size=(6, 2)) - 0.2
    m = GradientMoments()
    for w_b, b_b in zip(W, b):
        m.add([torch.tensor(w_b, dtype=torch.float32), torch.tensor(b_b, dtype=torch.float32)])
    flat = np.concatenate([W.reshape(6, -1), b], axis=1).astype(np.float32).astype(np.float64)
    assert m.count == 6
    assert m.snr() == pytest.approx(_snr_numpy(flat), rel=1e-12)


def test_gradient_moments_known_values_and_bad_input():
    # two prompts with gradients g and -g: the mean is 0, so the SNR is exactly 0
    m = GradientMoments()
    m.add([torch.tensor([1.0, 2.0])])
    m.add([torch.tensor([-1.0, -2.0])])
    assert m.snr() == 0.0
    # g1 = (1, 0), g2 = (3, 0): mean (2, 0), deviations +-1 -> sum 2 over B - 1 = 1 -> SNR = 2 / sqrt(2)
    m = GradientMoments()
    m.add([torch.tensor([1.0, 0.0])])
    m.add([torch.tensor([3.0, 0.0])])
    assert m.snr() == pytest.approx(math.sqrt(2), rel=1e-15)
    # identical gradients: no noise at all
    m = GradientMoments()
    for _ in range(3):
        m.add([torch.tensor([0.5, -1.0])])
    assert m.snr() == math.inf
    one = GradientMoments()
    one.add([torch.ones(2)])
    with pytest.raises(ValueError, match="the gradient SNR needs at least 2 prompts, got 1"):
        one.snr()
