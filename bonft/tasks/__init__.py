"""Built-in tasks (a small shop's ledger, its refunds and restock orders; a workshop's one-line Python helpers judged
by unit tests), the character tokenizer, user prompt sets
(``UserTask``: a JSONL file or a local ``datasets`` dataset with a field map).

    task = get_task("ledger", hard_share=0.3)
    train, evals = task.split(n_train=2000, n_eval=200, seed=0)
    verify = task.verifier(evals)            # exact: Verdicts(scores=reward, rewards=reward)
    proxy = task.proxy_verifier(evals)       # imperfect: Verdicts(scores=proxy, rewards=exact)
"""
from bonft.tasks.base import ExactVerifier, Example, Task, extract_integer
from bonft.tasks.ledger import LedgerPlausibility, LedgerTask
from bonft.tasks.prompts import PromptFileTask, exact_match_verifier, load_prompts_jsonl
from bonft.tasks.refunds import LastDigitCheck, RefundsTask
from bonft.tasks.registry import TASKS, get_task
from bonft.tasks.restock import RestockTask
from bonft.tasks.tokenizer import build_tokenizer
from bonft.tasks.user import UserTask
from bonft.tasks.workshop import ProgramTests, VisibleShare, WorkshopTask

__all__ = [
    "TASKS", "get_task", "Task", "Example", "ExactVerifier", "extract_integer",
    "LedgerTask", "LedgerPlausibility", "RefundsTask", "LastDigitCheck", "RestockTask", "PromptFileTask", "UserTask",
    "WorkshopTask", "ProgramTests", "VisibleShare",
    "build_tokenizer", "load_prompts_jsonl", "exact_match_verifier",
]
