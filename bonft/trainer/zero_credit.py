"""A run that learns nothing says so: zero credit on every step of the first 10% of the RL stage.

When no pool of a step has a non-zero credit (metric ``pool/with_signal`` is 0)
the step's policy-gradient term is exactly zero: only the anchor KL and weight
decay move the weights. If that holds on every one of the first
``ceil(rl_steps / 10)`` RL steps, :class:`ZeroCreditWatch` gives one warning
with the count and the likely cause, read from the steps' metrics:

* mean reward 0 on every step: no sample was ever rewarded (the verifier
  rejects everything the starting policy writes);
* a pass@k objective whose mean rewards are above 0 but below ``correct_threshold``:
  no sample counts as correct; at or above it: every pool was all-correct or all-wrong
  (e.g. a verifier of scores such as lengths, where every sample clears the threshold);
* otherwise every pool was all-equal (e.g. every sample rewarded alike), so
  leave-one-out credit is zero.

``best_of_k_sft`` at k = 1 (plain SFT) is never watched: its sample credit is zero by design
(log of a sum with one term), and its loss is the references' NLL.
"""
from __future__ import annotations

import math
import warnings


class ZeroCreditWarning(UserWarning):
    """The first 10% of the RL stage had zero credit on every step."""


class ZeroCreditWatch:
    """Feed it each RL step's metrics (:meth:`update`); it warns once if the first 10% all had zero credit.

    rl_steps: RL steps of the run; objective: its name; correct_threshold: the config key; k: the run's k
    (``best_of_k_sft`` at k = 1 has no sample credit by design: no window, never a warning).
    """

    def __init__(self, rl_steps: int, objective: str, correct_threshold: float, *, k: int | None = None) -> None:
        by_design = objective == "best_of_k_sft" and k == 1
        self.window = max(1, math.ceil(rl_steps / 10)) if rl_steps > 0 and not by_design else 0
        self.rl_steps, self.objective, self.threshold = rl_steps, objective, correct_threshold
        self.seen = 0
        self.silent = True
        self.rewards: list[float] = []
        self.message: str | None = None

    def update(self, rl_step: int, rec: dict) -> str | None:
        """``rl_step``: 0-based index in the RL stage; ``rec``: the step's metrics. Returns the warning when given."""
        if self.message is not None or rl_step >= self.window or rl_step != self.seen:
            return None  # outside the window, or resumed inside it (the earlier steps were not seen): no verdict
        self.seen += 1
        signal = rec.get("pool/with_signal")
        if signal is None or signal > 0:
            self.silent = False
        self.rewards.append(float(rec.get("reward", 0.0)))
        if self.seen < self.window or not self.silent:
            return None
        self.message = self._message()
        warnings.warn(self.message, ZeroCreditWarning, stacklevel=2)
        return self.message

    def _message(self) -> str:
        w, top = self.window, max(self.rewards)
        head = (f"the credit was zero on every one of the first {w} RL step{'s' if w > 1 else ''} "
                f"({w} of {self.rl_steps}: the first 10%, rounded up to whole steps; pool/with_signal = 0): the policy gradient did nothing. ")
        if top == 0.0:
            cause = ("Likely cause: no sample was ever rewarded (mean reward 0 on every step): the verifier rejects "
                     "everything the starting policy writes; check the verifier on a few samples, warm-start first, or "
                     "raise n")
        elif self.objective.startswith("pass_at_k") and top < self.threshold:
            cause = (f"Likely cause: rewards were above 0 (mean up to {top:.3g}) but no sample reached correct_threshold = "
                     f"{self.threshold:g}, so none counts as correct for {self.objective!r}; lower correct_threshold to a "
                     "reward the verifier gives")
        elif self.objective.startswith("pass_at_k"):  # a mean at or above the threshold: some samples count as correct
            cause = (f"Likely cause: every pool was all-correct or all-wrong at correct_threshold = {self.threshold:g} "
                     f"(mean reward up to {top:.3g}), so the pass@k credit is zero; if the verifier gives scores rather "
                     "than 0/1 rewards, raise correct_threshold to the score that means correct; else raise n or "
                     "temperature, or use harder prompts")
        else:
            cause = (f"Likely cause: every pool was all-equal (mean reward up to {top:.3g}: every sample of a prompt "
                     "scored alike), so leave-one-out credit is zero; raise n or temperature, or use harder prompts")
        return head + cause
