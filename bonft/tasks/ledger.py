"""The shop ledger: follow a short stock ledger and report the closing count.

A prompt opens with an item and its opening stock, then lists stock
movements, and asks for the closing stock::

    "lamps 7 sold 3 got 5 ?"      -> "9"      (7 - 3 + 5)
    "mugs 4 got 6 sold 2 x3 ?"    -> "24"     ((4 + 6 - 2) * 3): a "hard" prompt

The "hard" family ends with ``xM`` ("the shop merges M equal branches": the
closing stock is multiplied by M). Its answers are larger, spread over many
more values and need a multiplication a small warm-started model rarely gets
right, so the per-sample success on those prompts is low but not zero --
the regime where sampling many responses and keeping the best pays off.
(Measured: a 2-layer, 128-wide GPT-2-style model warm-started for 600 steps
of batch 128 at lr 3e-3 on 2,000 examples with hard_share=0.3 reached pass@1
0.18 / pass@32 0.91 on easy prompts and 0.09 / 0.53 on hard ones, where 14 of
30 hard prompts had no success in 32 samples; with max_factor=3 the hard
family reached pass@32 0.77.)

Knobs: ``n_moves`` (movements per prompt), ``max_qty`` (largest quantity),
``hard_share`` (share of hard prompts), ``max_factor`` (largest M).
Stock never goes negative: a sale never exceeds the stock on hand.
"""
from __future__ import annotations

import random
from typing import Sequence

from bonft._core.checks import check_fraction, check_int
from bonft.tasks.base import Example, NumericProxy, Task

ITEMS = ("lamps", "mugs", "pens", "hats", "bowls", "socks", "jars", "kites")


class LedgerTask(Task):
    """Closing stock of a short shop ledger (see module docstring).

    n_moves:    movements ("sold q" / "got q") after the opening stock, >= 1 (default 2).
    max_qty:    quantities are drawn from 1..max_qty (opening stock from 0..max_qty), >= 1 (default 9).
    hard_share: share of prompts of the hard family (closing stock times M), in [0, 1] (default 0.25).
    max_factor: M is drawn from 2..max_factor, >= 2 (default 9; 3 makes the hard family much easier).
    """

    name = "ledger"
    description = "closing stock of a shop ledger; a 'hard' family multiplies it by a factor"
    proxy_label = "parity and closeness"

    def __init__(self, *, n_moves: int = 2, max_qty: int = 9, hard_share: float = 0.25, max_factor: int = 9):
        super().__init__(
            n_moves=check_int("n_moves", n_moves, min=1, max=6),
            max_qty=check_int("max_qty", max_qty, min=1, max=999),
            hard_share=check_fraction("hard_share", hard_share),
            max_factor=check_int("max_factor", max_factor, min=2, max=9),
        )

    def _families(self) -> dict[str, float]:
        h = self.params["hard_share"]
        return {"easy": 1.0 - h, "hard": h}

    def _make(self, rng: random.Random, family: str) -> Example:
        q = self.params["max_qty"]
        item = rng.choice(ITEMS)
        stock = rng.randint(0, q)
        words = [item, str(stock)]
        for _ in range(self.params["n_moves"]):
            if stock > 0 and rng.random() < 0.5:
                k = rng.randint(1, min(q, stock))
                stock -= k
                words += ["sold", str(k)]
            else:
                k = rng.randint(1, q)
                stock += k
                words += ["got", str(k)]
        factor = 1
        if family == "hard":
            factor = rng.randint(2, self.params["max_factor"])
            words.append(f"x{factor}")
        answer = str(stock * factor)
        prompt = " ".join(words) + " ?"
        return Example(prompt=prompt, answer=answer, reference=answer,
                       meta={"family": family, "factor": factor, "closing": stock})

    def proxy_verifier(self, examples: Sequence[Example]) -> "LedgerPlausibility":
        return LedgerPlausibility(examples, self.extract_answer)


class LedgerPlausibility(NumericProxy):
    """A cheap, imperfect ledger check: ``Verdicts(scores=proxy, rewards=exact)``.

    ``proxy = 0.5 * [parity of the answer is right] + 0.5 * [|answer - truth| <= tol]``
    with ``tol = max(2, truth // 5)``; 0 for a response with no integer answer.

    How it errs (by design, so "verifier != reward" can be shown): every correct
    answer scores 1, but so does every *near miss of the right parity*
    (``truth +- 2``, or within 20 % for large counts), and a wrong answer of the
    right parity far away still gets 0.5. It never rejects a correct answer, so
    its errors are false positives, and they are most common on the hard
    family, whose large answers give a wide tolerance. Best-of-N with this
    proxy picks near misses; a policy trained on it learns to hit "about right".
    """

    def proxy_score(self, answer: int, truth: int) -> float:
        return 0.5 * ((answer - truth) % 2 == 0) + 0.5 * (abs(answer - truth) <= max(2, truth // 5))
