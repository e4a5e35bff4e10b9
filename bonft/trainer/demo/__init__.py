"""The demo: does a best-of-N-aware objective buy pass@k at large k over leave-one-out REINFORCE?

From nothing, on a CPU: build a tiny GPT-2-style model, warm-start it on a task's
notebook (by default refunds, whose return prompts mostly skip the return: the
right rule is a rare mode of the warm start; ``DemoConfig.for_task("workshop")``
writes programs judged by unit tests in the sandbox, whose boxes family has such a
mode, with the task's own settings), then from that same warm start train

(a) leave-one-out REINFORCE (Kool et al. 2019) -- optimises the mean reward (pass@1),
(b) a pass@k-aware objective (unbiased pass@k credit, Chen et al. 2021; Walder & Karkhanis 2025), and
(c) the placebo: (b) with the outcomes shuffled within each pool -- the same credit sizes and no
    signal, so its drift is what noise alone does to the policy; a gain must exceed it,

with the same prompts per step, samples per prompt and steps, and evaluate every
policy on the same held-out prompts with the same sampling seeds: pass@k and
best-of-k under the task's imperfect proxy verifier, each as a mean with a
bootstrap interval over prompts and as a paired difference from the warm start
and from REINFORCE; the gradient signal-to-noise of each run; and the planner's
best sampling temperature per k. Writes ``summary.json``, ``comparison.png`` and
``comparison.md`` under the output directory; each stage is a normal trainer
run directory, so it can be inspected with ``bonft eval`` / ``bonft sample``.

:func:`run_study` (:mod:`.study`) compares every objective at its own best admissible learning
rate, chosen on a validation split with a placebo at every grid point, on main and replication
seeds fixed in advance, and BoN-SFT against plain SFT; it writes ``study.md``, ``study.json`` and
``frontier.png``.

Parts: :mod:`.pipeline` (the stages, their evaluation and tables), :mod:`.study` (the study) and
:mod:`.stats` (intervals, paired differences, per-prompt curves). This module only re-exports them.
"""
from bonft.trainer.demo.pipeline import (
    DemoConfig,
    collect_stage_pools,
    comparison_table,
    demo_report,
    gradient_summary,
    gradient_table,
    objective_config,
    run_demo,
    stage_config,
    temperature_table,
    warm_config,
)
from bonft.trainer.demo.study import (
    LR_GRID,
    REPLICATION_SEEDS,
    STUDY_OBJECTIVES,
    STUDY_SEEDS,
    StudyConfig,
    run_study,
)

__all__ = [
    "DemoConfig", "run_demo", "run_study", "StudyConfig", "STUDY_OBJECTIVES", "STUDY_SEEDS", "REPLICATION_SEEDS", "LR_GRID",
    "stage_config", "warm_config",
    "objective_config", "collect_stage_pools", "demo_report", "comparison_table", "gradient_summary", "gradient_table",
    "temperature_table",
]
