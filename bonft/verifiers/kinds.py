"""Verifiers by name, as recipes give them: built-in kinds with their knobs, or ``module:function``.

=================  ==========================================================================
``unit_tests``     :class:`~bonft.verifiers.fields.UnitTests` -- each prompt's unit tests,
                   taken from a field of its data row (knob ``field``, default ``"tests"``,
                   and :class:`~bonft.verifiers.CodeRunner`'s knobs), run in the sandbox.
``reward_model``   :class:`~bonft.verifiers.reward_model.RewardModel` -- a local
                   sequence-classification model directory (knobs ``path``, ``threshold``,
                   ``batch_size``, ``label``, ``max_length``; ``device`` defaults to the
                   trainer's).
``module:function`` any Python function or class (see :func:`~bonft.verifiers.load_verifier`;
                   loading runs the module's code: only load verifiers you have read).
=================  ==========================================================================
"""
from __future__ import annotations

import inspect
from typing import Callable

from bonft.verifiers.fields import UnitTests
from bonft.verifiers.reward_model import RewardModel
from bonft.verifiers.scoring import load_verifier

VERIFIER_KINDS: dict[str, type] = {"unit_tests": UnitTests, "reward_model": RewardModel}


def make_verifier(spec: str, params: dict | None = None, *, key: str = "verifier", device: str | None = None) -> Callable:
    """The verifier named ``spec`` (a kind of :data:`VERIFIER_KINDS` or ``module:function``) with knobs ``params``.

    key:    the recipe key that named it (for error messages, e.g. ``"eval_verifier"``).
    device: the trainer's device, the default ``device`` of a reward model.
    """
    if not isinstance(spec, str):
        raise TypeError(f"{key} must be a str (a verifier kind or 'module:function'), got {type(spec).__name__}")
    params = dict(params or {})
    if spec in VERIFIER_KINDS:
        kind = VERIFIER_KINDS[spec]
        knobs = [p for p in inspect.signature(kind.__init__).parameters if p not in ("self", "runner_options")]
        if kind is RewardModel and "path" not in params:
            raise ValueError(f"{key} = 'reward_model' needs {key}_params.path, the model directory; got "
                             + (f"knobs {sorted(params)}" if params else f"no {key}_params"))
        if kind is RewardModel and device is not None:
            params.setdefault("device", device)
        try:
            return kind(**params)
        except TypeError as e:
            if "unexpected keyword argument" in str(e):
                raise TypeError(f"{key}_params of {spec!r} must be among {knobs}"
                                + (" and CodeRunner's knobs" if kind is UnitTests else "") + f", got {sorted(params)}") from None
            raise
    if ":" in spec:
        if params:
            raise ValueError(f"{key}_params cannot take effect with {key} = {spec!r} (a 'module:function' verifier takes no "
                             f"knobs), got {sorted(params)}; drop them or build them into the function")
        return load_verifier(spec)
    raise ValueError(f"{key} must be one of {tuple(VERIFIER_KINDS)} or 'module:function', got {spec!r}")
