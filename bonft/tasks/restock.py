"""The restock order: how many boxes must the shop order to reach a target count?

    "pens need 23 have 5 box 4 ?"   -> "5"     (ceil((23 - 5) / 4))
    "jars need 6 have 9 box 3 ?"    -> "0"     (enough on hand)

A ceiling division with a "nothing to order" case. Knobs: ``max_need``
(largest target), ``max_box`` (largest box size), ``enough_share`` (share of
prompts where the stock on hand already covers the need).
"""
from __future__ import annotations

import random

from bonft._core.checks import check_fraction, check_int
from bonft.tasks.base import Example, Task
from bonft.tasks.ledger import ITEMS


class RestockTask(Task):
    """Boxes to order: ``ceil(max(0, need - have) / box)``.

    max_need:     target drawn from 1..max_need, >= 2 (default 30).
    max_box:      box size drawn from 2..max_box, >= 2 (default 6).
    enough_share: share of prompts with have >= need (answer 0), in [0, 1] (default 0.1).
    """

    name = "restock"
    description = "boxes to order so the stock reaches a target (a ceiling division)"

    def __init__(self, *, max_need: int = 30, max_box: int = 6, enough_share: float = 0.1):
        super().__init__(
            max_need=check_int("max_need", max_need, min=2, max=9999),
            max_box=check_int("max_box", max_box, min=2, max=99),
            enough_share=check_fraction("enough_share", enough_share),
        )

    def _families(self) -> dict[str, float]:
        e = self.params["enough_share"]
        return {"order": 1.0 - e, "enough": e}

    def _make(self, rng: random.Random, family: str) -> Example:
        item = rng.choice(ITEMS)
        need = rng.randint(1, self.params["max_need"])
        box = rng.randint(2, self.params["max_box"])
        if family == "enough":
            have = rng.randint(need, need + self.params["max_box"])
        else:
            have = rng.randint(0, need - 1) if need > 1 else 0
        boxes = -(-max(0, need - have) // box)  # ceiling division
        answer = str(boxes)
        prompt = f"{item} need {need} have {have} box {box} ?"
        return Example(prompt=prompt, answer=answer, reference=answer,
                       meta={"family": family, "need": need, "have": have, "box": box})
