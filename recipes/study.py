"""The study: 3 seeds x all objectives (k annealing included), from a warm start per seed.

Writes runs/study/study.md, a markdown table of pass@k means over seeds with
95% t-intervals (and each seed's own comparison.md). Slow (about an hour on
2 CPU cores); the same as `bonft demo --study --out runs/study`.

    python recipes/study.py [OUT_DIR]
"""
import sys

from bonft.trainer.demo import DemoConfig, run_study

if __name__ == "__main__":
    run_study(DemoConfig(run_dir=sys.argv[1] if len(sys.argv) > 1 else "runs/study"), seeds=(0, 1, 2))
