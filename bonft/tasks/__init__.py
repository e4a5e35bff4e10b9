"""Built-in tasks (a small shop's ledger, its refunds and restock orders), the character tokenizer, user prompt sets
(``UserTask``: a JSONL file or a local ``datasets`` dataset with a field map).

    task = get_task("ledger", hard_share=0.3)
    train, evals = task.split(n_train=2000, n_eval=200, seed=0)
    verify = task.verifier(evals)            # exact: Verdicts(scores=reward, rewards=reward)
    proxy = task.proxy_verifier(evals)       # imperfect: Verdicts(scores=proxy, rewards=exact)
"""
from __future__ import annotations

from typing import Any

from bonft.tasks.base import ExactVerifier, Example, Task, extract_integer
from bonft.tasks.ledger import LedgerPlausibility, LedgerTask
from bonft.tasks.prompts import PromptFileTask, exact_match_verifier, load_prompts_jsonl
from bonft.tasks.refunds import LastDigitCheck, RefundsTask
from bonft.tasks.restock import RestockTask
from bonft.tasks.tokenizer import build_tokenizer
from bonft.tasks.user import UserTask

TASKS: dict[str, type] = {
    "ledger": LedgerTask,
    "restock": RestockTask,
    "refunds": RefundsTask,
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
            import inspect

            knobs = [p for p in inspect.signature(TASKS[name].__init__).parameters if p != "self"]
            raise TypeError(f"params of task {name!r} must be among {knobs}, got {sorted(params)}") from None
        raise


__all__ = [
    "TASKS", "get_task", "Task", "Example", "ExactVerifier", "extract_integer",
    "LedgerTask", "LedgerPlausibility", "RefundsTask", "LastDigitCheck", "RestockTask", "PromptFileTask", "UserTask",
    "build_tokenizer", "load_prompts_jsonl", "exact_match_verifier",
]
