"""The registry of built-in tasks: a name (the recipe's ``task`` key) -> its class, and :func:`get_task`."""
from __future__ import annotations

import inspect
from typing import Any

from bonft.tasks.base import Task
from bonft.tasks.ledger import LedgerTask
from bonft.tasks.prompts import PromptFileTask
from bonft.tasks.refunds import RefundsTask
from bonft.tasks.restock import RestockTask
from bonft.tasks.user import UserTask
from bonft.tasks.workshop import WorkshopTask

TASKS: dict[str, type] = {
    "ledger": LedgerTask,
    "restock": RestockTask,
    "refunds": RefundsTask,
    "workshop": WorkshopTask,
    "jsonl": PromptFileTask,
    "user": UserTask,
}


def get_task(name: str, **params: Any) -> Task:
    """The task called ``name`` (a key of :data:`TASKS`) with its knobs set from ``params``."""
    if not isinstance(name, str):
        raise TypeError(f"name must be one of {tuple(TASKS)}, got {type(name).__name__} {name!r}")
    if name not in TASKS:
        raise ValueError(f"name must be one of {tuple(TASKS)}, got {name!r}")
    try:
        return TASKS[name](**params)
    except TypeError as e:
        if "unexpected keyword argument" in str(e):
            knobs = [p for p in inspect.signature(TASKS[name].__init__).parameters if p != "self"]
            unknown = sorted(set(params) - set(knobs))
            raise TypeError(f"params of task {name!r} must be among {knobs}, got unknown {unknown}") from None
        raise
