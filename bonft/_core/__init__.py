"""Shared primitives of every bonft layer: input checks, binomial ratios and U-statistic weights,
tie groups, seeds, bootstrap indices, JSON lines. Imports nothing else from bonft.

* :mod:`~bonft._core.checks` -- validation helpers (TypeError for types, ValueError for values);
* :mod:`~bonft._core.passk` -- binomial ratios, pass@k (Chen et al. 2021), their error;
* :mod:`~bonft._core.ustat` -- U-statistic weights of best-of-k over a sorted pool;
* :mod:`~bonft._core.ties` -- groups of tied scores;
* :mod:`~bonft._core.seeds` -- seed checks and derived streams;
* :mod:`~bonft._core.bootstrap` -- bootstrap resampling indices;
* :mod:`~bonft._core.jsonl` -- reading and writing JSON lines.
"""
