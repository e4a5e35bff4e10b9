"""Refunds: the shop ledger where a customer return puts items back on the shelf.

    "mugs 4 sold 2 got 5 ?"     -> "7"                          (a plain prompt)
    "lamps 7 sold 3 ret 2 ?"    -> "6"   (7 - 3 + 2)             (a return prompt)

The clerk's notebook (the warm-start references) mostly gets returns wrong: on
return prompts the reference follows the right rule ("ret q" adds q) only with
probability ``rule_share`` and otherwise the clerk's habit of skipping the
return line (7 - 3 = 4). A model warm-started on the notebook therefore knows
the rule -- it is a rare but present mode -- and applies it to a return
prompt in about ``rule_share`` of its samples. Reinforcement learning with the
exact answers can find that mode and make it common; the rule is the same for
every prompt, so what is learned carries over to unseen prompts.
"""
from __future__ import annotations

import random
from typing import Sequence

from bonft._core.checks import check_fraction, check_int
from bonft.tasks.base import Example, NumericProxy, Task
from bonft.tasks.ledger import ITEMS


class RefundsTask(Task):
    """Closing stock of a ledger with sales, deliveries and customer returns.

    n_moves:      movements after the opening stock, >= 2 (default 2); a return prompt has one "ret".
    max_qty:      quantities are drawn from 1..max_qty, opening stock from 0..max_qty (default 9).
    return_share: share of return prompts, in [0, 1] (default 0.4).
    rule_share:   share of the notebook's return prompts whose reference applies the return
                  rule; the others skip the return line (default 0.05).
    """

    name = "refunds"
    description = "closing stock of a ledger with customer returns; the warm-start notebook mostly skips returns"
    proxy_label = "last digit, smaller counts first"

    def __init__(self, *, n_moves: int = 2, max_qty: int = 9, return_share: float = 0.4, rule_share: float = 0.05):
        super().__init__(
            n_moves=check_int("n_moves", n_moves, min=2, max=6),
            max_qty=check_int("max_qty", max_qty, min=1, max=999),
            return_share=check_fraction("return_share", return_share),
            rule_share=check_fraction("rule_share", rule_share),
        )

    def _families(self) -> dict[str, float]:
        h = self.params["return_share"]
        return {"plain": 1.0 - h, "return": h}

    def _make(self, rng: random.Random, family: str) -> Example:
        q, moves = self.params["max_qty"], self.params["n_moves"]
        item = rng.choice(ITEMS)
        stock = rng.randint(0, q)
        skipped = stock  # the clerk's count, which skips returns
        words = [item, str(stock)]
        ret_at = rng.randrange(1, moves) if family == "return" else -1  # never the first movement
        for j in range(moves):
            if j == ret_at:
                k = rng.randint(1, q)
                stock += k
                words += ["ret", str(k)]
            elif stock > 0 and skipped > 0 and rng.random() < 0.5:
                k = rng.randint(1, min(q, stock, skipped))
                stock -= k
                skipped -= k
                words += ["sold", str(k)]
            else:
                k = rng.randint(1, q)
                stock += k
                skipped += k
                words += ["got", str(k)]
        answer = str(stock)
        follows_rule = family == "plain" or rng.random() < self.params["rule_share"]
        reference = answer if follows_rule else str(skipped)
        return Example(prompt=" ".join(words) + " ?", answer=answer, reference=reference,
                       meta={"family": family, "skipped": skipped, "rule_in_reference": follows_rule})

    def proxy_verifier(self, examples: Sequence[Example]) -> "LastDigitCheck":
        return LastDigitCheck(examples, self.extract_answer)


class LastDigitCheck(NumericProxy):
    """A cheap, imperfect stock-take: ``Verdicts(scores=proxy, rewards=exact)``.

    ``proxy = [last digit of the answer equals the truth's] * (1 - answer / 100)`` for an integer
    answer in 0..99, else 0: the last digit is checked against the shelf label, and among answers that
    pass, a cautious stock-taker believes the smaller count.

    How it errs: every correct answer passes, and so does a wrong answer off by a multiple of 10
    (one in ten of the wrong answers spread over the range); a passing wrong answer *below* the truth
    outscores the truth. Best-of-k under this proxy rises as a policy puts more mass on the right
    answer, but with many samples a policy that also produces "truth - 10" loses to it: the
    proxy can be gamed at large k.
    """

    def proxy_score(self, answer: int, truth: int) -> float:
        return 1.0 - answer / 100.0 if 0 <= answer <= 99 and answer % 10 == truth % 10 else 0.0
