"""The two jobs a verifier has in a run, named apart: the training verifier and the evaluation verifier.

* The **verifier** (recipe key ``verifier``) scores the samples during training
  (its scores select the best sample; its rewards, or scores, are what the
  objective credits).
* The **evaluation verifier** (recipe key ``eval_verifier``) gives the rewards
  that define pass@k in evaluation: the checker you trust.

Evaluation reports best-of-k under the verifier (the evaluation verifier's
reward of the sample the training verifier ranks first among k) beside pass@k
under the evaluation verifier, so a gap between them -- reward hacking -- stays
visible for every task.

Default evaluation verifier: for the built-in tasks, the task's exact answer
checker; for the user's data (``task = "user"`` or ``"jsonl"``), the exact
checker when the verifier is ``"exact"``, else the verifier itself, whose
rewards must then be 0 or 1 (checked at every evaluation; a reward model
without a threshold gives no 0/1 rewards and needs an explicit evaluation
verifier).

Names (recipe keys ``verifier`` / ``eval_verifier``, knobs in ``verifier_params``
/ ``eval_verifier_params``): ``"exact"`` (the task's answer check), ``"proxy"``
(a built-in task's imperfect proxy), the kinds of
:data:`bonft.verifiers.kinds.VERIFIER_KINDS` (``"unit_tests"``,
``"reward_model"``) and ``"module:function"``. Verifiers that read fields of the
prompt's data row are bound to the rows before any step
(:func:`bonft.verifiers.fields.bind_rows`).

Caution: loading ``module:function`` runs that module's code, and ``unit_tests``
runs model-written code in a sandbox that is not a security boundary.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

from bonft.verifiers.fields import needed_fields
from bonft.verifiers.kinds import VERIFIER_KINDS, make_verifier
from bonft.verifiers.reward_model import RewardModel

TASK_VERIFIERS = ("exact", "proxy")
USER_DATA_TASKS = ("user", "jsonl")


@dataclass
class Roles:
    """The verifiers of a run.

    verifier / verifier_name:           scores training samples.
    eval_verifier / eval_verifier_name: its rewards define pass@k in evaluation.
    eval_is_verifier:                   the training verifier by default, so its rewards must be 0/1.
    others:                             further verifiers with a best-of-k row in evaluation (a task's proxy).
    """

    verifier: Callable
    verifier_name: str
    eval_verifier: Callable
    eval_verifier_name: str
    eval_is_verifier: bool = False
    others: dict = field(default_factory=dict)

    def evaluation_verifiers(self) -> dict[str, Callable]:
        """name -> verifier for an evaluation: the evaluation verifier, the verifier and the others (each once)."""
        out = {self.eval_verifier_name: self.eval_verifier, self.verifier_name: self.verifier}
        for name, v in self.others.items():
            out.setdefault(name, v)
        return out


def _check_spec(key: str, spec: Any, allow_empty: bool = False) -> str:
    if not isinstance(spec, str):
        raise TypeError(f"{key} must be a string, got {type(spec).__name__} {spec!r}")
    if spec == "" and allow_empty:
        return spec
    if spec not in TASK_VERIFIERS and spec not in VERIFIER_KINDS and ":" not in spec:
        raise ValueError(f"{key} must be 'exact', 'proxy', one of {tuple(VERIFIER_KINDS)} or 'module:function', got {spec!r}")
    return spec


def check_spec(key: str, spec: Any, params: Any, *, allow_empty: bool = False) -> None:
    """Validate a verifier name and its knobs without loading anything (for config validation)."""
    _check_spec(key, spec, allow_empty)
    if not isinstance(params, dict):
        raise TypeError(f"{key}_params must be a table of the {key}'s knobs, got {type(params).__name__}")
    if params and (spec in TASK_VERIFIERS or spec == ""):
        what = "the task's own checker" if spec else "the default evaluation verifier"
        raise ValueError(f"{key}_params cannot take effect with {key} = {spec!r} ({what} takes no knobs), got {sorted(params)}")


def _make(task: Any, examples: Sequence[Any], key: str, spec: str, params: dict, device: str | None) -> Callable:
    if spec == "exact":
        return task.verifier(examples)
    if spec == "proxy":
        proxy = task.proxy_verifier(examples) if hasattr(task, "proxy_verifier") else None
        if proxy is None:
            raise ValueError(f"{key} = 'proxy' needs a task with a proxy verifier; task {getattr(task, 'name', task)!r} has none")
        return proxy
    tests_field = (getattr(task, "params", None) or {}).get("tests_field")
    if spec == "unit_tests" and tests_field and "field" not in params:  # the task's tests column, unless named here
        params = {**params, "field": tests_field}
    ver = make_verifier(spec, params, key=key, device=device)
    if hasattr(task, "bind_verifier"):
        return task.bind_verifier(ver, examples)
    need = needed_fields(ver)
    if need or hasattr(ver, "bind"):
        raise ValueError(f"{key} = {spec!r} reads fields of each prompt's data row ({', '.join(need) or 'rows'}), which only "
                         f"task = 'user' has; task {getattr(task, 'name', task)!r} has no rows")
    return ver


def named_verifier(task: Any, examples: Sequence[Any], spec: str, params: dict | None = None, *, key: str = "verifier",
                   device: str | None = None) -> Callable:
    """The verifier a recipe names ``spec`` (with knobs ``params``) for ``task``'s ``examples``, built and
    bound to their data rows as :func:`build_roles` builds it for training (``bonft check-verifier NAME --recipe``)."""
    params = dict(params or {})
    check_spec(key, spec, params)
    return _make(task, examples, key, spec, params, device)


def build_roles(task: Any, examples: Sequence[Any], *, verifier: str = "exact", verifier_params: dict | None = None,
                eval_verifier: str = "", eval_verifier_params: dict | None = None, device: str | None = None) -> Roles:
    """The training verifier and the evaluation verifier of ``task`` for ``examples`` (train and held-out together).

    eval_verifier: "" picks the default (module docstring). Each is built once; an evaluation
    verifier named and configured as the verifier is the same object (one reward model in memory).
    """
    verifier_params, eval_verifier_params = dict(verifier_params or {}), dict(eval_verifier_params or {})
    check_spec("verifier", verifier, verifier_params)
    check_spec("eval_verifier", eval_verifier, eval_verifier_params, allow_empty=True)
    user_data = getattr(task, "name", "") in USER_DATA_TASKS
    train = _make(task, examples, "verifier", verifier, verifier_params, device)
    by_default = eval_verifier == ""
    if by_default:
        if not user_data or verifier == "exact":
            eval_verifier = "exact"
        else:
            if isinstance(train, RewardModel) and train.threshold is None:
                raise ValueError(f"eval_verifier must be set: the verifier {verifier!r} gives scores, not 0/1 rewards (no "
                                 "verifier_params.threshold), so it cannot define pass@k; set eval_verifier = 'exact' (with "
                                 "an answer_field), 'unit_tests' or 'module:function', or give the reward model a threshold")
            eval_verifier, eval_verifier_params = verifier, verifier_params
    if eval_verifier == verifier and eval_verifier_params == verifier_params:
        judge = train
    else:
        judge = _make(task, examples, "eval_verifier", eval_verifier, eval_verifier_params, device)
    others = {}
    if not user_data and hasattr(task, "proxy_verifier"):
        proxy = task.proxy_verifier(examples)
        if proxy is not None:
            others["proxy"] = train if verifier == "proxy" else proxy
    return Roles(verifier=train, verifier_name=verifier, eval_verifier=judge, eval_verifier_name=eval_verifier,
                 eval_is_verifier=by_default and judge is train and eval_verifier != "exact", others=others)


def check_eval_rewards(rewards: Any, roles: Roles) -> None:
    """With the training verifier as the default evaluation verifier, its rewards must all be 0 or 1 (they define pass@k)."""
    import numpy as np

    if not roles.eval_is_verifier:
        return
    r = np.asarray(rewards, dtype=np.float64)
    bad = r[(r != 0.0) & (r != 1.0)]
    if bad.size:
        raise ValueError(f"eval_verifier must be set: the verifier {roles.verifier_name!r} is the default evaluation verifier "
                         f"but gave rewards other than 0 and 1 ({bad.size} of {r.size}, e.g. {float(bad[0]):.4g}), so it "
                         "cannot define pass@k; set eval_verifier (e.g. 'exact', 'unit_tests' or 'module:function') to a 0/1 checker")
